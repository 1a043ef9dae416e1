"""Figures of the imputation stage: chain traces, observed against imputed values, and how
much information each pooled term lost to missing data."""
from __future__ import annotations

import math

import matplotlib.pyplot as plt
import numpy as np

from ..impute import ChainedImputation
from ..pool import PooledResult
from ..vocabulary import CATEGORICAL_TYPES
from . import BACKGROUND, EMPHASIS, IMPUTED, NEUTRAL, OBSERVED, REFERENCE


def plot_convergence(imputation: ChainedImputation):
    """Mean and SD of each variable's imputed values at every iteration, one line per chain.

    Chains that started from different random values and have forgotten their start
    overlap and show no trend; a drift or a chain that stays apart asks for more iterations
    or a simpler imputation model.
    """
    trace = imputation.convergence
    names = list(dict.fromkeys(trace["variable"]))
    figure, axes = plt.subplots(len(names), 2, figsize=(8.0, 1.7 * len(names) + 0.8), layout="constrained",
                                squeeze=False, sharex=True)
    for row, name in enumerate(names):
        part = trace[trace["variable"] == name]
        for column, statistic in enumerate(("mean", "sd")):
            ax = axes[row, column]
            for chain, lines in part.groupby("chain"):
                ax.plot(lines["iteration"], lines[statistic], color=IMPUTED,
                        linewidth=0.9, alpha=0.8)
            ax.set_ylabel(f"{name}\n{statistic}" if column == 0 else statistic, fontsize=8)
            ax.tick_params(labelsize=7)
            ax.spines[["top", "right"]].set_visible(False)
    for ax in axes[-1]:
        ax.set_xlabel("iteration")
    figure.suptitle(f"Imputed values across iterations ({imputation.m} chains, one line each)", fontsize=11)
    return figure


def plot_observed_vs_imputed(imputation: ChainedImputation, bins: int = 30):
    """Each imputed variable's observed values beside its imputed values (all imputations together).

    Numbers: density histograms (observed filled, imputed outlined). Categories: the share of
    each level among observed and among imputed values, with the range of the imputed share
    over the m imputations. Differences are expected when data are missing at random (the
    missing cases differ from the observed ones); they are a prompt to check, not an error.
    """
    names = list(imputation.imputed)
    columns = min(3, max(len(names), 1))
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
    figure.suptitle("Observed and imputed values per variable", fontsize=11)
    return figure


def plot_missing_information(pooled: PooledResult):
    """Per model term: the fraction of missing information, split from the share of the total
    variance that comes from between-imputation spread (lambda)."""
    table = pooled.variances()
    figure, ax = plt.subplots(figsize=(7.0, 0.35 * len(table) + 1.3), layout="constrained")
    y = np.arange(len(table))[::-1]
    ax.barh(y, table["fmi"], color=EMPHASIS, height=0.6, label="fraction of missing information")
    ax.plot(table["lambda"], y, linestyle="none", marker="|", markersize=12, color=REFERENCE,
            label="between-imputation share of total variance")
    ax.set_yticks(y, table["term"], fontsize=8)
    ax.set_xlim(0, max(0.05, float(np.nanmax(table["fmi"])) * 1.15))
    ax.set_xlabel("fraction")
    ax.axvline(0, color=NEUTRAL, linewidth=0.6)
    ax.spines[["top", "right"]].set_visible(False)
    ax.legend(fontsize=7, frameon=False, loc="lower left", bbox_to_anchor=(0, 1.0), ncol=2)
    figure.suptitle(f"How much each pooled estimate depends on the imputations (m = {pooled.m})", fontsize=11)
    return figure
