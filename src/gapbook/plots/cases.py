"""Figures for the case strategies: where the rows went, how complete rows differ, and the
exposure effect under every strategy side by side."""
from __future__ import annotations

from typing import Optional

import numpy as np
from matplotlib import pyplot as plt

from . import BACKGROUND, EMPHASIS, MAX_VARIABLES_SHOWN, MISSING, NEUTRAL, OBSERVED, REFERENCE, new_figure, shown_of
from .palette import strategy_colour, strategy_marker
from ..cases import CompleteCaseFlow, CompletenessBaseline, StrategyComparison
from ..vocabulary import effect_scale

__all__ = ["plot_flow", "plot_completeness_differences", "plot_strategy_comparison"]


def plot_flow(flow: CompleteCaseFlow):
    """Rows lost to each model variable: dark for the rows counted there first, light for every row lacking it.

    The gap between the two bars is the overlap with earlier variables; the title gives
    the rows used out of the rows in the file.

    Parameters
    ----------
    flow : CompleteCaseFlow
        The rows lost per model variable.

    Returns
    -------
    matplotlib.figure.Figure
    """
    steps = flow.steps[flow.steps["step"] == "excluded"]
    names = list(steps["variable"])[::-1]
    first = steps["n_excluded"].to_numpy(dtype=float)[::-1]
    every = steps["n_lacking"].to_numpy(dtype=float)[::-1]
    figure, axes = new_figure(7.0, 0.45 * len(names) + 1.6)
    y = np.arange(len(names))
    axes.barh(y, every, color=NEUTRAL, alpha=0.55, label="rows lacking the variable")
    axes.barh(y, first, height=0.5, color=MISSING, label="rows excluded here (first missing variable)")
    for yi, value in zip(y, first):
        axes.text(value, yi, f" {int(value)}", va="center", fontsize=8, color=REFERENCE)
    axes.set_yticks(y, [f"{n} ({r})" for n, r in zip(names, list(steps["role"])[::-1])])
    axes.set_xlabel("rows")
    share = flow.n_used / flow.n_rows if flow.n_rows else float("nan")
    axes.set_title(f"Which variables cost the complete-case analysis its rows?\n{flow.n_used} of {flow.n_rows} "
                   f"rows used ({share:.0%})")
    axes.legend(loc="lower right", frameon=False, fontsize=8)
    axes.spines[["top", "right"]].set_visible(False)
    return figure


def plot_completeness_differences(baseline: CompletenessBaseline, threshold: float = 0.1):
    """Standardised differences, complete minus incomplete rows, for each fully observed variable (level).

    ``threshold`` draws the often-used |SMD| = 0.1 guide lines (common practice, no source;
    see Austin 2009, Stat Med 28:3083, for the statistic itself).

    Parameters
    ----------
    baseline : CompletenessBaseline
        The complete-case comparison.
    threshold : float
        Where the guide lines go.

    Returns
    -------
    matplotlib.figure.Figure
    """
    table = baseline.differences
    n_rows = len(table)
    if n_rows > MAX_VARIABLES_SHOWN:  # the largest differences; the table keeps every row
        keep = table["smd"].abs().fillna(0).sort_values(ascending=False, kind="stable").index[:MAX_VARIABLES_SHOWN]
        table = table.loc[sorted(keep)]
    labels = [v if not lvl else f"{v}: {lvl}" for v, lvl in zip(table["variable"], table["level"])][::-1]
    smd = table["smd"].to_numpy(dtype=float)[::-1]
    figure, axes = new_figure(6.0, 0.3 * len(labels) + 1.6)
    y = np.arange(len(labels))
    far = np.abs(smd) > threshold
    axes.hlines(y, 0, smd, color=NEUTRAL, linewidth=1)
    if (~far).any():
        axes.scatter(smd[~far], y[~far], color=OBSERVED, zorder=3, label=f"|difference| <= {threshold:g}")
    if far.any():
        axes.scatter(smd[far], y[far], color=EMPHASIS, zorder=3, label=f"|difference| > {threshold:g}")
    finite = np.abs(smd[np.isfinite(smd)])
    half_width = max(2 * threshold, 1.15 * float(finite.max())) if finite.size else 2 * threshold
    axes.set_xlim(-half_width, half_width)
    axes.axvline(0, color=REFERENCE, linewidth=0.8)
    for edge in (-threshold, threshold):
        axes.axvline(edge, color=NEUTRAL, linestyle=":", linewidth=0.8)
    axes.set_yticks(y, labels)
    axes.set_xlabel("standardised difference (complete minus incomplete rows)")
    axes.set_title(f"Do complete rows ({baseline.n_complete}) differ from incomplete ones "
                   f"({baseline.n_incomplete})?"
                   + shown_of(len(table), n_rows, "variables and levels", "with the largest differences"))
    axes.legend(loc="best", frameon=False, fontsize=8)
    axes.spines[["top", "right"]].set_visible(False)
    return figure


