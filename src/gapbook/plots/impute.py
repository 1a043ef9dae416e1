"""Figures of the imputation stage.

1. :func:`plot_chain_convergence` - have the chains forgotten their starting values, and
   from which iteration?
2. :func:`plot_observed_vs_imputed` - do the imputed values look like values the variable
   can take, and how do they differ from the observed ones?
3. :func:`plot_missing_information` - how much does each pooled estimate depend on the
   imputations?
"""
from __future__ import annotations

import math

import matplotlib.pyplot as plt
import numpy as np

from ..convergence import ChainConvergence
from ..impute import ChainedImputation
from ..pool import PooledResult
from ..vocabulary import CATEGORICAL_TYPES
from . import BACKGROUND, EMPHASIS, GRID, IMPUTED, NEUTRAL, OBSERVED, REFERENCE, UNTESTED
from .palette import blend

__all__ = ["plot_chain_convergence", "plot_observed_vs_imputed", "plot_missing_information"]


def plot_chain_convergence(convergence: ChainConvergence):
    """Have the chains forgotten their starting values, and from which iteration?

    Top: R-hat of each imputed variable against the iteration (on iterations 1..t, see
    :mod:`gapbook.convergence`), with the 1.05 line; a variable still above it at the last
    iteration is drawn in the emphasis colour and named. Bottom: where the chains are, one
    strip per variable: the range (light) and middle half (darker) of the m chains' values
    with their median, in standard deviations of where the chains settle (the latter half
    of the run). Strips that start wide or off-centre and then hold a steady band show the
    start being forgotten.

    Parameters
    ----------
    convergence : from :meth:`gapbook.impute.ChainedImputation.chain_convergence`.

    Returns
    -------
    matplotlib Figure.
    """
    table = convergence.rhat
    names = list(dict.fromkeys(table["variable"]))
    if not names:
        return _nothing_imputed("Have the chains forgotten their starting values, and from which iteration?")
    iterations = max(convergence.iterations, 1)
    figure = plt.figure(figsize=(7.5, 3.0 + 0.34 * len(names) + 0.9), layout="constrained")
    top, bottom = figure.subplots(2, 1, sharex=True, height_ratios=[3.0, 0.34 * max(len(names), 1) + 0.6])
    _rhat_panel(top, convergence, names)
    _spread_panel(bottom, convergence, names)
    bottom.set_xlabel("iteration")
    bottom.set_xlim(0.5, iterations + 0.5)

    figure.suptitle("Have the chains forgotten their starting values, and from which iteration?", fontsize=11,
                    x=0.01, ha="left")
    return figure


def _nothing_imputed(question: str):
    """The figure of a run whose imputation variables are all complete: the question and why it has no answer."""
    figure, axes = plt.subplots(figsize=(7.5, 1.6))
    axes.set_axis_off()
    axes.text(0.5, 0.5, "No value was imputed: the variables in the imputation are complete.", ha="center",
              va="center", fontsize=10, transform=axes.transAxes)
    figure.suptitle(question, fontsize=11, x=0.01, ha="left")
    return figure


