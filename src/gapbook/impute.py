"""Multiple imputation by chained equations (fully conditional specification), our own engine.

Each of the m chains starts from random draws of each variable's observed values, then
visits the incomplete variables in a fixed order, ``iterations`` times. A visit fits the
variable's conditional model to the rows where it is observed, draws the model's
parameters from their (approximate) posterior and draws new values for the cells to
impute. The final state of chain i is completed dataset i.

How it stays fast (the design goals of the engine):
- every variable is coded once into one float design matrix (numbers standardised,
  categories dummy-coded); a visit changes that matrix in place, on the imputed rows of
  one variable's columns only;
- the cross-product matrix of the whole design is kept up to date column by column, so a
  linear model's normal equations over the observed rows are that matrix minus the
  cross-products of the (few) rows where the variable is not observed;
- predictive mean matching finds donors by binary search in the sorted predictions;
- logistic, multinomial and ordinal models are fitted by Newton steps warm-started from
  the previous visit, over row blocks of bounded size;
- chains run in parallel (joblib), each with its own child of one ``SeedSequence``, so the
  completed data do not depend on the number of workers.

Cells that are missing but not to be imputed (``impute_mask`` False, e.g. "not
applicable") stay missing in the completed data. Where such a variable is a predictor,
its value counts as 0 in those rows (numbers) or as the reference category (categories);
include the variable that defines applicability (e.g. on_insulin for insulin dose) among
the predictors so the model can tell those rows apart. A row whose value is not
applicable is never used to fit that variable's own model.
"""
from __future__ import annotations

import ast
import math
from dataclasses import dataclass, field
from typing import Any, Dict, Iterator, List, Mapping, Optional, Sequence, Tuple

import numpy as np
import pandas as pd
from scipy import linalg
from scipy.special import expit

from .errors import AnalysisError, InputError, did_you_mean
from .models import fit_model
from .pool import PooledResult, pool_fits

VARIABLE_TYPES = ("continuous", "binary", "nominal", "ordinal", "count")
METHODS = ("pmm", "normal", "logistic", "multinomial", "ordinal", "passive")
DEFAULT_METHOD = {"continuous": "pmm", "count": "pmm", "binary": "logistic", "nominal": "multinomial",
                  "ordinal": "ordinal"}
ALLOWED_METHODS = {"continuous": ("pmm", "normal", "passive"), "count": ("pmm", "passive"),
                   "binary": ("logistic",), "nominal": ("multinomial",), "ordinal": ("ordinal", "multinomial")}
CATEGORICAL = ("binary", "nominal", "ordinal")
DELTA_METHODS = ("pmm", "normal", "logistic")
CHUNK_ROWS = 1 << 15          # rows per block when gathering rows of the design matrix
NEWTON_MAX_STEPS = 30
NEWTON_SD_FRACTION = 0.02     # stop when every Newton step is below this fraction of its posterior SD
ONE_STEP_SAFETY = 2.0         # margin on the predicted error left after a Newton step (see _newton)
WARMUP_ROWS = 50_000          # a cold start first converges on an evenly spaced subset of this many rows
NEWTON_TOLERANCE = 1e-6        # on the standardised scale; far below any posterior SD
PASSIVE_FUNCTIONS = {"log": np.log, "exp": np.exp, "sqrt": np.sqrt, "abs": np.abs, "log10": np.log10,
                     "log2": np.log2, "minimum": np.minimum, "maximum": np.maximum, "np": np}


# ---------------------------------------------------------------------------
# the prepared problem (built once, shared read-only by every chain)

@dataclass(frozen=True)
class _Variable:
    """One column as the engine sees it."""

    name: str
    type: str
    method: str                      # "" for a complete variable that is only a predictor
    columns: np.ndarray              # its columns in the design matrix
    center: float                    # numbers: observed mean (design holds (x - center) / scale)
    scale: float
    levels: Tuple[Any, ...]          # categories as stored in the data (categorical types)
    used_levels: np.ndarray          # positions (in levels) of the observed levels; the first is the reference
    fit_rows: np.ndarray             # rows where observed (its own model is fitted here)
    impute_rows: np.ndarray          # rows to impute
    other_rows: np.ndarray           # rows not observed: impute_rows and not-to-impute missing rows, sorted
    predictor_columns: np.ndarray    # design columns of its predictors, intercept first
    predictors: Tuple[str, ...]
    passive_formula: str = ""
    passive_inputs: Tuple[str, ...] = ()

    @property
    def categorical(self) -> bool:
        return self.type in CATEGORICAL


@dataclass(frozen=True)
class _Problem:
    """Everything a chain needs: the starting design, the variables, visit order and options."""

    design: np.ndarray               # (n, P) Fortran order; column 0 is the intercept
    codes: Dict[str, np.ndarray]     # categorical: index into used_levels per row (-1 where not observed)
    variables: Dict[str, _Variable]
    visit_order: Tuple[str, ...]     # incomplete, non-passive variables
    passive_order: Tuple[str, ...]
    iterations: int
    donors: int
    delta_rows: Dict[str, Any]       # variable -> shift per imputed row (array), scalar, or (group, lookup)
    originals: Dict[str, np.ndarray]  # numbers on their own scale (donor values are copied from here, exactly)


# ---------------------------------------------------------------------------
# checks and type inference

def infer_type(column: pd.Series) -> str:
    """Variable type from the dtype: ordered Categorical -> ordinal, Categorical/text -> binary or nominal
    by number of levels, bool or 0/1 numbers -> binary, integers -> count, other numbers -> continuous."""
    dtype = column.dtype
    if isinstance(dtype, pd.CategoricalDtype):
        if dtype.ordered:
            return "ordinal"
        return "binary" if len(dtype.categories) <= 2 else "nominal"
    if pd.api.types.is_bool_dtype(dtype):
        return "binary"
    if not pd.api.types.is_numeric_dtype(dtype):
        return "binary" if column.dropna().nunique() <= 2 else "nominal"
    observed = column.dropna()
    if len(observed) and observed.isin([0, 1]).all() and observed.nunique() == 2:
        return "binary"
    if pd.api.types.is_integer_dtype(dtype):
        return "count"
    return "continuous"


def _levels_of(column: pd.Series) -> Tuple[Any, ...]:
    if isinstance(column.dtype, pd.CategoricalDtype):
        return tuple(column.cat.categories)
    values = column.dropna().unique()
    try:
        return tuple(sorted(values))
    except TypeError:
        return tuple(sorted(values, key=str))


def _check_names(mapping: Optional[Mapping[str, Any]], columns: Sequence[str], key: str) -> Dict[str, Any]:
    mapping = dict(mapping or {})
    for name in mapping:
        if name not in columns:
            raise InputError(f"{key}.{name}: '{name}' is not a column of the imputation data"
                             f"{did_you_mean(name, columns)}")
    return mapping


def passive_inputs(formula: str, columns: Sequence[str], variable: str) -> Tuple[str, ...]:
    """The columns a passive formula uses; exits 2 when it cannot be parsed or names an unknown column."""
    try:
        tree = ast.parse(formula, mode="eval")
    except SyntaxError:
        raise InputError(f"imputation.passive.{variable}: '{formula}' is not a valid formula; write it like "
                         "'weight_kg / (height_cm / 100) ** 2'") from None
    names = [node.id for node in ast.walk(tree) if isinstance(node, ast.Name)]
    inputs = []
    for name in names:
        if name in PASSIVE_FUNCTIONS:
            continue
        if name not in columns:
            raise InputError(f"imputation.passive.{variable}: '{name}' is not a column of the imputation data"
                             f"{did_you_mean(name, columns)}")
        if name == variable:
            raise InputError(f"imputation.passive.{variable}: the formula uses '{variable}' itself")
        if name not in inputs:
            inputs.append(name)
    if not inputs:
        raise InputError(f"imputation.passive.{variable}: '{formula}' uses no column")
    return tuple(inputs)


