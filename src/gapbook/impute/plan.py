"""The imputation plan: which columns, methods, predictors and cells to impute for a study,
and one call that runs the engine with it."""
from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass, field
from typing import Any, Dict, List, Mapping, Optional, Sequence, Tuple

import numpy as np
import pandas as pd

from ..errors import InputError, did_you_mean
from ..intake import Study
from ..models import AnalysisModel
from ..survival import EventCoding, MissingFollowUp, cumulative_hazard_at, missing_follow_up
from ..vocabulary import DELTA_METHODS, METHOD_WORDS
from .engine import ChainedImputation, impute_chained
from .preparation import choose_method, choose_predictors, passive_inputs

__all__ = ["ImputationSettings", "ImputationPlan", "plan_imputation"]


@dataclass(frozen=True)
class ImputationSettings:
    """How to impute: the number of imputed datasets, iterations, seed and per-variable choices.

    ``methods``, ``passive``, ``predictors`` and ``exclude_predictors`` are keyed by column;
    ``auxiliary`` lists columns that join the imputation model but not the analysis model.
    """

    m: int = 20
    iterations: int = 10
    seed: int = 20261202
    donors: int = 5
    n_jobs: int = 1
    methods: Mapping[str, str] = field(default_factory=dict)
    passive: Mapping[str, str] = field(default_factory=dict)
    predictors: Mapping[str, Sequence[str]] = field(default_factory=dict)
    exclude_predictors: Mapping[str, Sequence[str]] = field(default_factory=dict)
    auxiliary: Tuple[str, ...] = ()


@dataclass(frozen=True)
class ImputationPlan:
    """What to impute and how, chosen for a study and an analysis model.

    ``data`` holds the analysis-model columns, the auxiliary variables and the inputs of
    passive formulas; ``impute_mask`` marks the missing cells (not the "not applicable"
    ones); ``methods`` the method of every column; ``sentences`` the plan in words.
    """

    data: pd.DataFrame
    types: Dict[str, str]
    methods: Dict[str, str]
    impute_mask: pd.DataFrame
    outcome: str
    model_columns: Tuple[str, ...]
    model: AnalysisModel
    settings: ImputationSettings
    sentences: Tuple[str, ...] = ()
    survival: Optional["SurvivalPredictors"] = None   # time-to-event models: what stands in for the time

    def incomplete_case_percent(self) -> float:
        """Percentage of rows with at least one analysis-model value to impute."""
        rows = self.impute_mask[list(self.model_columns)].any(axis=1)
        return 100.0 * float(rows.mean()) if len(rows) else 0.0

    def advised_m(self) -> int:
        """At least as many imputations as the percentage of incomplete cases (White, Royston & Wood 2011)."""
        return max(int(math.ceil(self.incomplete_case_percent())), 1)

    def variable_settings(self) -> pd.DataFrame:
        """Per variable: role, type, method, number observed and to impute, and its predictors."""
        columns = list(self.data.columns)
        passive = dict(self.settings.passive)
        passive_in = {v: passive_inputs(f, columns, v) for v, f in passive.items()}
        rows = []
        for name in columns:
            to_impute = int(self.impute_mask[name].sum())
            method = self.methods.get(name, "") if to_impute else ""
            derived = self.survival.columns() if self.survival is not None else ()
            role = ("outcome" if name == self.outcome else "model" if name in self.model_columns
                    else "auxiliary" if name in self.settings.auxiliary
                    else "survival predictor" if name in derived else "passive input")
            if method in ("", "passive"):
                predictor_text = f"formula: {passive[name]}" if method == "passive" else ""
            else:
                predictor_text = ", ".join(choose_predictors(name, columns, self.settings.predictors,
                                                             self.settings.exclude_predictors, passive_in))
            rows.append({"variable": name, "role": role, "type": self.types[name],
                         "method": method or "(complete: predictor only)",
                         "n_observed": int(self.data[name].notna().sum()), "n_to_impute": to_impute,
                         "n_left_missing": int((self.data[name].isna() & ~self.impute_mask[name]).sum()),
                         "predictors": predictor_text})
        return pd.DataFrame(rows)

    def delta_default(self) -> Optional[str]:
        """The variable a delta shifts when the params name none: the outcome, or for a time-to-event model
        (whose time is never imputed) the incomplete model covariate with the most values to impute.

        None when a time-to-event model has no covariate a delta can shift (none incomplete, or none
        imputed by a method in ``DELTA_METHODS``): the sensitivity stage then says so and shifts nothing.
        """
        if self.survival is None:
            return self.outcome
        shiftable = [c for c in self.incomplete_covariates() if self.methods.get(c) in DELTA_METHODS]
        if not shiftable:
            return None
        return max(shiftable, key=lambda c: int(self.impute_mask[c].sum()))

    def incomplete_covariates(self) -> Tuple[str, ...]:
        """The analysis model's covariates with values to impute (not the outcome, nor a time-to-event model's
        event column)."""
        left_aside = (self.outcome, self.survival.event.column if self.survival is not None else self.outcome)
        return tuple(c for c in self.model_columns if c not in left_aside and self.impute_mask[c].any())

    def tables(self) -> Dict[str, pd.DataFrame]:
        """``imputation_settings`` (:meth:`variable_settings`)."""
        return {"imputation_settings": self.variable_settings()}

    def run(self, *, m: Optional[int] = None, iterations: Optional[int] = None, seed: Optional[int] = None,
            delta: Optional[Mapping[str, Any]] = None, delta_by: Optional[Mapping[str, str]] = None,
            n_jobs: Optional[int] = None, progress: bool = False) -> ChainedImputation:
        """Run :func:`~gapbook.impute.impute_chained` with this plan; arguments override its settings."""
        s = self.settings
        return impute_chained(
            self.data, m=s.m if m is None else m, iterations=s.iterations if iterations is None else iterations,
            seed=s.seed if seed is None else seed, methods=self.methods,
            predictors={k: list(v) for k, v in s.predictors.items()}, passive=dict(s.passive),
            n_jobs=s.n_jobs if n_jobs is None else n_jobs, types=self.types, delta=delta, delta_by=delta_by,
            impute_mask=self.impute_mask, donors=s.donors,
            exclude_predictors={k: list(v) for k, v in s.exclude_predictors.items()}, progress=progress)


