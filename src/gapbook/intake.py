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

import codecs
import csv
import hashlib
import math
import re
import unicodedata
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Dict, List, Mapping, Optional, Sequence, Tuple, Union

import numpy as np
import pandas as pd

from .errors import InputError, did_you_mean
from .expressions import CONDITION, parse_expression
from .params import Params, VariableSpec
from .row_filter import RowsKept, filter_only_columns, ignored_when_read, keep_rows_expression, rows_to_keep
from .vocabulary import BLANK, CATEGORICAL_TYPES, IMPLAUSIBLE, NOT_APPLICABLE, NUMERIC_TYPES, infer_type
from .text import one_line

__all__ = ["MAD_TO_SD", "FREE_TEXT_LEVEL", "VariableInfo", "Study", "variables_table", "inferred_notes",
           "levels_of", "sha256_of", "read_raw", "read_table", "marker_table", "rows_note", "load_study",
           "read_study", "check_expression_columns", "check_declared_columns", "clean_id", "blank_id_error",
           "duplicate_id_error", "PlainNumbers", "DistinctCells", "ColumnDecision", "EveryValueNeeded",
           "decide_column", "RANGE_COLUMNS", "EXTREME_COLUMNS", "RANGE_ACTIONS", "range_action", "range_rule",
           "MAX_MAGNITUDE", "too_large_error", "nul_error", "repeated_name_error"]

MAD_TO_SD = 1.4826  # consistency constant of the MAD for the normal distribution (Hampel 1974)
MAX_NAME_LENGTH = 256         # characters in a column name
# An undeclared text column with at least this many distinct values, making up more than half
# of its observed cells, is free text or an identifier (names, comments, codes): its values are
# never shown or analysed, only counted (common practice, no source).
FREE_TEXT_MIN_DISTINCT = 10
FREE_TEXT_LONG_VALUE = 100    # a value this long is free text whatever the counts
# An undeclared text column most of whose distinct texts are sentences (at least this many words
# and a full stop, '!' or '?' ending one) is free text however few texts it holds: comments such
# as "Not enough blood for isotopes." name people, events and places, and a handful of them
# repeated (palmerpenguins' raw Comments: 10 texts in 54 cells) still reads as prose, not as
# categories (common practice, no source).
FREE_TEXT_SENTENCE_WORDS = 3
_SENTENCE_END = re.compile(r"[.!?](?:\s|$)")
FREE_TEXT_LEVEL = "(text)"    # what such a column holds after intake where it was observed
# The largest magnitude of a value the stages can compute with. Their sums of squares and
# cross-products (Little's test, the missingness and imputation models, the analysis model)
# overflow a double above about 1.8e308 (IEEE 754): a value of 1e160 alone has a square of 1e320,
# and Little's test then stopped on a LinAlgError. At |x| <= 1e70 a square is at most 1e140 and
# the square of a product of two values (an interaction, a squared term) at most 1e280, so sums
# over any file a computer holds stay finite. No measurement in a study comes near 1e70 (an
# infinite value in a typed file even less): such a value is a code or an error (derived bound,
# no source).
MAX_MAGNITUDE = 1e70


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
    free_text: bool = False       # values replaced by FREE_TEXT_LEVEL; only counts are shown
    n_distinct: Optional[int] = None

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
    warnings: Tuple[str, ...] = field(default_factory=tuple)   # printed by check and run, shown in the audit
    rows_kept: Optional["RowsKept"] = None   # data.keep_rows: the condition, rows read and kept (None: every row)
    # data.keep_rows: each row's 0-based file row, for messages (errors.data_row); None when every row is kept
    file_rows: Optional[np.ndarray] = field(default=None, repr=False)

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
        return variables_table(self.variables)


def variables_table(infos: Mapping[str, VariableInfo]) -> pd.DataFrame:
    """One row per variable: type, whether declared or inferred, and why.

    Parameters
    ----------
    infos : mapping of str to VariableInfo
        ``study.variables``.

    Returns
    -------
    DataFrame
        variable, type, source (declared or inferred), levels, why.
    """
    rows = [
        {"variable": v.name, "type": v.type, "source": "declared" if v.declared else "inferred",
         "levels": f"{v.n_distinct} distinct texts (not shown)" if v.free_text else _levels_text(v.levels),
         "why": v.reason}
        for v in infos.values()
    ]
    return pd.DataFrame(rows, columns=["variable", "type", "source", "levels", "why"])


def inferred_notes(infos: Mapping[str, VariableInfo]) -> Tuple[str, ...]:
    """One line per variable whose type was inferred, for the user to check.

    Parameters
    ----------
    infos : mapping of str to VariableInfo
        ``study.variables``.

    Returns
    -------
    tuple of str
        One sentence per inferred variable.
    """
    return tuple(f"{v.name}: type inferred as {v.type} ({v.reason})" for v in infos.values() if not v.declared)


def levels_of(column: pd.Series) -> Tuple[Any, ...]:
    """A column's levels in order: a Categorical's categories, else its distinct observed values sorted.

    Parameters
    ----------
    column : Series
        A study column.

    Returns
    -------
    tuple
        The levels, reference first.
    """
    if isinstance(column.dtype, pd.CategoricalDtype):
        return tuple(column.cat.categories)
    values = column.dropna().unique()
    try:
        return tuple(sorted(values))
    except TypeError:  # mixed kinds of values: sort by their text
        return tuple(sorted(values, key=str))


def _levels_text(levels: Optional[Tuple[Any, ...]], shown: int = 12) -> str:
    """Levels for a table cell; a long list (dates, free text read as categories) is cut with its count."""
    if levels is None:
        return ""
    text = ", ".join(str(x) for x in levels[:shown])
    return text if len(levels) <= shown else f"{text}, ... ({len(levels)} levels)"


# ---------------------------------------------------------------------------
# reading files

def sha256_of(path: Path) -> str:
    """The SHA-256 digest of a file read in 1 MiB blocks (a large data file is never held whole).

    Parameters
    ----------
    path : Path
        The file.

    Returns
    -------
    str
        64 hexadecimal digits.
    """
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


def read_raw(path: Path, fmt: str = "auto", sheet: Any = None, encoding: str = "utf-8", *,
             delimiter: Optional[str] = None, ignore: Tuple[str, ...] = ()) -> pd.DataFrame:
    """Read a data file with every cell as it was written (text files: all strings, no NA parsing).

    The header is read as written (pandas would rename a repeated ``x`` to ``x.1``): a
    repeated, empty or unsafe column name stops with exit 2 naming the column; see
    :func:`check_header`. Columns in ``ignore`` are left out before any check.

    Parameters
    ----------
    path : Path
        The data file.
    fmt : str
        ``auto`` (from the suffix), ``csv``, ``tsv``, ``xlsx`` or ``parquet``.
    sheet : str or int, optional
        The Excel sheet.
    encoding : str
        The text encoding of a CSV/TSV file.
    delimiter : str, optional
        The field separator of a text file; default from the format.
    ignore : tuple of str
        Columns left out.

    Returns
    -------
    DataFrame
        Every cell as written (text for text files).
    """
    raw, _ = read_table(path, fmt, sheet, encoding, delimiter=delimiter, ignore=ignore)
    return raw


def read_table(path: Path, fmt: str = "auto", sheet: Any = None, encoding: str = "utf-8", *,
               delimiter: Optional[str] = None, ignore: Tuple[str, ...] = (),
               nrows: Optional[int] = None) -> Tuple[pd.DataFrame, List[str]]:
    """:func:`read_raw` and the warnings it found (an unnamed empty column left out).

    ``nrows`` reads only the first rows of a text or Parquet file (e.g. to learn its header).

    Parameters
    ----------
    path, fmt, sheet, encoding, delimiter, ignore :
        As for :func:`read_raw`.
    nrows : int, optional
        Read only this many rows.

    Returns
    -------
    (raw, warnings) : DataFrame and list of str
    """
    if not path.is_file():
        what = "is not a regular file (a folder, pipe or device)" if path.exists() else "data file not found"
        raise InputError(f"{path}: {what}; check data.path (it is relative to the params file)")
    fmt = _format_of(path, fmt)
    named = encoding
    if encoding.replace("_", "-").lower() in ("utf-8", "utf8"):
        encoding = "utf-8-sig"  # a byte-order mark (spreadsheet "CSV UTF-8") is not part of the first name
    try:
        if fmt in ("csv", "tsv"):
            if path.stat().st_size == 0:
                raise InputError(f"{path}: the data file is empty; it needs a header row and data rows")
            sep = delimiter or ("," if fmt == "csv" else "\t")
            _refuse_binary_text(path, encoding, named)
            header = _text_header(path, sep, encoding)
            raw = pd.read_csv(path, sep=sep, dtype=str, keep_default_na=False, na_filter=False, encoding=encoding,
                              skipinitialspace=False, nrows=nrows)
        elif fmt == "xlsx":
            table = pd.read_excel(path, sheet_name=0 if sheet is None else sheet, dtype=object, engine="openpyxl",
                                  keep_default_na=False, na_filter=False, header=None)
            if table.shape[0] == 0:
                raise InputError(f"{path}: the data file is empty; it needs a header row and data rows")
            header = ["" if _is_empty(v) else str(v) for v in table.iloc[0].tolist()]
            raw = table.iloc[1:].reset_index(drop=True)
        else:
            _check_parquet_schema(path)
            raw = _read_parquet(path, nrows)
            header = [str(c) for c in raw.columns]
    except InputError:
        raise
    except UnicodeDecodeError:
        raise InputError(f"{path}: not readable as {named} text; set data.encoding (e.g. latin-1)") from None
    except pd.errors.EmptyDataError:
        raise InputError(f"{path}: the data file is empty; it needs a header row and data rows") from None
    except pd.errors.ParserError as exc:
        raise InputError(f"{path}: cannot be parsed as {fmt}: {str(exc).splitlines()[0]}") from None
    except RecursionError:
        raise InputError(f"{path}: cannot be read as {fmt}: its structure is nested too deeply") from None
    except Exception as exc:  # readers raise many kinds for a file that is not what its name says
        first = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        raise InputError(f"{path}: cannot be read as {fmt} ({first}); check data.format and the file") from None
    if fmt in ("csv", "tsv") and len(header) > 1 and not isinstance(raw.index, pd.RangeIndex):
        # pandas takes the first columns as row labels when the first data row has more fields than the
        # header, shifting every value one column along; the user must see the row, not a later type error.
        # (A one-name header is a wrong delimiter, which check_header explains.)
        raise InputError(f"{path}: the first data row has {raw.index.nlevels + raw.shape[1]} values but the header "
                         f"row names {len(header)} columns; name every column in the header, or remove the extra "
                         f"delimiters ({'tabs' if sep == chr(9) else repr(sep)}) from the row")
    if len(header) == raw.shape[1]:
        raw.columns = header  # the names as written, not pandas' renamed duplicates
    if raw.shape[0] == 0 or raw.shape[1] == 0:
        raise InputError(f"{path}: the data file has no data rows; it needs a header row and data rows")
    raw, warnings = check_header(raw, str(path), ignore=ignore, fmt=fmt, delimiter=delimiter)
    return raw.reset_index(drop=True), warnings


