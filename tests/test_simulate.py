"""Tests of the bias simulation: performance measures, mechanisms and the strategies' known behaviour."""
from __future__ import annotations

import dataclasses

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from gapbook import simulate
from gapbook.errors import InputError
from gapbook.models import AnalysisModel, fit_model


@pytest.fixture(scope="module")
def complete_penguins(penguins) -> pd.DataFrame:
    # Open dataset shipped by the palmerpenguins package (Gorman, Williams & Fraser 2014), complete rows.
    frame = penguins[["body_mass_g", "flipper_length_mm", "bill_length_mm", "sex", "species"]]
    frame = frame.dropna().reset_index(drop=True)
    frame["sex"] = pd.Categorical(frame["sex"])
    frame["species"] = pd.Categorical(frame["species"])
    return frame


def penguin_design(frame, fractions, mar_on=("bill_length_mm",), formula="body_mass_g ~ flipper_length_mm + sex"):
    model = AnalysisModel(formula=formula, exposure="flipper_length_mm")
    design = simulate.design_from_data(frame, model=model, mar_on=list(mar_on),
                                       types={"body_mass_g": "continuous", "flipper_length_mm": "continuous",
                                              "bill_length_mm": "continuous", "sex": "binary"})
    # penguins has (almost) no missing values of its own: set the fractions the test needs.
    return dataclasses.replace(design, missing_fractions=dict(fractions))


# ---------------------------------------------------------------------------
# performance measures

def test_performance_formulas_match_scipy_and_numpy():
    rng = np.random.default_rng(1)
    est = rng.normal(1.0, 0.2, 50)
    se = np.abs(rng.normal(0.2, 0.02, 50))
    lo, hi = est - 1.96 * se, est + 1.96 * se
    out = simulate.performance(est, se, lo, hi, 1.0)
    # Morris, White & Crowther (2019) Stat Med 38:2074, Table 6; bias MCSE is the standard error of a mean (scipy.stats.sem).
    assert out["bias"] == pytest.approx(est.mean() - 1.0)
    assert out["bias_mcse"] == pytest.approx(stats.sem(est))
    assert out["emp_se"] == pytest.approx(np.std(est, ddof=1))
    assert out["emp_se_mcse"] == pytest.approx(np.std(est, ddof=1) / np.sqrt(2 * 49))
    assert out["model_se"] == pytest.approx(np.sqrt(np.mean(se ** 2)))
    covered = np.mean((lo <= 1.0) & (hi >= 1.0))
    assert out["coverage"] == pytest.approx(covered)
    assert out["coverage_mcse"] == pytest.approx(np.sqrt(covered * (1 - covered) / 50))


@pytest.mark.slow
def test_monte_carlo_ses_equal_the_spread_over_repeated_simulation_studies():
    # Morris et al. (2019): the Monte Carlo SE of a performance measure is the SD of that measure
    # over independent repetitions of the whole simulation study. 600 repetitions of 100 replicates.
    rng = np.random.default_rng(20261203)
    n_rep, n_studies, sigma, df = 100, 600, 0.5, 30
    rows = []
    for _ in range(n_studies):
        est = rng.normal(0.0, sigma, n_rep)
        se = sigma * np.sqrt(rng.chisquare(df, n_rep) / df)
        crit = stats.t.ppf(0.975, df)
        rows.append(simulate.performance(est, se, est - crit * se, est + crit * se, 0.0))
    table = pd.DataFrame(rows)
    for measure in ("bias", "emp_se", "model_se", "coverage"):
        observed_spread = table[measure].std(ddof=1)
        mean_mcse = table[f"{measure}_mcse"].mean()
        # SD of an SD estimate over 600 studies is itself uncertain by ~3%; 15% is a generous margin.
        assert mean_mcse == pytest.approx(observed_spread, rel=0.15), measure


def test_performance_drops_failed_replicates():
    out = simulate.performance([1.0, np.nan, 1.2], [0.1, 0.1, np.nan], [0.8, 0.8, 1.0], [1.2, 1.2, 1.4], 1.0)
    assert out["n_rep"] == 1


# ---------------------------------------------------------------------------
# mechanisms

def test_mechanisms_hit_the_missing_fraction_and_depend_on_the_right_variable(complete_penguins):
    design = penguin_design(complete_penguins, {"body_mass_g": 0.3})
    rng = np.random.default_rng(5)
    complete = simulate.simulate_complete(dataclasses.replace(design, n=20000), rng)
    shares = {}
    for mechanism in simulate.MECHANISMS:
        incomplete = simulate.impose_missing(complete, design, mechanism, np.random.default_rng(6), strength=1.0)
        missing = incomplete["body_mass_g"].isna()
        shares[mechanism] = missing.mean()
        # Point-biserial association of missingness with the driver (own value for MNAR, bill length for MAR).
        shares[mechanism + "_own"] = np.corrcoef(missing, complete["body_mass_g"])[0, 1]
        shares[mechanism + "_mar"] = np.corrcoef(missing, complete["bill_length_mm"])[0, 1]
    for mechanism in simulate.MECHANISMS:
        assert shares[mechanism] == pytest.approx(0.3, abs=0.015)
    assert abs(shares["MCAR_own"]) < 0.03 and abs(shares["MCAR_mar"]) < 0.03
    assert shares["MAR_mar"] > 0.25
    assert shares["MNAR_own"] > 0.25


