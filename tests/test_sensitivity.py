"""Tests of the delta-adjustment sensitivity analysis and its tipping point."""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from gapbook import sensitivity
from gapbook.errors import InputError
from gapbook.impute import impute_chained
from gapbook.models import AnalysisModel
from gapbook.sensitivity import DeltaSpec

FORMULA = "body_mass_g ~ flipper_length_mm + species"


@pytest.fixture(scope="module")
def masked_penguins(penguins) -> pd.DataFrame:
    # Open dataset shipped by the palmerpenguins package; 30% of body masses removed at random.
    frame = penguins[["body_mass_g", "flipper_length_mm", "species"]].dropna().reset_index(drop=True)
    frame["species"] = pd.Categorical(frame["species"])
    rng = np.random.default_rng(7)
    frame.loc[rng.random(len(frame)) < 0.3, "body_mass_g"] = np.nan
    return frame


OPTIONS = dict(m=4, iterations=3, seed=99, types={"body_mass_g": "continuous", "flipper_length_mm": "continuous",
                                                  "species": "nominal"}, progress=False)


def test_delta_zero_reproduces_the_mar_imputation_exactly(masked_penguins):
    # Carpenter & Kenward (2013), ch. 10: delta = 0 is the missing-at-random imputation itself.
    model = AnalysisModel(FORMULA, exposure="flipper_length_mm")
    evaluate = sensitivity.imputation_evaluator(masked_penguins, model=model, impute_options=OPTIONS)
    series = sensitivity.DeltaSeries("body_mass_g", sensitivity.ALL_GROUPS, None, (0.0,))
    shifted = evaluate(series, 0.0)
    mar = impute_chained(masked_penguins, **OPTIONS).analyse(model)
    pd.testing.assert_frame_equal(shifted.reset_index(drop=True), mar.estimates().reset_index(drop=True))


def test_imputed_mean_moves_by_exactly_delta(masked_penguins):
    # Carpenter & Kenward (2013), ch. 10: each imputed value is the MAR draw plus delta. The outcome is the
    # only incomplete variable, so with the same seed every imputed value moves by delta.
    series = sensitivity.DeltaSeries("body_mass_g", sensitivity.ALL_GROUPS, None, (0.0, 250.0))
    base = impute_chained(masked_penguins, **OPTIONS).imputed_long("body_mass_g")
    delta, delta_by = series.engine_arguments(250.0)
    moved = impute_chained(masked_penguins, delta=delta, delta_by=delta_by, **OPTIONS).imputed_long("body_mass_g")
    assert moved["value"].mean() - base["value"].mean() == pytest.approx(250.0, abs=1e-8)
    np.testing.assert_allclose(moved["value"] - base["value"], 250.0, atol=1e-8)


def test_per_group_delta_moves_only_that_group(masked_penguins):
    grids = {"body_mass_g": DeltaSpec(by="species", groups={"Gentoo": [300.0]})}
    (series,) = sensitivity.delta_series(masked_penguins, outcome="body_mass_g", grids=grids)
    assert series.group == "Gentoo" and series.deltas == (0.0, 300.0)
    base = impute_chained(masked_penguins, **OPTIONS).imputed_long("body_mass_g")
    delta, delta_by = series.engine_arguments(300.0)
    moved = impute_chained(masked_penguins, delta=delta, delta_by=delta_by, **OPTIONS).imputed_long("body_mass_g")
    gentoo = (masked_penguins["species"] == "Gentoo").to_numpy()[base["row"].to_numpy()]
    difference = (moved["value"] - base["value"]).to_numpy()
    np.testing.assert_allclose(difference[gentoo], 300.0, atol=1e-8)
    np.testing.assert_allclose(difference[~gentoo], 0.0, atol=1e-8)


def test_tipping_point_matches_the_closed_form():
    # Constructed example: estimate(delta) = -0.4 + 0.5 delta with SE 0.1 and a normal interval, so the
    # upper limit reaches 0 at delta* = (0.4 - 1.959964 * 0.1) / 0.5 (algebra; quantile from scipy).
    crit = stats.norm.ppf(0.975)
    truth = (0.4 - crit * 0.1) / 0.5

    def bounds(delta):
        return -0.4 + 0.5 * delta - crit * 0.1, -0.4 + 0.5 * delta + crit * 0.1

    grid = pd.DataFrame([dict(zip(("ci_lower", "ci_upper"), bounds(d)), delta=d) for d in np.arange(0, 1.01, 0.25)])
    refined = sensitivity.find_tipping_point(grid, "x", bounds, tolerance=0.01)
    assert refined.found and refined.bracket == (0.25, 0.5)
    assert abs(refined.delta - truth) <= 0.01
    interpolated = sensitivity.find_tipping_point(grid, "x", None)
    assert abs(interpolated.delta - truth) <= 0.25  # within the grid step without extra runs
    short = sensitivity.find_tipping_point(grid[grid["delta"] <= 0.25], "x", bounds)
    assert not short.found and "whole grid" in sensitivity.tipping_statement(short, variable="y", group="all", by=None,
                                                                                    variable_type="", exposure_label="x")


