"""Tests of the mechanism stage against published formulas, scipy, statsmodels and palmerpenguins."""
from __future__ import annotations

import re

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from scipy import optimize, stats
from statsmodels.stats.multitest import multipletests

from gapbook import little
from gapbook import mechanism as mech
from gapbook.inference import format_p
from gapbook.vocabulary import MAR_CAUTION
from gapbook.demo import demo_params
from gapbook.errors import InputError
from gapbook.intake import load_study


# ---------------------------------------------------------------------------
# fixtures

@pytest.fixture(scope="module")
def typed_penguins(penguins) -> pd.DataFrame:
    """The shared penguins with categories as Categoricals, year as a number and a small 0/1 group."""
    frame = penguins.copy()
    frame["species"] = pd.Categorical(frame["species"])
    frame["island"] = pd.Categorical(frame["island"])
    frame["sex"] = pd.Categorical(frame["sex"], categories=["female", "male"])
    frame["year"] = frame["year"].astype(float)
    # A binary 0/1 column with a small group, so that a 2x2 table with small expected counts arises.
    frame["torgersen"] = (frame["island"] == "Torgersen").astype(float)
    return frame


PENGUIN_TYPES = {"species": "nominal", "island": "nominal", "bill_length_mm": "continuous",
                 "bill_depth_mm": "continuous", "flipper_length_mm": "continuous", "body_mass_g": "continuous",
                 "sex": "binary", "year": "count", "torgersen": "binary"}


@pytest.fixture(scope="module")
def demo():
    params = demo_params()
    study = load_study(params)
    return study, mech.assess_study(study, variables=params.mechanism.variables, alpha=params.mechanism.alpha,
                                        min_missing=params.mechanism.min_missing)


def monotone_bivariate(seed: int, n: int = 400, r: int = 260) -> pd.DataFrame:
    """y1 fully observed; y2 observed in the first r rows only (a monotone pattern)."""
    rng = np.random.default_rng(seed)
    values = rng.multivariate_normal([10.0, -3.0], [[4.0, 1.8], [1.8, 2.5]], size=n)
    values[r:, 1] = np.nan
    return pd.DataFrame(values, columns=["y1", "y2"])


def anderson_estimates(frame: pd.DataFrame):
    """Closed-form ML for the bivariate monotone normal (Anderson 1957, JASA 52:200-203;
    Little & Rubin, Statistical Analysis with Missing Data, ch. 7, factored likelihood;
    formulas recalled from memory)."""
    y1, y2 = frame["y1"].to_numpy(), frame["y2"].to_numpy()
    complete = ~np.isnan(y2)
    mu1, s11 = y1.mean(), y1.var()              # all n rows, divisor n
    a, b = y1[complete], y2[complete]
    s11_r, s22_r = a.var(), b.var()             # complete rows, divisor r
    s12_r = np.mean((a - a.mean()) * (b - b.mean()))
    beta = s12_r / s11_r
    mu2 = b.mean() + beta * (mu1 - a.mean())
    s22 = s22_r + beta ** 2 * (s11 - s11_r)
    s12 = beta * s11
    return np.array([mu1, mu2]), np.array([[s11, s12], [s12, s22]])


# ---------------------------------------------------------------------------
# EM

@pytest.mark.parametrize("seed", [1, 2])
def test_em_equals_closed_form_for_monotone_bivariate_normal(seed):
    frame = monotone_bivariate(seed)
    mean, covariance = anderson_estimates(frame)
    em = little.em_multivariate_normal(frame, tolerance=1e-12, max_iterations=5000)
    assert em.converged
    # Anderson (1957) / Little & Rubin ch. 7: EM must reach the closed-form ML estimates.
    np.testing.assert_allclose(em.mean.to_numpy(), mean, atol=1e-6, rtol=0)
    np.testing.assert_allclose(em.covariance.to_numpy(), covariance, atol=1e-6, rtol=0)


