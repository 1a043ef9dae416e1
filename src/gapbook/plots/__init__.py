"""Figures, one module per stage; every function takes a stage's result object, never a path.

Shared look: one palette of our own (:mod:`gapbook.plots.palette`), whose roles are
re-exported here for the plot modules. Outside a Jupyter kernel the Agg backend is
chosen, so figures render the same on a machine without a screen; inside one the
kernel's inline backend is left alone so figures show in the executed notebook.
"""
from __future__ import annotations

import sys

import matplotlib

if "ipykernel" not in sys.modules:
    matplotlib.use("Agg")

import matplotlib.pyplot as plt  # noqa: E402

from .palette import (  # noqa: E402  (the roles every plot module draws with)
    BACKGROUND, EMPHASIS, GRID, IMPUTED, MISSING, NEUTRAL, NOT_APPLICABLE, OBSERVED, REFERENCE, UNTESTED,
)

__all__ = ["BACKGROUND", "EMPHASIS", "GRID", "IMPUTED", "MISSING", "NEUTRAL", "NOT_APPLICABLE", "OBSERVED",
           "REFERENCE", "UNTESTED", "new_figure", "shown_of", "MAX_VARIABLES_SHOWN", "MAX_FIGURE_INCHES"]


# Text in figures is text: a '$' in a column name or label must not start mathtext (an
# unbalanced one would stop the figure), so mathtext is off for every gapbook figure.
matplotlib.rcParams["text.parse_math"] = False

# Figures that grow with the number of variables show at most this many and say so in their
# title (a study with 2,000 columns must not make a figure of many gigabytes); the tables
# keep every variable.
MAX_VARIABLES_SHOWN = 40
MAX_FIGURE_INCHES = 30.0  # no figure side is ever larger, whatever a plot asks for


def new_figure(width: float = 7.0, height: float = 4.0):
    """A figure and axes with gapbook's settings (each side at most ``MAX_FIGURE_INCHES``).

    Parameters
    ----------
    width, height : float
        Inches.

    Returns
    -------
    (figure, axes)
    """
    size = (min(float(width), MAX_FIGURE_INCHES), min(float(height), MAX_FIGURE_INCHES))
    figure, axes = plt.subplots(figsize=size, layout="constrained")
    return figure, axes


def shown_of(shown: int, total: int, what: str = "variables", chosen: str = "with the most missing") -> str:
    """'' when everything is shown, else ' (the 40 with the most missing of 2,000 variables)'.

    Parameters
    ----------
    shown : int
        How many are drawn.
    total : int
        How many there are.
    what : str
        What they are.
    chosen : str
        How the drawn ones were chosen.

    Returns
    -------
    str
    """
    if shown >= total:
        return ""
    return f" (the {shown:,} {chosen} of {total:,} {what})"