def test_tipping_point_found_within_tolerance_on_the_imputation(masked_penguins):
    # Constructed example: lowering the imputed body masses of Gentoo penguins only moves the Gentoo-Adelie
    # contrast (given flipper length) until its interval no longer agrees with the MAR conclusion. The answer is
    # located by brute force on a fine grid (step 10 g), judged directly on the interval; the grid-plus-root
    # search (grid step 200 g, tolerance 10 g) must land within one fine step of it.
    model = AnalysisModel(FORMULA, exposure="species")
    evaluate = sensitivity.imputation_evaluator(masked_penguins, model=model, impute_options=OPTIONS)
    term = "species[T.Gentoo]"
    grid = tuple(float(d) for d in np.arange(0.0, -4001.0, -200.0))
    series = (sensitivity.DeltaSeries("body_mass_g", "Gentoo", "species", grid),)
    result = sensitivity.delta_analysis(evaluate, series=series, terms=[term], tolerance=10.0, max_evaluations=12)
    tip = result.tipping_points.set_index("side").loc["negative"]
    assert bool(tip["found"])
    def excludes_null(delta):
        row = sensitivity.interval(evaluate(series[0], float(delta)), 0.05).set_index("term").loc[term]
        return bool(row["ci_lower"] > 0.0 or row["ci_upper"] < 0.0)

    at_mar = excludes_null(0.0)
    fine = np.arange(tip["bracket_upper"], tip["bracket_lower"] - 1.0, -10.0)
    crossing = next((delta for delta in fine if excludes_null(delta) != at_mar), None)
    assert crossing is not None
    assert abs(tip["tipping_delta"] - crossing) <= 10.0 + 1e-9


def test_grid_parsing_and_input_errors(masked_penguins):
    (series,) = sensitivity.delta_series(masked_penguins, outcome="body_mass_g", grids={"body_mass_g": [0.5, 0.1]})
    assert series.deltas == (0.0, 0.1, 0.5) and series.by is None
    with pytest.raises(InputError, match="^delta.body_mas: 'body_mas' is not a column"):
        sensitivity.delta_series(masked_penguins, outcome="body_mass_g", grids={"body_mas": [1.0]})
    with pytest.raises(InputError, match="^delta.body_mass_g.groups: 'Gentu' is not a level"):
        sensitivity.delta_series(masked_penguins, outcome="body_mass_g",
                                 grids={"body_mass_g": DeltaSpec(by="species", groups={"Gentu": [1.0]})})
    default = sensitivity.delta_series(masked_penguins, outcome="body_mass_g")
    assert default[0].deltas[0] == 0.0 and len(default[0].deltas) > 3


def test_comparison_sentence_says_when_the_conclusion_changes():
    estimates = pd.DataFrame({"strategy": ["complete_case", "multiple_imputation"], "term": ["x", "x"],
                              "estimate": [-0.4, -0.42], "ci_lower": [-0.5, -0.52], "ci_upper": [-0.3, -0.32],
                              "p_value": [0.001, 0.001]})
    table = pd.DataFrame({"variable": "y", "group": "all", "delta": [0.0, 1.0], "term": "x",
                          "estimate": [-0.42, -0.05], "ci_lower": [-0.52, -0.15], "ci_upper": [-0.32, 0.05],
                          "p_value": [0.001, 0.3], "evaluated_by": "grid"})
    result = sensitivity.DeltaResult(curves=table, tipping_points=pd.DataFrame(), series=(), terms=("x",),
                                     alpha=0.05)
    comparison = sensitivity.compare_with_deltas(estimates, result)
    assert comparison.changes and "changes" in comparison.sentences[0]
    assert list(comparison.comparison["conclusion"]) == ["below", "below", "below", "includes"]
    steady = sensitivity.compare_with_deltas(estimates, sensitivity.DeltaResult(
        curves=table.iloc[:1], tipping_points=pd.DataFrame(), series=(), terms=("x",), alpha=0.05))
    assert not steady.changes and "same under every analysis" in steady.sentences[0]