# A text file's first bytes tell a binary file (or text in another encoding) at once, before any parser
# reads a 3 GiB file of NUL bytes as one header line: NUL is no character of a CSV file (RFC 4180
# allows printable text, commas, quotes and line breaks), and a header row is never 1 MiB long (at most
# 256 characters a name: 4,000 names would fit).
SNIFF_BYTES = 64 * 1024
MAX_HEADER_BYTES = 1 << 20
_WIDE_ENCODINGS = ("utf-16", "utf-32")


def _refuse_binary_text(path: Path, encoding: str, named: str) -> None:
    """Stop at once on a CSV/TSV file that is binary, in a wider encoding than the params say, or has no line break.

    The first 64 KiB are decoded with the file's encoding (UTF-16 and UTF-32 text, declared as
    such in ``data.encoding``, holds NUL bytes but no NUL character) and must hold no NUL; the
    first 1 MiB must hold a line break (``\n`` or ``\r``) when the file is longer.
    """
    with open(path, "rb") as handle:
        head = handle.read(MAX_HEADER_BYTES)
    wide = codecs.lookup(encoding).name.startswith(_WIDE_ENCODINGS)
    if not wide and head.startswith((codecs.BOM_UTF16_LE, codecs.BOM_UTF16_BE)):
        raise InputError(f"{path}: the file starts with a UTF-16 or UTF-32 byte-order mark but data.encoding is "
                         f"{named}; set data.encoding: utf-16 (or utf-32), or save the file as UTF-8")
    decoder = codecs.getincrementaldecoder(encoding)(errors="replace")
    text = decoder.decode(head[:SNIFF_BYTES])
    nul = text.find("\x00")
    if nul >= 0:
        line = text.count("\n", 0, nul) + 1 if "\n" in text[:nul] else text.count("\r", 0, nul) + 1
        hint = "" if wide else " (or UTF-16/UTF-32 text: then set data.encoding, e.g. utf-16)"
        raise InputError(f"{path}: a NUL character on line {line:,} (within its first 64 KiB): this is not a "
                         f"text file gapbook reads{hint}; give the study's CSV or TSV export, or remove the NUL "
                         "characters")
    text += decoder.decode(head[SNIFF_BYTES:])
    if len(head) == MAX_HEADER_BYTES and "\n" not in text and "\r" not in text:
        raise InputError(f"{path}: no line break in its first 1 MiB, so its header row alone would be longer; this "
                         f"is not a delimited text file gapbook reads as {named}: check data.path, data.format and "
                         "data.encoding")


def _text_header(path: Path, sep: str, encoding: str) -> List[str]:
    """The first record of a delimited text file, as written."""
    with open(path, newline="", encoding=encoding) as handle:
        try:
            return next(csv.reader(handle, delimiter=sep))
        except StopIteration:
            return []
        except csv.Error as exc:
            raise InputError(f"{path}: the header row cannot be read ({exc})") from None


def _check_parquet_schema(path: Path) -> None:
    """Refuse, naming the column, a Parquet schema gapbook cannot read as one value per named cell.

    A repeated name gave pyarrow's "Multiple matches for FieldRef.Name(x)" with pandas and intake's
    own line with DuckDB; both engines now give intake's line.
    """
    import pyarrow.parquet as pq
    import pyarrow.types as pat

    schema = pq.read_schema(path)
    seen: Dict[str, int] = {}
    for position, name in enumerate(schema.names):
        if name in seen:
            raise repeated_name_error(str(path), seen[name], position, name)
        seen[name] = position
    for name, kind in zip(schema.names, schema.types):
        if pat.is_nested(kind) or pat.is_dictionary(kind) and pat.is_nested(kind.value_type):
            raise InputError(f"{path}: column '{one_line(name, 80)}' holds {kind} values (lists or records in one "
                             "cell); gapbook reads one value per cell: flatten it or leave it out (data.ignore)")


def _read_parquet(path: Path, nrows: Optional[int]) -> pd.DataFrame:
    """A Parquet file (or its first ``nrows`` rows) as pandas reads it; damaged pandas metadata named as such.

    pandas rebuilds its index and column types from the JSON the schema keeps under the key
    ``pandas``; when that is broken, pyarrow's error ('index_columns', a JSON parser's message,
    "data type 'bogus' not understood") named neither the metadata nor what to do. Reading the
    columns without it is the test: it is the metadata when that works.
    """
    import pyarrow.parquet as pq

    try:
        if nrows is None:
            return pd.read_parquet(path)
        batch = next(pq.ParquetFile(path).iter_batches(batch_size=max(nrows, 1)), None)
        return pd.read_parquet(path) if batch is None else batch.to_pandas()
    except Exception as exc:
        try:
            next(pq.ParquetFile(path).iter_batches(batch_size=1), None)
            schema = pq.read_schema(path)
        except Exception:
            raise exc from None  # the file itself is damaged: read_table's general message
        if b"pandas" not in (schema.metadata or {}):
            raise
        detail = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        raise InputError(f"{path}: its pandas metadata (the schema's 'pandas' entry: how pandas wrote the index and "
                         f"column types) is damaged ({one_line(detail, 120)}); write the file again (e.g. pandas "
                         "to_parquet, or pyarrow without that entry)") from None


def repeated_name_error(label: str, first: int, second: int, name: str) -> InputError:
    """The error for two columns of one name (0-based positions), from a header row or a Parquet schema.

    Parameters
    ----------
    label : str
        The data file.
    first, second : int
        0-based positions of the two columns.
    name : str
        The name.

    Returns
    -------
    InputError
    """
    return InputError(f"{label}: columns {first + 1} and {second + 1} are both named '{one_line(name, 80)}'; "
                      "rename one in the file (gapbook never guesses which is which)")


def check_header(raw: pd.DataFrame, label: str, *, ignore: Tuple[str, ...] = (), fmt: str = "csv",
                 delimiter: Optional[str] = None) -> Tuple[pd.DataFrame, List[str]]:
    """Refuse column names that are repeated, empty (with values), unsafe or too long; drop ``ignore``.

    Column names reach formulas, tables and pages. A name with a quote, a backslash or a
    control or format character (line breaks, escape sequences, bidirectional overrides)
    is refused naming the column, never quietly renamed: the user renames it in the file or
    leaves it out with ``data.ignore``. Returns the frame and warnings.
    """
    warnings: List[str] = []
    names = [str(c).strip() for c in raw.columns]
    # Spaces around a header name are nearly always a spreadsheet's padding; the name is read without
    # them, and said so, since params and formulas name the column as it reads.
    warnings.extend(f"{label}: column {position + 1} is named '{one_line(str(c), 80)}' in the header; it is read "
                    f"as '{one_line(name, 80)}' (spaces around a column name are dropped)"
                    for position, (c, name) in enumerate(zip(raw.columns, names)) if str(c) != name and name)
    raw = raw.copy()
    raw.columns = names
    for name in ignore:
        if name not in names:
            raise InputError(f"{label}: data.ignore names '{one_line(name, 80)}', which is not a column"
                             f"{did_you_mean(name, names)}")
    keep = [i for i, name in enumerate(names) if name not in set(ignore)]
    if len(keep) < len(names):
        raw = raw.iloc[:, keep]
        names = [names[i] for i in keep]
    if len(names) == 1 and fmt in ("csv", "tsv"):
        _refuse_one_column(names[0], label, delimiter, fmt)
    unnamed = []
    for position, name in enumerate(names):
        if name == "":
            column = raw.iloc[:, position]
            if column.map(_is_empty).all():
                unnamed.append(position)
                warnings.append(f"{label}: column {keep[position] + 1} has no name and no values; it was left out")
                continue
            raise InputError(f"{label}: column {keep[position] + 1} has values but no name in the header row; "
                             "name it in the file or leave it out (data.ignore cannot name it, so remove it)")
        _refuse_unsafe_name(name, label)
    if unnamed:
        raw = raw.drop(columns=raw.columns[unnamed])
        names = [n for i, n in enumerate(names) if i not in set(unnamed)]
    seen: Dict[str, int] = {}
    for position, name in enumerate(names):
        if name in seen:
            raise repeated_name_error(label, seen[name], position, name)
        seen[name] = position
    return raw, warnings


