"""Evidence on the missingness mechanism: group comparisons, Little's test, missingness models.

What the data can and cannot say: a test can give evidence *against* "missing completely
at random" (MCAR) by showing that missingness is related to observed values. No test on
the observed data can tell "missing at random" (MAR) from "missing not at random" (MNAR),
because that would need the values that are missing. Every sentence this module writes
(:func:`summary_sentences`) keeps to that wording and points to the sensitivity stage.

Three pieces of evidence:

1. :func:`compare_groups` compares each variable between the rows where an incomplete
   variable is missing and the rows where it is observed (Welch t-test, chi-square or
   Fisher's exact test, standardised differences, Holm-adjusted p-values).
2. :func:`little_mcar_test` is Little's (1988) test on maximum-likelihood estimates from
   the EM algorithm for the multivariate normal (:func:`em_multivariate_normal`), which
   works on per-pattern sufficient statistics so its cost per iteration does not grow
   with the number of rows.
3. :func:`missingness_models` fits a logistic regression of each missingness indicator
   on the fully observed variables, with odds ratios and the area under the ROC curve.

"Not applicable" cells (outside a variable's ``applies_if`` condition) are neither
missing nor observed: they are left out of every comparison.
"""
from __future__ import annotations

import math
import re
import warnings
from dataclasses import dataclass, field
from typing import Any, Dict, List, Mapping, Optional, Sequence, Tuple

import numpy as np
import pandas as pd
from scipy import linalg, stats

from .errors import InputError, did_you_mean

NUMERIC_TYPES = ("continuous", "count")
CATEGORICAL_TYPES = ("binary", "nominal", "ordinal")
MCAR_TYPES = ("continuous", "count", "binary")
QUANTILE_GRID = np.linspace(0.0, 1.0, 101)
MIN_EXPECTED_COUNT = 5.0  # Cochran (1954): chi-square is unreliable below 5 expected per cell
SINGULAR_EIGENVALUE = 1e-9  # on the correlation scale; below this the covariance is treated as singular

GROUP_COLUMNS = ("incomplete_variable", "compared_variable", "test", "statistic", "df", "p_value", "p_adjusted",
                 "smd", "n_missing_group", "n_observed_group", "mean_missing_group", "mean_observed_group",
                 "distribution_missing_group", "distribution_observed_group", "evidence", "note")
MODEL_COLUMNS = ("incomplete_variable", "term", "coefficient", "std_error", "odds_ratio", "ci_lower", "ci_upper",
                 "p_value", "auc", "lr_p_value", "n_used", "n_missing", "note")


# ---------------------------------------------------------------------------
# small helpers

def format_p(p: float) -> str:
    """A p-value as text for sentences: 'p < 0.001', 'p = 0.012', 'p = 0.43'."""
    if p is None or not np.isfinite(p):
        return "p not available"
    if p < 0.001:
        return "p < 0.001"
    return f"p = {p:.3f}" if p < 0.1 else f"p = {p:.2f}"


def _missing_frame(data: pd.DataFrame, missing: Optional[pd.DataFrame]) -> pd.DataFrame:
    return data.isna() if missing is None else missing.reindex(columns=data.columns, fill_value=False)


def _not_applicable_frame(data: pd.DataFrame, not_applicable: Optional[pd.DataFrame]) -> pd.DataFrame:
    if not_applicable is None:
        return pd.DataFrame(False, index=data.index, columns=data.columns)
    return not_applicable.reindex(columns=data.columns, fill_value=False)


def _type_of(types: Mapping[str, str], column: str, values: pd.Series) -> str:
    known = types.get(column)
    if known is not None:
        return known
    return "continuous" if pd.api.types.is_numeric_dtype(values) else "nominal"


def _levels_of(values: pd.Series) -> List[Any]:
    if isinstance(values.dtype, pd.CategoricalDtype):
        return list(values.cat.categories)
    return sorted(values.dropna().unique())


def _level_text(level: Any) -> str:
    return f"{level:g}" if isinstance(level, (float, np.floating)) else str(level)


def binary_codes(values: pd.Series) -> pd.Series:
    """A binary variable as 0/1 floats (second level = 1); numbers already 0/1 stay as they are."""
    if isinstance(values.dtype, pd.CategoricalDtype):
        codes = values.cat.codes.to_numpy().astype(float)
        codes[codes < 0] = np.nan
        return pd.Series(codes, index=values.index, name=values.name)
    numbers = values.astype(float)
    levels = sorted(numbers.dropna().unique())
    if levels and set(levels) <= {0.0, 1.0}:
        return numbers
    # Other two-valued codings (e.g. 1/2): the larger value becomes 1.
    return numbers.map({v: float(i) for i, v in enumerate(levels)}).astype(float)


# ---------------------------------------------------------------------------
# 1. group comparisons

