"""The numerics of the chained-equations engine: posterior draws, Newton fits and
predictive mean matching on a column-major design matrix.

Nothing here knows about variables or data frames: each function takes arrays (the
design matrix, row indices, cross-product matrices) and a ``numpy.random.Generator``.
"""
from __future__ import annotations

import math
from typing import Optional, Tuple

import numpy as np
from scipy import linalg
from scipy.special import expit

from ..errors import AnalysisError

__all__ = ["gather", "gram_rows", "predict_rows", "cholesky", "linear_draw", "stable_argsort", "sorted_order",
           "pmm_match", "augmentation", "multinomial_terms", "ordinal_terms", "newton", "cold_start"]

CHUNK_ROWS = 1 << 15          # rows per block when gathering rows of the design matrix
NEWTON_MAX_STEPS = 30
NEWTON_SD_FRACTION = 0.02     # stop when every Newton step is below this fraction of its posterior SD
ONE_STEP_SAFETY = 2.0         # margin on the predicted error left after a Newton step (see newton)
WARMUP_ROWS = 50_000          # a cold start first converges on an evenly spaced subset of this many rows
NEWTON_TOLERANCE = 1e-6        # on the standardised scale; far below any posterior SD


def gather(design: np.ndarray, rows: np.ndarray, columns: Optional[np.ndarray] = None) -> np.ndarray:
    """design[rows][:, columns] as a Fortran-order copy, one ``np.take`` per column.

    The design is column-major, so taking rows column by column reads each column in
    order; with mode "clip" (the rows are always valid) ``np.take`` writes straight into
    ``out`` instead of through a buffer: together about 3.5 times faster than
    two-dimensional fancy indexing.

    Parameters
    ----------
    design : ndarray
        The column-major design matrix.
    rows : ndarray of int
        The rows to take.
    columns : ndarray of int, optional
        The columns to take; default all.

    Returns
    -------
    ndarray
        The block, Fortran order.
    """
    if columns is None:
        columns = np.arange(design.shape[1])
    out = np.empty((len(rows), len(columns)), order="F")
    for j, column in enumerate(columns):
        np.take(design[:, column], rows, out=out[:, j], mode="clip")
    return out


def gram_rows(design: np.ndarray, rows: np.ndarray) -> np.ndarray:
    """X[rows]' X[rows], gathered in blocks so no full copy of the design is made.

    Parameters
    ----------
    design : ndarray
        The design matrix.
    rows : ndarray of int
        The rows.

    Returns
    -------
    ndarray
        The cross-product matrix over those rows.
    """
    width = design.shape[1]
    out = np.zeros((width, width))
    for start in range(0, len(rows), CHUNK_ROWS):
        block = gather(design, rows[start:start + CHUNK_ROWS])
        out += block.T @ block
    return out


def predict_rows(design: np.ndarray, rows: np.ndarray, columns: np.ndarray, coef: np.ndarray) -> np.ndarray:
    """X[rows, columns] @ coef, in row blocks.

    Parameters
    ----------
    design : ndarray
        The design matrix.
    rows : ndarray of int
        The rows.
    columns : ndarray of int
        The predictors' columns.
    coef : ndarray
        Coefficients (a vector, or one column per category).

    Returns
    -------
    ndarray
        The linear predictors.
    """
    coef = np.asarray(coef)
    out = np.empty((len(rows),) + coef.shape[1:])
    for start in range(0, len(rows), CHUNK_ROWS):
        out[start:start + CHUNK_ROWS] = gather(design, rows[start:start + CHUNK_ROWS], columns) @ coef
    return out


def cholesky(matrix: np.ndarray) -> np.ndarray:
    """Lower Cholesky factor, with a growing ridge if the matrix is numerically singular.

    Parameters
    ----------
    matrix : ndarray
        A symmetric positive (semi-)definite matrix.

    Returns
    -------
    ndarray
        L with L @ L.T = matrix (plus the ridge when one was needed).
    """
    size = matrix.shape[0]
    ridge = 1e-9 * max(float(np.mean(np.abs(np.diag(matrix)))), 1e-12)
    for _ in range(12):
        try:
            return np.linalg.cholesky(matrix + ridge * np.eye(size))
        except np.linalg.LinAlgError:
            ridge *= 100
    raise AnalysisError("an imputation model could not be fitted (its predictors are collinear); "
                        "exclude redundant predictors in imputation.exclude_predictors")


