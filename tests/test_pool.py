"""Rubin's rules, Barnard-Rubin degrees of freedom and the D1 Wald test, checked against the
published formulas and against statsmodels' own combining of the same per-imputation fits."""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
import statsmodels.formula.api as smf
from scipy import stats
from statsmodels.imputation.mice import MICE

from gapbook.errors import AnalysisError, InputError
from gapbook.models import fit_model
from gapbook.pool import barnard_rubin_df, pool_fits, rubin_pool, wald_d1

# A small fixed set of m = 4 estimates of 2 parameters and their squared standard errors.
ESTIMATES = np.array([[1.00, -0.20], [1.30, -0.10], [0.90, -0.25], [1.10, -0.05]])
VARIANCES = np.array([[0.040, 0.010], [0.050, 0.012], [0.045, 0.011], [0.042, 0.009]])


def test_rubin_rules_by_hand():
    rubin = rubin_pool(ESTIMATES, VARIANCES)
    m = 4
    for j in range(2):
        q = ESTIMATES[:, j]
        u = VARIANCES[:, j]
        qbar = sum(q) / m                                          # Rubin (1987) eq. 3.1.2
        ubar = sum(u) / m                                          # eq. 3.1.3
        b = sum((qi - qbar) ** 2 for qi in q) / (m - 1)            # eq. 3.1.4
        t = ubar + (1 + 1 / m) * b                                 # eq. 3.1.5
        r = (1 + 1 / m) * b / ubar                                 # relative increase in variance, eq. 3.1.7
        nu = (m - 1) * (1 + 1 / r) ** 2                            # eq. 3.1.6
        fmi = (r + 2 / (nu + 3)) / (r + 1)                         # Rubin (1987) eq. 3.1.10
        assert rubin.estimate[j] == pytest.approx(qbar, rel=1e-12)
        assert rubin.within[j] == pytest.approx(ubar, rel=1e-12)
        assert rubin.between[j] == pytest.approx(b, rel=1e-12)
        assert rubin.total[j] == pytest.approx(t, rel=1e-12)
        assert rubin.riv[j] == pytest.approx(r, rel=1e-12)
        assert rubin.df[j] == pytest.approx(nu, rel=1e-12)       # no complete-data df: large-sample value
        assert rubin.fmi[j] == pytest.approx(fmi, rel=1e-12)
    # worked numbers for parameter 1, computed by hand: qbar = 1.075, B = 0.0291667, W = 0.04425
    assert rubin.estimate[0] == pytest.approx(1.075)
    assert rubin.between[0] == pytest.approx(0.0875 / 3)
    assert rubin.total[0] == pytest.approx(0.04425 + 1.25 * 0.0875 / 3)


def test_barnard_rubin_df_published_formula():
    # Barnard & Rubin (1999) Biometrika 86:948, eqs. 2-3: nu_obs = (nu_com + 1)/(nu_com + 3) nu_com (1 - gamma),
    # 1/nu_BR = 1/nu_m + 1/nu_obs, gamma = (1 + 1/m) B / T, nu_m = (m - 1) / gamma^2.
    m, b, w, nu_com = 5, 0.02, 0.05, 30.0
    t = w + (1 + 1 / m) * b
    gamma = (1 + 1 / m) * b / t
    nu_m = (m - 1) / gamma ** 2
    nu_obs = (nu_com + 1) / (nu_com + 3) * nu_com * (1 - gamma)
    expected = 1 / (1 / nu_m + 1 / nu_obs)
    got = barnard_rubin_df(m, np.array([b]), np.array([t]), df_complete=nu_com)[0]
    assert got == pytest.approx(expected, rel=1e-12)
    # worked numbers: gamma = 0.024 / 0.074, nu_m = 38.03, nu_obs = 19.04, nu_BR = 12.69 (by hand)
    assert gamma == pytest.approx(0.324324, rel=1e-5)
    assert got == pytest.approx(12.69, abs=0.01)
    # properties stated in the paper: nu_BR never exceeds nu_com, and tends to Rubin's nu_m as nu_com grows
    assert got < nu_com
    assert barnard_rubin_df(m, np.array([b]), np.array([t]), df_complete=1e9)[0] == pytest.approx(nu_m, rel=1e-6)


def test_t_intervals_use_barnard_rubin_df(penguins):
    fits = _penguin_fits(penguins, m=5)
    pooled = pool_fits(fits)
    table = pooled.estimates().set_index("term")
    df = pooled.rubin.df
    se = np.sqrt(pooled.rubin.total)
    crit = stats.t.ppf(0.975, df)   # scipy reference quantiles
    assert np.allclose(table["ci_upper"] - table["estimate"], crit * se, rtol=1e-10)
    assert np.allclose(table["p_value"], 2 * stats.t.sf(np.abs(pooled.estimate() / se), df), rtol=1e-10)
    assert np.all(df < fits[0].df_resid)