@dataclass(frozen=True)
class GroupComparison:
    """Each variable compared between rows with an incomplete variable missing and observed.

    ``table`` is ``mechanism_groups.csv``. ``quantiles`` (continuous compared variables:
    incomplete_variable, compared_variable, group, probability, value) and ``level_shares``
    (categorical: incomplete_variable, compared_variable, group, level, count, share) hold
    the two distributions for figures; ``group`` is "missing" or "observed".
    """

    table: pd.DataFrame
    quantiles: pd.DataFrame
    level_shares: pd.DataFrame
    alpha: float

    def strongest(self, top: int = 6) -> pd.DataFrame:
        """The rows with the smallest p-values (ranked on the unadjusted p, whose order Holm keeps but
        whose ties at 1 it does not make; further ties broken by the larger |SMD|)."""
        tested = self.table[self.table["p_adjusted"].notna()]
        order = tested.assign(_abs=tested["smd"].abs().fillna(0.0)).sort_values(
            ["p_value", "_abs"], ascending=[True, False], kind="stable")
        return order.drop(columns="_abs").head(top).reset_index(drop=True)


def smd_continuous(missing_values: np.ndarray, observed_values: np.ndarray) -> float:
    """Standardised mean difference (missing minus observed) over the pooled SD sqrt((s1^2+s0^2)/2).

    References
    ----------
    Austin PC (2009). Balance diagnostics for comparing the distribution of baseline
    covariates between treatment groups in propensity-score matched samples. Stat Med 28:3083-3107.
    """
    if len(missing_values) < 2 or len(observed_values) < 2:
        return float("nan")
    pooled = math.sqrt((np.var(missing_values, ddof=1) + np.var(observed_values, ddof=1)) / 2)
    if pooled <= 0:
        return float("nan")
    return float((np.mean(missing_values) - np.mean(observed_values)) / pooled)


def smd_categorical(missing_counts: np.ndarray, observed_counts: np.ndarray) -> float:
    """Standardised difference of two distributions over levels (signed for two levels).

    Two levels: (p1 - p0) / sqrt((p1(1-p1) + p0(1-p0)) / 2) with p the share of the second
    level (Austin 2009). More levels: the Mahalanobis form sqrt(T' S^-1 T) over all levels
    but the first, T the share differences, S the mean of the two multinomial covariances
    (Yang & Dalton 2012); it is unsigned.

    References
    ----------
    Austin PC (2009). Stat Med 28:3083-3107.
    Yang D, Dalton JE (2012). A unified approach to measuring the effect size between two
    groups using SAS. SAS Global Forum, paper 335-2012.
    """
    n1, n0 = missing_counts.sum(), observed_counts.sum()
    if n1 == 0 or n0 == 0 or len(missing_counts) < 2:
        return float("nan")
    p1, p0 = missing_counts / n1, observed_counts / n0
    if len(p1) == 2:
        spread = (p1[1] * (1 - p1[1]) + p0[1] * (1 - p0[1])) / 2
        return float((p1[1] - p0[1]) / math.sqrt(spread)) if spread > 0 else float("nan")
    t = (p1 - p0)[1:]
    q1, q0 = p1[1:], p0[1:]
    spread = (np.diag(q1) - np.outer(q1, q1) + np.diag(q0) - np.outer(q0, q0)) / 2
    try:
        solved = np.linalg.solve(spread, t)
    except np.linalg.LinAlgError:
        return float("nan")
    value = float(t @ solved)
    return math.sqrt(value) if value >= 0 else float("nan")


def _empty_row(v: str, w: str, n1: int, n0: int, note: str) -> Dict[str, Any]:
    return {"incomplete_variable": v, "compared_variable": w, "test": "not tested", "statistic": np.nan,
            "df": np.nan, "p_value": np.nan, "smd": np.nan, "n_missing_group": n1, "n_observed_group": n0,
            "mean_missing_group": np.nan, "mean_observed_group": np.nan, "distribution_missing_group": "",
            "distribution_observed_group": "", "note": note}


def _compare_continuous(v: str, w: str, x1: np.ndarray, x0: np.ndarray) -> Dict[str, Any]:
    n1, n0 = len(x1), len(x0)
    if n1 < 2 or n0 < 2:
        row = _empty_row(v, w, n1, n0, f"fewer than 2 values of {w} in a group")
    elif np.var(x1) == 0 and np.var(x0) == 0:
        row = _empty_row(v, w, n1, n0, f"{w} does not vary within either group")
    else:
        # Welch's t-test: the two groups need not share a variance (Welch 1947, Biometrika 34:28).
        result = stats.ttest_ind(x1, x0, equal_var=False)
        row = _empty_row(v, w, n1, n0, "")
        row.update(test="Welch t-test", statistic=float(result.statistic), df=float(result.df),
                   p_value=float(result.pvalue), smd=smd_continuous(x1, x0))
    row.update(mean_missing_group=float(np.mean(x1)) if n1 else np.nan,
               mean_observed_group=float(np.mean(x0)) if n0 else np.nan,
               distribution_missing_group=_mean_sd_text(x1), distribution_observed_group=_mean_sd_text(x0))
    return row


def _mean_sd_text(x: np.ndarray) -> str:
    if len(x) == 0:
        return ""
    if len(x) == 1:
        return f"mean {x[0]:.4g}"
    return f"mean {np.mean(x):.4g} (SD {np.std(x, ddof=1):.3g})"


def _shares_text(levels: Sequence[Any], counts: np.ndarray) -> str:
    total = counts.sum()
    if total == 0:
        return ""
    return ", ".join(f"{_level_text(level)} {100 * c / total:.1f}%" for level, c in zip(levels, counts))


