"""Complete cases, available cases and the strategy comparison, checked against outside references."""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
import statsmodels.formula.api as smf
from scipy import stats

from gapbook.cases import (available_case_summary, compare_strategies, complete_case_analysis,
                           complete_case_flow, completeness_baseline, pairwise_correlations)
from gapbook.errors import InputError
from gapbook.inference import standardised_difference
from gapbook.models import AnalysisModel
from gapbook.stage import analysis_model

TOL = 1e-8


def _assert_matches(ours: pd.DataFrame, reference, n: int) -> None:
    """Estimate, SE, CI, p-value and n of every term equal a statsmodels result."""
    ours = ours.set_index("term")
    ci = reference.conf_int()
    for term in reference.params.index:
        row = ours.loc[term]
        assert row["estimate"] == pytest.approx(reference.params[term], abs=TOL, rel=TOL)
        assert row["std_error"] == pytest.approx(reference.bse[term], abs=TOL, rel=TOL)
        assert row["ci_lower"] == pytest.approx(ci.loc[term, 0], abs=TOL, rel=TOL)
        assert row["ci_upper"] == pytest.approx(ci.loc[term, 1], abs=TOL, rel=TOL)
        assert row["p_value"] == pytest.approx(reference.pvalues[term], abs=TOL, rel=1e-6)
        assert row["n_used"] == n == int(reference.nobs)
    assert set(ours.index) == set(reference.params.index)


# --- estimates against statsmodels on the complete cases chosen by hand -------------------------------

@pytest.mark.parametrize("robust", [False, True])
def test_gaussian_complete_case_equals_statsmodels_on_penguins(penguins, robust):
    # Source: statsmodels OLS (HC1 sandwich when robust) on palmerpenguins rows complete for the model.
    formula = "body_mass_g ~ flipper_length_mm + C(species) + sex"
    model = AnalysisModel(formula, "gaussian", exposure="flipper_length_mm", robust=robust)
    result = complete_case_analysis(penguins, model=model)
    by_hand = penguins.dropna(subset=["body_mass_g", "flipper_length_mm", "species", "sex"])
    # gapbook keeps t intervals (df = n - p) for OLS with sandwich errors; statsmodels does so with use_t=True.
    reference = smf.ols(formula, data=by_hand).fit(cov_type="HC1" if robust else "nonrobust", use_t=True)
    assert len(by_hand) == 333  # palmerpenguins documents 333 rows with sex recorded (11 of 344 lack it)
    _assert_matches(result.estimates(), reference, len(by_hand))
    assert result.exposure_terms == ("flipper_length_mm",)


def test_binomial_complete_case_equals_statsmodels_with_odds_ratios(penguins):
    # Source: statsmodels GLM binomial (logit) fitted to a 0/1 outcome made by hand (male = 1).
    formula = "sex ~ body_mass_g + bill_depth_mm + C(species)"
    result = complete_case_analysis(penguins, model=AnalysisModel(formula, "binomial", exposure="body_mass_g"))
    by_hand = penguins.dropna(subset=["sex", "body_mass_g", "bill_depth_mm"]).assign(
        male=lambda d: (d["sex"] == "male").astype(float))
    reference = smf.glm("male ~ body_mass_g + bill_depth_mm + C(species)", data=by_hand,
                        family=sm.families.Binomial()).fit()
    _assert_matches(result.estimates(), reference, len(by_hand))
    row = result.estimates().set_index("term").loc["body_mass_g"]
    assert row["exp_estimate"] == pytest.approx(np.exp(reference.params["body_mass_g"]), rel=TOL)
    assert row["exp_ci_upper"] == pytest.approx(np.exp(reference.conf_int().loc["body_mass_g", 1]), rel=TOL)


def test_poisson_with_offset_equals_statsmodels():
    # Source: statsmodels GLM Poisson with offset log(time) on rows complete for every model variable,
    # including the offset (a rate model; data simulated here with a fixed seed).
    rng = np.random.default_rng(11)
    n = 400
    x = rng.normal(size=n)
    group = rng.choice(["a", "b", "c"], size=n)
    time = rng.uniform(0.5, 3.0, size=n)
    y = rng.poisson(time * np.exp(0.2 + 0.4 * x + 0.3 * (group == "b")))
    data = pd.DataFrame({"events": y.astype(float), "x": x, "group": group, "time": time})
    data.loc[rng.random(n) < 0.15, "x"] = np.nan
    data.loc[rng.random(n) < 0.05, "time"] = np.nan
    model = AnalysisModel("events ~ x + C(group)", "poisson", exposure="x", offset="time")
    result = complete_case_analysis(data, model=model)
    by_hand = data.dropna()
    reference = smf.glm("events ~ x + C(group)", data=by_hand, family=sm.families.Poisson(),
                        offset=np.log(by_hand["time"])).fit()
    _assert_matches(result.estimates(), reference, len(by_hand))
    assert result.estimates()["exp_estimate"].notna().all()
    flow = result.flow.steps.set_index("variable")
    assert flow.loc["time", "role"] == "offset"