def _rhat_panel(axes, convergence, names) -> None:
    table = convergence.rhat
    wide = table.pivot(index="iteration", columns="variable", values="rhat").reindex(columns=names)
    finite = wide.to_numpy()[np.isfinite(wide.to_numpy())]
    top = float(np.clip(finite.max() * 1.03 if finite.size else 1.1, convergence.limit + 0.05, RHAT_TOP))
    bottom = float(min(0.98, finite.min() - 0.01)) if finite.size else 0.98
    axes.axhspan(convergence.limit, top, color=blend(UNTESTED, weight=0.5), linewidth=0, zorder=0)
    axes.axhline(convergence.limit, color=REFERENCE, linestyle="--", linewidth=1)
    axes.text(0.0, convergence.limit, f"{convergence.limit:g} ", transform=axes.get_yaxis_transform(),
              va="center", ha="right", fontsize=7, color=REFERENCE)
    above = set(convergence.above)
    finals = {}
    for name in names:
        series = wide[name]
        if series.notna().sum() == 0:
            continue
        flagged = name in above
        shown = np.minimum(series.to_numpy(), top)
        axes.plot(series.index, shown, color=EMPHASIS if flagged else OBSERVED, linewidth=1.6 if flagged else 1.0,
                  alpha=1.0 if flagged else 0.7, marker="o", markersize=2.5, zorder=3 if flagged else 2,
                  clip_on=False)
        beyond = series.to_numpy() > top
        if beyond.any():  # above the drawn range: a mark on the edge
            axes.plot(series.index[beyond], shown[beyond], linestyle="none", marker="^", markersize=5,
                      color=EMPHASIS if flagged else OBSERVED, clip_on=False, zorder=4)
        finals[name] = float(series.dropna().iloc[-1])
    # Name the variables above the line, or else the slowest one; the rest need no name.
    named = [n for n in names if n in above] or ([max(finals, key=finals.get)] if finals else [])
    for y, name in _dodge([(min(finals[n], top), n) for n in named], top - bottom):
        axes.annotate(name if name in above else f"{name} (highest at the end)", (convergence.iterations, y),
                      xytext=(6, 0), textcoords="offset points", va="center", fontsize=7,
                      color=EMPHASIS if name in above else REFERENCE, annotation_clip=False)
    if convergence.settled_from is not None:
        late = convergence.settled_from > 0.6 * convergence.iterations
        axes.axvline(convergence.settled_from, color=IMPUTED, linestyle=":", linewidth=1.2)
        axes.annotate(f"all below from iteration {convergence.settled_from}", (convergence.settled_from, top),
                      xytext=(-4 if late else 4, -3), textcoords="offset points", ha="right" if late else "left",
                      va="top", fontsize=8, color=IMPUTED)
    axes.set_ylim(bottom, top)
    axes.set_ylabel("R-hat across chains\n(iterations 1 to t)", fontsize=8)
    axes.tick_params(labelsize=7)
    axes.spines[["top", "right"]].set_visible(False)
    axes.set_title(f"Rank-normalised split R-hat across the {convergence.m} chains, one line per imputed variable"
                   + (f" (triangles: above {RHAT_TOP:g})" if finite.size and finite.max() > top else ""),
                   fontsize=9, loc="left")


def _dodge(ends, span: float):
    """Label positions at least a line apart, in the order of their values."""
    gap = span * 0.06
    placed = []
    for y, name in sorted(ends):
        if placed and y - placed[-1][0] < gap:
            y = placed[-1][0] + gap
        placed.append((y, name))
    return placed


RHAT_TOP = 2.0  # the R-hat axis ends here; higher values are drawn on the edge as triangles
SPREAD_LIMIT = 4.0  # each strip shows -4 to +4 within-chain SDs; values beyond are drawn at its edge


def _spread_panel(axes, convergence, names) -> None:
    spread = convergence.spread
    half = 0.42 / SPREAD_LIMIT
    for row, name in enumerate(names):
        part = spread[spread["variable"] == name]
        if part.empty:
            continue
        x = part["iteration"].to_numpy()

        def y(column):
            return row - half * np.clip(part[column].to_numpy(dtype=float), -SPREAD_LIMIT, SPREAD_LIMIT)

        axes.fill_between(x, y("lowest"), y("highest"), color=blend(IMPUTED, weight=0.7), linewidth=0)
        axes.fill_between(x, y("lower_quartile"), y("upper_quartile"), color=blend(IMPUTED, weight=0.35),
                          linewidth=0)
        axes.plot(x, y("median"), color=IMPUTED, linewidth=1.0)
        axes.axhline(row, color=GRID, linewidth=0.6, zorder=0)
    axes.set_yticks(range(len(names)), names, fontsize=7)
    axes.set_ylim(len(names) - 0.5, -0.5)
    axes.tick_params(labelsize=7)
    axes.spines[["top", "right"]].set_visible(False)
    axes.set_title(f"Where the chains are: range (light), middle half and median of the {convergence.m} chains, "
                   f"\nin within-chain SDs around where they end up (each strip \u00b1{SPREAD_LIMIT:g})", fontsize=9,
                   loc="left")


