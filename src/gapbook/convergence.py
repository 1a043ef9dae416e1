"""Have the imputation chains forgotten their starting values, and from which iteration?

Each of the m chains of a chained-equations imputation starts from its own random fill
and is iterated; the imputed datasets are the chains' last iterations. They are draws
from one distribution only if every chain has forgotten where it started. The potential
scale reduction factor R-hat compares the spread between chains with the spread within
them (Gelman & Rubin 1992); near 1, the chains are indistinguishable.

What is computed, per imputed variable and iteration t:

* **The scalar.** One number per chain and iteration summarises the imputed values: their
  mean (for a continuous or count variable; for a binary variable the share in its second
  level; for an ordinal variable the mean level position 0..K-1, an ordered score). An
  unordered (nominal) variable with three or more levels has no meaningful mean code, so
  R-hat is computed on the share of each level and the largest (worst) is reported.
* **The window.** R-hat at iteration t uses iterations 1..t of every chain. Split in half
  (below), the first half holds the early iterations and the second the later ones, so a
  chain still drifting away from its start keeps R-hat high; with short chains this uses
  twice the draws of a window that drops the first half, and so is less noisy (measured:
  with 20 independent chains of 10 iterations, R-hat over 1..10 exceeded 1.05 in 9 % of
  runs, over 6..10 in 49 %). It is conservative: the early iterations stay in the window.
  R-hat is reported from iteration 4, the first with two draws in each half.
* **R-hat.** The rank-normalised split R-hat of Vehtari et al. (2021): split each chain in
  half (dropping the middle draw of an odd length), replace every draw by the normal
  score of its rank among all draws, ``Phi^-1((r - 3/8) / (S + 1/4))``, compute the
  classic R-hat on those scores (bulk), the same on the folded draws ``|x - median|``
  (tails, i.e. spread), and report the larger.

The limit 1.05 is common practice for multiple-imputation chains, no source (Vehtari et
al. advise 1.01 for long MCMC runs; chained-equations runs are short, so R-hat is noisier).

References
----------
Gelman A, Rubin DB (1992). Inference from iterative simulation using multiple sequences.
Statistical Science 7:457-472.
Vehtari A, Gelman A, Simpson D, Carpenter B, Bürkner P-C (2021). Rank-normalization,
folding, and localization: an improved R-hat for assessing convergence of MCMC.
Bayesian Analysis 16:667-718.
Blom G (1958). Statistical Estimates and Transformed Beta-Variables. Wiley (the 3/8 offset).
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Dict, Optional, Tuple

import numpy as np
import pandas as pd
from scipy import stats

__all__ = ["RHAT_LIMIT", "FIRST_ITERATION", "RHat", "ChainConvergence", "split_chains", "rank_normalise",
           "rhat", "rhat_by_iteration", "chain_convergence"]

RHAT_LIMIT = 1.05
FIRST_ITERATION = 4  # the first window with two draws in each split half
RHAT_COLUMNS = ("variable", "iteration", "summary", "rhat_bulk", "rhat_folded", "rhat")
SPREAD_COLUMNS = ("variable", "iteration", "lowest", "lower_quartile", "median", "upper_quartile", "highest")


@dataclass(frozen=True)
class RHat:
    """Rank-normalised split R-hat: ``bulk`` (location), ``folded`` (spread) and ``value`` = the larger."""

    bulk: float
    folded: float

    @property
    def value(self) -> float:
        if np.isnan(self.bulk) or np.isnan(self.folded):
            return float("nan")
        return max(self.bulk, self.folded)


def split_chains(draws: np.ndarray) -> np.ndarray:
    """Each chain cut into its first and second half: (M, N) -> (2M, N // 2).

    With an odd N the middle draw is dropped, so both halves have the same length.

    Parameters
    ----------
    draws : ndarray, shape (M, N)
        M chains of N draws.

    Returns
    -------
    ndarray, shape (2M, N // 2)
    """
    draws = np.asarray(draws, dtype=np.float64)
    half = draws.shape[1] // 2
    return np.concatenate([draws[:, :half], draws[:, draws.shape[1] - half:]], axis=0)


def rank_normalise(draws: np.ndarray) -> np.ndarray:
    """Normal scores of the ranks of all draws pooled: ``Phi^-1((r - 3/8) / (S + 1/4))``.

    Ties share their average rank. S is the number of draws.

    Parameters
    ----------
    draws : ndarray
        Draws of any shape.

    Returns
    -------
    ndarray
        The normal scores, same shape.

    References
    ----------
    Vehtari et al. (2021), Bayesian Analysis 16:667, equation (14); Blom (1958).
    """
    draws = np.asarray(draws, dtype=np.float64)
    ranks = stats.rankdata(draws, method="average").reshape(draws.shape)
    return stats.norm.ppf((ranks - 0.375) / (draws.size + 0.25))


def _classic_rhat(draws: np.ndarray) -> float:
    """Gelman & Rubin's R-hat of (chains, draws): sqrt(((N-1)/N W + B/N) / W); NaN when W = 0."""
    n = draws.shape[1]
    within = float(np.mean(np.var(draws, axis=1, ddof=1)))
    between = n * float(np.var(np.mean(draws, axis=1), ddof=1))
    if not within > 0:
        return float("nan")
    return float(np.sqrt(((n - 1) / n * within + between / n) / within))


def rhat(draws: np.ndarray) -> RHat:
    """Rank-normalised split R-hat of one scalar, from a (chains, draws) array.

    Parameters
    ----------
    draws : array of shape (M, N): M chains of N iterations, M >= 2 and N >= 4.

    Returns
    -------
    RHat with ``bulk``, ``folded`` and ``value`` (the larger); NaN when the draws do not vary.

    References
    ----------
    Vehtari et al. (2021), Bayesian Analysis 16:667, section 4.2 (split, rank-normalise,
    fold, report the maximum); Gelman & Rubin (1992), Statistical Science 7:457.
    """
    draws = np.asarray(draws, dtype=np.float64)
    if draws.ndim != 2 or draws.shape[0] < 2 or draws.shape[1] < FIRST_ITERATION:
        raise ValueError("rhat needs at least 2 chains of at least 4 draws")
    split = split_chains(draws)
    if not np.all(np.isfinite(split)) or np.ptp(split) == 0:
        return RHat(float("nan"), float("nan"))
    bulk = _classic_rhat(rank_normalise(split))
    folded_draws = np.abs(split - np.median(split))
    folded = _classic_rhat(rank_normalise(folded_draws)) if np.ptp(folded_draws) > 0 else float("nan")
    return RHat(bulk, folded)


def rhat_by_iteration(draws: np.ndarray) -> np.ndarray:
    """R-hat at every iteration t, on iterations 1..t: (chains, iterations) -> (iterations, 2) of bulk, folded.

    Rows before :data:`FIRST_ITERATION` are NaN.

    Parameters
    ----------
    draws : ndarray, shape (chains, iterations)
        One imputed summary per chain and iteration.

    Returns
    -------
    ndarray, shape (iterations, 2)
        Bulk and folded R-hat.
    """
    draws = np.asarray(draws, dtype=np.float64)
    out = np.full((draws.shape[1], 2), np.nan)
    for t in range(FIRST_ITERATION, draws.shape[1] + 1):
        value = rhat(draws[:, :t])
        out[t - 1] = (value.bulk, value.folded)
    return out


# ---------------------------------------------------------------------------
# the imputation's chains

@dataclass(frozen=True)
class ChainConvergence:
    """R-hat of every imputed variable at every iteration, and where the chains are.

    Fields
    ------
    trace : the imputation's convergence trace (chain, iteration, variable, mean, sd) with
        the variable's R-hat at that iteration added as ``rhat`` (the same on every chain's row).
    rhat : variable, iteration, summary (the scalar used), rhat_bulk, rhat_folded, rhat (the
        larger of the two; for an unordered variable the largest over its levels, while
        rhat_bulk and rhat_folded are those of the level named in ``summary``, the one
        with the largest R-hat at the last iteration).
    spread : variable, iteration and the chains' lowest, lower quartile, median, upper
        quartile and highest value of the scalar, centred on the mean of all chains over the
        latter half of the run and in units of the within-chain standard deviation there.
    limit : the reference line (1.05).
    iterations, m : the run's length and number of chains.
    settled_from : first iteration from which every variable's R-hat stays below the limit
        to the end of the run; None when some variable is above it at the last iteration or
        the run is shorter than :data:`FIRST_ITERATION`.
    above : variables whose R-hat at the last iteration is at or above the limit.
    constant : variables whose values did not vary (R-hat undefined; nothing to compare).
    sentences : the page's wording.
    """

    trace: pd.DataFrame
    rhat: pd.DataFrame
    spread: pd.DataFrame
    limit: float
    iterations: int
    m: int
    settled_from: Optional[int]
    above: Tuple[str, ...]
    constant: Tuple[str, ...]
    sentences: Tuple[str, ...]

    def tables(self) -> Dict[str, pd.DataFrame]:
        """``imputation_convergence`` (the trace with R-hat), ``imputation_rhat`` and ``imputation_chain_spread``."""
        return {"imputation_convergence": self.trace, "imputation_rhat": self.rhat,
                "imputation_chain_spread": self.spread}

    def final(self) -> pd.Series:
        """Each variable's R-hat at the last iteration."""
        last = self.rhat[self.rhat["iteration"] == self.iterations]
        return last.set_index("variable")["rhat"]


def _scalars(trace: pd.DataFrame, level_shares: Optional[pd.DataFrame]):
    """variable -> list of (summary name, chains x iterations array)."""
    out: Dict[str, list] = {}
    shares_by_variable = {}
    if level_shares is not None and len(level_shares):
        shares_by_variable = dict(tuple(level_shares.groupby("variable", sort=False)))
    for name, part in trace.groupby("variable", sort=False):
        if name in shares_by_variable:
            shares = shares_by_variable[name]
            out[name] = [(f"share of level '{level}'", grid.pivot(index="chain", columns="iteration", values="share")
                          .sort_index().to_numpy(dtype=np.float64))
                         for level, grid in shares.groupby("level", sort=False)]
        else:
            out[name] = [("mean", part.pivot(index="chain", columns="iteration", values="mean").sort_index()
                          .to_numpy(dtype=np.float64))]
    return out


def chain_convergence(trace: pd.DataFrame, level_shares: Optional[pd.DataFrame] = None, *,
                      limit: float = RHAT_LIMIT) -> ChainConvergence:
    """R-hat across chains at every iteration for each imputed variable, and the chains' spread.

    Parameters
    ----------
    trace : the imputation's convergence trace: chain, iteration, variable, mean (and sd).
    level_shares : for unordered variables of three or more levels, chain, iteration,
        variable, level, share; R-hat is then computed per level and the largest kept.
    limit : the reference line (1.05, common practice, no source).

    Returns
    -------
    ChainConvergence

    References
    ----------
    Vehtari et al. (2021), Bayesian Analysis 16:667; Gelman & Rubin (1992), Statistical
    Science 7:457.
    """
    iterations = int(trace["iteration"].max()) if len(trace) else 0
    m = int(trace["chain"].nunique()) if len(trace) else 0
    rhat_rows, spread_rows, constant = [], [], []
    for name, scalars in _scalars(trace, level_shares).items():
        results = [(summary, rhat_by_iteration(values)) if m >= 2 and iterations >= FIRST_ITERATION
                   else (summary, np.full((iterations, 2), np.nan)) for summary, values in scalars]
        worst_index = _worst(results)
        summary, values = results[worst_index]
        # rhat: the largest over the scalars at each iteration (one scalar but for unordered variables)
        per_scalar = np.array([[RHat(*row).value for row in r] for _, r in results]).reshape(len(results), -1)
        largest = np.fmax.reduce(per_scalar, axis=0) if iterations else np.zeros(0)
        if all(np.ptp(v) == 0 for _, v in scalars):
            constant.append(name)
        label = summary if len(scalars) == 1 else f"share of each level; bulk and folded of the {summary}"
        for t in range(1, iterations + 1):
            bulk, folded = values[t - 1]
            rhat_rows.append({"variable": name, "iteration": t, "summary": label, "rhat_bulk": bulk,
                              "rhat_folded": folded, "rhat": largest[t - 1]})
        spread_rows.extend(_spread_rows(name, scalars[worst_index][1]))
    table = pd.DataFrame(rhat_rows, columns=list(RHAT_COLUMNS))
    spread = pd.DataFrame(spread_rows, columns=list(SPREAD_COLUMNS))
    settled, above = _settled(table, iterations, limit)
    with_rhat = trace.merge(table[["variable", "iteration", "rhat"]], on=["variable", "iteration"], how="left",
                            validate="many_to_one")
    result = ChainConvergence(trace=with_rhat, rhat=table, spread=spread, limit=float(limit), iterations=iterations, m=m,
                              settled_from=settled, above=above, constant=tuple(constant), sentences=())
    return _with_sentences(result)


def _worst(results) -> int:
    """Index of the scalar whose R-hat at the last iteration is largest (the first when all are NaN)."""
    finals = [RHat(*r[-1]).value if len(r) else float("nan") for _, r in results]
    finite = [(v, -i) for i, v in enumerate(finals) if np.isfinite(v)]
    return -max(finite)[1] if finite else 0


def _spread_rows(name: str, values: np.ndarray):
    """The chains' quantiles at each iteration, centred on where the chains end up and scaled by a chain's own spread.

    Centre: the mean of every chain's values over the latter half of the run. Scale: the
    within-chain standard deviation over that half (the square root of R-hat's W), so a
    band many units wide says the chains differ by more than each one moves: they still
    remember their starts. Chains that have forgotten them span about +-2 units when there
    are 20 (the range of 20 draws from one distribution).
    """
    iterations = values.shape[1]
    settled = values[:, iterations // 2:]
    centre = float(np.mean(settled))
    within = float(np.mean(np.var(settled, axis=1, ddof=1))) if settled.shape[1] > 1 else 0.0
    scale = np.sqrt(within) if within > 0 else (float(np.std(settled)) or 1.0)
    quantiles = np.quantile((values - centre) / scale, [0.0, 0.25, 0.5, 0.75, 1.0], axis=0)
    return [{"variable": name, "iteration": t + 1, "lowest": quantiles[0, t], "lower_quartile": quantiles[1, t],
             "median": quantiles[2, t], "upper_quartile": quantiles[3, t], "highest": quantiles[4, t]}
            for t in range(iterations)]


def _settled(table: pd.DataFrame, iterations: int, limit: float):
    """First iteration from which every variable stays below the limit, and the variables above it at the end."""
    if iterations < FIRST_ITERATION or table.empty:
        return None, ()
    wide = table.pivot(index="iteration", columns="variable", values="rhat")
    wide = wide.loc[:, wide.notna().any()]  # constant variables have nothing to compare
    if wide.empty:
        return None, ()
    last = wide.loc[iterations]
    above = tuple(str(v) for v in wide.columns[(last >= limit).to_numpy()])
    if above:
        return None, above
    below = (wide < limit).all(axis=1).to_numpy()
    settled = iterations
    while settled - 1 >= FIRST_ITERATION and below[settled - 2]:
        settled -= 1
    return settled, ()


def _with_sentences(result: ChainConvergence) -> ChainConvergence:
    from dataclasses import replace
    limit = f"{result.limit:g}"
    if not len(result.trace):
        words = ("No value was imputed (the variables in the imputation are complete), so there are no chains "
                 "to compare.",)
    elif result.m < 2:
        words = ("R-hat needs at least two chains; this run has one, so convergence across chains cannot be "
                 "judged: raise imputation.m.",)
    elif result.iterations < FIRST_ITERATION:
        words = (f"R-hat needs at least {FIRST_ITERATION} iterations; this run has {result.iterations}: raise "
                 "imputation.iterations.",)
    elif result.above:
        names = ", ".join(result.above)
        words = (f"At the last iteration ({result.iterations}) R-hat is still at or above {limit} for {names}: "
                 "the chains may not have forgotten their starting values; raise imputation.iterations "
                 "(or simplify that variable's imputation model) and run again.",)
    elif result.settled_from is None:
        words = ("Every imputed variable's values are the same in every chain and iteration: there is nothing "
                 "for the chains to disagree on.",)
    else:
        words = (f"From iteration {result.settled_from} of {result.iterations} on, every imputed variable's R-hat "
                 f"is below {limit}: by then the {result.m} chains agree, their starting values forgotten.",)
    if result.constant:
        words += (f"Not judged (the same value in every chain and iteration): {', '.join(result.constant)}.",)
    return replace(result, sentences=words)
