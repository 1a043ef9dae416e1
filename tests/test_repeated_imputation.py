"""Multiple imputation for repeated measures (missing at random and reference-based) against outside references.

- The complete-data posterior of a multivariate normal regression under the prior
  |Sigma|^-(T+1)/2: Sigma ~ inverse Wishart(n - q, S), B | Sigma ~ matrix normal around the
  least-squares B (Box & Tiao 1973, Bayesian Inference in Statistical Analysis, section 8.4):
  the draws' averages match scipy's inverse-Wishart mean and statsmodels' OLS.
- With missing outcomes, the posterior mean of the means approaches the maximum-likelihood
  estimate, which the kit's EM computes (Dempster, Laird & Rubin 1977; Little & Rubin 2002).
- Jump to reference when every active-arm dropout leaves before the first visit: the
  expected effect is the MAR effect times the share of active participants who stay
  (derived in the test; Carpenter, Roger & Kenward 2013, J Biopharm Stat 23:1352).
- A simulated trial with dropout depending on the last observed value (missing at random):
  imputation under MAR covers the true effect.
"""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from scipy import stats

from gapbook.errors import InputError
from gapbook.followup import imputation as ri
from gapbook.followup.demo import simulate_followup_trial
from gapbook.followup.mixed_model import fit_mixed_model
from gapbook.followup.repeated import repeated_outcome
from gapbook.little import em_multivariate_normal
from gapbook.vocabulary import INFORMATION_ANCHORING, REFERENCE_BASED_VARIANCE

FORMULA = "chg ~ arm * C(week) + base * C(week)"


def outcome_of(trial):
    return repeated_outcome(trial.data, formula=FORMULA, subject="subject", visit="week", visits=trial.weeks,
                            exposure="arm")


def test_complete_data_draws_follow_the_conjugate_posterior():
    rng = np.random.default_rng(11)
    n, t = 400, 3
    x = np.column_stack([np.ones(n), rng.normal(size=n)])
    y = x @ np.array([[1.0, 2.0, 3.0], [0.5, -0.5, 1.0]]) + rng.multivariate_normal(
        np.zeros(t), [[1, 0.5, 0.2], [0.5, 2, 0.4], [0.2, 0.4, 1.5]], size=n)
    posterior = ri.draw_group_parameters(y, x, draws=4000, burn_in=0, thin=1, rng=np.random.default_rng(1))
    ols = np.column_stack([sm.OLS(y[:, k], x).fit().params for k in range(t)])     # Source: statsmodels OLS
    residual = y - x @ ols
    expected_sigma = stats.invwishart(df=n - 2, scale=residual.T @ residual).mean()   # Source: scipy
    draws_b = posterior.coefficients.reshape(4000, -1)
    se_b = draws_b.std(axis=0) / np.sqrt(4000)
    assert np.all(np.abs(draws_b.mean(axis=0) - ols.ravel()) < 4 * se_b)
    se_sigma = posterior.covariances.std(axis=0) / np.sqrt(4000)
    assert np.all(np.abs(posterior.covariances.mean(axis=0) - expected_sigma) < 4 * se_sigma)


def test_posterior_means_approach_the_em_estimate_with_missing_values():
    rng = np.random.default_rng(5)
    n = 3000
    y = rng.multivariate_normal([0.0, 1.0, 2.0], [[1, 0.6, 0.4], [0.6, 1.5, 0.7], [0.4, 0.7, 2.0]], size=n)
    y[rng.random(n) < 0.3 * (y[:, 0] > 0), 1] = np.nan           # missing at random given visit 1
    y[np.isnan(y[:, 1]) | (rng.random(n) < 0.2), 2] = np.nan
    posterior = ri.draw_group_parameters(y, np.ones((n, 1)), draws=400, burn_in=100, thin=5,
                                         rng=np.random.default_rng(2))
    em = em_multivariate_normal(pd.DataFrame(y), tolerance=1e-10)     # the kit's EM (Dempster et al. 1977)
    means = posterior.coefficients[:, 0, :]
    # Posterior mean and ML differ by O(1/n); allow a quarter of a posterior SD.
    assert np.all(np.abs(means.mean(axis=0) - em.mean.to_numpy()) < 0.25 * means.std(axis=0))


