"""Reading a study file and turning its missing markers into missing values with reasons.

Every cell ends as one of three things: a value; a missing value with a reason (the
marker it came from, or the label of its reason code); or "not applicable" (the
variable's ``applies_if`` condition is false for that row), which is not missing.
Nothing is silently coerced: text that is neither a number nor a declared marker in a
numeric column is an input error that names the column, the value and the first rows.

The work is done on each column's distinct raw values (``pandas.factorize``), so a
million-row file costs one pass per column plus a dictionary look-up per distinct value.
"""
from __future__ import annotations

import hashlib
import math
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Dict, List, Mapping, Optional, Tuple

import numpy as np
import pandas as pd

from .errors import InputError, did_you_mean
from .params import Params, VariableSpec
from .vocabulary import BLANK, CATEGORICAL_TYPES, IMPLAUSIBLE, NOT_APPLICABLE, NUMERIC_TYPES, infer_type

MAD_TO_SD = 1.4826  # consistency constant of the MAD for the normal distribution (Hampel 1974)


@dataclass(frozen=True)
class VariableInfo:
    """What gapbook knows about one column: its type, levels and where that came from."""

    name: str
    type: str
    declared: bool
    reason: str
    levels: Optional[Tuple[Any, ...]] = None
    label: Optional[str] = None
    range: Optional[Tuple[Optional[float], Optional[float]]] = None
    numeric_storage: bool = True

    @property
    def is_categorical(self) -> bool:
        return self.type in CATEGORICAL_TYPES


@dataclass(frozen=True)
class Study:
    """A study dataset after intake.

    ``data`` holds the analysis values (float for numbers, ``Categorical`` with declared
    levels for text categories), NaN wherever a value is missing or not applicable.
    ``reasons`` has the same shape: NaN where observed, otherwise the reason label
    (``"not applicable"`` for cells outside a variable's ``applies_if`` condition).
    """

    data: pd.DataFrame
    reasons: pd.DataFrame
    variables: Dict[str, VariableInfo]
    ids: pd.Series
    id_column: Optional[str]
    range_issues: pd.DataFrame
    extreme_values: pd.DataFrame
    source: Optional[str] = None
    sha256: Optional[str] = None
    notes: Tuple[str, ...] = field(default_factory=tuple)

    @property
    def missing(self) -> pd.DataFrame:
        """Boolean frame: True where the value is missing (not counting 'not applicable')."""
        return pd.DataFrame(
            {c: self.reasons[c].notna().to_numpy() & (self.reasons[c] != NOT_APPLICABLE).to_numpy()
             for c in self.reasons.columns},
            index=self.reasons.index,
        )

    @property
    def not_applicable(self) -> pd.DataFrame:
        """Boolean frame: True where the value does not apply to that row."""
        return pd.DataFrame(
            {c: (self.reasons[c] == NOT_APPLICABLE).fillna(False).to_numpy(dtype=bool) for c in self.reasons.columns},
            index=self.reasons.index,
        )

    @property
    def types(self) -> Dict[str, str]:
        return {name: info.type for name, info in self.variables.items()}

    def variables_table(self) -> pd.DataFrame:
        """One row per variable: type, whether declared or inferred, and why."""
        rows = [
            {"variable": v.name, "type": v.type, "source": "declared" if v.declared else "inferred",
             "levels": _levels_text(v.levels), "why": v.reason}
            for v in self.variables.values()
        ]
        return pd.DataFrame(rows, columns=["variable", "type", "source", "levels", "why"])


def _levels_text(levels: Optional[Tuple[Any, ...]], shown: int = 12) -> str:
    """Levels for a table cell; a long list (dates, free text read as categories) is cut with its count."""
    if levels is None:
        return ""
    text = ", ".join(str(x) for x in levels[:shown])
    return text if len(levels) <= shown else f"{text}, ... ({len(levels)} levels)"


# ---------------------------------------------------------------------------
# reading files

