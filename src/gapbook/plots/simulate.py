"""Figures of the bias simulation.

``performance_panels`` answers "under each mechanism, which strategy is biased, and which
intervals cover the truth as often as they claim?", with Monte Carlo error shown so a
difference inside it is not read as real.
"""
from __future__ import annotations

from typing import Optional

import matplotlib.pyplot as plt
import numpy as np

from . import REFERENCE
from .palette import strategy_colour, strategy_marker
from ..simulate import SimulationResult
from ..vocabulary import effect_scale

__all__ = ["performance_panels"]


def performance_panels(result: SimulationResult, term: Optional[str] = None, alpha: float = 0.05, *, family: str):
    """Bias (top) and coverage (bottom) per strategy, one column per mechanism, with +/- 2 Monte Carlo SEs.

    Parameters
    ----------
    result : SimulationResult
        The simulation.
    term : str, optional
        The exposure term; default the first.
    alpha : float
        One minus the nominal coverage.
    family : str
        The analysis model's family; the axis names the scale of the estimate (e.g. log odds
        ratio for a binomial model), since bias is on the model's coefficient scale.

    Returns
    -------
    matplotlib.figure.Figure
    """
    perf = result.performance
    term = term or perf["term"].iloc[0]
    perf = perf[perf["term"] == term]
    mechanisms = list(dict.fromkeys(perf["mechanism"]))
    strategies = list(dict.fromkeys(perf["strategy"]))
    figure, axes = plt.subplots(2, len(mechanisms), figsize=(3.2 * len(mechanisms) + 1.0, 5.2), squeeze=False,
                                sharey="row", layout="constrained")
    x = np.arange(len(strategies))
    for j, mechanism in enumerate(mechanisms):
        part = perf[perf["mechanism"] == mechanism].set_index("strategy").reindex(strategies)
        top, bottom = axes[0][j], axes[1][j]
        for i, strategy in enumerate(strategies):
            row = part.loc[strategy]
            top.errorbar(i, row["bias"], yerr=2 * row["bias_mcse"], fmt=strategy_marker(strategy),
                         color=strategy_colour(strategy), capsize=3)
            bottom.errorbar(i, 100 * row["coverage"], yerr=200 * row["coverage_mcse"],
                            fmt=strategy_marker(strategy), color=strategy_colour(strategy), capsize=3)
        top.axhline(0.0, color=REFERENCE, lw=1, ls="--")
        bottom.axhline(100 * (1 - alpha), color=REFERENCE, lw=1, ls="--")
        top.set_title(mechanism, fontsize=10)
        for ax in (top, bottom):
            ax.set_xticks(x)
            ax.set_xlim(-0.6, len(strategies) - 0.4)
        top.set_xticklabels([])
        bottom.set_xticklabels([s.replace("_", "\n") for s in strategies], fontsize=8)
    axes[0][0].set_ylabel(f"bias of {term}\n({effect_scale(family, exponentiated=False)})")
    axes[1][0].set_ylabel(f"coverage of {int(round(100 * (1 - alpha)))}% CI (%)")
    figure.suptitle(f"In {result.n_replicates} simulated studies like this one, which strategy is biased and "
                    "which intervals cover the truth?\n(bars: 2 Monte Carlo SEs)", fontsize=11)
    return figure
