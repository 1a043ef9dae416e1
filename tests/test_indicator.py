"""The missing-category and missing-indicator strategy, checked by invariances and published bias results."""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import statsmodels.formula.api as smf

from gapbook.cases import complete_case_analysis
from gapbook.errors import InputError
from gapbook.indicator import MISSING_LEVEL, missing_category_analysis, prepare_missing_category
from gapbook.models import AnalysisModel
from gapbook.stage import analysis_model

TOL = 1e-8




def _by_term(result) -> pd.Series:
    return result.estimates().set_index("term")["estimate"]


def test_missing_category_equals_fit_with_level_added_by_hand(penguins):
    # Invariance: giving the 11 penguins without a recorded sex their own level by hand (a made-up word
    # that sorts last) and fitting with statsmodels OLS must give the same coefficients and SEs.
    formula = "body_mass_g ~ flipper_length_mm + C(species) + sex"
    result = missing_category_analysis(penguins, model=AnalysisModel(formula, exposure="flipper_length_mm"))
    by_hand = penguins.dropna(subset=["body_mass_g", "flipper_length_mm"]).assign(
        sex_by_hand=lambda d: d["sex"].fillna("zz_unrecorded").astype(str))
    reference = smf.ols("body_mass_g ~ flipper_length_mm + C(species) + sex_by_hand", data=by_hand).fit()
    ours = result.estimates().set_index("term")
    pairs = {"Intercept": "Intercept", "flipper_length_mm": "flipper_length_mm",
             "C(species)[T.Chinstrap]": "C(species)[T.Chinstrap]", "C(species)[T.Gentoo]": "C(species)[T.Gentoo]",
             "sex[T.male]": "sex_by_hand[T.male]", f"sex[T.{MISSING_LEVEL}]": "sex_by_hand[T.zz_unrecorded]"}
    for our_term, their_term in pairs.items():
        assert ours.loc[our_term, "estimate"] == pytest.approx(reference.params[their_term], abs=TOL, rel=TOL)
        assert ours.loc[our_term, "std_error"] == pytest.approx(reference.bse[their_term], abs=TOL, rel=TOL)
    assert set(ours.index) == set(pairs)
    # 344 penguins, 2 without body mass or flipper length (both in the same rows): 342 kept.
    assert result.model_fit.nobs == int(reference.nobs) == 342


def test_indicator_other_coefficients_do_not_depend_on_the_constant(penguins):
    # Invariance: with the indicator in the model, the constant put in place of missing values changes only
    # the intercept and the indicator's coefficient. Reference fills with 0 (we use the observed mean).
    rng = np.random.default_rng(3)
    data = penguins.dropna(subset=["body_mass_g", "flipper_length_mm"]).copy()
    data.loc[rng.random(len(data)) < 0.25, "bill_depth_mm"] = np.nan
    formula = "body_mass_g ~ flipper_length_mm + bill_depth_mm + C(species)"
    result = missing_category_analysis(data, model=AnalysisModel(formula, exposure="flipper_length_mm"),
                                       indicator_for_continuous=True)
    gone = data["bill_depth_mm"].isna().astype(float)
    by_hand = data.assign(depth_zero=data["bill_depth_mm"].fillna(0.0), depth_gone=gone)
    reference = smf.ols("body_mass_g ~ flipper_length_mm + depth_zero + depth_gone + C(species)",
                        data=by_hand).fit()
    ours = _by_term(result)
    assert ours["flipper_length_mm"] == pytest.approx(reference.params["flipper_length_mm"], rel=TOL)
    assert ours["bill_depth_mm"] == pytest.approx(reference.params["depth_zero"], rel=TOL)
    assert ours["C(species)[T.Gentoo]"] == pytest.approx(reference.params["C(species)[T.Gentoo]"], rel=TOL)
    # The indicator's coefficient shifts by slope x (mean - 0): a different constant, the same fit.
    mean = data["bill_depth_mm"].mean()
    assert ours["bill_depth_mm_missing"] == pytest.approx(
        reference.params["depth_gone"] - reference.params["depth_zero"] * mean, rel=1e-7)
    assert result.model_fit.nobs == len(data)