def linear_draw(gram_observed: np.ndarray, y_column: int, predictor_columns: np.ndarray, n_fit: int,
                rng: np.random.Generator) -> Tuple[np.ndarray, np.ndarray, float]:
    """Least squares and one draw of (beta, sigma) from the posterior of a Bayesian linear regression
    with the usual noninformative prior.

    Parameters
    ----------
    gram_observed : ndarray
        The cross-product matrix over the observed rows (outcome column included).
    y_column : int
        The outcome's column.
    predictor_columns : ndarray of int
        The predictors' columns.
    n_fit : int
        The observed rows.
    rng : numpy.random.Generator
        The chain's generator.

    Returns
    -------
    (beta_hat, beta_draw, sigma_draw) : ndarray, ndarray, float

    References
    ----------
    Rubin DB (1987). Multiple Imputation for Nonresponse in Surveys. Wiley, pp. 166-168.
    """
    xtx = gram_observed[np.ix_(predictor_columns, predictor_columns)]
    xty = gram_observed[predictor_columns, y_column]
    yty = gram_observed[y_column, y_column]
    lower = cholesky(xtx)
    beta_hat = linalg.cho_solve((lower, True), xty)
    residual_ss = max(float(yty - 2 * beta_hat @ xty + beta_hat @ xtx @ beta_hat), 1e-12 * max(float(yty), 1.0))
    df = max(n_fit - len(predictor_columns), 1)
    sigma = math.sqrt(residual_ss / rng.chisquare(df))
    z = rng.standard_normal(len(predictor_columns))
    beta_draw = beta_hat + sigma * linalg.solve_triangular(lower.T, z, lower=False)
    return beta_hat, beta_draw, sigma


def stable_argsort(values: np.ndarray) -> np.ndarray:
    """``np.argsort(values, kind="stable")`` for finite floats, about a third faster on a million values.

    Each value's bits are mapped to an unsigned integer with the same order, the lowest
    bits are replaced by the row's position, and the integers are sorted (a plain sort of
    integers is faster than an argsort of floats); the positions are read back from the
    low bits. Values whose kept high bits collide (equal to about 1e-10 relative, a few
    pairs in a million) are put in exact order, ties by position, so the result is the
    stable argsort's, bit for bit.

    Parameters
    ----------
    values : ndarray
        Finite floats.

    Returns
    -------
    ndarray of int
        The positions in stable sorted order.
    """
    n = len(values)
    shift = max(int(n - 1).bit_length(), 1)
    if n < 2 or shift > 40 or not np.all(np.isfinite(values)):
        return np.argsort(values, kind="stable")
    bits = (values + 0.0).view(np.int64)                 # + 0.0 turns -0.0 into 0.0, which compare equal
    # negative floats: flip every bit; non-negative: flip the sign bit -> unsigned order = float order
    keys = (bits ^ ((bits >> 63) | np.int64(-(1 << 63)))).view(np.uint64)
    keys >>= np.uint64(shift)
    keys <<= np.uint64(shift)
    keys |= np.arange(n, dtype=np.uint64)
    keys.sort()
    order = (keys & np.uint64((1 << shift) - 1)).astype(np.intp)
    keys >>= np.uint64(shift)
    same = keys[1:] == keys[:-1]
    if same.any():
        in_run = np.zeros(n, dtype=bool)
        in_run[1:] = same
        in_run[:-1] |= same
        positions = np.flatnonzero(in_run)
        run = np.cumsum(np.concatenate([[True], ~same[positions[1:] - 1]]))
        rows = order[positions]
        order[positions] = rows[np.lexsort((rows, values[rows], run))]
    return order


def sorted_order(values: np.ndarray) -> Tuple[np.ndarray, np.ndarray]:
    """``np.argsort(values, kind="stable")`` and the sorted values.

    Parameters
    ----------
    values : ndarray
        Finite floats.

    Returns
    -------
    (order, sorted_values) : ndarray
    """
    order = stable_argsort(values)
    return order, values[order]


