"""Tests of the shared analysis-model fit: input checks a user can trip over."""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from gapbook.errors import InputError
from gapbook.models import fit_model


def test_an_offset_column_with_values_at_or_below_zero_is_an_input_error():
    # The offset column holds person-time and the model uses its log (McCullagh & Nelder 1989, sec. 6.2);
    # a column of log person-time (negative for under a year) would otherwise turn rows into NaN silently.
    rng = np.random.default_rng(4)
    years = rng.uniform(0.5, 3.0, 200)
    frame = pd.DataFrame({"events": rng.poisson(years).astype(float), "x": rng.normal(0, 1, 200),
                          "years": years, "log_years": np.log(years)})
    fit = fit_model(frame, formula="events ~ x", family="poisson", offset="years")
    assert fit.nobs == 200
    with pytest.raises(InputError, match=r"^offset: 'log_years' has values <= 0"):
        fit_model(frame, formula="events ~ x", family="poisson", offset="log_years")


@pytest.mark.parametrize("formula", ["y ~ x + (arm", "y ~ x +", "y ~ x ** "])
def test_a_formula_that_does_not_parse_is_an_input_error_naming_the_option(formula):
    # Formula grammar of patsy (the library statsmodels formulas use): these do not parse there either.
    import patsy
    with pytest.raises(patsy.PatsyError):
        patsy.ModelDesc.from_formula(formula)
    from gapbook.models import check_formula
    with pytest.raises(InputError, match=r"^formula: .* is not a valid formula"):
        check_formula(formula, ["y", "x", "arm"])


# ---------------------------------------------------------------------------
# term names as statsmodels gives them on the raw file, columns the data cannot estimate, convergence

def _coded_study(tmp_path, *, stage_missing: bool = False):
    """A small file with integer-coded categories (stage 1-3, grade 0-2), an incomplete age, a 0/1 outcome."""
    rng = np.random.default_rng(3)
    n = 300
    frame = pd.DataFrame({"id": range(n), "stage": rng.integers(1, 4, n), "grade": rng.integers(0, 3, n),
                          "age": rng.normal(60, 8, n).round(1)})
    frame["y"] = (rng.random(n) < 1 / (1 + np.exp(-(frame["stage"] - 2) * 0.5))).astype(int)
    frame.loc[rng.random(n) < 0.1, "age"] = np.nan
    if stage_missing:  # stage is missing only where age is: among rows with age, "(missing)" never occurs
        frame["stage"] = frame["stage"].astype(object).where(frame["age"].notna() | (rng.random(n) < 0.5), "NA")
    path = tmp_path / "coded.csv"
    frame.to_csv(path, index=False)
    return path


@pytest.mark.parametrize("declared", [{}, {"stage": {"type": "nominal"}, "grade": {"type": "ordinal"}}])
def test_integer_coded_categories_keep_their_values_as_written(tmp_path, declared):
    # Source: statsmodels GLM (binomial) with the same formula on the raw file read by pandas.read_csv,
    # where stage and grade are int64 and C() names their levels 2 and 3, not 2.0 and 3.0.
    import statsmodels.api as sm
    import statsmodels.formula.api as smf

    from gapbook.cases import complete_case_analysis
    from gapbook.intake import load_study
    from gapbook.models import AnalysisModel
    from gapbook.params import Params

    path = _coded_study(tmp_path)
    study = load_study(Params.from_dict({"data": {"path": str(path), "id": "id"}, "variables": declared}))
    formula = "y ~ C(stage) + C(grade) + age"
    ours = complete_case_analysis(study.data, model=AnalysisModel(formula, "binomial")).estimates()
    raw = pd.read_csv(path)
    reference = smf.glm(formula, data=raw, family=sm.families.Binomial()).fit()
    assert "C(stage)[T.2]" in reference.params.index
    assert list(ours["term"]) == list(reference.params.index)
    joined = ours.set_index("term").join(reference.params.rename("statsmodels"), how="inner")
    assert len(joined) == len(reference.params)
    assert np.allclose(joined["estimate"], joined["statsmodels"], rtol=1e-8, atol=1e-10)