# --- the demo study: flow table adds up, descriptives equal pandas ---------------------------------------

def test_demo_flow_table_adds_up(demo):
    params, study = demo
    model = analysis_model(params)
    result = complete_case_analysis(study.data, model=model, reasons=study.reasons,
                                    not_applicable=study.not_applicable)
    table = result.flow.steps
    steps = table[table["step"] == "excluded"].set_index("variable")
    # The formula's order as a reader sees it: outcome, then the right-hand side left to right.
    order = ["hba1c_12m", "arm", "hba1c_0", "age", "sex", "bmi", "clinic"]
    assert list(steps.index) == order
    lacking = study.data[order].isna().to_numpy()
    first = np.where(lacking.any(axis=1), lacking.argmax(axis=1), -1)
    for j, name in enumerate(order):
        assert steps.loc[name, "n_excluded"] == int((first == j).sum())
        assert steps.loc[name, "n_lacking"] == int(study.missing[name].sum())
        counted = sum(int(part.rsplit(" ", 1)[1]) for part in steps.loc[name, "reasons"].split("; ") if part)
        assert counted == steps.loc[name, "n_lacking"]
    assert table["n_remaining"].iloc[0] == len(study.data) == 1200
    assert len(study.data) - steps["n_excluded"].sum() == result.flow.n_used == table["n_remaining"].iloc[-1]
    # Source: statsmodels' own listwise deletion of the same formula on the whole frame.
    assert result.flow.n_used == int(smf.ols(params.analysis.formula, data=study.data).fit().nobs)
    assert result.model_fit.nobs == result.flow.n_used
    assert steps.loc["hba1c_12m", "reasons"].startswith("lost to follow-up")


def test_demo_descriptives_equal_pandas(demo):
    params, study = demo
    model = analysis_model(params)
    complete = complete_case_flow(study.data, model=model).complete
    summary = available_case_summary(study.data, complete=complete, types=study.types)
    table = summary.descriptives.set_index(["variable", "statistic"])
    subset = study.data[complete.to_numpy()]
    # Source: pandas Series.mean / std (ddof 1) / median / quantile (linear), value_counts.
    for name in ("hba1c_0", "bmi", "insulin_dose", "hba1c_12m"):
        full, part = study.data[name], subset[name]
        for statistic, function in (("mean", lambda s: s.mean()), ("sd", lambda s: s.std()),
                                    ("median", lambda s: s.median()),
                                    ("lower_quartile", lambda s: s.quantile(0.25)),
                                    ("upper_quartile", lambda s: s.quantile(0.75))):
            row = table.loc[(name, statistic)]
            assert row["available_case"] == pytest.approx(function(full), rel=1e-12)
            assert row["complete_case"] == pytest.approx(function(part), rel=1e-12)
            assert row["n_available"] == full.count() and row["n_complete"] == part.count()
    for name in ("alcohol", "education", "clinic"):
        counts = study.data[name].value_counts()
        shares = study.data[name].value_counts(normalize=True)
        for level in study.data[name].cat.categories:
            assert table.loc[(name, f"count: {level}"), "available_case"] == counts[level]
            assert table.loc[(name, f"proportion: {level}"), "available_case"] == pytest.approx(shares[level])
            assert table.loc[(name, f"count: {level}"), "complete_case"] == subset[name].value_counts()[level]
    assert summary.n_complete == int(complete.sum())