@dataclass(frozen=True)
class SurvivalPredictors:
    """What stands in for the follow-up time in the imputation models of a time-to-event analysis.

    Each incomplete covariate is imputed with the event indicator and the Nelson–Aalen
    cumulative hazard at the participant's own time as predictors, never the raw time (nor the
    event column as coded). Rows without a time or an event status have no cumulative hazard;
    they are left out of the imputation, as they are out of every fit of the model.

    References
    ----------
    White IR, Royston P (2009). Imputing missing covariate values for the Cox model. Stat Med 28:1982-1998.
    """

    time: str
    event: EventCoding
    keep: Tuple[bool, ...]
    hazard_column: str
    indicator_column: str
    missing: Optional[MissingFollowUp] = None   # the rows left out and their reasons, when the study's are known

    def columns(self) -> Tuple[str, str]:
        """The two predictor columns added to the imputation data (event indicator, cumulative hazard)."""
        return self.indicator_column, self.hazard_column

    def types(self) -> Dict[str, str]:
        return {self.indicator_column: "binary", self.hazard_column: "continuous"}

    def n_left_out(self) -> int:
        return int(len(self.keep) - sum(self.keep))

    def phrase(self) -> str:
        return (f"the event indicator ({self.indicator_column}) and the Nelson-Aalen cumulative hazard at each "
                f"participant's time ({self.hazard_column}), not {self.time} itself (White & Royston 2009)")

    def apply(self, data: pd.DataFrame, mask: pd.DataFrame,
              settings: ImputationSettings) -> Tuple[pd.DataFrame, pd.DataFrame, ImputationSettings]:
        """The imputation data with the two predictors added and the rows without follow-up left out, and the
        settings that keep the time and the event column out of every imputation model."""
        keep = np.array(self.keep, dtype=bool)
        data = data.loc[keep].reset_index(drop=True)
        mask = mask.loc[keep].reset_index(drop=True)
        status = self.event.indicator(data)
        data[self.indicator_column] = status
        data[self.hazard_column] = cumulative_hazard_at(data[self.time].to_numpy(dtype=float), status)
        mask[self.indicator_column] = False
        mask[self.hazard_column] = False
        hidden = [self.time, self.event.column]
        exclude = {name: tuple(dict.fromkeys(list(settings.exclude_predictors.get(name, ())) + hidden))
                   for name in data.columns}
        predictors = {name: tuple(dict.fromkeys(list(listed) + list(self.columns())))
                      for name, listed in settings.predictors.items()}
        return data, mask, dataclasses.replace(settings, exclude_predictors=exclude, predictors=predictors)

    def sentences(self) -> Tuple[str, ...]:
        out = [f"Time to event: {self.time} and {self.event.column} enter the imputation models as {self.phrase()}; "
               "the analysis model still uses the time and event status themselves."]
        if self.missing is not None and self.missing.sentence():
            out.append(self.missing.sentence())
        elif self.n_left_out():
            out.append(f"{self.n_left_out():,} rows without a follow-up time or event status are left out of the "
                       "imputation and of the pooled analysis (they have no place on the cumulative hazard and "
                       "every fit of the model leaves them out).")
        return tuple(out)