def _refuse_unsafe_name(name: str, label: str) -> None:
    bad = next((ch for ch in name if ch in "\"'`\\" or unicodedata.category(ch) in ("Cc", "Cf", "Zl", "Zp")), None)
    if bad is not None:
        what = {"\"": "a double quote", "'": "a single quote", "`": "a backtick", "\\": "a backslash"}.get(
            bad, f"the control character U+{ord(bad):04X}")
        raise InputError(f"{label}: column '{one_line(name, 80)}' has {what} in its name; rename the column in the "
                         "file (letters, digits, spaces, dots, underscores and dashes are safe) or leave it out "
                         "with data.ignore")
    if len(name) > MAX_NAME_LENGTH:
        raise InputError(f"{label}: column '{one_line(name, 60)}' has a name {len(name)} characters long; at most "
                         f"{MAX_NAME_LENGTH} are allowed: rename it in the file or leave it out with data.ignore")


def _refuse_one_column(header: str, label: str, delimiter: Optional[str], fmt: str) -> None:
    """A delimited file read as one column whose name holds another delimiter was read with the wrong one."""
    used = delimiter or ("\t" if fmt == "tsv" else ",")
    for mark, name, spelling in ((";", "semicolon", "';'"), ("\t", "tab", '"\\t"'), ("|", "pipe", "'|'"),
                                 (",", "comma", "','")):
        if mark in header and mark != used:
            hint = " (and data.decimal: ',' if numbers are written like 1,5)" if mark == ";" else ""
            raise InputError(f"{label}: the file was read as one column named '{one_line(header, 60)}', which "
                             f"looks {name}-delimited; set data.delimiter: {spelling} in the params{hint}")


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
class NumberFormat:
    """How numbers are written in a text file: decimal mark and optional thousands separator."""

    decimal: str = "."
    thousands: Optional[str] = None

    def parse(self, value: Any) -> Optional[float]:
        if isinstance(value, str) and (self.decimal != "." or self.thousands):
            text = value.strip()
            if self.thousands and re.fullmatch(rf"[+-]?\d{{1,3}}({re.escape(self.thousands)}\d{{3}})+"
                                               rf"({re.escape(self.decimal)}\d+)?", text):
                text = text.replace(self.thousands, "")
            if self.decimal != ".":
                if "." in text:
                    return None
                text = text.replace(self.decimal, ".")
            return _number(text)
        return _number(value)


@dataclass(frozen=True)
class MarkerTable:
    """Markers and reason codes for one column, keyed for fast case-insensitive look-up.

    ``origins_*`` say where each marker was declared (``missing.markers``,
    ``missing.columns.<x>.reasons``, ...), for messages and for telling a code declared for
    this very column from a global one.
    """

    text: Dict[str, str]
    numbers: Dict[float, str]
    origins_text: Dict[str, str] = field(default_factory=dict)
    origins_numbers: Dict[float, str] = field(default_factory=dict)
    number_format: NumberFormat = NumberFormat()

    def reason_for(self, value: Any) -> Optional[str]:
        if _is_empty(value):
            return self.text.get("", BLANK)
        if isinstance(value, str):
            hit = self.text.get(_text_key(value))
            if hit is not None:
                return hit
        number = self.number(value)
        if number is not None:
            return self.numbers.get(number)
        return None

    def number(self, value: Any) -> Optional[float]:
        return self.number_format.parse(value)

    def origin_of(self, value: Any) -> str:
        if isinstance(value, str) and _text_key(value) in self.origins_text:
            return self.origins_text[_text_key(value)]
        number = self.number(value)
        return self.origins_numbers.get(number, "missing.markers") if number is not None else "missing.markers"


def marker_table(params: Params, column: str) -> MarkerTable:
    """Global markers and reasons, overridden by the column's own (or replaced, with ``use_global: false``).

    Parameters
    ----------
    params : Params
        The params' ``missing`` section is read.
    column : str
        The column the markers apply to.

    Returns
    -------
    MarkerTable
        Marker text -> reason label and reason code -> label for that column, with where each was declared.
    """
    text: Dict[str, str] = {}
    numbers: Dict[float, str] = {}
    origins_text: Dict[str, str] = {}
    origins_numbers: Dict[float, str] = {}
    per_column = params.missing.columns.get(column)
    layers = []
    if per_column is None or per_column.use_global:
        layers.append((params.missing.markers, params.missing.reasons, "missing"))
    if per_column is not None:
        layers.append((per_column.markers, per_column.reasons, f"missing.columns.{column}"))
    for markers, reasons, key in layers:
        for marker in markers:
            _add_marker(marker, None, text, numbers)
            _add_origin(marker, f"{key}.markers", origins_text, origins_numbers)
        for code, label in reasons.items():
            _add_marker(code, str(label), text, numbers)
            _add_origin(code, f"{key}.reasons", origins_text, origins_numbers)
    number_format = NumberFormat(params.data.decimal, params.data.thousands)
    return MarkerTable(text, numbers, origins_text, origins_numbers, number_format)


def _add_origin(marker: Any, key: str, origins_text: Dict[str, str], origins_numbers: Dict[float, str]) -> None:
    origins_text[_text_key(marker)] = key
    number = _number(marker)
    if number is not None:
        origins_numbers[number] = key


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
    # rows are positions; ids' index holds each position's 0-based file row (data.keep_rows leaves gaps)
    shown = rows[:limit]
    return rows_note([ids.index[r] for r in shown], [ids.iloc[r] for r in shown])


def rows_note(rows: Sequence[int], ids: Sequence[Any]) -> str:
    """'data rows 3, 7 (ids P3, P7)' for 0-based rows and their ids (error messages).

    Parameters
    ----------
    rows : sequence of int
        0-based row positions (at most the first three are named).
    ids : sequence
        The ids of those rows.

    Returns
    -------
    str
        The note, with 1-based data row numbers.
    """
    text = ", ".join(str(int(r) + 1) for r in rows)
    id_text = ", ".join(one_line(i, 40) for i in ids)
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
    warnings: List[str] = []
    if raw is None:
        path = params.data_path
        raw, warnings = read_table(path, params.data.format, params.data.sheet, params.data.encoding,
                                   delimiter=params.data.delimiter, ignore=ignored_when_read(params))
        source, sha = str(path), sha256_of(path)
    else:
        raw, warnings = check_header(raw, "data", ignore=ignored_when_read(params), fmt="frame")
    label = source or "data"
    raw, rows_kept, file_rows = _keep_rows(raw, params, label, warnings)
    raw = raw.drop(columns=list(filter_only_columns(params)))
    check_declared_columns(params, list(raw.columns), label)
    ids, id_column, raw = _split_ids(raw, params, label, file_rows)
    conditions = check_expression_columns(params, list(raw.columns))
    _refuse_markers_that_are_levels(params)

    values: Dict[str, pd.Series] = {}
    reasons: Dict[str, pd.Series] = {}
    infos: Dict[str, VariableInfo] = {}
    for column in raw.columns:
        spec = params.variables.get(column, VariableSpec())
        value, reason, info = _normalise_column(raw[column], column, spec, marker_table(params, column), ids, label,
                                                warnings)
        values[column], reasons[column], infos[column] = value, reason, info

    data = pd.DataFrame(values, index=raw.index)
    reason_frame = pd.DataFrame(reasons, index=raw.index)
    reason_frame = _reasons_from_columns(reason_frame, raw, params, label, ids)
    data, reason_frame = _apply_applicability(data, reason_frame, params, label, conditions, ids, warnings)
    data, reason_frame, baseline_notes = _baseline_change_not_applicable(data, reason_frame, params)
    data, reason_frame, issues = _check_ranges(data, reason_frame, infos, params, ids)
    # A column that gives other columns' reasons (reason_from) is no variable: its blanks mean 'no reason'.
    sources = {section.reason_from: name for name, section in params.missing.columns.items()
               if section.reason_from is not None and section.reason_from in data.columns}
    data, reason_frame = data.drop(columns=list(sources)), reason_frame.drop(columns=list(sources))
    infos = {name: info for name, info in infos.items() if name not in sources}
    _refuse_too_large(data, infos, ids, label)
    extremes = robust_screen(data, infos, ids, params.missing.robust_z)
    notes = inferred_notes(infos) + baseline_notes + tuple(f"{source}: the reasons for the blank cells of {name} "
                                          f"(missing.columns.{name}.reason_from), not a variable of the study"
                                          for source, name in sources.items())
    return Study(data=data, reasons=reason_frame, variables=infos, ids=ids.reset_index(drop=True), id_column=id_column,
                 range_issues=issues, extreme_values=extremes, source=source, sha256=sha, notes=notes,
                 warnings=tuple(warnings), rows_kept=rows_kept,
                 file_rows=None if rows_kept is None else file_rows)