def pmm_match(predicted_observed: np.ndarray, predicted_missing: np.ndarray, donors: int,
              rng: np.random.Generator, order: Optional[Tuple[np.ndarray, np.ndarray]] = None) -> np.ndarray:
    """For each missing row, the position (in the observed rows) of a donor drawn from its k nearest
    observed predictions (type-1 matching: observed predictions use beta_hat, missing ones the draw).

    Parameters
    ----------
    predicted_observed : ndarray
        Predictions for the observed rows (from beta_hat).
    predicted_missing : ndarray
        Predictions for the missing rows (from the drawn beta).
    donors : int
        k, the nearest observed rows to draw from.
    rng : numpy.random.Generator
        The chain's generator.
    order : (ndarray, ndarray), optional
        The sort order and sorted values of ``predicted_observed``, when already known.

    Returns
    -------
    ndarray of int
        A donor position per missing row.

    References
    ----------
    Little RJA (1988). Missing-data adjustments in large surveys. J Bus Econ Stat 6:287-296.
    van Buuren S (2018). Flexible Imputation of Missing Data, 2nd ed. CRC Press, sec. 3.4.
    """
    n_obs = len(predicted_observed)
    k = min(donors, n_obs)
    order, sorted_values = sorted_order(predicted_observed) if order is None else order
    width = min(2 * k, n_obs)
    # binary search with the queries in increasing order (each search starts near the last
    # one, so it stays in cache: about twice as fast); the positions do not depend on it
    query_order = stable_argsort(predicted_missing)
    position = np.empty(len(predicted_missing), dtype=np.intp)
    position[query_order] = np.searchsorted(sorted_values, predicted_missing[query_order])
    start = np.clip(position - k, 0, n_obs - width)
    window = start[:, None] + np.arange(width)[None, :]
    distance = np.abs(sorted_values[window] - predicted_missing[:, None])
    if width > k:
        nearest = np.argpartition(distance, k - 1, axis=1)[:, :k]
        # argpartition leaves ties in an arbitrary but deterministic order; sort for a stable donor set
        nearest = np.sort(nearest, axis=1)
    else:
        nearest = np.broadcast_to(np.arange(width), (len(predicted_missing), width))
    pick = rng.integers(0, k, size=len(predicted_missing))
    chosen = window[np.arange(len(predicted_missing)), nearest[np.arange(len(predicted_missing)), pick]]
    return order[chosen]