def _compare_categorical(v: str, w: str, g1: pd.Series, g0: pd.Series, levels: Sequence[Any]) -> Dict[str, Any]:
    c1 = np.array([(g1 == level).sum() for level in levels], dtype=float)
    c0 = np.array([(g0 == level).sum() for level in levels], dtype=float)
    n1, n0 = int(c1.sum()), int(c0.sum())
    keep = (c1 + c0) > 0
    kept_levels = [lv for lv, k in zip(levels, keep) if k]
    table = np.vstack([c1[keep], c0[keep]])
    if n1 == 0 or n0 == 0:
        row = _empty_row(v, w, n1, n0, f"no observed value of {w} in a group")
    elif table.shape[1] < 2:
        row = _empty_row(v, w, n1, n0, f"{w} takes one value in these rows")
    else:
        expected = stats.contingency.expected_freq(table)
        row = _empty_row(v, w, n1, n0, "")
        if table.shape == (2, 2) and expected.min() < MIN_EXPECTED_COUNT:
            # Small expected counts in a 2x2 table: the exact conditional test (Fisher 1922).
            result = stats.fisher_exact(table)
            row.update(test="Fisher's exact test", statistic=float(result.statistic), p_value=float(result.pvalue),
                       note="statistic is the sample odds ratio")
        else:
            # Pearson's statistic without continuity correction; small 2x2 tables went to Fisher above.
            result = stats.chi2_contingency(table, correction=False)
            row.update(test="chi-square test", statistic=float(result.statistic), df=float(result.dof),
                       p_value=float(result.pvalue))
            small = int((expected < MIN_EXPECTED_COUNT).sum())
            if small:
                row["note"] = f"{small} cells with expected count below 5; interpret with care"
        row["smd"] = smd_categorical(table[0], table[1])
    row.update(distribution_missing_group=_shares_text(kept_levels, c1[keep]),
               distribution_observed_group=_shares_text(kept_levels, c0[keep]))
    return row


def compare_groups(data: pd.DataFrame, types: Mapping[str, str], missing: Optional[pd.DataFrame] = None,
                   not_applicable: Optional[pd.DataFrame] = None, alpha: float = 0.05) -> GroupComparison:
    """Compare every variable between rows where each incomplete variable is missing and observed.

    Parameters
    ----------
    data : one column per variable; NaN where missing or not applicable.
    types : variable type per column (continuous, count, binary, nominal, ordinal).
    missing : True where a value is missing (default: ``data.isna()``).
    not_applicable : True where a value does not apply; those rows belong to neither group.
    alpha : level at which a Holm-adjusted p-value counts as evidence.

    Returns
    -------
    GroupComparison whose table has one row per (incomplete, compared) pair: the test
    (Welch t-test for continuous and count variables; chi-square, or Fisher's exact test
    for a 2x2 table with an expected count below 5), statistic, df, p-value, Holm-adjusted
    p-value over the whole table, standardised difference (missing minus observed) and
    the two groups' sizes, means and distributions.

    References
    ----------
    Welch BL (1947). The generalization of 'Student's' problem when several different
    population variances are involved. Biometrika 34:28-35.
    Fisher RA (1922). On the interpretation of chi-square from contingency tables. JRSS 85:87-94.
    Holm S (1979). A simple sequentially rejective multiple test procedure. Scand J Stat 6:65-70.
    Austin PC (2009). Stat Med 28:3083-3107.
    """
    missing = _missing_frame(data, missing)
    not_applicable = _not_applicable_frame(data, not_applicable)
    rows: List[Dict[str, Any]] = []
    quantile_parts: List[pd.DataFrame] = []
    share_parts: List[pd.DataFrame] = []
    incomplete = [c for c in data.columns if bool(missing[c].any())]
    for v in incomplete:
        applies = ~not_applicable[v].to_numpy(dtype=bool)
        is_missing = missing[v].to_numpy(dtype=bool) & applies
        is_observed = ~missing[v].to_numpy(dtype=bool) & applies & data[v].notna().to_numpy()
        for w in data.columns:
            if w == v:
                continue
            values = data[w]
            present = values.notna().to_numpy()
            kind = _type_of(types, w, values)
            if kind in NUMERIC_TYPES:
                numbers = values.to_numpy(dtype=float)
                x1, x0 = numbers[is_missing & present], numbers[is_observed & present]
                rows.append(_compare_continuous(v, w, x1, x0))
                quantile_parts.append(_quantile_frame(v, w, x1, x0))
            else:
                levels = _levels_of(values)
                g1, g0 = values[is_missing & present], values[is_observed & present]
                rows.append(_compare_categorical(v, w, g1, g0, levels))
                share_parts.append(_share_frame(v, w, g1, g0, levels))
    table = pd.DataFrame(rows, columns=[c for c in GROUP_COLUMNS if c not in ("p_adjusted", "evidence")])
    table.insert(table.columns.get_loc("p_value") + 1, "p_adjusted", holm_adjust(table["p_value"].to_numpy()))
    table["evidence"] = table["p_adjusted"] < alpha
    table = table[list(GROUP_COLUMNS)]
    for column in ("n_missing_group", "n_observed_group"):
        table[column] = table[column].astype(int)
    quantiles = pd.concat(quantile_parts, ignore_index=True) if quantile_parts else pd.DataFrame(
        columns=["incomplete_variable", "compared_variable", "group", "probability", "value"])
    shares = pd.concat(share_parts, ignore_index=True) if share_parts else pd.DataFrame(
        columns=["incomplete_variable", "compared_variable", "group", "level", "count", "share"])
    return GroupComparison(table=table, quantiles=quantiles, level_shares=shares, alpha=alpha)


