"""Combining the analysis model fitted to each imputed dataset: Rubin's rules.

Each completed dataset gives estimates and a covariance matrix. Rubin's rules combine
them into one estimate whose variance adds the spread between imputations to the average
variance within them; the t reference distribution uses the small-sample degrees of
freedom of Barnard & Rubin (1999). Odds and rate ratios are pooled on the log scale (the
model's own coefficients) and exponentiated afterwards. Several terms of one categorical
exposure are tested together with the pooled Wald test D1 of Li, Raghunathan & Rubin (1991).
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Dict, Optional, Sequence, Tuple, Union

import numpy as np
import pandas as pd
from scipy import stats

from .errors import AnalysisError, InputError
from .inference import format_df, format_p, wald_inference
from .models import ModelFit, add_ratio_columns, exposure_terms, scale_sentence

__all__ = ["barnard_rubin_df", "rubin_pool", "WaldTest", "wald_d1", "PooledResult", "pool_fits"]

STRATEGY = "multiple_imputation"  # the vocabulary's name for this strategy (gapbook.vocabulary.STRATEGIES)


@dataclass(frozen=True)
class RubinPooled:
    """Rubin's rules for each parameter: arrays of length p (one entry per term)."""

    estimate: np.ndarray
    within: np.ndarray
    between: np.ndarray
    total: np.ndarray
    riv: np.ndarray
    lambda_: np.ndarray
    df: np.ndarray
    fmi: np.ndarray
    m: int


def barnard_rubin_df(m: int, between: np.ndarray, total: np.ndarray, *,
                     df_complete: Optional[float] = None) -> np.ndarray:
    """Degrees of freedom for the t reference of a pooled scalar estimate.

    Parameters
    ----------
    m : number of imputations.
    between, total : between-imputation and total variance per parameter.
    df_complete : the complete-data degrees of freedom n - p (for a GLM, n - p is common
        practice, no source); None gives Rubin's (1987) large-sample value, which grows without
        bound as the imputations agree and is not what gapbook reports.

    Returns
    -------
    Array of degrees of freedom (inf where the imputations agree exactly).

    References
    ----------
    Rubin DB (1987). Multiple Imputation for Nonresponse in Surveys. Wiley, eq. 3.1.6.
    Barnard J, Rubin DB (1999). Small-sample degrees of freedom with multiple imputation.
    Biometrika 86:948-955.
    """
    between = np.asarray(between, dtype=float)
    total = np.asarray(total, dtype=float)
    lam = np.where(total > 0, (1 + 1 / m) * between / np.where(total > 0, total, 1.0), 0.0)
    with np.errstate(divide="ignore"):
        df_old = np.where(lam > 0, (m - 1) / np.where(lam > 0, lam, 1.0) ** 2, np.inf)
    if df_complete is None or not np.isfinite(df_complete):
        return df_old
    nu = float(df_complete)
    df_observed = (nu + 1) / (nu + 3) * nu * (1 - lam)
    with np.errstate(divide="ignore", invalid="ignore"):
        combined = np.where(np.isinf(df_old), df_observed, df_old * df_observed / (df_old + df_observed))
    return combined


def rubin_pool(estimates: np.ndarray, variances: np.ndarray, *, df_complete: Optional[float] = None) -> RubinPooled:
    """Pool m estimates of p parameters with Rubin's rules.

    Parameters
    ----------
    estimates : array (m, p) of per-imputation estimates.
    variances : array (m, p) of their squared standard errors.
    df_complete : complete-data degrees of freedom (None for large-sample models).

    Returns
    -------
    RubinPooled with the pooled estimate, within (W), between (B) and total (T = W + (1 + 1/m) B)
    variance, relative increase in variance r = (1 + 1/m) B / W, lambda = (1 + 1/m) B / T,
    Barnard-Rubin df and the fraction of missing information (r + 2 / (nu + 3)) / (r + 1)
    with nu = (m - 1)(1 + 1/r)^2.

    References
    ----------
    Rubin DB (1987). Multiple Imputation for Nonresponse in Surveys. Wiley, ch. 3.
    Barnard J, Rubin DB (1999). Biometrika 86:948-955.
    """
    estimates = np.atleast_2d(np.asarray(estimates, dtype=float))
    variances = np.atleast_2d(np.asarray(variances, dtype=float))
    if estimates.shape != variances.shape:
        raise AnalysisError(f"pooling: estimates {estimates.shape} and variances {variances.shape} differ in shape")
    m = estimates.shape[0]
    if m < 1:
        raise InputError("at least one imputed dataset is needed to pool; set m to 1 or more", option="m")
    estimate = estimates.mean(axis=0)
    within = variances.mean(axis=0)
    between = estimates.var(axis=0, ddof=1) if m > 1 else np.zeros_like(estimate)
    total = within + (1 + 1 / m) * between
    with np.errstate(divide="ignore", invalid="ignore"):
        riv = np.where(within > 0, (1 + 1 / m) * between / within, np.where(between > 0, np.inf, 0.0))
        lam = np.where(total > 0, (1 + 1 / m) * between / total, 0.0)
        df_old = np.where(lam > 0, (m - 1) / np.where(lam > 0, lam, 1.0) ** 2, np.inf)
        fmi = np.where(np.isfinite(df_old), (riv + 2 / (df_old + 3)) / (riv + 1), 0.0)
    df = barnard_rubin_df(m, between, total, df_complete=df_complete)
    return RubinPooled(estimate=estimate, within=within, between=between, total=total, riv=riv, lambda_=lam,
                       df=df, fmi=fmi, m=m)