def test_integer_coded_categories_in_imputed_and_missing_category_data_keep_their_names(tmp_path):
    from gapbook.indicator import missing_category_analysis
    from gapbook.intake import load_study
    from gapbook.models import AnalysisModel
    from gapbook.params import Params

    path = _coded_study(tmp_path, stage_missing=True)
    study = load_study(Params.from_dict({"data": {"path": str(path), "id": "id", },
                                         "missing": {"markers": ["NA", ""]},
                                         "variables": {"stage": {"type": "nominal"}}}))
    result = missing_category_analysis(study.data, model=AnalysisModel("y ~ age + C(stage)", "binomial"),
                                       types=study.types, missing=study.missing)
    terms = list(result.estimates()["term"])
    assert "C(stage)[T.2]" in terms and "C(stage)[T.3]" in terms
    assert not any(".0]" in t for t in terms)


def test_a_missing_category_that_no_analysed_row_has_is_left_out_and_named(tmp_path):
    # Stage is missing only in rows that lack the exposure (age), which every strategy drops: among
    # the analysed rows the "(missing)" indicator is all zeros. Source for the other terms: statsmodels
    # on the same rows without that column (dropping an all-zero column leaves the fit unchanged).
    import statsmodels.api as sm
    import statsmodels.formula.api as smf

    from gapbook.indicator import missing_category_analysis
    from gapbook.intake import load_study
    from gapbook.models import AnalysisModel
    from gapbook.params import Params

    rng = np.random.default_rng(8)
    n = 300
    frame = pd.DataFrame({"id": range(n), "stage": rng.choice(["I", "II", "III"], n), "age": rng.normal(60, 8, n)})
    frame["y"] = (rng.random(n) < 0.4).astype(int)
    gone = rng.random(n) < 0.1
    frame.loc[gone, "age"] = np.nan
    frame.loc[gone & (rng.random(n) < 0.6), "stage"] = np.nan
    path = tmp_path / "stage.csv"
    frame.to_csv(path, index=False)
    study = load_study(Params.from_dict({"data": {"path": str(path), "id": "id"},
                                         "variables": {"stage": {"type": "nominal"}}}))
    result = missing_category_analysis(study.data, model=AnalysisModel("y ~ age + C(stage)", "binomial"),
                                       types=study.types, missing=study.missing)
    table = result.estimates()
    assert "C(stage)[T.(missing)]" not in set(table["term"])
    assert (table["std_error"] > 0).all()
    assert result.model_fit.dropped_terms() == ("C(stage)[T.(missing)]",)
    said = " ".join(result.sentences)
    assert "C(stage)[T.(missing)]" in said and f"constant among the {int((~gone).sum()):,} analysed rows" in said
    kept = frame[~gone]
    reference = smf.glm("y ~ age + C(stage)", data=kept, family=sm.families.Binomial()).fit()
    assert np.allclose(table.set_index("term").loc[list(reference.params.index), "estimate"], reference.params,
                       rtol=1e-8)


def test_an_aliased_column_is_left_out_not_reported_as_zero():
    # x3 = x1 + x2 exactly: the design has rank 3 of 4. Source: statsmodels OLS of y ~ x1 + x2.
    import statsmodels.formula.api as smf

    rng = np.random.default_rng(2)
    frame = pd.DataFrame({"x1": rng.normal(size=80), "x2": rng.normal(size=80)})
    frame["x3"] = frame["x1"] + frame["x2"]
    frame["y"] = 1 + frame["x1"] - frame["x2"] + rng.normal(size=80)
    fit = fit_model(frame, formula="y ~ x1 + x2 + x3")
    assert fit.terms == ("Intercept", "x1", "x2")
    assert fit.dropped == (("x3", "aliased: a linear combination of the terms before it"),)
    reference = smf.ols("y ~ x1 + x2", data=frame).fit()
    assert np.allclose(fit.coefficients, reference.params, rtol=1e-10)
    assert np.allclose(fit.std_errors(), reference.bse, rtol=1e-10)
    assert fit.df_resid == reference.df_resid == fit.complete_data_df() == 77


