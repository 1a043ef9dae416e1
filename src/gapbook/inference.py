"""The small pieces of inference every stage shares: Wald intervals and p-values,
standardised differences, and p-values in words.

One function each, so a complete-case fit, a pooled imputation, a delta-adjusted run and
a missingness model compute an interval alike, and every sentence prints a p-value alike.
"""
from __future__ import annotations

import math
from typing import Optional, Tuple, Union

import numpy as np
from scipy import stats

__all__ = ["is_false_cell", "wald_inference", "standardised_difference", "standardised_difference_of_shares", "format_p",
           "format_p_cell", "format_df", "LARGE_DF",
           "format_estimate"]

ArrayLike = Union[float, np.ndarray]


def wald_inference(estimate: ArrayLike, std_error: ArrayLike, df: Optional[ArrayLike] = None,
                   alpha: float = 0.05) -> Tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Confidence interval at level 1 - alpha and two-sided p-value of estimate / std_error.

    The reference distribution is Student's t with ``df`` degrees of freedom, or the
    standard normal where ``df`` is None, infinite or not a number (large-sample models).

    Parameters
    ----------
    estimate, std_error : scalars or arrays of the same shape.
    df : degrees of freedom per entry (a scalar applies to every entry); None for normal.
    alpha : 1 - the confidence level.

    Returns
    -------
    (ci_lower, ci_upper, p_value) : arrays of the estimate's shape.

    References
    ----------
    Wald A (1943). Tests of statistical hypotheses concerning several parameters when the
    number of observations is large. Trans Am Math Soc 54:426-482.
    """
    estimate = np.asarray(estimate, dtype=float)
    se = np.asarray(std_error, dtype=float)
    if df is None:
        dfs = np.full(estimate.shape, np.inf)
    else:
        dfs = np.broadcast_to(np.asarray(df, dtype=float), estimate.shape)
    normal = ~np.isfinite(dfs)
    finite_df = np.where(normal, 1.0, dfs)
    crit = np.where(normal, stats.norm.ppf(1 - alpha / 2), stats.t.ppf(1 - alpha / 2, finite_df))
    with np.errstate(divide="ignore", invalid="ignore"):
        z = np.abs(estimate / se)
    p = np.where(normal, 2 * stats.norm.sf(z), 2 * stats.t.sf(z, finite_df))
    return estimate - crit * se, estimate + crit * se, p


def standardised_difference(mean_a: float, variance_a: float, mean_b: float, variance_b: float) -> float:
    """Standardised mean difference a minus b over the pooled SD sqrt((var_a + var_b) / 2).

    For a proportion p the variance is p (1 - p). NaN when the pooled SD is zero or unknown.

    Parameters
    ----------
    mean_a, variance_a : mean (or proportion) and variance of group a.
    mean_b, variance_b : the same for group b.

    Returns
    -------
    float

    References
    ----------
    Austin PC (2009). Balance diagnostics for comparing the distribution of baseline
    covariates between treatment groups in propensity-score matched samples. Stat Med
    28:3083-3107.
    """
    pooled = np.sqrt((variance_a + variance_b) / 2)
    return float((mean_a - mean_b) / pooled) if pooled > 0 else float("nan")


def standardised_difference_of_shares(counts_a: np.ndarray, counts_b: np.ndarray) -> float:
    """Standardised difference of two distributions over the same levels (a minus b).

    Two levels: :func:`standardised_difference` of the shares of the second level (signed).
    More levels: the Mahalanobis form sqrt(T' S^-1 T) over every level but the first, with T
    the share differences and S the mean of the two multinomial covariances (unsigned).

    Parameters
    ----------
    counts_a, counts_b : counts per level in each group, same level order.

    Returns
    -------
    float (NaN when a group is empty or the covariance is singular).

    References
    ----------
    Austin PC (2009). Stat Med 28:3083-3107.
    Yang D, Dalton JE (2012). A unified approach to measuring the effect size between two
    groups using SAS. SAS Global Forum, paper 335-2012.
    """
    n_a, n_b = counts_a.sum(), counts_b.sum()
    if n_a == 0 or n_b == 0 or len(counts_a) < 2:
        return float("nan")
    p_a, p_b = counts_a / n_a, counts_b / n_b
    if len(p_a) == 2:
        return standardised_difference(p_a[1], p_a[1] * (1 - p_a[1]), p_b[1], p_b[1] * (1 - p_b[1]))
    t = (p_a - p_b)[1:]
    q_a, q_b = p_a[1:], p_b[1:]
    spread = (np.diag(q_a) - np.outer(q_a, q_a) + np.diag(q_b) - np.outer(q_b, q_b)) / 2
    try:
        solved = np.linalg.solve(spread, t)
    except np.linalg.LinAlgError:
        return float("nan")
    value = float(t @ solved)
    return math.sqrt(value) if value >= 0 else float("nan")


def format_p(p: object) -> str:
    """A p-value for a sentence: 'p < 0.001', 'p = 0.012', 'p = 0.831'; 'p not available' when missing.

    Three decimals throughout, the precision a reader of a p-value can use (common
    practice, no source).

    Parameters
    ----------
    p : float or None
        The p-value.

    Returns
    -------
    str
    """
    cell = format_p_cell(p)
    return "p not available" if not cell else f"p {cell}" if cell.startswith("<") else f"p = {cell}"


def format_p_cell(p: object) -> str:
    """A p-value for a table cell: '< 0.001', '0.012', '0.831'; empty when missing (see :func:`format_p`).

    Parameters
    ----------
    p : float or None
        The p-value.

    Returns
    -------
    str
    """
    value = _as_float(p)
    if value is None or not math.isfinite(value):
        return ""
    return "< 0.001" if value < 0.001 else f"{value:.3f}"


def is_false_cell(value: object) -> bool:
    """Whether a table cell says no: False as pandas holds it, or 'False' as read back from a CSV.

    The ``converged`` column of ``estimates.csv`` is read both ways: from a result in
    memory (a bool) and from the record's table (text); an empty cell is not a no.

    Parameters
    ----------
    value : object
        The cell.

    Returns
    -------
    bool
    """
    return value is False or (isinstance(value, np.bool_) and not value) or str(value).strip().lower() == "false"


def _as_float(value: object) -> Optional[float]:
    """``value`` as a float (NaN and infinities included), or None when it is not a number at all."""
    try:
        return float(value)  # type: ignore[arg-type]
    except (TypeError, ValueError):
        return None


# Above this many degrees of freedom a t reference is the normal one for reading purposes: the
# two-sided 95% quantile is 1.962 against 1.960 (scipy.stats.t.ppf(0.975, 1000)).
LARGE_DF = 1000.0


def format_df(df: object) -> str:
    """Degrees of freedom for a sentence: '12.7', '245', or '>1000' when very large ('infinite' for none).

    A df such as 38782635.2 carries no information beyond 'large' (the t reference is then
    the normal one), so it is printed as such.

    Parameters
    ----------
    df : float or None
        Degrees of freedom.

    Returns
    -------
    str
    """
    value = _as_float(df)
    if value is None or math.isnan(value):
        return "not available"
    if math.isinf(value):
        return "infinite"
    if value > LARGE_DF:
        return f">{LARGE_DF:.0f}"
    return f"{value:.1f}" if value < 100 else f"{value:.0f}"


def format_estimate(value: object, digits: int = 3) -> str:
    """An estimate or interval end for reading: ``digits`` significant digits with trailing zeros kept
    (1.00, 0.500, -0.426, 12.3), whole units from 100 up (1,234), 'n/a' when missing, 'infinite' for a
    diverged ratio. Three significant digits suit an effect and its interval (common practice, no source).

    Parameters
    ----------
    value : float or None
        The number.
    digits : int
        Significant digits.

    Returns
    -------
    str
    """
    number = _as_float(value)
    if number is None or math.isnan(number):
        return "n/a"
    if math.isinf(number):
        return "infinite" if number > 0 else "-infinite"
    if abs(number) >= 10 ** (digits - 1):
        return f"{number:,.0f}"
    if number == 0:
        return "0"
    if abs(number) < 1e-3:
        return f"{number:.{digits - 1}e}"
    return f"{number:#.{digits}g}".rstrip(".")
