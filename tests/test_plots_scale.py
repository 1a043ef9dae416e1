"""Figures stay readable and small whatever the number of variables (issue 9 §6).

Measured: 2,000 columns made the co-missingness figure about 17 GB. Figures that grow with
the number of variables show at most ``MAX_VARIABLES_SHOWN`` of them and say so in their
title; the tables keep every variable.
"""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from gapbook.audit import audit_study
from gapbook.intake import load_study
from gapbook.params import Params
from gapbook.plots import MAX_FIGURE_INCHES, MAX_VARIABLES_SHOWN, new_figure
from gapbook.plots import audit as audit_plots


@pytest.fixture(scope="module")
def wide_audit():
    rng = np.random.default_rng(5)
    k = 3 * MAX_VARIABLES_SHOWN
    values = rng.normal(size=(40, k)).round(2).astype(str)
    values[rng.random(values.shape) < np.linspace(0.01, 0.4, k)] = ""  # later columns more incomplete
    frame = pd.DataFrame(values, columns=[f"v{i}" for i in range(k)])
    frame.insert(0, "pid", [str(i) for i in range(40)])
    study = load_study(Params.from_dict({"data": {"path": "x.csv", "id": "pid"}}), raw=frame)
    return audit_study(study, threshold=0.2, by=[], top_patterns=1000)


@pytest.mark.parametrize("plot", ["missing_share", "missing_together", "missingness_map", "common_patterns"])
def test_variable_figures_show_a_stated_number(wide_audit, plot):
    figure = getattr(audit_plots, plot)(wide_audit)
    axes = figure.axes[0]
    width, height = figure.get_size_inches()
    assert width <= MAX_FIGURE_INCHES and height <= MAX_FIGURE_INCHES
    labels = [t.get_text() for t in (axes.get_yticklabels() if plot in ("missing_share", "common_patterns")
                                     else axes.get_xticklabels())]
    assert len(labels) <= MAX_VARIABLES_SHOWN
    if plot == "missing_together":  # a denser square: fewer variables, and the count left out in its note
        assert len(labels) == audit_plots.MAX_TOGETHER
        assert f"{len(wide_audit.comissingness_matrix) - audit_plots.MAX_TOGETHER} left out" in \
            axes.get_title(loc="left").replace("\n", " ")
    elif plot != "common_patterns":
        assert f"the {MAX_VARIABLES_SHOWN} with the most missing of" in axes.get_title()
    if plot == "missing_share":  # the most incomplete are the ones shown
        shown = {label.split(" (")[0] for label in labels}
        worst = set(wide_audit.variables.sort_values("pct_missing").tail(5)["variable"])
        assert worst <= shown
    assert len(wide_audit.variables) == 3 * MAX_VARIABLES_SHOWN  # the table keeps every variable


def test_no_figure_side_exceeds_the_bound_and_dollars_are_text():
    figure, axes = new_figure(500, 0.5 * 2000)
    assert max(figure.get_size_inches()) <= MAX_FIGURE_INCHES
    axes.set_title("cost $5 to $10 and $\\frac{a}$ unbalanced $")  # would stop mathtext; must render as text
    figure.canvas.draw()