@pytest.fixture(scope="module")
def early_dropout_trial():
    """Control arm complete; 30 % of the active arm (at random) attend no visit after baseline."""
    trial = simulate_followup_trial(n_per_arm=1500, weeks=(4, 8, 12), control_mean=(0.0, 0.0, 0.0),
                                    effect=(-2.0, -3.0, -4.0), sd=(4.0, 4.5, 5.0), intermittent=0.0,
                                    dropout_intercept={"control": -50.0, "active": -50.0}, seed=77)
    outcome = outcome_of(trial)
    rng = np.random.default_rng(8)
    active = outcome.group_rows("active")
    leavers = active[rng.random(len(active)) < 0.3]
    values = outcome.values.copy()
    values[leavers] = np.nan
    return outcome.with_values(values), len(leavers) / len(active)


def test_jump_to_reference_with_dropout_before_first_visit_scales_the_mar_effect(early_dropout_trial):
    """Derivation. Let pi be the share of active participants with no post-baseline visit
    (here missing completely at random) and delta the MAR effect at a visit. Under jump to
    reference a leaver's outcomes are drawn with the reference (control) mean given their
    covariates, and there is no pre-deviation outcome to condition on. The active arm's mean
    in the completed data is therefore (1 - pi) (mu_control + delta) + pi mu_control, so the
    expected effect is (1 - pi) delta. With the control arm complete, the reference posterior
    is centred on control's least-squares fit, so the only differences between the J2R
    estimate and (1 - pi) x the MAR estimate (the mixed model on the same data) are the
    imputation draws: within a few Monte Carlo standard errors sqrt(B / m)."""
    outcome, share_left = early_dropout_trial
    imputation = ri.impute_repeated(outcome, rule="jump_to_reference", m=20, seed=3, burn_in=20, thin=2)
    pooled = imputation.analyse()
    j2r = pooled.visit_effects().set_index("visit")
    mar = fit_mixed_model(outcome).visit_effects().set_index("visit")
    for k, week in enumerate(outcome.visits):
        between = pooled.coefficients[:, k].var(ddof=1)
        mc_se = np.sqrt(between / imputation.m)
        expected = (1 - share_left) * mar.loc[week, "estimate"]
        assert abs(j2r.loc[week, "estimate"] - expected) < 4 * mc_se + 0.02 * abs(expected)
        # And against the truth (1 - pi) x true effect, within the estimate's own standard error.
        truth = (1 - share_left) * (-2.0, -3.0, -4.0)[k]
        assert abs(j2r.loc[week, "estimate"] - truth) < 3 * j2r.loc[week, "std_error"]
    assert pooled.sentences == (REFERENCE_BASED_VARIANCE, INFORMATION_ANCHORING)


def test_reference_rules_coincide_when_nobody_has_a_visit_before_leaving(early_dropout_trial):
    # With no pre-deviation outcome, jump to reference, copy reference and copy increments in
    # reference all draw a leaver's profile from the reference mean and covariance (the rules
    # differ only in how the pre-deviation mean enters): the same seed gives the same data.
    outcome, _ = early_dropout_trial
    completed = [ri.impute_repeated(outcome, rule=rule, m=2, seed=9, burn_in=5, thin=1).completed
                 for rule in ("jump_to_reference", "copy_reference", "copy_increments_reference")]
    np.testing.assert_array_equal(completed[0], completed[1])
    np.testing.assert_array_equal(completed[0], completed[2])


