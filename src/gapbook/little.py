"""The EM algorithm for a multivariate normal sample with missing values, and Little's
test of missing completely at random that rests on it.

Both work on per-pattern sufficient statistics (:func:`group_patterns`), so the cost of
an EM iteration grows with the number of missingness patterns, not with the number of
rows. The mechanism stage (:mod:`gapbook.mechanism`) chooses the variables and words the
result; this module holds only the published methods.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any, Dict, List, Optional, Sequence, Tuple

import numpy as np
import pandas as pd
from scipy import linalg, stats

__all__ = ["MissingnessPatterns", "pattern_rows", "group_patterns", "SingularCovariance", "EMEstimate", "em_multivariate_normal",
           "LittleTest", "little_mcar_test"]

SINGULAR_EIGENVALUE = 1e-9  # on the correlation scale; below this the covariance is treated as singular


@dataclass(frozen=True)
class MissingnessPatterns:
    """Rows grouped by which variables they have observed, with per-pattern sufficient statistics.

    ``observed[j]`` is the boolean mask of pattern j; ``sums[j]`` and ``crossproducts[j]``
    are the sum and the sum of outer products of the observed values over its rows.
    """

    observed: Tuple[np.ndarray, ...]
    counts: np.ndarray
    sums: Tuple[np.ndarray, ...]
    crossproducts: Tuple[np.ndarray, ...]

    @property
    def n_rows(self) -> int:
        return int(self.counts.sum())


def pattern_rows(observed: np.ndarray) -> Tuple[np.ndarray, List[np.ndarray]]:
    """Group the rows of a boolean matrix by their pattern of True cells.

    The one grouping the EM here, the mixed model for repeated measures and the
    repeated-measures imputation share: each costs per pattern, not per row.

    Parameters
    ----------
    observed : (n, p) boolean matrix (True = observed).

    Returns
    -------
    masks : (J, p) boolean, one row per distinct pattern, in order of the patterns' integer keys.
    rows : list of J arrays of row positions (increasing), one per pattern.
    """
    observed = np.asarray(observed, dtype=bool)
    n, p = observed.shape
    if n == 0:
        return np.zeros((0, p), dtype=bool), []
    if p <= 62:
        # An integer key per row is far faster to group than rows of booleans.
        keys = observed.astype(np.int64) @ (np.int64(1) << np.arange(p, dtype=np.int64))
        _, first, inverse = np.unique(keys, return_index=True, return_inverse=True)
    else:
        _, first, inverse = np.unique(observed, axis=0, return_index=True, return_inverse=True)
    inverse = np.asarray(inverse).ravel()
    order = np.argsort(inverse, kind="stable")
    bounds = np.searchsorted(inverse[order], np.arange(len(first) + 1))
    return observed[first], [order[bounds[j]:bounds[j + 1]] for j in range(len(first))]


def group_patterns(values: np.ndarray) -> MissingnessPatterns:
    """Group the rows of a numeric matrix (NaN = missing) by pattern; rows with nothing observed are dropped.

    Parameters
    ----------
    values : ndarray, shape (n, p)
        The numeric matrix.

    Returns
    -------
    MissingnessPatterns
    """
    observed = ~np.isnan(values)
    keep = observed.any(axis=1)
    values, observed = values[keep], observed[keep]
    masks, counts, sums, cross = [], [], [], []
    for mask, rows in zip(*pattern_rows(observed)):
        block = values[np.ix_(rows, np.flatnonzero(mask))]
        masks.append(mask)
        counts.append(len(rows))
        sums.append(block.sum(axis=0))
        cross.append(block.T @ block)
    return MissingnessPatterns(observed=tuple(masks), counts=np.array(counts, dtype=float), sums=tuple(sums),
                               crossproducts=tuple(cross))


class SingularCovariance(Exception):
    """The covariance of the observed variables of some pattern is not positive definite."""


@dataclass(frozen=True)
class EMEstimate:
    """Maximum-likelihood mean and covariance of a multivariate normal with missing values.

    ``covariance`` uses the ML divisor n. ``loglik`` is the observed-data log-likelihood per
    iteration (it never decreases under EM; Dempster, Laird & Rubin 1977, theorem 1).
    """

    mean: pd.Series
    covariance: pd.DataFrame
    iterations: int
    converged: bool
    tolerance: float
    max_iterations: int
    loglik: Tuple[float, ...]


def _pattern_blocks(patterns: MissingnessPatterns) -> List[Tuple[Any, ...]]:
    """Per pattern: n, sums, cross-products and the index blocks, built once for all iterations."""
    blocks = []
    for mask, n, s, ss in zip(patterns.observed, patterns.counts, patterns.sums, patterns.crossproducts):
        o = np.flatnonzero(mask)
        m = np.flatnonzero(~mask)
        blocks.append((n, s, ss, o, m, np.ix_(o, o), np.ix_(o, m), np.ix_(m, o), np.ix_(m, m)))
    return blocks


def _pattern_step(blocks: Sequence[Tuple[Any, ...]], mu: np.ndarray, sigma: np.ndarray
                  ) -> Tuple[np.ndarray, np.ndarray, float]:
    """One E-step over patterns: expected sufficient statistics T1, T2 and the log-likelihood at (mu, sigma)."""
    p = len(mu)
    t1 = np.zeros(p)
    t2 = np.zeros((p, p))
    loglik = 0.0
    log_2pi = math.log(2 * math.pi)
    for n, s, ss, o, m, oo, om, mo, mm in blocks:
        sigma_oo = sigma[oo]
        try:
            # Cholesky both checks positive definiteness and gives the log-determinant.
            chol = np.linalg.cholesky(sigma_oo)
        except np.linalg.LinAlgError:
            raise SingularCovariance(o) from None
        mu_o = mu[o]
        # Centred scatter of the pattern's rows about mu_o, from its sufficient statistics.
        scatter = ss - np.outer(s, mu_o) - np.outer(mu_o, s) + n * np.outer(mu_o, mu_o)
        sigma_om = sigma[om]
        # One solve for both right-hand sides: Sigma_oo^-1 [Sigma_om, scatter] (no explicit inverse).
        solved = np.linalg.solve(sigma_oo, np.hstack([sigma_om, scatter]))
        k = len(m)
        log_det = 2.0 * np.sum(np.log(np.diag(chol)))
        loglik -= 0.5 * (n * (log_det + len(o) * log_2pi) + np.trace(solved[:, k:]))
        t1[o] += s
        t2[oo] += ss
        if k == 0:
            continue
        slope = solved[:, :k].T                                           # regression of y_m on y_o
        residual_cov = sigma[mm] - sigma_om.T @ solved[:, :k]
        intercept = mu[m] - slope @ mu_o
        slope_s = slope @ s
        t1[m] += n * intercept + slope_s
        cross = np.outer(intercept, s) + slope @ ss                       # sum of E[y_m] y_o'
        t2[mo] += cross
        t2[om] += cross.T
        t2[mm] += (n * np.outer(intercept, intercept) + np.outer(intercept, slope_s)
                   + np.outer(slope_s, intercept) + slope @ ss @ slope.T + n * residual_cov)
    return t1, t2, loglik


def _standardise(values: np.ndarray) -> Tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Centre and scale each column by its observed mean and SD, so sums of squares keep their precision."""
    centre = np.nanmean(values, axis=0)
    scale = np.nanstd(values, axis=0)
    scale = np.where(scale > 0, scale, 1.0)
    return (values - centre) / scale, centre, scale


