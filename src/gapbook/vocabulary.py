"""The words gapbook uses, written once: variable types, imputation methods, model families,
strategies, missing reasons and the cautions every report carries.

Every other module imports these names from here; nothing else lists them. Adding a
model family (e.g. a proportional hazards model) or a strategy (e.g. the repeated-measures
strategies) means adding an entry below: the params schema, the record's tables and the
wording all take their lists from this module.

One rule lives here too, :func:`infer_type`, because it is the rule that gives an
undeclared column its word.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Dict, Iterable, Optional, Tuple

import numpy as np
import pandas as pd

__all__ = [
    "VARIABLE_TYPES", "CATEGORICAL_TYPES", "NUMERIC_TYPES", "NUMBER_CODED_TYPES", "infer_type",
    "IMPUTATION_METHODS", "DEFAULT_METHOD", "ALLOWED_METHODS", "DELTA_METHODS", "METHOD_WORDS",
    "Family", "FAMILIES", "FAMILY_NAMES", "RATIO_NAMES", "RATIO_WORDS", "ratio_name", "has_ratio_scale",
    "effect_scale", "TIME_TO_EVENT_FAMILIES", "TIES_METHODS",
    "Strategy", "STRATEGIES", "STRATEGY_NAMES", "STRATEGY_TITLES", "STRATEGY_PHRASES", "STRATEGY_SHORT_TITLES",
    "STRATEGY_ASSUMPTIONS", "PARTICIPANT_ROW_STRATEGY_NAMES", "LEAD_STRATEGIES", "strategy_rank",
    "BLANK", "NOT_APPLICABLE", "IMPLAUSIBLE", "NO_RECORD", "REASON_NOT_GIVEN",
    "MAR_CAUTION", "SENSITIVITY_POINTER", "PLAN_CAUTION", "REPORTING_CAUTION", "CAUTIONS", "cautions",
    "COMPLETERS_CAUTION", "LAST_OBSERVATION_CAUTION", "REFERENCE_BASED_VARIANCE", "INFORMATION_ANCHORING",
    "REFERENCE_BASED_CAUTIONS", "reference_based_cautions", "MECHANISMS",
    "LAYOUTS", "COVARIANCE_STRUCTURES", "MIXED_MODEL_METHODS", "FOLLOWUP_STRATEGY_NAMES", "NOT_RECOMMENDED_STRATEGIES",
    "REFERENCE_BASED_STRATEGIES", "FOLLOWUP_IMPUTED_STRATEGIES",
    "IntercurrentStrategy", "INTERCURRENT_STRATEGIES", "INTERCURRENT_STRATEGY_NAMES", "targeting_strategies",
]

# ---------------------------------------------------------------------------
# variable types

VARIABLE_TYPES: Tuple[str, ...] = ("continuous", "binary", "nominal", "ordinal", "count")
CATEGORICAL_TYPES: Tuple[str, ...] = ("binary", "nominal", "ordinal")
NUMERIC_TYPES: Tuple[str, ...] = ("continuous", "count")
# Types that can enter a computation as numbers (binary as 0/1): Little's test, correlations.
NUMBER_CODED_TYPES: Tuple[str, ...] = ("continuous", "count", "binary")
COUNT_MAX = 20  # whole numbers from 0 to this are read as counts (common practice, no source)


def infer_type(values: pd.Series) -> Tuple[str, str]:
    """A type for an undeclared column from its values, and why.

    The rule (common practice, no source): no observed value -> continuous (declare it);
    one distinct value -> continuous for numbers, nominal for text (constant where
    observed); an ordered ``Categorical`` -> ordinal; numbers with two distinct values ->
    binary; whole numbers from 0 to 20 -> count; other numbers -> continuous; text with two
    distinct values -> binary; other text -> nominal.

    Parameters
    ----------
    values : the column's values, NaN where missing (numbers as floats, text or
        ``Categorical`` categories as they are).

    Returns
    -------
    (type, reason) : one of :data:`VARIABLE_TYPES`, and the reason in words for the audit.
    """
    observed = values.dropna()
    distinct = observed.unique()
    if len(distinct) == 0:
        return "continuous", "no observed values; declare its type"
    if len(distinct) == 1:
        kind = "continuous" if pd.api.types.is_numeric_dtype(observed) else "nominal"
        return kind, "one distinct value (constant where observed)"
    if isinstance(values.dtype, pd.CategoricalDtype) and values.dtype.ordered:
        return "ordinal", f"ordered categories ({len(distinct)} observed)"
    if pd.api.types.is_numeric_dtype(observed):
        if len(distinct) <= 2:
            return "binary", f"{len(distinct)} distinct numbers"
        numbers = observed.to_numpy(dtype=float)
        whole = bool(np.all(np.isfinite(numbers))) and bool(np.all(np.mod(numbers, 1) == 0))  # inf is no count
        if whole and observed.min() >= 0 and observed.max() <= COUNT_MAX:
            return "count", f"whole numbers from 0 to {COUNT_MAX} at most"
        return "continuous", "numbers"
    if len(distinct) <= 2:
        return "binary", f"{len(distinct)} distinct texts"
    return "nominal", f"{len(distinct)} distinct texts"


# ---------------------------------------------------------------------------
# imputation methods

IMPUTATION_METHODS: Tuple[str, ...] = ("pmm", "normal", "logistic", "multinomial", "ordinal", "passive")
DEFAULT_METHOD: Dict[str, str] = {"continuous": "pmm", "count": "pmm", "binary": "logistic",
                                  "nominal": "multinomial", "ordinal": "ordinal"}
ALLOWED_METHODS: Dict[str, Tuple[str, ...]] = {
    "continuous": ("pmm", "normal", "passive"), "count": ("pmm", "passive"), "binary": ("logistic",),
    "nominal": ("multinomial",), "ordinal": ("ordinal", "multinomial"),
}
# Methods whose imputed values a delta can shift (on the value scale, or the log-odds for logistic).
DELTA_METHODS: Tuple[str, ...] = ("pmm", "normal", "logistic")
METHOD_WORDS: Dict[str, str] = {
    "pmm": "predictive mean matching", "normal": "Bayesian linear regression", "logistic": "logistic regression",
    "multinomial": "multinomial logistic regression", "ordinal": "proportional-odds regression",
    "passive": "passive (recomputed from a formula)",
}

# ---------------------------------------------------------------------------
# analysis-model families


@dataclass(frozen=True)
class Family:
    """An analysis-model family: its name in params and, for log-link models, its ratio's name."""

    name: str
    ratio: Optional[str] = None       # column stem of the exponentiated coefficient, e.g. odds_ratio
    ratio_words: Optional[str] = None  # the same in words, e.g. "odds ratio"


