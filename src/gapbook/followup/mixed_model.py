"""The mixed model for repeated measures: a multivariate normal model over the planned visits.

Each participant's outcomes at the planned visits are multivariate normal with mean
``X_i beta`` (the design rows of a long-format formula such as
``chg ~ arm * C(visit) + base * C(visit)``) and an unstructured covariance ``Sigma``
(one variance per visit and one covariance per pair of visits). A participant
contributes the visits they attended; under missing at random the likelihood of what was
observed gives valid estimates without imputing anything (Rubin 1976). Estimation is by
restricted maximum likelihood (REML; Patterson & Thompson 1971) or maximum likelihood.

statsmodels' MixedLM models random effects plus independent residuals and cannot fit an
unstructured residual covariance, so the likelihood is written here on numpy/scipy. It is
computed per *pattern* of observed visits, not per participant: participants who attended
the same visits share ``Sigma_o^-1``, and their design and outcome enter only through
cross-products summed once before the optimisation (``sum_i x_is x_it'``,
``sum_i x_is y_it``, ``sum_i y_is y_it`` for each pair of visits s, t), so an iteration
costs O(patterns x visits^2 x terms^2) whatever the number of participants.

``Sigma = L L'`` with ``L`` lower triangular and a log-diagonal, so every step stays
positive definite; scipy's trust-region optimiser uses the analytic gradient and the
expected (Fisher) information of the REML likelihood. Degrees of freedom for each
contrast are Satterthwaite's (1946), as applied to mixed models by Fai & Cornelius
(1996), with the covariance parameters' variance taken from the inverse of that expected
information; standard errors are the model-based ones (no Kenward-Roger inflation).
With complete, balanced data and the same regressors at every visit they reduce to n - q
for each visit's contrast, the exact t degrees of freedom of ordinary least squares.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Dict, List, Optional, Sequence, Tuple

import numpy as np
import pandas as pd
from scipy import linalg, optimize

from ..errors import AnalysisError, InputError
from ..inference import wald_inference
from ..little import pattern_rows
from ..vocabulary import MIXED_MODEL_METHODS
from .repeated import RepeatedOutcome, label

__all__ = ["STRATEGY", "design_crossproducts", "MixedModelFit", "VISIT_EFFECT_COLUMNS", "fit_mixed_model"]

STRATEGY = "mixed_model"
LOG_2PI = math.log(2 * math.pi)


# ---------------------------------------------------------------------------
# sufficient statistics per observed-visit pattern

@dataclass(frozen=True)
class _Pattern:
    """Participants who attended the same visits: count and cross-products of design and outcome."""

    visits: np.ndarray      # (k,) positions of the attended visits
    n: int
    xx: np.ndarray          # (k, k, p, p): xx[s, t] = sum_i x_is x_it'
    xy: np.ndarray          # (k, k, p):    xy[s, t] = sum_i x_is y_it
    yy: np.ndarray          # (k, k):       yy[s, t] = sum_i y_is y_it


def design_crossproducts(design: np.ndarray) -> np.ndarray:
    """xx[s, t] = sum_i x_is x_it' over all participants: (T, T, p, p).

    The part of the complete-data statistics that does not depend on the outcome; imputed
    datasets share it, so it is computed once for all of them.

    Parameters
    ----------
    design : ndarray, shape (n, T, p)
        Each participant's design rows at the T planned visits.

    Returns
    -------
    ndarray, shape (T, T, p, p)
    """
    n, t, p = design.shape
    flat = design.reshape(n, t * p)
    return np.ascontiguousarray((flat.T @ flat).reshape(t, p, t, p).transpose(0, 2, 1, 3))


def _patterns(design: np.ndarray, values: np.ndarray, complete_xx: Optional[np.ndarray] = None) -> List[_Pattern]:
    """Cross-products per pattern of observed visits; participants with no observed visit drop out.

    ``complete_xx`` (from :func:`design_crossproducts`) is used when every outcome is observed.
    """
    observed = ~np.isnan(values)
    n, t, p = design.shape
    if complete_xx is not None and observed.all():
        flat = design.reshape(n, t * p)
        xy = (flat.T @ values).reshape(t, p, t).transpose(0, 2, 1)
        return [_Pattern(visits=np.arange(t), n=n, xx=complete_xx, xy=np.ascontiguousarray(xy),
                         yy=values.T @ values)]
    masks, groups = pattern_rows(observed)
    found = []
    for mask, rows in zip(masks, groups):
        visits = np.flatnonzero(mask)
        k = len(visits)
        if k == 0:
            continue
        x = design[rows][:, visits, :].reshape(len(rows), k * p)
        y = values[rows][:, visits]
        z = np.hstack([x, y])
        cross = z.T @ z
        xx = cross[:k * p, :k * p].reshape(k, p, k, p).transpose(0, 2, 1, 3)
        xy = cross[:k * p, k * p:].reshape(k, p, k).transpose(0, 2, 1)
        yy = cross[k * p:, k * p:]
        found.append(_Pattern(visits=visits, n=len(rows), xx=np.ascontiguousarray(xx),
                              xy=np.ascontiguousarray(xy), yy=yy))
    return found


# ---------------------------------------------------------------------------
# the likelihood at one covariance matrix

@dataclass(frozen=True)
class _Evaluation:
    """Everything the likelihood gives at one Sigma: GLS coefficients, log-likelihood, gradient."""

    loglik: float
    beta: np.ndarray
    a_inverse: np.ndarray           # (X' V^-1 X)^-1: the model-based covariance of beta
    gradient: np.ndarray            # (T, T) d loglik / d Sigma (entries treated as free, symmetric)
    precisions: Tuple[np.ndarray, ...]   # per pattern Sigma_o^-1


def _embed(block: np.ndarray, visits: np.ndarray, size: int) -> np.ndarray:
    full = np.zeros((size, size))
    full[np.ix_(visits, visits)] = block
    return full


def _evaluate(patterns: Sequence[_Pattern], sigma: np.ndarray, method: str, n_observations: int) -> _Evaluation:
    """Log-likelihood (REML or ML), GLS coefficients and gradient with respect to Sigma."""
    size = sigma.shape[0]
    p = patterns[0].xx.shape[2]
    a = np.zeros((p, p))
    b = np.zeros(p)
    log_dets, precisions = [], []
    for pattern in patterns:
        block = sigma[np.ix_(pattern.visits, pattern.visits)]
        try:
            factor = linalg.cho_factor(block, lower=True)
        except linalg.LinAlgError:
            raise AnalysisError("the visit covariance matrix is not positive definite") from None
        w = linalg.cho_solve(factor, np.eye(len(pattern.visits)))
        precisions.append(w)
        log_dets.append(2.0 * float(np.sum(np.log(np.diag(factor[0])))))
        a += np.tensordot(w, pattern.xx, axes=([0, 1], [0, 1]))
        b += np.tensordot(w, pattern.xy, axes=([0, 1], [0, 1]))
    try:
        a_factor = linalg.cho_factor(a, lower=True)
    except linalg.LinAlgError:
        raise AnalysisError("the model's terms cannot all be estimated from the attended visits (a term, e.g. "
                            "an arm at a visit, has no observed outcome); simplify the formula") from None
    a_inverse = linalg.cho_solve(a_factor, np.eye(p))
    beta = a_inverse @ b
    reml = method == "reml"
    loglik = 0.0
    gradient = np.zeros((size, size))
    for pattern, w, log_det in zip(patterns, precisions, log_dets):
        d_beta = pattern.xy @ beta
        scatter = pattern.yy - d_beta - d_beta.T + (pattern.xx @ beta) @ beta
        loglik -= 0.5 * (pattern.n * log_det + float(np.sum(w * scatter)))
        local = pattern.n * w - w @ scatter @ w
        if reml:
            local -= w @ _leverage(pattern, a_inverse) @ w
        gradient[np.ix_(pattern.visits, pattern.visits)] -= 0.5 * local
    if reml:
        loglik -= 0.5 * (2.0 * float(np.sum(np.log(np.diag(a_factor[0])))) + (n_observations - p) * LOG_2PI)
    else:
        loglik -= 0.5 * n_observations * LOG_2PI
    return _Evaluation(loglik=loglik, beta=beta, a_inverse=a_inverse, gradient=gradient,
                       precisions=tuple(precisions))


def _leverage(pattern: _Pattern, a_inverse: np.ndarray) -> np.ndarray:
    """M[s, t] = sum_i x_is' A^-1 x_it over the pattern's participants (A^-1 symmetric)."""
    return np.tensordot(pattern.xx, a_inverse, axes=([2, 3], [0, 1]))


def _information(patterns: Sequence[_Pattern], evaluation: _Evaluation, method: str, size: int) -> np.ndarray:
    """Expected information of the covariance entries, as a (T, T, T, T) array F[s, t, u, v].

    For directions dSigma_a, dSigma_b (symmetric matrices) the information is
    sum F[s, t, u, v] dSigma_a[s, t] dSigma_b[u, v] = tr(P dV_a P dV_b) / 2, with
    P = V^-1 - V^-1 X (X'V^-1X)^-1 X'V^-1 for REML and P = V^-1 for ML.

    References
    ----------
    Harville DA (1977). Maximum likelihood approaches to variance component estimation and
    to related problems. JASA 72:320-338 (the REML information tr(P V_a P V_b) / 2).
    """
    first = np.zeros((size,) * 4)
    reml = method == "reml"
    h = np.zeros((size, size) + evaluation.a_inverse.shape) if reml else None
    for pattern, w in zip(patterns, evaluation.precisions):
        w_full = _embed(w, pattern.visits, size)
        first += pattern.n * np.einsum("tu,vs->stuv", w_full, w_full)
        if reml:
            k_full = _embed(w @ _leverage(pattern, evaluation.a_inverse) @ w, pattern.visits, size)
            first -= np.einsum("tu,vs->stuv", k_full, w_full) + np.einsum("tu,vs->stuv", w_full, k_full)
            # H[s, t] = sum_i X_i' W e_s e_t' W X_i over the pattern's participants.
            local = np.tensordot(np.tensordot(w, pattern.xx, axes=([0], [0])), w, axes=([1], [0]))
            local = local.transpose(0, 3, 1, 2)
            h[np.ix_(pattern.visits, pattern.visits)] += local
    if reml:
        q = h @ evaluation.a_inverse                       # (T, T, p, p): H[s, t] A^-1
        flat = q.reshape(size * size, *q.shape[2:])
        first += np.tensordot(flat, flat, axes=([1, 2], [2, 1])).reshape((size,) * 4)
    return 0.5 * first


def _in_directions(info: np.ndarray, directions: np.ndarray) -> np.ndarray:
    """The information for parameters whose covariance derivatives are ``directions`` (K, T, T)."""
    flat = directions.reshape(len(directions), -1)
    return flat @ info.reshape(flat.shape[1], flat.shape[1]) @ flat.T


def _cholesky_directions(factor: np.ndarray) -> np.ndarray:
    """dSigma / dtheta for Sigma = L L' with theta = (log L_ii, L_ij for i > j): (K, T, T)."""
    size = factor.shape[0]
    rows, cols = np.tril_indices(size)
    directions = np.zeros((len(rows), size, size))
    for k, (i, j) in enumerate(zip(rows, cols)):
        unit = np.zeros((size, size))
        unit[i, j] = factor[i, j] if i == j else 1.0
        directions[k] = unit @ factor.T + factor @ unit.T
    return directions


def _factor_from(theta: np.ndarray, size: int) -> np.ndarray:
    factor = np.zeros((size, size))
    rows, cols = np.tril_indices(size)
    factor[rows, cols] = theta
    factor[np.diag_indices(size)] = np.exp(np.diag(factor))
    return factor


def _theta_from(sigma: np.ndarray) -> np.ndarray:
    factor = np.linalg.cholesky(sigma)
    factor[np.diag_indices(len(sigma))] = np.log(np.diag(factor))
    return factor[np.tril_indices(len(sigma))]


# ---------------------------------------------------------------------------
# the fitted model

@dataclass(frozen=True)
class Contrast:
    """Linear combinations L beta of a mixed-model fit with Satterthwaite degrees of freedom."""

    estimate: np.ndarray
    std_error: np.ndarray
    df: np.ndarray
    alpha: float

    def interval(self) -> Tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Lower and upper confidence limits at level 1 - alpha and the two-sided p-value (t with df)."""
        return wald_inference(self.estimate, self.std_error, self.df, self.alpha)


@dataclass(frozen=True)
class MixedModelFit:
    """A mixed model for repeated measures fitted by REML or ML.

    Attributes
    ----------
    terms, coef, cov : coefficients (statsmodels' names for the formula) and their
        model-based covariance (X' V^-1 X)^-1.
    sigma : (T, T) the estimated covariance of the outcome over the analysed visits.
    loglik : the maximised (restricted) log-likelihood.
    n_used : participants with at least one observed visit; n_observations : observed cells.
    """

    outcome: RepeatedOutcome = field(repr=False)
    method: str
    terms: Tuple[str, ...]
    coef: np.ndarray
    cov: np.ndarray
    sigma: np.ndarray
    loglik: float
    converged: bool
    iterations: int
    gradient_norm: float
    n_used: int
    n_observations: int
    alpha: float
    strategy: str = STRATEGY
    _patterns: Tuple[_Pattern, ...] = field(default=(), repr=False, compare=False)
    _precisions: Tuple[np.ndarray, ...] = field(default=(), repr=False, compare=False)
    _theta_covariance: np.ndarray = field(default=None, repr=False, compare=False)
    _directions: np.ndarray = field(default=None, repr=False, compare=False)

    def std_errors(self) -> np.ndarray:
        """Standard errors: square roots of the covariance's diagonal (as ``ModelFit.std_errors()``)."""
        return np.sqrt(np.diag(self.cov))

    def covariance_frame(self) -> pd.DataFrame:
        """The estimated visit covariance matrix with the visits as labels."""
        labels = [str(v) for v in self.outcome.visits]
        return pd.DataFrame(self.sigma, index=labels, columns=labels)

    def satterthwaite_df(self, contrast: np.ndarray) -> float:
        """Satterthwaite degrees of freedom of one contrast c' beta.

        nu = 2 (c' Phi c)^2 / (g' I^-1 g), with Phi = (X'V^-1X)^-1, g the gradient of
        c' Phi c with respect to the covariance parameters and I their expected information.

        References
        ----------
        Satterthwaite FE (1946). An approximate distribution of estimates of variance
        components. Biometrics Bulletin 2:110-114.
        Fai AHT, Cornelius PL (1996). Approximate F-tests of multiple degree of freedom
        hypotheses in generalized least squares analyses of unbalanced split-plot
        experiments. J Stat Comput Simul 54:363-378.
        """
        c = np.asarray(contrast, dtype=float)
        u = self.cov @ c
        phi = float(c @ u)
        size = self.sigma.shape[0]
        slope = np.zeros((size, size))
        for pattern, w in zip(self._patterns, self._precisions):
            q = (pattern.xx @ u) @ u
            slope[np.ix_(pattern.visits, pattern.visits)] += w @ q @ w
        g = np.einsum("st,kst->k", slope, self._directions)
        spread = float(g @ self._theta_covariance @ g)
        if spread <= 0 or phi <= 0:
            return math.inf
        return 2 * phi ** 2 / spread

    def contrast(self, matrix: np.ndarray) -> Contrast:
        """Estimates, model-based standard errors and Satterthwaite df of the rows of ``matrix``."""
        matrix = np.atleast_2d(np.asarray(matrix, dtype=float))
        estimate = matrix @ self.coef
        se = np.sqrt(np.einsum("ra,ab,rb->r", matrix, self.cov, matrix))
        df = np.array([self.satterthwaite_df(row) for row in matrix])
        return Contrast(estimate=estimate, std_error=se, df=df, alpha=self.alpha)

    def visit_effects(self, strategy: Optional[str] = None) -> pd.DataFrame:
        """The exposure effect at every visit: rows of ``visit_effects.csv``."""
        rows = []
        for term, matrix in self.outcome.exposure_contrasts().items():
            result = self.contrast(matrix)
            lower, upper, p = result.interval()
            for k, visit in enumerate(self.outcome.visits):
                rows.append({"strategy": strategy or self.strategy, "visit": visit, "term": term,
                             "estimate": result.estimate[k], "std_error": result.std_error[k],
                             "ci_lower": lower[k], "ci_upper": upper[k], "p_value": p[k], "df": result.df[k],
                             "n_used": self.n_used})
        return pd.DataFrame(rows, columns=VISIT_EFFECT_COLUMNS)

    def visit_means(self, strategy: Optional[str] = None) -> pd.DataFrame:
        """The model's mean outcome per exposure group and visit, over all participants' covariates."""
        rows = []
        for level, matrix in self.outcome.mean_designs().items():
            result = self.contrast(matrix)
            lower, upper, _ = result.interval()
            for k, visit in enumerate(self.outcome.visits):
                rows.append({"strategy": strategy or self.strategy, "group": level, "visit": visit,
                             "estimate": result.estimate[k], "std_error": result.std_error[k],
                             "ci_lower": lower[k], "ci_upper": upper[k], "df": result.df[k]})
        return pd.DataFrame(rows)

    def coefficients(self) -> pd.DataFrame:
        """term, estimate, std_error, df (Satterthwaite), ci_lower, ci_upper, p_value."""
        result = self.contrast(np.eye(len(self.coef)))
        lower, upper, p = result.interval()
        return pd.DataFrame({"term": list(self.terms), "estimate": result.estimate, "std_error": result.std_error,
                             "df": result.df, "ci_lower": lower, "ci_upper": upper, "p_value": p})


VISIT_EFFECT_COLUMNS = ("strategy", "visit", "term", "estimate", "std_error", "ci_lower", "ci_upper", "p_value",
                        "df", "n_used")


def _start(design: np.ndarray, values: np.ndarray) -> np.ndarray:
    """A positive definite start: the covariance of ordinary least squares residuals.

    Pairs of visits use the participants who attended both; if that matrix is not
    positive definite, the per-visit variances alone (no correlation).
    """
    observed = ~np.isnan(values)
    x = design[observed]
    y = values[observed]
    gram = x.T @ x
    try:
        beta = linalg.solve(gram, x.T @ y, assume_a="pos")
    except (linalg.LinAlgError, ValueError):
        beta = np.linalg.pinv(gram) @ (x.T @ y)
    residual = np.where(observed, values - design @ beta, 0.0)
    both = observed.T.astype(float) @ observed.astype(float)
    with np.errstate(invalid="ignore", divide="ignore"):
        pairwise = (residual.T @ residual) / both
    variance = np.diag(pairwise).copy()
    fallback = max(float(np.nanvar(values)), 1.0)
    variance = np.where(np.isfinite(variance) & (variance > 1e-8 * fallback), variance, fallback)
    start = np.where(np.isfinite(pairwise) & (both >= 2), pairwise, 0.0)
    start[np.diag_indices_from(start)] = variance
    try:
        np.linalg.cholesky(start)
        return start
    except np.linalg.LinAlgError:
        return np.diag(variance)


def fit_mixed_model(outcome: RepeatedOutcome, *, method: str = "reml", alpha: float = 0.05,
                    tolerance: float = 1e-8, max_iterations: int = 200,
                    complete_crossproducts: Optional[np.ndarray] = None) -> MixedModelFit:
    """Fit the mixed model for repeated measures (unstructured covariance) by REML or ML.

    Parameters
    ----------
    outcome : the repeated-measures data (see :func:`gapbook.followup.repeated.repeated_outcome`).
    method : ``"reml"`` (restricted maximum likelihood, the default) or ``"ml"``.
    alpha : 1 - confidence level of the intervals.
    tolerance : convergence when the gradient, scaled by the information, is below this.
    max_iterations : iteration cap of the trust-region optimiser.
    complete_crossproducts : :func:`design_crossproducts` of ``outcome.design``, reused
        when every outcome is observed (imputed datasets share it).

    Returns
    -------
    MixedModelFit with coefficients, their model-based covariance, the visit covariance
    matrix, and contrasts with Satterthwaite degrees of freedom.

    References
    ----------
    Mallinckrodt CH, Lane PW, Schnell D, Peng Y, Mancuso JP (2008). Recommendations for
    the primary analysis of continuous endpoints in longitudinal clinical trials. Drug
    Information Journal 42:303-319.
    Patterson HD, Thompson R (1971). Recovery of inter-block information when block sizes
    are unequal. Biometrika 58:545-554.
    Jennrich RI, Schluchter MD (1986). Unbalanced repeated-measures models with structured
    covariance matrices. Biometrics 42:805-820.
    """
    if method not in MIXED_MODEL_METHODS:
        raise InputError(f"'{method}' is not one of {', '.join(MIXED_MODEL_METHODS)}", option="method")
    values = outcome.values
    observed = ~np.isnan(values)
    if not observed.any():
        raise InputError(f"the outcome '{outcome.outcome_name}' is observed at no visit", option="formula")
    # Work on a standardised outcome so the optimiser sees numbers near 1; transform back at the end.
    centre = float(np.nanmean(values))
    scale = float(np.nanstd(values)) or 1.0
    scaled = (values - centre) / scale
    design = outcome.design
    patterns = _patterns(design, scaled, complete_crossproducts)
    n_observations = int(observed.sum())
    p = design.shape[2]
    if n_observations <= p and method == "reml":
        raise AnalysisError(f"the mixed model has {p} terms but only {n_observations} observed outcomes")
    size = values.shape[1]
    attended = observed.sum(axis=0)
    if (attended == 0).any():
        visit = outcome.visits[int(np.flatnonzero(attended == 0)[0])]
        raise AnalysisError(f"no participant has the outcome at visit {label(visit)}; drop it from the planned visits")
    theta0 = _theta_from(_start(design, scaled))
    cache: Dict[bytes, Tuple[np.ndarray, _Evaluation]] = {}

    def evaluate(theta):
        key = theta.tobytes()
        if key not in cache:
            cache.clear()
            factor = _factor_from(theta, size)
            cache[key] = (factor, _evaluate(patterns, factor @ factor.T, method, n_observations))
        return cache[key]

    def objective(theta):
        try:
            factor, evaluation = evaluate(theta)
        except AnalysisError:
            return math.inf, np.zeros_like(theta)
        grad = np.einsum("st,kst->k", evaluation.gradient, _cholesky_directions(factor))
        return -evaluation.loglik, -grad

    def fisher(theta):
        factor, evaluation = evaluate(theta)
        return _in_directions(_information(patterns, evaluation, method, size), _cholesky_directions(factor))

    result = optimize.minimize(objective, theta0, jac=True, hess=fisher, method="trust-exact",
                               options={"gtol": tolerance, "maxiter": max_iterations})
    factor = _factor_from(result.x, size)
    sigma_scaled = factor @ factor.T
    evaluation = _evaluate(patterns, sigma_scaled, method, n_observations)
    directions_scaled = _cholesky_directions(factor)
    information = _in_directions(_information(patterns, evaluation, method, size), directions_scaled)
    gradient = np.einsum("st,kst->k", evaluation.gradient, directions_scaled)
    try:
        theta_covariance = np.linalg.inv(information)
    except np.linalg.LinAlgError:
        theta_covariance = np.linalg.pinv(information)
    step = float(np.sqrt(max(gradient @ theta_covariance @ gradient, 0.0)))
    converged = bool(np.isfinite(result.fun) and step < 1e-4)
    if not converged:
        raise AnalysisError(f"the mixed model for repeated measures did not converge after {result.nit} iterations "
                            f"({result.message}); check for visits with very few observed outcomes")
    # Back to the outcome's own scale: y = centre + scale * z.
    coef = evaluation.beta * scale
    intercept = _constant_column(design)
    if intercept is not None:
        coef[intercept] += centre
    elif abs(centre) > 0:
        coef = _refit_shift(design, evaluation, centre, scale, coef)
    sigma = sigma_scaled * scale ** 2
    cov = evaluation.a_inverse * scale ** 2
    # y = centre + scale * z: the density gains 1/scale per observed cell; REML's log|X'V^-1X| gives back p of them.
    jacobian = (n_observations - (p if method == "reml" else 0)) * math.log(scale)
    # Theta on the outcome's scale: L_ii gains log(scale), L_ij gains a factor scale; the
    # Satterthwaite ratio is invariant, so the directions and information are rescaled alike.
    unscaled = tuple(_Pattern(visits=pt.visits, n=pt.n, xx=pt.xx, xy=pt.xy * scale, yy=pt.yy * scale ** 2)
                     for pt in patterns)
    precisions = tuple(w / scale ** 2 for w in evaluation.precisions)
    directions = directions_scaled * scale ** 2
    return MixedModelFit(outcome=outcome, method=method, terms=outcome.terms, coef=coef, cov=cov, sigma=sigma,
                         loglik=float(evaluation.loglik - jacobian), converged=converged, iterations=int(result.nit),
                         gradient_norm=step, n_used=int(observed.any(axis=1).sum()), n_observations=n_observations,
                         alpha=alpha, _patterns=unscaled, _precisions=precisions, _theta_covariance=theta_covariance,
                         _directions=directions)


def _constant_column(design: np.ndarray) -> Optional[int]:
    """The position of a column equal to 1 in every row (the intercept), if any."""
    flat = design.reshape(-1, design.shape[2])
    ones = np.flatnonzero(np.all(flat == 1.0, axis=0))
    return int(ones[0]) if len(ones) else None


def _refit_shift(design: np.ndarray, evaluation: _Evaluation, centre: float, scale: float,
                 coef: np.ndarray) -> np.ndarray:
    """Without an intercept column, add the centre through the least-squares representation of 1."""
    flat = design.reshape(-1, design.shape[2])
    ones, residual, *_ = np.linalg.lstsq(flat, np.ones(len(flat)), rcond=None)
    if not np.allclose(flat @ ones, 1.0, atol=1e-8):
        raise AnalysisError("a model without an intercept must still span a constant (e.g. one term per visit); "
                            "add an intercept or C(visit) without '- 1'")
    return coef + centre * ones
