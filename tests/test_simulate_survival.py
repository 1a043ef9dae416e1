"""The simulation stage for a Cox model (issue 14): Weibull event times fitted to the study, censoring
from the study's censoring distribution, and the stage's mechanisms and strategies on top.

References beside each check: scipy's ``weibull_min`` maximum-likelihood fit, statsmodels' proportional
hazards regression (``PHReg``) and its Kaplan-Meier estimator (``SurvfuncRight``), and the
Dvoretzky-Kiefer-Wolfowitz inequality for the distance of an empirical distribution function.
"""
from __future__ import annotations

import dataclasses
import math

import numpy as np
import pandas as pd
import pytest
from scipy import stats
from statsmodels.duration.hazard_regression import PHReg
from statsmodels.duration.survfunc import SurvfuncRight
from test_survival import write_study

from gapbook import simulate
from gapbook.errors import InputError
from gapbook.intake import load_study
from gapbook.params import load_params
from gapbook.stage import analysis_model
from gapbook.survival import WeibullFit, censoring_distribution, fit_weibull_ph


def dkw_bound(n: int, miss: float = 1e-4) -> float:
    # Dvoretzky, Kiefer & Wolfowitz (1956, Ann Math Stat 27:642) with Massart's (1990, Ann Prob 18:1269)
    # constant: P(sup |F_n - F| > e) <= 2 exp(-2 n e^2); the e whose chance is `miss`.
    return math.sqrt(math.log(2.0 / miss) / (2.0 * n))


# ---------------------------------------------------------------------------
# the Weibull proportional-hazards fit

def test_weibull_fit_without_covariates_or_censoring_equals_scipy():
    # Reference: scipy.stats.weibull_min.fit(x, floc=0), the maximum-likelihood shape and scale
    x = stats.weibull_min.rvs(1.7, scale=30.0, size=400, random_state=np.random.default_rng(3))
    ours = fit_weibull_ph(x, np.ones(len(x)))
    shape, _, scale = stats.weibull_min.fit(x, floc=0)
    assert ours.shape == pytest.approx(shape, rel=1e-4)
    assert ours.scale() == pytest.approx(scale, rel=1e-4)
    # both maximise the same likelihood: ours is at least as high as scipy's, and equals it at our estimate
    assert ours.log_likelihood >= stats.weibull_min.logpdf(x, shape, scale=scale).sum() - 1e-9
    assert ours.log_likelihood == pytest.approx(stats.weibull_min.logpdf(x, ours.shape, scale=ours.scale()).sum(),
                                                rel=1e-12)


def test_weibull_fit_with_censoring_equals_the_closed_form_exponential():
    # Reference: with the shape fixed at 1 the censored exponential's MLE is events / total time
    # (Collett 2015, Modelling Survival Data in Medical Research, section 5.1); a Weibull sample
    # with shape 1 has a fitted shape near 1 and a rate near that closed form.
    rng = np.random.default_rng(8)
    t = rng.exponential(10.0, 20000)
    c = rng.uniform(0, 25, 20000)
    time, event = np.minimum(t, c), (t <= c).astype(float)
    fit = fit_weibull_ph(time, event)
    assert fit.shape == pytest.approx(1.0, abs=0.03)
    assert math.exp(fit.log_rate) * np.mean(time ** fit.shape) == pytest.approx(event.mean(), rel=1e-6)  # score = 0
    assert math.exp(fit.log_rate) == pytest.approx(event.sum() / time.sum(), rel=0.1)