FAMILIES: Tuple[Family, ...] = (
    Family("gaussian"),
    Family("binomial", "odds_ratio", "odds ratio"),
    Family("poisson", "rate_ratio", "rate ratio"),
    # Proportional hazards (Cox) regression: the formula's left side is the follow-up time and
    # analysis.event names the event column; exponentiated coefficients are hazard ratios.
    Family("cox", "hazard_ratio", "hazard ratio"),
)
FAMILY_NAMES: Tuple[str, ...] = tuple(f.name for f in FAMILIES)
RATIO_NAMES: Dict[str, str] = {f.name: f.ratio for f in FAMILIES if f.ratio}
TIME_TO_EVENT_FAMILIES: Tuple[str, ...] = ("cox",)   # outcome = follow-up time, with an event column
# Approximations to the Cox partial likelihood for tied event times; Efron's is the default
# because it is closer to the exact likelihood when ties are many (Efron 1977, JASA 72:557;
# Hertz-Picciotto & Rockhill 1997, Biometrics 53:1151) and equal to Breslow's without ties.
TIES_METHODS: Tuple[str, ...] = ("efron", "breslow")


RATIO_WORDS: Dict[str, str] = {f.name: f.ratio_words for f in FAMILIES if f.ratio_words}


def ratio_name(family: str) -> Optional[str]:
    """The ratio column stem of a family (``odds_ratio``, ``rate_ratio``), or None for an identity link.

    Parameters
    ----------
    family : str
        One of :data:`FAMILIES`.

    Returns
    -------
    str or None
        The stem of the ratio columns (``<stem>``, ``<stem>_ci_lower``, ``<stem>_ci_upper``).
    """
    return RATIO_NAMES.get(family)


def has_ratio_scale(family: str) -> bool:
    """Whether a family's coefficients are log ratios, reported also exponentiated (``exp_estimate``...).

    A family joins the rule by naming its ratio in :data:`FAMILIES` (e.g. a hazard ratio for cox).

    Parameters
    ----------
    family : str
        The model family.

    Returns
    -------
    bool
    """
    return family in RATIO_NAMES


