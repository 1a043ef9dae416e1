"""Figures of the mechanism stage; each takes a result object from :mod:`gapbook.mechanism`.

1. :func:`relation_overview` - which incomplete variables go missing in rows that differ
   on which other variables, and by how much?
2. :func:`strongest_relations` - for the clearest relations, how does the compared
   variable's distribution differ between rows with and without the value?
3. :func:`pattern_contributions` - which missingness patterns drive Little's statistic?
4. :func:`missingness_odds_ratios` - in the missingness models, which fully observed
   variables change the odds of a value being missing?
"""
from __future__ import annotations

import math
from typing import List, Optional

import numpy as np
import pandas as pd
from matplotlib.lines import Line2D

from . import (BACKGROUND, EMPHASIS, GRID, MAX_VARIABLES_SHOWN, MISSING, NEUTRAL, OBSERVED, REFERENCE, UNTESTED,
               new_figure, shown_of)
from .palette import scale, text_on
from ..inference import format_p
from ..little import LittleTest
from ..mechanism import GroupComparison, MissingnessModels

__all__ = ["relation_overview", "strongest_relations", "pattern_contributions", "missingness_odds_ratios"]

SMD_CAP = 0.5          # colour saturates here; |SMD| >= 0.1 is often read as a meaningful imbalance (Austin 2009)


def relation_overview(groups: GroupComparison, annotate: Optional[bool] = None):
    """A grid of incomplete variables (rows) by compared variables (columns).

    Colour is the absolute standardised difference between rows where the row variable
    is missing and rows where it is observed; a dot marks a Holm-adjusted p-value below
    alpha; a grey cell was not tested (too few rows, or no variation).

    Parameters
    ----------
    groups : GroupComparison
        The missing-versus-observed comparisons.
    annotate : bool, optional
        Write the values in the cells; default when the grid is small.

    Returns
    -------
    matplotlib.figure.Figure
    """
    table = groups.comparisons
    rows = list(dict.fromkeys(table["incomplete_variable"]))
    columns = list(dict.fromkeys(list(rows) + list(table["compared_variable"])))
    columns = [c for c in columns if c in set(table["compared_variable"]) or c in rows]
    n_rows, n_columns = len(rows), len(columns)
    if n_rows > MAX_VARIABLES_SHOWN or n_columns > MAX_VARIABLES_SHOWN:
        # the pairs with the largest differences decide which variables are shown
        strength = table.assign(size=table["smd"].abs().fillna(0))
        rows = [v for v in rows if v in set(strength.groupby("incomplete_variable")["size"].max()
                                            .sort_values(ascending=False, kind="stable").index[:MAX_VARIABLES_SHOWN])]
        columns = [c for c in columns if c in set(strength.groupby("compared_variable")["size"].max()
                                                  .sort_values(ascending=False, kind="stable")
                                                  .index[:MAX_VARIABLES_SHOWN])]
        table = table[table["incomplete_variable"].isin(rows) & table["compared_variable"].isin(columns)]
    if not rows:
        figure, axes = new_figure(6, 2)
        axes.text(0.5, 0.5, "No variable has missing values: nothing to compare.", ha="center", va="center")
        axes.set_axis_off()
        return figure
    grid = np.full((len(rows), len(columns)), np.nan)
    untested = np.zeros_like(grid, dtype=bool)
    evidence = np.zeros_like(grid, dtype=bool)
    r_index = {v: i for i, v in enumerate(rows)}
    c_index = {w: j for j, w in enumerate(columns)}
    for _, row in table.iterrows():
        i, j = r_index[row["incomplete_variable"]], c_index[row["compared_variable"]]
        grid[i, j] = abs(row["smd"]) if np.isfinite(row["smd"]) else np.nan
        untested[i, j] = not np.isfinite(row["p_adjusted"])
        evidence[i, j] = bool(row["evidence"])
    width = max(6.0, 0.55 * len(columns) + 2.5)
    height = max(2.6, 0.45 * len(rows) + 1.8)
    figure, axes = new_figure(width, height)
    shown = np.ma.masked_invalid(np.clip(grid, 0, SMD_CAP))
    image = axes.imshow(shown, cmap=scale("magnitude"), vmin=0, vmax=SMD_CAP, aspect="auto")
    for i in range(len(rows)):
        for j in range(len(columns)):
            if rows[i] == columns[j]:
                axes.add_patch(_cell(i, j, BACKGROUND, hatch="////"))
            elif untested[i, j]:
                axes.add_patch(_cell(i, j, UNTESTED))
    if annotate is None:
        annotate = len(rows) * len(columns) <= 300
    if annotate:
        for i in range(len(rows)):
            for j in range(len(columns)):
                if np.isfinite(grid[i, j]) and rows[i] != columns[j]:
                    axes.text(j, i + (0.18 if evidence[i, j] else 0), f"{grid[i, j]:.2f}", ha="center", va="center",
                              fontsize=7, color=text_on(grid[i, j] / SMD_CAP))
    yy, xx = np.nonzero(evidence)
    axes.scatter(xx, yy - (0.18 if annotate else 0), s=22, color=REFERENCE, marker="o", zorder=3)
    axes.set_xticks(range(len(columns)), columns, rotation=45, ha="right")
    # Row labels carry the size of the missing group: a large difference over 4 rows is mostly noise.
    n_missing = table.groupby("incomplete_variable", sort=False)["n_missing_group"].max()
    axes.set_yticks(range(len(rows)), [f"{v} ({int(n_missing[v])} missing)" for v in rows])
    axes.set_xlabel("compared variable")
    axes.set_ylabel("variable with missing values")
    bar = figure.colorbar(image, ax=axes, shrink=0.85, extend="max")
    bar.set_label("|standardised difference|\nmissing vs observed rows")
    legend = [Line2D([], [], marker="o", linestyle="", color=REFERENCE,
                     label=f"Holm-adjusted p < {groups.alpha:g}"),
              Line2D([], [], marker="s", linestyle="", color=UNTESTED, markersize=9, label="not tested")]
    axes.legend(handles=legend, loc="upper left", bbox_to_anchor=(0, -0.32 if len(columns) > 6 else -0.2),
                ncol=2, frameon=False, fontsize=8)
    cut = (shown_of(len(rows), n_rows, "variables with missing values", "with the largest differences")
           + shown_of(len(columns), n_columns, "compared variables", "with the largest differences"))
    axes.set_title("Do rows lacking a value differ from rows that have it?" + cut, loc="left")
    return figure


