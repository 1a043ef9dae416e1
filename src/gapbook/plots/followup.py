"""Figures for follow-up studies; each title is the question the figure answers.

- :func:`plot_retention`: how long did participants stay in each group? (Kaplan-Meier steps)
- :func:`plot_completeness`: which visits were attended, by group? (share observed per visit)
- :func:`plot_profiles`: did those who left early differ before they left? (mean outcome by
  the visit at which participants were last seen)
- :func:`plot_means`: how does the outcome change over visits in each group? (observed means
  of attenders and the mixed model's means with their intervals)
- :func:`plot_last_visit_effects`: how far does the effect at the last visit move between
  strategies? (one interval per strategy; comparisons set apart)
"""
from __future__ import annotations

from typing import Any, List, Sequence

import numpy as np
from matplotlib import pyplot as plt

from . import BACKGROUND, NEUTRAL, REFERENCE, new_figure
from ..followup.analysis import FollowupAnalysis
from ..followup.audit import FollowupAudit
from ..followup.comparisons import COMPLETERS, LAST_OBSERVATION
from ..followup.repeated import label
from ..inference import format_p
from ..vocabulary import STRATEGY_SHORT_TITLES
from .palette import GROUPS, strategy_colour, strategy_marker

__all__ = ["plot_retention", "plot_completeness", "plot_profiles", "plot_means", "plot_last_visit_effects"]

# One colour per exposure group, in level order: the reference group in the dark neutral tone.
GROUP_COLOURS = GROUPS


def _group_colour(groups: Sequence[Any], group: Any) -> str:
    return GROUP_COLOURS[list(groups).index(group) % len(GROUP_COLOURS)]


def _groups(frame) -> List[Any]:
    return list(dict.fromkeys(frame["group"]))


def _visit_axis(axes, visits: Sequence[Any]) -> np.ndarray:
    """Numeric visits on their own scale (weeks), other labels evenly spaced."""
    try:
        positions = np.array([float(v) for v in visits])
        if not np.all(np.diff(positions) > 0):
            raise ValueError
    except (TypeError, ValueError):
        positions = np.arange(1, len(visits) + 1, dtype=float)
    axes.set_xticks(positions, [label(v) for v in visits])
    return positions


def plot_retention(audit: FollowupAudit):
    """Share of each group still attending after each visit (Kaplan-Meier of the time to the last visit).

    Parameters
    ----------
    audit : FollowupAudit
        The follow-up audit.

    Returns
    -------
    matplotlib.figure.Figure
    """
    figure, axes = new_figure(6.5, 3.8)
    table = audit.retention
    groups = _groups(table)
    for group in groups:
        rows = table[table["group"] == group]
        times = np.r_[0.0, rows["time"].to_numpy(dtype=float)]
        share = np.r_[1.0, rows["retained"].to_numpy(dtype=float)]
        colour = _group_colour(groups, group)
        axes.step(times, share, where="post", color=colour, linewidth=1.8, label=str(group))
        axes.fill_between(rows["time"], rows["ci_lower"], rows["ci_upper"], step="post", color=colour, alpha=0.12,
                          linewidth=0)
    axes.set_ylim(0, 1.02)
    axes.set_xlabel("visit (time of the last attended visit)")
    axes.set_ylabel("share still attending")
    title = "How long did participants stay in each group?"
    if not audit.retention_test.empty:
        row = audit.retention_test.iloc[0]
        title += f"\nlog-rank chi-square {row['statistic']:.2f}, {int(row['df'])} df, {format_p(row['p_value'])}"
    axes.set_title(title, fontsize=10)
    axes.legend(frameon=False, fontsize=8, loc="lower left")
    axes.spines[["top", "right"]].set_visible(False)
    return figure


def plot_completeness(audit: FollowupAudit):
    """Percent of each group with the outcome observed at each visit.

    Parameters
    ----------
    audit : FollowupAudit
        The follow-up audit.

    Returns
    -------
    matplotlib.figure.Figure
    """
    table = audit.completeness
    groups = _groups(table)
    visits = list(dict.fromkeys(table["visit"]))
    figure, axes = new_figure(6.5, 3.6)
    width = 0.8 / max(len(groups), 1)
    x = np.arange(len(visits))
    for k, group in enumerate(groups):
        rows = table[table["group"] == group].set_index("visit").loc[visits]
        bars = axes.bar(x + (k - (len(groups) - 1) / 2) * width, rows["pct_observed"], width=width * 0.95,
                        color=_group_colour(groups, group), label=str(group))
        for bar, n in zip(bars, rows["n_observed"]):
            axes.text(bar.get_x() + bar.get_width() / 2, bar.get_height(), f"{int(n)}", ha="center", va="bottom",
                      fontsize=7, color=REFERENCE)
    axes.set_xticks(x, [label(v) for v in visits])
    axes.set_ylim(0, 110)
    axes.set_xlabel("visit")
    axes.set_ylabel("% with the outcome observed")
    axes.set_title("Which visits were attended, by group? (numbers: participants observed)", fontsize=10)
    axes.legend(frameon=False, fontsize=8, loc="lower left")
    axes.spines[["top", "right"]].set_visible(False)
    return figure


