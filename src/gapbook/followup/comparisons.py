"""Completers and last observation carried forward: comparisons only, not recommended.

Both are shown because readers of older trials know them and because the distance
between them and the analyses valid under missing at random shows how much the missing
visits matter. Neither is a valid primary analysis: completers-only assumes that those
who leave are like those who stay, and carrying the last observation forward assumes that
a participant's outcome freezes at their last visit, which is rarely plausible and can
bias in either direction (National Research Council 2010, The Prevention and Treatment of
Missing Data in Clinical Trials, National Academies Press; recalled from memory).
"""
from __future__ import annotations

from typing import Dict

import numpy as np
import pandas as pd

from ..errors import AnalysisError
from ..vocabulary import COMPLETERS_CAUTION, LAST_OBSERVATION_CAUTION
from .mixed_model import fit_mixed_model
from .repeated import RepeatedOutcome, label

__all__ = ["COMPLETERS", "LAST_OBSERVATION", "NOT_RECOMMENDED", "completers", "carry_last_observation_forward",
           "comparison_effects"]

COMPLETERS = "completers"
LAST_OBSERVATION = "last_observation"
NOT_RECOMMENDED: Dict[str, str] = {COMPLETERS: COMPLETERS_CAUTION, LAST_OBSERVATION: LAST_OBSERVATION_CAUTION}


def completers(outcome: RepeatedOutcome) -> RepeatedOutcome:
    """Only the participants whose outcome was observed at the last planned visit.

    Parameters
    ----------
    outcome : RepeatedOutcome
        The repeated-measures data.

    Returns
    -------
    RepeatedOutcome
    """
    kept = ~np.isnan(outcome.values[:, -1])
    if not kept.any():
        raise AnalysisError(f"no participant attended the last planned visit ({label(outcome.visits[-1])}); "
                            "there are no completers")
    return outcome.subset(kept)


def carry_last_observation_forward(outcome: RepeatedOutcome) -> RepeatedOutcome:
    """Each missing visit takes the participant's last earlier observed value.

    Before the first observed visit the baseline outcome is carried when the plan has a
    baseline visit and it was measured; participants with nothing to carry are left out.

    Parameters
    ----------
    outcome : RepeatedOutcome
        The repeated-measures data.

    Returns
    -------
    RepeatedOutcome
        The same shape with the carried values filled in.
    """
    values = outcome.values.copy()
    start = outcome.baseline if outcome.baseline is not None else np.full(outcome.n, np.nan)
    carried = start.copy()
    for k in range(values.shape[1]):
        column = values[:, k]
        seen = ~np.isnan(column)
        carried = np.where(seen, column, carried)
        values[:, k] = carried
    kept = ~np.isnan(values).any(axis=1)
    if not kept.any():
        raise AnalysisError("no participant has an observation to carry forward")
    return outcome.with_values(values).subset(kept)


def comparison_effects(outcome: RepeatedOutcome, *, alpha: float = 0.05) -> pd.DataFrame:
    """The exposure effect at every visit for completers and last observation carried forward.

    Both use the mixed model for repeated measures (on complete data with the same
    regressors at every visit it is least squares visit by visit), so they differ from the
    primary analysis only in which data they feed it.

    Parameters
    ----------
    outcome : RepeatedOutcome
        The repeated-measures data.
    alpha : float
        One minus the confidence level.

    Returns
    -------
    DataFrame
        The ``visit_effects.csv`` rows of strategies ``completers`` and ``last_observation``.
    """
    frames = []
    for strategy, data in ((COMPLETERS, completers(outcome)), (LAST_OBSERVATION,
                                                                carry_last_observation_forward(outcome))):
        frames.append(fit_mixed_model(data, alpha=alpha).visit_effects(strategy))
    return pd.concat(frames, ignore_index=True)
