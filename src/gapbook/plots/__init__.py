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
           "REFERENCE", "UNTESTED", "new_figure"]


def new_figure(width: float = 7.0, height: float = 4.0):
    """A figure and axes with gapbook's settings."""
    figure, axes = plt.subplots(figsize=(width, height), layout="constrained")
    return figure, axes