@dataclass(frozen=True)
class WaldTest:
    """A pooled multi-parameter Wald test (D1): statistic, numerator and denominator df, p-value.

    ``sentences`` holds the test in words; :meth:`tables` gives ``imputation_exposure_test``.
    """

    terms: Tuple[str, ...]
    statistic: float
    df_num: int
    df_den: float
    p_value: float
    riv: float
    sentences: Tuple[str, ...] = ()

    def as_row(self) -> pd.DataFrame:
        """The test as a one-row table."""
        return pd.DataFrame([{"test": "pooled Wald (D1)", "terms": " + ".join(self.terms), "statistic": self.statistic,
                              "df_num": self.df_num, "df_den": self.df_den, "p_value": self.p_value,
                              "riv": self.riv}])

    def tables(self) -> Dict[str, pd.DataFrame]:
        """The record table of the exposure's pooled test."""
        return {"imputation_exposure_test": self.as_row()}


def wald_d1(estimates: np.ndarray, covariances: np.ndarray, index: Sequence[int], *,
            terms: Optional[Sequence[str]] = None, null: Optional[np.ndarray] = None,
            df_complete: Optional[float] = None) -> WaldTest:
    """Pooled Wald test that k parameters are jointly equal to ``null`` (default zero).

    Parameters
    ----------
    estimates : (m, p) per-imputation estimates.
    covariances : (m, p, p) per-imputation covariance matrices.
    index : positions of the k tested parameters.
    terms : their names, for the result.
    null : hypothesised values (length k), default zeros.
    df_complete : the complete-data df n - p, or None for the large-sample reference.

    Returns
    -------
    WaldTest with D1 = (Qbar - Q0)' Ubar^-1 (Qbar - Q0) / (k (1 + r1)),
    r1 = (1 + 1/m) tr(B Ubar^-1) / k, referred to F(k, v). For k = 1, D1 is the square of the
    pooled t statistic and v its Barnard-Rubin df, so the test and the estimates table agree.
    For k > 1, v1 = 4 + (t - 4)(1 + (1 - 2/t) / r1)^2 when t = k (m - 1) > 4, else
    t (1 + 1/k)(1 + 1/r1)^2 / 2 (Li et al. 1991); with ``df_complete`` it is combined with
    the observed-data df as Barnard & Rubin (1999) do for one parameter,
    1/v = 1/v1 + 1/v_obs with v_obs = (nu + 1)/(nu + 3) nu / (1 + r1) (the same rule carried
    over to k parameters: common practice, no source; Reiter 2007, Biometrika 94:502-508,
    derives a closer small-sample df, citation recalled from memory).

    References
    ----------
    Li KH, Raghunathan TE, Rubin DB (1991). Large-sample significance levels from multiply
    imputed data using moment-based statistics and an F reference distribution. JASA 86:1065-1073.
    Barnard J, Rubin DB (1999). Small-sample degrees of freedom with multiple imputation.
    Biometrika 86:948-955.
    """
    index = list(index)
    k = len(index)
    if k == 0:
        raise InputError("no model term to test", option="exposure")
    estimates = np.atleast_2d(np.asarray(estimates, dtype=float))[:, index]
    covariances = np.asarray(covariances, dtype=float)[:, index][:, :, index]
    m = estimates.shape[0]
    if m < 2:
        raise AnalysisError("the pooled Wald test needs at least two imputed datasets; raise imputation.m")
    qbar = estimates.mean(axis=0) - (np.zeros(k) if null is None else np.asarray(null, dtype=float))
    ubar = covariances.mean(axis=0)
    between = np.cov(estimates.T, ddof=1).reshape(k, k)
    ubar_inv = np.linalg.inv(ubar)
    r1 = (1 + 1 / m) * float(np.trace(between @ ubar_inv)) / k
    statistic = float(qbar @ ubar_inv @ qbar) / (k * (1 + r1))
    if k == 1:
        total = float(ubar[0, 0]) * (1 + r1)
        v1 = float(barnard_rubin_df(m, np.array([float(between[0, 0])]), np.array([total]),
                                    df_complete=df_complete)[0])
    else:
        t = k * (m - 1)
        if r1 <= 0:
            v1 = np.inf
        elif t > 4:
            v1 = 4 + (t - 4) * (1 + (1 - 2 / t) / r1) ** 2
        else:
            v1 = t * (1 + 1 / k) * (1 + 1 / r1) ** 2 / 2
        if df_complete is not None and np.isfinite(df_complete):
            nu = float(df_complete)
            v_observed = (nu + 1) / (nu + 3) * nu / (1 + max(r1, 0.0))
            v1 = v_observed if not np.isfinite(v1) else 1 / (1 / v1 + 1 / v_observed)
    p_value = float(stats.f.sf(statistic, k, v1)) if np.isfinite(v1) else float(stats.chi2.sf(statistic * k, k))
    names = tuple(terms) if terms is not None else tuple(str(i) for i in index)
    sentence = (f"Pooled Wald test (D1; Li, Raghunathan & Rubin 1991) that every term of {', '.join(names)} is "
                f"zero: F({k}, {format_df(v1)}) = {statistic:.2f}, {format_p(p_value)}"
                + (" (denominator df above 1000: the reference is practically chi-square)"
                   if format_df(v1).startswith(">") else "") + ".")
    return WaldTest(terms=names, statistic=statistic, df_num=k, df_den=float(v1), p_value=p_value, riv=r1,
                    sentences=(sentence,))