def test_em_with_no_missing_values_gives_sample_moments(typed_penguins):
    frame = typed_penguins[["bill_length_mm", "bill_depth_mm", "flipper_length_mm", "body_mass_g"]].dropna()
    em = little.em_multivariate_normal(frame)
    # Complete data: the ML estimates are the sample mean and the covariance with divisor n (numpy).
    np.testing.assert_allclose(em.mean.to_numpy(), frame.mean().to_numpy(), rtol=1e-10)
    np.testing.assert_allclose(em.covariance.to_numpy(), np.cov(frame.to_numpy().T, bias=True), rtol=1e-8)


def _general_pattern_data(seed: int = 7, n: int = 150) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    values = rng.multivariate_normal([1.0, 2.0, 3.0], [[1.0, 0.6, 0.3], [0.6, 2.0, 0.5], [0.3, 0.5, 1.5]], size=n)
    values[rng.random(values.shape) < 0.2] = np.nan
    return pd.DataFrame(values, columns=["a", "b", "c"])


def _observed_loglik(frame: pd.DataFrame, mean: np.ndarray, covariance: np.ndarray) -> float:
    """Observed-data log-likelihood summed row by row with scipy's multivariate normal density."""
    total = 0.0
    for row in frame.to_numpy():
        o = ~np.isnan(row)
        if o.any():
            total += stats.multivariate_normal(mean[o], covariance[np.ix_(o, o)]).logpdf(row[o])
    return total


def test_em_log_likelihood_never_decreases_and_matches_scipy():
    frame = _general_pattern_data()
    em = little.em_multivariate_normal(frame, tolerance=1e-10)
    path = np.array(em.loglik)
    # Dempster, Laird & Rubin (1977, JRSS B 39:1), theorem 1: EM never lowers the likelihood.
    assert np.all(np.diff(path) >= -1e-9)
    # Our pattern-wise log-likelihood equals scipy.stats.multivariate_normal summed over rows.
    reference = _observed_loglik(frame, em.mean.to_numpy(), em.covariance.to_numpy())
    assert path[-1] == pytest.approx(reference, abs=1e-7)


def test_em_estimate_is_a_maximum_of_the_observed_likelihood():
    frame = _general_pattern_data(seed=11, n=120)
    em = little.em_multivariate_normal(frame, tolerance=1e-11)
    mean, covariance = em.mean.to_numpy(), em.covariance.to_numpy()
    chol = np.linalg.cholesky(covariance)
    rows = np.tril_indices(3)

    def negative(theta):
        lower = np.zeros((3, 3))
        lower[rows] = theta[3:]
        return -_observed_loglik(frame, theta[:3], lower @ lower.T)

    start = np.r_[mean, chol[rows]]
    # scipy.optimize started at our estimate finds no higher likelihood (a general-purpose optimiser).
    found = optimize.minimize(negative, start, method="BFGS", options={"gtol": 1e-6, "maxiter": 50})
    assert -found.fun <= -negative(start) + 1e-6


# ---------------------------------------------------------------------------
# Little's test

def test_little_statistic_equals_formula_with_closed_form_estimates():
    frame = monotone_bivariate(3)
    mean, covariance = anderson_estimates(frame)
    complete = frame.dropna().to_numpy()
    partial = frame.loc[frame["y2"].isna(), "y1"].to_numpy()
    d = complete.mean(axis=0) - mean
    # Little (1988, JASA 83:1198), eq. for d^2 with ML estimates: sum over patterns of
    # n_j (ybar_j - mu_j)' Sigma_j^-1 (ybar_j - mu_j); df = sum p_j - p = 2 + 1 - 2.
    expected = len(complete) * d @ np.linalg.solve(covariance, d) + len(partial) * (
        partial.mean() - mean[0]) ** 2 / covariance[0, 0]
    test = little.little_mcar_test(frame, tolerance=1e-12, max_iterations=5000)
    assert test.df == 1
    assert test.n_patterns == 2
    assert test.statistic == pytest.approx(expected, rel=1e-6)
    assert test.p_value == pytest.approx(stats.chi2.sf(expected, 1), rel=1e-5)