def _baseline_change_not_applicable(data: pd.DataFrame, reasons: pd.DataFrame, params: Params
                                    ) -> Tuple[pd.DataFrame, pd.DataFrame, Tuple[str, ...]]:
    """A follow-up outcome that is blank or 0 at every baseline row is a change from baseline: not applicable there.

    A change from baseline (ADaM's ``CHG``) is missing or 0 at the baseline visit by construction,
    and the baseline visit is kept but not analysed; counting its blanks as missing outcomes would
    inflate the audit by one cell per participant. The rule reads the data (every baseline cell of
    the outcome blank or 0), not the column's name, and stands aside when the outcome has its own
    ``applies_if``. An outcome with real baseline values (``AVAL``) keeps its baseline gaps as missing.
    """
    design = params.design
    formula = params.analysis.formula
    if design is None or design.baseline is None or not formula or "~" not in formula:
        return data, reasons, ()
    outcome = formula.split("~", 1)[0].strip()
    if design.layout == "wide":
        if len(design.outcome_columns) != len(design.visits):
            return data, reasons, ()
        column = design.outcome_columns[[str(v).strip() for v in design.visits].index(str(design.baseline).strip())]
        rows = np.ones(len(data), dtype=bool)
        where = f"its baseline column '{column}'"
    else:
        column = outcome
        if design.visit not in data.columns:
            return data, reasons, ()
        visit = data[design.visit]
        if pd.api.types.is_numeric_dtype(visit) and not isinstance(visit.dtype, pd.CategoricalDtype):
            number = _number(design.baseline)
            rows = (visit.to_numpy(dtype=float, na_value=np.nan) == number) if number is not None else \
                np.zeros(len(data), dtype=bool)
        else:
            rows = (visit.astype(object).map(lambda v: str(v).strip()) == str(design.baseline).strip()).to_numpy()
        where = f"the baseline visit ({one_line(design.baseline, 40)})"
    spec = params.variables.get(column)
    if column not in data.columns or not rows.any() or (spec is not None and spec.applies_if) or \
            not pd.api.types.is_numeric_dtype(data[column]) or isinstance(data[column].dtype, pd.CategoricalDtype):
        return data, reasons, ()
    values = data[column].to_numpy(dtype=float, na_value=np.nan)[rows]
    blank = rows & data[column].isna().to_numpy() & reasons[column].notna().to_numpy()
    if not blank.any() or not np.all(np.isnan(values) | (values == 0)):
        return data, reasons, ()
    reasons = reasons.copy()
    reasons[column] = _with_reason(reasons[column], blank, NOT_APPLICABLE)
    note = (f"{column}: blank or 0 in every row of {where}, so a change from baseline by construction: its "
            f"{int(blank.sum()):,} blank baseline cells are not applicable, not missing (write "
            f"variables.{column}.applies_if to decide otherwise)")
    return data, reasons, (note,)


def _keep_rows(raw: pd.DataFrame, params: Params, label: str, warnings: List[str]
               ) -> Tuple[pd.DataFrame, Optional[RowsKept], np.ndarray]:
    """The rows ``data.keep_rows`` keeps (numbered from 0 again), what it kept, and each row's 0-based file row."""
    expression = keep_rows_expression(params, list(raw.columns))
    if expression is None:
        return raw, None, np.arange(len(raw))
    keep, kept, found = rows_to_keep(raw, expression, params=params, label=label)
    warnings.extend(found)
    return raw[keep].reset_index(drop=True), kept, np.flatnonzero(keep)


# A reason column (missing.columns.<x>.reason_from) with more distinct texts than this is free text, not reasons.
MAX_REASON_TEXTS = 50


# Reasons intake gives itself, which a reason column's text may not take over: 'not applicable' makes a cell
# not missing (a blank outcome would leave the analysis of missing values), 'implausible' says a range
# check set the value missing.
_RESERVED_REASONS = {NOT_APPLICABLE: "cells outside a variable's applies_if condition, which are not missing",
                     IMPLAUSIBLE: "values a range check set missing (variables.<x>.range)"}


def _reasons_from_columns(reasons: pd.DataFrame, raw: pd.DataFrame, params: Params, label: str,
                          ids: pd.Series) -> pd.DataFrame:
    """Blank cells of a column take their reason from another column's text on the same row (``reason_from``).

    A trial file records why an outcome is missing in a column of its own (ADaM's DCSREAS,
    the reason for discontinuation); its blank outcome cells would otherwise all read 'blank'.
    Only blank cells change: a marker or reason code in the cell itself keeps its reason, and
    a row whose reason column is blank (or a missing marker) stays 'blank'.
    """
    for column, section in params.missing.columns.items():
        source = section.reason_from
        if source is None or column not in reasons.columns:
            continue
        where = f"{params.label}: missing.columns.{column}.reason_from"
        if source not in raw.columns:
            raise InputError(f"{where}: '{one_line(source, 80)}' is not a column of the data"
                             f"{did_you_mean(source, list(raw.columns))} (the id column and data.ignore columns "
                             "cannot give reasons)")
        markers = marker_table(params, source)
        texts = raw[source].astype(object).where(raw[source].notna(), "").map(lambda v: str(v).strip())
        # each distinct text is looked up once (a marker's reason is no reason for another column)
        distinct = sorted(t for t in set(texts) if t != "" and markers.reason_for(t) is None)
        usable = texts.isin(distinct).to_numpy()
        if len(distinct) > MAX_REASON_TEXTS:
            raise InputError(f"{where}: '{one_line(source, 80)}' holds {len(distinct)} distinct texts (at most "
                             f"{MAX_REASON_TEXTS} reasons); it looks like free text: give a column of coded reasons")
        too_long = [t for t in distinct if len(t) > 200]
        if too_long:
            raise InputError(f"{where}: '{one_line(source, 80)}' holds a text of {len(too_long[0])} characters; "
                             "reasons are at most 200")
        blank = (reasons[column].astype(object) == BLANK).to_numpy()
        take = blank & usable
        for reserved, meaning in _RESERVED_REASONS.items():
            rows = np.flatnonzero(take & (texts == reserved).to_numpy())
            if len(rows):
                raise InputError(f"{where}: '{one_line(source, 80)}' holds '{reserved}' at {_rows_note(rows, ids)}, "
                                 f"the reason gapbook keeps for {meaning}; write that reason another way in the "
                                 f"file (e.g. '{reserved} (recorded)')")
        if take.any():
            values = reasons[column].astype(object).where(~take, texts)
            reasons[column] = pd.Categorical(values, categories=sorted(set(values.dropna())))
    return reasons


def read_study(path: Union[str, Path], *, id: Optional[str] = None,
               variables: Optional[Mapping[str, Mapping[str, Any]]] = None,
               missing: Optional[Mapping[str, Any]] = None, **data: Any) -> Study:
    """Read a study file without a params file, for a one-off question in a notebook.

    The options are the params file's sections written as keyword arguments, checked by the
    same schema (an error names the section key, e.g. ``data.id`` for ``id``).

    Parameters
    ----------
    path : str or Path
        The data file (CSV, TSV, Excel or Parquet); a relative path is taken from the working
        folder.
    id : str, optional
        The participant identifier column, kept apart from the variables.
    variables : mapping, optional
        Per column, as the params' ``variables`` section: ``type``, ``levels``, ``range``,
        ``applies_if``, ``label``.
    missing : mapping, optional
        As the params' ``missing`` section: ``markers``, ``reasons`` (code -> label) and
        per-column ``columns``.
    **data
        Other keys of the params' ``data`` section: ``format``, ``sheet``, ``encoding``,
        ``delimiter``, ``decimal``, ``thousands``, ``ignore``, ``keep_rows`` (the rows used).

    Returns
    -------
    Study
        As :func:`load_study` gives it: values, reasons, types and the range checks.
    """
    section: Dict[str, Any] = {"path": str(Path(path).expanduser().resolve()), **data}
    if id is not None:
        section["id"] = id
    params = Params.from_dict({"data": section, "variables": dict(variables or {}), "missing": dict(missing or {})})
    return load_study(params)


def check_expression_columns(params: Params, columns: List[str]) -> Dict[str, Any]:
    """Every column an ``applies_if`` or ``passive`` expression names exists; returns the parsed conditions.

    (The expressions' grammar was checked when the params were read; this is the part that
    needs the data's columns, so ``check`` finds what ``run`` would refuse.)

    Parameters
    ----------
    params : Params
        The params whose ``applies_if`` and ``passive`` expressions are checked.
    columns : list of str
        The data's columns.

    Returns
    -------
    dict
        {variable: parsed ``applies_if`` expression}.
    """
    conditions = {}
    for name, spec in params.variables.items():
        if spec.applies_if:
            conditions[name] = parse_expression(spec.applies_if, where=f"{params.label}: variables.{name}.applies_if",
                                                kind=CONDITION, columns=columns)
    for name, formula in params.imputation.passive.items():
        where = f"{params.label}: imputation.passive.{name}"
        if name not in columns:
            raise InputError(f"{where}: '{one_line(name, 80)}' is not a column of the data{did_you_mean(name, columns)}")
        parsed = parse_expression(formula, where=where, kind="value", columns=columns)
        if name in parsed.columns:
            raise InputError(f"{where}: the formula uses '{one_line(name, 80)}' itself")
    return conditions


def _refuse_markers_that_are_levels(params: Params) -> None:
    """A missing marker that is also a declared level would blank real answers (e.g. marker 'no', levels yes/no)."""
    for name, spec in params.variables.items():
        if not spec.levels:
            continue
        table = marker_table(params, name)
        for level in spec.levels:
            if table.reason_for(level) is not None and not _is_empty(level):
                origin = table.origin_of(level)
                raise InputError(f"{params.label}: '{one_line(level, 60)}' is both a missing marker ({origin}) and a "
                                 f"declared level of '{one_line(name, 60)}' (variables.{name}.levels); remove it from one "
                                 f"of them (missing.columns.{name}.use_global: false keeps global markers away "
                                 "from this column)")