def em_multivariate_normal(data: pd.DataFrame, *, tolerance: float = 1e-8, max_iterations: int = 1000) -> EMEstimate:
    """Maximum-likelihood mean and covariance of a multivariate normal sample with missing values, by EM.

    The E-step works on per-pattern sums and cross-products, so each iteration costs
    O(patterns x p^3) whatever the number of rows. Conditional regressions use Cholesky
    solves, never explicit inverses. Iteration runs on columns standardised by their
    observed mean and SD (the estimates are transformed back); it stops when no entry of
    the standardised mean or covariance changes by more than ``tolerance``.

    Parameters
    ----------
    data : numeric columns, NaN where missing; rows with every value missing are ignored.
    tolerance : convergence tolerance on the standardised scale.
    max_iterations : iteration cap; ``converged`` is False when it is reached.

    Returns
    -------
    EMEstimate (mean, covariance with divisor n, iterations, converged, log-likelihood path).
    Raises SingularCovariance when the covariance of some pattern's observed variables
    is not positive definite.

    References
    ----------
    Dempster AP, Laird NM, Rubin DB (1977). Maximum likelihood from incomplete data via the
    EM algorithm. JRSS B 39:1-38.
    Little RJA, Rubin DB (2002). Statistical Analysis with Missing Data, 2nd ed., Wiley,
    section 11.2 (EM for the multivariate normal; section number recalled from memory).
    """
    names = list(data.columns)
    raw = data.to_numpy(dtype=float)
    scaled, centre, scale = _standardise(raw)
    patterns = group_patterns(scaled)
    blocks = _pattern_blocks(patterns)
    p = raw.shape[1]
    n = patterns.n_rows
    # Start at available-case means and variances with no correlation: always positive definite.
    mu = np.zeros(p)
    sigma = np.diag(np.where(np.nanstd(raw, axis=0) > 0, 1.0, 0.0))
    history: List[float] = []
    converged = False
    iterations = 0
    for iterations in range(1, max_iterations + 1):
        t1, t2, loglik = _pattern_step(blocks, mu, sigma)
        history.append(loglik)
        new_mu = t1 / n
        new_sigma = t2 / n - np.outer(new_mu, new_mu)
        new_sigma = (new_sigma + new_sigma.T) / 2
        change = max(np.max(np.abs(new_mu - mu)), np.max(np.abs(new_sigma - sigma)))
        mu, sigma = new_mu, new_sigma
        if change < tolerance:
            converged = True
            break
    # Log-likelihood at the final estimates, on the original scale (Jacobian of the standardisation).
    observed_cells = np.array([np.sum(~np.isnan(raw[:, k])) for k in range(p)])
    _, _, final = _pattern_step(blocks, mu, sigma)
    history.append(final)
    jacobian = float(np.sum(observed_cells * np.log(scale)))
    mean = centre + scale * mu
    covariance = sigma * np.outer(scale, scale)
    return EMEstimate(mean=pd.Series(mean, index=names), covariance=pd.DataFrame(covariance, index=names, columns=names),
                      iterations=iterations, converged=converged, tolerance=tolerance, max_iterations=max_iterations,
                      loglik=tuple(v - jacobian for v in history))