def sha256_of(path: Path) -> str:
    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        for block in iter(lambda: handle.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


def _format_of(path: Path, declared: str) -> str:
    if declared != "auto":
        return declared
    suffix = path.suffix.lower()
    known = {".csv": "csv", ".txt": "csv", ".tsv": "tsv", ".tab": "tsv", ".xlsx": "xlsx", ".xlsm": "xlsx",
             ".parquet": "parquet", ".pq": "parquet"}
    if suffix not in known:
        raise InputError(f"{path}: cannot tell the file format from '{suffix}'; set data.format to one of "
                         "csv, tsv, xlsx, parquet")
    return known[suffix]


def read_raw(path: Path, fmt: str = "auto", sheet: Any = None, encoding: str = "utf-8") -> pd.DataFrame:
    """Read a data file with every cell as it was written (text files: all strings, no NA parsing)."""
    if not path.is_file():
        raise InputError(f"{path}: data file not found; check data.path (it is relative to the params file)")
    fmt = _format_of(path, fmt)
    try:
        if fmt in ("csv", "tsv"):
            if path.stat().st_size == 0:
                raise InputError(f"{path}: the data file is empty; it needs a header row and data rows")
            raw = pd.read_csv(path, sep="," if fmt == "csv" else "\t", dtype=str, keep_default_na=False,
                              na_filter=False, encoding=encoding, skipinitialspace=False)
        elif fmt == "xlsx":
            raw = pd.read_excel(path, sheet_name=0 if sheet is None else sheet, dtype=object, engine="openpyxl",
                                keep_default_na=False, na_filter=False)
        else:
            raw = pd.read_parquet(path)
    except InputError:
        raise
    except UnicodeDecodeError:
        raise InputError(f"{path}: not readable as {encoding} text; set data.encoding (e.g. latin-1)") from None
    except pd.errors.EmptyDataError:
        raise InputError(f"{path}: the data file is empty; it needs a header row and data rows") from None
    except pd.errors.ParserError as exc:
        raise InputError(f"{path}: cannot be parsed as {fmt}: {str(exc).splitlines()[0]}") from None
    except (ValueError, OSError, KeyError) as exc:
        raise InputError(f"{path}: cannot be read as {fmt}: {str(exc).splitlines()[0]}") from None
    if raw.shape[0] == 0 or raw.shape[1] == 0:
        raise InputError(f"{path}: the data file has no data rows; it needs a header row and data rows")
    raw.columns = [str(c).strip() for c in raw.columns]
    dupes = raw.columns[raw.columns.duplicated()].tolist()
    if dupes:
        raise InputError(f"{path}: column '{dupes[0]}' appears more than once in the header; rename one")
    return raw.reset_index(drop=True)


# ---------------------------------------------------------------------------
# markers and reasons

def _text_key(value: Any) -> str:
    return str(value).strip().casefold()


def _number(value: Any) -> Optional[float]:
    """The cell as a finite float, or None when it is not a number."""
    if isinstance(value, (bool, np.bool_)):
        return float(value)
    if isinstance(value, (int, float, np.integer, np.floating)):
        return None if (isinstance(value, float) and math.isnan(value)) else float(value)
    text = str(value).strip()
    if not text:
        return None
    try:
        number = float(text)
    except ValueError:
        return None
    return number if math.isfinite(number) else None


def _is_empty(value: Any) -> bool:
    if value is None or value is pd.NA or value is pd.NaT:
        return True
    if isinstance(value, float) and math.isnan(value):
        return True
    return isinstance(value, str) and value.strip() == ""


@dataclass(frozen=True)
class MarkerTable:
    """Markers and reason codes for one column, keyed for fast case-insensitive look-up."""

    text: Dict[str, str]
    numbers: Dict[float, str]

    def reason_for(self, value: Any) -> Optional[str]:
        if _is_empty(value):
            return self.text.get("", BLANK)
        if isinstance(value, str):
            hit = self.text.get(_text_key(value))
            if hit is not None:
                return hit
        number = _number(value)
        if number is not None:
            return self.numbers.get(number)
        return None


def marker_table(params: Params, column: str) -> MarkerTable:
    """Global markers and reasons, overridden by the column's own."""
    text: Dict[str, str] = {}
    numbers: Dict[float, str] = {}
    per_column = params.missing.columns.get(column)
    layers = [(params.missing.markers, params.missing.reasons)]
    if per_column is not None:
        layers.append((per_column.markers, per_column.reasons))
    for markers, reasons in layers:
        for marker in markers:
            _add_marker(marker, None, text, numbers)
        for code, label in reasons.items():
            _add_marker(code, str(label), text, numbers)
    return MarkerTable(text, numbers)


def _add_marker(marker: Any, label: Optional[str], text: Dict[str, str], numbers: Dict[float, str]) -> None:
    shown = str(marker).strip()
    reason = label if label is not None else (BLANK if shown == "" else f"marker {shown}")
    if isinstance(marker, str):
        text[_text_key(marker)] = reason
        number = _number(marker)
        if number is not None:
            numbers[number] = reason
    else:
        numbers[float(marker)] = reason
        text[_text_key(marker)] = reason


def _rows_note(rows: np.ndarray, ids: pd.Series, limit: int = 3) -> str:
    shown = rows[:limit]
    text = ", ".join(str(int(r) + 1) for r in shown)
    id_text = ", ".join(str(ids.iloc[r]) for r in shown)
    return f"data rows {text} (ids {id_text})"


# ---------------------------------------------------------------------------
# the intake itself

def load_study(params: Params, raw: Optional[pd.DataFrame] = None) -> Study:
    """Read the params' data file and normalise every column.

    Parameters
    ----------
    params : the validated study params.
    raw : optionally, the raw frame already in memory (cells as written); the file is
        then not read and ``source``/``sha256`` stay None.

    Returns
    -------
    Study with values, reasons, variable types, range issues and extreme values.
    """
    source = sha = None
    if raw is None:
        path = params.data_path
        raw = read_raw(path, params.data.format, params.data.sheet, params.data.encoding)
        source, sha = str(path), sha256_of(path)
    label = source or "data"
    ids, id_column, raw = _split_ids(raw, params, label)
    for name in params.variables:
        if name not in raw.columns:
            raise InputError(f"{params.label}: variables.{name} is not a column of {label}"
                             f"{did_you_mean(name, raw.columns)}")
    for name in params.missing.columns:
        if name not in raw.columns:
            raise InputError(f"{params.label}: missing.columns.{name} is not a column of {label}"
                             f"{did_you_mean(name, raw.columns)}")

    values: Dict[str, pd.Series] = {}
    reasons: Dict[str, pd.Series] = {}
    infos: Dict[str, VariableInfo] = {}
    for column in raw.columns:
        spec = params.variables.get(column, VariableSpec())
        value, reason, info = _normalise_column(raw[column], column, spec, marker_table(params, column), ids, label)
        values[column], reasons[column], infos[column] = value, reason, info

    data = pd.DataFrame(values, index=raw.index)
    reason_frame = pd.DataFrame(reasons, index=raw.index)
    data, reason_frame = _apply_applicability(data, reason_frame, params, label)
    data, reason_frame, issues = _check_ranges(data, reason_frame, infos, params, ids)
    extremes = robust_screen(data, infos, ids, params.missing.robust_z)
    notes = tuple(f"{v.name}: type inferred as {v.type} ({v.reason})" for v in infos.values() if not v.declared)
    return Study(data=data, reasons=reason_frame, variables=infos, ids=ids, id_column=id_column,
                 range_issues=issues, extreme_values=extremes, source=source, sha256=sha, notes=notes)


def _split_ids(raw: pd.DataFrame, params: Params, label: str) -> Tuple[pd.Series, Optional[str], pd.DataFrame]:
    id_column = params.data.id
    if id_column is None:
        return pd.Series(np.arange(1, len(raw) + 1), name="row"), None, raw
    if id_column not in raw.columns:
        raise InputError(f"{params.label}: data.id '{id_column}' is not a column of {label}"
                         f"{did_you_mean(id_column, raw.columns)}")
    ids = raw[id_column].map(lambda v: None if _is_empty(v) else (str(v).strip() if isinstance(v, str) else v))
    blank = np.flatnonzero(ids.isna().to_numpy())
    if len(blank):
        raise InputError(f"{label}: id column '{id_column}' is empty at data row {blank[0] + 1}; every row needs an id")
    dup = ids.duplicated(keep=False).to_numpy()
    if dup.any():
        rows = np.flatnonzero(dup)
        first = ids.iloc[rows[0]]
        where = ", ".join(str(r + 1) for r in np.flatnonzero((ids == first).to_numpy())[:3])
        raise InputError(f"{label}: duplicate id '{first}' in column '{id_column}' (data rows {where}); "
                         "ids must be unique")
    return ids.rename(id_column).reset_index(drop=True), id_column, raw.drop(columns=[id_column])


def _normalise_column(raw: pd.Series, column: str, spec: VariableSpec, markers: MarkerTable,
                      ids: pd.Series, label: str) -> Tuple[pd.Series, pd.Series, VariableInfo]:
    codes, uniques = pd.factorize(raw, use_na_sentinel=True)
    uniques = list(uniques)
    # factorize's NA sentinel (-1) covers None/NaN cells of typed files: treat them as blank.
    unique_reason = [markers.reason_for(u) for u in uniques]
    na_reason = markers.text.get("", BLANK)
    kept = [i for i, r in enumerate(unique_reason) if r is None]

    numbers = {i: _number(uniques[i]) for i in kept}
    all_numeric = all(n is not None for n in numbers.values())
    declared_type = spec.type
    if declared_type in NUMERIC_TYPES and not all_numeric:
        bad = next(i for i in kept if numbers[i] is None)
        rows = np.flatnonzero(codes == bad)
        raise InputError(f"{label}: column '{column}' is declared {declared_type} but holds the text "
                         f"'{uniques[bad]}' at {_rows_note(rows, ids)}; declare it as a missing marker "
                         f"(missing.markers or missing.columns.{column}.markers) or correct the data")
    if declared_type is None and not all_numeric:
        _refuse_stray_text(codes, kept, numbers, uniques, column, ids, label)

    reason_codes = np.where(codes < 0, len(uniques), codes)  # the extra last entry stands for NA cells
    reason_labels = sorted({r for r in unique_reason if r is not None} | ({na_reason} if (codes < 0).any() else set()))
    label_index = {r: k for k, r in enumerate(reason_labels)}
    lookup = np.array([-1 if r is None else label_index[r] for r in unique_reason] + [label_index.get(na_reason, -1)],
                      dtype=np.int64)
    reason_cat = pd.Categorical.from_codes(lookup[reason_codes], categories=reason_labels) if reason_labels \
        else pd.Categorical.from_codes(np.full(len(raw), -1), categories=[])

    levels = tuple(spec.levels) if spec.levels is not None else None
    if all_numeric:
        value_lookup = np.array([numbers.get(i, np.nan) if unique_reason[i] is None else np.nan
                                 for i in range(len(uniques))] + [np.nan], dtype=float)
        value = pd.Series(value_lookup[reason_codes], index=raw.index, name=column)
        numeric_storage = True
        if levels is not None:
            allowed = {_number(x) for x in levels}
            if None in allowed:
                raise InputError(f"variables.{column}.levels: column '{column}' holds numbers, so its levels "
                                 f"must be numbers (got {list(levels)})")
            _check_levels(value, allowed, column, ids, label)
    else:
        text_lookup = [str(uniques[i]).strip() if unique_reason[i] is None else None for i in range(len(uniques))]
        if levels is not None:
            canonical = {_text_key(x): str(x) for x in levels}
            for i, text in enumerate(text_lookup):
                if text is None:
                    continue
                if _text_key(text) not in canonical:
                    rows = np.flatnonzero(codes == i)
                    raise InputError(f"{label}: column '{column}' holds '{text}' at {_rows_note(rows, ids)}, which is "
                                     f"not among variables.{column}.levels ({', '.join(map(str, levels))})"
                                     f"{did_you_mean(text, canonical.values())}; add it to levels or declare it a "
                                     "missing marker")
                text_lookup[i] = canonical[_text_key(text)]
            categories = [str(x) for x in levels]
        else:
            categories = sorted({t for t in text_lookup if t is not None})
        cat_index = {c: k for k, c in enumerate(categories)}
        code_lookup = np.array([-1 if t is None else cat_index[t] for t in text_lookup] + [-1], dtype=np.int64)
        ordered = declared_type == "ordinal"
        value = pd.Series(pd.Categorical.from_codes(code_lookup[reason_codes], categories=categories, ordered=ordered),
                          index=raw.index, name=column)
        numeric_storage = False

    if declared_type is None:
        vtype, why = infer_type(value)
        declared = False
    else:
        vtype, why, declared = declared_type, "declared in params", True
    if vtype == "binary":
        n_levels = len(levels) if levels is not None else value.dropna().nunique()
        if n_levels > 2:
            raise InputError(f"{label}: column '{column}' is declared binary but has {n_levels} distinct values; "
                             "declare it nominal or ordinal, or mark the extra values as missing")
    if levels is None and vtype in CATEGORICAL_TYPES:
        levels = tuple(value.cat.categories) if not numeric_storage else tuple(sorted(value.dropna().unique()))
    info = VariableInfo(name=column, type=vtype, declared=declared, reason=why, levels=levels, label=spec.label,
                        range=spec.range, numeric_storage=numeric_storage)
    return value, pd.Series(reason_cat, index=raw.index, name=column), info


def _refuse_stray_text(codes: np.ndarray, kept: List[int], numbers: Dict[int, Optional[float]], uniques: List[Any],
                       column: str, ids: pd.Series, label: str) -> None:
    """An undeclared column that is mostly numbers but holds some text is an undeclared marker, not a category.

    Treating such a column as nominal would silently turn a measurement into hundreds of
    levels; the user must say whether the text is a missing marker (common practice, no source).
    """
    counts = np.bincount(codes[codes >= 0], minlength=len(uniques))
    numeric_cells = sum(int(counts[i]) for i in kept if numbers[i] is not None)
    text = [i for i in kept if numbers[i] is None]
    text_cells = sum(int(counts[i]) for i in text)
    if numeric_cells > text_cells:
        worst = max(text, key=lambda i: counts[i])
        rows = np.flatnonzero(codes == worst)
        raise InputError(f"{label}: column '{column}' holds numbers and the text '{uniques[worst]}' at "
                         f"{_rows_note(rows, ids)}; declare the text a missing marker (missing.markers or "
                         f"missing.columns.{column}.markers) or declare variables.{column}.type")


def _check_levels(value: pd.Series, allowed: set, column: str, ids: pd.Series, label: str) -> None:
    outside = value.notna().to_numpy() & ~value.isin(list(allowed)).to_numpy()
    if outside.any():
        rows = np.flatnonzero(outside)
        raise InputError(f"{label}: column '{column}' holds {value.iloc[rows[0]]:g} at {_rows_note(rows, ids)}, not "
                         f"among variables.{column}.levels; add it to levels or declare it a missing marker")


def _with_reason(reasons: pd.Series, where: np.ndarray, reason: str) -> pd.Series:
    cat = reasons.cat.add_categories([reason]) if reason not in reasons.cat.categories else reasons
    cat = cat.copy()
    cat[where] = reason
    return cat


def _apply_applicability(data: pd.DataFrame, reasons: pd.DataFrame, params: Params,
                         label: str) -> Tuple[pd.DataFrame, pd.DataFrame]:
    """Mark cells whose ``applies_if`` condition is false as not applicable (not missing)."""
    conditions = {name: spec.applies_if for name, spec in params.variables.items() if spec.applies_if}
    if not conditions:
        return data, reasons
    data, reasons = data.copy(), reasons.copy()
    for name, expression in conditions.items():
        try:
            result = data.eval(expression, engine="python")
        except Exception as exc:  # pandas raises many kinds for a bad expression
            raise InputError(f"{params.label}: variables.{name}.applies_if '{expression}' cannot be evaluated: "
                             f"{str(exc).splitlines()[0]}; use column names (backticks for odd names) and "
                             "comparisons such as on_insulin == 'yes'") from None
        if not isinstance(result, pd.Series) or len(result) != len(data):
            raise InputError(f"{params.label}: variables.{name}.applies_if '{expression}' must give true/false "
                             "for each row")
        known = result.notna().to_numpy()
        not_applicable = known & ~result.fillna(True).astype(bool).to_numpy()
        # The condition is unknown where the variables it uses are missing: such cells stay as they are.
        not_applicable &= _condition_inputs_observed(data, expression)
        if not_applicable.any():
            reasons[name] = _with_reason(reasons[name], not_applicable, NOT_APPLICABLE)
            data[name] = data[name].mask(not_applicable)
    return data, reasons


def _condition_inputs_observed(data: pd.DataFrame, expression: str) -> np.ndarray:
    used = [c for c in data.columns if f"`{c}`" in expression or _mentions(expression, c)]
    if not used:
        return np.ones(len(data), dtype=bool)
    return data[used].notna().all(axis=1).to_numpy()


def _mentions(expression: str, column: str) -> bool:
    return re.search(rf"(?<![\w.]){re.escape(column)}(?![\w])", expression) is not None


def _check_ranges(data: pd.DataFrame, reasons: pd.DataFrame, infos: Mapping[str, VariableInfo], params: Params,
                  ids: pd.Series) -> Tuple[pd.DataFrame, pd.DataFrame, pd.DataFrame]:
    """List values outside their plausible range; set them missing ('implausible') when asked."""
    rows: List[Dict[str, Any]] = []
    changed = False
    for name, info in infos.items():
        if info.range is None or not info.numeric_storage:
            continue
        lo, hi = info.range
        column = data[name].to_numpy(dtype=float)
        outside = np.zeros(len(column), dtype=bool)
        with np.errstate(invalid="ignore"):
            if lo is not None:
                outside |= column < lo
            if hi is not None:
                outside |= column > hi
        if not outside.any():
            continue
        spec = params.variables.get(name)
        action = (spec.out_of_range if spec and spec.out_of_range else params.missing.out_of_range)
        rule = f"outside [{'' if lo is None else f'{lo:g}'}, {'' if hi is None else f'{hi:g}'}]"
        for r in np.flatnonzero(outside):
            rows.append({"variable": name, "id": ids.iloc[r], "value": column[r], "rule": rule,
                         "action": "set missing (implausible)" if action == "missing" else "flagged, kept"})
        if action == "missing":
            if not changed:
                data, reasons, changed = data.copy(), reasons.copy(), True
            data[name] = data[name].mask(outside)
            reasons[name] = _with_reason(reasons[name], outside, IMPLAUSIBLE)
    table = pd.DataFrame(rows, columns=["variable", "id", "value", "rule", "action"])
    return data, reasons, table


def robust_screen(data: pd.DataFrame, infos: Mapping[str, VariableInfo], ids: pd.Series,
                  cutoff: float) -> pd.DataFrame:
    """Values far from the median in MAD units, listed for review and never changed.

    References
    ----------
    Hampel FR (1974). The influence curve and its role in robust estimation. JASA 69:383-393.
    Leys C et al. (2013). Detecting outliers: do not use standard deviation around the mean,
    use absolute deviation around the median. J Exp Soc Psychol 49:764-766.
    """
    rows: List[Dict[str, Any]] = []
    for name, info in infos.items():
        if info.type not in NUMERIC_TYPES or not info.numeric_storage:
            continue
        column = data[name].to_numpy(dtype=float)
        observed = column[~np.isnan(column)]
        if observed.size < 3:
            continue
        median = float(np.median(observed))
        scale = MAD_TO_SD * float(np.median(np.abs(observed - median)))
        if scale <= 0:
            continue
        with np.errstate(invalid="ignore"):
            z = (column - median) / scale
            flagged = np.abs(z) > cutoff
        for r in np.flatnonzero(flagged):
            rows.append({"variable": name, "id": ids.iloc[r], "value": column[r], "median": median,
                         "robust_z": float(z[r])})
    return pd.DataFrame(rows, columns=["variable", "id", "value", "median", "robust_z"])