def holm_adjust(p_values: np.ndarray) -> np.ndarray:
    """Holm's step-down adjusted p-values; NaN entries (tests not run) stay NaN and do not count.

    References
    ----------
    Holm S (1979). A simple sequentially rejective multiple test procedure. Scand J Stat 6:65-70.
    """
    p = np.asarray(p_values, dtype=float)
    out = np.full(p.shape, np.nan)
    tested = np.flatnonzero(np.isfinite(p))
    m = len(tested)
    if m == 0:
        return out
    order = tested[np.argsort(p[tested], kind="stable")]
    scaled = (m - np.arange(m)) * p[order]
    out[order] = np.minimum(np.maximum.accumulate(scaled), 1.0)
    return out


def _quantile_frame(v: str, w: str, x1: np.ndarray, x0: np.ndarray) -> pd.DataFrame:
    parts = []
    for group, x in (("missing", x1), ("observed", x0)):
        if len(x):
            parts.append(pd.DataFrame({"incomplete_variable": v, "compared_variable": w, "group": group,
                                       "probability": QUANTILE_GRID, "value": np.quantile(x, QUANTILE_GRID)}))
    return pd.concat(parts, ignore_index=True) if parts else pd.DataFrame()


def _share_frame(v: str, w: str, g1: pd.Series, g0: pd.Series, levels: Sequence[Any]) -> pd.DataFrame:
    rows = []
    for group, g in (("missing", g1), ("observed", g0)):
        total = len(g)
        for level in levels:
            count = int((g == level).sum())
            rows.append({"incomplete_variable": v, "compared_variable": w, "group": group,
                         "level": _level_text(level), "count": count, "share": count / total if total else np.nan})
    return pd.DataFrame(rows)


# ---------------------------------------------------------------------------
# 2. EM for the multivariate normal and Little's test

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


def group_patterns(values: np.ndarray) -> MissingnessPatterns:
    """Group the rows of a numeric matrix (NaN = missing) by pattern; rows with nothing observed are dropped."""
    observed = ~np.isnan(values)
    keep = observed.any(axis=1)
    values, observed = values[keep], observed[keep]
    p = values.shape[1]
    if p <= 62:
        # An integer key per row is far faster to group than rows of booleans.
        keys = observed.astype(np.int64) @ (np.int64(1) << np.arange(p, dtype=np.int64))
        _, first, inverse = np.unique(keys, return_index=True, return_inverse=True)
    else:
        _, first, inverse = np.unique(observed, axis=0, return_index=True, return_inverse=True)
    inverse = np.asarray(inverse).ravel()
    order = np.argsort(inverse, kind="stable")
    bounds = np.searchsorted(inverse[order], np.arange(len(first) + 1))
    masks, counts, sums, cross = [], [], [], []
    for j in range(len(first)):
        rows = order[bounds[j]:bounds[j + 1]]
        mask = observed[first[j]]
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


def em_multivariate_normal(data: pd.DataFrame, tolerance: float = 1e-8, max_iterations: int = 1000) -> EMEstimate:
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
    ``notes`` explains variables left out, rows skipped, non-convergence or a singular covariance.
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

    def table(self) -> pd.DataFrame:
        """The one-row ``mcar_test.csv``."""
        em = self.em
        return pd.DataFrame([{
            "statistic": self.statistic, "df": self.df, "p_value": self.p_value, "n_patterns": self.n_patterns,
            "variables": ",".join(self.variables), "em_iterations": em.iterations if em else 0,
            "em_converged": em.converged if em else False, "em_tolerance": em.tolerance if em else np.nan,
            "em_max_iterations": em.max_iterations if em else 0, "n_rows": self.n_rows,
            "n_rows_skipped": self.n_rows_skipped, "note": " ".join(self.notes),
        }])


def little_mcar_test(data: pd.DataFrame, tolerance: float = 1e-8, max_iterations: int = 1000,
                     notes: Sequence[str] = ()) -> LittleTest:
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
        return LittleTest(np.nan, 0, np.nan, 0, names, n_rows, n_skipped, None, empty_patterns, tuple(notes))
    try:
        em = em_multivariate_normal(data, tolerance=tolerance, max_iterations=max_iterations)
    except SingularCovariance as exc:
        notes.append(_singular_note(data, [names[k] for k in exc.args[0]]))
        return LittleTest(np.nan, 0, np.nan, 0, names, n_rows, n_skipped, None, empty_patterns, tuple(notes))
    if not em.converged:
        notes.append(f"EM did not converge in {em.max_iterations} iterations (tolerance {em.tolerance:g}); "
                     "the statistic uses the last estimates. Raise mechanism.em_max_iterations.")
    dependence = _dependence(em.covariance)
    if dependence:
        notes.append(_singular_note(data, dependence))
        return LittleTest(np.nan, 0, np.nan, 0, names, n_rows, n_skipped, em, empty_patterns, tuple(notes))
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
        return LittleTest(0.0, 0, np.nan, len(rows), names, n_rows, n_skipped, em, table, tuple(notes))
    p_value = float(stats.chi2.sf(statistic, df))
    return LittleTest(float(statistic), int(df), p_value, len(rows), names, n_rows, n_skipped, em, table,
                      tuple(notes))


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