def _free_name(stem: str, taken: Sequence[str]) -> str:
    name = stem
    while name in taken:
        name += "_"
    return name


def survival_predictors(data: pd.DataFrame, *, time: str, event: EventCoding,
                        reasons: Optional[pd.DataFrame] = None) -> SurvivalPredictors:
    """The event indicator and cumulative hazard predictors for imputing a Cox model's covariates.

    Parameters
    ----------
    data : the imputation data (with the time and event columns).
    time : the follow-up time column.
    event : the event coding.
    reasons : the study's missing-reason frame, so the plan says why rows are left out.

    Returns
    -------
    SurvivalPredictors (apply it to the data, mask and settings).

    References
    ----------
    White IR, Royston P (2009). Imputing missing covariate values for the Cox model. Stat Med 28:1982-1998.
    """
    status = event.indicator(data)
    keep = data[time].notna().to_numpy() & ~np.isnan(status)
    if not keep.any():
        raise InputError(f"no row has both a follow-up time ('{time}') and an event status ('{event.column}')",
                         option="formula")
    taken = list(data.columns)
    indicator = _free_name("event_indicator", taken)
    hazard = _free_name("cumulative_hazard", taken + [indicator])
    missing = missing_follow_up(data, time=time, event=event, reasons=reasons) if reasons is not None else None
    return SurvivalPredictors(time=time, event=event, keep=tuple(bool(k) for k in keep), hazard_column=hazard,
                              indicator_column=indicator, missing=missing)


def plan_sentences(plan: ImputationPlan) -> Tuple[str, ...]:
    """The plan in words: method, variables and how, passive variables, predictors, auxiliary ones, advice on m."""
    s = plan.settings
    to_impute = [c for c in plan.data.columns if plan.impute_mask[c].any()]
    by_method: Dict[str, List[str]] = {}
    for name in to_impute:
        by_method.setdefault(plan.methods[name], []).append(name)
    words = dict(METHOD_WORDS, pmm=f"{METHOD_WORDS['pmm']} ({s.donors} donors)")
    methods = "; ".join(f"{words[k]}: {', '.join(names)}" for k, names in by_method.items())
    passive = "; ".join(f"{k} = {v}" for k, v in s.passive.items()) or "none"
    custom = sorted(set(s.predictors) | set(s.exclude_predictors))
    left = [c for c in plan.data.columns if (plan.data[c].isna() & ~plan.impute_mask[c]).any()]
    sentences = [
        f"Method: multiple imputation by chained equations (fully conditional specification), {s.m} imputed "
        f"datasets, {s.iterations} iterations per chain, seed {s.seed}.",
        f"Variables imputed and how: {methods or 'nothing is missing'}.",
        f"Passive variables: {passive}.",
        (f"Predictors: every other variable in the imputation model, the outcome {plan.outcome} included"
         if plan.survival is None else
         "Predictors: every other variable in the imputation model, with the follow-up time and event column "
         f"represented by {plan.survival.phrase()}")
        + (f"; own choices for {', '.join(custom)}" if custom else "") + ".",
        f"Auxiliary variables (in the imputation model, not the analysis model): {', '.join(s.auxiliary) or 'none'}.",
    ]
    if left:
        sentences.append(f"Left missing (not applicable, so not imputed): {', '.join(left)}.")
    if plan.survival is not None:
        sentences.extend(plan.survival.sentences())
    advice = (f"{plan.incomplete_case_percent():.1f} % of the rows lack at least one analysis-model value, so at least "
              f"{plan.advised_m()} imputations are advised (at least as many as the percentage of incomplete cases; "
              f"White, Royston & Wood 2011); this plan uses m = {s.m}.")
    if s.m < plan.advised_m():
        advice += (" That is fewer than advised: raise m so the results do not change noticeably when the "
                   "imputation is repeated with another seed.")
    sentences.append(advice)
    return tuple(sentences)