def effect_scale(family: str, *, exponentiated: bool) -> str:
    """The scale of an estimate in words: 'odds ratio', 'log odds ratio', or 'difference in the outcome'.

    Parameters
    ----------
    family : str
        The model family.
    exponentiated : bool
        Whether the estimate is on the ratio scale (``exp_estimate``).

    Returns
    -------
    str
    """
    words = RATIO_WORDS.get(family)
    if words is None:
        return "difference in the outcome (model coefficient)"
    return words if exponentiated else f"log {words}"


# ---------------------------------------------------------------------------
# strategies (the ``strategy`` column of estimates.csv, in the order tables list them)


@dataclass(frozen=True)
class Strategy:
    """A way of handling missing data in the analysis: its table name, title, phrase in a sentence and
    short label (a figure's axis or legend; the title when not given)."""

    name: str
    title: str
    phrase: str
    short: str = ""


STRATEGIES: Tuple[Strategy, ...] = (
    Strategy("complete_case", "Complete cases", "complete cases"),
    Strategy("missing_category", "Missing category / indicator", "missing-category (indicator) analysis"),
    # Follow-up (repeated-measures) studies: the mixed model first, as trial plans name it primary.
    Strategy("mixed_model", "Mixed model for repeated measures", "the mixed model for repeated measures",
             "mixed model (MAR)"),
    Strategy("multiple_imputation", "Multiple imputation", "multiple imputation", "imputation (MAR)"),
    Strategy("jump_to_reference", "Jump to reference", "jump-to-reference imputation", "jump to reference"),
    Strategy("copy_reference", "Copy reference", "copy-reference imputation", "copy reference"),
    Strategy("copy_increments_reference", "Copy increments in reference",
             "copy-increments-in-reference imputation", "copy increments in reference"),
    Strategy("delta_adjusted", "Own arm with a delta", "own-arm imputation with a delta after leaving",
             "own group + delta"),
    Strategy("completers", "Completers only (not recommended)", "the completers-only analysis", "completers only"),
    Strategy("last_observation", "Last observation carried forward (not recommended)",
             "last observation carried forward", "last observation carried forward"),
)
STRATEGY_NAMES: Tuple[str, ...] = tuple(s.name for s in STRATEGIES)
STRATEGY_TITLES: Dict[str, str] = {s.name: s.title for s in STRATEGIES}
STRATEGY_PHRASES: Dict[str, str] = {s.name: s.phrase for s in STRATEGIES}
STRATEGY_SHORT_TITLES: Dict[str, str] = {s.name: s.short or s.title for s in STRATEGIES}
# The strategies of a study with one row per participant (the cases, indicator and impute stages), in
# table order: what the simulation stage compares by default.
PARTICIPANT_ROW_STRATEGY_NAMES: Tuple[str, ...] = ("complete_case", "missing_category", "multiple_imputation")
# The strategy a reader is pointed to first when present (the others are comparisons or sensitivity).
LEAD_STRATEGIES: Tuple[str, ...] = ("multiple_imputation", "mixed_model", "complete_case")
# What each strategy assumes about why values are missing, in a few words for the landing page's table
# (Little & Rubin 2019, Statistical Analysis with Missing Data, 3rd ed.; White & Carlin 2010, Stat Med
# 29:2920; Carpenter & Kenward 2013, Multiple Imputation and its Application; recalled from memory).
STRATEGY_ASSUMPTIONS: Dict[str, str] = {
    "complete_case": "missingness does not depend on the outcome, given the model's covariates",
    "missing_category": "acceptable for baseline covariates in a randomised trial; biased otherwise",
    "mixed_model": "missing at random, given the observed outcomes and covariates",
    "multiple_imputation": "missing at random, given the variables in the imputation model",
    "jump_to_reference": "not at random: after leaving, outcomes follow the reference group",
    "copy_reference": "not at random: the whole profile follows the reference group",
    "copy_increments_reference": "not at random: changes after leaving follow the reference group",
    "delta_adjusted": "not at random: outcomes after leaving are shifted by delta",
    "completers": "those who left are like those who stayed",
    "last_observation": "the outcome froze at the last attended visit",
}


# The follow-up (repeated-measures) strategies, in the order tables and figures show them.
FOLLOWUP_STRATEGY_NAMES: Tuple[str, ...] = (
    "mixed_model", "multiple_imputation", "jump_to_reference", "copy_reference", "copy_increments_reference",
    "delta_adjusted", "completers", "last_observation")