@dataclass(frozen=True)
class PooledResult:
    """The analysis model pooled over m imputed datasets with Rubin's rules.

    ``coefficients`` (m, p) and ``covariances`` (m, p, p) are the per-imputation fits and
    ``rubin`` their pooled summary per term. :meth:`estimates` gives the ``estimates.csv``
    rows (strategy, term, estimate, std_error, ci_lower, ci_upper, p_value, n_used, df, fmi,
    riv, exp_estimate, exp_ci_lower, exp_ci_upper (the odds or rate ratio for binomial and
    poisson models, pooled on the log scale and exponentiated; empty for gaussian) and
    converged (every one of the m fits converged)); :meth:`variances` the per-term within,
    between and total variances. ``df_complete`` is n - p whatever the family.
    """

    terms: Tuple[str, ...]
    coefficients: np.ndarray
    covariances: np.ndarray
    rubin: RubinPooled
    df_complete: Optional[float]
    nobs: int
    m: int
    family: str = "gaussian"
    alpha: float = 0.05
    formula: str = ""
    strategy: str = STRATEGY
    sentences: Tuple[str, ...] = ()
    converged: Tuple[bool, ...] = ()

    def all_converged(self) -> bool:
        """Whether the model fit to every imputed dataset converged."""
        return all(self.converged)

    def estimate(self) -> np.ndarray:
        """The pooled estimate per term."""
        return self.rubin.estimate

    def std_error(self) -> np.ndarray:
        """The pooled standard error per term: the square root of the total variance."""
        return np.sqrt(self.rubin.total)

    def estimates(self) -> pd.DataFrame:
        """Rows for ``estimates.csv``: t-based intervals and p-values with Barnard-Rubin df."""
        pooled = self.rubin
        se = np.sqrt(pooled.total)
        df = pooled.df
        lower, upper, p = wald_inference(pooled.estimate, se, df, self.alpha)
        frame = pd.DataFrame({
            "strategy": self.strategy, "term": list(self.terms), "estimate": pooled.estimate, "std_error": se,
            "ci_lower": lower, "ci_upper": upper, "p_value": p,
            "n_used": self.nobs, "df": df, "fmi": pooled.fmi, "riv": pooled.riv,
        })
        return add_ratio_columns(frame, self.family).assign(converged=self.all_converged())

    def variances(self) -> pd.DataFrame:
        """Per term: within, between and total variance, riv, between_share, df and fmi.

        ``between_share`` is (1 + 1/m) B / T, the share of the total variance that comes from
        the spread between imputations (Rubin 1987).
        """
        pooled = self.rubin
        return pd.DataFrame({"term": list(self.terms), "within": pooled.within, "between": pooled.between,
                             "total": pooled.total, "riv": pooled.riv, "between_share": pooled.lambda_,
                             "df": pooled.df, "fmi": pooled.fmi})

    def per_imputation(self) -> pd.DataFrame:
        """Long table: imputation (0-based), term, estimate, std_error."""
        m, p = self.coefficients.shape
        se = np.sqrt(np.diagonal(self.covariances, axis1=1, axis2=2))
        return pd.DataFrame({"imputation": np.repeat(np.arange(m), p), "term": list(self.terms) * m,
                             "estimate": self.coefficients.ravel(), "std_error": se.ravel()})

    def tables(self) -> Dict[str, pd.DataFrame]:
        """``estimates`` (this strategy's rows) and ``imputation_variances``."""
        return {"estimates": self.estimates(), "imputation_variances": self.variances()}

    def wald(self, exposure: Union[str, Sequence[str], None]) -> WaldTest:
        """D1 test that every term of ``exposure`` (a variable, a term, or a list of terms) is zero."""
        if exposure is None or isinstance(exposure, str):
            chosen = exposure_terms(self.terms, exposure)
        else:
            chosen = [t for t in exposure if t in self.terms]
            if len(chosen) != len(list(exposure)):
                missing = [t for t in exposure if t not in self.terms]
                raise InputError(f"{', '.join(missing)} is not a model term ({', '.join(self.terms)})",
                                 option="exposure")
        index = [self.terms.index(t) for t in chosen]
        return wald_d1(self.coefficients, self.covariances, index, terms=chosen, df_complete=self.df_complete)


