"""The imputation plan: which columns, methods, predictors and cells to impute for a study,
and one call that runs the engine with it."""
from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, Dict, List, Mapping, Optional, Tuple

import pandas as pd

from ..errors import InputError, did_you_mean
from ..pool import PooledResult
from ..vocabulary import ALLOWED_METHODS, DEFAULT_METHOD, METHOD_WORDS
from .engine import ChainedImputation, impute_chained
from .preparation import passive_inputs

__all__ = ["ImputationPlan", "plan_imputation", "impute_study"]


@dataclass(frozen=True)
class ImputationPlan:
    """What to impute and how, chosen from the params and the study.

    ``data`` holds the analysis-model columns, the auxiliary variables and the inputs of
    passive formulas; ``impute_mask`` marks the missing cells (not the "not applicable"
    ones). ``settings`` describes each variable in words and numbers.
    """

    data: pd.DataFrame
    types: Dict[str, str]
    methods: Dict[str, str]
    predictors: Dict[str, List[str]]
    exclude_predictors: Dict[str, List[str]]
    passive: Dict[str, str]
    impute_mask: pd.DataFrame
    outcome: str
    model_columns: Tuple[str, ...]
    auxiliary: Tuple[str, ...]
    formula: str
    family: str
    robust: bool
    offset: Optional[str]
    alpha: float
    m: int
    iterations: int
    seed: int
    donors: int
    n_jobs: int

    @property
    def incomplete_case_percent(self) -> float:
        """Percentage of rows with at least one analysis-model value to impute."""
        rows = self.impute_mask[list(self.model_columns)].any(axis=1)
        return 100.0 * float(rows.mean()) if len(rows) else 0.0

    @property
    def advised_m(self) -> int:
        """At least as many imputations as the percentage of incomplete cases (White, Royston & Wood 2011)."""
        return max(int(math.ceil(self.incomplete_case_percent)), 1)

    def settings(self) -> pd.DataFrame:
        """Per variable: role, type, method, number observed and to impute, and its predictors."""
        rows = []
        for name in self.data.columns:
            to_impute = int(self.impute_mask[name].sum())
            method = self.methods.get(name, "") if to_impute else ""
            role = ("outcome" if name == self.outcome else "model" if name in self.model_columns
                    else "auxiliary" if name in self.auxiliary else "passive input")
            if method in ("", "passive"):
                predictor_text = f"formula: {self.passive[name]}" if method == "passive" else ""
            else:
                chosen = self.predictors.get(name) or [c for c in self.data.columns if c != name and not (
                    c in self.passive and name in passive_inputs(self.passive[c], list(self.data.columns), c))]
                chosen = [c for c in chosen if c not in self.exclude_predictors.get(name, [])]
                predictor_text = ", ".join(chosen)
            rows.append({"variable": name, "role": role, "type": self.types[name],
                         "method": method or "(complete: predictor only)",
                         "n_observed": int(self.data[name].notna().sum()), "n_to_impute": to_impute,
                         "n_left_missing": int((self.data[name].isna() & ~self.impute_mask[name]).sum()),
                         "predictors": predictor_text})
        return pd.DataFrame(rows)

    def describe(self) -> str:
        """The imputation settings in words (Markdown), for the notebook and the report."""
        to_impute = [c for c in self.data.columns if self.impute_mask[c].any()]
        by_method: Dict[str, List[str]] = {}
        for name in to_impute:
            by_method.setdefault(self.methods[name], []).append(name)
        words = dict(METHOD_WORDS, pmm=f"{METHOD_WORDS['pmm']} ({self.donors} donors)")
        methods = "; ".join(f"{words[k]}: {', '.join(f'`{v}`' for v in names)}" for k, names in by_method.items())
        passive = "; ".join(f"`{k}` = `{v}`" for k, v in self.passive.items()) or "none"
        custom = sorted(set(self.predictors) | set(self.exclude_predictors))
        left = [c for c in self.data.columns if (self.data[c].isna() & ~self.impute_mask[c]).any()]
        lines = [
            f"- **Method:** multiple imputation by chained equations (fully conditional specification), "
            f"{self.m} imputed datasets, {self.iterations} iterations per chain, seed {self.seed}.",
            f"- **Variables imputed and how:** {methods or 'nothing is missing'}.",
            f"- **Passive variables:** {passive}.",
            f"- **Predictors:** every other variable in the imputation model, the outcome `{self.outcome}` "
            f"included" + (f"; own choices for {', '.join(f'`{c}`' for c in custom)}" if custom else "") + ".",
            f"- **Auxiliary variables** (in the imputation model, not the analysis model): "
            f"{', '.join(f'`{c}`' for c in self.auxiliary) or 'none'}.",
        ]
        if left:
            lines.append(f"- **Left missing** (not applicable, so not imputed): {', '.join(f'`{c}`' for c in left)}.")
        return "\n".join(lines)

    def run(self, m: Optional[int] = None, iterations: Optional[int] = None, seed: Optional[int] = None,
            delta: Optional[Mapping[str, Any]] = None, delta_by: Optional[Mapping[str, str]] = None,
            n_jobs: Optional[int] = None, progress: bool = True) -> ChainedImputation:
        """Run ``impute_chained`` with this plan; arguments override the plan's settings."""
        return impute_chained(
            self.data, m=self.m if m is None else m, iterations=self.iterations if iterations is None else iterations,
            seed=self.seed if seed is None else seed, methods=self.methods, predictors=self.predictors,
            passive=self.passive, n_jobs=self.n_jobs if n_jobs is None else n_jobs, types=self.types, delta=delta,
            delta_by=delta_by, impute_mask=self.impute_mask, donors=self.donors,
            exclude_predictors=self.exclude_predictors, progress=progress)

    def fit(self, imputation: ChainedImputation) -> PooledResult:
        """The params' analysis model fitted to every completed dataset, pooled with Rubin's rules."""
        return imputation.fit(self.formula, self.family, self.robust, self.offset, self.alpha)