def _evaluate_passive(formula: str, values: Dict[str, np.ndarray]) -> np.ndarray:
    namespace = dict(PASSIVE_FUNCTIONS)
    namespace.update(values)
    with np.errstate(all="ignore"):
        return np.asarray(eval(compile(formula, "<passive>", "eval"), {"__builtins__": {}}, namespace), dtype=float)


# ---------------------------------------------------------------------------
# building the problem

def _prepare(data: pd.DataFrame, types: Dict[str, str], methods: Dict[str, str], predictors: Dict[str, List[str]],
             exclude: Dict[str, List[str]], passive: Dict[str, str], mask: pd.DataFrame, iterations: int,
             donors: int, delta: Dict[str, Any], delta_by: Dict[str, str]) -> _Problem:
    columns = list(data.columns)
    n = len(data)
    passive_in = {v: passive_inputs(f, columns, v) for v, f in passive.items()}
    for v, inputs in passive_in.items():
        for name in inputs:
            if types[name] not in ("continuous", "count"):
                raise InputError(f"imputation.passive.{v}: '{name}' is {types[name]}; passive formulas take numbers")
            if name in passive:
                raise InputError(f"imputation.passive.{v}: '{name}' is itself passive; write the formula from "
                                 "measured variables")

    # design layout: intercept, then one block per variable
    blocks: Dict[str, np.ndarray] = {}
    centers, scales, levels, used, fit_rows_all, codes = {}, {}, {}, {}, {}, {}
    originals: Dict[str, np.ndarray] = {}
    width = 1
    for name in columns:
        column = data[name]
        is_masked = mask[name].to_numpy(dtype=bool)
        observed = column.notna().to_numpy() & ~is_masked
        fit_rows_all[name] = np.flatnonzero(observed)
        if types[name] in CATEGORICAL:
            lv = _levels_of(column)
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
            codes[name] = local
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

    design = np.zeros((n, width), order="F")
    design[:, 0] = 1.0
    for name in columns:
        fit_rows = fit_rows_all[name]
        cols = blocks[name]
        if types[name] in CATEGORICAL:
            local = codes[name]
            for j, col in enumerate(cols):
                design[:, col] = (local == j + 1)
        else:
            values = data[name].to_numpy(dtype=float, na_value=np.nan)
            # Not-to-impute missing cells count as 0 on the original scale (see module docstring).
            filled = np.where(np.isnan(values), 0.0, values)
            design[:, cols[0]] = (filled - centers[name]) / scales[name]
            originals[name] = filled

    variables: Dict[str, _Variable] = {}
    visit, passive_order = [], []
    for name in columns:
        is_masked = mask[name].to_numpy(dtype=bool)
        impute_rows = np.flatnonzero(is_masked)
        fit_rows = fit_rows_all[name]
        other_rows = np.setdiff1d(np.arange(n), fit_rows, assume_unique=True)
        method = methods.get(name, "passive" if name in passive else DEFAULT_METHOD[types[name]])
        if name in passive and method != "passive":
            raise InputError(f"imputation.methods.{name}: '{method}' given but imputation.passive.{name} is a formula; "
                             "use one or the other")
        if method == "passive" and name not in passive:
            raise InputError(f"imputation.methods.{name}: 'passive' needs a formula in imputation.passive.{name}")
        if method not in ALLOWED_METHODS[types[name]]:
            raise InputError(f"imputation.methods.{name}: '{method}' does not suit a {types[name]} variable; use "
                             f"{' or '.join(ALLOWED_METHODS[types[name]])}")
        if len(impute_rows) == 0:
            method_used = "passive" if name in passive else ""
        else:
            method_used = method
            if method != "passive" and len(fit_rows) == 0:
                raise InputError(f"{name}: the column has no observed values, so it cannot be imputed; drop it from "
                                 "the imputation model or supply values")
        # predictors: every other variable unless listed; a passive variable never predicts its own inputs
        if name in predictors:
            chosen = list(predictors[name])
            for p in chosen:
                if p not in columns:
                    raise InputError(f"imputation.predictors.{name}: '{p}' is not a column of the imputation data"
                                     f"{did_you_mean(p, columns)}")
        else:
            chosen = [c for c in columns if c != name]
            chosen = [c for c in chosen if not (c in passive_in and name in passive_in[c])]
        for p in exclude.get(name, []):
            if p not in columns:
                raise InputError(f"imputation.exclude_predictors.{name}: '{p}' is not a column of the imputation data"
                                 f"{did_you_mean(p, columns)}")
        chosen = [c for c in chosen if c != name and c not in exclude.get(name, [])]
        pred_cols = np.concatenate([[0]] + [blocks[c] for c in chosen]).astype(np.int64)
        variables[name] = _Variable(
            name=name, type=types[name], method=method_used, columns=blocks[name], center=centers[name],
            scale=scales[name], levels=levels[name], used_levels=used[name], fit_rows=fit_rows,
            impute_rows=impute_rows, other_rows=other_rows, predictor_columns=pred_cols, predictors=tuple(chosen),
            passive_formula=passive.get(name, ""), passive_inputs=passive_in.get(name, ()))
        if len(impute_rows):
            (passive_order if method_used == "passive" else visit).append(name)
        if method_used not in ("", "passive") and types[name] in CATEGORICAL and len(used[name]) < 1:
            raise InputError(f"{name}: the column has no observed values, so it cannot be imputed")

    delta_rows = _delta_rows(data, variables, delta, delta_by)
    return _Problem(design=design, codes=codes, variables=variables, visit_order=tuple(visit),
                    passive_order=tuple(passive_order), iterations=iterations, donors=donors, delta_rows=delta_rows,
                    originals=originals)


def _delta_rows(data: pd.DataFrame, variables: Dict[str, _Variable], delta: Dict[str, Any],
                delta_by: Dict[str, str]) -> Dict[str, Any]:
    """Per variable, the shift of each imputed value: a float, or (group column, {level position: shift})."""
    out: Dict[str, Any] = {}
    for name, shift in delta.items():
        variable = variables[name]
        if variable.method not in DELTA_METHODS:
            raise InputError(f"sensitivity.delta.{name}: delta adjustment applies to variables imputed by pmm, normal "
                             f"or logistic; '{name}' is imputed by '{variable.method or 'nothing (it is complete)'}'")
        scale = 1.0 if variable.categorical else variable.scale
        by = delta_by.get(name)
        if not isinstance(shift, Mapping):
            if by is not None:
                raise InputError(f"sensitivity.delta.{name}: with a grouping column ({by}) give one delta per group")
            out[name] = float(shift) / scale
            continue
        if by is None:
            raise InputError(f"sensitivity.delta.{name}: deltas by group need delta_by.{name} (the grouping column)")
        if by not in variables:
            raise InputError(f"sensitivity.delta.{name}: grouping column '{by}' is not a column of the imputation data"
                             f"{did_you_mean(by, list(variables))}")
        group = variables[by]
        if group.categorical:
            names = [str(x) for x in group.levels]
            lookup = np.zeros(len(group.levels) + 1)
            for key, value in shift.items():
                if str(key) not in names:
                    raise InputError(f"sensitivity.delta.{name}: '{key}' is not a level of '{by}' "
                                     f"({', '.join(names)}){did_you_mean(str(key), names)}")
                lookup[names.index(str(key))] = float(value) / scale
            out[name] = ("categorical", by, lookup)
        else:
            keys = {float(k): float(v) / scale for k, v in shift.items()}
            out[name] = ("numeric", by, keys)
    return out


