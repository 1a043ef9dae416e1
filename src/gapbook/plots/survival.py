"""Figures for time-to-event outcomes: survival by exposure group from the audit's Kaplan–Meier curves."""
from __future__ import annotations

import numpy as np

from . import NEUTRAL, new_figure
from .palette import GROUPS
from ..time_to_event import ALL, TimeToEventAudit


__all__ = ["plot_survival_by_group"]

def plot_survival_by_group(audit: TimeToEventAudit):
    """Kaplan–Meier survival per exposure group (overall when there are no groups), from the audit's curves.

    Each curve is a step line with a short vertical tick at every time a row was censored,
    so the reader sees where information thins out; the legend gives each group's rows and
    events, and the number still at risk at a few times is written under the axis.

    Parameters
    ----------
    audit : the time-to-event audit (its Kaplan–Meier curves by group).

    Returns
    -------
    matplotlib.figure.Figure

    References
    ----------
    Kaplan EL, Meier P (1958). Nonparametric estimation from incomplete observations.
    J Am Stat Assoc 53:457-481.
    """
    groups = [g for g in audit.groups() if g != ALL] or [ALL]
    figure, axes = new_figure(7.5, 4.6)
    colours = {g: GROUPS[i % len(GROUPS)] for i, g in enumerate(groups)}
    longest = float(audit.curves["time"].max()) if len(audit.curves) else 1.0
    marks = np.linspace(0, longest, 5)
    at_risk_lines = []
    summary = audit.summary.set_index("group")
    for group in groups:
        curve = audit.curves[audit.curves["group"] == group]
        if curve.empty:
            continue
        times = np.concatenate([[0.0], curve["time"].to_numpy(dtype=float)])
        survival = np.concatenate([[1.0], curve["survival"].to_numpy(dtype=float)])
        row = summary.loc[group]
        label = f"{group}: {int(row['n_events']) + int(row['n_censored'])} rows, {int(row['n_events'])} events"
        axes.step(times, survival, where="post", color=colours[group], linewidth=1.8, label=label)
        censored = curve[curve["censored"] > 0]
        axes.plot(censored["time"], censored["survival"], linestyle="none", marker="|", markersize=7,
                  color=colours[group])
        at_risk = [int(curve.loc[curve["time"] >= t, "at_risk"].max()) if (curve["time"] >= t).any() else 0
                   for t in marks]
        at_risk_lines.append(f"{group}: " + "  ".join(f"{n:>4}" for n in at_risk))
    axes.axhline(0.5, color=NEUTRAL, linewidth=0.8, linestyle=":")
    axes.set_ylim(0, 1.02)
    axes.set_xlim(0, longest * 1.02)
    axes.set_xlabel(f"{audit.time} (ticks: censored)\nat risk at " + ", ".join(f"{t:.3g}" for t in marks)
                    + "\n" + "\n".join(at_risk_lines))
    axes.set_ylabel("share event-free (Kaplan-Meier)")
    axes.set_title(f"How does the event-free share fall over follow-up{' by ' + audit.group if audit.group else ''}?")
    axes.legend(loc="upper right", frameon=False, fontsize=8)
    axes.spines[["top", "right"]].set_visible(False)
    return figure
