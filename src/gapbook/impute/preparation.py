"""Preparing an imputation problem: the variables with their values, codes, methods and
predictors, the design matrix every chain starts from, passive formulas and delta shifts.

The problem is built once and shared read-only by every chain (:mod:`.chains`).
Passive formulas are checked and computed by the expression language
(:mod:`gapbook.expressions`); :func:`evaluate_passive` is the one place a formula is
evaluated, by that language's own evaluator.
"""
from __future__ import annotations

import functools
from typing import Any, Dict, List, Mapping, Optional, Sequence, Tuple

import numpy as np
import pandas as pd

from ..errors import InputError, did_you_mean
from ..expressions import VALUE, Expression, ExpressionError, parse_expression
from ..intake import levels_of
from ..vocabulary import ALLOWED_METHODS, CATEGORICAL_TYPES, DEFAULT_METHOD, DELTA_METHODS, NUMERIC_TYPES
from .problem import Problem, Variable, row_indices

__all__ = ["choose_method", "choose_predictors", "check_names", "passive_inputs", "evaluate_passive", "prepare",
           "delta_shifts"]


def check_names(mapping: Optional[Mapping[str, Any]], columns: Sequence[str], option: str) -> Dict[str, Any]:
    """The mapping as a dict, after checking that every key is a column (exit 2 naming ``option.<key>``).

    Parameters
    ----------
    mapping : mapping, optional
        {column: setting}.
    columns : sequence of str
        The columns there are.
    option : str
        The option's name for the message.

    Returns
    -------
    dict
    """
    mapping = dict(mapping or {})
    for name in mapping:
        if name not in columns:
            raise InputError(f"'{name}' is not a column of the imputation data{did_you_mean(name, columns)}",
                             option=f"{option}.{name}")
    return mapping


def passive_inputs(formula: str, columns: Sequence[str], variable: str) -> Tuple[str, ...]:
    """The columns a passive formula uses; exits 2 when it is not allowed or names an unknown column.

    The formula is checked by the expression language (:mod:`gapbook.expressions`): column
    names, numbers, arithmetic, comparisons and the listed functions only.

    Parameters
    ----------
    formula : str
        The passive formula.
    columns : sequence of str
        The data's columns.
    variable : str
        The passive variable (named in errors).

    Returns
    -------
    tuple of str
    """
    try:
        parsed = _passive(formula, "", tuple(columns))
    except ExpressionError as exc:
        raise InputError(exc.detail, option=f"passive.{variable}") from None
    if variable in parsed.columns:
        raise InputError(f"the formula uses '{variable}' itself", option=f"passive.{variable}")
    return parsed.columns


def evaluate_passive(formula: str, values: Dict[str, np.ndarray]) -> np.ndarray:
    """The values of a passive formula for the imputed rows, from its inputs' current values.

    Computed by the expression language's own evaluator over the checked tree (numpy,
    NaN where an input is missing); nothing is given to Python's ``eval``.

    Parameters
    ----------
    formula : str
        The passive formula.
    values : dict of str to ndarray
        Its inputs' values for the rows.

    Returns
    -------
    ndarray
    """
    return _passive(formula, "imputation.passive", None).evaluate(values)


@functools.lru_cache(maxsize=256)
def _passive(formula: str, where: str, columns: Optional[Tuple[str, ...]]) -> Expression:
    return parse_expression(formula, where=where, kind=VALUE, columns=columns)


# ---------------------------------------------------------------------------
# building the problem

def choose_method(name: str, variable_type: str, methods: Mapping[str, str], passive: Mapping[str, str]) -> str:
    """The imputation method of one variable: the one given, else passive for a formula, else the type's default.

    Exits 2 (option ``methods.<name>``) when the method does not suit the variable's type or
    contradicts ``passive``.

    Parameters
    ----------
    name : str
        The variable.
    variable_type : str
        Its type.
    methods : mapping of str to str
        The methods asked for.
    passive : mapping of str to str
        The passive formulas.

    Returns
    -------
    str
        One of :data:`gapbook.vocabulary.IMPUTATION_METHODS`.
    """
    method = methods.get(name) or ("passive" if name in passive else DEFAULT_METHOD[variable_type])
    if name in passive and method != "passive":
        raise InputError(f"'{method}' given but passive.{name} is a formula; use one or the other",
                         option=f"methods.{name}")
    if method == "passive" and name not in passive:
        raise InputError(f"'passive' needs a formula in passive.{name}", option=f"methods.{name}")
    if method not in ALLOWED_METHODS[variable_type]:
        raise InputError(f"'{method}' does not suit the {variable_type} variable '{name}'; use "
                         f"{' or '.join(ALLOWED_METHODS[variable_type])}", option=f"methods.{name}")
    return method


