"""Multiple imputation for repeated measures: under missing at random and reference-based.

Each exposure group's outcomes over the planned visits follow a multivariate normal
regression on the participant-level covariates (intercept, baseline value, ...): mean
``x_i' B_g`` and an unstructured covariance ``Sigma_g``. Bayesian draws of ``(B_g,
Sigma_g)`` come from data augmentation (a Gibbs sampler that alternates imputing the
missing outcomes and drawing the parameters from their complete-data posterior under the
noninformative prior p(B, Sigma) ~ |Sigma|^-(T+1)/2). One parameter draw per imputed
dataset, taken ``thin`` iterations apart after ``burn_in`` iterations.

How a participant's missing outcomes are imputed depends on the rule (Carpenter, Roger &
Kenward 2013). Missed visits before the last attended one (intermittent gaps) are always
imputed under missing at random in the participant's own group. After the last attended
visit ("deviation"), with mu_own = x_i' B_own, mu_ref = x_i' B_ref and d the last attended
visit:

- ``mar``: the own group's distribution (missing at random);
- ``jump_to_reference``: mean mu_own up to d, mu_ref after it;
- ``copy_reference``: mean mu_ref at every visit, as if the participant had always been
  in the reference group;
- ``copy_increments_reference``: mean mu_own up to d, then mu_own[d] + (mu_ref[t] -
  mu_ref[d]): the reference group's changes after d are added to where the participant
  was.

The outcomes after d are drawn from the reference group's conditional distribution given
the outcomes up to d (observed or imputed), centred at the rule's mean:
``mu_post + Sigma_ref[post, pre] Sigma_ref[pre, pre]^-1 (y_pre - mu_pre)`` with covariance
``Sigma_ref[post, post | pre]``; this is the joint distribution the paper builds whose
pre-deviation part keeps the own group's covariance. Participants of the reference group
are imputed under ``mar`` by every rule. A ``delta`` adds a fixed shift to the outcomes
imputed after deviation (own-group imputation with a delta: a departure from missing at
random made explicit).

Each completed dataset is analysed with the mixed model for repeated measures (which, on
complete data with the same regressors at every visit, is least squares visit by visit)
and the exposure effects are combined with Rubin's rules (``gapbook.pool``).
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Dict, Optional, Sequence, Tuple, Union

import numpy as np
import pandas as pd
from scipy import linalg, stats

from ..compute import run_tasks
from ..errors import AnalysisError, InputError, did_you_mean
from ..inference import wald_inference
from ..little import pattern_rows
from ..pool import rubin_pool
from ..vocabulary import REFERENCE_BASED_STRATEGIES, reference_based_cautions
from .mixed_model import VISIT_EFFECT_COLUMNS, design_crossproducts, fit_mixed_model
from .repeated import RepeatedOutcome, label

__all__ = ["RULE_STRATEGY", "DELTA_STRATEGY", "draw_group_parameters", "draw_posteriors", "impute_repeated"]

RULES = ("mar", *REFERENCE_BASED_STRATEGIES)
# The strategy label each rule gets in visit_effects.csv (a reference-based rule is named as its strategy).
RULE_STRATEGY = {"mar": "multiple_imputation", **{rule: rule for rule in REFERENCE_BASED_STRATEGIES}}
DELTA_STRATEGY = "delta_adjusted"


# ---------------------------------------------------------------------------
# data augmentation for one group

@dataclass(frozen=True)
class GroupPosterior:
    """Posterior draws of one group's multivariate normal regression.

    ``coefficients`` is (draws, q, T): the mean of visit t for covariates x is x' B[:, t];
    ``covariances`` is (draws, T, T).
    """

    level: Any
    coefficients: np.ndarray
    covariances: np.ndarray
    n: int
    burn_in: int
    thin: int


def _conditional_draw(mu: np.ndarray, sigma: np.ndarray, values: np.ndarray, observed: np.ndarray,
                      targets: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """Draw values[:, targets] from N(mu, sigma) given values[:, observed] (rows share both index sets)."""
    if len(targets) == 0:
        return values[:, targets]
    mean = mu[:, targets]
    cov = sigma[np.ix_(targets, targets)]
    if len(observed):
        factor = linalg.cho_factor(sigma[np.ix_(observed, observed)], lower=True)
        slope = linalg.cho_solve(factor, sigma[np.ix_(observed, targets)])          # (o, m)
        mean = mean + (values[:, observed] - mu[:, observed]) @ slope
        cov = cov - sigma[np.ix_(targets, observed)] @ slope
    chol = np.linalg.cholesky((cov + cov.T) / 2)
    return mean + rng.standard_normal(mean.shape) @ chol.T


def _draw_parameters(x: np.ndarray, y: np.ndarray, xtx_inv_chol: np.ndarray, xtx_inv: np.ndarray,
                     rng: np.random.Generator) -> Tuple[np.ndarray, np.ndarray]:
    """One draw of (B, Sigma) from the complete-data posterior of a multivariate regression.

    Sigma | Y ~ inverse Wishart(n - q, S) with S the residual cross-products; B | Sigma, Y ~
    matrix normal(B_hat, (X'X)^-1, Sigma) (Box & Tiao 1973, section 8.4; Schafer 1997, section 5.4).
    """
    n, q = x.shape
    b_hat = xtx_inv @ (x.T @ y)
    residual = y - x @ b_hat
    scatter = residual.T @ residual
    sigma = stats.invwishart.rvs(df=n - q, scale=scatter, random_state=rng)
    sigma = np.atleast_2d(sigma)
    b = b_hat + xtx_inv_chol @ rng.standard_normal(b_hat.shape) @ np.linalg.cholesky(sigma).T
    return b, sigma


def draw_group_parameters(values: np.ndarray, covariates: np.ndarray, *, draws: int, burn_in: int = 200,
                          thin: int = 20, rng: np.random.Generator, level: Any = None) -> GroupPosterior:
    """Posterior draws of a multivariate normal regression with missing outcomes, by data augmentation.

    Parameters
    ----------
    values : (n, T) outcomes of one group, NaN where missing.
    covariates : (n, q) regressors (first column the intercept), complete.
    draws : number of parameter draws to keep.
    burn_in : iterations before the first kept draw.
    thin : iterations between kept draws.
    rng : the generator (seeded by the caller).

    Returns
    -------
    GroupPosterior.

    References
    ----------
    Tanner MA, Wong WH (1987). The calculation of posterior distributions by data
    augmentation. JASA 82:528-540.
    Schafer JL (1997). Analysis of Incomplete Multivariate Data. Chapman & Hall, ch. 5-6.
    """
    n, t = values.shape
    q = covariates.shape[1]
    name = "" if level is None else f" in group {level}"
    if n - q < t:
        raise AnalysisError(f"{n} participants{name} are too few to draw a {t}-visit covariance matrix with "
                            f"{q} regressors (at least {t + q} are needed)")
    observed = ~np.isnan(values)
    never = np.flatnonzero(~observed.any(axis=0))
    if len(never):
        raise AnalysisError(f"no participant{name} has the outcome at visit position {int(never[0]) + 1}; "
                            "its distribution cannot be estimated")
    xtx_inv = np.linalg.inv(covariates.T @ covariates)
    xtx_inv_chol = np.linalg.cholesky(xtx_inv)
    masks, rows = pattern_rows(observed)
    groups = [(np.flatnonzero(mask), np.flatnonzero(~mask), r) for mask, r in zip(masks, rows) if not mask.all()]
    completed = np.where(observed, values, np.nanmean(values, axis=0))
    kept_b = np.empty((draws, q, t))
    kept_sigma = np.empty((draws, t, t))
    total = burn_in + (draws - 1) * thin + 1
    k = 0
    for iteration in range(total):
        b, sigma = _draw_parameters(covariates, completed, xtx_inv_chol, xtx_inv, rng)
        if iteration >= burn_in and (iteration - burn_in) % thin == 0:
            kept_b[k], kept_sigma[k] = b, sigma
            k += 1
            if k == draws:
                break
        mu_all = covariates @ b
        for obs, mis, r in groups:
            block = completed[r]
            completed[np.ix_(r, mis)] = _conditional_draw(mu_all[r], sigma, block, obs, mis, rng)
    return GroupPosterior(level=level, coefficients=kept_b, covariances=kept_sigma, n=n, burn_in=burn_in, thin=thin)


# ---------------------------------------------------------------------------
# imputation under a rule

def _rule_means(rule: str, mu_own: np.ndarray, mu_ref: np.ndarray, last: int) -> np.ndarray:
    """The mean profile a rule gives a participant whose last attended visit is ``last`` (-1: none)."""
    if rule == "copy_reference":
        return mu_ref.copy()
    mean = mu_own.copy()
    if rule == "jump_to_reference":
        mean[:, last + 1:] = mu_ref[:, last + 1:]
    elif rule == "copy_increments_reference":
        if last < 0:
            mean = mu_ref.copy()
        else:
            mean[:, last + 1:] = mu_own[:, [last]] + mu_ref[:, last + 1:] - mu_ref[:, [last]]
    return mean


def _impute_once(outcome: RepeatedOutcome, covariates: np.ndarray, posteriors: Dict[Any, GroupPosterior],
                 draw: int, rule: str, reference: Any, delta: np.ndarray, delta_groups: Sequence[Any],
                 rng: np.random.Generator) -> np.ndarray:
    """One completed outcome matrix: parameter draw ``draw`` of every group, imputed under ``rule``."""
    values = outcome.values.copy()
    observed = ~np.isnan(values)
    t = values.shape[1]
    ref_b = posteriors[reference].coefficients[draw]
    ref_sigma = posteriors[reference].covariances[draw]
    for level, posterior in posteriors.items():
        members = outcome.group_rows(level)
        b = posterior.coefficients[draw]
        sigma = posterior.covariances[draw]
        own_rule = "mar" if level == reference else rule
        shift = delta if level in delta_groups else None
        masks, rows = pattern_rows(observed[members])
        for mask, local in zip(masks, rows):
            if mask.all():
                continue
            r = members[local]
            obs = np.flatnonzero(mask)
            last = int(obs[-1]) if len(obs) else -1
            block = values[r]
            mu_own = covariates[r] @ b
            if own_rule == "mar":
                mis = np.flatnonzero(~mask)
                block[:, mis] = _conditional_draw(mu_own, sigma, block, obs, mis, rng)
            else:
                pre = np.arange(last + 1)
                post = np.arange(last + 1, t)
                gaps = np.flatnonzero(~mask[:last + 1])
                if len(gaps):   # intermittent gaps: own group, missing at random, given the attended visits
                    block[:, gaps] = _conditional_draw(mu_own[:, :last + 1], sigma[:last + 1, :last + 1],
                                                       block[:, :last + 1], obs, gaps, rng)
                mean = _rule_means(own_rule, mu_own, covariates[r] @ ref_b, last)
                block[:, post] = _conditional_draw(mean, ref_sigma, block, pre, post, rng)
            if shift is not None:
                after = np.arange(last + 1, t)
                block[:, after] += shift[after]
            values[r] = block
    return values


@dataclass(frozen=True)
class RepeatedImputation:
    """m completed outcome matrices of a repeated-measures study and how they were made.

    ``completed`` is (m, n, T). ``rule`` is one of RULES; ``delta`` the shift added after
    deviation (zeros when none) in ``delta_groups``.
    """

    outcome: RepeatedOutcome = field(repr=False)
    rule: str
    reference: Any
    completed: np.ndarray = field(repr=False)
    delta: np.ndarray
    delta_groups: Tuple[Any, ...]
    seed: Optional[int]
    burn_in: int
    thin: int
    posteriors: Dict[Any, GroupPosterior] = field(repr=False, default_factory=dict)

    @property
    def m(self) -> int:
        return int(self.completed.shape[0])

    @property
    def strategy(self) -> str:
        if self.rule == "mar" and np.any(self.delta != 0):
            return DELTA_STRATEGY
        return RULE_STRATEGY[self.rule]

    def completed_outcome(self, i: int) -> RepeatedOutcome:
        return self.outcome.with_values(self.completed[i])

    def analyse(self, *, alpha: float = 0.05) -> "PooledVisitEffects":
        """Fit the mixed model to every completed dataset and pool the exposure effects with Rubin's rules."""
        contrasts = self.outcome.exposure_contrasts()
        names = [(term, visit) for term in contrasts for visit in self.outcome.visits]
        matrix = np.vstack(list(contrasts.values()))
        estimates = np.empty((self.m, len(names)))
        variances = np.empty((self.m, len(names)))
        complete_df = np.empty((self.m, len(names)))
        crossproducts = design_crossproducts(self.outcome.design)
        for i in range(self.m):
            fit = fit_mixed_model(self.completed_outcome(i), alpha=alpha, complete_crossproducts=crossproducts)
            result = fit.contrast(matrix)
            estimates[i], variances[i], complete_df[i] = result.estimate, result.std_error ** 2, result.df
        return PooledVisitEffects(strategy=self.strategy, names=tuple(names), coefficients=estimates,
                                  coefficient_variances=variances, complete_df=complete_df.mean(axis=0),
                                  n_used=self.outcome.n, alpha=alpha, rule=self.rule,
                                  sentences=reference_based_cautions([RULE_STRATEGY[self.rule]]))


@dataclass(frozen=True)
class PooledVisitEffects:
    """Exposure effects at every visit pooled over imputed datasets with Rubin's rules.

    ``coefficients`` and ``coefficient_variances`` are (m, K) for the K (term, visit) pairs in ``names``
    (as :class:`gapbook.pool.PooledResult` names its per-imputation fits; ``estimates`` is reserved for
    ``estimates.csv`` rows);
    ``complete_df`` the complete-data Satterthwaite df of each, used in Barnard & Rubin's df.
    """

    strategy: str
    names: Tuple[Tuple[str, Any], ...]
    coefficients: np.ndarray
    coefficient_variances: np.ndarray
    complete_df: np.ndarray
    n_used: int
    alpha: float
    rule: str
    sentences: Tuple[str, ...] = ()

    def visit_effects(self) -> pd.DataFrame:
        """Rows of ``visit_effects.csv`` with the fraction of missing information (fmi) and riv."""
        rows = []
        for k, (term, visit) in enumerate(self.names):
            pooled = rubin_pool(self.coefficients[:, [k]], self.coefficient_variances[:, [k]],
                                df_complete=float(self.complete_df[k]))
            estimate, se, df = float(pooled.estimate[0]), float(np.sqrt(pooled.total[0])), float(pooled.df[0])
            lower, upper, p = (float(v) for v in wald_inference(estimate, se, df, self.alpha))
            rows.append({"strategy": self.strategy, "visit": visit, "term": term, "estimate": estimate,
                         "std_error": se, "ci_lower": lower, "ci_upper": upper,
                         "p_value": p, "df": df, "n_used": self.n_used, "fmi": float(pooled.fmi[0]),
                         "riv": float(pooled.riv[0])})
        return pd.DataFrame(rows, columns=list(VISIT_EFFECT_COLUMNS) + ["fmi", "riv"])


def _delta_vector(delta: Union[None, float, Sequence[float], Dict[Any, float]], visits: Sequence[Any]) -> np.ndarray:
    t = len(visits)
    if delta is None:
        return np.zeros(t)
    if isinstance(delta, dict):
        unknown = [v for v in delta if v not in visits]
        if unknown:
            raise InputError(f"visit {label(unknown[0])} is not a planned visit ({', '.join(map(label, visits))})",
                             option="delta")
        return np.array([float(delta.get(v, 0.0)) for v in visits])
    if np.ndim(delta) == 0:
        return np.full(t, float(delta))
    vector = np.asarray(delta, dtype=float)
    if vector.shape != (t,):
        raise InputError(f"give one shift per planned visit ({t}), a single number or a mapping", option="delta")
    return vector


def _check_groups(outcome: RepeatedOutcome) -> None:
    if not outcome.levels:
        raise InputError("imputation by group needs a categorical exposure (the arm)", option="exposure")


@dataclass(frozen=True)
class ArmPosteriors:
    """Posterior draws of every group's model, and the seeds of the imputation draws that use them.

    Every rule imputes from the same draws, so rules differ only by what they assume
    (common random numbers make the comparison between rules less noisy).
    """

    groups: Dict[Any, GroupPosterior]
    draw_seeds: Tuple[np.random.SeedSequence, ...] = field(repr=False)
    seed: Optional[int]
    burn_in: int
    thin: int

    @property
    def m(self) -> int:
        return len(self.draw_seeds)


def _group_posterior(values: np.ndarray, covariates: np.ndarray, draws: int, burn_in: int, thin: int,
                     seed: np.random.SeedSequence, level: Any) -> GroupPosterior:
    """One group's chain as a task (module level, so a worker process or a Dask worker can run it).

    The arrays are copied first: arrays unpickled on a worker can sit at a memory alignment
    that numpy's vectorised sums treat differently, and a fresh allocation makes the last bits
    of every draw the same wherever the chain runs.
    """
    return draw_group_parameters(np.array(values, order="C"), np.array(covariates, order="C"), draws=draws,
                                 burn_in=burn_in, thin=thin, rng=np.random.default_rng(seed), level=level)


def draw_posteriors(outcome: RepeatedOutcome, *, m: int = 20, seed: Optional[int] = None, burn_in: int = 200,
                    thin: int = 20, n_jobs: int = 1) -> ArmPosteriors:
    """Posterior draws of each exposure group's multivariate normal regression (data augmentation).

    Parameters
    ----------
    outcome : repeated-measures data with a categorical exposure (the groups).
    m : number of draws (one per imputed dataset).
    seed : seed of the ``numpy.random.SeedSequence`` everything is drawn from.
    burn_in, thin : data augmentation iterations before the first draw and between draws.
    n_jobs : local worker processes for the groups' chains (one chain per group, each with its
        own seed, so the draws do not depend on where they run; inside
        :func:`gapbook.compute.on_cluster` the chains run on the Dask cluster).

    Returns
    -------
    ArmPosteriors
        m draws of each group's coefficients and covariance.
    """
    if m < 2:
        raise InputError("at least two imputed datasets are needed to pool; raise it", option="m")
    _check_groups(outcome)
    covariates = outcome.covariate_matrix()
    sequence = np.random.SeedSequence(seed)
    group_seeds = sequence.spawn(len(outcome.levels))
    draw_seeds = tuple(sequence.spawn(m))
    tasks = []
    for level, child in zip(outcome.levels, group_seeds):
        members = outcome.group_rows(level)
        tasks.append((outcome.values[members], covariates[members], m, burn_in, thin, child, level))
    chains = run_tasks(_group_posterior, tasks, n_jobs=max(1, min(n_jobs, len(tasks))))
    groups = dict(zip(outcome.levels, chains))
    return ArmPosteriors(groups=groups, draw_seeds=draw_seeds, seed=seed, burn_in=burn_in, thin=thin)


def impute_repeated(outcome: RepeatedOutcome, *, rule: str = "mar", m: int = 20, seed: Optional[int] = None,
                    reference: Any = None, delta: Union[None, float, Sequence[float], Dict[Any, float]] = None,
                    delta_groups: Optional[Sequence[Any]] = None, burn_in: int = 200,
                    thin: int = 20, posteriors: Optional[ArmPosteriors] = None, n_jobs: int = 1) -> RepeatedImputation:
    """Multiply impute a repeated outcome under missing at random or a reference-based rule.

    Parameters
    ----------
    outcome : repeated-measures data with a categorical exposure (the groups).
    rule : ``mar``, ``jump_to_reference``, ``copy_reference`` or ``copy_increments_reference``.
    m : number of imputed datasets.
    seed : seed of the ``numpy.random.SeedSequence`` everything is drawn from.
    reference : the reference group (default: the exposure's first level).
    delta : shift added to outcomes imputed after a participant's last attended visit: one
        number, one per visit, or a mapping visit -> shift.
    delta_groups : groups the delta applies to (default: every group but the reference).
    burn_in, thin : data augmentation iterations before the first draw and between draws.
    posteriors : draws from :func:`draw_posteriors` to reuse (then ``m``, ``seed``,
        ``burn_in`` and ``thin`` are theirs).
    n_jobs : local worker processes for the groups' chains (see :func:`draw_posteriors`).

    Returns
    -------
    RepeatedImputation; ``.analyse()`` gives the pooled exposure effects.

    References
    ----------
    Carpenter JR, Roger JH, Kenward MG (2013). Analysis of longitudinal trials with protocol
    deviation: a framework for relevant, accessible assumptions, and inference via multiple
    imputation. J Biopharm Stat 23:1352-1371.
    Rubin DB (1987). Multiple Imputation for Nonresponse in Surveys. Wiley.
    """
    if rule not in RULES:
        raise InputError(f"'{rule}' is not one of {', '.join(RULES)}{did_you_mean(rule, RULES)}", option="rule")
    _check_groups(outcome)
    reference = outcome.reference if reference is None else reference
    if reference not in outcome.levels:
        raise InputError(f"'{label(reference)}' is not a level of {outcome.exposure} "
                         f"({', '.join(map(label, outcome.levels))})", option="reference")
    shift = _delta_vector(delta, outcome.visits)
    if delta_groups is None:
        delta_groups = tuple(level for level in outcome.levels if level != reference)
    if posteriors is None:
        posteriors = draw_posteriors(outcome, m=m, seed=seed, burn_in=burn_in, thin=thin, n_jobs=n_jobs)
    covariates = outcome.covariate_matrix()
    completed = np.stack([_impute_once(outcome, covariates, posteriors.groups, i, rule, reference, shift,
                                       tuple(delta_groups), np.random.default_rng(child))
                          for i, child in enumerate(posteriors.draw_seeds)])
    return RepeatedImputation(outcome=outcome, rule=rule, reference=reference, completed=completed, delta=shift,
                              delta_groups=tuple(delta_groups), seed=posteriors.seed, burn_in=posteriors.burn_in,
                              thin=posteriors.thin, posteriors=posteriors.groups)