@pytest.mark.slow
def test_little_p_values_are_uniform_under_mcar():
    rng = np.random.default_rng(19880101)
    covariance = np.array([[1, .5, .3, .2], [.5, 1, .4, .1], [.3, .4, 1, .3], [.2, .1, .3, 1]])
    p_values = []
    for _ in range(200):
        values = rng.multivariate_normal(np.zeros(4), covariance, size=200)
        values[rng.random(values.shape) < 0.15] = np.nan       # MCAR: 15 % of cells, independently
        p_values.append(little.little_mcar_test(pd.DataFrame(values, columns=list("abcd"))).p_value)
    # Little (1988): under MCAR (and normality) d^2 is asymptotically chi-square, so p ~ U(0, 1);
    # checked by scipy's Kolmogorov-Smirnov test. A wrong df or a non-ML covariance fails this.
    assert stats.kstest(p_values, "uniform").pvalue > 0.01


@pytest.mark.slow
def test_little_rejects_under_mar():
    # Design: 4 correlated normals, n = 200; b is missing with probability logistic(-1 + a)
    # (MAR on the fully observed a), c is 10 % MCAR. Power found with this seed: 0.985 at
    # alpha 0.05 over 200 datasets; we require at least 0.9.
    rng = np.random.default_rng(19880202)
    covariance = np.array([[1, .5, .3, .2], [.5, 1, .4, .1], [.3, .4, 1, .3], [.2, .1, .3, 1]])
    rejected = 0
    for _ in range(200):
        values = rng.multivariate_normal(np.zeros(4), covariance, size=200)
        values[rng.random(200) < 1 / (1 + np.exp(1.0 - values[:, 0])), 1] = np.nan
        values[rng.random(200) < 0.1, 2] = np.nan
        rejected += little.little_mcar_test(pd.DataFrame(values, columns=list("abcd"))).p_value < 0.05
    assert rejected / 200 >= 0.9


def test_little_with_one_pattern_is_zero_with_zero_df(typed_penguins):
    frame = typed_penguins[["bill_length_mm", "bill_depth_mm", "body_mass_g"]].dropna()
    test = little.little_mcar_test(frame)
    assert test.statistic == 0.0 and test.df == 0 and test.n_patterns == 1
    assert np.isnan(test.p_value)
    assert any("one missingness pattern" in note for note in test.notes)
    assert "no p-value" in mech.mcar_sentence(test)


def test_little_skips_rows_with_everything_missing():
    frame = _general_pattern_data(seed=5)
    padded = pd.concat([frame, pd.DataFrame(np.nan, index=range(500, 520), columns=frame.columns)])
    # Rows with nothing observed add nothing to the likelihood (Little 1988): same result.
    plain, padded_test = little.little_mcar_test(frame), little.little_mcar_test(padded)
    assert padded_test.n_rows_skipped == 20 + plain.n_rows_skipped
    assert padded_test.statistic == pytest.approx(plain.statistic, rel=1e-10)
    assert padded_test.df == plain.df


def test_little_singular_covariance_is_explained_not_raised():
    frame = _general_pattern_data(seed=9)
    frame["total"] = frame["a"] + frame["b"]                  # exact linear dependence
    test = little.little_mcar_test(frame)
    assert np.isnan(test.statistic) and np.isnan(test.p_value)
    note = " ".join(test.notes)
    assert "singular" in note and "total" in note and "mechanism.variables" in note
    assert test.as_row().shape[0] == 1


def test_mcar_variables_binary_codes_and_not_applicable(demo):
    study, result = demo
    frame, notes = mech.mcar_test_data(study.data, types=study.types, not_applicable=study.not_applicable)
    # Binary text enters as 0/1 with the second declared level as 1 (arm: control, sms).
    assert set(frame["arm"].unique()) == {0.0, 1.0}
    assert (frame["arm"] == 1).sum() == (study.data["arm"] == "sms").sum()
    assert "clinic" not in frame.columns and "insulin_dose" not in frame.columns
    assert any("insulin_dose" in note for note in notes)
    with pytest.raises(InputError, match="^variables: 'hba1c_O'.*did you mean 'hba1c_0'"):
        mech.mcar_test_data(study.data, types=study.types, not_applicable=study.not_applicable, variables=["hba1c_O"])
    with pytest.raises(InputError, match="'clinic' is nominal"):
        mech.mcar_test_data(study.data, types=study.types, not_applicable=study.not_applicable,
                            variables=["clinic", "age"])
    chosen, notes = mech.mcar_test_data(study.data, types=study.types, not_applicable=study.not_applicable,
                                         variables=["insulin_dose", "age"])
    assert len(chosen) == int((~study.not_applicable["insulin_dose"]).sum())