def _penguin_fits(penguins: pd.DataFrame, m: int, family: str = "gaussian"):
    """m fits of one model to the penguins with sex filled by a seeded coin (a stand-in imputation)."""
    data = penguins.dropna(subset=["body_mass_g", "flipper_length_mm"]).reset_index(drop=True)
    rng = np.random.default_rng(11)
    fits = []
    for _ in range(m):
        frame = data.copy()
        missing = frame["sex"].isna()
        frame.loc[missing, "sex"] = rng.choice(["female", "male"], size=int(missing.sum()))
        frame["heavy"] = (frame["body_mass_g"] > 4200).astype(float)
        formula = ("body_mass_g ~ flipper_length_mm + sex + species" if family == "gaussian"
                   else "heavy ~ flipper_length_mm + sex")
        fits.append(fit_model(frame, formula=formula, family=family))
    return fits


def test_pooling_equals_statsmodels_combine(penguins):
    # statsmodels.imputation.mice.MICE.combine pools a list of fitted results with Rubin's rules
    data = penguins.dropna(subset=["body_mass_g", "flipper_length_mm"]).reset_index(drop=True)
    rng = np.random.default_rng(5)
    ours, theirs = [], []
    for _ in range(6):
        frame = data.copy()
        missing = frame["sex"].isna()
        frame.loc[missing, "sex"] = rng.choice(["female", "male"], size=int(missing.sum()))
        formula = "body_mass_g ~ flipper_length_mm + sex"
        ours.append(fit_model(frame, formula=formula))
        theirs.append(smf.ols(formula, frame).fit())
    combiner = MICE.__new__(MICE)
    combiner.results_list = theirs
    combiner.exog_names, combiner.endog_names, combiner.model_class = list(theirs[0].params.index), "y", sm.OLS
    reference = MICE.combine(combiner)
    pooled = pool_fits(ours)
    assert np.allclose(pooled.estimate(), reference.params, rtol=1e-10)
    assert np.allclose(pooled.rubin.total, np.diag(reference.cov_params()), rtol=1e-10)
    # statsmodels' 'fraction of missing information' is (1 + 1/m) B / T, our lambda
    assert np.allclose(pooled.rubin.lambda_, reference.frac_miss_info, rtol=1e-10)


def test_odds_ratios_pooled_on_log_scale(penguins):
    fits = _penguin_fits(penguins, m=5, family="binomial")
    pooled = pool_fits(fits)
    table = pooled.estimates()
    log_mean = np.mean([f.coefficients for f in fits], axis=0)
    assert np.allclose(table["estimate"], log_mean)
    assert np.allclose(table["exp_estimate"], np.exp(log_mean))      # exp of the pooled log odds ratio
    assert not np.allclose(table["exp_estimate"], np.mean([np.exp(f.coefficients) for f in fits], axis=0), rtol=1e-6)
    assert np.allclose(table["exp_ci_lower"], np.exp(table["ci_lower"]))
    assert set(table.columns) >= {"df", "fmi", "riv", "n_used", "converged"}


@pytest.mark.parametrize("family", ["gaussian", "binomial"])
def test_barnard_rubin_df_use_n_minus_p_for_every_family(family, penguins):
    # Barnard & Rubin (1999) Biometrika 86:948, eqs. 2-3, by hand, with nu_com = n - p for every family
    # (for a GLM, n - p as the complete-data df is common practice, no source).
    fits = _penguin_fits(penguins, m=5, family=family)
    pooled = pool_fits(fits)
    n, p, m = fits[0].nobs, len(fits[0].terms), 5
    nu_com = n - p
    assert pooled.df_complete == nu_com
    q = np.array([f.coefficients for f in fits])
    u = np.array([np.diag(f.covariance) for f in fits])
    b = q.var(axis=0, ddof=1)
    t = u.mean(axis=0) + (1 + 1 / m) * b
    gamma = (1 + 1 / m) * b / t
    nu_m = (m - 1) / gamma ** 2
    nu_obs = (nu_com + 1) / (nu_com + 3) * nu_com * (1 - gamma)
    expected = 1 / (1 / nu_m + 1 / nu_obs)
    table = pooled.estimates()
    assert np.allclose(table["df"], expected, rtol=1e-12)
    assert np.all(table["df"] < nu_com)   # never above the complete-data df (Barnard & Rubin 1999, sec. 3)
    # the single-term pooled Wald test is the square of the pooled t, on the same df
    k = list(fits[0].terms).index("flipper_length_mm")
    test = pooled.wald(["flipper_length_mm"])
    assert test.df_den == pytest.approx(table["df"][k], rel=1e-12)
    t_stat = table["estimate"][k] / table["std_error"][k]
    assert test.statistic == pytest.approx(t_stat ** 2, rel=1e-10)
    assert test.p_value == pytest.approx(table["p_value"][k], rel=1e-8)