def pool_fits(fits: Sequence[ModelFit], *, strategy: str = STRATEGY) -> PooledResult:
    """Pool analysis-model fits (one per completed dataset) with Rubin's rules.

    Parameters
    ----------
    fits : ModelFit objects from ``gapbook.models.fit_model``, all with the same terms.
    strategy : label for the ``strategy`` column.

    Returns
    -------
    PooledResult.

    References
    ----------
    Rubin DB (1987). Multiple Imputation for Nonresponse in Surveys. Wiley.
    """
    fits = list(fits)
    if not fits:
        raise InputError("no imputed datasets to pool; set m to 1 or more", option="m")
    terms = fits[0].terms
    for i, fit in enumerate(fits):
        if fit.terms != terms:
            extra = sorted(set(fit.terms) ^ set(terms))
            raise AnalysisError(f"imputed dataset {i + 1} of {len(fits)} lacks or adds model term(s) {', '.join(extra)} "
                                "(a category empty there, or a column constant or aliased there, so Rubin's rules "
                                "cannot pool it); merge rare categories of that variable or drop it from the formula")
    coefficients = np.vstack([f.coefficients for f in fits])
    covariances = np.stack([f.covariance for f in fits])
    # Barnard & Rubin's complete-data df: n - p for every family (for a GLM common practice, no source)
    df_complete = fits[0].complete_data_df()
    nobs = int(round(float(np.mean([f.nobs for f in fits]))))
    converged = tuple(bool(f.converged) for f in fits)
    failed = len(converged) - sum(converged)
    sentences = (scale_sentence(fits[0].family),) + (() if not failed else (
        f"The model did not converge in {failed} of the {len(fits)} imputed datasets; the pooled "
        "estimates include those fits and are not reliable until the model is simplified.",))
    rubin = rubin_pool(coefficients, np.diagonal(covariances, axis1=1, axis2=2), df_complete=df_complete)
    return PooledResult(terms=tuple(terms), coefficients=coefficients, covariances=covariances, rubin=rubin,
                        df_complete=df_complete, nobs=nobs, m=len(fits), family=fits[0].family, alpha=fits[0].alpha,
                        formula=fits[0].formula, strategy=strategy, converged=converged, sentences=sentences)