def test_weibull_log_hazard_ratios_match_the_truth_and_statsmodels_phreg():
    # Reference: statsmodels PHReg on the same rows (under a Weibull model proportional hazards hold, so
    # the Cox partial-likelihood estimate and the Weibull estimate target the same log hazard ratios),
    # and the known truth of the generator (Bender, Augustin & Blettner 2005, Stat Med 24:1713).
    rng = np.random.default_rng(2005)
    n = 6000
    exog = np.column_stack([rng.integers(0, 2, n), rng.normal(50, 10, n)]).astype(float)
    truth = np.array([-0.5, 0.03])
    generator = WeibullFit(shape=1.4, log_rate=math.log(0.002), coefficients=tuple(truth), log_likelihood=0.0,
                           n=n, events=n)
    event_time = generator.draw_times(exog @ truth, rng)
    censor_time = rng.uniform(0, np.quantile(event_time, 0.8), n)
    time, event = np.minimum(event_time, censor_time), (event_time <= censor_time).astype(float)
    fit = fit_weibull_ph(time, event, exog)
    cox = PHReg(time, exog, status=event).fit()
    se = cox.bse
    np.testing.assert_array_less(np.abs(np.array(fit.coefficients) - truth), 4 * se)  # 4 SEs of the truth
    np.testing.assert_array_less(np.abs(np.array(fit.coefficients) - cox.params), se)  # within one SE of Cox
    assert fit.shape == pytest.approx(1.4, abs=0.1)
    assert fit.log_rate == pytest.approx(math.log(0.002), abs=0.4)


def test_weibull_fit_refuses_data_without_events():
    with pytest.raises(InputError, match="at least one event"):
        fit_weibull_ph(np.array([1.0, 2.0, 3.0]), np.zeros(3))


# ---------------------------------------------------------------------------
# the censoring distribution

def follow_up_data(seed: int = 4, n: int = 300) -> tuple[np.ndarray, np.ndarray]:
    """Whole-month follow-up with staggered entry (ties), some dropout, events throughout."""
    rng = np.random.default_rng(seed)
    event_time = rng.weibull(1.2, n) * 30
    censor_time = np.where(rng.random(n) < 0.3, rng.uniform(1, 36, n), rng.uniform(24, 36, n))
    return np.ceil(np.minimum(event_time, censor_time)), (event_time <= censor_time).astype(float)


def test_censoring_distribution_is_the_reverse_kaplan_meier():
    # Reference: statsmodels SurvfuncRight fitted with the roles of event and censoring swapped (the
    # reverse Kaplan-Meier estimate of the censoring distribution, Schemper & Smith 1996)
    time, event = follow_up_data()
    ours = censoring_distribution(time, event)
    reverse = SurvfuncRight(time, 1.0 - event)
    np.testing.assert_allclose(ours.times, reverse.surv_times)
    np.testing.assert_allclose(ours.survival_at(reverse.surv_times), reverse.surv_prob, atol=1e-12)
    assert ours.end == time.max()


def test_drawn_censoring_times_reproduce_the_observed_censoring_distribution():
    # Reference: the input's reverse Kaplan-Meier (statsmodels SurvfuncRight on 1 - event); distance bound
    # from the Dvoretzky-Kiefer-Wolfowitz inequality (see dkw_bound), which holds for any distribution.
    time, event = follow_up_data()
    distribution = censoring_distribution(time, event)
    reverse = SurvfuncRight(time, 1.0 - event)
    drawn = distribution.draw(np.random.default_rng(9), 40000)
    grid = np.unique(time)
    step = np.searchsorted(reverse.surv_times, grid, side="right") - 1
    expected = np.where(step >= 0, 1.0 - reverse.surv_prob[np.clip(step, 0, None)], 0.0)
    expected[grid >= time.max()] = 1.0  # the mass left beyond the last censoring sits at the largest follow-up
    drawn_cdf = np.searchsorted(np.sort(drawn), grid, side="right") / len(drawn)
    assert np.max(np.abs(drawn_cdf - expected)) < dkw_bound(len(drawn))
    assert set(np.unique(drawn)) <= set(reverse.surv_times) | {time.max()}


