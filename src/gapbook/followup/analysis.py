"""The follow-up stage: the exposure effect at every visit under every strategy, side by side.

Strategies (labels in ``visit_effects.csv``):
- ``mixed_model``: the mixed model for repeated measures on the attended visits, valid
  under missing at random (the primary analysis most trial plans name);
- ``multiple_imputation``: imputation under missing at random from each group's own
  model, analysed with the same mixed model and pooled with Rubin's rules;
- ``jump_to_reference``, ``copy_reference``, ``copy_increments_reference``: reference-based
  imputation (Carpenter, Roger & Kenward 2013), departures from missing at random that say
  what happens after a participant leaves;
- ``delta_adjusted``: own-group imputation with the outcomes after leaving shifted by a
  stated delta (only when a delta is given);
- ``completers`` and ``last_observation``: comparisons only, not recommended.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Dict, Optional, Sequence, Tuple, Union

import numpy as np
import pandas as pd

from ..errors import InputError, did_you_mean
from ..inference import format_p
from ..text import first_upper
from ..vocabulary import FOLLOWUP_STRATEGY_NAMES, REFERENCE_BASED_STRATEGIES, reference_based_cautions
from .comparisons import (COMPLETERS, LAST_OBSERVATION, NOT_RECOMMENDED, carry_last_observation_forward,
                                   completers)
from .imputation import DELTA_STRATEGY, RULE_STRATEGY, draw_posteriors, impute_repeated
from .mixed_model import STRATEGY as MIXED_MODEL
from .mixed_model import VISIT_EFFECT_COLUMNS, MixedModelFit, fit_mixed_model
from .repeated import RepeatedOutcome, label

__all__ = ["FOLLOWUP_STRATEGIES", "FollowupAnalysis", "analyse_followup"]

# Every strategy of the stage, in the order tables and figures show them (the vocabulary's list).
FOLLOWUP_STRATEGIES: Tuple[str, ...] = FOLLOWUP_STRATEGY_NAMES
STRATEGY_RULE = {strategy: rule for rule, strategy in RULE_STRATEGY.items()}
DEFAULT_STRATEGIES = tuple(s for s in FOLLOWUP_STRATEGIES if s != DELTA_STRATEGY)


@dataclass(frozen=True)
class FollowupAnalysis:
    """Every strategy's exposure effect at every visit, the model's means and covariance.

    ``effects`` has the ``visit_effects.csv`` columns (plus fmi and riv for imputation);
    ``means`` the mixed model's mean outcome per group and visit; ``covariance`` its visit
    covariance and correlation matrix in long form.
    """

    effects: pd.DataFrame
    means: pd.DataFrame
    covariance: pd.DataFrame
    last_visit: Any
    exposure: str
    mixed_model: Optional[MixedModelFit] = field(default=None, repr=False)
    sentences: Tuple[str, ...] = ()

    def tables(self) -> Dict[str, pd.DataFrame]:
        return {"visit_effects": self.effects, "visit_means": self.means, "visit_covariance": self.covariance,
                "estimates": self.estimates()}

    def headline(self) -> pd.DataFrame:
        """Every strategy's exposure effect at the last planned visit (the trial's headline visit)."""
        rows = self.effects[self.effects["visit"] == self.last_visit]
        columns = ["strategy", "visit", "term", "estimate", "std_error", "ci_lower", "ci_upper", "p_value",
                   "n_used", "df"] + [c for c in ("fmi", "riv") if c in rows.columns]
        return rows[columns].reset_index(drop=True)

    def estimates(self) -> pd.DataFrame:
        """Rows for ``estimates.csv``: the headline rows, with their ``visit``."""
        return self.headline()

    def strategies(self) -> Tuple[str, ...]:
        """The strategies run, in table order."""
        return tuple(dict.fromkeys(self.effects["strategy"]))

    def effect_grid(self) -> pd.DataFrame:
        """Estimates as strategy (rows, one block per exposure term) by visit (columns)."""
        grid = self.effects.pivot_table(index=["term", "strategy"], columns="visit", values="estimate", sort=False)
        grid.columns = [label(v) for v in grid.columns]
        return grid


def _covariance_table(fit: MixedModelFit) -> pd.DataFrame:
    sigma = fit.sigma
    sd = np.sqrt(np.diag(sigma))
    rows = []
    for i, a in enumerate(fit.outcome.visits):
        for j, b in enumerate(fit.outcome.visits):
            rows.append({"visit": a, "other_visit": b, "covariance": sigma[i, j],
                         "correlation": sigma[i, j] / (sd[i] * sd[j])})
    return pd.DataFrame(rows)


def _effect_sentence(row: pd.Series, alpha: float) -> str:
    level = int(round(100 * (1 - alpha)))
    return (f"{row['estimate']:.3g} ({level} % CI {row['ci_lower']:.3g} to {row['ci_upper']:.3g}; "
            f"{format_p(row['p_value'])})")


def _sentences(effects: pd.DataFrame, last_visit: Any, alpha: float, method: str) -> Tuple[str, ...]:
    headline = effects[effects["visit"] == last_visit]
    sentences = []
    for term, rows in headline.groupby("term", sort=False):
        by = rows.set_index("strategy")
        if MIXED_MODEL in by.index:
            sentences.append(f"Mixed model for repeated measures (unstructured covariance, {method.upper()}, "
                             f"Satterthwaite degrees of freedom), valid if missing at random: the effect of {term} "
                             f"at visit {label(last_visit)} is {_effect_sentence(by.loc[MIXED_MODEL], alpha)}.")
        if "multiple_imputation" in by.index:
            sentences.append("Multiple imputation under missing at random gives "
                             f"{_effect_sentence(by.loc['multiple_imputation'], alpha)}.")
        based = [s for s in REFERENCE_BASED_STRATEGIES if s in by.index]
        if based:
            parts = "; ".join(f"{s.replace('_', ' ')} {_effect_sentence(by.loc[s], alpha)}" for s in based)
            sentences.append(f"If participants' outcomes after leaving follow the reference group: {parts}.")
        if DELTA_STRATEGY in by.index:
            sentences.append("Own-group imputation with the stated delta after leaving gives "
                             f"{_effect_sentence(by.loc[DELTA_STRATEGY], alpha)}.")
        for strategy in (COMPLETERS, LAST_OBSERVATION):
            if strategy in by.index:
                sentences.append(f"{first_upper(strategy.replace('_', ' '))} (comparison only): "
                                 f"{_effect_sentence(by.loc[strategy], alpha)}.")
    present = set(effects["strategy"])
    sentences.extend(reference_based_cautions(present))
    sentences.extend(NOT_RECOMMENDED[s] for s in (COMPLETERS, LAST_OBSERVATION) if s in present)
    return tuple(sentences)


def analyse_followup(outcome: RepeatedOutcome, *, strategies: Sequence[str] = DEFAULT_STRATEGIES, m: int = 20,
                     seed: Optional[int] = None, reference: Any = None,
                     delta: Union[None, float, Sequence[float], Dict[Any, float]] = None,
                     method: str = "reml", alpha: float = 0.05, burn_in: int = 200,
                     thin: int = 20, n_jobs: int = 1) -> FollowupAnalysis:
    """The exposure effect at every visit under each strategy.

    Parameters
    ----------
    outcome : repeated-measures data (see :func:`gapbook.followup.repeated.repeated_outcome`).
    strategies : which of FOLLOWUP_STRATEGIES to run (``delta_adjusted`` needs ``delta``).
    m, seed, burn_in, thin : imputation settings (one set of posterior draws serves every rule).
    reference : the reference group of the reference-based rules (default the exposure's first level).
    delta : shift of the outcomes imputed after leaving, for ``delta_adjusted``.
    method : ``reml`` or ``ml`` for the mixed model.
    alpha : 1 - confidence level.
    n_jobs : local worker processes for the imputation's chains, one per exposure group (the
        results do not depend on it; inside :func:`gapbook.compute.on_cluster` they run on the cluster).

    Returns
    -------
    FollowupAnalysis.

    References
    ----------
    Carpenter JR, Roger JH, Kenward MG (2013). J Biopharm Stat 23:1352-1371.
    Mallinckrodt CH et al. (2008). Drug Information Journal 42:303-319.
    """
    unknown = [s for s in strategies if s not in FOLLOWUP_STRATEGIES]
    if unknown:
        raise InputError(f"'{unknown[0]}' is not one of {', '.join(FOLLOWUP_STRATEGIES)}"
                         f"{did_you_mean(unknown[0], FOLLOWUP_STRATEGIES)}", option="strategies")
    if DELTA_STRATEGY in strategies and delta is None:
        raise InputError("the delta_adjusted strategy needs a delta (the shift of outcomes imputed after leaving)",
                         option="delta")
    frames = []
    fit = fit_mixed_model(outcome, method=method, alpha=alpha)
    if MIXED_MODEL in strategies:
        frames.append(fit.visit_effects())
    wanted_rules = [STRATEGY_RULE[s] for s in strategies if s in STRATEGY_RULE]
    if DELTA_STRATEGY in strategies:
        wanted_rules.append("delta")
    if wanted_rules:
        posteriors = draw_posteriors(outcome, m=m, seed=seed, burn_in=burn_in, thin=thin, n_jobs=n_jobs)
        for rule in wanted_rules:
            imputation = impute_repeated(outcome, rule="mar" if rule == "delta" else rule, reference=reference,
                                         delta=delta if rule == "delta" else None, posteriors=posteriors)
            frames.append(imputation.analyse(alpha=alpha).visit_effects())
    if COMPLETERS in strategies:
        frames.append(fit_mixed_model(completers(outcome), method=method, alpha=alpha).visit_effects(COMPLETERS))
    if LAST_OBSERVATION in strategies:
        frames.append(fit_mixed_model(carry_last_observation_forward(outcome), method=method,
                                      alpha=alpha).visit_effects(LAST_OBSERVATION))
    effects = pd.concat(frames, ignore_index=True)
    columns = list(VISIT_EFFECT_COLUMNS) + ["fmi", "riv"]
    effects = effects.reindex(columns=columns)
    order = {s: k for k, s in enumerate(FOLLOWUP_STRATEGIES)}
    effects = effects.assign(_order=effects["strategy"].map(order)).sort_values(
        ["_order", "term"], kind="stable").drop(columns="_order").reset_index(drop=True)
    last_visit = outcome.visits[-1]
    return FollowupAnalysis(effects=effects, means=fit.visit_means(), covariance=_covariance_table(fit),
                            last_visit=last_visit, exposure=outcome.exposure or "", mixed_model=fit,
                            sentences=_sentences(effects, last_visit, alpha, method))