@dataclass(frozen=True)
class LittleTest:
    """Little's MCAR test: statistic, df, p-value, the EM fit it rests on and per-pattern parts.

    ``patterns`` has one row per missingness pattern used: n_rows, n_observed, the pattern's
    share of the statistic (``contribution``) and one 0/1 column per variable (1 = observed).
    ``notes`` explains variables left out, rows skipped, non-convergence or a singular covariance;
    ``left_out`` names the variables of the data the test did not use (the notes say why);
    ``sentences`` the test in words (the mechanism stage writes them).
    """

    statistic: float
    df: int
    p_value: float
    n_patterns: int
    variables: Tuple[str, ...]
    n_rows: int
    n_rows_skipped: int
    em: Optional[EMEstimate]
    patterns: pd.DataFrame
    notes: Tuple[str, ...] = field(default_factory=tuple)
    sentences: Tuple[str, ...] = ()
    left_out: Tuple[str, ...] = ()

    def tables(self) -> Dict[str, pd.DataFrame]:
        """``mcar_test`` (one row) and ``mcar_patterns`` (each pattern's part of the statistic)."""
        return {"mcar_test": self.as_row(), "mcar_patterns": self.patterns}

    def as_row(self) -> pd.DataFrame:
        """The test as the one-row table ``mcar_test.csv``."""
        em = self.em
        return pd.DataFrame([{
            "statistic": self.statistic, "df": self.df, "p_value": self.p_value, "n_patterns": self.n_patterns,
            "variables": ",".join(self.variables), "variables_left_out": ",".join(self.left_out),
            "em_iterations": em.iterations if em else 0,
            "em_converged": em.converged if em else False, "em_tolerance": em.tolerance if em else np.nan,
            "em_max_iterations": em.max_iterations if em else 0, "n_rows": self.n_rows,
            "n_rows_skipped": self.n_rows_skipped, "note": " ".join(self.notes),
        }])