def plot_observed_vs_imputed(imputation: ChainedImputation, bins: int = 30):
    """Each imputed variable's observed values beside its imputed values (all imputations together).

    Numbers: density histograms (observed filled, imputed outlined). Categories: the share of
    each level among observed and among imputed values, with the range of the imputed share
    over the m imputations. Differences are expected when data are missing at random (the
    missing cases differ from the observed ones); they are a prompt to check, not an error.

    Parameters
    ----------
    imputation : ChainedImputation
        The imputations.
    bins : int
        Histogram bins for numeric variables.

    Returns
    -------
    matplotlib.figure.Figure
    """
    names = list(imputation.imputed)
    columns = min(3, max(len(names), 1))
    if not names:
        return _nothing_imputed("Do the imputed values look like values each variable takes, and where do they differ?")
    rows = math.ceil(len(names) / columns)
    figure, axes = plt.subplots(rows, columns, figsize=(3.3 * columns, 2.7 * rows + 0.6), layout="constrained",
                                squeeze=False)
    for ax, name in zip(axes.ravel(), names):
        data = imputation.data[name]
        observed_rows = data.notna().to_numpy() & ~imputation.impute_mask[name].to_numpy(dtype=bool)
        values = imputation.imputed[name]
        if imputation.types[name] in CATEGORICAL_TYPES:
            levels = list(data.cat.categories) if hasattr(data, "cat") else sorted(data.dropna().unique())
            position = {v: i for i, v in enumerate(levels)}
            observed = data[observed_rows].map(position).to_numpy(dtype=int)
            share_observed = np.bincount(observed, minlength=len(levels)) / max(len(observed), 1)
            per_imputation = np.array([np.bincount(v, minlength=len(levels)) / max(len(v), 1) for v in values])
            x = np.arange(len(levels))
            ax.bar(x - 0.2, share_observed, width=0.4, color=OBSERVED, label="observed")
            ax.bar(x + 0.2, per_imputation.mean(0), width=0.4, color=BACKGROUND, edgecolor=IMPUTED, linewidth=1.5,
                   label="imputed")
            ax.vlines(x + 0.2, per_imputation.min(0), per_imputation.max(0), color=IMPUTED, linewidth=1.2)
            ax.set_xticks(x, [str(v) for v in levels], fontsize=7, rotation=30 if len(levels) > 3 else 0)
            ax.set_ylabel("share", fontsize=8)
        else:
            observed = data.to_numpy(dtype=float, na_value=np.nan)[observed_rows]
            imputed = values.ravel()
            edges = np.histogram_bin_edges(np.concatenate([observed, imputed]), bins=bins)
            ax.hist(observed, bins=edges, density=True, color=OBSERVED, alpha=0.55, label="observed")
            ax.hist(imputed, bins=edges, density=True, histtype="step", color=IMPUTED, linewidth=1.6,
                    label="imputed")
            ax.set_ylabel("density", fontsize=8)
        ax.set_title(f"{name}: {len(observed)} observed, {values.shape[1]} imputed", fontsize=9)
        ax.tick_params(labelsize=7)
        ax.spines[["top", "right"]].set_visible(False)
    for ax in axes.ravel()[len(names):]:
        ax.set_axis_off()
    if names:
        axes.ravel()[0].legend(fontsize=7, frameon=False)
    figure.suptitle("Do the imputed values look like values each variable takes, and where do they differ?",
                    fontsize=11)
    return figure


def plot_missing_information(pooled: PooledResult):
    """Per model term: the fraction of missing information, beside the share of the total
    variance that comes from between-imputation spread (``between_share``).

    Parameters
    ----------
    pooled : PooledResult
        The pooled multiple-imputation fit.

    Returns
    -------
    matplotlib.figure.Figure
    """
    table = pooled.variances()
    figure, ax = plt.subplots(figsize=(7.0, 0.35 * len(table) + 1.3), layout="constrained")
    y = np.arange(len(table))[::-1]
    ax.barh(y, table["fmi"], color=EMPHASIS, height=0.6, label="fraction of missing information")
    ax.plot(table["between_share"], y, linestyle="none", marker="|", markersize=12, color=REFERENCE,
            label="between-imputation share of total variance")
    ax.set_yticks(y, table["term"], fontsize=8)
    ax.set_xlim(0, max(0.05, float(np.nanmax(table["fmi"])) * 1.15))
    ax.set_xlabel("fraction")
    ax.axvline(0, color=NEUTRAL, linewidth=0.6)
    ax.spines[["top", "right"]].set_visible(False)
    ax.legend(fontsize=7, frameon=False, loc="lower left", bbox_to_anchor=(0, 1.0), ncol=2)
    figure.suptitle(f"How much does each pooled estimate depend on the imputations? (m = {pooled.m})", fontsize=11)
    return figure
