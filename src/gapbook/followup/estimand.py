"""The estimand of a follow-up trial, and which analysis targets it.

ICH E9(R1) (2019) asks a trial to state what it estimates before it says how: the
population, the treatment, the variable (endpoint), how each intercurrent event (leaving
treatment, rescue medication, death ...) is handled, and the population-level summary. The
strategy for an intercurrent event decides which analysis of the missing visits targets the
estimand: the mixed model and imputation under missing at random target a *hypothetical*
strategy; reference-based imputation approximates a *treatment-policy* strategy when
outcomes after leaving treatment were not collected; composite, while-on-treatment and
principal-stratum strategies need analyses this stage does not run. :func:`describe_estimand`
writes the estimand as a table and says, per intercurrent event, which of the analyses run
target it (the vocabulary holds the strategies and that correspondence).
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Callable, Dict, Optional, Sequence, Tuple

import pandas as pd

from ..errors import InputError
from ..text import first_upper
from ..vocabulary import INTERCURRENT_STRATEGIES, NOT_RECOMMENDED_STRATEGIES, STRATEGY_PHRASES

__all__ = ["ESTIMAND_COLUMNS", "EstimandDescription", "describe_estimand", "estimand_sentences"]

ESTIMAND_COLUMNS = ("attribute", "description", "strategy", "targeted_by")
_BY_NAME = {s.name: s for s in INTERCURRENT_STRATEGIES}


@dataclass(frozen=True)
class EstimandDescription:
    """The estimand as a table (``estimand.csv``) and the sentences saying which analysis targets what."""

    attributes: pd.DataFrame
    primary: Optional[str]
    sentences: Tuple[str, ...] = ()

    def tables(self) -> Dict[str, pd.DataFrame]:
        return {"estimand": self.attributes}

    def targeted_by(self, intercurrent: str) -> Tuple[str, ...]:
        """The analyses run that target an estimand using the given intercurrent-event strategy."""
        rows = self.attributes[self.attributes["strategy"] == intercurrent]
        if rows.empty:
            return ()
        text = rows["targeted_by"].iloc[0]
        return tuple(t for t in str(text).split(";") if t) if isinstance(text, str) else ()


def _phrase(strategies: Sequence[str]) -> str:
    names = [STRATEGY_PHRASES.get(s, s.replace("_", " ")) for s in strategies]
    return names[0] if len(names) == 1 else ", ".join(names[:-1]) + " and " + names[-1]


def describe_estimand(*, population: Optional[str] = None, treatment: Optional[str] = None,
                      variable: Optional[str] = None, intercurrent_events: Sequence[Tuple[str, str]] = (),
                      summary: Optional[str] = None, primary: Optional[str] = None,
                      analyses: Sequence[str] = ()) -> EstimandDescription:
    """The estimand's attributes and, per intercurrent event, the analyses run that target it.

    Parameters
    ----------
    population, treatment, variable, summary : the attributes as the analysis plan words them.
    intercurrent_events : (event, strategy) pairs; strategy one of the vocabulary's
        ``INTERCURRENT_STRATEGY_NAMES`` (hypothetical, treatment_policy, ...).
    primary : the analysis (a follow-up strategy) the plan names primary.
    analyses : the follow-up strategies that were run.

    Returns
    -------
    EstimandDescription.

    References
    ----------
    ICH E9(R1) (2019). Addendum on estimands and sensitivity analysis in clinical trials to the
    guideline on statistical principles for clinical trials. International Council for Harmonisation.
    Carpenter JR, Roger JH, Kenward MG (2013). J Biopharm Stat 23:1352-1371 (reference-based
    imputation for treatment-policy-like assumptions after leaving treatment).
    """
    rows = []
    for attribute, text in (("population", population), ("treatment", treatment), ("variable", variable),
                            ("summary measure", summary)):
        if text:
            rows.append({"attribute": attribute, "description": text, "strategy": None, "targeted_by": None})
    run = list(analyses)
    for event, strategy in intercurrent_events:
        if strategy not in _BY_NAME:
            raise InputError(f"'{strategy}' is not an intercurrent-event strategy", option="intercurrent_events")
        targeting = [a for a in _BY_NAME[strategy].analyses if a in run]
        rows.append({"attribute": "intercurrent event", "description": event, "strategy": strategy,
                     "targeted_by": ";".join(targeting) or None})
    sentences = estimand_sentences(intercurrent_events, primary=primary, analyses=run)
    table = pd.DataFrame(rows, columns=list(ESTIMAND_COLUMNS))
    return EstimandDescription(attributes=table, primary=primary, sentences=sentences)


def estimand_sentences(intercurrent_events: Sequence[Tuple[str, str]], *, primary: Optional[str],
                       analyses: Sequence[str], quote: Callable[[str], str] = str) -> Tuple[str, ...]:
    """Which of ``analyses`` targets each intercurrent event's strategy, and what the primary analysis targets.

    ``quote`` is applied to the event names (user text), e.g. :func:`gapbook.text.md_escape`
    when the sentences go into Markdown unescaped as a whole.

    Parameters
    ----------
    intercurrent_events : (event, strategy) pairs from the estimand block.
    primary : the strategy named as the primary analysis, or None.
    analyses : the strategies this run estimated.
    quote : applied to each event name before it enters a sentence.

    Returns
    -------
    tuple of str
        One sentence per intercurrent event, then one for the primary analysis.

    References
    ----------
    ICH E9(R1) addendum on estimands and sensitivity analysis in clinical trials (2019).
    """
    sentences = []
    run = list(analyses)
    for event, strategy in intercurrent_events:
        known = _BY_NAME[strategy]
        targeting = [a for a in known.analyses if a in run]
        if targeting:
            sentences.append(f"Intercurrent event '{quote(event)}', {known.title.lower()} strategy ({known.why}): "
                             f"targeted here by {_phrase(targeting)}.")
        else:
            sentences.append(f"Intercurrent event '{quote(event)}', {known.title.lower()} strategy ({known.why}); "
                             "no analysis run here targets it.")
    if len({s for _, s in intercurrent_events}) > 1:
        sentences.append("The intercurrent events use different strategies, so no single analysis here targets the "
                         "whole estimand: the primary analysis should treat each event as planned (e.g. "
                         "reference-based imputation after the events handled by treatment policy and imputation "
                         "under missing at random after the others); read the analyses above as bounds of that.")
    if primary is not None:
        if primary in NOT_RECOMMENDED_STRATEGIES:
            sentences.append(f"The plan names {_phrase([primary])} primary; it targets no estimand of ICH E9(R1) "
                             "cleanly and is not recommended as a primary analysis.")
        elif primary not in run:
            sentences.append(f"The plan names {_phrase([primary])} primary, but it was not among the analyses run "
                             "(analysis.repeated.strategies).")
        else:
            aims = [s.title.lower() for s in INTERCURRENT_STRATEGIES if primary in s.analyses]
            sentences.append(f"Primary analysis: {_phrase([primary])}"
                             + (f", which targets the {' or '.join(aims)} strategy." if aims else "."))
    for strategy in NOT_RECOMMENDED_STRATEGIES:
        if strategy in run:
            sentences.append(f"{first_upper(_phrase([strategy]))} targets no estimand cleanly and is shown as a "
                             "comparison only.")
    return tuple(sentences)