def test_little_says_which_variables_it_left_out_and_why(demo, typed_penguins):
    study, result = demo
    row = result.mcar.as_row().iloc[0]
    # The demo declares clinic and alcohol nominal, education ordinal; insulin_dose applies to some rows only.
    assert row["variables_left_out"].split(",") == ["clinic", "education", "alcohol", "insulin_dose"]
    assert set(row["variables"].split(",")).isdisjoint(row["variables_left_out"].split(","))
    assert "clinic (nominal), education (ordinal) and alcohol (nominal) were left out" in row["note"]
    assert "multivariate normal" in row["note"] and "insulin_dose was left out" in row["note"]
    assert "Not in the test: clinic, education, alcohol, insulin_dose" in result.mcar.sentences[0]
    # Penguins: species and island are nominal and never enter, even when complete.
    penguin = mech.assess_mechanism(typed_penguins, types=PENGUIN_TYPES)
    assert penguin.mcar.left_out == ("species", "island")
    assert penguin.mcar.notes[0].startswith("species (nominal) and island (nominal) were left out")
    # Variables chosen by hand: those not chosen are listed, with no category note.
    chosen = mech.assess_mechanism(typed_penguins, types=PENGUIN_TYPES, variables=["bill_length_mm", "sex"])
    assert chosen.mcar.as_row().iloc[0]["variables_left_out"] == (
        "species,island,bill_depth_mm,flipper_length_mm,body_mass_g,year,torgersen")
    assert "variables chosen in mechanism.variables" in chosen.mcar.notes[0]


# ---------------------------------------------------------------------------
# group comparisons

def test_group_tests_equal_scipy(typed_penguins):
    frame = typed_penguins.drop(columns=["species"])
    # sex is missing in 11 rows, 9 of which have the measurements: test from 2 rows up.
    groups = mech.compare_groups(frame, types=PENGUIN_TYPES, min_missing=2)
    table = groups.comparisons.set_index(["incomplete_variable", "compared_variable"])
    sex_missing = frame["sex"].isna()

    # Welch t-test: scipy.stats.ttest_ind(equal_var=False).
    bill = frame["bill_length_mm"]
    x1, x0 = bill[sex_missing & bill.notna()], bill[~sex_missing & bill.notna()]
    welch = stats.ttest_ind(x1, x0, equal_var=False)
    row = table.loc[("sex", "bill_length_mm")]
    assert row["test"] == "Welch t-test"
    assert row["statistic"] == pytest.approx(welch.statistic, rel=1e-12)
    assert row["p_value"] == pytest.approx(welch.pvalue, rel=1e-12)
    assert (row["n_missing_group"], row["n_observed_group"]) == (len(x1), len(x0))
    # SMD over the pooled SD sqrt((s1^2 + s0^2)/2) (Austin 2009, Stat Med 28:3083).
    pooled = np.sqrt((x1.var(ddof=1) + x0.var(ddof=1)) / 2)
    assert row["smd"] == pytest.approx((x1.mean() - x0.mean()) / pooled, rel=1e-12)

    # Chi-square on a 2x3 table: scipy.stats.chi2_contingency (no continuity correction).
    crosstab = pd.crosstab(sex_missing, frame["island"]).reindex([True, False]).to_numpy()
    chi2 = stats.chi2_contingency(crosstab, correction=False)
    row = table.loc[("sex", "island")]
    assert row["test"] == "chi-square test"
    assert row["statistic"] == pytest.approx(chi2.statistic, rel=1e-12)
    assert row["p_value"] == pytest.approx(chi2.pvalue, rel=1e-12)
    assert row["df"] == chi2.dof

    # Small expected counts in a 2x2 table: scipy.stats.fisher_exact.
    crosstab = pd.crosstab(sex_missing, frame["torgersen"]).reindex([True, False]).to_numpy()
    assert stats.contingency.expected_freq(crosstab).min() < 5
    fisher = stats.fisher_exact(crosstab)
    row = table.loc[("sex", "torgersen")]
    assert row["test"] == "Fisher's exact test"
    assert row["p_value"] == pytest.approx(fisher.pvalue, rel=1e-12)

    # Holm adjustment over the whole table: statsmodels multipletests(method="holm").
    tested = groups.comparisons["p_value"].notna()
    holm = multipletests(groups.comparisons.loc[tested, "p_value"], method="holm")[1]
    np.testing.assert_allclose(groups.comparisons.loc[tested, "p_adjusted"], holm, rtol=1e-12)