def choose_predictors(name: str, columns: Sequence[str], predictors: Mapping[str, Sequence[str]],
                      exclude: Mapping[str, Sequence[str]], passive_in: Mapping[str, Sequence[str]]) -> List[str]:
    """The predictors of one variable: those listed for it, else every other column (a passive
    variable never predicts its own inputs), less the excluded ones; exits 2 on unknown names.

    Parameters
    ----------
    name : str
        The variable.
    columns : sequence of str
        The imputation model's columns.
    predictors, exclude : mapping of str to sequence of str
        The predictors listed, and those excluded, per variable.
    passive_in : mapping of str to sequence of str
        Each passive variable's inputs.

    Returns
    -------
    list of str
    """
    if name in predictors:
        chosen = list(predictors[name])
        for p in chosen:
            if p not in columns:
                raise InputError(f"'{p}' is not a column of the imputation data{did_you_mean(p, columns)}",
                                 option=f"predictors.{name}")
    else:
        chosen = [c for c in columns if c != name and not (c in passive_in and name in passive_in[c])]
    for p in exclude.get(name, []):
        if p not in columns:
            raise InputError(f"'{p}' is not a column of the imputation data{did_you_mean(p, columns)}",
                             option=f"exclude_predictors.{name}")
    return [c for c in chosen if c != name and c not in exclude.get(name, [])]


def prepare(data: pd.DataFrame, types: Dict[str, str], methods: Dict[str, str], predictors: Dict[str, List[str]],
            exclude: Dict[str, List[str]], passive: Dict[str, str], mask: pd.DataFrame, iterations: int,
            donors: int, delta: Dict[str, Any], delta_by: Dict[str, str]) -> Problem:
    """Build the variables (values, codes, method, rows, predictors, design columns) and the visit order once.

    Parameters
    ----------
    data : one column per variable (numbers float, categories Categorical or text).
    types : {column: variable type} for every column.
    methods, predictors, exclude, passive : the engine's options, already checked by name.
    mask : True for the cells to impute.
    iterations, donors : copied into the problem for the chains.
    delta, delta_by : the sensitivity shifts (see :func:`delta_shifts`).

    Returns
    -------
    Problem
    """
    columns = list(data.columns)
    n = len(data)
    passive_in = {v: passive_inputs(f, columns, v) for v, f in passive.items()}
    for v, inputs in passive_in.items():
        for name in inputs:
            if types[name] not in NUMERIC_TYPES:
                raise InputError(f"'{name}' is {types[name]}; passive formulas take numbers", option=f"passive.{v}")
            if name in passive:
                raise InputError(f"'{name}' is itself passive; write the formula from "
                                 "measured variables", option=f"passive.{v}")

    # design layout: intercept, then one block per variable
    blocks: Dict[str, np.ndarray] = {}
    centers, scales, levels, used, fit_rows_all, codes = {}, {}, {}, {}, {}, {}
    index = row_indices(n)
    all_rows = np.arange(n, dtype=index)  # every complete variable shares this one array
    no_rows = np.zeros(0, dtype=index)
    originals: Dict[str, np.ndarray] = {}
    width = 1
    for name in columns:
        column = data[name]
        is_masked = mask[name].to_numpy(dtype=bool)
        observed = column.notna().to_numpy() & ~is_masked
        fit_rows_all[name] = all_rows if observed.all() else np.flatnonzero(observed).astype(index)
        if types[name] in CATEGORICAL_TYPES:
            lv = levels_of(column)
            position = {value: i for i, value in enumerate(lv)}
            code = np.full(n, -1, dtype=np.int64)
            obs_values = column[observed]
            code[observed] = obs_values.map(position).to_numpy(dtype=np.int64) if len(obs_values) else []
            present = np.unique(code[observed])
            levels[name] = lv
            used[name] = present
            internal = np.full(len(lv), -1, dtype=np.int64)
            internal[present] = np.arange(len(present))
            local = np.where(code >= 0, internal[np.maximum(code, 0)], -1)
            codes[name] = local.astype(np.int8 if len(lv) < 100 else np.int16 if len(lv) < 30_000 else np.int64)
            k = max(len(present) - 1, 0)
            blocks[name] = np.arange(width, width + k)
            width += k
            centers[name], scales[name] = 0.0, 1.0
        else:
            values = column.to_numpy(dtype=float, na_value=np.nan)[observed]
            if values.size >= 2 and np.std(values) > 0:
                centers[name], scales[name] = float(values.mean()), float(values.std())
            elif values.size >= 1:
                centers[name], scales[name] = float(values.mean()), 1.0
            else:
                centers[name], scales[name] = 0.0, 1.0
            levels[name], used[name] = (), np.array([], dtype=np.int64)
            blocks[name] = np.array([width])
            width += 1

    for name in columns:
        if types[name] not in CATEGORICAL_TYPES:
            values = data[name].to_numpy(dtype=float, na_value=np.nan)
            # Not-to-impute missing cells count as 0 on the original scale (see module docstring).
            # A complete column is used as it is (often the data's own memory; chains never write it).
            gaps = np.isnan(values)
            originals[name] = np.where(gaps, 0.0, values) if gaps.any() else values

    variables: Dict[str, Variable] = {}
    visit, passive_order = [], []
    for name in columns:
        is_masked = mask[name].to_numpy(dtype=bool)
        impute_rows = np.flatnonzero(is_masked).astype(index)
        fit_rows = fit_rows_all[name]
        if fit_rows is all_rows:
            other_rows = no_rows
        else:
            other_rows = np.setdiff1d(all_rows, fit_rows, assume_unique=True)
        method = choose_method(name, types[name], methods, passive)
        if len(impute_rows) == 0:
            method_used = "passive" if name in passive else ""
        else:
            method_used = method
            if method != "passive" and len(fit_rows) == 0:
                raise InputError(f"{name}: the column has no observed values, so it cannot be imputed; drop it from "
                                 "the imputation model or supply values")
        chosen = choose_predictors(name, columns, predictors, exclude, passive_in)
        pred_cols = np.concatenate([[0]] + [blocks[c] for c in chosen]).astype(np.int64)
        variables[name] = Variable(
            name=name, type=types[name], method=method_used, columns=blocks[name], center=centers[name],
            scale=scales[name], levels=levels[name], used_levels=used[name], fit_rows=fit_rows,
            impute_rows=impute_rows, other_rows=other_rows, predictor_columns=pred_cols, predictors=tuple(chosen),
            categorical=types[name] in CATEGORICAL_TYPES,
            passive_formula=passive.get(name, ""), passive_inputs=passive_in.get(name, ()))
        if len(impute_rows):
            (passive_order if method_used == "passive" else visit).append(name)
        if method_used not in ("", "passive") and types[name] in CATEGORICAL_TYPES and len(used[name]) < 1:
            raise InputError(f"{name}: the column has no observed values, so it cannot be imputed")

    shifts = delta_shifts(data, variables, delta, delta_by)
    return Problem(n_rows=n, width=width, codes=codes, variables=variables, visit_order=tuple(visit),
                   passive_order=tuple(passive_order), iterations=iterations, donors=donors, delta_rows=shifts,
                   originals=originals)