def augmentation(gram_observed: np.ndarray, predictor_columns: np.ndarray, n_fit: int,
                 n_classes: int) -> Tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Pseudo-records that keep logistic-type fits finite under perfect prediction.

    For each predictor, two records at its mean plus and minus one SD (others at their
    means), one per outcome category, with total weight (p + 1) spread evenly. Means and
    SDs are those of the current completed data (all rows), read off the kept
    cross-product matrix, so no extra pass over the rows is needed.

    Parameters
    ----------
    gram_observed : ndarray
        The cross-product matrix of the completed design, intercept column first.
    predictor_columns : ndarray of int
        The predictors' columns in the design.
    n_fit : int
        The rows the fit uses.
    n_classes : int
        The outcome's categories.

    Returns
    -------
    (x, y, w) : ndarray
        The pseudo-records' predictors, categories and weights.

    References
    ----------
    White IR, Daniel R, Royston P (2010). Avoiding bias due to perfect prediction in
    multiple imputation of incomplete categorical variables. Comput Stat Data Anal
    54:2267-2275. (Weighting as we recall it from that paper.)
    """
    cols = predictor_columns
    means = gram_observed[0, cols] / max(n_fit, 1)
    second = np.diag(gram_observed)[cols] / max(n_fit, 1)
    sds = np.sqrt(np.maximum(second - means ** 2, 0.0))
    varying = [i for i in range(1, len(cols)) if sds[i] > 0]
    p = len(varying)
    if p == 0:
        return np.zeros((0, len(cols))), np.zeros(0, dtype=np.int64), np.zeros(0)
    rows = []
    for i in varying:
        for sign in (-1.0, 1.0):
            point = means.copy()
            point[0] = 1.0
            point[i] += sign * sds[i]
            rows.append(point)
    points = np.array(rows)
    records = np.repeat(points, n_classes, axis=0)
    outcome = np.tile(np.arange(n_classes), len(points))
    weights = np.full(len(records), (p + 1) / (2 * p * n_classes))
    return records, outcome, weights


def low(x: np.ndarray, x_low: Optional[np.ndarray]) -> np.ndarray:
    return x.astype(np.float32) if x_low is None else x_low


def weighted_cross(x_low: np.ndarray, weight: np.ndarray) -> np.ndarray:
    """x' diag(weight) x for weight >= 0, as float64, computed in float32.

    Only the information matrix is computed this way (about 3 times faster): it sets the
    Newton path and the spread of the parameter draw, where a relative error near 1e-7 is
    far below anything that matters; the log-likelihood and the gradient, which fix the
    estimate, stay in float64.
    """
    scaled = x_low * np.sqrt(np.maximum(weight, 0.0)).astype(np.float32)[:, None]
    return (scaled.T @ scaled).astype(float)      # same operand twice: a symmetric rank-k update


def multinomial_terms(x: np.ndarray, y: np.ndarray, w: Optional[np.ndarray], beta: np.ndarray, n_classes: int,
                      x_low: Optional[np.ndarray] = None):
    """Log-likelihood, gradient and information of a baseline-category logit on one block of rows
    (``w``: row weights, None for the data rows, which all weigh 1; ``x_low``: the same block in
    float32, for the information matrix).

    Parameters
    ----------
    x : ndarray
        The block's predictors (intercept included).
    y : ndarray of int
        The block's categories.
    w : ndarray, optional
        Row weights.
    beta : ndarray
        The current coefficients, (K - 1) x p flattened.
    n_classes : int
        K, the categories.
    x_low : ndarray, optional
        ``x`` in float32.

    Returns
    -------
    (loglik, gradient, information) : float, ndarray, ndarray
    """
    q = x.shape[1]
    x_low = low(x, x_low)
    k1 = n_classes - 1
    if n_classes == 2:
        eta = x @ beta
        prob = expit(eta)
        terms = np.where(y == 1, eta, 0.0)
        terms -= np.logaddexp(0.0, eta)
        resid = (y == 1) - prob
        weight = prob * (1 - prob)
        if w is not None:
            terms *= w
            resid *= w
            weight *= w
        return float(np.sum(terms)), x.T @ resid, weighted_cross(x_low, weight)
    eta = x @ beta.reshape(k1, q).T                       # (rows, k1)
    top = np.maximum(eta.max(axis=1), 0.0)
    expo = np.exp(eta - top[:, None])
    denom = np.exp(-top)
    denom += expo.sum(axis=1)
    log_denom = np.log(denom)
    prob = expo
    prob /= denom[:, None]                                 # categories 1..K-1
    # log P(y) = eta_y - log(1 + sum_k exp(eta_k)), with eta_0 = 0
    chosen = np.take_along_axis(eta, np.maximum(y - 1, 0)[:, None], axis=1)[:, 0]
    terms = np.where(y == 0, 0.0, chosen)
    terms -= top
    terms -= log_denom
    resid = -prob
    resid[np.arange(len(y)), np.maximum(y - 1, 0)] += (y > 0)
    if w is not None:
        terms *= w
        resid *= w[:, None]
    grad = (x.T @ resid).T.ravel()
    info = np.zeros((k1 * q, k1 * q))
    for a in range(k1):
        for b in range(a, k1):
            weight = prob[:, a] * ((a == b) - prob[:, b])
            if w is not None:
                weight *= w
            if a == b:
                block = weighted_cross(x_low, weight)
            else:
                block = (x_low.T @ (x_low * weight.astype(np.float32)[:, None])).astype(float)
            info[a * q:(a + 1) * q, b * q:(b + 1) * q] = block
            if a != b:
                info[b * q:(b + 1) * q, a * q:(a + 1) * q] = block
    return float(np.sum(terms)), grad, info


def ordinal_terms(x: np.ndarray, y: np.ndarray, w: Optional[np.ndarray], params: np.ndarray, n_classes: int,
                  x_low: Optional[np.ndarray] = None):
    """Log-likelihood, gradient and information of a proportional-odds model on one block of rows
    (``w``: row weights, None for the data rows, which all weigh 1; ``x_low``: the same block in
    float32, for the slopes' information block).

    Parameters are (theta_0..theta_{K-2}, b): P(Y <= k | x) = expit(theta_k - x'b), with x
    excluding the intercept. Sums over the rows of one category use ``np.bincount``.

    Parameters
    ----------
    x : ndarray
        The block's predictors (no intercept).
    y : ndarray of int
        The block's categories.
    w : ndarray, optional
        Row weights.
    params : ndarray
        Cut points then slopes.
    n_classes : int
        K, the categories.
    x_low : ndarray, optional
        ``x`` in float32.

    Returns
    -------
    (loglik, gradient, information) : float, ndarray, ndarray

    References
    ----------
    McCullagh P (1980). Regression models for ordinal data. J R Stat Soc B 42:109-142.
    """
    k1 = n_classes - 1
    theta, b = params[:k1], params[k1:]
    eta = x @ b
    cut = np.concatenate([[-np.inf], theta, [np.inf]])
    f_up = expit(np.take(cut, y + 1) - eta)
    f_lo = expit(np.take(cut, y) - eta)
    d_up, d_lo = f_up * (1 - f_up), f_lo * (1 - f_lo)
    prob = np.maximum(f_up - f_lo, 1e-300)
    inverse = 1.0 / prob
    g_up = d_up * inverse
    g_lo = -d_lo * inverse
    # second derivatives of log P in 'upper' and 'lower' (d expit' = expit' (1 - 2 expit))
    h_uu = d_up * (1 - 2 * f_up) * inverse - g_up ** 2
    h_ll = -d_lo * (1 - 2 * f_lo) * inverse - g_lo ** 2
    h_ul = -g_up * g_lo
    log_prob = np.log(prob)
    if w is not None:
        log_prob *= w
        for term in (g_up, g_lo, h_uu, h_ll, h_ul):
            term *= w
    size = k1 + len(b)
    grad = np.zeros(size)
    hess = np.zeros((size, size))

    def by_category(values):              # sum over rows of each category 0..K-1
        return np.bincount(y, weights=values, minlength=n_classes)

    # theta_k enters 'upper' for rows in category k and 'lower' for rows in category k + 1
    grad[:k1] = by_category(g_up)[:k1] + by_category(g_lo)[1:]
    grad[k1:] = -(x.T @ (g_up + g_lo))
    hess[np.arange(k1), np.arange(k1)] = by_category(h_uu)[:k1] + by_category(h_ll)[1:]
    if k1 > 1:
        off = by_category(h_ul)[1:k1]      # rows in category k use theta_k and theta_{k-1}
        hess[np.arange(1, k1), np.arange(k1 - 1)] = off
        hess[np.arange(k1 - 1), np.arange(1, k1)] = off
    # d2/dtheta_k db: rows in category k (upper) and k + 1 (lower), each times -x
    up_part, lo_part = h_uu + h_ul, h_ul + h_ll
    rows = np.arange(len(y))
    weights_k = np.zeros((len(y), k1))
    in_upper = y < k1
    weights_k[rows[in_upper], y[in_upper]] = up_part[in_upper]
    in_lower = y > 0
    weights_k[rows[in_lower], y[in_lower] - 1] += lo_part[in_lower]
    cross = -(x.T @ weights_k)
    hess[k1:, :k1] = cross
    hess[:k1, k1:] = cross.T
    # the log-likelihood is concave in eta, so minus this weight is >= 0 (up to rounding)
    hess[k1:, k1:] = -weighted_cross(low(x, x_low), -(h_uu + 2 * h_ul + h_ll))
    return float(np.sum(log_prob)), grad, -hess


def newton(terms, design: np.ndarray, rows: np.ndarray, y: np.ndarray, columns: np.ndarray,
           augment: Tuple[np.ndarray, np.ndarray, np.ndarray], start: Optional[np.ndarray], n_classes: int,
           ordered: bool) -> Tuple[np.ndarray, np.ndarray]:
    """Maximise a concave log-likelihood by Newton steps with step halving; returns (estimate, information).

    ``start`` None means a cold start: with many rows, the fit first converges on an evenly
    spaced subset of rows, so the passes over all rows start near the optimum.

    Parameters
    ----------
    terms : callable
        :func:`multinomial_terms` or :func:`ordinal_terms`.
    design : ndarray
        The design matrix.
    rows : ndarray of int
        The observed rows of the variable.
    y : ndarray of int
        Their categories.
    columns : ndarray of int
        The predictors' columns.
    augment : (x, y, w)
        The pseudo-records of :func:`augmentation`.
    start : ndarray, optional
        The previous iteration's estimate (a warm start).
    n_classes : int
        The categories.
    ordered : bool
        Proportional-odds model.

    Returns
    -------
    (estimate, information) : ndarray
    """
    if start is None:
        start = cold_start(n_classes, len(columns), y, ordered)
        if len(rows) > 4 * WARMUP_ROWS:
            every = len(rows) // WARMUP_ROWS
            start, _ = newton(terms, design, rows[::every], y[::every], columns, augment, start, n_classes, ordered)
    aug_x, aug_y, aug_w = augment
    if ordered:
        aug_x = aug_x[:, 1:]
    # Each pass gathers its row blocks afresh rather than keeping them for a later pass: a
    # warm visit usually makes one pass, and a kept copy of the fitted rows (about 280 MB at
    # 850,000 rows) cost memory and fresh pages on every visit for nothing.

    def evaluate(params):
        loglik, grad, info = terms(aug_x, aug_y, aug_w, params, n_classes)
        for begin in range(0, len(rows), CHUNK_ROWS):
            block = gather(design, rows[begin:begin + CHUNK_ROWS], columns)
            part = terms(block, y[begin:begin + CHUNK_ROWS], None, params, n_classes, block.astype(np.float32))
            loglik += part[0]
            grad = grad + part[1]
            info = info + part[2]
        return loglik, grad, info

    params = start.copy()
    loglik, grad, info = evaluate(params)
    for _ in range(NEWTON_MAX_STEPS):
        lower = cholesky(info)
        step = linalg.cho_solve((lower, True), grad)
        biggest = float(np.max(np.abs(step))) if step.size else 0.0
        # Stop when the step is tiny against the posterior SD: what remains after it (quadratic
        # convergence) cannot matter for a draw from N(estimate, information^-1). Warm-started
        # visits usually stop here after one pass over the rows.
        posterior_sd = np.sqrt(np.diag(linalg.cho_solve((lower, True), np.eye(len(step)))))
        ratio = float(np.max(np.abs(step) / posterior_sd))
        # Newton converges quadratically: a step of r posterior SDs leaves an error of about
        # c r^2 / sqrt(n) SDs (the third derivative over the information is O(1) per row on
        # the standardised scale; c was 0.1-0.6 for every model of benchmarks/impute.py).
        # When even twice that is under NEWTON_SD_FRACTION, take the step and stop rather
        # than spend a pass over the rows to confirm it: a warm-started visit (steps of
        # about 1-2 SDs once the chain has mixed) then costs one pass instead of two.
        remainder = ONE_STEP_SAFETY * ratio ** 2 / math.sqrt(max(len(rows), 1))
        if biggest < NEWTON_TOLERANCE or ratio < NEWTON_SD_FRACTION or remainder < NEWTON_SD_FRACTION:
            params = params + step
            break
        if biggest > 5.0:                      # keep a wild first step from overshooting
            step *= 5.0 / biggest
        for _halving in range(30):
            trial = params + step
            if ordered and np.any(np.diff(trial[:n_classes - 1]) <= 0):
                step = step / 2
                continue
            new = evaluate(trial)
            if new[0] >= loglik - 1e-10 * abs(loglik):
                break
            step = step / 2
        else:
            break
        params, (loglik, grad, info) = trial, new
    return params, info


def cold_start(n_classes: int, n_columns: int, y: np.ndarray, ordered: bool) -> np.ndarray:
    """Zero slopes; for the ordinal model, cut points at the logits of the cumulative shares.

    Parameters
    ----------
    n_classes : int
        The outcome's categories.
    n_columns : int
        The predictors (without the intercept for the ordinal model).
    y : ndarray of int
        The observed categories (0-based).
    ordered : bool
        Proportional-odds model (else baseline-category logit).

    Returns
    -------
    ndarray
        The starting parameter vector.
    """
    if not ordered:
        return np.zeros((n_classes - 1) * n_columns)
    shares = np.bincount(y, minlength=n_classes).cumsum()[:-1] / max(len(y), 1)
    shares = np.clip(shares, 1e-3, 1 - 1e-3)
    theta = np.log(shares / (1 - shares)) + np.arange(n_classes - 1) * 1e-6   # strictly increasing
    return np.concatenate([theta, np.zeros(n_columns)])