def test_unknown_mechanism_and_bad_mar_driver_are_input_errors(complete_penguins):
    design = penguin_design(complete_penguins, {"body_mass_g": 0.3})
    with pytest.raises(InputError, match="MNRA"):
        simulate.impose_missing(simulate.simulate_complete(design, np.random.default_rng(1)), design, "MNRA",
                                np.random.default_rng(1))
    with pytest.raises(InputError, match="^mar_on: 'bil_length' is not a column"):
        simulate.design_from_data(complete_penguins, model=AnalysisModel("body_mass_g ~ flipper_length_mm"), mar_on=["bil_length"])


# ---------------------------------------------------------------------------
# strategies

def test_fast_least_squares_equals_statsmodels(complete_penguins):
    design = penguin_design(complete_penguins, {"body_mass_g": 0.3, "flipper_length_mm": 0.1})
    fast = simulate.least_squares_for(design)
    assert fast is not None
    complete = simulate.simulate_complete(design, np.random.default_rng(2))
    incomplete = simulate.impose_missing(complete, design, "MAR", np.random.default_rng(3))
    strategy = simulate.CompleteCaseStrategy(design.model, (design.outcome, *design.covariates), fast)
    ours = strategy(simulate.Replicate(incomplete, fast.design(complete)), np.random.default_rng(0))
    # Reference library: statsmodels OLS through gapbook.models.fit_model (drops incomplete rows).
    reference = fit_model(incomplete, formula=design.model.formula).estimates("complete_case")
    np.testing.assert_allclose(ours[["estimate", "std_error", "ci_lower", "ci_upper"]].to_numpy(),
                               reference[["estimate", "std_error", "ci_lower", "ci_upper"]].to_numpy(), rtol=1e-9)


@pytest.mark.slow
def test_complete_case_unbiased_under_mcar_and_biased_under_outcome_mnar(complete_penguins):
    # Complete-case regression is unbiased when missingness does not depend on the outcome
    # (Little 1992, JASA 87:1227; White & Carlin 2010, Stat Med 29:2920) and attenuates the slope
    # when it selects on the outcome itself (truncation on y; Hausman & Wise 1977, Econometrica 45:919).
    design = penguin_design(complete_penguins, {"body_mass_g": 0.4})
    strategies = simulate.default_strategies(design, include=("complete_case",))
    result = simulate.run_simulation(design, strategies, replicates=300, seed=11, mechanisms=("MCAR", "MNAR"),
                                     strength=1.5, progress=False)
    perf = result.performance.set_index("mechanism")
    true_slope = design.true_values["flipper_length_mm"]
    mcar, mnar = perf.loc["MCAR"], perf.loc["MNAR"]
    assert abs(mcar["bias"]) < 3 * mcar["bias_mcse"]
    assert mnar["bias"] * np.sign(true_slope) < 0          # towards zero
    assert abs(mnar["bias"]) > 5 * mnar["bias_mcse"]
    assert result.n_failed == 0


@pytest.mark.slow
def test_imputation_coverage_near_nominal_under_mar(complete_penguins):
    # Rubin (1987): proper multiple imputation gives intervals with nominal coverage under MAR when
    # the imputation model holds the MAR driver. Missingness of the outcome depends on bill length, which
    # the analysis model omits, so complete cases are biased while imputation (which uses it) is not.
    # A moderate MAR selection (odds ratio e per SD of bill length, 30% missing): with much stronger
    # selection predictive mean matching runs short of donors in the tail and under-covers.
    design = penguin_design(complete_penguins, {"body_mass_g": 0.3},
                            formula="body_mass_g ~ flipper_length_mm")
    strategies = simulate.default_strategies(design, m=5, iterations=5,
                                             include=("complete_case", "multiple_imputation"))
    result = simulate.run_simulation(design, strategies, replicates=200, seed=21, mechanisms=("MAR",),
                                     strength=1.0, progress=False)
    perf = result.performance.set_index("strategy")
    mi = perf.loc["multiple_imputation"]
    # 200 replicates: coverage MCSE about 1.5 points; 3 MCSEs below 95% is about 90.4%.
    assert mi["coverage"] >= 0.95 - 3 * np.sqrt(0.95 * 0.05 / 200)
    assert mi["coverage"] <= 0.995
    assert abs(mi["bias"]) < 3 * mi["bias_mcse"]
    # Rubin's variance estimates the repeated-sampling variance: model SE close to empirical SE.
    assert mi["model_se"] == pytest.approx(mi["emp_se"], rel=0.15)