def little_mcar_test(data: pd.DataFrame, *, tolerance: float = 1e-8, max_iterations: int = 1000,
                     notes: Sequence[str] = (), left_out: Sequence[str] = ()) -> LittleTest:
    """Little's test of missing completely at random for numeric variables.

    d^2 = sum_j n_j (ybar_j - mu_j)' Sigma_j^-1 (ybar_j - mu_j) over missingness patterns j,
    with mu and Sigma the maximum-likelihood (EM) estimates restricted to the variables
    observed in pattern j; under MCAR and multivariate normality d^2 is approximately
    chi-square with df = sum_j p_j - p. Rows with every variable missing are skipped. A
    singular covariance gives NaN with an explanation in ``notes`` rather than an error.

    Parameters
    ----------
    data : numeric columns (binary as 0/1), NaN where missing.
    tolerance, max_iterations : passed to :func:`em_multivariate_normal`.
    notes : explanations from variable selection to carry in the result.
    left_out : the names of the variables the selection left out, to carry in the result.

    Returns
    -------
    LittleTest.

    References
    ----------
    Little RJA (1988). A test of missing completely at random for multivariate data with
    missing values. JASA 83:1198-1202.
    """
    names = tuple(data.columns)
    values = data.to_numpy(dtype=float)
    observed = ~np.isnan(values)
    all_missing = ~observed.any(axis=1)
    n_skipped = int(all_missing.sum())
    notes = list(notes)
    if n_skipped:
        notes.append(f"{n_skipped} rows with every test variable missing were skipped.")
    n_rows = int(len(values) - n_skipped)
    empty_patterns = pd.DataFrame(columns=["n_rows", "n_observed", "contribution", *names])
    if len(names) == 0 or n_rows == 0:
        notes.append("No variable with observed values: Little's test was not computed.")
        return LittleTest(np.nan, 0, np.nan, 0, names, n_rows, n_skipped, None, empty_patterns, tuple(notes),
                          left_out=tuple(left_out))
    try:
        em = em_multivariate_normal(data, tolerance=tolerance, max_iterations=max_iterations)
    except SingularCovariance as exc:
        notes.append(_singular_note(data, [names[k] for k in exc.args[0]]))
        return LittleTest(np.nan, 0, np.nan, 0, names, n_rows, n_skipped, None, empty_patterns, tuple(notes),
                          left_out=tuple(left_out))
    if not em.converged:
        notes.append(f"EM did not converge in {em.max_iterations} iterations (tolerance {em.tolerance:g}); "
                     "the statistic uses the last estimates. Raise mechanism.em_max_iterations.")
    dependence = _dependence(em.covariance)
    if dependence:
        notes.append(_singular_note(data, dependence))
        return LittleTest(np.nan, 0, np.nan, 0, names, n_rows, n_skipped, em, empty_patterns, tuple(notes),
                          left_out=tuple(left_out))
    mu = em.mean.to_numpy()
    sigma = em.covariance.to_numpy()
    patterns = group_patterns(values)
    statistic = 0.0
    df = 0
    rows = []
    for mask, n, s in zip(patterns.observed, patterns.counts, patterns.sums):
        o = np.flatnonzero(mask)
        difference = s / n - mu[o]
        factor = linalg.cho_factor(sigma[np.ix_(o, o)], lower=True, check_finite=False)
        part = float(n * difference @ linalg.cho_solve(factor, difference, check_finite=False))
        statistic += part
        df += len(o)
        rows.append({"n_rows": int(n), "n_observed": len(o), "contribution": part,
                     **{name: int(flag) for name, flag in zip(names, mask)}})
    df -= len(names)
    table = pd.DataFrame(rows, columns=empty_patterns.columns).sort_values(
        "n_rows", ascending=False, kind="stable").reset_index(drop=True)
    if df == 0:
        # One pattern with everything observed: the sample means are the ML means, d^2 = 0.
        notes.append("Only one missingness pattern: there is nothing to compare (statistic 0, df 0).")
        return LittleTest(0.0, 0, np.nan, len(rows), names, n_rows, n_skipped, em, table, tuple(notes),
                          left_out=tuple(left_out))
    p_value = float(stats.chi2.sf(statistic, df))
    return LittleTest(float(statistic), int(df), p_value, len(rows), names, n_rows, n_skipped, em, table,
                      tuple(notes), left_out=tuple(left_out))


def _dependence(covariance: pd.DataFrame) -> List[str]:
    """Variables in a (near-)linear dependence, or [] when the covariance is safely positive definite."""
    sd = np.sqrt(np.clip(np.diag(covariance.to_numpy()), 0, None))
    names = list(covariance.columns)
    constant = [name for name, s in zip(names, sd) if s <= 0]
    if constant:
        return constant
    correlation = covariance.to_numpy() / np.outer(sd, sd)
    values, vectors = np.linalg.eigh(correlation)
    if values[0] > SINGULAR_EIGENVALUE * max(values[-1], 1.0):
        return []
    loading = np.abs(vectors[:, 0])
    return [names[k] for k in np.argsort(-loading) if loading[k] > 0.1]


def _singular_note(data: pd.DataFrame, involved: Sequence[str]) -> str:
    listed = ", ".join(involved) if involved else ", ".join(data.columns)
    return (f"Little's test was not computed: the covariance of {listed} is singular (a variable is constant "
            "where observed, or is an exact linear combination of others, e.g. a total and its parts). "
            "Choose the test variables with mechanism.variables, leaving one of them out.")