def test_numeric_binary_covariate_missing_equals_three_level_category():
    # Invariance: a 0/1 covariate with a missing-value indicator (reference value filled) is the same model
    # as a three-level categorical (0, 1, missing) fitted by hand with statsmodels.
    rng = np.random.default_rng(5)
    n = 300
    smoker = (rng.random(n) < 0.4).astype(float)
    x = rng.normal(size=n)
    y = 1 + 0.5 * x + 0.8 * smoker + rng.normal(size=n)
    seen = np.where(rng.random(n) < 0.2, np.nan, smoker)
    data = pd.DataFrame({"y": y, "x": x, "smoker": seen})
    result = missing_category_analysis(data, model=AnalysisModel("y ~ x + smoker", exposure="x"), types={"smoker": "binary"})
    by_hand = data.assign(smoker_level=data["smoker"].map({0.0: "a_no", 1.0: "b_yes"}).fillna("c_missing"))
    reference = smf.ols("y ~ x + smoker_level", data=by_hand).fit()
    ours = _by_term(result)
    assert ours["x"] == pytest.approx(reference.params["x"], rel=TOL)
    assert ours["smoker"] == pytest.approx(reference.params["smoker_level[T.b_yes]"], rel=TOL)
    assert ours["smoker_missing"] == pytest.approx(reference.params["smoker_level[T.c_missing]"], rel=TOL)


def test_demo_missing_clinic_keeps_statsmodels_term_names_and_drops_missing_outcomes(demo):
    params, study = demo
    data = study.data.copy()
    rng = np.random.default_rng(7)
    lost_clinic = rng.random(len(data)) < 0.1
    data.loc[lost_clinic, "clinic"] = np.nan
    result = missing_category_analysis(data, model=analysis_model(params), types=study.types,
                                       indicator_for_continuous=True)
    terms = set(result.estimates()["term"])
    assert f"C(clinic)[T.{MISSING_LEVEL}]" in terms
    assert {"hba1c_0_missing", "bmi_missing", "age_missing"} <= terms
    assert result.exposure_terms == ("arm[T.sms]",)
    # Every row with an observed outcome is kept; rows without one are dropped and counted (pandas count).
    observed_outcome = int(data["hba1c_12m"].notna().sum())
    assert result.model_fit.nobs == observed_outcome
    assert result.n_outcome_missing() == len(data) - observed_outcome
    steps = result.flow.steps.set_index("variable")
    assert steps.loc["hba1c_12m", "n_excluded"] == len(data) - observed_outcome
    assert (result.estimates()["n_used"] == observed_outcome).all()
    # The reference level of clinic is unchanged (C1), so the observed-level terms keep their meaning.
    assert "C(clinic)[T.C1]" not in terms and "C(clinic)[T.C2]" in terms


def test_continuous_covariates_dropped_without_indicator(demo):
    params, study = demo
    model = analysis_model(params)
    without = missing_category_analysis(study.data, model=model, types=study.types, missing=study.missing)
    complete = complete_case_analysis(study.data, model=model)
    # No categorical covariate of the demo model has missing values: without indicators the strategy
    # is the complete-case fit.
    assert np.allclose(without.model_fit.coefficients, complete.model_fit.coefficients, rtol=1e-12)
    handling = without.prepared.handling.set_index("variable")
    assert handling.loc["bmi", "handling"].startswith("rows dropped")


def test_not_applicable_cells_are_not_given_a_category(demo):
    _, study = demo
    model = AnalysisModel("hba1c_12m ~ arm + insulin_dose + C(alcohol)", exposure="arm")
    result = missing_category_analysis(study.data, model=model, types=study.types, missing=study.missing,
                                       reasons=study.reasons, not_applicable=study.not_applicable,
                                       indicator_for_continuous=True)
    prepared = result.prepared.data
    na = study.not_applicable["insulin_dose"].to_numpy()
    assert prepared.loc[na, "insulin_dose"].isna().all()
    indicator = result.prepared.aliases.alias("insulin_dose_missing")  # the column goes by an internal alias
    assert prepared.loc[na, indicator].eq(0).all()
    assert "insulin_dose_missing" in result.model_fit.terms  # and is named as before in the table
    # Rows kept: outcome observed and insulin dose applicable (pandas count).
    kept = int((study.data["hba1c_12m"].notna() & ~study.not_applicable["insulin_dose"]).sum())
    assert result.model_fit.nobs == kept
    assert result.flow.steps.set_index("variable").loc["insulin_dose", "n_not_applicable"] > 0


def test_label_that_is_already_a_level_is_an_input_error():
    data = pd.DataFrame({"y": [1.0, 2, 3, 4], "x": [0.0, 1, 0, 1],
                         "g": pd.Categorical(["a", MISSING_LEVEL, None, "a"])})
    with pytest.raises(InputError, match="column 'g' already has a level"):
        prepare_missing_category(data, model=AnalysisModel("y ~ x + g", exposure="x"))