NOT_RECOMMENDED_STRATEGIES: Tuple[str, ...] = ("completers", "last_observation")
# Reference-based imputation (Carpenter, Roger & Kenward 2013, J Biopharm Stat 23:1352-1371): after leaving, a participant's outcomes follow the reference group.
REFERENCE_BASED_STRATEGIES: Tuple[str, ...] = ("jump_to_reference", "copy_reference", "copy_increments_reference")
# The follow-up strategies that impute the missing visits (and so pool m imputed datasets).
FOLLOWUP_IMPUTED_STRATEGIES: Tuple[str, ...] = ("multiple_imputation", *REFERENCE_BASED_STRATEGIES, "delta_adjusted")
# Follow-up designs: how the file is laid out, and the covariance structures the mixed model fits.
LAYOUTS: Tuple[str, ...] = ("long", "wide")
COVARIANCE_STRUCTURES: Tuple[str, ...] = ("unstructured",)
# How the mixed model estimates the covariance: restricted (REML, the default) or full maximum likelihood.
MIXED_MODEL_METHODS: Tuple[str, ...] = ("reml", "ml")


def strategy_rank(name: str) -> int:
    """Position of a strategy in table order; unknown strategies come after the known ones.

    Parameters
    ----------
    name : str
        A strategy name as ``estimates.csv`` writes it.

    Returns
    -------
    int
        Its place in :data:`STRATEGY_NAMES`, or the number of known strategies.
    """
    return STRATEGY_NAMES.index(name) if name in STRATEGY_NAMES else len(STRATEGY_NAMES)


# ---------------------------------------------------------------------------
# estimands (ICH E9(R1) addendum, 2019): strategies for intercurrent events, and which of the
# follow-up analyses target an estimand built on each


@dataclass(frozen=True)
class IntercurrentStrategy:
    """An ICH E9(R1) strategy for an intercurrent event, and the follow-up analyses that target it."""

    name: str
    title: str
    analyses: Tuple[str, ...]
    why: str


INTERCURRENT_STRATEGIES: Tuple[IntercurrentStrategy, ...] = (
    IntercurrentStrategy(
        "hypothetical", "Hypothetical",
        ("mixed_model", "multiple_imputation", "delta_adjusted"),
        "the outcome had the event not happened, i.e. had the participant stayed on treatment and in follow-up: "
        "the mixed model and imputation under missing at random estimate it when, after the event, participants "
        "would have continued like those with the same history who stayed (delta adjustment shows how far it moves "
        "if they would have done worse)"),
    IntercurrentStrategy(
        "treatment_policy", "Treatment policy",
        ("jump_to_reference", "copy_reference", "copy_increments_reference"),
        "the outcome whatever happened after the event: when outcomes after leaving treatment were not collected, "
        "reference-based imputation approximates it by assuming those who left the active arm then did as the "
        "reference arm does (jump to reference: at once; copy reference: as if they had always been in it; copy "
        "increments: changing from where they were as the reference arm changes); outcomes observed after the "
        "event should be analysed as observed"),
    IntercurrentStrategy(
        "composite", "Composite", (),
        "the event is part of the outcome (e.g. leaving for lack of efficacy counts as a failure): none of the "
        "follow-up analyses here targets it; define the composite outcome in the data and analyse it"),
    IntercurrentStrategy(
        "while_on_treatment", "While on treatment", (),
        "the outcome before the event only: none of the follow-up analyses here targets it (it needs an "
        "outcome summarised over the time on treatment)"),
    IntercurrentStrategy(
        "principal_stratum", "Principal stratum", (),
        "the effect in those who would not have the event on either treatment: none of the follow-up analyses "
        "here targets it (it needs a principal stratification model)"),
)
INTERCURRENT_STRATEGY_NAMES: Tuple[str, ...] = tuple(s.name for s in INTERCURRENT_STRATEGIES)


def targeting_strategies(intercurrent: str) -> Tuple[str, ...]:
    """The follow-up analyses that target an estimand using the given intercurrent-event strategy.

    Parameters
    ----------
    intercurrent : str
        An intercurrent-event strategy's name (ICH E9(R1)).

    Returns
    -------
    tuple of str
        The follow-up strategies that target it; an unknown name raises KeyError.
    """
    for strategy in INTERCURRENT_STRATEGIES:
        if strategy.name == intercurrent:
            return strategy.analyses
    raise KeyError(intercurrent)


# ---------------------------------------------------------------------------
# missing reasons the kit itself gives (users' reason codes add their own labels)