def test_a_fit_that_does_not_converge_says_so():
    # Complete separation (y = 1 exactly when x > 0): the maximum-likelihood estimate does not exist
    # (Albert & Anderson 1984, Biometrika 71:1-10), so the fit cannot converge to it.
    rng = np.random.default_rng(1)
    x = rng.normal(size=60)
    frame = pd.DataFrame({"x": x, "z": rng.normal(size=60), "y": (x > 0).astype(float)})
    fit = fit_model(frame, formula="y ~ x + z", family="binomial")
    assert fit.converged is False
    assert any("PerfectSeparation" in w for w in fit.warnings)
    assert not fit.estimates("complete_case")["converged"].any()
    # the page names the separating column and says why, as for a Cox model's monotone likelihood
    assert fit.unbounded[0][0] == "x" and "(completely separated)" in fit.unbounded[0][1]
    assert any("complete or quasi-complete separation" in s and "x: every row with the outcome" in s
               for s in fit.fit_sentences())
    fine = fit_model(frame.assign(y=(x + rng.normal(scale=2, size=60) > 0).astype(float)), formula="y ~ x + z",
                     family="binomial")
    assert fine.converged is True and fine.estimates("complete_case")["converged"].all()
    assert fine.fit_sentences() == ()


def test_ratio_columns_are_the_exponentiated_log_scale_and_empty_for_gaussian(penguins):
    # exp of the coefficient and of each interval end (the log scale stays, so it joins with statsmodels)
    data = penguins.dropna(subset=["sex", "body_mass_g"]).assign(male=lambda d: (d["sex"] == "male").astype(float))
    binary = fit_model(data, formula="male ~ body_mass_g", family="binomial").estimates("complete_case")
    assert list(binary.columns[-4:]) == ["exp_estimate", "exp_ci_lower", "exp_ci_upper", "converged"]
    assert np.allclose(binary["exp_estimate"], np.exp(binary["estimate"]), rtol=1e-12)
    assert np.allclose(binary["exp_ci_lower"], np.exp(binary["ci_lower"]), rtol=1e-12)
    assert np.allclose(binary["exp_ci_upper"], np.exp(binary["ci_upper"]), rtol=1e-12)
    linear = fit_model(data, formula="body_mass_g ~ male").estimates("complete_case")
    assert linear[["exp_estimate", "exp_ci_lower", "exp_ci_upper"]].isna().all().all()


def test_the_sensitivity_evaluator_fits_the_model_with_its_robust_and_offset_settings():
    # The delta = 0 evaluation is the MAR imputation analysed with the study's own model: a poisson rate
    # model with offset log(years) and sandwich errors (White 1980). Dropping either setting changes the
    # numbers, which the second half checks, so this test fails if the evaluator loses one.
    from gapbook import sensitivity
    from gapbook.impute import impute_chained
    from gapbook.models import AnalysisModel

    rng = np.random.default_rng(12)
    n = 300
    years = rng.uniform(0.5, 4.0, n)
    x = rng.normal(size=n)
    frame = pd.DataFrame({"events": rng.poisson(years * np.exp(0.3 * x)).astype(float), "x": x, "years": years})
    frame.loc[rng.random(n) < 0.25, "x"] = np.nan
    options = dict(m=3, iterations=3, seed=5, types={"events": "count", "x": "continuous", "years": "continuous"},
                   progress=False)
    model = AnalysisModel("events ~ x", "poisson", exposure="x", robust=True, offset="years")
    evaluate = sensitivity.imputation_evaluator(frame, model=model, impute_options=options)
    series = sensitivity.DeltaSeries("x", sensitivity.ALL_GROUPS, None, (0.0,))
    evaluated = evaluate(series, 0.0).drop(columns=list(sensitivity.MONTE_CARLO_COLUMNS)).reset_index(drop=True)
    imputed = impute_chained(frame, **options)
    pd.testing.assert_frame_equal(evaluated, imputed.analyse(model).estimates().reset_index(drop=True))
    for other in (AnalysisModel("events ~ x", "poisson", exposure="x", robust=False, offset="years"),
                  AnalysisModel("events ~ x", "poisson", exposure="x", robust=True)):
        assert not np.allclose(imputed.analyse(other).estimates()["std_error"], evaluated["std_error"])