def test_delta_shifts_only_cells_after_deviation_in_the_active_arm():
    trial = simulate_followup_trial(n_per_arm=120, seed=4)
    outcome = outcome_of(trial)
    plain = ri.impute_repeated(outcome, rule="mar", m=3, seed=1, burn_in=10, thin=2)
    shifted = ri.impute_repeated(outcome, rule="mar", m=3, seed=1, burn_in=10, thin=2, delta=2.5)
    last = outcome.last_observed
    after = np.arange(outcome.n_visits)[None, :] > last[:, None]
    active = (outcome.groups == "active")[:, None]
    expected = np.where(after & active, 2.5, 0.0)
    np.testing.assert_allclose(shifted.completed - plain.completed, np.broadcast_to(expected, plain.completed.shape),
                               atol=1e-12)
    assert shifted.strategy == "delta_adjusted" and plain.strategy == "multiple_imputation"
    # The pooled effect moves by the least-squares coefficient of the shift (statsmodels OLS).
    moved = shifted.analyse().visit_effects()["estimate"].to_numpy() - \
        plain.analyse().visit_effects()["estimate"].to_numpy()
    x = np.column_stack([np.ones(outcome.n), (outcome.groups == "active").astype(float),
                         outcome.covariate_matrix()[:, 1]])
    for k in range(outcome.n_visits):
        assert moved[k] == pytest.approx(sm.OLS(expected[:, k], x).fit().params[1], abs=1e-8)


def test_rule_and_group_errors_are_input_errors():
    outcome = outcome_of(simulate_followup_trial(n_per_arm=30, seed=2))
    with pytest.raises(InputError, match="^rule: 'jump_to_ref' is not one of"):
        ri.impute_repeated(outcome, rule="jump_to_ref")
    with pytest.raises(InputError, match="^reference: 'placebo' is not a level of"):
        ri.impute_repeated(outcome, rule="mar", reference="placebo")


@pytest.mark.slow
def test_mar_imputation_simulation_covers_the_true_effect():
    """80 simulated trials with dropout depending on the last observed change (MAR, as in the
    mixed-model test): imputation under MAR pooled with Rubin's rules (Rubin 1987) has mean
    within Monte Carlo error of the true effect and covers it at about the nominal rate
    (Rubin's variance is valid or slightly conservative under a congenial model)."""
    from test_mixed_model import SCENARIO, TRUE_LAST

    estimates, covered = [], []
    for seed in range(80):
        trial = simulate_followup_trial(n_per_arm=150, seed=2000 + seed, **SCENARIO)
        pooled = ri.impute_repeated(outcome_of(trial), rule="mar", m=10, seed=seed, burn_in=40,
                                    thin=5).analyse()
        last = pooled.visit_effects().iloc[-1]
        estimates.append(last["estimate"])
        covered.append(last["ci_lower"] <= TRUE_LAST <= last["ci_upper"])
    estimates = np.array(estimates)
    assert abs(estimates.mean() - TRUE_LAST) < 3 * estimates.std(ddof=1) / np.sqrt(len(estimates))
    # Binomial(80, 0.95): 99 % of coverage estimates fall above about 0.88.
    assert np.mean(covered) >= 0.88


def test_the_arms_chains_give_the_same_draws_in_one_or_two_processes():
    # Each arm's chain draws from its own child seed, so where it runs cannot change a draw
    # (a rule of the kit: same inputs and seed, same bytes, whatever the number of workers).
    trial = simulate_followup_trial(n_per_arm=60, seed=3)
    here = ri.draw_posteriors(outcome_of(trial), m=3, seed=11, burn_in=20, thin=5, n_jobs=1)
    apart = ri.draw_posteriors(outcome_of(trial), m=3, seed=11, burn_in=20, thin=5, n_jobs=2)
    for level in here.groups:
        assert here.groups[level].coefficients.tobytes() == apart.groups[level].coefficients.tobytes()
        assert here.groups[level].covariances.tobytes() == apart.groups[level].covariances.tobytes()