def test_pairwise_correlations_equal_pandas_and_scipy(demo):
    _, study = demo
    names = ["age", "bmi", "hba1c_0", "insulin_dose", "hba1c_12m"]
    table = pairwise_correlations(study.data, variables=names).set_index(["variable_1", "variable_2"])
    # Source: pandas DataFrame.corr (pairwise-complete Pearson) and the pairwise counts of observed values.
    reference = study.data[names].corr()
    observed = study.data[names].notna().astype(int)
    pair_n = observed.T @ observed
    for (a, b), row in table.iterrows():
        assert row["correlation"] == pytest.approx(reference.loc[a, b], abs=1e-12)
        assert row["n_pairwise"] == pair_n.loc[a, b]
    both = study.data[["bmi", "hba1c_12m"]].dropna()
    # Source: scipy.stats.pearsonr on one pair.
    assert table.loc[("bmi", "hba1c_12m"), "correlation"] == pytest.approx(
        stats.pearsonr(both["bmi"], both["hba1c_12m"])[0], abs=1e-12)


def test_standardised_differences_follow_austin_2009():
    # Source: Austin (2009) Stat Med 28:3083, d = (m1 - m0) / sqrt((s1^2 + s0^2) / 2); worked by hand:
    # groups [1, 2, 3, 4] and [3, 4, 5]: means 2.5 and 4, variances 5/3 and 1 -> d = -1.5 / sqrt(4/3).
    data = pd.DataFrame({"v": [1.0, 2, 3, 4, 3, 4, 5], "b": ["y", "n", "y", "n", "y", "n", "n"]})
    complete = pd.Series([True] * 4 + [False] * 3)
    table = completeness_baseline(data, complete=complete).differences.set_index(["variable", "level"])
    assert table.loc[("v", ""), "smd"] == pytest.approx(-1.5 / np.sqrt(4 / 3), rel=1e-12)
    # Proportions: p1 = 0.5, p0 = 1/3 -> d = (1/6) / sqrt((0.25 + 2/9) / 2).
    assert table.loc[("b", "y"), "smd"] == pytest.approx((1 / 6) / np.sqrt((0.25 + 2 / 9) / 2), rel=1e-12)
    assert np.isnan(standardised_difference(1.0, 0.0, 1.0, 0.0))  # no spread in either group: undefined


def test_demo_completeness_baseline_uses_fully_observed_variables(demo):
    params, study = demo
    complete = complete_case_flow(study.data, model=analysis_model(params)).complete
    baseline = completeness_baseline(study.data, complete=complete, types=study.types)
    assert set(baseline.variables) == {c for c in study.data.columns if study.data[c].notna().all()}
    assert baseline.n_complete + baseline.n_incomplete == len(study.data)
    row = baseline.differences.set_index(["variable", "level"]).loc[("on_insulin", "yes")]
    # Source: pandas group means of the indicator in each subset.
    on = (study.data["on_insulin"] == "yes")
    assert row["complete"] == pytest.approx(on[complete].mean())
    assert row["incomplete"] == pytest.approx(on[~complete].mean())


# --- simulation: when complete cases are unbiased and when they are not ---------------------------------

def _expit(v):
    return 1 / (1 + np.exp(-v))


def _complete_case_slopes(depends_on: str, replicates: int = 200, n: int = 500, seed: int = 20261202):
    """Complete-case slope of x in y = 1 + x + z + e, with z missing depending on x or on y."""
    rng = np.random.default_rng(seed)
    model = AnalysisModel("y ~ x + z", exposure="x")
    slopes = np.empty(replicates)
    for r in range(replicates):
        x = rng.normal(size=n)
        z = 0.5 * x + np.sqrt(0.75) * rng.normal(size=n)
        y = 1 + x + z + rng.normal(size=n)
        driver = x if depends_on == "covariate" else y - 1
        z_seen = np.where(rng.random(n) < _expit(-0.5 + 1.5 * driver), np.nan, z)
        slopes[r] = complete_case_analysis(pd.DataFrame({"y": y, "x": x, "z": z_seen}), model=model).model_fit.coefficients[1]
    return slopes


@pytest.mark.slow
def test_complete_cases_unbiased_when_missingness_depends_on_covariates_only():
    # Source: Little (1992) JASA 87:1227 and White & Carlin (2010) Stat Med 29:2920: complete-case
    # regression is unbiased when missingness of a covariate does not depend on the outcome given covariates.
    slopes = _complete_case_slopes("covariate")
    mcse = slopes.std(ddof=1) / np.sqrt(len(slopes))
    assert abs(slopes.mean() - 1.0) < 4 * mcse
    assert abs(slopes.mean() - 1.0) < 0.03


@pytest.mark.slow
def test_complete_cases_biased_when_missingness_depends_on_outcome():
    # Source: same references: when missingness depends on the outcome, complete-case regression is biased.
    slopes = _complete_case_slopes("outcome")
    mcse = slopes.std(ddof=1) / np.sqrt(len(slopes))
    assert abs(slopes.mean() - 1.0) > 8 * mcse
    assert abs(slopes.mean() - 1.0) > 0.05


