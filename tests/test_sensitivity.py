"""Tests of the delta-adjustment sensitivity analysis and its tipping point."""
from __future__ import annotations

import dataclasses

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from gapbook import sensitivity
from gapbook.errors import InputError
from gapbook.impute import impute_chained
from gapbook.models import AnalysisModel
from gapbook.demo import demo_params
from gapbook.intake import load_study
from gapbook.sensitivity import DeltaSpec
from gapbook.stage import imputation_plan

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


@pytest.fixture(scope="module")
def demo_plan():
    """The demo study's imputation plan, with few imputations and iterations to keep the tests quick."""
    params = demo_params()
    study = load_study(params)
    plan = imputation_plan(params, study)
    light = dataclasses.replace(plan.settings, m=4, iterations=3)
    return dataclasses.replace(plan, settings=light), study


def test_delta_zero_reproduces_the_mar_imputation_exactly(masked_penguins):
    # Carpenter & Kenward (2013), ch. 10: delta = 0 is the missing-at-random imputation itself.
    model = AnalysisModel(FORMULA, exposure="flipper_length_mm")
    evaluate = sensitivity.imputation_evaluator(masked_penguins, model=model, impute_options=OPTIONS)
    series = sensitivity.DeltaSeries("body_mass_g", sensitivity.ALL_GROUPS, None, (0.0,))
    shifted = evaluate(series, 0.0)
    mar = impute_chained(masked_penguins, **OPTIONS).analyse(model)
    pd.testing.assert_frame_equal(shifted.drop(columns=list(sensitivity.MONTE_CARLO_COLUMNS)).reset_index(drop=True),
                                  mar.estimates().reset_index(drop=True))
    # sqrt(B/m) from the per-imputation estimates (White, Royston & Wood 2011, Stat Med 30:377).
    per = mar.per_imputation().pivot(index="imputation", columns="term", values="estimate")
    expected = np.sqrt(per.var(ddof=1) / len(per))
    np.testing.assert_allclose(shifted.set_index("term")["monte_carlo_se"], expected.loc[shifted["term"]], rtol=1e-12)


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


@pytest.mark.slow
def test_tipping_point_monte_carlo_se_matches_the_spread_over_seeds(masked_penguins):
    # The Monte Carlo SE of the tipping point (jackknife SE of the interval's limit over the imputations, White,
    # Royston & Wood 2011, Stat Med 30:377, over the limit's slope: the delta method) against its definition:
    # the SD of the tipping point over independent seeds. Gentoo penguins' missing body masses are lowered until
    # the Gentoo-Adelie difference (about 1400 g) is no longer clear.
    model = AnalysisModel("body_mass_g ~ species", exposure="species")
    term = "species[T.Gentoo]"
    series = (sensitivity.DeltaSeries("body_mass_g", "Gentoo", "species", (0.0, -3000.0, -4000.0, -6000.0)),)
    tips, ses = [], []
    for seed in range(1, 21):
        options = dict(OPTIONS, m=10, seed=seed)
        evaluate = sensitivity.imputation_evaluator(masked_penguins, model=model, impute_options=options)
        result = sensitivity.delta_analysis(evaluate, series=series, terms=[term], refine=False, m=10)
        tip = result.tipping_points.set_index("side").loc["negative"]
        assert tip["baseline_conclusion"] == "above" and bool(tip["found"]) and tip["m"] == 10
        tips.append(tip["tipping_delta"])
        ses.append(tip["monte_carlo_se"])
    spread, estimated = float(np.std(tips, ddof=1)), float(np.sqrt(np.mean(np.square(ses))))
    # 20 seeds estimate an SD to about +-16% (60 seeds gave 36.5 against 32.8 estimated); forgetting the slope
    # (a factor of about 3 here) or the m in sqrt(B/m) (about 3) would be far outside.
    assert estimated / 1.5 < spread < estimated * 1.5, (spread, estimated)