def plan_imputation(params: Any, study: Any) -> ImputationPlan:
    """Choose the variables, methods, predictors and cells to impute from params and a study.

    Parameters
    ----------
    params : validated ``gapbook.params.Params``.
    study : ``gapbook.intake.Study`` (its ``missing`` frame gives the cells to impute; cells
        marked "not applicable" stay missing).

    Returns
    -------
    ImputationPlan: the analysis-formula columns, ``imputation.auxiliary`` and the inputs of
    ``imputation.passive`` formulas, with methods from ``imputation.methods`` or the
    variable types, and the predictor choices of the params.
    """
    from ..models import analysis_model

    section = params.imputation
    model = analysis_model(params)
    columns_all = list(study.data.columns)
    outcome, used = model.variables(columns_all)
    chosen: List[str] = [outcome] + [c for c in used if c != outcome]
    for name in section.auxiliary:
        if name not in columns_all:
            raise InputError(f"{params.label}: imputation.auxiliary: '{name}' is not a column of the data"
                             f"{did_you_mean(name, columns_all)}")
        chosen.append(name)
    for key, mapping in (("passive", section.passive), ("methods", section.methods),
                         ("predictors", section.predictors), ("exclude_predictors", section.exclude_predictors)):
        for name in mapping:
            if name not in columns_all:
                raise InputError(f"{params.label}: imputation.{key}.{name}: '{name}' is not a column of the data"
                                 f"{did_you_mean(name, columns_all)}")
    for name, formula in section.passive.items():
        chosen.append(name)
        chosen.extend(passive_inputs(formula, columns_all, name))
    for key, mapping in (("predictors", section.predictors), ("exclude_predictors", section.exclude_predictors)):
        for name, listed in mapping.items():
            for p in listed:
                if p not in columns_all:
                    raise InputError(f"{params.label}: imputation.{key}.{name}: '{p}' is not a column of the data"
                                     f"{did_you_mean(p, columns_all)}")
    for name in section.predictors:
        chosen.extend(section.predictors[name])
    columns = list(dict.fromkeys(chosen))
    types = {c: study.types[c] for c in columns}
    methods: Dict[str, str] = {}
    for name in columns:
        method = section.methods.get(name) or ("passive" if name in section.passive else DEFAULT_METHOD[types[name]])
        if method not in ALLOWED_METHODS[types[name]]:
            raise InputError(f"{params.label}: imputation.methods.{name}: '{method}' does not suit the {types[name]} "
                             f"variable '{name}'; use {' or '.join(ALLOWED_METHODS[types[name]])}")
        methods[name] = method
    mask = study.missing[columns].reset_index(drop=True)
    data = study.data[columns].reset_index(drop=True)
    for name in columns:
        if mask[name].any() and methods[name] != "passive" and not (data[name].notna() & ~mask[name]).any():
            raise InputError(f"{params.label}: '{name}' has no observed values, so it cannot be imputed; remove it "
                             "from analysis.formula / imputation.auxiliary or supply values")
    return ImputationPlan(
        data=data, types=types, methods=methods, predictors={k: list(v) for k, v in section.predictors.items()},
        exclude_predictors={k: list(v) for k, v in section.exclude_predictors.items()},
        passive=dict(section.passive), impute_mask=mask, outcome=outcome, model_columns=tuple([outcome] + used),
        auxiliary=tuple(section.auxiliary), formula=model.formula, family=model.family, robust=model.robust,
        offset=model.offset, alpha=model.alpha, m=section.m, iterations=section.iterations, seed=section.seed,
        donors=section.donors, n_jobs=section.n_jobs)


def impute_study(params: Any, study: Any, **overrides: Any) -> ChainedImputation:
    """``plan_imputation(params, study).run(**overrides)``: one call for notebooks 05 and 06."""
    return plan_imputation(params, study).run(**overrides)