def test_very_large_df_are_printed_as_such():
    from gapbook.inference import format_df

    # common practice, no source: past 1000 df the t and normal 97.5% quantiles agree to 0.0025 (scipy)
    assert stats.t.ppf(0.975, 1000) - stats.norm.ppf(0.975) < 0.0025
    assert format_df(38782635.2) == ">1000"
    assert format_df(float("inf")) == "infinite"
    assert format_df(12.6912) == "12.7" and format_df(245.4) == "245"
    # a pooled test with m = 2 nearly identical imputations: D1's df would be huge, the sentence says ">1000"
    est = np.array([[0.5, 1.0], [0.5 + 1e-6, 1.0]])
    cov = np.stack([np.diag([0.01, 0.02])] * 2)
    test = wald_d1(est, cov, [0, 1])
    assert test.df_den > 1000 and "F(2, >1000)" in test.sentences[0]


def test_d1_with_complete_data_df_never_exceeds_them():
    # The Barnard-Rubin harmonic rule carried over to k terms (common practice, no source): v <= v_obs < nu_com.
    est = ESTIMATES
    cov = np.stack([np.diag(v) for v in VARIANCES])
    large = wald_d1(est, cov, [0, 1])
    small = wald_d1(est, cov, [0, 1], df_complete=20.0)
    assert small.statistic == pytest.approx(large.statistic, rel=1e-12)
    nu = 20.0
    v_obs = (nu + 1) / (nu + 3) * nu / (1 + large.riv)
    assert small.df_den == pytest.approx(1 / (1 / large.df_den + 1 / v_obs), rel=1e-12)
    assert small.df_den < v_obs < nu and small.p_value > large.p_value


def test_d1_reduces_to_squared_t_for_one_parameter():
    # Li, Raghunathan & Rubin (1991) JASA 86:1065: with k = 1, D1 = qbar^2 / T, the square of Rubin's t
    cov = VARIANCES[:, :, None] * np.eye(2)[None]
    test = wald_d1(ESTIMATES, cov, [0])
    rubin = rubin_pool(ESTIMATES, VARIANCES)
    assert test.statistic == pytest.approx(rubin.estimate[0] ** 2 / rubin.total[0], rel=1e-12)


def test_d1_by_hand_two_parameters():
    rng = np.random.default_rng(3)
    m, k = 6, 2
    estimates = np.array([0.5, -0.3]) + rng.normal(0, 0.05, size=(m, k))
    base = np.array([[0.010, 0.002], [0.002, 0.008]])
    covariances = np.stack([base * (1 + 0.1 * i) for i in range(m)])
    test = wald_d1(estimates, covariances, [0, 1])
    # Li, Raghunathan & Rubin (1991), eqs. 1.11-1.13 written out
    qbar = estimates.mean(0)
    ubar = covariances.mean(0)
    b = sum(np.outer(e - qbar, e - qbar) for e in estimates) / (m - 1)
    r1 = (1 + 1 / m) * np.trace(b @ np.linalg.inv(ubar)) / k
    d1 = qbar @ np.linalg.inv(ubar) @ qbar / (k * (1 + r1))
    t = k * (m - 1)
    v1 = 4 + (t - 4) * (1 + (1 - 2 / t) / r1) ** 2
    assert test.statistic == pytest.approx(d1, rel=1e-12)
    assert test.df_den == pytest.approx(v1, rel=1e-12)
    assert test.p_value == pytest.approx(stats.f.sf(d1, k, v1), rel=1e-10)


def test_wald_for_categorical_exposure_terms(penguins):
    pooled = pool_fits(_penguin_fits(penguins, m=5))
    test = pooled.wald("species")
    assert set(test.terms) == {"species[T.Chinstrap]", "species[T.Gentoo]"} and test.df_num == 2
    assert test.p_value < 1e-10  # Gentoo penguins are far heavier at a given flipper length (known from the data)


def test_bad_pooling_input(penguins):
    with pytest.raises(InputError):
        pool_fits([])
    with pytest.raises(AnalysisError):
        wald_d1(ESTIMATES[:1], np.eye(2)[None], [0, 1])
    fits = _penguin_fits(penguins, m=2)
    other = fit_model(penguins, formula="body_mass_g ~ flipper_length_mm")
    with pytest.raises(AnalysisError):
        pool_fits([fits[0], other])


def test_a_term_missing_from_one_imputed_dataset_is_named_with_what_to_do(penguins):
    # Rubin's rules pool one estimate per term over every imputed dataset (Rubin 1987), so a
    # term that one completed dataset cannot estimate stops the pooling, naming the term.
    frame = penguins.dropna(subset=["body_mass_g", "species", "flipper_length_mm"])
    whole = fit_model(frame, formula="body_mass_g ~ species + flipper_length_mm")
    without_chinstrap = fit_model(frame[frame["species"] != "Chinstrap"],
                                  formula="body_mass_g ~ species + flipper_length_mm")
    with pytest.raises(AnalysisError) as caught:
        pool_fits([whole, without_chinstrap])
    message = str(caught.value)
    assert "imputed dataset 2 of 2" in message and "species[T.Chinstrap]" in message
    assert "merge rare categories" in message