def test_binary_smd_uses_the_proportions_formula(typed_penguins):
    groups = mech.compare_groups(typed_penguins.drop(columns=["species"]), types=PENGUIN_TYPES)
    row = groups.comparisons.set_index(["incomplete_variable", "compared_variable"]).loc[("sex", "torgersen")]
    missing = typed_penguins["sex"].isna()
    p1, p0 = typed_penguins.loc[missing, "torgersen"].mean(), typed_penguins.loc[~missing, "torgersen"].mean()
    # Austin (2009, Stat Med 28:3083), binary variables: (p1 - p0) / sqrt((p1(1-p1) + p0(1-p0)) / 2).
    assert row["smd"] == pytest.approx((p1 - p0) / np.sqrt((p1 * (1 - p1) + p0 * (1 - p0)) / 2), rel=1e-12)


def test_not_applicable_rows_are_in_neither_group(demo):
    study, result = demo
    table = result.groups.comparisons.set_index(["incomplete_variable", "compared_variable"])
    applies = int((~study.not_applicable["insulin_dose"]).sum())
    row = table.loc[("insulin_dose", "arm")]
    assert row["n_missing_group"] == int(study.missing["insulin_dose"].sum())
    assert row["n_missing_group"] + row["n_observed_group"] == applies
    # on_insulin is 'yes' in every row where the dose applies: nothing to compare.
    assert table.loc[("insulin_dose", "on_insulin"), "test"] == "not tested"


# ---------------------------------------------------------------------------
# missingness models

def test_missingness_model_equals_statsmodels_logit(typed_penguins):
    frame = typed_penguins.drop(columns=["species", "torgersen"])
    models = mech.missingness_models(frame, types=PENGUIN_TYPES, min_missing=5)
    fit = models.model_fit.set_index("incomplete_variable").loc["sex"]
    # Fully observed predictors: island and year (the measurements miss 2 rows).
    assert fit["predictors"] == "island,year"
    indicator = frame["sex"].isna().astype(float)
    design = sm.add_constant(pd.get_dummies(frame["island"], drop_first=True, dtype=float).join(frame["year"]))
    reference = sm.Logit(indicator, design).fit(disp=0)
    terms = models.terms[models.terms["incomplete_variable"] == "sex"]
    # statsmodels Logit on the same rows and design: same coefficients, SEs and Wald CIs.
    np.testing.assert_allclose(terms["coefficient"], reference.params.to_numpy(), rtol=1e-5)
    np.testing.assert_allclose(terms["std_error"], reference.bse.to_numpy(), rtol=1e-5)
    with np.errstate(over="ignore"):   # the intercept's odds at year 0 overflows; both sides give inf
        interval = np.exp(reference.conf_int(alpha=0.05).to_numpy())
    np.testing.assert_allclose(terms[["ci_lower", "ci_upper"]].to_numpy(), interval, rtol=1e-5)
    assert fit["lr_p_value"] == pytest.approx(reference.llr_pvalue, rel=1e-6)
    # AUC equals the Mann-Whitney U over n1 * n0 (Hanley & McNeil 1982, Radiology 143:29; scipy).
    score = reference.predict()
    positive = indicator.to_numpy() == 1
    u = stats.mannwhitneyu(score[positive], score[~positive]).statistic
    assert fit["auc"] == pytest.approx(u / (positive.sum() * (~positive).sum()), rel=1e-9)