def delta_shifts(data: pd.DataFrame, variables: Dict[str, Variable], delta: Dict[str, Any],
                 delta_by: Dict[str, str]) -> Dict[str, Any]:
    """Per variable, the shift of each imputed value: a float, or (group column, {level position: shift}).

    Parameters
    ----------
    data : DataFrame
        The imputation frame.
    variables : dict of str to Variable
        The prepared variables.
    delta : dict
        {variable: shift, or {group level: shift}}.
    delta_by : dict of str to str
        {variable: group column} for the per-group shifts.

    Returns
    -------
    dict
    """
    out: Dict[str, Any] = {}
    for name, shift in delta.items():
        variable = variables[name]
        if variable.method not in DELTA_METHODS:
            raise InputError(f"delta adjustment applies to variables imputed by pmm, normal or logistic; '{name}' is "
                             f"imputed by '{variable.method or 'nothing (it is complete)'}'", option=f"delta.{name}")
        scale = 1.0 if variable.categorical else variable.scale
        by = delta_by.get(name)
        if not isinstance(shift, Mapping):
            if by is not None:
                raise InputError(f"with a grouping column ({by}) give one delta per group", option=f"delta.{name}")
            out[name] = float(shift) / scale
            continue
        if by is None:
            raise InputError(f"deltas by group need delta_by.{name} (the grouping column)", option=f"delta.{name}")
        if by not in variables:
            raise InputError(f"grouping column '{by}' is not a column of the imputation data"
                             f"{did_you_mean(by, list(variables))}", option=f"delta.{name}")
        group = variables[by]
        if group.categorical:
            names = [str(x) for x in group.levels]
            lookup = np.zeros(len(group.levels) + 1)
            for key, value in shift.items():
                if str(key) not in names:
                    raise InputError(f"'{key}' is not a level of '{by}' "
                                     f"({', '.join(names)}){did_you_mean(str(key), names)}", option=f"delta.{name}")
                lookup[names.index(str(key))] = float(value) / scale
            out[name] = ("categorical", by, lookup)
        else:
            keys = {float(k): float(v) / scale for k, v in shift.items()}
            out[name] = ("numeric", by, keys)
    return out