def test_censoring_beyond_the_last_censoring_time_is_at_the_largest_follow_up():
    # Hand calculation (Kaplan & Meier 1958 on the censorings): times 1+, 2, 3+, 5 (+ censored); the reverse
    # Kaplan-Meier has steps at 1 (1/4) and 3 (1 - 3/4 * 1/2 = 5/8); the remaining 3/8 is put at 5.
    distribution = censoring_distribution(np.array([1.0, 2.0, 3.0, 5.0]), np.array([0.0, 1.0, 0.0, 1.0]))
    assert distribution.times == (1.0, 3.0) and distribution.end == 5.0
    np.testing.assert_allclose(distribution.cumulative, [1 / 4, 5 / 8])
    drawn = distribution.draw(np.random.default_rng(1), 80000)
    bound = dkw_bound(len(drawn))
    assert np.mean(drawn == 1.0) == pytest.approx(1 / 4, abs=bound)
    assert np.mean(drawn == 3.0) == pytest.approx(3 / 8, abs=bound)
    assert np.mean(drawn == 5.0) == pytest.approx(3 / 8, abs=bound)


# ---------------------------------------------------------------------------
# the stage on a cox study (the cohort of tests/test_survival.py)

@pytest.fixture(scope="module")
def cox_study(tmp_path_factory):
    params = load_params(write_study(tmp_path_factory.mktemp("cox") / "study"))
    return params, load_study(params)


@pytest.fixture(scope="module")
def cox_design(cox_study):
    params, study = cox_study
    return simulate.design_from_data(study.data, model=analysis_model(params), missing=study.missing,
                                     types=study.types)


def test_cox_design_is_fitted_to_the_complete_cases_and_left_out_rows_are_said(cox_study, cox_design):
    params, study = cox_study
    data = study.data
    status = data["status"]
    with_follow_up = data["months"].notna() & status.notna()
    complete = with_follow_up & data[["arm", "age", "stage"]].notna().all(axis=1)
    # counts: pandas on the study as read
    assert cox_design.n == with_follow_up.sum() and cox_design.left_out == (~with_follow_up).sum() == 5
    assert cox_design.weibull.n == complete.sum() and cox_design.weibull.events == (status[complete] == 2).sum()
    assert cox_design.mar_on == ("status",)   # the event status drives MAR by default
    assert set(cox_design.missing_fractions) == {"age", "stage"}
    assert cox_design.missing_fractions["age"] == pytest.approx(data.loc[with_follow_up, "age"].isna().mean())
    # the truth is the Weibull log hazard ratio, on the term statsmodels names; close to a Cox fit of the same rows
    # (Reference: statsmodels PHReg through the analysis model, 1.5 standard errors as the stated distance)
    frame = data.loc[complete].copy()
    cox = analysis_model(params).fit(frame)
    term = "arm[T.control]"
    assert list(cox_design.true_values) == [term]
    position = list(cox.terms).index(term)
    assert abs(cox_design.true_values[term] - cox.coefficients[position]) < 1.5 * cox.std_errors()[position]
    replicate = simulate.simulate_complete(cox_design, np.random.default_rng(1))
    assert set(replicate["status"].unique()) <= {0.0, 1.0} and (replicate["months"] > 0).all()
    assert replicate["months"].max() <= data["months"].max()
    # simulated event times are continuous: Efron's and Breslow's approximations give the same fit
    # (Efron 1977, JASA 72:557; reference: statsmodels PHReg with each ties method on the replicate)
    assert cox_design.model.ties == "breslow"
    exog = pd.get_dummies(replicate[["arm"]], drop_first=True, dtype=float).assign(age=replicate["age"])
    efron, breslow = (PHReg(replicate["months"].to_numpy(float), exog.to_numpy(float),
                            status=replicate["status"].to_numpy(float), ties=ties).fit().params
                      for ties in ("efron", "breslow"))
    np.testing.assert_allclose(efron, breslow, rtol=1e-9)
    sentence = simulate.follow_up_sentence(cox_design)
    assert "Weibull" in sentence and "5 rows" in sentence