def test_perfect_separation_is_reported_in_words(typed_penguins):
    # No Chinstrap penguin lacks sex (palmerpenguins): species separates the indicator.
    frame = typed_penguins[["species", "year", "sex"]]
    models = mech.missingness_models(frame, types=PENGUIN_TYPES, min_missing=5)
    fit = models.model_fit.set_index("incomplete_variable").loc["sex"]
    assert bool(fit["separation"])
    assert "perfect separation" in fit["note"] and "species[T.Chinstrap]" in fit["note"]
    assert models.terms["odds_ratio"].isna().all()
    assert any("perfect separation" in s for s in mech.model_sentences(models))


def test_too_few_missing_values_are_not_modelled(typed_penguins):
    models = mech.missingness_models(typed_penguins, types=PENGUIN_TYPES, min_missing=10)
    fits = models.model_fit.set_index("incomplete_variable")
    assert fits.loc["bill_length_mm", "note"].startswith("not modelled: 2 missing")
    assert np.isnan(fits.loc["bill_length_mm", "auc"])


def test_group_comparisons_obey_min_missing(typed_penguins):
    frame = typed_penguins.drop(columns=["species"])
    groups = mech.compare_groups(frame, types=PENGUIN_TYPES, min_missing=10)
    table = groups.comparisons.set_index(["incomplete_variable", "compared_variable"])
    # bill_length_mm is missing in 2 rows: no pair of it is tested, whatever the compared variable.
    bill = table.loc["bill_length_mm"]
    assert (bill["test"] == "not tested").all() and bill["p_value"].isna().all() and not bill["evidence"].any()
    assert bill.loc["island", "note"].startswith("too few to compare: 2 rows where bill_length_mm is missing")
    # sex: 9 missing rows have a bill length (too few at 10), 11 have an island (tested).
    assert table.loc[("sex", "bill_length_mm"), "note"].startswith("too few to compare: 9 rows")
    assert table.loc[("sex", "island"), "test"] == "chi-square test"
    # Holm counts only the tests that ran (statsmodels multipletests on those).
    tested = groups.comparisons["p_value"].notna()
    holm = multipletests(groups.comparisons.loc[tested, "p_value"], method="holm")[1]
    np.testing.assert_allclose(groups.comparisons.loc[tested, "p_adjusted"], holm, rtol=1e-12)
    assert any(s.startswith("Missingness of bill_length_mm was not compared with the other variables: too few to "
                            "compare (2 rows missing") for s in groups.sentences)


def test_a_difference_over_a_few_rows_is_not_called_evidence():
    # The 4 rows with the largest x lose y: Welch's test alone would call it evidence.
    rng = np.random.default_rng(8)
    x = rng.normal(size=300)
    y = rng.normal(size=300)
    y[np.argsort(x)[-4:]] = np.nan
    frame = pd.DataFrame({"x": x, "y": y})
    types = {"x": "continuous", "y": "continuous"}
    loose = mech.compare_groups(frame, types=types, min_missing=2)
    assert bool(loose.comparisons["evidence"].iloc[0])
    strict = mech.assess_mechanism(frame, types=types, min_missing=10)
    row = strict.groups.comparisons.iloc[0]
    assert row["test"] == "not tested" and not row["evidence"] and "too few to compare" in row["note"]
    assert not any("Evidence that missingness of y" in s for s in strict.sentences)
    assert any("too few to compare (4 rows missing; at least 10 needed" in s for s in strict.sentences)


# ---------------------------------------------------------------------------
# the demo study and the wording

FORBIDDEN = re.compile(r"\b(data|values|they) (are|is) (MCAR|MAR|missing completely at random|missing at random)",
                       re.IGNORECASE)


def test_demo_outcome_missingness_relates_to_baseline_hba1c(demo):
    study, result = demo
    row = result.groups.comparisons.set_index(["incomplete_variable", "compared_variable"]).loc[("hba1c_12m", "hba1c_0")]
    # By construction of the demo (gapbook.demo): logit P(dropout) = -2.3 + 0.55 (baseline HbA1c - 8).
    assert row["test"] == "Welch t-test"
    assert bool(row["evidence"]) and row["p_adjusted"] < 0.001
    assert row["smd"] > 0.3 and row["mean_missing_group"] > row["mean_observed_group"]
    assert result.mcar.p_value < 0.05
    assert any(s.startswith("Evidence that missingness of hba1c_12m depends on hba1c_0") for s in result.sentences)