def check_declared_columns(params: Params, columns: Sequence[str], label: str) -> None:
    """Every column the params name (data.id or design.subject, variables, missing.columns) must be in the file.

    Parameters
    ----------
    params : Params
        The params naming columns.
    columns : sequence of str
        The file's columns.
    label : str
        The file's name for the message (exit 2 naming the key and the nearest column).
    """
    id_column = params.subject_column or params.data.id
    if id_column is not None and id_column not in columns:
        key = "design.subject" if params.design is not None and params.design.subject else "data.id"
        raise InputError(f"{params.label}: {key} '{id_column}' is not a column of {label}"
                         f"{did_you_mean(id_column, columns)}")
    columns = [c for c in columns if c != id_column]  # the id is not a variable
    for name in params.variables:
        if name not in columns:
            raise InputError(f"{params.label}: variables.{name} is not a column of {label}"
                             f"{did_you_mean(name, columns)}")
    for name in params.missing.columns:
        if name not in columns:
            raise InputError(f"{params.label}: missing.columns.{name} is not a column of {label}"
                             f"{did_you_mean(name, columns)}")


def clean_id(value: Any) -> Any:
    """An id cell as intake keeps it: None when empty, text stripped, numbers as they are.

    Parameters
    ----------
    value : object
        A raw id cell.

    Returns
    -------
    object
        None, stripped text or the number.
    """
    return None if _is_empty(value) else (str(value).strip() if isinstance(value, str) else value)


def blank_id_error(label: str, id_column: str, row: int) -> InputError:
    """The error for a row without an id (exit 2, naming the file, column and row).

    Parameters
    ----------
    label : str
        The data file's name.
    id_column : str
        The id column.
    row : int
        The 0-based row (named 1-based).

    Returns
    -------
    InputError
    """
    return InputError(f"{label}: id column '{id_column}' is empty at data row {row + 1}; every row needs an id")


def duplicate_id_error(label: str, id_column: str, first: Any, rows: Sequence[int]) -> InputError:
    """The error for an id given to more than one row (exit 2, naming the rows).

    Parameters
    ----------
    label : str
        The data file's name.
    id_column : str
        The id column.
    first : object
        The repeated id.
    rows : sequence of int
        The 0-based rows holding it (the first three are named).

    Returns
    -------
    InputError
    """
    where = ", ".join(str(int(r) + 1) for r in rows[:3])
    return InputError(f"{label}: duplicate id '{one_line(first, 80)}' in column '{id_column}' (data rows {where}); "
                      "ids must be unique (a file with several rows per participant, one per parameter or visit "
                      "as in ADaM, needs data.keep_rows to choose one row each, or a design section for visits)")


def _split_ids(raw: pd.DataFrame, params: Params, label: str, file_rows: np.ndarray
               ) -> Tuple[pd.Series, Optional[str], pd.DataFrame]:
    id_column = params.data.id
    # A follow-up study's participant column is its id; in the long layout it repeats, once per visit.
    repeats = params.design is not None and params.design.layout == "long"
    if params.design is not None:
        id_column = params.subject_column
    # The ids' index is each row's 0-based file row (data.keep_rows leaves gaps), which messages name;
    # without an id column a row's id is its file row number.
    if id_column is None:
        return pd.Series(file_rows + 1, index=pd.Index(file_rows), name="row"), None, raw
    ids = pd.Series(raw[id_column].map(clean_id).to_numpy(), index=pd.Index(file_rows))
    blank = np.flatnonzero(ids.isna().to_numpy())
    if len(blank):
        if repeats:
            raise InputError(f"{label}: the subject column '{id_column}' (design.subject) is empty at data row "
                             f"{int(file_rows[blank[0]]) + 1}; every row needs its participant")
        raise blank_id_error(label, id_column, int(file_rows[blank[0]]))
    if not pd.api.types.is_numeric_dtype(ids.dtype):
        nul = np.flatnonzero(ids.astype(str).str.contains("\x00", regex=False).to_numpy())
        if len(nul):
            raise nul_error(label, id_column, ids.iloc[nul[0]], _rows_note(nul[:1], ids))
    dup = ids.duplicated(keep=False).to_numpy() if not repeats else np.zeros(len(ids), dtype=bool)
    if dup.any():
        rows = np.flatnonzero(dup)
        first = ids.iloc[rows[0]]
        raise duplicate_id_error(label, id_column, first, file_rows[np.flatnonzero((ids == first).to_numpy())])
    return ids.rename(id_column), id_column, raw.drop(columns=[id_column])


@dataclass(frozen=True)
class PlainNumbers:
    """Cells of a column that hold plain numbers and no marker, summarised rather than listed.

    An engine that reads a file in SQL (``data.engine: duckdb``) lists only the cells that
    need the marker logic and counts the plain numbers apart (``1.5``, ``-3e2``: digits,
    sign, point and exponent only, which read the same in any engine). ``values`` are their
    distinct values in increasing order: all of them when ``complete``, otherwise a sample
    that includes the smallest and the largest.
    """

    n_cells: int = 0
    values: Tuple[float, ...] = ()
    complete: bool = True


@dataclass(frozen=True)
class DistinctCells:
    """One column's distinct raw cells and how many cells hold each.

    ``uniques`` are the raw values as read (NA cells of typed files left out); ``plain``
    summarises further cells not listed in ``uniques`` (the pandas path lists every cell's
    value and leaves it empty).
    """

    uniques: List[Any]
    counts: np.ndarray
    plain: PlainNumbers = PlainNumbers()


@dataclass(frozen=True)
class ColumnDecision:
    """What intake makes of each distinct raw value of one column.

    ``reasons[i]`` is the missing reason of ``uniques[i]`` (None: the cell holds a value);
    ``na_reason`` that of NA cells. Numeric columns: ``numbers[i]`` is the value (NaN where
    missing); text columns: ``codes[i]`` indexes ``categories`` (-1 where missing).
    """

    reasons: Tuple[Optional[str], ...]
    na_reason: str
    numbers: Optional[np.ndarray]
    codes: Optional[np.ndarray]
    categories: Tuple[str, ...]
    info: VariableInfo

    @property
    def reason_labels(self) -> List[str]:
        """The reasons that occur among the listed values, sorted."""
        return sorted({r for r in self.reasons if r is not None})


class EveryValueNeeded(Exception):
    """A column summarised as plain numbers turned out to be text: list every distinct cell and decide again."""


# locate(indices) -> (the index among them whose value occurs first in the file, a note naming the
# first rows that hold it): error messages name rows, which only the caller can find.
Locate = Callable[[Sequence[int]], Tuple[int, str]]


