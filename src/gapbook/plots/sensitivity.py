"""Figures of the delta-adjustment sensitivity analysis.

``delta_curve`` answers "how far does the exposure effect move as the imputed values are
shifted, and where does the conclusion tip?"; ``analyses_side_by_side`` answers "does the
conclusion change between complete cases, the missing category, imputation under missing
at random and the delta-adjusted imputations?".
"""
from __future__ import annotations

from typing import Optional

import matplotlib.pyplot as plt
import numpy as np

from . import BACKGROUND, EMPHASIS, NEUTRAL, OBSERVED, REFERENCE
from .palette import strategy_colour, strategy_marker
from ..sensitivity import ALL_GROUPS, DeltaResult, StrategyAndDelta, rounded_delta
from ..vocabulary import effect_scale

__all__ = ["delta_curve", "analyses_side_by_side"]


def delta_curve(result: DeltaResult, term: Optional[str] = None, *, family: str):
    """Estimate and CI of one exposure term against delta, one panel per delta series.

    The null is a dashed line; the tipping point (when reached) a vertical line with its
    value; root-search evaluations are hollow points, grid deltas filled ones.

    Parameters
    ----------
    result : DeltaResult
        The delta-adjusted analyses.
    term : str, optional
        The exposure term; default the first.
    family : str
        The analysis model's family; the axis names the scale of the estimate (e.g. log odds
        ratio for a binomial model), since the curves are on the model's coefficient scale.

    Returns
    -------
    matplotlib.figure.Figure
    """
    term = term or result.terms[0]
    table = result.curves[result.curves["term"] == term]
    keys = list(dict.fromkeys(zip(table["variable"], table["group"])))
    figure, axes = plt.subplots(1, len(keys), figsize=(max(5.0, 4.6 * len(keys)), 3.8), squeeze=False,
                                sharey=True, layout="constrained")
    level = int(round(100 * (1 - result.alpha)))
    for ax, (variable, group) in zip(axes[0], keys):
        part = table[(table["variable"] == variable) & (table["group"] == group)].sort_values("delta")
        ax.fill_between(part["delta"], part["ci_lower"], part["ci_upper"], color=OBSERVED, alpha=0.18, lw=0,
                        label=f"{level}% CI")
        ax.plot(part["delta"], part["estimate"], color=OBSERVED, lw=1.6, label="pooled estimate")
        grid = part[part["evaluated_by"] == "grid"] if "evaluated_by" in part.columns else part
        ax.plot(grid["delta"], grid["estimate"], "o", color=OBSERVED, ms=4)
        searched = part[part["evaluated_by"] == "root_search"] if "evaluated_by" in part.columns else part.iloc[0:0]
        if len(searched):
            ax.plot(searched["delta"], searched["estimate"], "o", mfc=BACKGROUND, mec=OBSERVED, ms=4,
                    label="root search")
        ax.axhline(result.null, color=REFERENCE, lw=1, ls="--", label="null")
        ax.axvline(0.0, color=NEUTRAL, lw=0.8, ls=":")
        tips = result.tipping_points[(result.tipping_points["variable"] == variable) & (result.tipping_points["group"] == group)
                              & (result.tipping_points["term"] == term)]
        holds = False
        for tip in tips.itertuples():
            if tip.found:
                ax.axvline(tip.tipping_delta, color=EMPHASIS, lw=1.4)
                se = getattr(tip, "monte_carlo_se", float("nan"))
                precision = f"\n(MC SE {se:.1g})" if np.isfinite(se) else ""
                ax.annotate(f"tipping point\ndelta = {rounded_delta(tip.tipping_delta, se)}{precision}",
                            (tip.tipping_delta, 1.0),
                            xycoords=("data", "axes fraction"), xytext=(-4, -4), textcoords="offset points",
                            ha="right", va="top", fontsize=8, color=EMPHASIS)
            else:
                holds = True
        shifted = f"{variable}" + ("" if group == ALL_GROUPS else f" in group {group}")
        # said in the panel's title, where no curve, band or null line can run through it
        ax.set_title(f"shift of imputed {shifted}" + ("\nconclusion holds over the whole grid" if holds else ""),
                     fontsize=10)
        ax.set_xlabel("delta (added to imputed values)")
    axes[0][0].set_ylabel(f"{term}\n{effect_scale(family, exponentiated=False)}")
    axes[0][-1].legend(fontsize=8, loc="best", frameon=False)
    figure.suptitle("How far does the exposure effect move if missing values differ from the MAR imputation, "
                    "and where does the conclusion tip?", fontsize=11)
    return figure


def analyses_side_by_side(comparison: StrategyAndDelta, term: Optional[str] = None, *, family: str):
    """Intervals of the exposure effect under every strategy and delta, top to bottom, with the null.

    Parameters
    ----------
    comparison : StrategyAndDelta
        The strategies' and the deltas' rows.
    term : str, optional
        The exposure term; default the first.
    family : str
        The analysis model's family; the axis names the scale of the estimate (e.g. log odds
        ratio for a binomial model), since the curves are on the model's coefficient scale.

    Returns
    -------
    matplotlib.figure.Figure
    """
    table = comparison.comparison
    term = term or table["term"].iloc[0]
    part = table[table["term"] == term].reset_index(drop=True)
    height = 1.2 + 0.32 * len(part)
    figure, ax = plt.subplots(figsize=(7.0, height), layout="constrained")
    y = np.arange(len(part))[::-1]
    for yi, row in zip(y, part.itertuples()):
        changed = row.conclusion != part["conclusion"].iloc[0]
        colour = EMPHASIS if changed else strategy_colour(str(row.analysis))
        ax.plot([row.ci_lower, row.ci_upper], [yi, yi], color=colour, lw=2)
        ax.plot(row.estimate, yi, strategy_marker(str(row.analysis)), color=colour, ms=5)
    ax.axvline(0.0, color=REFERENCE, lw=1, ls="--")
    ax.set_yticks(y)
    ax.set_yticklabels([str(a).replace("delta_adjusted", "delta-adjusted") if str(a).startswith("delta_adjusted")
                        else str(a).replace("_", " ") for a in part["analysis"]], fontsize=8)
    first = part["conclusion"].iloc[0]
    for label, conclusion in zip(ax.get_yticklabels(), part["conclusion"]):
        if conclusion != first:  # named in the emphasis colour, not only drawn in it
            label.set_color(EMPHASIS)
            label.set_fontweight("bold")
    ax.set_xlabel(f"{term}, {effect_scale(family, exponentiated=False)}: estimate and interval "
                  "(bold: conclusion differs from the first row)")
    ax.set_title("Does the conclusion change between the analyses?", fontsize=11)
    return figure