BLANK = "blank"                    # an empty cell
NOT_APPLICABLE = "not applicable"  # outside the variable's applies_if condition: not missing
IMPLAUSIBLE = "implausible"        # outside its plausible range, set missing on request
NO_RECORD = "no record of the visit"   # follow-up, long layout: no row for a planned visit
REASON_NOT_GIVEN = "reason not given"  # follow-up: a participant left and no reason was recorded

# ---------------------------------------------------------------------------
# missingness mechanisms (Rubin 1976, Biometrika 63:581-592, citation recalled from memory): the ones the
# simulation stage imposes

MECHANISMS: Tuple[str, ...] = ("MCAR", "MAR", "MNAR")

# ---------------------------------------------------------------------------
# the cautions of the trade, carried by every report

MAR_CAUTION = ("Missing at random (MAR) cannot be verified from the observed data: a test can give evidence "
               "against missing completely at random (MCAR), none can tell MAR from missing not at random (MNAR).")
SENSITIVITY_POINTER = ("Every imputation-based result rests on that assumption, which is why the sensitivity "
                       "analyses show how far the conclusions move if the data are missing not at random.")
PLAN_CAUTION = ("These results support, and do not replace, a pre-specified statistical analysis plan and the "
                "judgement of a qualified statistician.")
REPORTING_CAUTION = ("Follow the reporting guideline your journal asks for (e.g. CONSORT for trials, STROBE for "
                     "observational studies) and local data-protection rules before sharing any table from this "
                     "record.")
# Follow-up studies: the comparison strategies and reference-based imputation.
COMPLETERS_CAUTION = ("Completers only (participants who attended the last planned visit) is shown for comparison "
                      "and is not recommended: it assumes those who left are like those who stayed (National "
                      "Research Council 2010, The Prevention and Treatment of Missing Data in Clinical Trials; "
                      "recalled from memory).")
LAST_OBSERVATION_CAUTION = ("Last observation carried forward is shown for comparison and is not recommended: it "
                            "assumes each participant's outcome froze at their last attended visit, which can bias "
                            "the effect in either direction and understates uncertainty (National Research Council "
                            "2010; recalled from memory).")
REFERENCE_BASED_VARIANCE = ("Rubin's variance formula overstates the variance of a reference-based estimate: the "
                            "imputed values follow the reference group's mean, which does not vary with the active "
                            "group's data as the formula assumes, so intervals are wider than the estimate's "
                            "repeated-sampling spread.")
INFORMATION_ANCHORING = ("Whether that wider variance is a defect or the right answer is debated: it keeps the share "
                         "of information lost to missing data about the same as under missing at random "
                         "('information anchoring'; Cro, Carpenter & Kenward 2019, JRSS A 182:623-645, citation "
                         "recalled from memory), while the repeated-sampling variance is smaller.")
CAUTIONS: Tuple[str, ...] = (f"{MAR_CAUTION} {SENSITIVITY_POINTER}", PLAN_CAUTION, REPORTING_CAUTION)
REFERENCE_BASED_CAUTIONS: Tuple[str, ...] = (REFERENCE_BASED_VARIANCE, INFORMATION_ANCHORING)


def cautions(with_model: bool = True) -> Tuple[str, ...]:
    """The cautions a page carries; without an analysis model there is no imputation to point to.

    Parameters
    ----------
    with_model : bool
        Whether the page reports an analysis model (adds the pointer to the sensitivity analyses).

    Returns
    -------
    tuple of str
        The cautions, in the order a page shows them.
    """
    return CAUTIONS if with_model else (MAR_CAUTION, PLAN_CAUTION, REPORTING_CAUTION)


def reference_based_cautions(strategies: Iterable[str]) -> Tuple[str, ...]:
    """The reference-based cautions (Rubin's variance, information anchoring) when a strategy is reference-based.

    Parameters
    ----------
    strategies : iterable of str
        The follow-up strategies a page or result reports.

    Returns
    -------
    tuple of str
        :data:`REFERENCE_BASED_CAUTIONS` when any strategy is in :data:`REFERENCE_BASED_STRATEGIES`, else empty.

    References
    ----------
    Cro S, Carpenter JR, Kenward MG (2019). Information-anchored sensitivity analysis: theory and
    application. JRSS A 182:623-645 (citation recalled from memory).
    """
    return REFERENCE_BASED_CAUTIONS if set(strategies) & set(REFERENCE_BASED_STRATEGIES) else ()