def decide_column(cells: DistinctCells, column: str, spec: VariableSpec, markers: MarkerTable, locate: Locate,
                  label: str, warnings: Optional[List[str]] = None) -> ColumnDecision:
    """Classify each distinct raw value of a column: missing (with its reason) or a value, and the column's type.

    The decision depends only on the distinct values and their counts, so every engine
    (pandas over rows, SQL over a file) makes the same one.

    Parameters
    ----------
    cells : the column's distinct raw values with their counts.
    column, spec : the column's name and its params entry.
    markers : its markers and reason codes (:func:`marker_table`).
    locate : finds the first rows holding given values (for error messages).
    label : the data file's name (for error messages).
    warnings : list that warnings are appended to.

    Returns
    -------
    ColumnDecision
    """
    warnings = [] if warnings is None else warnings
    uniques = list(cells.uniques)
    _refuse_nul(uniques, column, locate, label)
    unique_reason = [markers.reason_for(u) for u in uniques]
    # NA cells of typed files (None/NaN) are blank.
    na_reason = markers.text.get("", BLANK)
    kept = [i for i, r in enumerate(unique_reason) if r is None]

    numbers = {i: markers.number(uniques[i]) for i in kept}
    all_numeric = all(n is not None for n in numbers.values())
    declared_type = spec.type
    if not all_numeric and declared_type not in CATEGORICAL_TYPES:
        _refuse_formatted_numbers(cells, kept, numbers, column, locate, label, markers.number_format)
    if all_numeric and (kept or cells.plain.n_cells):
        _refuse_codes_among_values(cells, kept, numbers, unique_reason, markers, column, label)
    _warn_dominant_markers(cells, kept, unique_reason, markers, column, label, warnings)
    if declared_type is None and not all_numeric:
        _refuse_dates(cells, kept, numbers, column, label)
    if declared_type in NUMERIC_TYPES and not all_numeric:
        bad, note = locate([i for i in kept if numbers[i] is None])
        raise InputError(f"{label}: column '{column}' is declared {declared_type} but holds the text "
                         f"'{uniques[bad]}' at {note}; declare it as a missing marker "
                         f"(missing.markers or missing.columns.{column}.markers) or correct the data")
    if declared_type is None and not all_numeric:
        _refuse_stray_text(cells, kept, numbers, column, locate, label)
    if not all_numeric and cells.plain.n_cells:
        raise EveryValueNeeded(column)  # a text column's numbers become categories as written

    levels = tuple(spec.levels) if spec.levels is not None else None
    free_text = sentences = False
    if all_numeric:
        value_of = np.array([numbers[i] if unique_reason[i] is None else np.nan for i in range(len(uniques))],
                            dtype=float)
        # + 0.0 makes -0.0 and 0.0 one value whatever order they come in (np.unique keeps either).
        observed = pd.Series(np.unique(np.concatenate([value_of[~np.isnan(value_of)],
                                                       np.asarray(cells.plain.values, dtype=float)]) + 0.0),
                             dtype=float, name=column)
        numeric_storage = True
        codes, categories = None, ()
        if levels is not None:
            allowed = {_number(x) for x in levels}
            if None in allowed:
                raise InputError(f"variables.{column}.levels: column '{column}' holds numbers, so its levels "
                                 f"must be numbers (got {list(levels)})")
            outside = [i for i in kept if value_of[i] not in allowed]
            if outside:
                first, note = locate(outside)
                raise InputError(f"{label}: column '{column}' holds {value_of[first]:g} at {note}, not "
                                 f"among variables.{column}.levels; add it to levels or declare it a missing marker")
            if not set(cells.plain.values) <= allowed:
                raise EveryValueNeeded(column)  # the caller lists every value where levels are declared
    else:
        value_of = None
        text_lookup = [str(uniques[i]).strip() if unique_reason[i] is None else None for i in range(len(uniques))]
        if levels is not None:
            canonical = {_text_key(x): str(x) for x in levels}
            outside = [i for i, text in enumerate(text_lookup) if text is not None and _text_key(text) not in canonical]
            if outside:
                first, note = locate(outside)
                text = text_lookup[first]
                raise InputError(f"{label}: column '{column}' holds '{one_line(text, 80)}' at {note}, which is "
                                 f"not among variables.{column}.levels ({', '.join(map(str, levels))})"
                                 f"{did_you_mean(text, canonical.values())}; add it to levels or declare it a "
                                 "missing marker")
            text_lookup = [None if t is None else canonical[_text_key(t)] for t in text_lookup]
            categories = tuple(str(x) for x in levels)
        else:
            categories = tuple(sorted({t for t in text_lookup if t is not None}))
            if declared_type is None and _looks_like_free_text(cells, text_lookup, categories):
                # A free-text column keeps only whether each cell was answered; its texts go no further.
                free_text = True
                sentences = _reads_as_sentences(categories)
                n_distinct = len(categories)
                text_lookup = [None if t is None else FREE_TEXT_LEVEL for t in text_lookup]
                categories = (FREE_TEXT_LEVEL,)
        cat_index = {c: k for k, c in enumerate(categories)}
        codes = np.array([-1 if t is None else cat_index[t] for t in text_lookup], dtype=np.int64)
        present = sorted({int(c) for c in codes if c >= 0})
        observed = pd.Series(pd.Categorical.from_codes(present, categories=list(categories),
                                                       ordered=declared_type == "ordinal"), name=column)
        numeric_storage = False

    if free_text:
        what = "sentences, read as free text" if sentences else "free text or identifiers"
        why = (f"{what} ({n_distinct} distinct texts): values are not shown or analysed, only "
               "whether each is missing; declare its type and levels to use it")
        info = VariableInfo(name=column, type="nominal", declared=False, reason=why, levels=(FREE_TEXT_LEVEL,),
                            numeric_storage=False, free_text=True, n_distinct=n_distinct)
        return ColumnDecision(reasons=tuple(unique_reason), na_reason=na_reason, numbers=None, codes=codes,
                              categories=categories, info=info)
    if declared_type is None:
        # infer_type looks only at the distinct observed values, which is what ``observed`` holds.
        vtype, why = infer_type(observed)
        declared = False
    else:
        vtype, why, declared = declared_type, "declared in params", True
    if vtype == "binary":
        n_levels = len(levels) if levels is not None else len(observed)
        if n_levels > 2:
            raise InputError(f"{label}: column '{column}' is declared binary but has {n_levels} distinct values; "
                             "declare it nominal or ordinal, or mark the extra values as missing")
    if levels is None and vtype in CATEGORICAL_TYPES:
        levels = categories if not numeric_storage else tuple(observed.to_numpy())
    info = VariableInfo(name=column, type=vtype, declared=declared, reason=why, levels=levels, label=spec.label,
                        range=spec.range, numeric_storage=numeric_storage)
    return ColumnDecision(reasons=tuple(unique_reason), na_reason=na_reason, numbers=value_of, codes=codes,
                          categories=categories, info=info)


def _normalise_column(raw: pd.Series, column: str, spec: VariableSpec, markers: MarkerTable,
                      ids: pd.Series, label: str,
                      warnings: Optional[List[str]] = None) -> Tuple[pd.Series, pd.Series, VariableInfo]:
    codes, uniques = pd.factorize(raw, use_na_sentinel=True)
    counts = np.bincount(codes[codes >= 0], minlength=len(uniques))

    def locate(indices: Sequence[int]) -> Tuple[int, str]:
        # factorize numbers values in order of first appearance: the smallest index occurs first.
        first = min(indices)
        return first, _rows_note(np.flatnonzero(codes == first), ids)

    decision = decide_column(DistinctCells(list(uniques), counts), column, spec, markers, locate, label, warnings)
    # factorize's NA sentinel (-1) covers None/NaN cells of typed files: the extra last entry stands for them.
    reason_codes = np.where(codes < 0, len(uniques), codes)
    na_reason = decision.na_reason
    reason_labels = sorted(set(decision.reason_labels) | ({na_reason} if (codes < 0).any() else set()))
    label_index = {r: k for k, r in enumerate(reason_labels)}
    lookup = np.array([-1 if r is None else label_index[r] for r in decision.reasons]
                      + [label_index.get(na_reason, -1)], dtype=np.int64)
    reason_cat = pd.Categorical.from_codes(lookup[reason_codes], categories=reason_labels) if reason_labels \
        else pd.Categorical.from_codes(np.full(len(raw), -1), categories=[])
    if decision.numbers is not None:
        value = pd.Series(np.append(decision.numbers, np.nan)[reason_codes], index=raw.index, name=column)
    else:
        value = pd.Series(pd.Categorical.from_codes(np.append(decision.codes, -1)[reason_codes],
                                                    categories=list(decision.categories),
                                                    ordered=spec.type == "ordinal"), index=raw.index, name=column)
    return value, pd.Series(reason_cat, index=raw.index, name=column), decision.info


def nul_error(label: str, column: str, value: Any, note: str) -> InputError:
    """The error for a cell holding a NUL character, whichever engine and column (ids too) found it.

    Parameters
    ----------
    label : str
        The data file.
    column : str
        The column.
    value : object
        The cell.
    note : str
        The rows that hold it (:func:`rows_note`).

    Returns
    -------
    InputError
    """
    return InputError(f"{label}: column '{one_line(column, 80)}' holds '{one_line(value, 80)}' at {note}, with a NUL "
                      "character (\\x00), which is no text: remove it from the file (or export the file again)")


def _refuse_nul(uniques: Sequence[Any], column: str, locate: Locate, label: str) -> None:
    """A cell holding a NUL character is a damaged export, not a text to keep or a level (and no SQL text holds it)."""
    found = [i for i, u in enumerate(uniques) if isinstance(u, str) and "\x00" in u]
    if found:
        first, note = locate(found)
        raise nul_error(label, column, uniques[first], note)


def _refuse_stray_text(cells: DistinctCells, kept: List[int], numbers: Dict[int, Optional[float]], column: str,
                       locate: Locate, label: str) -> None:
    """An undeclared column that is mostly numbers but holds some text is an undeclared marker, not a category.

    Treating such a column as nominal would silently turn a measurement into hundreds of
    levels; the user must say whether the text is a missing marker (common practice, no source).
    """
    counts = cells.counts
    numeric_cells = sum(int(counts[i]) for i in kept if numbers[i] is not None) + cells.plain.n_cells
    text = [i for i in kept if numbers[i] is None]
    text_cells = sum(int(counts[i]) for i in text)
    if numeric_cells > text_cells:
        most = max(int(counts[i]) for i in text)
        worst, note = locate([i for i in text if counts[i] == most])
        raise InputError(f"{label}: column '{column}' holds numbers and the text '{one_line(cells.uniques[worst], 80)}' at "
                         f"{note}; declare the text a missing marker (missing.markers or "
                         f"missing.columns.{column}.markers) or declare variables.{column}.type")


def _with_reason(reasons: pd.Series, where: np.ndarray, reason: str) -> pd.Series:
    cat = reasons.cat.add_categories([reason]) if reason not in reasons.cat.categories else reasons
    cat = cat.copy()
    cat[where] = reason
    return cat


@dataclass(frozen=True)
class ConditionCounts:
    """How an ``applies_if`` condition came out over the rows: what its warnings are built from.

    ``n_known`` rows where it is true or false (not unknown), ``n_true`` and ``n_false`` of
    them; ``n_recorded`` cells of the variable holding a value as read, ``n_recorded_false``
    of them in rows where the condition is false.
    """

    n_rows: int
    n_known: int
    n_true: int
    n_false: int
    n_recorded: int
    n_recorded_false: int


def applicability_warnings(label: str, name: str, text: str, counts: ConditionCounts,
                           rows_note_of_recorded: Callable[[], str]) -> List[str]:
    """The warnings about one ``applies_if`` condition (true for no row or every row, values set aside).

    Parameters
    ----------
    label : the params file, for the messages.
    name : the variable the condition belongs to.
    text : the condition as written.
    counts : how the condition came out (:class:`ConditionCounts`).
    rows_note_of_recorded : gives the note naming the first rows that hold a value where the
        condition is false (called only when that warning is given).

    Returns
    -------
    list of str
    """
    key = f"variables.{name}.applies_if"
    shown = one_line(text, 80)
    out = []
    if counts.n_known and not counts.n_true:
        out.append(f"{label}: {key} '{shown}' is true for no row: every value of '{name}' is treated as not "
                   f"applicable ({counts.n_recorded} recorded values set aside); check the condition's names "
                   "and levels")
    elif counts.n_known == counts.n_rows and not counts.n_false:
        out.append(f"{label}: {key} '{shown}' is true for every row: no value of '{name}' is marked not applicable")
    if counts.n_recorded_false and counts.n_true:
        out.append(f"{label}: {key} '{shown}' is false for {counts.n_recorded_false} rows that hold a value of "
                   f"'{name}' ({rows_note_of_recorded()}); those values are treated as not applicable")
    return out