def test_simulated_follow_up_has_the_studys_censoring_distribution(cox_study, cox_design):
    # Reference: statsmodels SurvfuncRight's reverse Kaplan-Meier of the study against that of a large
    # simulated replicate (events censor the censoring there); a sup distance below 0.05 is common
    # practice, no source (the simulated curve has its own sampling error of about 1/sqrt(n)).
    _, study = cox_study
    data = study.data
    known = data["months"].notna() & data["status"].notna()
    study_curve = SurvfuncRight(data.loc[known, "months"].to_numpy(float),
                                (data.loc[known, "status"] == 1).to_numpy(float))
    big = dataclasses.replace(cox_design, n=20000)
    replicate = simulate.simulate_complete(big, np.random.default_rng(11))
    simulated = SurvfuncRight(replicate["months"].to_numpy(float), 1.0 - replicate["status"].to_numpy(float))
    grid = np.arange(1, 48)
    at = lambda curve: np.array([curve.surv_prob[curve.surv_times <= t][-1] if (curve.surv_times <= t).any() else 1.0
                                 for t in grid])
    assert np.max(np.abs(at(study_curve) - at(simulated))) < 0.05


def test_cox_mar_driver_may_be_the_follow_up_time_but_not_an_unknown_column(cox_study):
    params, study = cox_study
    design = simulate.design_from_data(study.data, model=analysis_model(params), missing=study.missing,
                                       types=study.types, mar_on=["months"])
    assert design.mar_on == ("months",) and "months" not in design.pool.columns
    with pytest.raises(InputError, match="'monts' is not a column"):
        simulate.design_from_data(study.data, model=analysis_model(params), mar_on=["monts"])


@pytest.mark.slow
def test_same_seed_gives_the_same_bytes_whatever_the_workers(cox_study, cox_design):
    params, _ = cox_study
    strategies = simulate.default_strategies(cox_design, m=2, iterations=2)
    one = simulate.run_simulation(cox_design, strategies, replicates=3, seed=5, n_jobs=1, mechanisms=("MAR",))
    two = simulate.run_simulation(cox_design, strategies, replicates=3, seed=5, n_jobs=2, mechanisms=("MAR",))
    assert one.performance.to_csv() == two.performance.to_csv()
    assert one.replicates.to_csv() == two.replicates.to_csv()
    assert set(one.replicates["strategy"]) == {"complete_case", "missing_category", "multiple_imputation"}
    assert not one.replicates["failed"].any()


@pytest.mark.slow
def test_complete_case_is_unbiased_under_mcar(cox_design):
    # Complete-case analysis of a Cox model is unbiased when covariates are missing completely at random
    # (Little & Rubin 2019, Statistical Analysis with Missing Data, 3rd ed., section 3.2); the stated
    # distance is 3 Monte Carlo SEs, coverage at most 3 Monte Carlo SEs below nominal (Morris, White &
    # Crowther 2019, Stat Med 38:2074). 200 replicates through the stage's own loop.
    strategies = simulate.default_strategies(cox_design, include=("complete_case",))
    result = simulate.run_simulation(cox_design, strategies, replicates=200, seed=1412, n_jobs=2,
                                     mechanisms=("MCAR",))
    perf = result.performance.set_index(["mechanism", "strategy"])
    row = perf.loc[("MCAR", "complete_case")]
    assert abs(row["bias"]) < 3 * row["bias_mcse"], row
    assert row["coverage"] >= 0.95 - 3 * math.sqrt(0.95 * 0.05 / 200)
    assert result.n_failed == 0


def test_the_stage_names_the_log_hazard_ratio_scale_on_its_sentences_and_figure(cox_study):
    import matplotlib.pyplot as plt

    from gapbook.plots.simulate import performance_panels

    params, study = cox_study
    result = simulate.simulate_study(study.data, model=analysis_model(params), missing=study.missing,
                                     types=study.types, replicates=2, seed=1, m=2)
    assert result.sentences[1].startswith("True value(s) (log hazard ratio): arm[T.control] = ")
    assert "Follow-up: event times drawn from a Weibull" in result.sentences[1]  # the notebook shows [:2] first
    assert set(result.performance["mechanism"]) == {"MCAR", "MAR", "MNAR"}
    figure = performance_panels(result, family="cox")
    assert "log hazard ratio" in figure.axes[0].get_ylabel()
    plt.close(figure)
