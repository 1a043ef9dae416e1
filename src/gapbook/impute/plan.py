"""The imputation plan: which columns, methods, predictors and cells to impute for a study,
and one call that runs the engine with it."""
from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass, field
from typing import Any, Dict, List, Mapping, Optional, Sequence, Tuple

import pandas as pd

from ..errors import InputError, did_you_mean
from ..intake import Study
from ..models import AnalysisModel
from ..vocabulary import METHOD_WORDS
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
            role = ("outcome" if name == self.outcome else "model" if name in self.model_columns
                    else "auxiliary" if name in self.settings.auxiliary else "passive input")
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
        f"Predictors: every other variable in the imputation model, the outcome {plan.outcome} included"
        + (f"; own choices for {', '.join(custom)}" if custom else "") + ".",
        f"Auxiliary variables (in the imputation model, not the analysis model): {', '.join(s.auxiliary) or 'none'}.",
    ]
    if left:
        sentences.append(f"Left missing (not applicable, so not imputed): {', '.join(left)}.")
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
    chosen_methods = {name: choose_method(name, types[name], settings.methods, settings.passive) for name in columns}
    mask = study.missing[columns].reset_index(drop=True)
    data = study.data[columns].reset_index(drop=True)
    for name in columns:
        if mask[name].any() and chosen_methods[name] != "passive" and not (data[name].notna() & ~mask[name]).any():
            raise InputError(f"'{name}' has no observed values, so it cannot be imputed; remove it from the analysis "
                             "model or the auxiliary variables, or supply values")
    plan = ImputationPlan(data=data, types=types, methods=chosen_methods, impute_mask=mask, outcome=outcome,
                          model_columns=tuple([outcome] + used), model=model, settings=settings)
    return dataclasses.replace(plan, sentences=plan_sentences(plan))