def plan_imputation(study: Study, *, model: AnalysisModel, m: int = 20, iterations: int = 10, seed: int = 20261202,
                    donors: int = 5, n_jobs: int = 1, methods: Optional[Mapping[str, str]] = None,
                    passive: Optional[Mapping[str, str]] = None,
                    predictors: Optional[Mapping[str, Sequence[str]]] = None,
                    exclude_predictors: Optional[Mapping[str, Sequence[str]]] = None,
                    auxiliary: Sequence[str] = ()) -> ImputationPlan:
    """Choose the variables, methods, predictors and cells to impute for a study and its analysis model.

    Parameters
    ----------
    study : from :func:`gapbook.intake.load_study`; its ``missing`` frame gives the cells to
        impute (cells marked "not applicable" stay missing).
    model : the analysis model; its outcome and covariates are imputed.
    m, iterations, seed, donors, n_jobs : as for :func:`~gapbook.impute.impute_chained`.
    methods : {column: method}; default from the variable's type (``gapbook.vocabulary.DEFAULT_METHOD``).
    passive : {column: formula} of variables recomputed from others.
    predictors, exclude_predictors : {column: [columns]} to choose a variable's predictors.
    auxiliary : columns added to the imputation model but not to the analysis model.

    Returns
    -------
    ImputationPlan over the analysis-model columns, the auxiliary columns and the inputs of
    passive formulas.

    References
    ----------
    White IR, Royston P, Wood AM (2011). Multiple imputation using chained equations: issues
    and guidance for practice. Stat Med 30:377-399.
    """
    settings = ImputationSettings(m=m, iterations=iterations, seed=seed, donors=donors, n_jobs=n_jobs,
                                  methods=dict(methods or {}), passive=dict(passive or {}),
                                  predictors={k: tuple(v) for k, v in (predictors or {}).items()},
                                  exclude_predictors={k: tuple(v) for k, v in (exclude_predictors or {}).items()},
                                  auxiliary=tuple(auxiliary))
    columns_all = list(study.data.columns)
    outcome, used = model.variables(columns_all)
    chosen: List[str] = [outcome] + [c for c in used if c != outcome]
    for name in settings.auxiliary:
        if name not in columns_all:
            raise InputError(f"'{name}' is not a column of the data{did_you_mean(name, columns_all)}",
                             option="auxiliary")
        chosen.append(name)
    for option, mapping in (("passive", settings.passive), ("methods", settings.methods),
                            ("predictors", settings.predictors), ("exclude_predictors", settings.exclude_predictors)):
        for name in mapping:
            if name not in columns_all:
                raise InputError(f"'{name}' is not a column of the data{did_you_mean(name, columns_all)}",
                                 option=f"{option}.{name}")
    for name, formula in settings.passive.items():
        chosen.append(name)
        chosen.extend(passive_inputs(formula, columns_all, name))
    for option, mapping in (("predictors", settings.predictors), ("exclude_predictors", settings.exclude_predictors)):
        for name, listed in mapping.items():
            for p in listed:
                if p not in columns_all:
                    raise InputError(f"'{p}' is not a column of the data{did_you_mean(p, columns_all)}",
                                     option=f"{option}.{name}")
    for name in settings.predictors:
        chosen.extend(settings.predictors[name])
    columns = list(dict.fromkeys(chosen))
    types = {c: study.types[c] for c in columns}
    mask = study.missing[columns].reset_index(drop=True)
    data = study.data[columns].reset_index(drop=True)
    survival: Optional[SurvivalPredictors] = None
    if model.is_time_to_event():
        survival = survival_predictors(data, time=outcome, event=model.event,
                                       reasons=study.reasons[columns].reset_index(drop=True))
        data, mask, settings = survival.apply(data, mask, settings)
        types.update(survival.types())
        columns = list(data.columns)
    chosen_methods = {name: choose_method(name, types[name], settings.methods, settings.passive) for name in columns}
    for name in columns:
        if mask[name].any() and chosen_methods[name] != "passive" and not (data[name].notna() & ~mask[name]).any():
            raise InputError(f"'{name}' has no observed values, so it cannot be imputed; remove it from the analysis "
                             "model or the auxiliary variables, or supply values")
    plan = ImputationPlan(data=data, types=types, methods=chosen_methods, impute_mask=mask, outcome=outcome,
                          model_columns=tuple([outcome] + used), model=model, settings=settings, survival=survival)
    return dataclasses.replace(plan, sentences=plan_sentences(plan))