# ---------------------------------------------------------------------------
# numeric kernels

def _gather(design: np.ndarray, rows: np.ndarray, columns: Optional[np.ndarray] = None) -> np.ndarray:
    """design[rows][:, columns] as a Fortran-order copy, one ``np.take`` per column.

    The design is column-major, so taking rows column by column reads each column in
    order; with mode "clip" (the rows are always valid) ``np.take`` writes straight into
    ``out`` instead of through a buffer: together about 3.5 times faster than
    two-dimensional fancy indexing."""
    if columns is None:
        columns = np.arange(design.shape[1])
    out = np.empty((len(rows), len(columns)), order="F")
    for j, column in enumerate(columns):
        np.take(design[:, column], rows, out=out[:, j], mode="clip")
    return out


def _gram_rows(design: np.ndarray, rows: np.ndarray) -> np.ndarray:
    """X[rows]' X[rows], gathered in blocks so no full copy of the design is made."""
    width = design.shape[1]
    out = np.zeros((width, width))
    for start in range(0, len(rows), CHUNK_ROWS):
        block = _gather(design, rows[start:start + CHUNK_ROWS])
        out += block.T @ block
    return out


def _predict_rows(design: np.ndarray, rows: np.ndarray, columns: np.ndarray, coef: np.ndarray) -> np.ndarray:
    """X[rows, columns] @ coef, in row blocks."""
    coef = np.asarray(coef)
    out = np.empty((len(rows),) + coef.shape[1:])
    for start in range(0, len(rows), CHUNK_ROWS):
        out[start:start + CHUNK_ROWS] = _gather(design, rows[start:start + CHUNK_ROWS], columns) @ coef
    return out


def _cholesky(matrix: np.ndarray) -> np.ndarray:
    """Lower Cholesky factor, with a growing ridge if the matrix is numerically singular."""
    size = matrix.shape[0]
    ridge = 1e-9 * max(float(np.mean(np.abs(np.diag(matrix)))), 1e-12)
    for _ in range(12):
        try:
            return np.linalg.cholesky(matrix + ridge * np.eye(size))
        except np.linalg.LinAlgError:
            ridge *= 100
    raise AnalysisError("an imputation model could not be fitted (its predictors are collinear); "
                        "exclude redundant predictors in imputation.exclude_predictors")


def _linear_draw(gram_observed: np.ndarray, y_column: int, predictor_columns: np.ndarray, n_fit: int,
                 rng: np.random.Generator) -> Tuple[np.ndarray, np.ndarray, float]:
    """Least squares and one draw of (beta, sigma) from the posterior of a Bayesian linear regression
    with the usual noninformative prior.

    References
    ----------
    Rubin DB (1987). Multiple Imputation for Nonresponse in Surveys. Wiley, pp. 166-168.
    """
    xtx = gram_observed[np.ix_(predictor_columns, predictor_columns)]
    xty = gram_observed[predictor_columns, y_column]
    yty = gram_observed[y_column, y_column]
    lower = _cholesky(xtx)
    beta_hat = linalg.cho_solve((lower, True), xty)
    residual_ss = max(float(yty - 2 * beta_hat @ xty + beta_hat @ xtx @ beta_hat), 1e-12 * max(float(yty), 1.0))
    df = max(n_fit - len(predictor_columns), 1)
    sigma = math.sqrt(residual_ss / rng.chisquare(df))
    z = rng.standard_normal(len(predictor_columns))
    beta_draw = beta_hat + sigma * linalg.solve_triangular(lower.T, z, lower=False)
    return beta_hat, beta_draw, sigma


def _stable_argsort(values: np.ndarray) -> np.ndarray:
    """``np.argsort(values, kind="stable")`` for finite floats, about a third faster on a million values.

    Each value's bits are mapped to an unsigned integer with the same order, the lowest
    bits are replaced by the row's position, and the integers are sorted (a plain sort of
    integers is faster than an argsort of floats); the positions are read back from the
    low bits. Values whose kept high bits collide (equal to about 1e-10 relative, a few
    pairs in a million) are put in exact order, ties by position, so the result is the
    stable argsort's, bit for bit."""
    n = len(values)
    shift = max(int(n - 1).bit_length(), 1)
    if n < 2 or shift > 40 or not np.all(np.isfinite(values)):
        return np.argsort(values, kind="stable")
    bits = (values + 0.0).view(np.int64)                 # + 0.0 turns -0.0 into 0.0, which compare equal
    # negative floats: flip every bit; non-negative: flip the sign bit -> unsigned order = float order
    keys = (bits ^ ((bits >> 63) | np.int64(-(1 << 63)))).view(np.uint64)
    keys >>= np.uint64(shift)
    keys <<= np.uint64(shift)
    keys |= np.arange(n, dtype=np.uint64)
    keys.sort()
    order = (keys & np.uint64((1 << shift) - 1)).astype(np.intp)
    keys >>= np.uint64(shift)
    same = keys[1:] == keys[:-1]
    if same.any():
        in_run = np.zeros(n, dtype=bool)
        in_run[1:] = same
        in_run[:-1] |= same
        positions = np.flatnonzero(in_run)
        run = np.cumsum(np.concatenate([[True], ~same[positions[1:] - 1]]))
        rows = order[positions]
        order[positions] = rows[np.lexsort((rows, values[rows], run))]
    return order


def _sorted_order(values: np.ndarray) -> Tuple[np.ndarray, np.ndarray]:
    """``np.argsort(values, kind="stable")`` and the sorted values."""
    order = _stable_argsort(values)
    return order, values[order]


def _pmm_match(predicted_observed: np.ndarray, predicted_missing: np.ndarray, donors: int,
               rng: np.random.Generator, order: Optional[Tuple[np.ndarray, np.ndarray]] = None) -> np.ndarray:
    """For each missing row, the position (in the observed rows) of a donor drawn from its k nearest
    observed predictions (type-1 matching: observed predictions use beta_hat, missing ones the draw).

    References
    ----------
    Little RJA (1988). Missing-data adjustments in large surveys. J Bus Econ Stat 6:287-296.
    van Buuren S (2018). Flexible Imputation of Missing Data, 2nd ed. CRC Press, sec. 3.4.
    """
    n_obs = len(predicted_observed)
    k = min(donors, n_obs)
    order, sorted_values = _sorted_order(predicted_observed) if order is None else order
    width = min(2 * k, n_obs)
    # binary search with the queries in increasing order (each search starts near the last
    # one, so it stays in cache: about twice as fast); the positions do not depend on it
    query_order = _stable_argsort(predicted_missing)
    position = np.empty(len(predicted_missing), dtype=np.intp)
    position[query_order] = np.searchsorted(sorted_values, predicted_missing[query_order])
    start = np.clip(position - k, 0, n_obs - width)
    window = start[:, None] + np.arange(width)[None, :]
    distance = np.abs(sorted_values[window] - predicted_missing[:, None])
    if width > k:
        nearest = np.argpartition(distance, k - 1, axis=1)[:, :k]
        # argpartition leaves ties in an arbitrary but deterministic order; sort for a stable donor set
        nearest = np.sort(nearest, axis=1)
    else:
        nearest = np.broadcast_to(np.arange(width), (len(predicted_missing), width))
    pick = rng.integers(0, k, size=len(predicted_missing))
    chosen = window[np.arange(len(predicted_missing)), nearest[np.arange(len(predicted_missing)), pick]]
    return order[chosen]