def _cell(i: int, j: int, colour: str, hatch: Optional[str] = None):
    from matplotlib.patches import Rectangle
    return Rectangle((j - 0.5, i - 0.5), 1, 1, facecolor=colour, edgecolor=GRID if hatch else "none",
                     hatch=hatch, linewidth=0)


def strongest_relations(groups: GroupComparison, top: int = 6, columns: int = 3):
    """Small multiples for the relations with the smallest adjusted p-values.

    A numeric compared variable is shown as two cumulative distributions (rows where the
    incomplete variable is missing vs observed, group means as dashed lines); a categorical
    one as the share of each level in the two groups.

    Parameters
    ----------
    groups : GroupComparison
        The missing-versus-observed comparisons.
    top : int
        How many relations to show.
    columns : int
        Panels per row.

    Returns
    -------
    matplotlib.figure.Figure
    """
    chosen = groups.strongest(top)
    if chosen.empty:
        figure, axes = new_figure(6, 2)
        axes.text(0.5, 0.5, "No comparison could be tested.", ha="center", va="center")
        axes.set_axis_off()
        return figure
    columns = min(columns, len(chosen))
    n_rows = math.ceil(len(chosen) / columns)
    figure, axes = new_figure(4.0 * columns, 3.1 * n_rows)
    figure.clear()
    panels = figure.subplots(n_rows, columns, squeeze=False)
    for k, (_, row) in enumerate(chosen.iterrows()):
        ax = panels[k // columns][k % columns]
        v, w = row["incomplete_variable"], row["compared_variable"]
        quantiles = groups.quantiles[(groups.quantiles["incomplete_variable"] == v)
                                     & (groups.quantiles["compared_variable"] == w)]
        if len(quantiles):
            _cumulative_panel(ax, quantiles, row, v)
        else:
            shares = groups.level_shares[(groups.level_shares["incomplete_variable"] == v)
                                         & (groups.level_shares["compared_variable"] == w)]
            _shares_panel(ax, shares, v)
        smd = f", SMD {row['smd']:.2f}" if np.isfinite(row["smd"]) else ""
        ax.set_title(f"{w} by whether {v} is missing\n{row['test']}, Holm-adjusted {format_p(row['p_adjusted'])}"
                     f"{smd}", fontsize=9, loc="left")
    for k in range(len(chosen), n_rows * columns):
        panels[k // columns][k % columns].set_axis_off()
    handles = [Line2D([], [], color=MISSING, lw=2.5, label="value missing"),
               Line2D([], [], color=OBSERVED, lw=2.5, label="value observed")]
    figure.legend(handles=handles, loc="outside lower center", ncol=2, frameon=False)
    figure.suptitle("For the clearest relations, how do rows lacking the value differ?", x=0.01, ha="left")
    return figure


def _cumulative_panel(ax, quantiles: pd.DataFrame, row: pd.Series, v: str) -> None:
    for group, colour, mean in (("observed", OBSERVED, row["mean_observed_group"]),
                                ("missing", MISSING, row["mean_missing_group"])):
        part = quantiles[quantiles["group"] == group]
        if part.empty:
            continue
        ax.plot(part["value"], part["probability"], color=colour, lw=2)
        if np.isfinite(mean):
            ax.axvline(mean, color=colour, lw=1, ls="--")
    ax.set_xlabel(f"{row['compared_variable']}  (n missing {row['n_missing_group']}, "
                  f"observed {row['n_observed_group']})", fontsize=8)
    ax.set_ylabel("cumulative share of rows", fontsize=8)
    ax.set_ylim(0, 1)
    ax.grid(alpha=0.3, lw=0.5)


def _shares_panel(ax, shares: pd.DataFrame, v: str) -> None:
    levels = list(dict.fromkeys(shares["level"]))
    positions = np.arange(len(levels))
    for offset, group, colour in ((-0.2, "missing", MISSING), (0.2, "observed", OBSERVED)):
        part = shares[shares["group"] == group].set_index("level").reindex(levels)
        ax.barh(positions + offset, part["share"].fillna(0).to_numpy(), height=0.38, color=colour)
    ax.set_yticks(positions, levels, fontsize=8)
    ax.invert_yaxis()
    ax.set_xlim(0, 1)
    ax.set_xlabel("share of rows in the group", fontsize=8)
    ax.grid(axis="x", alpha=0.3, lw=0.5)


def pattern_contributions(test: LittleTest, top: int = 15):
    """Each missingness pattern's part of Little's statistic, with its rough size under MCAR.

    Under MCAR a pattern's part is roughly chi-square with as many df as it has observed
    variables (less a share for estimating the mean), so a bar far beyond its tick points to
    the pattern whose rows differ most from what the ML mean predicts (Little 1988).

    Parameters
    ----------
    test : LittleTest
        Little's test.
    top : int
        How many patterns to show (the largest parts).

    Returns
    -------
    matplotlib.figure.Figure
    """
    patterns = test.patterns
    if patterns.empty or not np.isfinite(test.statistic):
        figure, axes = new_figure(6, 2)
        message = " ".join(test.notes) or "Little's test was not computed."
        axes.text(0.5, 0.5, _wrap(message, 90), ha="center", va="center", fontsize=9)
        axes.set_axis_off()
        return figure
    shown = patterns.sort_values("contribution", ascending=False, kind="stable").head(top)
    names = [c for c in patterns.columns if c not in ("n_rows", "n_observed", "contribution")]
    labels = [_pattern_label(r, names) for _, r in shown.iterrows()]
    figure, axes = new_figure(7.5, max(2.5, 0.38 * len(shown) + 1.5))
    y = np.arange(len(shown))
    axes.barh(y, shown["contribution"], color=[NEUTRAL if r["n_observed"] == len(names) else MISSING
                                               for _, r in shown.iterrows()])
    axes.scatter(shown["n_observed"], y, marker="|", s=160, color=REFERENCE, zorder=3,
                 label="rough size under MCAR (observed variables)")
    axes.set_yticks(y, labels, fontsize=8)
    axes.invert_yaxis()
    axes.set_xlabel("part of Little's d\u00b2")
    axes.legend(loc="lower right", frameon=False, fontsize=8)
    figure.suptitle(f"Which patterns drive Little's test?\nd\u00b2 = {test.statistic:.1f}, df = {test.df}, "
                    f"{format_p(test.p_value)}; grey: the complete pattern", x=0.01, ha="left", fontsize=10)
    return figure


def _pattern_label(row: pd.Series, names: List[str]) -> str:
    gaps = [n for n in names if row[n] == 0]
    text = "nothing missing" if not gaps else "missing " + ", ".join(gaps)
    return f"{_wrap(text, 45)}  (n={int(row['n_rows'])})"


def _wrap(text: str, width: int) -> str:
    import textwrap
    return "\n".join(textwrap.wrap(text, width)) or text


def missingness_odds_ratios(models: MissingnessModels, top: int = 3):
    """Odds ratios (with CIs, log scale) of being missing, for the models with the smallest LR p-values.

    Parameters
    ----------
    models : MissingnessModels
        The fitted missingness models.
    top : int
        How many models to show.

    Returns
    -------
    matplotlib.figure.Figure
    """
    fits = models.model_fit[np.isfinite(models.model_fit["lr_p_value"].astype(float))]
    if fits.empty:
        figure, axes = new_figure(6, 2)
        axes.text(0.5, 0.5, "No missingness model could be fitted (see the table notes).", ha="center", va="center")
        axes.set_axis_off()
        return figure
    chosen = fits.sort_values("lr_p_value", kind="stable").head(top)["incomplete_variable"].tolist()
    table = models.terms[models.terms["incomplete_variable"].isin(chosen) & (models.terms["term"] != "Intercept")
                         & models.terms["odds_ratio"].notna()]
    table = table.assign(_order=table["incomplete_variable"].map({v: i for i, v in enumerate(chosen)}))
    table = table.sort_values("_order", kind="stable").reset_index(drop=True)
    figure, axes = new_figure(7.5, max(2.5, 0.3 * len(table) + 0.5 * len(chosen) + 1.2))
    y, ticks, labels, position = [], [], [], 0.0
    previous = None
    for _, row in table.iterrows():
        if row["incomplete_variable"] != previous:
            if previous is not None:
                position += 0.8
            axes.text(0.0, position - 0.05, f"missing {row['incomplete_variable']} (AUC {row['auc']:.2f})",
                      transform=axes.get_yaxis_transform(), fontsize=8, fontweight="bold", va="bottom",
                      color=REFERENCE)
            position += 0.5
            previous = row["incomplete_variable"]
        y.append(position)
        ticks.append(position)
        labels.append(row["term"])
        position += 1.0
    y = np.array(y)
    colours = [EMPHASIS if p < models.alpha else OBSERVED for p in table["p_value"]]
    axes.hlines(y, table["ci_lower"], table["ci_upper"], color=colours, lw=2)
    axes.scatter(table["odds_ratio"], y, color=colours, zorder=3, s=18)
    axes.axvline(1.0, color=REFERENCE, lw=1, ls="--")
    axes.set_xscale("log")
    axes.set_yticks(ticks, labels, fontsize=8)
    axes.invert_yaxis()
    axes.set_xlabel(f"odds ratio of being missing ({100 * (1 - models.alpha):g}% CI, log scale)")
    axes.set_title("Which fully observed variables change the odds of a value being missing?", loc="left",
                   fontsize=10)
    return figure