def _apply_applicability(data: pd.DataFrame, reasons: pd.DataFrame, params: Params, label: str,
                         conditions: Optional[Mapping[str, Any]] = None, ids: Optional[pd.Series] = None,
                         warnings: Optional[List[str]] = None) -> Tuple[pd.DataFrame, pd.DataFrame]:
    """Mark cells whose ``applies_if`` condition is false as not applicable (not missing).

    Conditions are computed by :mod:`gapbook.expressions` on the values as read (before any
    cell is marked not applicable, so their order does not matter). Where a condition is
    unknown (an input is missing and the rest does not decide it) the cell stays as it is.
    A condition true for no row or for every row, and values recorded where the condition is
    false, are reported as warnings.
    """
    if conditions is None:
        conditions = check_expression_columns(params, list(data.columns))
    if not conditions:
        return data, reasons
    warnings = [] if warnings is None else warnings
    ids = pd.Series(np.arange(1, len(data) + 1)) if ids is None else ids
    as_read = data
    data, reasons = data.copy(), reasons.copy()
    for name, expression in conditions.items():
        result = expression.evaluate(as_read)
        not_applicable = result == 0
        recorded = not_applicable & as_read[name].notna().to_numpy()
        rows = np.flatnonzero(recorded)
        warnings.extend(applicability_warnings(
            params.label, name, expression.text, ConditionCounts(
                n_rows=len(result), n_known=int((~np.isnan(result)).sum()), n_true=int((result == 1).sum()),
                n_false=int(not_applicable.sum()), n_recorded=int(as_read[name].notna().sum()),
                n_recorded_false=len(rows)),
            lambda: _rows_note(rows, ids)))
        if not_applicable.any():
            reasons[name] = _with_reason(reasons[name], not_applicable, NOT_APPLICABLE)
            data[name] = data[name].mask(not_applicable)
    return data, reasons


# ---------------------------------------------------------------------------
# values that would lose their meaning (issue: a code among real values, numbers written
# with other marks, dates, free text)

_NA_WORDS = {"", "na", "n/a", "nan", "null", "none", ".", "?", "-", "unknown", "missing", "not known", "nk", "nd",
             "n.d.", "not done", "not available", "dk", "don't know", "refused", "prefer not to say"}


def _refuse_codes_among_values(cells: DistinctCells, kept: List[int], numbers: Dict[int, Optional[float]],
                               unique_reason: List[Optional[str]], markers: MarkerTable, column: str,
                               label: str) -> None:
    """A numeric missing code that lies among a column's real values could be a real value.

    E.g. a global ``60: refused`` would blank every real age of 60. A code declared for the
    column itself (``missing.columns.<x>``) is trusted; a global one inside the range of
    the column's other values stops with the two ways to say what is meant.
    """
    uniques = cells.uniques
    real = np.array([numbers[i] for i in kept] + list(cells.plain.values), dtype=float)
    if real.size < 2:
        return
    lo, hi = float(real.min()), float(real.max())
    own = f"missing.columns.{column}."
    for i, reason in enumerate(unique_reason):
        if reason is None or _is_empty(uniques[i]):
            continue
        number = markers.number(uniques[i])
        if number is None or not lo <= number <= hi:
            continue
        origin = markers.origin_of(uniques[i])
        if origin.startswith(own):
            continue
        n = int(cells.counts[i])
        raise InputError(f"{label}: the missing code {number:g} ('{reason}', {origin}) lies among the real values "
                         f"of '{column}' ({lo:g} to {hi:g}), so its {n} cells could be real values; if {number:g} is "
                         f"a code in '{column}', declare it there (missing.columns.{column}.reasons), otherwise keep the "
                         f"global codes away from it (missing.columns.{column}.use_global: false)")


def _warn_dominant_markers(cells: DistinctCells, kept: List[int], unique_reason: List[Optional[str]],
                           markers: MarkerTable, column: str, label: str, warnings: List[str]) -> None:
    """A text marker that blanks most of a text column may be one of its answers (e.g. 'no')."""
    uniques, counts = cells.uniques, cells.counts
    filled = sum(int(counts[i]) for i, u in enumerate(uniques) if not _is_empty(u)) + cells.plain.n_cells
    if filled == 0 or not any(markers.number(uniques[i]) is None for i in kept):
        return
    for i, reason in enumerate(unique_reason):
        if reason is None or not isinstance(uniques[i], str) or _text_key(uniques[i]) in _NA_WORDS:
            continue
        if markers.number(uniques[i]) is None and counts[i] > filled / 2:
            warnings.append(f"{label}: the missing marker '{one_line(uniques[i], 40)}' ({markers.origin_of(uniques[i])}) "
                            f"makes {100 * counts[i] / filled:.0f}% of '{column}' missing ({int(counts[i])} cells); if "
                            f"it is an answer, remove it (or set missing.columns.{column}.use_global: false)")


_NUMBER_PATTERNS = {
    "decimal comma": re.compile(r"[+-]?\d*,\d+"),
    "comma thousands": re.compile(r"[+-]?\d{1,3}(,\d{3})+(\.\d+)?"),
    "dot thousands": re.compile(r"[+-]?\d{1,3}(\.\d{3})+(,\d+)?"),
    "space thousands": re.compile(r"[+-]?\d{1,3}( \d{3})+([.,]\d+)?"),
    "apostrophe thousands": re.compile(r"[+-]?\d{1,3}('\d{3})+(\.\d+)?"),
    "decimal point": re.compile(r"[+-]?\d*\.\d+"),
}


def _refuse_formatted_numbers(cells: DistinctCells, kept: List[int], numbers: Dict[int, Optional[float]],
                              column: str, locate: Locate, label: str, number_format: NumberFormat) -> None:
    """Numbers written with a decimal comma or thousands separators are numbers, not categories: say what to set."""
    uniques = cells.uniques
    text = [str(uniques[i]).strip() for i in kept if numbers[i] is None]
    if not text:
        return
    kinds = []
    for value in text:
        matched = [k for k, pattern in _NUMBER_PATTERNS.items() if pattern.fullmatch(value)]
        if matched:
            kinds.append(matched)
    if not kinds or len(kinds) < len(text) / 2:
        return  # mostly real text: the stray-text and type rules decide
    text = [v for v in text if any(p.fullmatch(v) for p in _NUMBER_PATTERNS.values())]
    example = text[0]
    if number_format.decimal == "," and all("decimal point" in k for k in kinds):
        advice = "data.decimal is ',' but they use a decimal point; remove data.decimal (or fix the file)"
    elif any(k == ["decimal comma"] or ("decimal comma" in k and "comma thousands" not in k) for k in kinds):
        dots = any("dot thousands" in k for k in kinds)
        advice = "set data.decimal: ','" + (" and data.thousands: '.'" if dots else "") + \
                 " (a comma-decimal CSV is usually ';'-delimited: data.delimiter: ';')"
    elif all("comma thousands" in k for k in kinds):
        advice = ("set data.thousands: ',' if the comma separates thousands, or data.decimal: ',' if it is the "
                  "decimal mark")
    elif all("space thousands" in k for k in kinds):
        advice = "set data.thousands: ' '"
    elif all("apostrophe thousands" in k for k in kinds):
        advice = "set data.thousands: \"'\""
    elif all("dot thousands" in k for k in kinds):
        advice = "set data.thousands: '.' (and data.decimal: ',')"
    else:
        return
    _, note = locate([next(i for i in kept if str(uniques[i]).strip() == example)])
    raise InputError(f"{label}: column '{column}' holds numbers written like '{one_line(example, 40)}' "
                     f"({note}), which would be read as text; {advice}")


_TIME = r"([ T]\d{1,2}:\d{2}(:\d{2}(\.\d+)?)?\s*(Z|[+-]\d{2}:?\d{2}|[AaPp][Mm])?)?"
_MONTH = r"(jan|feb|mar|apr|may|jun|jul|aug|sep|sept|oct|nov|dec)[a-z]*"
_DATE_PATTERNS = [re.compile(p + _TIME, re.IGNORECASE) for p in (
    r"\d{4}-\d{1,2}-\d{1,2}",                    # 2024-03-01 (ISO 8601)
    r"\d{4}/\d{1,2}/\d{1,2}",                    # 2024/03/01
    r"\d{1,2}[/.-]\d{1,2}[/.-](\d{4}|\d{2})",     # 01/03/2024, 03-01-2024, 01.03.24
    r"\d{1,2}[-/ ]?" + _MONTH + r"[-/ ]?\d{2,4}",  # 01JAN2024, 1-Jan-2024, 01 Jan 2024
    _MONTH + r"\.? \d{1,2},? \d{4}",              # Jan 1, 2024
    r"\d{8}T\d{4,6}",                           # 20240301T0830 (ISO basic)
)]


def _is_date(value: Any) -> bool:
    import datetime as _dt

    if isinstance(value, (_dt.date, _dt.datetime, pd.Timestamp, np.datetime64)):
        return True
    text = str(value).strip()
    return any(pattern.fullmatch(text) for pattern in _DATE_PATTERNS)