def test_missing_exposure_is_never_given_a_category():
    data = pd.DataFrame({"y": [1.0, 2, 3, 4, 5, 6], "g": pd.Categorical(["a", "b", None, "a", "b", "a"]),
                         "x": [0.3, 0.1, 0.5, 0.9, 0.2, 0.4]})
    result = missing_category_analysis(data, model=AnalysisModel("y ~ g + x", exposure="g"))
    assert result.model_fit.nobs == 5
    assert not any(MISSING_LEVEL in t for t in result.estimates()["term"])


def test_outcome_without_observed_values_is_an_input_error(penguins):
    with pytest.raises(InputError, match="outcome 'body_mass_g' has no observed values"):
        missing_category_analysis(penguins.assign(body_mass_g=np.nan), model=AnalysisModel("body_mass_g ~ sex"))


# --- published bias results for the missing-indicator method ----------------------------------------------

def _indicator_and_complete_slopes(randomised: bool, replicates: int = 150, n: int = 500, seed: int = 20100728):
    """Slope of x in y = x + c + e with c missing completely at random (40 %), by indicator and complete cases."""
    rng = np.random.default_rng(seed)
    model = AnalysisModel("y ~ x + c", exposure="x")
    indicator, complete = np.empty(replicates), np.empty(replicates)
    for r in range(replicates):
        c = rng.normal(size=n)
        x = (rng.random(n) < 0.5).astype(float) if randomised else 0.6 * c + 0.8 * rng.normal(size=n)
        y = x + c + rng.normal(size=n)
        data = pd.DataFrame({"y": y, "x": x, "c": np.where(rng.random(n) < 0.4, np.nan, c)})
        indicator[r] = missing_category_analysis(data, model=model, indicator_for_continuous=True).model_fit.coefficients[1]
        complete[r] = complete_case_analysis(data, model=model).model_fit.coefficients[1]
    return indicator, complete


@pytest.mark.slow
def test_missing_indicator_biased_for_confounder_under_mcar():
    # Source: Knol et al. (2010) J Clin Epidemiol 63:728 and Groenwold et al. (2012) CMAJ 184:1265: with a
    # confounder missing completely at random, the indicator method is biased; complete cases are not.
    indicator, complete = _indicator_and_complete_slopes(randomised=False)
    mcse_ind = indicator.std(ddof=1) / np.sqrt(len(indicator))
    mcse_cc = complete.std(ddof=1) / np.sqrt(len(complete))
    assert indicator.mean() - 1.0 > 10 * mcse_ind and indicator.mean() - 1.0 > 0.1
    assert abs(complete.mean() - 1.0) < 4 * mcse_cc


@pytest.mark.slow
def test_missing_indicator_unbiased_for_baseline_covariate_in_randomised_trial():
    # Source: White & Thompson (2005) Stat Med 24:993: with a randomised exposure, the indicator method
    # for a partially missing baseline covariate leaves the treatment effect unbiased.
    indicator, _ = _indicator_and_complete_slopes(randomised=True)
    mcse = indicator.std(ddof=1) / np.sqrt(len(indicator))
    assert abs(indicator.mean() - 1.0) < 4 * mcse


def test_formulas_gapbook_builds_never_contain_column_names_from_the_data():
    # issue 9 §1: a header is never pasted into formula text; terms still read as a user's formula would
    rng = np.random.default_rng(11)
    n = 80
    data = pd.DataFrame({"y": rng.normal(size=n), "arm": rng.integers(0, 2, n).astype(float),
                         "dose mg.day": rng.normal(10, 2, n)})
    data.loc[rng.choice(n, 12, replace=False), "dose mg.day"] = np.nan
    model = AnalysisModel('y ~ arm + Q("dose mg.day")', exposure="arm")
    result = missing_category_analysis(data, model=model, indicator_for_continuous=True)
    assert "dose mg.day_missing" not in result.prepared.formula
    assert result.prepared.formula.endswith("+ gapbook_indicator_0")
    assert 'Q("dose mg.day_missing")' in result.model_fit.terms and 'Q("dose mg.day")' in result.model_fit.terms
    # the same fit by hand with statsmodels (the reference) on a plainly named copy
    import statsmodels.formula.api as smf

    plain = data.rename(columns={"dose mg.day": "dose"})
    plain["dose_missing"] = plain["dose"].isna().astype(float)
    plain["dose"] = plain["dose"].fillna(plain["dose"].mean())
    reference = smf.ols("y ~ arm + dose + dose_missing", plain).fit()
    np.testing.assert_allclose(result.model_fit.coefficients, reference.params.to_numpy(), rtol=1e-10)