def mcar_test_data(data: pd.DataFrame, types: Mapping[str, str], not_applicable: Optional[pd.DataFrame] = None,
                   variables: Optional[Sequence[str]] = None) -> Tuple[pd.DataFrame, Tuple[str, ...]]:
    """The numeric frame Little's test runs on, and notes on what was left out and why.

    By default every continuous, count and binary variable with at least one observed
    value, except those with "not applicable" cells (their absence is structural, not
    missing) and those constant where observed. Binary text variables enter as 0/1 codes
    (second level = 1). With ``variables`` given, those exactly; rows where any of them
    does not apply are left out (with a note).

    Raises InputError for unknown or unsuitable names in ``variables``.
    """
    not_applicable = _not_applicable_frame(data, not_applicable)
    notes: List[str] = []
    if variables is not None:
        chosen = list(dict.fromkeys(variables))
        for name in chosen:
            if name not in data.columns:
                raise InputError(f"mechanism.variables: '{name}' is not a column of the data"
                                 f"{did_you_mean(name, data.columns)}")
            kind = _type_of(types, name, data[name])
            if kind not in MCAR_TYPES:
                raise InputError(f"mechanism.variables: '{name}' is {kind}; Little's test takes continuous, count "
                                 "and binary variables, so leave it out of mechanism.variables")
            if data[name].notna().sum() == 0:
                raise InputError(f"mechanism.variables: '{name}' has no observed values; leave it out")
        rows = ~not_applicable[chosen].any(axis=1).to_numpy() if chosen else np.ones(len(data), dtype=bool)
        if not rows.all():
            notes.append(f"{int((~rows).sum())} rows where a test variable does not apply were left out.")
    else:
        chosen = []
        rows = np.ones(len(data), dtype=bool)
        for name in data.columns:
            kind = _type_of(types, name, data[name])
            if kind not in MCAR_TYPES or data[name].notna().sum() == 0:
                continue
            if bool(not_applicable[name].any()):
                notes.append(f"{name} was left out because it does not apply to every row.")
                continue
            chosen.append(name)
    columns = {}
    for name in chosen:
        kind = _type_of(types, name, data[name])
        values = binary_codes(data[name]) if kind == "binary" else data[name].astype(float)
        values = values[rows]
        if values.nunique() < 2:
            notes.append(f"{name} was left out because it takes one value where observed.")
            continue
        columns[name] = values.to_numpy(dtype=float)
    return pd.DataFrame(columns, index=data.index[rows]), tuple(notes)


# ---------------------------------------------------------------------------
# 3. missingness models

@dataclass(frozen=True)
class MissingnessModels:
    """Logistic regressions of missingness indicators on the fully observed variables.

    ``table`` (``mechanism_models.csv``) has one row per model term; ``fits`` one row per
    incomplete variable: n_used, n_missing, predictors, auc, lr_p_value and a note (why a
    model was not fitted, or that it separated perfectly).
    """

    table: pd.DataFrame
    fits: pd.DataFrame
    alpha: float


def roc_auc(indicator: np.ndarray, score: np.ndarray) -> float:
    """Area under the ROC curve: the probability a random positive scores above a random negative (ties 1/2).

    References
    ----------
    Hanley JA, McNeil BJ (1982). The meaning and use of the area under a receiver operating
    characteristic (ROC) curve. Radiology 143:29-36.
    """
    indicator = np.asarray(indicator, dtype=bool)
    n1, n0 = int(indicator.sum()), int((~indicator).sum())
    if n1 == 0 or n0 == 0:
        return float("nan")
    ranks = stats.rankdata(score)
    return float((ranks[indicator].sum() - n1 * (n1 + 1) / 2) / (n1 * n0))


def _term(name: str) -> str:
    return name if re.fullmatch(r"[A-Za-z_][A-Za-z0-9_]*", name) else f'Q("{name}")'


def _separated_terms(indicator: np.ndarray, design: pd.DataFrame) -> List[str]:
    """Design columns that alone predict the indicator exactly somewhere (a level always or never missing)."""
    found = []
    for name in design.columns:
        if name == "Intercept":
            continue
        x = design[name].to_numpy()
        distinct = np.unique(x)
        if len(distinct) == 2:
            for value in distinct:
                inside = indicator[x == value]
                if len(inside) and (inside.all() or not inside.any()):
                    found.append(name)
                    break
        elif len(distinct) > 2:
            x1, x0 = x[indicator], x[~indicator]
            if x1.max() < x0.min() or x1.min() > x0.max():
                found.append(name)
    return found


