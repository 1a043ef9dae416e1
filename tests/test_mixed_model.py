"""The mixed model for repeated measures against outside references.

- statsmodels OLS on the dietox data that statsmodels ships (pigs weighed weekly): with
  complete data and the same regressors at every visit, the mixed model's estimates equal
  least squares visit by visit and its REML standard errors equal the OLS ones (multivariate
  regression with identical regressors: Zellner 1962, JASA 57:348; Anderson 2003, An
  Introduction to Multivariate Statistical Analysis, ch. 8); Satterthwaite's df is then the
  exact n - q (Satterthwaite 1946, Biometrics Bulletin 2:110: the approximation is exact
  for a single scaled chi-square).
- the closed-form maximum-likelihood estimates for a monotone bivariate normal sample
  (Anderson 1957, JASA 52:200), as the kit's EM tests implement them;
- scipy's multivariate normal density summed over participants (the ML log-likelihood);
- scipy's finite-difference gradient (the analytic score);
- a simulated trial with dropout depending on the last observed value (missing at random):
  the mixed model covers the true effect; completers and last observation do not recover it.
"""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import statsmodels.formula.api as smf
from scipy import optimize, stats
from statsmodels.regression import tests as regression_tests
from pathlib import Path

from gapbook.errors import AnalysisError
from gapbook.followup import mixed_model as mm
from gapbook.followup.comparisons import comparison_effects
from gapbook.followup.demo import simulate_followup_trial
from gapbook.followup.repeated import repeated_outcome
from gapbook.little import em_multivariate_normal
from test_mechanism import anderson_estimates, monotone_bivariate

DIETOX = Path(regression_tests.__file__).parent / "results" / "dietox.csv"


def dietox_long() -> pd.DataFrame:
    """statsmodels' dietox data: weight of 72 pigs in weeks 1-12, three copper doses (Cu)."""
    frame = pd.read_csv(DIETOX)
    start = frame[frame["Time"] == 1].set_index("Pig")["Weight"]
    frame["start"] = frame["Pig"].map(start)
    frame["Cu"] = pd.Categorical(frame["Cu"].map({1: "none", 2: "low", 3: "high"}),
                                 categories=["none", "low", "high"])
    return frame[frame["Time"] > 1]


WEEKS = [2, 4, 6, 8, 10, 12]
DIETOX_FORMULA = "Weight ~ Cu * C(Time) + start * C(Time)"


@pytest.fixture(scope="module")
def dietox_complete():
    frame = dietox_long()
    frame = frame[frame["Time"].isin(WEEKS)]
    complete = frame.groupby("Pig")["Weight"].transform("count") == len(WEEKS)
    frame = frame[complete]
    outcome = repeated_outcome(frame, formula=DIETOX_FORMULA, subject="Pig", visit="Time", visits=WEEKS,
                               exposure="Cu")
    return frame, outcome, mm.fit_mixed_model(outcome)


def test_complete_balanced_data_equal_ols_visit_by_visit(dietox_complete):
    frame, outcome, fit = dietox_complete
    n = outcome.n
    assert n == len(frame) // len(WEEKS) and np.isnan(outcome.values).sum() == 0
    effects = fit.visit_effects().set_index(["term", "visit"])
    residuals = []
    for week in WEEKS:
        ols = smf.ols("Weight ~ Cu + start", frame[frame["Time"] == week]).fit()   # Source: statsmodels OLS
        residuals.append(ols.resid.to_numpy())
        for level in ("low", "high"):
            row = effects.loc[(f"Cu[T.{level}]", week)]
            assert row["estimate"] == pytest.approx(ols.params[f"Cu[T.{level}]"], rel=1e-7, abs=1e-8)
            assert row["std_error"] == pytest.approx(ols.bse[f"Cu[T.{level}]"], rel=1e-6)
            # Satterthwaite (1946) is exact here: the df of each visit's contrast is n - q (q = 4 per visit).
            assert row["df"] == pytest.approx(ols.df_resid, rel=1e-6)
            assert row["df"] == pytest.approx(n - 4, rel=1e-6)
            lower, upper = ols.conf_int().loc[f"Cu[T.{level}]"]
            assert row["ci_lower"] == pytest.approx(lower, rel=1e-6)
            assert row["p_value"] == pytest.approx(ols.pvalues[f"Cu[T.{level}]"], rel=1e-5, abs=1e-12)
    # REML covariance = residual cross-products / (n - q) (Anderson 2003, ch. 8: the unbiased estimate).
    residuals = np.column_stack(residuals)
    np.testing.assert_allclose(fit.sigma, residuals.T @ residuals / (n - 4), rtol=1e-6)


def test_ml_monotone_two_visits_equals_anderson_closed_form():
    frame = monotone_bivariate(4, n=300, r=180)
    long = pd.DataFrame({"id": np.repeat(np.arange(len(frame)), 2), "visit": np.tile([1, 2], len(frame)),
                         "y": frame[["y1", "y2"]].to_numpy().ravel()})
    outcome = repeated_outcome(long, formula="y ~ C(visit)", subject="id", visit="visit", visits=[1, 2])
    fit = mm.fit_mixed_model(outcome, method="ml")
    mean, covariance = anderson_estimates(frame)       # Anderson (1957), as the kit's EM tests implement it
    np.testing.assert_allclose([fit.coef[0], fit.coef[0] + fit.coef[1]], mean, rtol=1e-7)
    np.testing.assert_allclose(fit.sigma, covariance, rtol=1e-6)
    # And the kit's EM (little.em_multivariate_normal) reaches the same maximum.
    em = em_multivariate_normal(frame, tolerance=1e-12, max_iterations=5000)
    np.testing.assert_allclose(fit.sigma, em.covariance.to_numpy(), rtol=1e-6)