def plot_profiles(audit: FollowupAudit):
    """Mean outcome at each visit for participants grouped by the visit at which they were last seen.

    Parameters
    ----------
    audit : FollowupAudit
        The follow-up audit.

    Returns
    -------
    matplotlib.figure.Figure
    """
    table = audit.profiles.dropna(subset=["mean"])
    groups = _groups(table) if len(table) else []
    figure, axes_grid = plt.subplots(1, max(len(groups), 1), figsize=(4.2 * max(len(groups), 1), 3.8),
                                     layout="constrained", sharey=True, squeeze=False)
    axes_row = axes_grid[0]
    visits = list(dict.fromkeys(audit.completeness["visit"]))
    cohorts = [c for c in dict.fromkeys(table["last_visit"]) if c is not None and c == c]
    shades = np.linspace(0.25, 1.0, max(len(cohorts), 1))
    for axes, group in zip(axes_row, groups):
        positions = _visit_axis(axes, visits)
        where = {v: p for v, p in zip(visits, positions)}
        rows = table[table["group"] == group]
        for shade, cohort in zip(shades, cohorts):
            part = rows[rows["last_visit"] == cohort]
            if part.empty:
                continue
            x = [where[v] for v in part["visit"]]
            finished = cohort == visits[-1]
            colour = _group_colour(groups, group) if finished else NEUTRAL
            axes.plot(x, part["mean"], marker="o", markersize=3, color=colour, alpha=1.0 if finished else shade,
                      linewidth=2.0 if finished else 1.2,
                      label=f"last seen {label(cohort)} (n = {int(part['n_cohort'].iloc[0])})")
        axes.set_title(str(group), fontsize=9)
        axes.set_xlabel("visit")
        axes.spines[["top", "right"]].set_visible(False)
        axes.legend(frameon=False, fontsize=7)
    axes_row[0].set_ylabel("mean outcome of those observed")
    figure.suptitle("Did those who left early differ before they left?", fontsize=10)
    return figure


def plot_means(audit: FollowupAudit, analysis: FollowupAnalysis):
    """Observed means of attenders (points) and the mixed model's means with intervals (lines, bands).

    Parameters
    ----------
    audit : FollowupAudit
        The follow-up audit (observed means).
    analysis : FollowupAnalysis
        The follow-up analyses (model means).

    Returns
    -------
    matplotlib.figure.Figure
    """
    figure, axes = new_figure(6.5, 4.0)
    means = analysis.means
    groups = _groups(means)
    visits = list(dict.fromkeys(means["visit"]))
    positions = _visit_axis(axes, visits)
    observed = audit.completeness
    for group in groups:
        colour = _group_colour(groups, group)
        rows = means[means["group"] == group]
        axes.plot(positions, rows["estimate"], color=colour, linewidth=1.8, label=f"{group}: mixed model")
        axes.fill_between(positions, rows["ci_lower"], rows["ci_upper"], color=colour, alpha=0.15, linewidth=0)
        seen = observed[observed["group"] == group]
        if "mean_observed" in seen.columns and len(seen) == len(positions):
            axes.scatter(positions, seen["mean_observed"], color=colour, marker="o", facecolors=BACKGROUND,
                         zorder=3, s=22, label=f"{group}: mean of attenders")
    axes.set_xlabel("visit")
    axes.set_ylabel("outcome")
    axes.set_title("How does the outcome change over visits in each group?\n"
                   "lines: mixed model (valid if missing at random); open points: attenders only", fontsize=10)
    axes.legend(frameon=False, fontsize=7, ncol=2)
    axes.spines[["top", "right"]].set_visible(False)
    return figure


def plot_last_visit_effects(analysis: FollowupAnalysis):
    """The exposure effect at the last visit under every strategy, comparisons set apart in grey.

    Parameters
    ----------
    analysis : FollowupAnalysis
        The follow-up analyses.

    Returns
    -------
    matplotlib.figure.Figure
    """
    rows = analysis.headline()
    terms = list(dict.fromkeys(rows["term"]))
    figure, axes = new_figure(7.0, 0.42 * len(rows) + 1.6)
    y_labels, y = [], 0.0
    positions = []
    for term in terms:
        part = rows[rows["term"] == term]
        for _, row in part.iterrows():
            strategy = row["strategy"]
            comparison = strategy in (COMPLETERS, LAST_OBSERVATION)
            colour = strategy_colour(strategy)
            axes.hlines(y, row["ci_lower"], row["ci_upper"], color=colour, linewidth=2)
            axes.plot(row["estimate"], y, strategy_marker(strategy), color=colour, markersize=5)
            name = STRATEGY_SHORT_TITLES.get(strategy, strategy)
            if comparison:
                name += " (not recommended)"
            y_labels.append(name if len(terms) == 1 else f"{term}: {name}")
            positions.append(y)
            y -= 1
        y -= 0.5
    primary = rows[rows["strategy"] == "mixed_model"]
    if not primary.empty:
        axes.axvline(primary["estimate"].iloc[0], color=REFERENCE, linestyle="--", linewidth=0.8)
    axes.axvline(0.0, color=NEUTRAL, linewidth=0.8)
    axes.set_yticks(positions, y_labels)
    axes.set_xlabel(f"effect at visit {label(analysis.last_visit)} (interval)")
    axes.set_title("How far does the effect at the last visit\nmove between strategies?", fontsize=10)
    axes.spines[["top", "right"]].set_visible(False)
    return figure