def fit_missingness_model(data: pd.DataFrame, variable: str, predictors: Sequence[str],
                          indicator: np.ndarray, alpha: float = 0.05) -> Tuple[pd.DataFrame, Dict[str, Any]]:
    """One logistic regression of a missingness indicator; term rows and a one-row summary.

    Parameters
    ----------
    data : the rows to model (those where ``variable`` applies) with the predictor columns.
    variable : the incomplete variable (for labels).
    predictors : the columns to use (Categorical columns enter as dummies, first level reference).
    indicator : True where ``variable`` is missing, aligned with ``data``.

    References
    ----------
    Hosmer DW, Lemeshow S (2000). Applied Logistic Regression, 2nd ed., Wiley.
    """
    import statsmodels.formula.api as smf
    from statsmodels.tools.sm_exceptions import PerfectSeparationError, PerfectSeparationWarning

    frame = data[list(predictors)].copy()
    target = "gapbook_is_missing"
    while target in frame.columns:
        target += "_"
    frame[target] = indicator.astype(float)
    formula = f"{target} ~ " + " + ".join(_term(p) for p in predictors)
    n_missing = int(indicator.sum())
    summary = {"incomplete_variable": variable, "n_used": len(frame), "n_missing": n_missing,
               "predictors": ",".join(predictors), "auc": np.nan, "lr_statistic": np.nan, "lr_df": np.nan,
               "lr_p_value": np.nan, "separation": False, "note": ""}
    model = smf.logit(formula, data=frame)
    design = pd.DataFrame(model.exog, columns=model.exog_names)
    separated = _separated_terms(indicator, design)
    perfect = False
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            result = model.fit(disp=0, maxiter=200)
        except (PerfectSeparationError, np.linalg.LinAlgError):
            result = None
            perfect = True
    perfect = perfect or any(issubclass(w.category, PerfectSeparationWarning) for w in caught)
    converged = result is not None and bool(result.mle_retvals.get("converged", False))
    if perfect or separated or not converged:
        if separated or perfect:
            named = ", ".join(separated) if separated else "a combination of the predictors"
            note = (f"perfect separation: {named} predicts exactly whether {variable} is missing in some rows, so "
                    "the odds ratios are not estimable (see the group comparisons for these variables)")
            summary["separation"] = True
        else:
            note = "the logistic regression did not converge; odds ratios not reported"
        summary["note"] = note
        terms = pd.DataFrame([{"incomplete_variable": variable, "term": "", "n_used": len(frame),
                               "n_missing": n_missing, "note": note}], columns=list(MODEL_COLUMNS))
        return terms, summary
    crit = stats.norm.ppf(1 - alpha / 2)
    coef, se = result.params, result.bse
    auc = roc_auc(indicator, np.asarray(result.predict()))
    note = ""
    per_term = min(n_missing, len(frame) - n_missing) / max(len(coef) - 1, 1)
    if per_term < 10:
        # Peduzzi et al. (1996, J Clin Epidemiol 49:1373): fewer than 10 events per term makes estimates unstable.
        note = f"fewer than 10 rows of the rarer outcome per model term ({per_term:.1f}); odds ratios may be unstable"
    # An intercept far from the data (e.g. calendar years as a predictor) can overflow exp(): inf is honest.
    with np.errstate(over="ignore"):
        terms = _term_rows(variable, coef, se, result, crit, auc, n_missing, note)
    summary.update(auc=auc, lr_statistic=float(result.llr), lr_df=float(result.df_model),
                   lr_p_value=float(result.llr_pvalue), note=note)
    return terms, summary


def _term_rows(variable: str, coef: pd.Series, se: pd.Series, result: Any, crit: float, auc: float,
               n_missing: int, note: str) -> pd.DataFrame:
    return pd.DataFrame({
        "incomplete_variable": variable, "term": list(coef.index), "coefficient": coef.to_numpy(),
        "std_error": se.to_numpy(), "odds_ratio": np.exp(coef.to_numpy()),
        "ci_lower": np.exp(coef.to_numpy() - crit * se.to_numpy()),
        "ci_upper": np.exp(coef.to_numpy() + crit * se.to_numpy()), "p_value": result.pvalues.to_numpy(),
        "auc": auc, "lr_p_value": float(result.llr_pvalue), "n_used": int(result.nobs), "n_missing": n_missing,
        "note": note,
    }, columns=list(MODEL_COLUMNS))