def test_delta_zero_with_the_plan_m_is_the_imputation_stage_estimate_exactly(demo_plan):
    plan, study = demo_plan
    series = sensitivity.plan_series(plan, study.data, grids={"hba1c_12m": [0.0, 0.4]}, types=study.types)
    result = sensitivity.sensitivity_analysis(plan, series=series, refine=False)
    main = plan.run().analyse(plan.model).estimates().set_index("term")
    zero = result.deltas.curves[result.deltas.curves["delta"] == 0].set_index("term")
    for column in ("estimate", "std_error", "ci_lower", "ci_upper", "p_value", "df"):
        assert (zero[column] == main.loc[zero.index, column]).all(), column
    assert result.m == plan.settings.m and "main multiple-imputation estimate exactly" in result.sentences[1]
    fewer = sensitivity.sensitivity_analysis(plan, series=series, m=3, refine=False)
    assert "fewer than the imputation stage's m = " in fewer.sentences[1] and "Monte Carlo error" in fewer.sentences[1]
    assert (fewer.deltas.curves["delta"] == 0).any()


def test_rounded_delta_follows_its_monte_carlo_se():
    # Common practice, no source: no digit finer than (twice) the Monte Carlo SE is shown.
    assert sensitivity.rounded_delta(2.6934, 0.05) == "2.7"
    assert sensitivity.rounded_delta(2.6934, 0.004) == "2.69"
    assert sensitivity.rounded_delta(2.6934, 0.0004) == "2.693"
    assert sensitivity.rounded_delta(2.6934, 0.3) == "3"
    assert sensitivity.rounded_delta(2634.0, 40.0) == "2600"
    assert sensitivity.rounded_delta(2.6934, float("nan")) == "2.69"


def test_statement_names_group_direction_unit_and_precision():
    point = sensitivity.TippingPoint("arm[T.sms]", "positive", "below", True, 0.8137, (0.5, 1.0), (0.0, 3.0), 3,
                                     monte_carlo_se=0.031)
    text = sensitivity.tipping_statement(point, variable="hba1c_12m", group="sms", by="arm", variable_type="",
                                         exposure_label="arm[T.sms]", unit="percentage points", m=30)
    assert "the missing values of hba1c_12m in the arm = sms group only" in text
    assert "0.8 percentage points higher than imputed under missing at random" in text
    assert "(Monte Carlo SE 0.03 with m = 30)" in text
    lower = sensitivity.TippingPoint("x", "negative", "above", True, -1.234, (-1.5, -1.0), (-2.0, 0.0), 2,
                                     monte_carlo_se=0.002)
    text = sensitivity.tipping_statement(lower, variable="y", group=sensitivity.ALL_GROUPS, by=None,
                                         variable_type="", exposure_label="x")
    assert "all missing values of y are on average 1.23 (in the units of y" in text and "lower" in text
    binary = sensitivity.tipping_statement(lower, variable="y", group="all", by=None, variable_type="binary",
                                           exposure_label="x")
    assert "1.23 on the log-odds scale (odds ratio 3.42)" in binary  # exp(1.23) = 3.421


def test_shifting_both_groups_alike_is_explained_with_their_shares():
    # Constructed example: group a has 2 of 4 outcomes missing, group b 1 of 4.
    data = pd.DataFrame({"y": [1.0, np.nan, np.nan, 2.0, 3.0, np.nan, 4.0, 5.0],
                         "arm": pd.Categorical(list("aaaabbbb"))})
    text = sensitivity.alike_shift_sentence(data, data.isna(), variable="y", exposure="arm")
    assert "(a 50.0%, b 25.0%)" in text and "not at all when the shares are equal" in text
    assert sensitivity.alike_shift_sentence(data, data.isna(), variable="y", exposure="age") == ""


def test_shifting_values_missing_only_where_the_exposure_is_missing_too_is_said_so():
    # Constructed example: y is missing in the two rows whose arm is missing, never within an arm; the
    # shares read 'A 0.0%, B 0.0%', as if nothing were shifted.
    data = pd.DataFrame({"y": [1.0, 2.0, np.nan, 3.0, 4.0, np.nan],
                         "arm": pd.Categorical(["A", "A", None, "B", "B", None])})
    text = sensitivity.alike_shift_sentence(data, data.isna(), variable="y", exposure="arm")
    assert "0.0%" not in text and "all in rows whose arm is missing too (2 rows)" in text
    # with some missing within the arms as well, the shares are given and the rows without an arm counted
    data.loc[0, "y"] = np.nan
    text = sensitivity.alike_shift_sentence(data, data.isna(), variable="y", exposure="arm")
    assert "(A 50.0%, B 0.0%; and 2 rows whose arm is missing too)" in text