def _number(value: float) -> str:
    """Two decimals for ordinary magnitudes, three significant digits for very small or large ones."""
    return f"{value:.2f}" if 0.1 <= abs(value) < 1000 else f"{value:.3g}"


def _interval_text(estimate: float, lower: float, upper: float, n: float) -> str:
    return f"{_number(estimate)} ({_number(lower)} to {_number(upper)})   n = {int(n)}"


def _ratio_ticks(axes, low: float, high: float) -> None:
    """Readable ticks (0.5, 0.8, 1, 1.5, 2, ...) on a log axis that may span less than a decade."""
    from matplotlib import ticker

    steps = (1, 1.25, 1.5, 2, 2.5, 3, 4, 5, 6, 7, 8)
    candidates = sorted({m * 10.0 ** k for k in range(-4, 5) for m in steps})
    inside = [c for c in candidates if low <= c <= high]
    stride = max(1, int(np.ceil(len(inside) / 7)))
    ticks = sorted(set(inside[::stride]) | ({1.0} if low <= 1.0 <= high else set()))
    axes.xaxis.set_major_locator(ticker.FixedLocator(ticks))
    axes.xaxis.set_major_formatter(ticker.FuncFormatter(lambda v, _: f"{v:g}"))
    axes.xaxis.set_minor_locator(ticker.NullLocator())


def plot_strategy_comparison(comparison: StrategyComparison, reference_value: Optional[float] = None,
                             reference_label: str = "known true value"):
    """Forest plot: the exposure estimate and its interval under each strategy, one row per strategy and term.

    Odds and rate ratios are drawn on a log axis with the null at 1; differences on a
    linear axis with the null at 0. The numbers are printed beside each row so the figure
    stands alone. ``reference_value`` (on the coefficient scale) marks a known truth, e.g.
    in a simulation or the demo study.

    Parameters
    ----------
    comparison : StrategyComparison
        The exposure's rows under each strategy.
    reference_value : float, optional
        A known true value to mark.
    reference_label : str
        Its label.

    Returns
    -------
    matplotlib.figure.Figure
    """
    table = comparison.comparison
    ratio = comparison.ratio_name
    if ratio is not None:
        est, lo, hi = (table["exp_estimate"], table["exp_ci_lower"], table["exp_ci_upper"])
        null, scale_label = 1.0, f"{effect_scale(comparison.family, exponentiated=True)} (log axis)"
    else:
        est, lo, hi = table["estimate"], table["ci_lower"], table["ci_upper"]
        null, scale_label = 0.0, effect_scale(comparison.family, exponentiated=False)
    est, lo, hi = (np.asarray(v, dtype=float) for v in (est, lo, hi))
    rows = len(table)
    multiple_terms = len(comparison.terms) > 1
    figure, (axes, text_axes) = plt.subplots(1, 2, figsize=(9.0, 0.5 * rows + 1.7), layout="constrained",
                                             gridspec_kw={"width_ratios": [3, 2]}, sharey=True)
    y = np.arange(rows)[::-1].astype(float)
    for yi, (_, row), e, l, h in zip(y, table.iterrows(), est, lo, hi):
        colour = strategy_colour(row["strategy"])
        axes.plot([l, h], [yi, yi], color=colour, linewidth=2.2, solid_capstyle="butt")
        axes.plot([e], [yi], marker=strategy_marker(row["strategy"]), markersize=7, color=colour,
                  markeredgecolor=BACKGROUND)
        text_axes.text(0.0, yi, _interval_text(e, l, h, row["n_used"]), va="center", fontsize=9)
    axes.axvline(null, color=REFERENCE, linewidth=0.8)
    if reference_value is not None:
        shown = float(np.exp(reference_value)) if ratio is not None else float(reference_value)
        axes.axvline(shown, color=EMPHASIS, linestyle="--", linewidth=1, label=f"{reference_label} ({shown:.3g})")
        axes.legend(loc="lower left", bbox_to_anchor=(0, 1.0), frameon=False, fontsize=8)
    if ratio is not None:
        axes.set_xscale("log")
        _ratio_ticks(axes, *axes.get_xlim())
    labels = [f"{row['label']}" + (f"\n{row['term']}" if multiple_terms else "") for _, row in table.iterrows()]
    axes.set_yticks(y, labels)
    axes.set_ylim(-0.7, rows - 0.3)
    level = f"{1 - comparison.alpha:.0%}"
    axes.set_xlabel(f"{scale_label}, {level} interval")
    axes.spines[["top", "right"]].set_visible(False)
    text_axes.set_axis_off()
    text_axes.set_title(f"estimate ({level} interval)", fontsize=9, loc="left")
    subject = comparison.terms[0] if not multiple_terms else f"the exposure ({len(comparison.terms)} terms)"
    figure.suptitle(f"Does the effect of {subject} depend on how missing data are handled?", fontsize=11)
    return figure