def missingness_models(data: pd.DataFrame, types: Mapping[str, str], missing: Optional[pd.DataFrame] = None,
                       not_applicable: Optional[pd.DataFrame] = None, min_missing: int = 10, alpha: float = 0.05,
                       predictors: Optional[Sequence[str]] = None) -> MissingnessModels:
    """For each incomplete variable with enough missing values, a logistic model of its missingness.

    Parameters
    ----------
    data, types, missing, not_applicable : as for :func:`compare_groups`.
    min_missing : fit only when at least this many rows are missing and this many observed.
    alpha : for the odds-ratio confidence intervals (level 1 - alpha).
    predictors : the predictor columns; default the variables fully observed (and not
        constant) in the rows where the incomplete variable applies. With a list, rows
        with a missing predictor are left out.

    Returns
    -------
    MissingnessModels (term table, one summary row per incomplete variable).

    References
    ----------
    Hosmer DW, Lemeshow S (2000). Applied Logistic Regression, 2nd ed., Wiley.
    Hanley JA, McNeil BJ (1982). Radiology 143:29-36.
    """
    missing = _missing_frame(data, missing)
    not_applicable = _not_applicable_frame(data, not_applicable)
    if predictors is not None:
        for name in predictors:
            if name not in data.columns:
                raise InputError(f"predictors: '{name}' is not a column of the data{did_you_mean(name, data.columns)}")
    term_parts: List[pd.DataFrame] = []
    summaries: List[Dict[str, Any]] = []
    for v in data.columns:
        is_missing = missing[v].to_numpy(dtype=bool)
        if not is_missing.any():
            continue
        applies = ~not_applicable[v].to_numpy(dtype=bool)
        candidates = [c for c in (predictors if predictors is not None else data.columns) if c != v]
        if predictors is None:
            chosen = [c for c in candidates if data.loc[applies, c].notna().all() and data.loc[applies, c].nunique() > 1]
            rows = applies
        else:
            chosen = [c for c in candidates]
            rows = applies & data[chosen].notna().all(axis=1).to_numpy()
            chosen = [c for c in chosen if data.loc[rows, c].nunique() > 1]
        n_missing = int((is_missing & rows).sum())
        n_observed = int((~is_missing & rows).sum())
        base = {"incomplete_variable": v, "n_used": int(rows.sum()), "n_missing": n_missing,
                "predictors": ",".join(chosen), "auc": np.nan, "lr_statistic": np.nan, "lr_df": np.nan,
                "lr_p_value": np.nan, "separation": False}
        if min(n_missing, n_observed) < min_missing:
            note = (f"not modelled: {n_missing} missing and {n_observed} observed rows; "
                    f"a model needs at least {min_missing} of each (mechanism.min_missing)")
        elif not chosen:
            note = "not modelled: no fully observed variable to model on"
        else:
            subset = data.loc[rows]
            terms, summary = fit_missingness_model(subset, v, chosen, is_missing[rows], alpha=alpha)
            term_parts.append(terms)
            summaries.append(summary)
            continue
        summaries.append({**base, "note": note})
        term_parts.append(pd.DataFrame([{"incomplete_variable": v, "term": "", "n_used": int(rows.sum()),
                                         "n_missing": n_missing, "note": note}], columns=list(MODEL_COLUMNS)))
    table = (pd.concat([t.astype(object) for t in term_parts], ignore_index=True).infer_objects()
             if term_parts else pd.DataFrame(columns=list(MODEL_COLUMNS)))
    fits = pd.DataFrame(summaries, columns=["incomplete_variable", "n_used", "n_missing", "predictors", "auc",
                                            "lr_statistic", "lr_df", "lr_p_value", "separation", "note"])
    return MissingnessModels(table=table, fits=fits, alpha=alpha)


# ---------------------------------------------------------------------------
# 4. wording

MAR_CAUTION = ("No test on the observed data can tell missing at random (MAR) from missing not at random (MNAR): "
               "whether missingness depends on the values that are missing cannot be checked from the data. "
               "The sensitivity stage shows how far the conclusions move if the data are missing not at random.")
PLAN_CAUTION = ("These results support, not replace, the pre-specified analysis plan and the judgement of a "
                "qualified statistician.")


def discrimination_words(auc: float) -> str:
    """How well a missingness model separates missing from observed rows, in words.

    0.7-0.8 acceptable, 0.8-0.9 excellent, 0.9 and above outstanding (Hosmer & Lemeshow
    2000, section 5.2.4); the words below 0.7 are common practice, no source.
    """
    if not np.isfinite(auc):
        return "not available"
    if auc >= 0.9:
        return "outstanding"
    if auc >= 0.8:
        return "excellent"
    if auc >= 0.7:
        return "acceptable"
    if auc >= 0.6:
        return "weak"
    return "little or none"


def mcar_sentence(test: LittleTest, alpha: float = 0.05) -> str:
    """Little's test in words: evidence against MCAR, or no evidence against it (never 'the data are MCAR')."""
    if not np.isfinite(test.p_value):
        reason = " ".join(test.notes) if test.notes else "it could not be computed."
        return f"Little's test gives no p-value. {reason}"
    numbers = f"d\u00b2 = {test.statistic:.2f}, df = {test.df}, {format_p(test.p_value)}; {test.n_patterns} patterns"
    if test.p_value < alpha:
        return (f"Little's test gives evidence against missing completely at random (MCAR) for "
                f"{', '.join(test.variables)} ({numbers}).")
    return (f"Little's test gives no evidence against MCAR ({numbers}). Absence of evidence is not proof: "
            "the test has limited power, and it only looks at the variables "
            f"{', '.join(test.variables)}.")


def _relation_text(row: pd.Series, variable: str) -> str:
    w = row["compared_variable"]
    p = format_p(row["p_adjusted"]).replace("p ", "Holm-adjusted p ", 1)
    if np.isfinite(row["mean_missing_group"]):
        detail = (f"mean {row['mean_missing_group']:.3g} where {variable} is missing vs "
                  f"{row['mean_observed_group']:.3g} where observed, SMD {row['smd']:.2f}")
    else:
        detail = (f"{row['distribution_missing_group']} where {variable} is missing vs "
                  f"{row['distribution_observed_group']} where observed")
    return f"{w} ({detail}; {p})"