# --- bad input exits 2 (InputError) with a clear message --------------------------------------------------

def test_unknown_column_names_it(penguins):
    with pytest.raises(InputError, match="'flipper_mm' is not a column.*did you mean 'flipper_length_mm'"):
        complete_case_analysis(penguins, model=AnalysisModel("body_mass_g ~ flipper_mm + species"))


def test_unsupported_family_names_it(penguins):
    with pytest.raises(InputError, match="^family: 'gamma'"):
        complete_case_analysis(penguins, model=AnalysisModel("body_mass_g ~ species", family="gamma"))


def test_outcome_without_observed_values(penguins):
    data = penguins.assign(body_mass_g=np.nan)
    with pytest.raises(InputError, match="outcome 'body_mass_g' has no observed values"):
        complete_case_analysis(data, model=AnalysisModel("body_mass_g ~ species"))


def test_model_without_complete_case(penguins):
    data = penguins.copy()
    data.loc[data.index[::2], "bill_depth_mm"] = np.nan
    data.loc[data.index[1::2], "flipper_length_mm"] = np.nan
    with pytest.raises(InputError, match="no row has every model variable observed"):
        complete_case_analysis(data, model=AnalysisModel("body_mass_g ~ bill_depth_mm + flipper_length_mm"))


def test_missing_params_formula_is_an_input_error(demo):
    params, _ = demo
    bare = params.model_copy(update={"analysis": params.analysis.model_copy(update={"formula": None})})
    with pytest.raises(InputError, match="analysis.formula is required"):
        analysis_model(bare)


# --- the comparison across strategies ---------------------------------------------------------------------

def test_comparison_on_ratio_scale_and_forest_plot(penguins):
    formula = "sex ~ body_mass_g + C(species)"
    cc = complete_case_analysis(penguins, model=AnalysisModel(formula, "binomial", exposure="C(species)"))
    other = cc.estimates().assign(strategy="multiple_imputation", std_error=cc.estimates()["std_error"] * 0.9)
    estimates = pd.concat([cc.estimates(), other], ignore_index=True)
    comparison = compare_strategies(estimates, exposure="species", family="binomial")
    assert comparison.terms == ("C(species)[T.Chinstrap]", "C(species)[T.Gentoo]")
    table = comparison.comparison
    assert list(table["strategy"]) == ["complete_case", "multiple_imputation"] * 2
    # Source: the odds ratio is exp(log-odds coefficient) (logistic model definition).
    assert np.allclose(table["exp_estimate"], np.exp(table["estimate"]), rtol=1e-12)
    assert np.allclose(table["exp_ci_lower"], np.exp(table["ci_lower"]), rtol=1e-12)
    assert np.allclose(table.loc[table["strategy"] == "multiple_imputation", "se_relative_to_complete_case"], 0.9)
    from gapbook.plots.cases import plot_strategy_comparison
    figure = plot_strategy_comparison(comparison, reference_value=0.0)
    axes = figure.axes[0]
    assert axes.get_xscale() == "log" and axes.get_xlabel().startswith("odds ratio (log axis)")
    drawn = [line.get_xdata()[0] for line in axes.get_lines() if len(line.get_xdata()) == 1]  # point estimates
    assert np.allclose(drawn, table["exp_estimate"])


def test_comparison_of_gaussian_keeps_coefficient_scale(demo):
    params, study = demo
    cc = complete_case_analysis(study.data, model=analysis_model(params))
    comparison = compare_strategies(cc.estimates(), exposure=list(cc.exposure_terms), family="gaussian")
    assert comparison.comparison["exp_estimate"].isna().all()
    assert comparison.comparison["term"].tolist() == ["arm[T.sms]"]
    # The demo's true effect is -0.40 (gapbook.demo docstring); the complete-case interval should hold it
    # since dropout depends on baseline HbA1c, a model covariate (MAR given covariates).
    row = comparison.comparison.iloc[0]
    assert row["ci_lower"] < -0.40 < row["ci_upper"]


def test_binomial_family_with_a_measured_outcome_is_an_input_error(penguins):
    # A logistic model needs a 0/1 (or two-level) outcome; body mass in grams is neither.
    with pytest.raises(InputError, match="binomial needs a 0/1 or two-level outcome"):
        complete_case_analysis(penguins, model=AnalysisModel("body_mass_g ~ species", family="binomial"))