def test_wording_never_claims_mcar_and_names_the_mar_mnar_limit(demo):
    _, result = demo
    text = " ".join(result.sentences)
    assert not FORBIDDEN.search(text)
    assert "MNAR" in text and "sensitivity analyses" in text and "qualified statistician" in text
    assert result.sentences[0].startswith("Little's test gives evidence against missing completely at random")


def test_wording_when_there_is_no_evidence():
    rng = np.random.default_rng(3)
    values = rng.normal(size=(300, 3))
    values[rng.random(values.shape) < 0.1] = np.nan
    frame = pd.DataFrame(values, columns=["a", "b", "c"])
    result = mech.assess_mechanism(frame, types={c: "continuous" for c in frame})
    first = result.sentences[0]
    assert result.mcar.p_value >= 0.05          # MCAR by construction; with this seed the test does not reject
    assert first.startswith("Little's test gives no evidence against MCAR (") and "p = " in first
    assert "not proof" in first
    assert not FORBIDDEN.search(" ".join(result.sentences))
    assert format_p(0.0004) == "p < 0.001" and format_p(0.0123) == "p = 0.012"


# ---------------------------------------------------------------------------
# edge cases and figures

def test_complete_data_runs_without_tests():
    rng = np.random.default_rng(4)
    frame = pd.DataFrame({"a": rng.normal(size=40), "g": pd.Categorical(rng.choice(["x", "y"], 40))})
    result = mech.assess_mechanism(frame, types={"a": "continuous", "g": "binary"})
    assert result.groups.comparisons.empty and result.models.model_fit.empty
    assert result.mcar.df == 0 and result.mcar.statistic == 0.0
    assert result.sentences[-2].startswith(MAR_CAUTION)


def test_figures_draw_from_result_objects(demo):
    import matplotlib.pyplot as plt
    from gapbook.plots import mechanism as plots

    _, result = demo
    overview = plots.relation_overview(result.groups)
    # One dot per relation with Holm-adjusted p < alpha.
    dots = sum(len(c.get_offsets()) for c in overview.axes[0].collections if hasattr(c, "get_offsets"))
    assert dots == int(result.groups.comparisons["evidence"].sum())
    strongest = plots.strongest_relations(result.groups, top=4)
    titles = [ax.get_title(loc="left") for ax in strongest.axes if ax.get_title(loc="left")]
    assert titles[0].startswith("hba1c_0 by whether hba1c_12m is missing")
    parts = plots.pattern_contributions(result.mcar)
    assert sum(p.get_width() for p in parts.axes[0].patches) == pytest.approx(
        result.mcar.patterns.sort_values("contribution").tail(15)["contribution"].sum())
    odds = plots.missingness_odds_ratios(result.models)
    assert odds.axes[0].get_xscale() == "log"
    for figure in (overview, strongest, parts, odds):
        plt.close(figure)


def test_missingness_model_refers_to_columns_by_alias_and_names_terms_as_statsmodels():
    # issue 9 §1: the model formula is built from aliases, never from header text; the terms
    # are named as a plain statsmodels logit (the reference) names them for the same columns.
    import statsmodels.formula.api as smf

    from gapbook.mechanism import fit_missingness_model

    rng = np.random.default_rng(2)
    n = 300
    data = pd.DataFrame({"alk.phos": rng.normal(100, 20, n),
                         "sex": pd.Categorical(rng.choice(["female", "male"], n))})
    indicator = rng.random(n) < 1 / (1 + np.exp(-(data["alk.phos"] - 100) / 20))
    terms, summary = fit_missingness_model(data, variable="bili", predictors=["alk.phos", "sex"], indicator=indicator)
    assert list(terms["term"]) == ["Intercept", "sex[T.male]", 'Q("alk.phos")']
    frame = data.assign(miss=indicator.astype(float))
    reference = smf.logit('miss ~ Q("alk.phos") + sex', frame).fit(disp=0)
    by_name = terms.set_index("term")["coefficient"]
    for name, value in reference.params.items():
        assert by_name[name] == pytest.approx(value, rel=1e-6)