@pytest.fixture(scope="module")
def dietox_incomplete():
    """All 72 pigs: three have a week without a weight, so there are several observed-visit patterns."""
    frame = dietox_long()
    return repeated_outcome(frame, formula="Weight ~ Cu * C(Time) + start * C(Time)", subject="Pig",
                            visit="Time", visits=list(range(2, 13)), exposure="Cu")


def test_ml_log_likelihood_equals_scipy_density_sum(dietox_incomplete):
    outcome = dietox_incomplete
    assert np.isnan(outcome.values).sum() > 0
    fit = mm.fit_mixed_model(outcome, method="ml")
    mean = outcome.design @ fit.coef
    total = 0.0
    for i in range(outcome.n):       # Source: scipy.stats.multivariate_normal, participant by participant
        seen = ~np.isnan(outcome.values[i])
        total += stats.multivariate_normal(mean[i, seen], fit.sigma[np.ix_(seen, seen)]).logpdf(
            outcome.values[i, seen])
    assert fit.loglik == pytest.approx(total, rel=1e-10)


@pytest.mark.parametrize("method", ["reml", "ml"])
def test_analytic_score_equals_finite_differences(dietox_incomplete, method):
    outcome = dietox_incomplete
    values = (outcome.values - np.nanmean(outcome.values)) / np.nanstd(outcome.values)
    patterns = mm._patterns(outcome.design, values)
    n_obs = int((~np.isnan(values)).sum())
    size = values.shape[1]
    rng = np.random.default_rng(0)
    a = rng.normal(size=(size, size))
    sigma = a @ a.T / size + np.eye(size)
    rows, cols = np.tril_indices(size)

    def loglik(vech):
        s = np.zeros((size, size))
        s[rows, cols] = vech
        s = s + np.tril(s, -1).T
        return mm._evaluate(patterns, s, method, n_obs).loglik

    vech = sigma[rows, cols]
    numeric = optimize.approx_fprime(vech, loglik, 1e-6)     # Source: scipy finite differences
    gradient = mm._evaluate(patterns, sigma, method, n_obs).gradient
    analytic = np.where(rows == cols, 1.0, 2.0) * gradient[rows, cols]
    np.testing.assert_allclose(analytic, numeric, rtol=1e-4, atol=1e-3)


def test_visit_without_any_outcome_is_an_analysis_error(dietox_incomplete):
    outcome = dietox_incomplete
    values = outcome.values.copy()
    values[:, 3] = np.nan
    with pytest.raises(AnalysisError, match="visit 5"):
        mm.fit_mixed_model(outcome.with_values(values))


TRUE_LAST = -4.0
SCENARIO = dict(weeks=(2, 4, 8, 12), control_mean=(0.0, 0.0, 0.0, 0.0), effect=(-1.0, -2.0, -3.0, TRUE_LAST),
                sd=(4.0, 4.5, 5.0, 5.5), dropout_intercept={"control": -2.2, "active": -2.2}, dropout_slope=1.0)


@pytest.mark.slow
def test_mar_dropout_simulation_mixed_model_covers_completers_and_locf_do_not():
    """200 simulated trials (150 per arm, about half missing at the last visit, dropout
    depending on the last observed change: missing at random). The mixed model is valid
    under MAR (Rubin 1976, Biometrika 63:581), so its 95 % intervals cover the true effect
    at the last visit about 95 % of the time and its mean is within Monte Carlo error of the
    truth; completers-only and last observation carried forward are biased under this
    mechanism (National Research Council 2010, recalled from memory)."""
    estimates, covered, naive = [], [], {"completers": [], "last_observation": []}
    for seed in range(200):
        trial = simulate_followup_trial(n_per_arm=150, seed=1000 + seed, **SCENARIO)
        outcome = repeated_outcome(trial.data, formula="chg ~ arm * C(week) + base * C(week)", subject="subject",
                                   visit="week", visits=trial.weeks, exposure="arm")
        last = mm.fit_mixed_model(outcome).visit_effects().iloc[-1]
        estimates.append(last["estimate"])
        covered.append(last["ci_lower"] <= TRUE_LAST <= last["ci_upper"])
        if seed < 100:
            others = comparison_effects(outcome)
            for strategy in naive:
                naive[strategy].append(others[others["strategy"] == strategy]["estimate"].iloc[-1])
    estimates = np.array(estimates)
    mc_se = estimates.std(ddof=1) / np.sqrt(len(estimates))
    assert abs(estimates.mean() - TRUE_LAST) < 3 * mc_se
    # Binomial(200, 0.95): 99 % of coverage estimates fall in about [0.91, 0.99].
    assert 0.91 <= np.mean(covered) <= 0.99
    for strategy, values in naive.items():
        values = np.array(values)
        se = values.std(ddof=1) / np.sqrt(len(values))
        assert abs(values.mean() - TRUE_LAST) > 4 * se, strategy