def _refuse_dates(cells: DistinctCells, kept: List[int], numbers: Dict[int, Optional[float]], column: str,
                  label: str) -> None:
    """An undeclared column of dates is refused with what to do, never read as a many-level category.

    gapbook analyses numbers and categories; read as categories, dates would be compared
    level by level and written into the record as levels (common practice, no source).
    """
    uniques = cells.uniques
    text = [i for i in kept if numbers[i] is None]
    if not text or not all(_is_date(uniques[i]) for i in text):
        return
    example = str(uniques[text[0]]).strip()
    raise InputError(f"{label}: column '{column}' holds dates (e.g. '{one_line(example, 40)}', {len(text)} distinct); "
                     "gapbook analyses numbers and categories, not dates: leave it out with data.ignore: "
                     f"['{column}'], or add a derived number to the data file (e.g. days since randomisation)")


def _looks_like_free_text(cells: DistinctCells, text_lookup: List[Optional[str]], categories: Sequence[str]) -> bool:
    """Many distinct texts making up most of the observed cells, or long texts: names, comments, identifiers."""
    if any(len(c) > FREE_TEXT_LONG_VALUE for c in categories) or _reads_as_sentences(categories):
        return True
    if len(categories) < FREE_TEXT_MIN_DISTINCT:
        return False
    observed = sum(int(n) for t, n in zip(text_lookup, cells.counts) if t is not None)
    return len(categories) > observed / 2


def _reads_as_sentences(categories: Sequence[str]) -> bool:
    """More than half of the distinct texts are sentences: several words, and a '.', '!' or '?' ending one."""
    sentences = sum(len(c.split()) >= FREE_TEXT_SENTENCE_WORDS and _SENTENCE_END.search(c) is not None
                    for c in categories)
    return sentences * 2 > len(categories)


RANGE_COLUMNS = ("variable", "id", "value", "rule", "action")
EXTREME_COLUMNS = ("variable", "id", "value", "median", "robust_z", "z_scale")
RANGE_ACTIONS = {"missing": "set missing (implausible)", "flag": "flagged, kept"}


def range_action(params: Params, name: str) -> str:
    """What intake does with a value outside the plausible range: 'missing' or 'flag'.

    Parameters
    ----------
    params : Params
        The params (the variable's ``out_of_range``, else ``missing.out_of_range``).
    name : str
        The variable.

    Returns
    -------
    str
        ``missing`` or ``flag``.
    """
    spec = params.variables.get(name)
    return spec.out_of_range if spec and spec.out_of_range else params.missing.out_of_range


def range_rule(lo: Optional[float], hi: Optional[float]) -> str:
    """The plausible range as a reader sees it, e.g. ``outside [18, 100]``.

    Parameters
    ----------
    lo, hi : float or None
        The bounds (None: open on that side).

    Returns
    -------
    str
    """
    return f"outside [{'' if lo is None else f'{lo:g}'}, {'' if hi is None else f'{hi:g}'}]"


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
        action = range_action(params, name)
        rule = range_rule(lo, hi)
        for r in np.flatnonzero(outside):
            rows.append({"variable": name, "id": ids.iloc[r], "value": column[r], "rule": rule,
                         "action": RANGE_ACTIONS[action]})
        if action == "missing":
            if not changed:
                data, reasons, changed = data.copy(), reasons.copy(), True
            data[name] = data[name].mask(outside)
            reasons[name] = _with_reason(reasons[name], outside, IMPLAUSIBLE)
    table = pd.DataFrame(rows, columns=list(RANGE_COLUMNS))
    return data, reasons, table


def too_large_error(label: str, column: str, value: float, note: str) -> InputError:
    """The one error for a value beyond :data:`MAX_MAGNITUDE` (or infinite), whichever engine found it.

    Parameters
    ----------
    label : str
        The data file.
    column : str
        The column.
    value : float
        The first such value in file order.
    note : str
        The rows that hold it (:func:`rows_note`).

    Returns
    -------
    InputError
    """
    if not math.isfinite(value):  # a typed file's inf (a division by zero upstream) is no code one can declare
        return InputError(f"{label}: column '{one_line(column, 80)}' holds {value:g} at {note}; an infinite value "
                          "cannot be analysed: correct it in the file, or leave the cell empty if it is unknown")
    return InputError(f"{label}: column '{one_line(column, 80)}' holds {value:g} at {note}; values beyond "
                      f"\u00b1{MAX_MAGNITUDE:g} cannot be analysed (their squares and products overflow a double): "
                      f"rescale the column (e.g. other units), or declare the value a missing marker if it is a code")


def _refuse_too_large(data: pd.DataFrame, infos: Mapping[str, VariableInfo], ids: pd.Series, label: str) -> None:
    """Stop on a value the stages cannot compute with (:data:`MAX_MAGNITUDE`), naming the column and rows.

    Checked on the values that stay values: a cell set missing by a range check or outside its
    ``applies_if`` condition is no longer analysed.
    """
    for name, info in infos.items():
        if not info.numeric_storage:
            continue
        column = data[name].to_numpy(dtype=float)
        with np.errstate(invalid="ignore"):
            beyond = np.flatnonzero(np.abs(column) > MAX_MAGNITUDE)
        if beyond.size:
            first = column[beyond[0]]
            rows = beyond[column[beyond] == first]
            raise too_large_error(label, name, float(first), _rows_note(rows, ids))


@dataclass(frozen=True)
class RobustCentre:
    """Where a variable's values sit and how far they spread, for the robust screen.

    ``median`` is on the variable's own scale. ``log`` is True for a variable whose observed
    values are all positive: its spread ``scale`` is then in natural-log units (the normal-
    consistent MAD of log values), otherwise in the variable's units.
    """

    median: float
    scale: float
    log: bool


def spread_values(values: np.ndarray, median: float, log: bool) -> np.ndarray:
    """Distance of each value from the median: |value - median|, or the fold max(value/median, median/value).

    The fold is the exponential of the distance on the log scale; it uses only division, so
    SQL gives the same floating point numbers (the log is taken afterwards, in numpy).
    """
    # A value near the smallest double (5e-324) makes median / value overflow: inf, as SQL gives it, without
    # numpy's warning printed raw beside check's output.
    with np.errstate(over="ignore"):
        if log:
            return np.maximum(values / median, median / values)
        return np.abs(values - median)


def robust_centre(median: float, spread_median: float, log: bool) -> Optional[RobustCentre]:
    """The centre from the median and the median of :func:`spread_values`; None when the spread is 0."""
    scale = MAD_TO_SD * float(np.log(spread_median) if log else spread_median)
    return RobustCentre(median=median, scale=scale, log=log) if scale > 0 else None


def robust_z(values: np.ndarray, centre: RobustCentre) -> np.ndarray:
    """Robust z of each value: signed distance from the median over the scale (on the log scale when ``log``)."""
    with np.errstate(invalid="ignore", divide="ignore"):
        if centre.log:
            return np.sign(values - centre.median) * np.log(spread_values(values, centre.median, True)) / centre.scale
        return (values - centre.median) / centre.scale


def robust_screen(data: pd.DataFrame, infos: Mapping[str, VariableInfo], ids: pd.Series,
                  cutoff: float) -> pd.DataFrame:
    """Values far from the median in robust SD units, listed for review and never changed.

    The robust z of a value is its distance from the median over the MAD scaled to the
    normal SD (Hampel 1974; Leys et al. 2013). Laboratory values and most other positive
    measurements are right-skewed (roughly log-normal): on their own scale the long right
    tail would be listed as "far from the rest" although nothing is wrong with it. So for a
    variable whose observed values are all positive the distance is taken on the log scale
    (the fold change from the median), where such a variable is near symmetric; a value
    100 times or 1/100 of the median still stands out. Variables with zero or negative
    values keep the variable's own scale. ``z_scale`` in the list says which was used.

    References
    ----------
    Hampel FR (1974). The influence curve and its role in robust estimation. JASA 69:383-393.
    Leys C et al. (2013). Detecting outliers: do not use standard deviation around the mean,
    use absolute deviation around the median. J Exp Soc Psychol 49:764-766.
    Limpert E, Stahel WA, Abbt M (2001). Log-normal distributions across the sciences: keys
    and clues. BioScience 51:341-352 (why positive measurements are compared as ratios;
    citation recalled from memory).
    """
    rows: List[Dict[str, Any]] = []
    for name, info in infos.items():
        if info.type not in NUMERIC_TYPES or not info.numeric_storage:
            continue
        column = data[name].to_numpy(dtype=float)
        observed = column[~np.isnan(column)]
        if observed.size < 3:
            continue
        # Values near the float limit (1e308) overflow to inf in the median's mean of two values
        # and in the spreads; inf is the result, as numpy gives it, without numpy's warning.
        with np.errstate(over="ignore", invalid="ignore"):
            median = float(np.median(observed))
            log = bool(observed.min() > 0)
            centre = robust_centre(median, float(np.median(spread_values(observed, median, log))), log)
        if centre is None:
            continue
        z = robust_z(column, centre)
        with np.errstate(invalid="ignore"):
            flagged = np.abs(z) > cutoff
        for r in np.flatnonzero(flagged):
            rows.append({"variable": name, "id": ids.iloc[r], "value": column[r], "median": median,
                         "robust_z": float(z[r]), "z_scale": "log" if log else "linear"})
    return pd.DataFrame(rows, columns=list(EXTREME_COLUMNS))