def test_a_tipping_point_within_its_monte_carlo_error_of_zero_is_not_read_as_zero():
    # heart (statsmodels) trial: tipping delta 1 (between grid points 0 and 1) with Monte Carlo SE 2.16 rounded
    # to 'on average 0 higher', which says no shift is needed; rounding rule: common practice, no source
    point = sensitivity.TippingPoint("age", "positive", "above", True, 1.0, (0.0, 1.0), (0.0, 8.0), 0,
                                     monte_carlo_se=2.16)
    text = sensitivity.tipping_statement(point, variable="age", group=sensitivity.ALL_GROUPS, by=None,
                                         variable_type="continuous", exposure_label="age", unit="years", m=20)
    assert "on average 0 " not in text and "about 1 year higher" in text
    assert "Monte Carlo SE of 2 with m = 20" in text and "cannot be told from no shift" in text


def test_a_unit_after_one_reads_singular():
    # English grammar: 'more than 1 percentage points' read wrongly; symbols stay as written
    point = sensitivity.TippingPoint("x", "positive", "above", False, float("nan"), (0.0, 1.0), (0.0, 1.0), 0)
    text = sensitivity.tipping_statement(point, variable="y", group=sensitivity.ALL_GROUPS, by=None,
                                         variable_type="continuous", exposure_label="x", unit="percentage points")
    assert "more than 1 percentage point higher" in text


def test_default_variable_is_the_outcome_else_the_most_incomplete_model_variable(demo_plan):
    plan, study = demo_plan
    assert sensitivity.default_variable(plan) == "hba1c_12m"
    mask = plan.impute_mask.copy()
    mask["hba1c_12m"] = False
    counts = {c: int(mask[c].sum()) for c in plan.model_columns}
    most = max((n, c) for c, n in counts.items())[1]
    complete_outcome = dataclasses.replace(plan, impute_mask=mask)
    assert sensitivity.default_variable(complete_outcome) == most != "hba1c_12m"
    nothing = dataclasses.replace(plan, impute_mask=mask & False)
    assert sensitivity.default_variable(nothing) is None
    assert sensitivity.plan_series(nothing, study.data) == ()
    skipped = sensitivity.sensitivity_analysis(nothing, series=())
    assert skipped.skipped() and skipped.sentences[0].startswith("Nothing to shift")
    assert set(skipped.tables()) == {"sensitivity_delta", "tipping_point", "sensitivity_comparison"}
    with pytest.raises(InputError, match="^delta.age: 'age' has no missing value to shift"):
        sensitivity.check_series(nothing, sensitivity.delta_series(study.data, outcome="hba1c_12m",
                                                                   grids={"age": [0.0, 1.0]}))


def test_the_demo_follows_its_own_advice_on_the_number_of_imputations():
    # White, Royston & Wood (2011, Stat Med 30:377): at least as many imputations as the percentage of
    # incomplete cases, the advice the imputation page prints.
    params = demo_params()
    plan = imputation_plan(params, load_study(params))
    assert params.imputation.m >= plan.advised_m() >= 20
    # The sensitivity stage keeps that m, so its delta = 0 rows are the imputation stage's estimate.
    assert params.sensitivity.m is None


def test_a_conclusion_that_holds_is_said_in_the_panel_title_clear_of_the_curves():
    # A panel whose grid never tips says so in its title; a panel that tips draws its tipping line instead.
    from gapbook.plots.sensitivity import delta_curve

    deltas = np.arange(0.0, 1.01, 0.5)
    rows = [dict(term="x", variable="y", group=group, delta=d, estimate=-1.0 + slope * d,
                 ci_lower=-1.5 + slope * d, ci_upper=-0.5 + slope * d, evaluated_by="grid")
            for group, slope in (("a", 0.1), ("b", 2.0)) for d in deltas]
    tips = pd.DataFrame([dict(variable="y", group="a", term="x", found=False, tipping_delta=np.nan,
                              monte_carlo_se=np.nan),
                         dict(variable="y", group="b", term="x", found=True, tipping_delta=0.25,
                              monte_carlo_se=0.01)])
    result = sensitivity.DeltaResult(curves=pd.DataFrame(rows), tipping_points=tips, series=(), terms=("x",),
                                     alpha=0.05)
    figure = delta_curve(result, family="gaussian")
    titles = [ax.get_title() for ax in figure.axes]
    assert titles[0].endswith("\nconclusion holds over the whole grid")
    assert "holds" not in titles[1]
    assert not any("whole grid" in t.get_text() for ax in figure.axes for t in ax.texts)