def test_results_do_not_depend_on_the_number_of_workers(complete_penguins):
    design = penguin_design(complete_penguins, {"body_mass_g": 0.3})
    strategies = simulate.default_strategies(design, include=("complete_case",))
    one = simulate.run_simulation(design, strategies, replicates=6, seed=3, n_jobs=1, progress=False)
    two = simulate.run_simulation(design, strategies, replicates=6, seed=3, n_jobs=2, progress=False)
    pd.testing.assert_frame_equal(one.performance, two.performance)


def test_rows_where_a_covariate_does_not_apply_are_left_out_of_the_simulated_population(complete_penguins):
    # A covariate that applies to one species only (not applicable elsewhere: NaN, but not missing).
    frame = complete_penguins.copy()
    gentoo = (frame["species"] == "Gentoo").to_numpy()
    frame["gentoo_bill"] = frame["bill_length_mm"].where(gentoo)
    missing = pd.DataFrame(False, index=frame.index, columns=frame.columns)  # nothing missing, only not applicable
    model = AnalysisModel(formula="body_mass_g ~ flipper_length_mm + gentoo_bill", exposure="flipper_length_mm")
    design = simulate.design_from_data(frame, model=model, mar_on=["bill_length_mm"], missing=missing)
    assert len(design.pool) == gentoo.sum()
    # the truth is statsmodels' fit on the rows where the covariate applies (statsmodels drops NaN rows itself)
    import statsmodels.formula.api as smf
    reference = smf.ols(model.formula, data=frame).fit().params["flipper_length_mm"]
    assert design.true_values["flipper_length_mm"] == pytest.approx(reference, rel=1e-10)
    replicate = simulate.simulate_complete(design, np.random.default_rng(3))
    assert not replicate[["gentoo_bill", "flipper_length_mm"]].isna().any().any()
    simulate.least_squares_for(design).design(replicate)  # the fast path builds its design without NaN


def test_poisson_model_with_an_offset_is_simulated_with_its_person_time():
    import statsmodels.api as sm
    import statsmodels.formula.api as smf

    rng = np.random.default_rng(11)
    n = 600
    frame = pd.DataFrame({"years": rng.uniform(0.5, 4.0, n), "x": rng.normal(0, 1, n),
                          "arm": pd.Categorical(rng.choice(["a", "b"], n))})
    frame["events"] = rng.poisson(frame["years"] * np.exp(-0.5 + 0.4 * (frame["arm"] == "b") + 0.3 * frame["x"]))
    frame["events"] = frame["events"].astype(float)
    model = AnalysisModel(formula="events ~ arm + x", family="poisson", exposure="arm", offset="years")
    design = simulate.design_from_data(frame, model=model, mar_on=["x"])
    # the truth is statsmodels' poisson fit with log(years) as the offset
    reference = smf.glm("events ~ arm + x", data=frame, family=sm.families.Poisson(),
                        offset=np.log(frame["years"])).fit()
    assert design.true_values["arm[T.b]"] == pytest.approx(reference.params["arm[T.b]"], rel=1e-8)
    assert design.linear_predictor == pytest.approx(np.asarray(reference.predict(which="linear")), rel=1e-8)
    design = dataclasses.replace(design, missing_fractions={"events": 0.3})
    strategies = simulate.default_strategies(design, m=2, iterations=2)
    result = simulate.run_simulation(design, strategies, replicates=30, seed=5, mechanisms=("MCAR",))
    perf = result.performance.set_index("strategy")
    # complete cases are unbiased under MCAR (Little & Rubin 2019, ch. 3): within 4 Monte Carlo SEs
    row = perf.loc["complete_case"]
    assert abs(row["bias"]) < 4 * row["bias_mcse"] + 1e-9


def test_a_study_too_small_to_simulate_from_is_an_input_error_saying_what_to_do(complete_penguins):
    # 15 complete_penguins: fewer complete rows than the 20 the generating fit needs (common practice, no source).
    small = complete_penguins.iloc[:15].reset_index(drop=True)
    model = AnalysisModel(formula="body_mass_g ~ flipper_length_mm + sex", exposure="flipper_length_mm")
    with pytest.raises(InputError, match=r"^simulation: only 15 rows .* leave the simulate stage out"):
        simulate.design_from_data(small, model=model, mar_on=["bill_length_mm"])
    # 40 penguins are enough
    assert len(simulate.design_from_data(complete_penguins.iloc[:40], model=model, mar_on=["bill_length_mm"]).pool) == 40
