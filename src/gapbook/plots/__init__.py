"""Figures, one module per stage; every function takes a stage's result object, never a path.

Shared look: a muted palette of our own. Outside a Jupyter kernel the Agg backend is
chosen, so figures render the same on a machine without a screen; inside one the
kernel's inline backend is left alone so figures show in the executed notebook.
"""
from __future__ import annotations

import sys

import matplotlib

if "ipykernel" not in sys.modules:
    matplotlib.use("Agg")

import matplotlib.pyplot as plt  # noqa: E402

# Our palette: observed values, missing values, emphasis, reference lines.
OBSERVED = "#4C6A92"
MISSING = "#D9822B"
EMPHASIS = "#8E3B46"
NEUTRAL = "#9AA5B1"
REFERENCE = "#2F3E46"


def new_figure(width: float = 7.0, height: float = 4.0):
    """A figure and axes with gapbook's settings."""
    figure, axes = plt.subplots(figsize=(width, height), layout="constrained")
    return figure, axes