def group_sentences(groups: GroupComparison) -> List[str]:
    """One sentence per incomplete variable: the observed variables its missingness relates to, if any."""
    sentences = []
    table = groups.table
    for v, rows in table.groupby("incomplete_variable", sort=False):
        tested = rows[rows["p_adjusted"].notna()]
        if tested.empty:
            sentences.append(f"Missingness of {v} could not be compared with other variables (too few rows).")
            continue
        hits = tested[tested["evidence"]].sort_values("p_adjusted", kind="stable")
        if hits.empty:
            sentences.append(f"No evidence that missingness of {v} depends on the other variables compared "
                             f"(smallest Holm-adjusted {format_p(tested['p_adjusted'].min())}).")
        else:
            listed = "; ".join(_relation_text(r, v) for _, r in hits.head(3).iterrows())
            more = f" and {len(hits) - 3} more" if len(hits) > 3 else ""
            sentences.append(f"Evidence that missingness of {v} depends on {listed}{more}.")
    return sentences


def model_sentences(models: MissingnessModels) -> List[str]:
    """One sentence per missingness model: evidence from the likelihood-ratio test and discrimination (AUC)."""
    sentences = []
    alpha = models.alpha
    for _, row in models.fits.iterrows():
        v = row["incomplete_variable"]
        if not np.isfinite(row["lr_p_value"]):
            sentences.append(f"Missingness model of {v}: {row['note']}.")
            continue
        predictors = row["predictors"].replace(",", ", ")
        lead = ("Evidence that missingness of" if row["lr_p_value"] < alpha else "No evidence that missingness of")
        sentences.append(f"{lead} {v} depends on the fully observed variables {predictors} "
                         f"(likelihood-ratio {format_p(row['lr_p_value'])}); the model's discrimination is "
                         f"{discrimination_words(row['auc'])} (AUC {row['auc']:.2f}).")
    return sentences


def summary_sentences(groups: Optional[GroupComparison], mcar: Optional[LittleTest],
                      models: Optional[MissingnessModels], alpha: float = 0.05) -> Tuple[str, ...]:
    """The stage's conclusions in words the data support, ending with the MAR/MNAR and plan cautions.

    Says "evidence against MCAR" or "no evidence against MCAR (p = ...)" and "evidence that
    missingness of V depends on W"; never that the data are MCAR or MAR.
    """
    sentences: List[str] = []
    if mcar is not None:
        sentences.append(mcar_sentence(mcar, alpha))
    if groups is not None:
        sentences.extend(group_sentences(groups))
    if models is not None:
        sentences.extend(model_sentences(models))
    sentences.append(MAR_CAUTION)
    sentences.append(PLAN_CAUTION)
    return tuple(sentences)


# ---------------------------------------------------------------------------
# the stage in one call

@dataclass(frozen=True)
class MechanismResult:
    """Everything the mechanism stage reports: group comparisons, Little's test, models, sentences."""

    groups: GroupComparison
    mcar: LittleTest
    models: MissingnessModels
    sentences: Tuple[str, ...]
    alpha: float


def assess_mechanism(data: pd.DataFrame, types: Mapping[str, str], missing: Optional[pd.DataFrame] = None,
                     not_applicable: Optional[pd.DataFrame] = None, variables: Optional[Sequence[str]] = None,
                     alpha: float = 0.05, min_missing: int = 10, em_tolerance: float = 1e-8,
                     em_max_iterations: int = 1000) -> MechanismResult:
    """Group comparisons, Little's MCAR test and missingness models for one dataset, with the summary sentences.

    Parameters
    ----------
    data, types, missing, not_applicable : as for :func:`compare_groups`.
    variables : Little's test variables (default: see :func:`mcar_test_data`).
    alpha : evidence level for adjusted p-values, Little's test and model CIs.
    min_missing : the least number of missing (and observed) rows for a missingness model.
    em_tolerance, em_max_iterations : EM convergence settings for Little's test.

    Returns
    -------
    MechanismResult.

    References
    ----------
    Little RJA (1988). JASA 83:1198-1202.
    """
    groups = compare_groups(data, types, missing, not_applicable, alpha=alpha)
    frame, notes = mcar_test_data(data, types, not_applicable, variables)
    mcar = little_mcar_test(frame, tolerance=em_tolerance, max_iterations=em_max_iterations, notes=notes)
    models = missingness_models(data, types, missing, not_applicable, min_missing=min_missing, alpha=alpha)
    return MechanismResult(groups=groups, mcar=mcar, models=models,
                           sentences=summary_sentences(groups, mcar, models, alpha), alpha=alpha)


def assess_study(study: Any, settings: Any) -> MechanismResult:
    """:func:`assess_mechanism` on a study after intake with the params' ``mechanism`` section."""
    return assess_mechanism(study.data, study.types, study.missing, study.not_applicable,
                            variables=settings.variables, alpha=settings.alpha, min_missing=settings.min_missing,
                            em_tolerance=settings.em_tolerance, em_max_iterations=settings.em_max_iterations)