def _augmentation(gram_observed: np.ndarray, predictor_columns: np.ndarray, n_fit: int,
                  n_classes: int) -> Tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Pseudo-records that keep logistic-type fits finite under perfect prediction.

    For each predictor, two records at its mean plus and minus one SD (others at their
    means), one per outcome category, with total weight (p + 1) spread evenly. Means and
    SDs are those of the current completed data (all rows), read off the kept
    cross-product matrix, so no extra pass over the rows is needed.

    References
    ----------
    White IR, Daniel R, Royston P (2010). Avoiding bias due to perfect prediction in
    multiple imputation of incomplete categorical variables. Comput Stat Data Anal
    54:2267-2275. (Weighting as we recall it from that paper.)
    """
    cols = predictor_columns
    means = gram_observed[0, cols] / max(n_fit, 1)
    second = np.diag(gram_observed)[cols] / max(n_fit, 1)
    sds = np.sqrt(np.maximum(second - means ** 2, 0.0))
    varying = [i for i in range(1, len(cols)) if sds[i] > 0]
    p = len(varying)
    if p == 0:
        return np.zeros((0, len(cols))), np.zeros(0, dtype=np.int64), np.zeros(0)
    rows = []
    for i in varying:
        for sign in (-1.0, 1.0):
            point = means.copy()
            point[0] = 1.0
            point[i] += sign * sds[i]
            rows.append(point)
    points = np.array(rows)
    records = np.repeat(points, n_classes, axis=0)
    outcome = np.tile(np.arange(n_classes), len(points))
    weights = np.full(len(records), (p + 1) / (2 * p * n_classes))
    return records, outcome, weights


def _low(x: np.ndarray, x_low: Optional[np.ndarray]) -> np.ndarray:
    return x.astype(np.float32) if x_low is None else x_low


def _weighted_cross(x_low: np.ndarray, weight: np.ndarray) -> np.ndarray:
    """x' diag(weight) x for weight >= 0, as float64, computed in float32.

    Only the information matrix is computed this way (about 3 times faster): it sets the
    Newton path and the spread of the parameter draw, where a relative error near 1e-7 is
    far below anything that matters; the log-likelihood and the gradient, which fix the
    estimate, stay in float64.
    """
    scaled = x_low * np.sqrt(np.maximum(weight, 0.0)).astype(np.float32)[:, None]
    return (scaled.T @ scaled).astype(float)      # same operand twice: a symmetric rank-k update


def _multinomial_terms(x: np.ndarray, y: np.ndarray, w: Optional[np.ndarray], beta: np.ndarray, n_classes: int,
                       x_low: Optional[np.ndarray] = None):
    """Log-likelihood, gradient and information of a baseline-category logit on one block of rows
    (``w``: row weights, None for the data rows, which all weigh 1; ``x_low``: the same block in
    float32, for the information matrix)."""
    q = x.shape[1]
    x_low = _low(x, x_low)
    k1 = n_classes - 1
    if n_classes == 2:
        eta = x @ beta
        prob = expit(eta)
        terms = np.where(y == 1, eta, 0.0)
        terms -= np.logaddexp(0.0, eta)
        resid = (y == 1) - prob
        weight = prob * (1 - prob)
        if w is not None:
            terms *= w
            resid *= w
            weight *= w
        return float(np.sum(terms)), x.T @ resid, _weighted_cross(x_low, weight)
    eta = x @ beta.reshape(k1, q).T                       # (rows, k1)
    top = np.maximum(eta.max(axis=1), 0.0)
    expo = np.exp(eta - top[:, None])
    denom = np.exp(-top)
    denom += expo.sum(axis=1)
    log_denom = np.log(denom)
    prob = expo
    prob /= denom[:, None]                                 # categories 1..K-1
    # log P(y) = eta_y - log(1 + sum_k exp(eta_k)), with eta_0 = 0
    chosen = np.take_along_axis(eta, np.maximum(y - 1, 0)[:, None], axis=1)[:, 0]
    terms = np.where(y == 0, 0.0, chosen)
    terms -= top
    terms -= log_denom
    resid = -prob
    resid[np.arange(len(y)), np.maximum(y - 1, 0)] += (y > 0)
    if w is not None:
        terms *= w
        resid *= w[:, None]
    grad = (x.T @ resid).T.ravel()
    info = np.zeros((k1 * q, k1 * q))
    for a in range(k1):
        for b in range(a, k1):
            weight = prob[:, a] * ((a == b) - prob[:, b])
            if w is not None:
                weight *= w
            if a == b:
                block = _weighted_cross(x_low, weight)
            else:
                block = (x_low.T @ (x_low * weight.astype(np.float32)[:, None])).astype(float)
            info[a * q:(a + 1) * q, b * q:(b + 1) * q] = block
            if a != b:
                info[b * q:(b + 1) * q, a * q:(a + 1) * q] = block
    return float(np.sum(terms)), grad, info


def _ordinal_terms(x: np.ndarray, y: np.ndarray, w: Optional[np.ndarray], params: np.ndarray, n_classes: int,
                   x_low: Optional[np.ndarray] = None):
    """Log-likelihood, gradient and information of a proportional-odds model on one block of rows
    (``w``: row weights, None for the data rows, which all weigh 1; ``x_low``: the same block in
    float32, for the slopes' information block).

    Parameters are (theta_0..theta_{K-2}, b): P(Y <= k | x) = expit(theta_k - x'b), with x
    excluding the intercept. Sums over the rows of one category use ``np.bincount``.

    References
    ----------
    McCullagh P (1980). Regression models for ordinal data. J R Stat Soc B 42:109-142.
    """
    k1 = n_classes - 1
    theta, b = params[:k1], params[k1:]
    eta = x @ b
    cut = np.concatenate([[-np.inf], theta, [np.inf]])
    f_up = expit(np.take(cut, y + 1) - eta)
    f_lo = expit(np.take(cut, y) - eta)
    d_up, d_lo = f_up * (1 - f_up), f_lo * (1 - f_lo)
    prob = np.maximum(f_up - f_lo, 1e-300)
    inverse = 1.0 / prob
    g_up = d_up * inverse
    g_lo = -d_lo * inverse
    # second derivatives of log P in 'upper' and 'lower' (d expit' = expit' (1 - 2 expit))
    h_uu = d_up * (1 - 2 * f_up) * inverse - g_up ** 2
    h_ll = -d_lo * (1 - 2 * f_lo) * inverse - g_lo ** 2
    h_ul = -g_up * g_lo
    log_prob = np.log(prob)
    if w is not None:
        log_prob *= w
        for term in (g_up, g_lo, h_uu, h_ll, h_ul):
            term *= w
    size = k1 + len(b)
    grad = np.zeros(size)
    hess = np.zeros((size, size))

    def by_category(values):              # sum over rows of each category 0..K-1
        return np.bincount(y, weights=values, minlength=n_classes)

    # theta_k enters 'upper' for rows in category k and 'lower' for rows in category k + 1
    grad[:k1] = by_category(g_up)[:k1] + by_category(g_lo)[1:]
    grad[k1:] = -(x.T @ (g_up + g_lo))
    hess[np.arange(k1), np.arange(k1)] = by_category(h_uu)[:k1] + by_category(h_ll)[1:]
    if k1 > 1:
        off = by_category(h_ul)[1:k1]      # rows in category k use theta_k and theta_{k-1}
        hess[np.arange(1, k1), np.arange(k1 - 1)] = off
        hess[np.arange(k1 - 1), np.arange(1, k1)] = off
    # d2/dtheta_k db: rows in category k (upper) and k + 1 (lower), each times -x
    up_part, lo_part = h_uu + h_ul, h_ul + h_ll
    rows = np.arange(len(y))
    weights_k = np.zeros((len(y), k1))
    in_upper = y < k1
    weights_k[rows[in_upper], y[in_upper]] = up_part[in_upper]
    in_lower = y > 0
    weights_k[rows[in_lower], y[in_lower] - 1] += lo_part[in_lower]
    cross = -(x.T @ weights_k)
    hess[k1:, :k1] = cross
    hess[:k1, k1:] = cross.T
    # the log-likelihood is concave in eta, so minus this weight is >= 0 (up to rounding)
    hess[k1:, k1:] = -_weighted_cross(_low(x, x_low), -(h_uu + 2 * h_ul + h_ll))
    return float(np.sum(log_prob)), grad, -hess


def _newton(terms, design: np.ndarray, rows: np.ndarray, y: np.ndarray, columns: np.ndarray,
            augment: Tuple[np.ndarray, np.ndarray, np.ndarray], start: Optional[np.ndarray], n_classes: int,
            ordered: bool) -> Tuple[np.ndarray, np.ndarray]:
    """Maximise a concave log-likelihood by Newton steps with step halving; returns (estimate, information).

    ``start`` None means a cold start: with many rows, the fit first converges on an evenly
    spaced subset of rows, so the passes over all rows start near the optimum.
    """
    if start is None:
        start = _cold_start(n_classes, len(columns), y, ordered)
        if len(rows) > 4 * WARMUP_ROWS:
            every = len(rows) // WARMUP_ROWS
            start, _ = _newton(terms, design, rows[::every], y[::every], columns, augment, start, n_classes, ordered)
    aug_x, aug_y, aug_w = augment
    if ordered:
        aug_x = aug_x[:, 1:]
    # Each pass gathers its row blocks afresh rather than keeping them for a later pass: a
    # warm visit usually makes one pass, and a kept copy of the fitted rows (about 280 MB at
    # 850,000 rows) cost memory and fresh pages on every visit for nothing.

    def evaluate(params):
        loglik, grad, info = terms(aug_x, aug_y, aug_w, params, n_classes)
        for begin in range(0, len(rows), CHUNK_ROWS):
            block = _gather(design, rows[begin:begin + CHUNK_ROWS], columns)
            part = terms(block, y[begin:begin + CHUNK_ROWS], None, params, n_classes, block.astype(np.float32))
            loglik += part[0]
            grad = grad + part[1]
            info = info + part[2]
        return loglik, grad, info

    params = start.copy()
    loglik, grad, info = evaluate(params)
    for _ in range(NEWTON_MAX_STEPS):
        lower = _cholesky(info)
        step = linalg.cho_solve((lower, True), grad)
        biggest = float(np.max(np.abs(step))) if step.size else 0.0
        # Stop when the step is tiny against the posterior SD: what remains after it (quadratic
        # convergence) cannot matter for a draw from N(estimate, information^-1). Warm-started
        # visits usually stop here after one pass over the rows.
        posterior_sd = np.sqrt(np.diag(linalg.cho_solve((lower, True), np.eye(len(step)))))
        ratio = float(np.max(np.abs(step) / posterior_sd))
        # Newton converges quadratically: a step of r posterior SDs leaves an error of about
        # c r^2 / sqrt(n) SDs (the third derivative over the information is O(1) per row on
        # the standardised scale; c was 0.1-0.6 for every model of benchmarks/impute.py).
        # When even twice that is under NEWTON_SD_FRACTION, take the step and stop rather
        # than spend a pass over the rows to confirm it: a warm-started visit (steps of
        # about 1-2 SDs once the chain has mixed) then costs one pass instead of two.
        remainder = ONE_STEP_SAFETY * ratio ** 2 / math.sqrt(max(len(rows), 1))
        if biggest < NEWTON_TOLERANCE or ratio < NEWTON_SD_FRACTION or remainder < NEWTON_SD_FRACTION:
            params = params + step
            break
        if biggest > 5.0:                      # keep a wild first step from overshooting
            step *= 5.0 / biggest
        for _halving in range(30):
            trial = params + step
            if ordered and np.any(np.diff(trial[:n_classes - 1]) <= 0):
                step = step / 2
                continue
            new = evaluate(trial)
            if new[0] >= loglik - 1e-10 * abs(loglik):
                break
            step = step / 2
        else:
            break
        params, (loglik, grad, info) = trial, new
    return params, info


def _cold_start(n_classes: int, n_columns: int, y: np.ndarray, ordered: bool) -> np.ndarray:
    """Zero slopes; for the ordinal model, cut points at the logits of the cumulative shares."""
    if not ordered:
        return np.zeros((n_classes - 1) * n_columns)
    shares = np.bincount(y, minlength=n_classes).cumsum()[:-1] / max(len(y), 1)
    shares = np.clip(shares, 1e-3, 1 - 1e-3)
    theta = np.log(shares / (1 - shares)) + np.arange(n_classes - 1) * 1e-6   # strictly increasing
    return np.concatenate([theta, np.zeros(n_columns)])


# ---------------------------------------------------------------------------
# one chain

class _Chain:
    """The state of one chain: its own copy of the design, current category codes and warm starts."""

    def __init__(self, problem: _Problem, rng: np.random.Generator):
        self.problem = problem
        self.rng = rng
        self.design = np.array(problem.design, order="F", copy=True)
        self.codes = {name: np.array(code, copy=True) for name, code in problem.codes.items()}
        self.originals = {name: np.array(values, copy=True) for name, values in problem.originals.items()}
        self.warm: Dict[str, np.ndarray] = {}
        self.gram = np.zeros((0, 0))
        self.dependents: Dict[str, List[str]] = {name: [] for name in problem.variables}
        for name in problem.passive_order:
            for source in problem.variables[name].passive_inputs:
                self.dependents[source].append(name)

    # -- writing values into the design
    def _set_numeric(self, variable: _Variable, standardised: np.ndarray,
                     original: Optional[np.ndarray] = None) -> None:
        """Write imputed numbers; ``original`` (own scale) is given where exact values exist, so a pmm donor's
        value is copied as observed rather than recovered from the standardised design with round-off."""
        self.design[variable.impute_rows, variable.columns[0]] = standardised
        self.originals[variable.name][variable.impute_rows] = (
            standardised * variable.scale + variable.center if original is None else original)

    def _set_codes(self, variable: _Variable, local: np.ndarray) -> None:
        rows = variable.impute_rows
        self.codes[variable.name][rows] = local
        for j, col in enumerate(variable.columns):
            self.design[rows, col] = (local == j + 1)

    def _refresh_gram(self, variable: _Variable) -> None:
        cols = variable.columns
        if len(cols) == 0:
            return
        block = self.design.T @ self.design[:, cols]
        self.gram[:, cols] = block
        self.gram[cols, :] = block.T

    def original_values(self, name: str, rows: np.ndarray) -> np.ndarray:
        variable = self.problem.variables[name]
        if variable.categorical:
            return self.codes[name][rows].astype(float)
        return self.originals[name][rows]

    # -- start
    def start(self) -> None:
        for name in self.problem.visit_order:
            variable = self.problem.variables[name]
            pick = self.rng.integers(0, len(variable.fit_rows), size=len(variable.impute_rows))
            donor_rows = variable.fit_rows[pick]
            if variable.categorical:
                self._set_codes(variable, self.codes[name][donor_rows])
            else:
                self._set_numeric(variable, self.design[donor_rows, variable.columns[0]],
                                  self.originals[name][donor_rows])
        for name in self.problem.passive_order:
            self._update_passive(self.problem.variables[name], refresh=False)
        self.gram = self.design.T @ self.design

    # -- passive
    def _update_passive(self, variable: _Variable, refresh: bool = True) -> None:
        rows = variable.impute_rows
        inputs = {source: self.original_values(source, rows) for source in variable.passive_inputs}
        values = _evaluate_passive(variable.passive_formula, inputs)
        if not np.all(np.isfinite(values)):
            raise AnalysisError(f"imputation.passive.{variable.name}: the formula gave non-finite values for some "
                                "imputed rows; check its inputs' imputed values (e.g. division by zero)")
        self._set_numeric(variable, (values - variable.center) / variable.scale, values)
        if refresh:
            self._refresh_gram(variable)

    # -- delta
    def _shift(self, name: str) -> Any:
        spec = self.problem.delta_rows.get(name)
        if spec is None:
            return 0.0
        if not isinstance(spec, tuple):
            return spec
        kind, by, lookup = spec
        rows = self.problem.variables[name].impute_rows
        group = self.problem.variables[by]
        if kind == "categorical":
            local = self.codes[by][rows]
            positions = np.where(local >= 0, group.used_levels[np.maximum(local, 0)], len(group.levels))
            return lookup[positions]
        values = self.original_values(by, rows)
        shift = np.zeros(len(rows))
        for key, value in lookup.items():
            shift[np.isclose(values, key)] = value
        return shift

    # -- one visit
    def visit(self, name: str) -> None:
        variable = self.problem.variables[name]
        if variable.method in ("pmm", "normal"):
            gram_observed = self.gram - _gram_rows(self.design, variable.other_rows)
            self._visit_linear(variable, gram_observed)
        elif variable.method in ("logistic", "multinomial"):
            self._visit_multinomial(variable)
        else:
            self._visit_ordinal(variable)
        self._refresh_gram(variable)
        for dependent in self.dependents[name]:
            self._update_passive(self.problem.variables[dependent])

    def _visit_linear(self, variable: _Variable, gram_observed: np.ndarray) -> None:
        cols = variable.predictor_columns
        y_col = variable.columns[0]
        # The outcome's cross-products come from its observed rows alone (zeros elsewhere), so the fit
        # cannot depend, even by round-off in the subtraction above, on the values last imputed for it:
        # a delta-shifted chain then draws exactly the same models as the unshifted one.
        y_observed = np.zeros(self.design.shape[0])
        y_observed[variable.fit_rows] = self.design[variable.fit_rows, y_col]
        gram_observed[:, y_col] = gram_observed[y_col, :] = self.design.T @ y_observed
        gram_observed[y_col, y_col] = float(y_observed @ y_observed)
        beta_hat, beta_draw, sigma = _linear_draw(gram_observed, y_col, cols, len(variable.fit_rows), self.rng)
        if variable.method == "normal":
            predicted_missing = _predict_rows(self.design, variable.impute_rows, cols, beta_draw)
            values = predicted_missing + sigma * self.rng.standard_normal(len(predicted_missing))
        else:
            # products with the whole design (no row gathering), one coefficient vector at a
            # time: two matrix-vector products take about a third of the time of one product
            # with a two-column matrix (the BLAS handles a matrix that narrow poorly)
            coef_hat, coef_draw = np.zeros(self.design.shape[1]), np.zeros(self.design.shape[1])
            coef_hat[cols], coef_draw[cols] = beta_hat, beta_draw
            predicted_observed = np.take(self.design @ coef_hat, variable.fit_rows, mode="clip")
            predicted_missing = np.take(self.design @ coef_draw, variable.impute_rows, mode="clip")
            donor = _pmm_match(predicted_observed, predicted_missing, self.problem.donors, self.rng)
            donor_rows = np.take(variable.fit_rows, donor, mode="clip")
            shift = self._shift(variable.name)
            self._set_numeric(variable, np.take(self.design[:, y_col], donor_rows, mode="clip") + shift,
                              np.take(self.originals[variable.name], donor_rows, mode="clip") + shift * variable.scale)
            return
        self._set_numeric(variable, values + self._shift(variable.name))

    def _posterior_draw(self, variable: _Variable, ordered: bool) -> Optional[np.ndarray]:
        """Fit the variable's categorical model (warm-started Newton) and draw its parameters from the
        normal approximation to their posterior; None when only one category was observed."""
        cols = variable.predictor_columns
        n_classes = len(variable.used_levels)
        if n_classes < 2:
            self._set_codes(variable, np.zeros(len(variable.impute_rows), dtype=np.int64))
            return None
        y = self.codes[variable.name][variable.fit_rows]
        augment = _augmentation(self.gram, cols, self.design.shape[0], n_classes)
        start = self.warm.get(variable.name)
        terms = _ordinal_terms if ordered else _multinomial_terms
        estimate, info = _newton(terms, self.design, variable.fit_rows, y, cols[1:] if ordered else cols, augment,
                                 start, n_classes, ordered=ordered)
        self.warm[variable.name] = estimate
        lower = _cholesky(info)
        return estimate + linalg.solve_triangular(lower.T, self.rng.standard_normal(len(estimate)), lower=False)

    def _visit_multinomial(self, variable: _Variable) -> None:
        draw = self._posterior_draw(variable, ordered=False)
        if draw is None:
            return
        cols = variable.predictor_columns
        n_classes = len(variable.used_levels)
        eta = _predict_rows(self.design, variable.impute_rows, cols, draw.reshape(n_classes - 1, len(cols)).T)
        if n_classes == 2:
            # delta on the log-odds scale of the second (observed) level
            eta[:, 0] = eta[:, 0] + self._shift(variable.name)
        eta_all = np.concatenate([np.zeros((len(eta), 1)), eta], axis=1)
        eta_all -= eta_all.max(axis=1, keepdims=True)
        prob = np.exp(eta_all)
        prob /= prob.sum(axis=1, keepdims=True)
        cumulative = np.cumsum(prob, axis=1)[:, :-1]
        u = self.rng.random(len(eta))
        self._set_codes(variable, (u[:, None] > cumulative).sum(axis=1))

    def _visit_ordinal(self, variable: _Variable) -> None:
        draw = self._posterior_draw(variable, ordered=True)
        if draw is None:
            return
        cols = variable.predictor_columns
        n_classes = len(variable.used_levels)
        theta = np.sort(draw[:n_classes - 1])
        eta = _predict_rows(self.design, variable.impute_rows, cols[1:], draw[n_classes - 1:])
        cumulative = expit(theta[None, :] - eta[:, None])
        u = self.rng.random(len(eta))
        self._set_codes(variable, (u[:, None] > cumulative).sum(axis=1))

    # -- the imputed values in the data's own coding
    def imputed(self, name: str) -> np.ndarray:
        variable = self.problem.variables[name]
        rows = variable.impute_rows
        if variable.categorical:
            return variable.used_levels[self.codes[name][rows]].astype(np.int32)
        return self.original_values(name, rows)

    def summary_rows(self, chain: int, iteration: int) -> List[Dict[str, Any]]:
        rows = []
        for name in self.problem.visit_order + self.problem.passive_order:
            values = self.imputed(name).astype(float)
            rows.append({"chain": chain, "iteration": iteration, "variable": name, "mean": float(values.mean()),
                         "sd": float(values.std(ddof=1)) if len(values) > 1 else float("nan")})
        return rows


def _run_chain(problem: _Problem, chain: int, seed: np.random.SeedSequence):
    """Run one chain to the end; returns its imputed values per variable and its convergence rows."""
    state = _Chain(problem, np.random.Generator(np.random.PCG64(seed)))
    state.start()
    trace: List[Dict[str, Any]] = []
    for iteration in range(1, problem.iterations + 1):
        for name in problem.visit_order:
            state.visit(name)
        trace.extend(state.summary_rows(chain, iteration))
    imputed = {name: state.imputed(name) for name in problem.visit_order + problem.passive_order}
    return imputed, trace


# ---------------------------------------------------------------------------
# the result

@dataclass(frozen=True)
class ChainedImputation:
    """m completed datasets, kept as the original data plus the imputed cells.

    ``convergence``: chain (0-based, chain i gives ``completed(i)``), iteration (1..iterations),
    variable, mean and sd of its imputed values (categories: the level position 0..K-1, so
    for a binary variable the share in its second level).
    ``variables``: variable, type, method, n_observed, n_imputed, n_left_missing, predictors.
    """

    m: int
    iterations: int
    seed: int
    data: pd.DataFrame
    impute_mask: pd.DataFrame
    imputed: Dict[str, np.ndarray]          # variable -> (m, n_imputed) values (categories: level positions)
    impute_rows: Dict[str, np.ndarray]
    types: Dict[str, str]
    methods: Dict[str, str]
    convergence: pd.DataFrame
    variables: pd.DataFrame
    donors: int = 5
    delta: Dict[str, Any] = field(default_factory=dict)

    def completed(self, i: int) -> pd.DataFrame:
        """The i-th completed dataset (i = 0..m-1), with the data's own dtypes and categories."""
        if not 0 <= int(i) < self.m:
            raise InputError(f"completed({i}): there are {self.m} imputed datasets, numbered 0 to {self.m - 1}")
        frame = self.data.copy()
        for name, values in self.imputed.items():
            rows = self.impute_rows[name]
            column = frame[name]
            if isinstance(column.dtype, pd.CategoricalDtype):
                codes = column.cat.codes.to_numpy().copy()
                codes[rows] = values[i]
                frame[name] = pd.Categorical.from_codes(codes, dtype=column.dtype)
            elif self.types[name] in CATEGORICAL:
                levels = np.array(_levels_of(column), dtype=object)
                filled = column.to_numpy(dtype=object, copy=True)
                filled[rows] = levels[values[i]]
                frame[name] = pd.Series(filled, index=frame.index).astype(column.dtype)
            else:
                filled = column.to_numpy(dtype=float, na_value=np.nan, copy=True)
                filled[rows] = values[i]
                frame[name] = pd.Series(filled, index=frame.index).astype(column.dtype)
        return frame

    def completed_all(self) -> Iterator[pd.DataFrame]:
        """The completed datasets one after another (one in memory at a time)."""
        for i in range(self.m):
            yield self.completed(i)

    def fit(self, formula: str, family: str = "gaussian", robust: bool = False, offset: Optional[str] = None,
            alpha: float = 0.05) -> PooledResult:
        """Fit the analysis model to every completed dataset and pool with Rubin's rules."""
        fits = [fit_model(self.completed(i), formula, family, robust, offset, alpha) for i in range(self.m)]
        return pool_fits(fits)

    def imputed_long(self, name: str) -> pd.DataFrame:
        """Imputed values of one variable: imputation, row, value (categories as their labels)."""
        if name not in self.imputed:
            raise InputError(f"'{name}' was not imputed (imputed: {', '.join(self.imputed)})")
        values = self.imputed[name]
        rows = self.impute_rows[name]
        frame = pd.DataFrame({"imputation": np.repeat(np.arange(self.m), len(rows)),
                              "row": np.tile(rows, self.m)})
        if self.types[name] in CATEGORICAL:
            levels = np.array(_levels_of(self.data[name]), dtype=object)
            frame["value"] = levels[values.ravel()]
        else:
            frame["value"] = values.ravel()
        return frame

    def summary(self) -> pd.DataFrame:
        """Per imputed variable: method, n_imputed, observed and imputed mean and SD, and what 'mean' measures."""
        rows = []
        for name, values in self.imputed.items():
            column = self.data[name]
            observed_mask = column.notna().to_numpy() & ~self.impute_mask[name].to_numpy(dtype=bool)
            if self.types[name] in CATEGORICAL:
                levels = _levels_of(column)
                position = {v: i for i, v in enumerate(levels)}
                observed = column[observed_mask].map(position).to_numpy(dtype=float)
                scale = (f"share '{levels[1]}'" if self.types[name] == "binary" and len(levels) == 2
                         else f"level position (0 = {levels[0]})")
            else:
                observed = column.to_numpy(dtype=float, na_value=np.nan)[observed_mask]
                scale = "value"
            flat = values.astype(float).ravel()
            rows.append({"variable": name, "type": self.types[name], "method": self.methods[name],
                         "n_imputed": int(values.shape[1]), "n_observed": int(observed_mask.sum()),
                         "observed_mean": float(np.mean(observed)) if len(observed) else np.nan,
                         "observed_sd": float(np.std(observed, ddof=1)) if len(observed) > 1 else np.nan,
                         "imputed_mean": float(flat.mean()) if len(flat) else np.nan,
                         "imputed_sd": float(flat.std(ddof=1)) if len(flat) > 1 else np.nan,
                         "scale": scale})
        return pd.DataFrame(rows, columns=["variable", "type", "method", "n_imputed", "n_observed", "observed_mean",
                                           "observed_sd", "imputed_mean", "imputed_sd", "scale"])


# ---------------------------------------------------------------------------
# the engine's entry point

def impute_chained(data: pd.DataFrame, m: int = 20, iterations: int = 10, seed: Optional[int] = None,
                   methods: Optional[Mapping[str, str]] = None, predictors: Optional[Mapping[str, Sequence[str]]] = None,
                   passive: Optional[Mapping[str, str]] = None, n_jobs: int = 1,
                   types: Optional[Mapping[str, str]] = None, delta: Optional[Mapping[str, Any]] = None,
                   delta_by: Optional[Mapping[str, str]] = None, impute_mask: Optional[pd.DataFrame] = None,
                   donors: int = 5, exclude_predictors: Optional[Mapping[str, Sequence[str]]] = None,
                   progress: bool = True) -> ChainedImputation:
    """Multiple imputation by chained equations (fully conditional specification).

    Parameters
    ----------
    data : one column per variable (numbers float, categories pandas Categorical or text).
    m : number of imputed datasets (chains).
    iterations : sweeps over the incomplete variables per chain.
    seed : integer seed; one ``SeedSequence`` is spawned into one child per chain, so the
        result is the same for any ``n_jobs``. None draws fresh entropy (kept in ``.seed``).
    methods : {column: pmm|normal|logistic|multinomial|ordinal|passive}; default from the type
        (pmm for continuous and count, logistic binary, multinomial nominal, ordinal ordinal).
    predictors : {column: [predictor columns]}; default every other column, the outcome
        included (leaving the outcome out biases its associations towards zero). A passive
        variable does not predict its own inputs.
    passive : {column: formula}, recomputed from its inputs after each of their updates,
        e.g. ``{"bmi": "weight_kg / (height_cm / 100) ** 2"}``; never imputed directly.
    n_jobs : chains run in parallel with joblib.
    types : {column: continuous|binary|nominal|ordinal|count}; default inferred (``infer_type``).
    delta : {column: shift or {group level: shift}}, added to each imputed value after every
        draw (pmm/normal: on the variable's scale; logistic: on the log-odds of the second level
        before drawing). A shift of 0 reproduces the unshifted run exactly.
    delta_by : {column: grouping column} for group-specific shifts.
    impute_mask : bool frame of the cells to impute (default ``data.isna()``); missing cells
        outside it stay missing (see the module docstring for how they act as predictors).
    donors : k, the number of nearest observed predictions a pmm donor is drawn from.
        A limitation of predictive mean matching, not of this engine: it only ever imputes
        observed values, so where many missing values sit in a tail of the predictors that
        has few observed donors it pulls them towards the middle. In our simulation (normal
        outcome, 40 % missing, missingness odds x4.5 per SD of a complete covariate, 1,000
        replicates) pmm attenuated the regression slope by 7 % (coverage 81 %), exactly as
        the published algorithm written independently in the tests did; 'normal' was
        unbiased with 95 % coverage. More donors made it worse (10 donors: 9 %), one donor
        halved the bias but not the undercoverage (79 %). With a roughly normal variable and
        many missing values concentrated in a tail, prefer ``methods={col: "normal"}``.
    exclude_predictors : {column: [columns not to use as its predictors]}.
    progress : show a progress bar over chains.

    Returns
    -------
    ChainedImputation with ``.m``, ``.completed(i)``, ``.convergence``, ``.fit(formula, family)``.

    References
    ----------
    van Buuren S, Brand JPL, Groothuis-Oudshoorn CGM, Rubin DB (2006). Fully conditional
    specification in multivariate imputation. J Stat Comput Simul 76:1049-1064.
    White IR, Royston P, Wood AM (2011). Multiple imputation using chained equations: issues
    and guidance for practice. Stat Med 30:377-399.
    Moons KGM et al. (2006). Using the outcome for imputation of missing predictor values was
    preferred. J Clin Epidemiol 59:1092-1101.
    """
    if not isinstance(data, pd.DataFrame) or data.shape[1] == 0:
        raise InputError("impute_chained: data must be a DataFrame with at least one column")
    if not isinstance(m, (int, np.integer)) or m < 1:
        raise InputError(f"imputation.m: {m!r} is not allowed; give a whole number of imputed datasets, 1 or more")
    if not isinstance(iterations, (int, np.integer)) or iterations < 1:
        raise InputError(f"imputation.iterations: {iterations!r} is not allowed; give a whole number, 1 or more")
    if not isinstance(donors, (int, np.integer)) or donors < 1:
        raise InputError(f"imputation.donors: {donors!r} is not allowed; give a whole number, 1 or more")
    if not isinstance(n_jobs, (int, np.integer)) or n_jobs < 1:
        raise InputError(f"imputation.n_jobs: {n_jobs!r} is not allowed; give a whole number, 1 or more")
    data = data.reset_index(drop=True)
    columns = [str(c) for c in data.columns]
    if len(set(columns)) != len(columns):
        raise InputError("impute_chained: the data have duplicate column names")
    # a wider mapping (e.g. every study column's type) is fine: only the data's columns are used
    type_map = {k: v for k, v in dict(types or {}).items() if k in columns}
    for name, kind in type_map.items():
        if kind not in VARIABLE_TYPES:
            raise InputError(f"variables.{name}.type: '{kind}' is not one of {', '.join(VARIABLE_TYPES)}"
                             f"{did_you_mean(str(kind), VARIABLE_TYPES)}")
    full_types = {c: type_map.get(c) or infer_type(data[c]) for c in columns}
    for name, kind in full_types.items():
        if kind in ("continuous", "count") and not pd.api.types.is_numeric_dtype(data[name].dtype):
            raise InputError(f"variables.{name}.type: '{name}' holds text, so it cannot be {kind}; "
                             "declare it binary, nominal or ordinal")
    method_map = _check_names(methods, columns, "imputation.methods")
    for name, method in method_map.items():
        if method not in METHODS:
            raise InputError(f"imputation.methods.{name}: '{method}' is not one of {', '.join(METHODS)}"
                             f"{did_you_mean(str(method), METHODS)}")
    predictor_map = {k: list(v) for k, v in _check_names(predictors, columns, "imputation.predictors").items()}
    exclude_map = {k: list(v) for k, v in _check_names(exclude_predictors, columns,
                                                       "imputation.exclude_predictors").items()}
    passive_map = {k: str(v) for k, v in _check_names(passive, columns, "imputation.passive").items()}
    delta_map = _check_names(delta, columns, "sensitivity.delta")
    delta_by_map = {k: str(v) for k, v in _check_names(delta_by, columns, "sensitivity.delta_by").items()}
    if impute_mask is None:
        mask = data.isna()
    else:
        if not isinstance(impute_mask, pd.DataFrame):
            raise InputError("impute_mask: give a DataFrame of True/False with the data's columns")
        extra = [c for c in impute_mask.columns if c not in columns]
        if extra:
            raise InputError(f"impute_mask: column '{extra[0]}' is not a column of the data")
        if len(impute_mask) != len(data):
            raise InputError(f"impute_mask: {len(impute_mask)} rows, but the data have {len(data)}")
        mask = pd.DataFrame({c: (impute_mask[c].to_numpy(dtype=bool) if c in impute_mask.columns
                                 else np.zeros(len(data), dtype=bool)) for c in columns})
    mask.columns = columns
    data.columns = columns

    problem = _prepare(data, full_types, method_map, predictor_map, exclude_map, passive_map, mask, int(iterations),
                       int(donors), delta_map, delta_by_map)
    sequence = np.random.SeedSequence(seed)
    children = sequence.spawn(int(m))
    results = _run_chains(problem, children, int(n_jobs), progress)

    names = list(problem.visit_order + problem.passive_order)
    imputed = {name: np.vstack([r[0][name] for r in results]) for name in names}
    convergence = pd.DataFrame([row for r in results for row in r[1]],
                               columns=["chain", "iteration", "variable", "mean", "sd"])
    methods_used = {name: problem.variables[name].method for name in names}
    table = pd.DataFrame([{
        "variable": v.name, "type": v.type, "method": v.method or "(complete: predictor only)",
        "n_observed": len(v.fit_rows), "n_imputed": len(v.impute_rows),
        "n_left_missing": len(v.other_rows) - len(v.impute_rows),
        "predictors": "" if v.method in ("", "passive") else ", ".join(v.predictors),
    } for v in problem.variables.values()])
    keep_mask = pd.DataFrame({c: mask[c].to_numpy(dtype=bool) for c in columns})
    return ChainedImputation(m=int(m), iterations=int(iterations), seed=int(sequence.entropy), data=data,
                             impute_mask=keep_mask, imputed=imputed,
                             impute_rows={n: problem.variables[n].impute_rows for n in names}, types=full_types,
                             methods=methods_used, convergence=convergence, variables=table, donors=int(donors),
                             delta=dict(delta_map))


def _run_chains(problem: _Problem, children: List[np.random.SeedSequence], n_jobs: int, progress: bool):
    from tqdm import tqdm

    bar = tqdm(total=len(children), desc="imputation chains", disable=not progress, leave=False)
    try:
        if n_jobs == 1 or len(children) == 1:
            results = []
            for chain, child in enumerate(children):
                results.append(_run_chain(problem, chain, child))
                bar.update(1)
            return results
        from joblib import Parallel, delayed
        runner = Parallel(n_jobs=n_jobs, return_as="generator")
        results = []
        for result in runner(delayed(_run_chain)(problem, chain, child) for chain, child in enumerate(children)):
            results.append(result)
            bar.update(1)
        return results
    finally:
        bar.close()


# ---------------------------------------------------------------------------
# from a study's params to one imputation run (what notebooks 05 and 06 call)

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
        words = {"pmm": f"predictive mean matching ({self.donors} donors)", "normal": "Bayesian linear regression",
                 "logistic": "logistic regression", "multinomial": "multinomial logistic regression",
                 "ordinal": "proportional-odds regression", "passive": "passive (recomputed from a formula)"}
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
    from .models import analysis_model

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
