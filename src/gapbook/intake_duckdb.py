"""Intake over a data file with DuckDB, without loading the file into pandas (``data.engine: duckdb``).

A registry extract of tens of millions of rows does not fit in memory as a pandas frame.
DuckDB (embedded, in this process, no server) reads the CSV or Parquet file in SQL, and
the audit's counts are computed there (:mod:`gapbook.audit_duckdb`). The results are the
same tables, byte for byte, as the pandas path gives on a file both can hold, because:

- every decision about a cell (value, marker, reason code, blank, not a number) is made by
  intake's own :func:`gapbook.intake.decide_column` on each column's *distinct* raw values;
  SQL only maps raw values to the decided reasons and counts them;
- cells that are plain numbers (``[+-]?(d+.?d*|.d+)([eE][+-]?d+)?``, nothing else) read
  the same in DuckDB and in Python (both round correctly), so they are not listed one by
  one unless they equal a marker; every other cell is listed as a distinct value;
- range checks, medians and robust z-values are computed in SQL with the same floating
  point operations as intake (medians exactly: DuckDB finds a window of values around
  the middle, and the middle values are read from it).

CSV and TSV files are first copied into a private temporary DuckDB database (in file
order, so row numbers are file rows); Parquet files are read in place.
"""
from __future__ import annotations

import codecs
import concurrent.futures
import contextlib
import os
import shutil
import tempfile
import weakref
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Dict, List, Mapping, Optional, Sequence, Tuple

import numpy as np
import pandas as pd

from .errors import InputError
from .expressions import Expression
from .expressions_sql import SqlColumn, compile_condition, layered_select
from .intake import (EXTREME_COLUMNS, IMPLAUSIBLE, MAX_MAGNITUDE, RANGE_ACTIONS, RANGE_COLUMNS, ColumnDecision, ConditionCounts,
                     DistinctCells, EveryValueNeeded, PlainNumbers, RobustCentre, VariableInfo, _format_of,
                     _refuse_markers_that_are_levels, _text_header, applicability_warnings, blank_id_error,
                     check_declared_columns, check_expression_columns, clean_id, decide_column, duplicate_id_error,
                     inferred_notes, marker_table, nul_error, range_action, range_rule, read_table, robust_centre, robust_z,
                     rows_note, sha256_of, spread_values, too_large_error, variables_table)
from .params import Params, VariableSpec
from .row_filter import RowsKept, decide_rows, filter_only_columns, ignored_when_read, keep_rows_expression
from .vocabulary import CATEGORICAL_TYPES, NOT_APPLICABLE, NUMERIC_TYPES

__all__ = ["WHITESPACE", "choose_engine", "ScannedColumn", "ScannedStudy", "scan_study"]

AUTO_DUCKDB_BYTES = 100 * 2**20  # data.engine auto: files larger than 100 MiB are read with DuckDB
MEMORY_LIMIT = "1GB"  # DuckDB spills to its private temporary folder beyond this
IDLE_MEMORY_LIMIT = "64MB"  # while Python works on fetched counts, DuckDB's cached pages are let go
PLAIN_NUMBER = r"[+-]?([0-9]+[.]?[0-9]*|[.][0-9]+)([eE][+-]?[0-9]+)?"
DISTINCT_LISTED = 1000  # an undeclared numeric column lists its distinct values up to this many
_APPROX_DISTINCT = 4 * DISTINCT_LISTED  # HyperLogLog estimates above this surely exceed DISTINCT_LISTED
ROW = '"__gapbook_row"'  # the file row (0-based) beside the file's own columns
_SAMPLE = 100_000  # rows sampled to guess the median windows
_SAMPLE_SEED = 20261202
_WINDOW = 0.01  # the median window spans the sample's quantiles 0.49 to 0.51
# The median's pass lists the median spread's windows too unless the sample holds more distinct values in the
# windows than this (values recorded to a few decimals repeat; a choice of ours, no source).
_SPREAD_LISTED = 1000
# What Python's str.strip() removes (every character whose isspace() is true); DuckDB's trim() is given the same.
WHITESPACE = ("\t\n\x0b\x0c\r\x1c\x1d\x1e\x1f \x85\xa0\u1680\u2000\u2001\u2002\u2003\u2004\u2005\u2006"
              "\u2007\u2008\u2009\u200a\u2028\u2029\u202f\u205f\u3000")
_NUMERIC_TYPES = ("BOOLEAN", "TINYINT", "SMALLINT", "INTEGER", "BIGINT", "UTINYINT", "USMALLINT", "UINTEGER",
                  "UBIGINT", "FLOAT", "DOUBLE")
_ENCODINGS = {"utf-8": "utf-8", "latin-1": "latin-1", "iso8859-1": "latin-1", "utf-16": "utf-16"}


def choose_engine(params: Params) -> Tuple[str, str]:
    """The engine that reads the params' data file, and why (one sentence for the page).

    ``data.engine: auto`` picks DuckDB for CSV, TSV and Parquet files larger than
    ``AUTO_DUCKDB_BYTES`` and pandas otherwise (``applies_if`` conditions are compiled to
    SQL, :mod:`gapbook.expressions_sql`).

    Parameters
    ----------
    params : the validated study params.

    Returns
    -------
    (engine, why): engine is ``"pandas"`` or ``"duckdb"``.
    """
    declared = params.data.engine
    path = params.data_path
    if declared == "pandas":
        return "pandas", "data.engine is pandas"
    borrowed = [name for name, section in params.missing.columns.items() if section.reason_from is not None]
    if borrowed:  # reasons taken from another column are read with pandas only
        if declared == "duckdb":
            raise InputError(f"{params.label}: missing.columns.{borrowed[0]}.reason_from is read with pandas only; "
                             "set data.engine: pandas (or auto)")
        return "pandas", f"data.engine auto: missing.columns.{borrowed[0]}.reason_from is read with pandas"
    if declared == "duckdb":
        _duckdb_format(params)
        return "duckdb", "data.engine is duckdb"
    size = path.stat().st_size if path.is_file() else 0
    if size <= AUTO_DUCKDB_BYTES:
        return "pandas", f"data.engine auto: the file ({size / 2**20:.1f} MiB) is not above {_mib(AUTO_DUCKDB_BYTES)}"
    try:
        _duckdb_format(params)
    except InputError:
        return "pandas", "data.engine auto: DuckDB does not read this file's format or text encoding"
    return "duckdb", f"data.engine auto: the file ({size / 2**20:.0f} MiB) is above {_mib(AUTO_DUCKDB_BYTES)}"


def _mib(size: int) -> str:
    return f"{size / 2**20:g} MiB"


def _duckdb_format(params: Params) -> str:
    fmt = _format_of(params.data_path, params.data.format)
    if fmt not in ("csv", "tsv", "parquet"):
        raise InputError(f"{params.label}: data.engine duckdb reads CSV, TSV and Parquet files, not {fmt}; "
                         "set data.engine to pandas")
    if fmt != "parquet" and _duckdb_encoding(params.data.encoding) is None:
        raise InputError(f"{params.label}: data.engine duckdb reads utf-8, utf-16 and latin-1 text, not "
                         f"{params.data.encoding}; set data.engine to pandas")
    if params.data.decimal != "." or params.data.thousands:
        raise InputError(f"{params.label}: data.engine duckdb reads numbers written with a decimal point and no "
                         "thousands separator; set data.engine to pandas")
    return fmt


def _duckdb_encoding(encoding: str) -> Optional[str]:
    return _ENCODINGS.get(codecs.lookup(encoding).name)


# ---------------------------------------------------------------------------
# SQL text: every value and name from a file or params enters SQL as a quoted literal

def quote_name(name: str) -> str:
    """A SQL identifier for any column name."""
    return '"' + str(name).replace('"', '""') + '"'


def literal(value: Any) -> str:
    """A SQL literal for a Python string or number (strings quoted, floats exact)."""
    if isinstance(value, str):
        if "\x00" in value:
            raise InputError("data.engine duckdb: a value holds a NUL character; set data.engine to pandas")
        return "'" + value.replace("'", "''") + "'"
    number = float(value)
    if np.isnan(number):
        return "'nan'::DOUBLE"
    if np.isinf(number):
        return "'inf'::DOUBLE" if number > 0 else "'-inf'::DOUBLE"
    return f"{number!r}::DOUBLE"


def _is_nan(number: str) -> str:
    """True where a DOUBLE is NaN.

    Not ``isnan()``: DuckDB 2.0 folds ``isnan(x)`` (and ``x = 'nan'``) of a Parquet column to
    false from the file's min/max statistics, which leave NaN out; ``isfinite`` and
    ``isinf`` are evaluated on the values.
    """
    return f"(NOT isfinite({number}) AND NOT isinf({number}))"


def _in_list(column: str, values: Sequence[Any]) -> str:
    if not values:
        return "false"
    return f"{column} IN ({', '.join(literal(v) for v in values)})"


# ---------------------------------------------------------------------------
# the scanned study

@dataclass(frozen=True)
class ScannedColumn:
    """One variable as SQL sees it: where its reasons and values come from, and what intake decided.

    ``reason_sql`` gives a reason code per row (-1 observed, otherwise an index into
    ``reason_labels``); ``value_sql`` the value of a numeric column (NULL where missing);
    ``code_sql`` the category code of a text column (NULL where missing). A typed number column
    (Parquet) also has ``observed_sql``, true exactly where its number as read ``x_<alias>`` is a
    value (before range checks and conditions), and where nothing else can set a cell missing or
    not applicable, ``missing_sql``, its missingness as the cheapest test on ``x_<alias>``, and
    (without NaN) ``reason_counts_sql``, one aggregate per reason code counting its cells from the
    number as read (what ``sum((r_<alias> = k)::BIGINT)`` counts, without the CASE chain).
    """

    name: str
    alias: str
    info: VariableInfo
    decision: ColumnDecision
    reason_labels: Tuple[str, ...]
    reason_sql: str
    value_sql: Optional[str]
    code_sql: Optional[str]
    observed_sql: Optional[str] = None
    missing_sql: Optional[str] = None
    reason_counts_sql: Optional[Tuple[str, ...]] = None

    def label_code(self, label: str) -> int:
        return self.reason_labels.index(label) if label in self.reason_labels else -2


@dataclass
class ScannedStudy:
    """A study file read by DuckDB: intake's decisions and review lists, and SQL over its rows.

    ``relation`` is a view with one row per data row: ``rn`` (0-based file row), ``id``,
    and per variable ``r_<alias>`` (reason code) and, where needed, ``v_<alias>`` (value) and
    ``k_<alias>`` (category code). Close it (or use it in a ``with`` block) to drop the
    temporary database.
    """

    connection: Any
    relation: str
    n_rows: int
    columns: Dict[str, ScannedColumn]
    id_column: Optional[str]
    range_issues: pd.DataFrame
    extreme_values: pd.DataFrame
    source: str
    sha256: str
    notes: Tuple[str, ...]
    warnings: Tuple[str, ...] = ()
    rows_kept: Optional[RowsKept] = None  # data.keep_rows: the condition, rows read and kept (None: every row)
    _cleanup: Any = field(default=None, repr=False)

    @property
    def variables(self) -> Dict[str, VariableInfo]:
        return {name: column.info for name, column in self.columns.items()}

    @property
    def types(self) -> Dict[str, str]:
        return {name: column.info.type for name, column in self.columns.items()}

    def variables_table(self) -> pd.DataFrame:
        return variables_table(self.variables)

    @contextlib.contextmanager
    def buffers_released(self):
        """While in this block DuckDB lets its cached pages go (its memory limit lowered), for work in Python.

        The pages of the decided rows stay in the private database file and are read again when
        needed; with millions of patterns the Python side then has the memory DuckDB held.
        """
        self.connection.execute(f"SET memory_limit = {literal(IDLE_MEMORY_LIMIT)}")
        try:
            yield self
        finally:
            self.connection.execute(f"SET memory_limit = {literal(MEMORY_LIMIT)}")

    def close(self) -> None:
        if self._cleanup is not None:
            self._cleanup()

    def __enter__(self) -> "ScannedStudy":
        return self

    def __exit__(self, *exc) -> None:
        self.close()


def _connect(workdir: str):
    import duckdb

    connection = duckdb.connect(os.path.join(workdir, "scan.duckdb"))
    connection.execute(f"SET memory_limit = {literal(MEMORY_LIMIT)}")
    connection.execute(f"SET temp_directory = {literal(os.path.join(workdir, 'spill'))}")
    connection.execute("SET preserve_insertion_order = true")
    return connection


_GLOB_CHARACTERS = frozenset("*?[]{}")


def _plain_link(path: Path, workdir: str, fmt: str) -> str:
    """A name for the data file that DuckDB reads as that one file: a link in the private folder.

    DuckDB reads a file name holding ``*``, ``?``, ``[...]`` or ``{...}`` as a pattern, so
    ``data/s[1].parquet`` would read ``data/s1.parquet`` and ``s*.csv`` every file it matches,
    while the record names and hashes the one file the params give. The link's own name holds none.
    """
    link = os.path.join(workdir, f"data.{fmt}")
    if _GLOB_CHARACTERS & set(link):
        raise InputError(f"{workdir}: the temporary folder's path holds one of {' '.join(sorted(_GLOB_CHARACTERS))}, "
                         "which DuckDB reads as a file pattern; set TMPDIR to a plain folder or data.engine to pandas")
    try:
        os.symlink(path.resolve(), link)
    except OSError as exc:
        raise InputError(f"{path}: cannot link the data file into DuckDB's temporary folder ({exc.strerror}); "
                         "set data.engine to pandas") from None
    return link


def _close(connection, workdir: str) -> None:
    try:
        connection.close()
    finally:
        shutil.rmtree(workdir, ignore_errors=True)


def scan_study(params: Params) -> ScannedStudy:
    """Read the params' data file with DuckDB and make intake's decisions, without a pandas frame of it.

    Parameters
    ----------
    params : the validated study params (``data.engine`` is not consulted here).

    Returns
    -------
    ScannedStudy with the same variable types, range issues, extreme values and notes as
    :func:`gapbook.intake.load_study` gives for that file.
    """
    import duckdb

    path = params.data_path
    fmt = _duckdb_format(params)
    # The header as the pandas path reads and checks it (names, ignore, unsafe names, duplicates).
    header, warnings = read_table(path, fmt, params.data.sheet, params.data.encoding,
                                  delimiter=params.data.delimiter, ignore=ignored_when_read(params), nrows=1)
    label = str(path)
    if warnings or "" in header.columns:
        raise InputError(f"{label}: a column has no name in the header row; data.engine duckdb needs every column "
                         "named: name it in the file, or set data.engine to pandas")
    keep_rows = keep_rows_expression(params, list(header.columns))
    filter_only = filter_only_columns(params)  # read for data.keep_rows only: no variables
    columns = [c for c in header.columns if c not in filter_only]
    check_declared_columns(params, columns, label)
    conditions = check_expression_columns(params, [c for c in columns if c != params.data.id])
    _refuse_markers_that_are_levels(params)
    workdir = tempfile.mkdtemp(prefix="gapbook-duckdb-")  # private (0700) folder for the database and spills
    connection = _connect(workdir)
    cleanup = weakref.finalize(connection, _close, connection, workdir)
    try:
        scanner = _Scanner(connection, params, path, fmt, list(header.columns), label, conditions,
                           sql_path=_plain_link(path, workdir, fmt), keep_rows=keep_rows)
        study = scanner.scan()
    except duckdb.Error as exc:
        cleanup()
        raise InputError(f"{label}: cannot be read as {fmt}: {str(exc).splitlines()[0]}") from None
    except BaseException:
        cleanup()
        raise
    study._cleanup = cleanup
    return study


class _Scanner:
    """The steps of :func:`scan_study`; holds the connection and the names of the SQL relations."""

    def __init__(self, connection, params: Params, path: Path, fmt: str, names: List[str], label: str,
                 conditions: Mapping[str, Expression], *, sql_path: Optional[str] = None,
                 keep_rows: Optional[Expression] = None):
        self.con = connection
        self.keep_rows = keep_rows  # data.keep_rows, checked; self.rows_kept says what it kept
        self.rows_kept: Optional[RowsKept] = None
        self.conditions = dict(conditions)
        self.params = params
        self.path = path
        self.sql_path = sql_path or str(path)  # the name DuckDB is given (a plain link to the file)
        self.fmt = fmt
        self.names = names  # stripped, as intake names them (columns in data.ignore left out)
        self.warnings: List[str] = []
        self.label = label
        self.id_column = params.data.id
        self.variables = [n for n in names if n != self.id_column and n not in filter_only_columns(params)]
        self.alias = {name: f"c{j}" for j, name in enumerate(self.variables)}
        self.kinds: Dict[str, str] = {}
        self.file_names_of: Dict[str, str] = {}  # a Parquet file's own name of each column
        self.id_kind = "text"
        self.nan_columns: set = set()  # typed number columns holding a NaN cell (only these need a NaN test)
        self.sample_relation: Optional[str] = None  # a view of the decided rows over sampled file rows

    # -- reading -------------------------------------------------------------------------

    def _source_sql(self, serial: bool = False) -> str:
        if self.fmt == "parquet":
            return f"read_parquet({literal(self.sql_path)}, file_row_number = true)"
        columns = ", ".join(f"{literal(f'f{j}')}: 'VARCHAR'" for j in range(len(self.file_names)))
        delim = self.params.data.delimiter or ("," if self.fmt == "csv" else "\t")
        return (f"read_csv({literal(self.sql_path)}, header = true, auto_detect = false, columns = {{{columns}}}, "
                f"delim = {literal(delim)}, quote = '\"', escape = '\"', null_padding = true, strict_mode = true, "
                f"encoding = {literal(_duckdb_encoding(self.params.data.encoding))}"
                + (", parallel = false)" if serial else ")"))

    def _raw_columns(self) -> Dict[str, str]:
        """SQL for each column's raw cells in the ``raw`` relation; sets each column's kind (number or text)."""
        if self.fmt == "parquet":
            described = self.con.execute(f"DESCRIBE SELECT * FROM read_parquet({literal(self.sql_path)})").fetchall()
            types = {row[0]: str(row[1]) for row in described}
            out = {}
            for raw_name in [row[0] for row in described]:
                name = str(raw_name).strip()
                if name not in self.names:
                    continue  # data.ignore
                kind = types[raw_name]
                if kind in _NUMERIC_TYPES:
                    self._set_kind(name, "number")
                elif kind == "VARCHAR":
                    self._set_kind(name, "text")
                else:
                    raise InputError(f"{self.label}: column '{name}' is stored as {kind}; data.engine duckdb reads "
                                     "numbers and text: store it as text or set data.engine to pandas")
                out[name] = quote_name(raw_name)
                self.file_names_of[name] = str(raw_name)
            return out
        for name in self.names:
            self._set_kind(name, "text")
        return {name: f"f{j}" for j, name in enumerate(self.file_names) if name in self.names}

    def _set_kind(self, name: str, kind: str) -> None:
        if name == self.id_column:
            self.id_kind = kind
        else:
            self.kinds[name] = kind

    def _cells_sql(self) -> str:
        """One row per file row: rn, id, and per variable its plain number p_ and its other cell s_."""
        parts = [f"{ROW} AS rn"]
        for name in self.variables:
            a, c = self.alias[name], self.raw[name]
            markers = marker_table(self.params, name)
            spec = self.params.variables.get(name, VariableSpec())
            every_value = spec.levels is not None or spec.type in CATEGORICAL_TYPES or name in self.every_value
            numbers = sorted(markers.numbers)
            if self.kinds[name] == "number":
                number = f"CAST({c} AS DOUBLE)"
                if every_value:
                    parts += [f"NULL::DOUBLE AS p_{a}", f"{number} AS s_{a}"]
                else:
                    # A NULL number gives NULL either way, so no coalesce; `<>` costs a third of NOT IN.
                    plain = "(" + " AND ".join([f"isfinite({number})"] + [f"{number} <> {literal(v)}"
                                                           for v in numbers]) + ")"
                    parts += [f"CASE WHEN {plain} THEN {number} END AS p_{a}",
                              f"CASE WHEN NOT {plain} THEN {number} END AS s_{a}", f"{number} AS x_{a}"]
            else:
                number = f"TRY_CAST({c} AS DOUBLE)"
                if every_value:
                    parts += [f"NULL::DOUBLE AS p_{a}", f"{c} AS s_{a}"]
                else:
                    plain = (f"coalesce(regexp_full_match({c}, {literal(PLAIN_NUMBER)}) AND isfinite({number}) "
                             f"AND NOT {_in_list(f'lower({c})', sorted(markers.text))} "
                             f"AND NOT {_in_list(number, numbers)}, false)")
                    parts += [f"CASE WHEN {plain} THEN {number} END AS p_{a}",
                              f"CASE WHEN NOT {plain} THEN {c} END AS s_{a}"]
        if self.id_column is not None:
            parts.append(f"{self.raw[self.id_column]} AS id")
        return ", ".join(parts)

    def _load(self) -> None:
        """The ``raw`` relation (file rows in file order, ``rn`` from 0) and the ``cells`` view over it."""
        if self.fmt == "parquet":
            self.con.execute(f"CREATE VIEW raw AS SELECT file_row_number AS {ROW}, * EXCLUDE (file_row_number) "
                             f"FROM {self._source_sql()}")
        else:
            # A copy in DuckDB's own storage, in file order, so rowid is the file row and the text is parsed once.
            try:
                self.con.execute(f"CREATE TABLE raw_table AS SELECT * FROM {self._source_sql()}")
            except Exception as exc:  # quoted line breaks in padded rows need the serial reader
                if "parallel" not in str(exc):
                    raise
                self.con.execute(f"CREATE TABLE raw_table AS SELECT * FROM {self._source_sql(serial=True)}")
            self.con.execute(f"CREATE VIEW raw AS SELECT rowid AS {ROW}, * FROM raw_table")
        self.raw = self._raw_columns()
        self._keep_rows()
        self._create_cells()

    def _keep_rows(self) -> None:
        """Leave out the rows ``data.keep_rows`` does not keep: ``raw`` then holds the kept rows, ``rn`` their file row.

        The rows are decided by :func:`gapbook.row_filter.decide_rows` on the distinct combinations of
        the condition's raw cells (as the pandas engine decides them), then matched back in SQL.
        """
        if self.keep_rows is None:
            return
        columns = list(self.keep_rows.columns)
        keys = [self.raw[name] for name in columns]
        listed = ", ".join(f"{key} AS k{j}" for j, key in enumerate(keys))
        self.con.execute(f"CREATE TABLE row_groups AS SELECT row_number() OVER () - 1 AS g, * FROM "
                         f"(SELECT {listed}, count(*) AS n FROM raw GROUP BY ALL)")
        groups = self.con.execute(f"SELECT {', '.join(f'k{j}' for j in range(len(keys)))}, n FROM row_groups "
                                  "ORDER BY g").fetchall()
        keep, self.rows_kept, warnings = decide_rows(columns, [g[:-1] for g in groups], [g[-1] for g in groups],
                                                     self.keep_rows, params=self.params, label=self.label)
        self.warnings.extend(warnings)
        match = " AND ".join(f"r.{key} IS NOT DISTINCT FROM k.k{j}" for j, key in enumerate(keys))
        self.con.execute(f"CREATE TABLE raw_kept AS SELECT r.* FROM raw AS r JOIN (SELECT * FROM row_groups WHERE "
                         f"list_contains(?, g)) AS k ON {match} ORDER BY r.{ROW}",
                         [[int(g) for g in np.flatnonzero(keep)]])
        self.con.execute("DROP TABLE row_groups")
        self.con.execute("DROP VIEW raw")
        if self.fmt == "parquet":
            self.con.execute("CREATE VIEW raw AS SELECT * FROM raw_kept")
        else:  # the kept rows take the whole file's place (dropped after the decided rows are written)
            self.con.execute("DROP TABLE raw_table")
            self.con.execute("ALTER TABLE raw_kept RENAME TO raw_table")
            self.con.execute("CREATE VIEW raw AS SELECT * FROM raw_table")

    def _create_cells(self) -> None:
        self.con.execute(f"CREATE OR REPLACE VIEW cells AS SELECT {self._cells_sql()} FROM raw")

    # -- ids -----------------------------------------------------------------------------

    def _clean_id_sql(self) -> str:
        if self.id_kind == "number":
            return f"CASE WHEN NOT {_is_nan('CAST(id AS DOUBLE)')} THEN id END"
        return f"nullif(trim(id, {literal(WHITESPACE)}), '')"

    def _check_ids(self) -> None:
        if self.id_column is None:
            return
        cid = self._clean_id_sql()
        # A text id with a NUL character is refused as intake refuses it (found in the same pass).
        nul_sql = "min(rn) FILTER (WHERE contains(id, chr(0)))" if self.id_kind == "text" else "NULL"
        blank, nul = self.con.execute(f"SELECT min(rn) FILTER (WHERE ({cid}) IS NULL), {nul_sql} FROM cells").fetchone()
        if blank is not None:
            raise blank_id_error(self.label, self.id_column, int(blank))
        if nul is not None:
            shown = clean_id(self.con.execute("SELECT id FROM cells WHERE rn = ?", [nul]).fetchone()[0])
            raise nul_error(self.label, self.id_column, shown, rows_note([nul], [shown]))
        # Strictly increasing ids (the usual case) are unique; otherwise look for duplicates.
        increasing = self._integer_ids_increase()
        if increasing is None:
            increasing = not self.con.execute(f"SELECT count(*) FROM (SELECT {cid} AS cid, lag({cid}) OVER (ORDER BY rn) "
                                              "AS prev FROM cells) WHERE prev >= cid").fetchone()[0]
        if increasing:
            return
        first = self.con.execute(
            f"WITH c AS (SELECT rn, {cid} AS cid FROM cells), d AS (SELECT cid FROM c GROUP BY cid HAVING count(*) > 1) "
            "SELECT cid FROM c WHERE cid IN (SELECT cid FROM d) ORDER BY rn LIMIT 1").fetchone()
        if first is not None:
            rows = [r[0] for r in self.con.execute(f"SELECT rn FROM cells WHERE {cid} = ? ORDER BY rn LIMIT 3",
                                                   [first[0]]).fetchall()]
            shown = self.con.execute("SELECT id FROM cells WHERE rn = ?", [rows[0]]).fetchone()[0]
            raise duplicate_id_error(self.label, self.id_column, clean_id(shown), rows)

    def _integer_ids_increase(self) -> Optional[bool]:
        """Whether the ids strictly increase down a Parquet file whose id column is stored as integers (and whose
        every row is kept); None for any other file, whose ids SQL compares.

        Read in batches with pyarrow: 0.05 CPU s for 10,000,000 ids, where SQL's comparison of each id with
        the one before sorts the rows first (1.1 CPU s). Blank ids were refused before.
        """
        import pyarrow.parquet as pq
        import pyarrow.types

        if self.fmt != "parquet" or self.keep_rows is not None or self.id_kind != "number":
            return None
        file = pq.ParquetFile(self.sql_path)
        name = self.file_names_of[self.id_column]
        if not pyarrow.types.is_integer(file.schema_arrow.field(name).type):
            return None
        last = None
        for batch in file.iter_batches(batch_size=1 << 20, columns=[name]):
            ids = batch.column(0).to_numpy()
            if len(ids) and ((last is not None and ids[0] <= last) or not (ids[1:] > ids[:-1]).all()):
                return False
            last = ids[-1] if len(ids) else last
        return True

    def _ids_of(self, rows: Sequence[int]) -> List[Any]:
        if self.id_column is None:
            return [int(r) + 1 for r in rows]
        found = dict(self.con.execute("SELECT rn, id FROM cells WHERE list_contains(?, rn)",
                                      [[int(r) for r in rows]]).fetchall())
        return [clean_id(found[int(r)]) for r in rows]

    def _rows_note(self, rows: Sequence[int]) -> str:
        rows = list(rows)[:3]
        return rows_note(rows, self._ids_of(rows))

    # -- distinct values and decisions ----------------------------------------------------

    def _summaries(self) -> Dict[str, Dict[str, Any]]:
        """Per column: plain-number cells, and for undeclared columns their range and distinct count."""
        parts = ["count(*) AS n_rows"]
        for name in self.variables:
            a = self.alias[name]
            parts += [f"count(p_{a}) AS np_{a}", f"min(p_{a}) AS lo_{a}", f"max(p_{a}) AS hi_{a}"]
            if name not in self.params.variables or self.params.variables[name].type is None:
                parts.append(f"approx_count_distinct(p_{a}) AS nd_{a}")
        row = self.con.execute(f"SELECT {', '.join(parts)} FROM cells").fetchone()
        values = dict(zip([d[0] for d in self.con.description], row))
        self.n_rows = int(values["n_rows"])
        return {name: {key: values.get(f"{key}_{self.alias[name]}") for key in ("np", "lo", "hi", "nd")}
                for name in self.variables}

    def _listed_cells(self, names: Sequence[str]) -> Dict[str, Tuple[List[Any], np.ndarray]]:
        """Each column's listed cells with their counts, NA left out: one pass over the rows for all the columns.

        One query per kind of column (numbers and text list different SQL types), a ``UNION ALL``
        branch per column: 28 typed columns over 10,000,000 rows cost 1.6 s of wall time as 28
        queries (benchmarks/README.md, fifth round).
        """
        out: Dict[str, Tuple[List[Any], np.ndarray]] = {}
        for kind in ("number", "text"):
            mine = [name for name in names if self.kinds[name] == kind]
            if not mine:
                continue
            found = self.con.execute(" UNION ALL ".join(
                f"SELECT {j} AS j, s_{self.alias[name]} AS s, count(*) AS n, min(rn) AS first FROM cells "
                f"WHERE s_{self.alias[name]} IS NOT NULL GROUP BY s" for j, name in enumerate(mine))).fetchall()
            # In order of first appearance, as pandas.factorize lists them (messages name the first offending value).
            found.sort(key=lambda row: (row[0], row[3]))
            for j, name in enumerate(mine):
                rows = [(s, n) for k, s, n, _ in found if k == j]
                if kind == "number":
                    # Typed NaN cells are NA in pandas; their reason is the blank one either way.
                    keep = [(s, n) for s, n in rows if not (isinstance(s, float) and np.isnan(s))]
                    if len(keep) < len(rows):
                        self.nan_columns.add(name)
                    rows = keep
                out[name] = ([s for s, _ in rows], np.array([int(n) for _, n in rows], dtype=np.int64))
        return out

    def _plain_values(self, name: str, summary: Dict[str, Any]) -> PlainNumbers:
        a = self.alias[name]
        n = int(summary["np"])
        spec = self.params.variables.get(name, VariableSpec())
        if n == 0:
            return PlainNumbers(n_cells=0, values=(), complete=True)
        if spec.type is not None:
            # A declared numeric type needs only the smallest and largest value (is a numeric missing code
            # among the real values?); categorical ones list every cell.
            lo, hi = float(summary["lo"]), float(summary["hi"])
            return PlainNumbers(n_cells=n, values=(lo,) if lo == hi else (lo, hi), complete=False)
        if summary["nd"] <= _APPROX_DISTINCT:
            values = self.con.execute(f"SELECT DISTINCT p_{a} FROM cells WHERE p_{a} IS NOT NULL").fetchall()
            return PlainNumbers(n_cells=n, values=tuple(sorted(v[0] for v in values)), complete=True)
        # More distinct values than any rule of infer_type looks at: a sample of them, with the extremes.
        values = self.con.execute(f"SELECT DISTINCT p_{a} FROM cells WHERE p_{a} IS NOT NULL "
                                  f"LIMIT {DISTINCT_LISTED + 1}").fetchall()
        sample = {v[0] for v in values} | {summary["lo"], summary["hi"]}
        return PlainNumbers(n_cells=n, values=tuple(sorted(sample)), complete=False)

    def _locate(self, name: str, uniques: List[Any]):
        a = self.alias[name]

        def locate(indices: Sequence[int]) -> Tuple[int, str]:
            wanted = [uniques[i] for i in indices]
            first = self.con.execute(f"SELECT s_{a} FROM cells WHERE list_contains(?, s_{a}) ORDER BY rn LIMIT 1",
                                     [wanted]).fetchone()
            index = next(i for i in indices if uniques[i] == first[0])
            rows = [r[0] for r in self.con.execute(f"SELECT rn FROM cells WHERE s_{a} = ? ORDER BY rn LIMIT 3",
                                                   [first[0]]).fetchall()]
            return index, self._rows_note(rows)
        return locate

    def _decide(self, name: str, summary: Dict[str, Any], listed: Tuple[List[Any], np.ndarray]
                ) -> Tuple[ColumnDecision, List[Any]]:
        spec = self.params.variables.get(name, VariableSpec())
        markers = marker_table(self.params, name)
        uniques, counts = listed
        cells = DistinctCells(uniques, counts, plain=self._plain_values(name, summary))
        found: List[str] = []
        try:
            decision = decide_column(cells, name, spec, markers, self._locate(name, uniques), self.label, found)
        except EveryValueNeeded:
            # Text after all: its numbers become categories as written, so list every cell and decide again.
            self.every_value.add(name)
            self._create_cells()
            uniques, counts = self._listed_cells([name])[name]
            found = []
            decision = decide_column(DistinctCells(uniques, counts), name, spec, markers,
                                     self._locate(name, uniques), self.label, found)
        self.warnings.extend(found)
        return decision, uniques

    # -- SQL of reasons and values ----------------------------------------------------------

    def _column_sql(self, name: str, decision: ColumnDecision, uniques: List[Any]) -> ScannedColumn:
        a = self.alias[name]
        info = decision.info
        labels = list(decision.reason_labels)
        if decision.na_reason not in labels:
            labels.append(decision.na_reason)
        lo, hi = info.range if (info.range is not None and info.numeric_storage) else (None, None)
        implausible = (lo is not None or hi is not None) and range_action(self.params, name) == "missing"
        if implausible and IMPLAUSIBLE not in labels:
            labels.append(IMPLAUSIBLE)
        if name in self.conditions and NOT_APPLICABLE not in labels:
            labels.append(NOT_APPLICABLE)
        by_reason: Dict[int, List[Any]] = {}
        kept: List[int] = []
        for i, reason in enumerate(decision.reasons):
            if reason is None:
                kept.append(i)
            else:
                by_reason.setdefault(labels.index(reason), []).append(uniques[i])
        value_sql = code_sql = None
        na_code = labels.index(decision.na_reason)
        if self.kinds[name] == "number" and name not in self.every_value and decision.numbers is not None:
            # A typed number column (Parquet): a NULL test (and a NaN test where the column holds NaN) and one
            # equality per listed value, on the number as read. Plain numbers are never listed (they are finite
            # and equal no marker), so they and the listed values kept as numbers fall to ELSE -1, as in the
            # general CASE chain below. The NaN test is the dearest part (it doubles a pass over the file).
            x = f"x_{a}"
            blank = f"{x} IS NULL OR {_is_nan(x)}" if name in self.nan_columns else f"{x} IS NULL"
            listed = [v for _, values in sorted(by_reason.items()) for v in values]
            base = ("(CASE " + " ".join([f"WHEN {blank} THEN {na_code}"]
                                        + [f"WHEN {_in_list(x, values)} THEN {code}"
                                           for code, values in sorted(by_reason.items())]) + " ELSE -1 END)")
            # True where the reason is -1, NULL for a NULL cell. Written with <> and AND, not NOT IN: DuckDB
            # evaluates `x <> a` at a third of the cost of `NOT x IN (a)` (10,000,000 rows x 28 columns, 1.6 CPU s
            # against 3.4 on top of reading the numbers), and `(...) IS NOT TRUE` is the cheapest missing test.
            keeps = ([f"NOT {_is_nan(x)}"] if name in self.nan_columns else []) + \
                [f"{x} <> {literal(v)}" for v in listed]
            observed = f"({' AND '.join(keeps)})" if keeps else f"({x} IS NOT NULL)"
            value_sql = f"(CASE WHEN {observed} THEN {x} END)" if keeps else x
            plain_missing = not implausible and name not in self.conditions and NOT_APPLICABLE not in labels
            outside = " OR ".join(([f"{x} < {literal(lo)}"] if lo is not None else [])
                                  + ([f"{x} > {literal(hi)}"] if hi is not None else []))
            reason_sql = (f"(CASE WHEN {base} = -1 AND ({outside}) THEN {labels.index(IMPLAUSIBLE)} ELSE {base} END)"
                          if implausible else base)
            counts = None
            if plain_missing and name not in self.nan_columns:
                # A cell's reason is na_code where it is NULL, else the code of the listed value it equals.
                counts = tuple(" + ".join(([f"(count(*) - count({x}))"] if k == na_code else [])
                                          + [f"count(CASE WHEN {x} = {literal(v)} THEN 1 END)"
                                             for v in by_reason.get(k, [])]) or "0"
                               for k in range(len(labels)))
            return ScannedColumn(name=name, alias=a, info=info, decision=decision, reason_labels=tuple(labels),
                                 reason_sql=reason_sql, value_sql=value_sql, code_sql=None, observed_sql=observed,
                                 missing_sql=f"({observed} IS NOT TRUE)" if plain_missing else None,
                                 reason_counts_sql=counts)
        arms = [f"WHEN p_{a} IS NOT NULL THEN -1", f"WHEN s_{a} IS NULL THEN {na_code}"]
        if self.kinds[name] == "number":
            arms.append(f"WHEN {_is_nan(f's_{a}')} THEN {na_code}")
        arms += [f"WHEN {_in_list(f's_{a}', values)} THEN {code}" for code, values in sorted(by_reason.items())]
        base = f"(CASE {' '.join(arms)} ELSE -1 END)"
        if decision.numbers is not None:
            kept_numbers = [(uniques[i], decision.numbers[i]) for i in kept]
            value_arms = [f"WHEN p_{a} IS NOT NULL THEN p_{a}"]
            if kept_numbers:
                if self.kinds[name] == "number":
                    value_arms.append(f"WHEN {_in_list(f's_{a}', [u for u, _ in kept_numbers])} THEN s_{a}")
                else:
                    value_arms.append(f"WHEN s_{a} IS NOT NULL THEN CASE s_{a} " + " ".join(
                        f"WHEN {literal(u)} THEN {literal(v)}" for u, v in kept_numbers) + " END")
            value = f"(CASE {' '.join(value_arms)} END)"
            outside = " OR ".join(([f"{value} < {literal(lo)}"] if lo is not None else [])
                                  + ([f"{value} > {literal(hi)}"] if hi is not None else []))
            reason_sql = (f"(CASE WHEN {base} = -1 AND ({outside}) THEN {labels.index(IMPLAUSIBLE)} ELSE {base} END)"
                          if implausible else base)
            value_sql = value
        else:
            kept_codes = [(uniques[i], int(decision.codes[i])) for i in kept]
            reason_sql = base
            code_sql = ("(CASE s_" + a + " " + " ".join(f"WHEN {literal(u)} THEN {c}" for u, c in kept_codes)
                        + " END)") if kept_codes else "NULL::INTEGER"
        return ScannedColumn(name=name, alias=a, info=info, decision=decision, reason_labels=tuple(labels),
                             reason_sql=reason_sql, value_sql=value_sql, code_sql=code_sql)

    def _create_relation(self, columns: Dict[str, ScannedColumn]) -> None:
        parts = ["rn", "id" if self.id_column is not None else "rn + 1 AS id"]
        for column in columns.values():
            a = column.alias
            parts.append(f"{column.reason_sql}::{_reason_type(column)} AS r0_{a}")
            if column.value_sql is not None:
                parts.append(f"{column.value_sql} AS v0_{a}")
            if column.code_sql is not None:
                parts.append(f"{column.code_sql} AS k0_{a}")
            if column.observed_sql is not None:
                parts.append(f"x_{a}")
            if column.missing_sql is not None:
                parts.append(f"{column.missing_sql} AS m_{a}")
        self.con.execute(f"CREATE VIEW decided AS SELECT {', '.join(parts)} FROM cells")
        self.decided_sql = ", ".join(parts)
        bindings = self._condition_bindings(columns)
        final = ["rn", "id"]
        for column in columns.values():
            a = column.alias
            reason = f"r0_{a}"
            if column.name in self.conditions:
                # Outside the condition the cell is not applicable, whatever it holds; where the condition is
                # unknown (an input missing) the cell stays as it is (Kleene: NOT NULL is NULL).
                reason = (f"(CASE WHEN NOT a_{a} THEN {column.label_code(NOT_APPLICABLE)} ELSE r0_{a} END)"
                          f"::{_reason_type(column)}")
                final += [f"a_{a}", f"{'v0' if column.value_sql is not None else 'k0'}_{a} AS n0_{a}"]
            final.append(f"{reason} AS r_{a}")
            if column.value_sql is not None:
                # The value as read is kept only where a range check lists values outside the range (a
                # fifth less work writing the table over 1 million rows x 30 than keeping it everywhere).
                value = f"v0_{a}" if reason == f"r0_{a}" and IMPLAUSIBLE not in column.reason_labels else \
                    f"CASE WHEN {reason} = -1 THEN v0_{a} END"  # (v0 is NULL exactly where r0 is not -1)
                final += ([f"v0_{a}"] if _range_checked(column) else []) + [f"{value} AS v_{a}"]
            if column.code_sql is not None:
                final.append(f"CASE WHEN {reason} = -1 THEN k0_{a} END AS k_{a}")
            # Passed through for the cheap tests on the number as read (a view computes only what a query uses).
            final += [f"x_{a}"] * (column.observed_sql is not None) + [f"m_{a}"] * (column.missing_sql is not None)
        select = f"SELECT {', '.join(final)} FROM {layered_select('decided', bindings)}"
        if self.fmt == "parquet":
            # A Parquet file is read again by every pass, through this view: with the short tests of typed
            # columns a pass costs less than writing the decided rows did (at 10,000,000 rows x 30 the write
            # alone took 32.6 CPU s, the whole audit 72; benchmarks/README.md, fourth round).
            self.con.execute(f"CREATE VIEW study AS {select}")
            sampled = _sample_filter(ROW, self.n_rows)
            if sampled:
                # The same view over a sample of the file's rows, drawn before any cell is decided (half the CPU
                # of sampling the decided rows: the median windows' guesses come from it).
                self.con.execute(f"CREATE VIEW cells_sample AS SELECT {self._cells_sql()} FROM (SELECT * FROM raw "
                                 f"{sampled})")
                self.con.execute(f"CREATE VIEW decided_sample AS SELECT {self.decided_sql} FROM cells_sample")
                self.con.execute(f"CREATE VIEW study_sample AS SELECT {', '.join(final)} "
                                 f"FROM {layered_select('decided_sample', bindings)}")
                self.sample_relation = "study_sample"
            return
        # Text files: the decided rows are written once into DuckDB's own (compressed) storage, so that later
        # passes scan plain columns instead of parsing every cell again (three times faster over 3 million
        # rows x 30 columns than passes over a view). Every later query orders by rn where order matters, so
        # the rows may be written in any order: without that, DuckDB holds finished batches back.
        self.con.execute("SET preserve_insertion_order = false")
        self.con.execute(f"CREATE TABLE study AS {select}")
        self.con.execute("SET preserve_insertion_order = true")
        self.con.execute("DROP VIEW IF EXISTS cells")
        self.con.execute("DROP VIEW raw")
        self.con.execute("DROP TABLE raw_table")

    # -- applies_if --------------------------------------------------------------------------

    def _condition_bindings(self, columns: Dict[str, ScannedColumn]) -> List[Tuple[str, str, int]]:
        """Each condition compiled to SQL over the as-read values, as the binding ``a_<alias>`` (and its parts)."""
        readable = {}
        for name, column in columns.items():
            if column.value_sql is not None:
                readable[name] = SqlColumn(f"v0_{column.alias}")
            else:
                spec = self.params.variables.get(name, VariableSpec())
                readable[name] = SqlColumn(f"k0_{column.alias}", categories=tuple(column.decision.categories),
                                           ordered=spec.type == "ordinal")
        bindings: List[Tuple[str, str, int]] = []
        for name, expression in self.conditions.items():
            a = columns[name].alias
            compiled = compile_condition(expression, readable, connection=self.con, prefix=f"e{a}_")
            bindings += list(compiled.bindings) + [(f"a_{a}", compiled.sql, compiled.layer + 1)]
        return bindings

    def _condition_warnings(self, columns: Dict[str, ScannedColumn]) -> List[str]:
        """The same warnings as intake gives about each condition (true for no row or every row, values set aside)."""
        if not self.conditions:
            return []
        parts = []
        for name in self.conditions:
            a = columns[name].alias
            parts += [f"count(a_{a})", f"count(*) FILTER (WHERE a_{a})", f"count(*) FILTER (WHERE NOT a_{a})",
                      f"count(n0_{a})", f"count(*) FILTER (WHERE NOT a_{a} AND n0_{a} IS NOT NULL)"]
        row = self.con.execute(f"SELECT {', '.join(parts)} FROM study").fetchone()
        out: List[str] = []
        for j, (name, expression) in enumerate(self.conditions.items()):
            a = columns[name].alias
            counts = ConditionCounts(self.n_rows, *(int(v) for v in row[5 * j:5 * j + 5]))

            def note(a=a) -> str:
                found = self.con.execute(f"SELECT rn, id FROM study WHERE NOT a_{a} AND n0_{a} IS NOT NULL "
                                         "ORDER BY rn LIMIT 3").fetchall()
                return rows_note([r for r, _ in found], [self._id_value(r, i) for r, i in found])
            out += applicability_warnings(self.params.label, name, expression.text, counts, note)
        return out

    # -- review lists ------------------------------------------------------------------------

    def _range_issues(self, columns: Dict[str, ScannedColumn]) -> pd.DataFrame:
        checked = []
        for name, column in columns.items():
            info = column.info
            if not _range_checked(column):
                continue
            lo, hi = info.range
            a = column.alias
            tests = ([f"v0_{a} < {literal(lo)}"] if lo is not None else []) + \
                    ([f"v0_{a} > {literal(hi)}"] if hi is not None else [])
            if tests:
                # Intake checks ranges on values that are neither missing nor not applicable.
                checked.append((name, column, f"(r_{a} = -1 OR r_{a} = {column.label_code(IMPLAUSIBLE)}) "
                                              f"AND ({' OR '.join(tests)})"))
        if not checked:
            return pd.DataFrame(columns=list(RANGE_COLUMNS))
        found = self.con.execute(" UNION ALL ".join(
            f"SELECT {j} AS j, rn, id, v0_{column.alias} AS v FROM study WHERE {test}"
            for j, (_, column, test) in enumerate(checked)) + " ORDER BY j, rn").fetchall()
        rows: List[Dict[str, Any]] = []
        for j, rn, ident, value in found:
            name, column, _ = checked[j]
            lo, hi = column.info.range
            rows.append({"variable": name, "id": self._id_value(rn, ident), "value": float(value),
                         "rule": range_rule(lo, hi), "action": RANGE_ACTIONS[range_action(self.params, name)]})
        return pd.DataFrame(rows, columns=list(RANGE_COLUMNS))

    def _refuse_too_large(self, columns: Dict[str, ScannedColumn], summaries: Dict[str, Dict[str, Any]]) -> None:
        """Intake's stop on a value beyond ``MAX_MAGNITUDE`` (or infinite), on the values that stay values.

        The file's smallest and largest plain numbers (already counted) and the listed values kept as
        numbers decide whether a column needs a look; only then is it read again, in file order.
        """
        for name, column in columns.items():
            if not column.info.numeric_storage or column.value_sql is None:
                continue
            summary, decision = summaries[name], column.decision
            candidates = [summary["lo"], summary["hi"]] + [
                decision.numbers[i] for i, reason in enumerate(decision.reasons) if reason is None]
            if all(v is None or abs(float(v)) <= MAX_MAGNITUDE for v in candidates):
                continue
            v = f"v_{column.alias}"
            first = self.con.execute(f"SELECT {v} FROM study WHERE abs({v}) > {literal(MAX_MAGNITUDE)} ORDER BY rn "
                                     "LIMIT 1").fetchone()
            if first is None:  # set missing by a range check or outside applies_if
                continue
            found = self.con.execute(f"SELECT rn, id FROM study WHERE {v} = ? ORDER BY rn LIMIT 3",
                                     [first[0]]).fetchall()
            raise too_large_error(self.label, name, float(first[0]),
                                  rows_note([r for r, _ in found], [self._id_value(r, i) for r, i in found]))

    def _id_value(self, rn: int, ident: Any) -> Any:
        return int(ident) if self.id_column is None else clean_id(ident)

    def _extremes(self, columns: Dict[str, ScannedColumn], summaries: Dict[str, Dict[str, Any]]) -> pd.DataFrame:
        screened = [c for c in columns.values()
                    if c.info.type in NUMERIC_TYPES and c.info.numeric_storage and c.value_sql is not None]
        centres = _robust_centres(self.con, "study", [f"v_{c.alias}" for c in screened],
                                  sample_relation=self.sample_relation,
                                  positive=[self._positive(c, summaries[c.name]["lo"]) for c in screened])
        cutoff = float(self.params.missing.robust_z)
        wanted = [(column, centre) for column, centre in zip(screened, centres) if centre is not None]
        if not wanted:
            return pd.DataFrame(columns=list(EXTREME_COLUMNS))
        # A slightly wider band in SQL; the cut itself is made below with intake's arithmetic. The band is
        # first put as bounds on the number as read (a filter DuckDB applies while reading, before any
        # expression is evaluated), and missing codes are left out there as well. The ids are joined to the
        # rows found afterwards: read in every column's pass they cost 4.5 of the pass's 7.4 CPU s at
        # 10,000,000 rows x 28 (4.3 with the join).
        candidates = " UNION ALL ".join(
            f"SELECT {j} AS j, rn, v_{column.alias} AS v FROM study "
            f"WHERE {self._prefilter(column, centre, _band(cutoff, centre))} "
            f"AND {_spread_sql(f'v_{column.alias}', centre)} > {literal(_band(cutoff, centre))}"
            for j, (column, centre) in enumerate(wanted))
        found = self.con.execute(
            f"WITH found AS MATERIALIZED ({candidates}) SELECT found.j, found.rn, ids.id, found.v FROM found "
            "JOIN (SELECT rn, id FROM study WHERE rn IN (SELECT rn FROM found)) AS ids USING (rn) "
            "ORDER BY found.j, found.rn").fetchall()
        rows: List[Dict[str, Any]] = []
        for j, rn, ident, value in found:
            column, centre = wanted[j]
            z = robust_z(np.array([value], dtype=float), centre)[0]
            if np.abs(z) > cutoff:
                rows.append({"variable": column.name, "id": self._id_value(rn, ident), "value": float(value),
                             "median": centre.median, "robust_z": float(z),
                             "z_scale": "log" if centre.log else "linear"})
        return pd.DataFrame(rows, columns=list(EXTREME_COLUMNS))

    def _positive(self, column: ScannedColumn, low: Optional[float]) -> Optional[bool]:
        """Whether every value of the column is positive, as far as the smallest plain number read (``low``) and a
        range whose outside values are set missing tell (a value listed as a marker but kept is not looked at:
        the screen's second pass mends a wrong answer); None where the column has no plain number."""
        bounds = column.info.range
        if low is not None and bounds is not None and bounds[0] is not None and \
                range_action(self.params, column.name) == "missing":
            low = max(float(low), float(bounds[0]))
        return None if low is None else bool(float(low) > 0)

    @staticmethod
    def _prefilter(column: ScannedColumn, centre: RobustCentre, band: float) -> str:
        """Rows that may hold an extreme value: on the number as read where the relation has it (a typed Parquet
        column: DuckDB then filters while reading, and missing codes are left out there too), else on the value."""
        if column.observed_sql is None:
            return _outside_sql(f"v_{column.alias}", centre, band)
        return f"{_outside_sql(f'x_{column.alias}', centre, band)} AND {column.observed_sql}"

    # -- all steps ---------------------------------------------------------------------------

    def scan(self) -> ScannedStudy:
        # The file's digest is read in a thread while DuckDB works (hashlib and file reads let the GIL go, and
        # DuckDB's own threads do not keep both cores busy all through): about 2.5 CPU s at 10,000,000 rows.
        with concurrent.futures.ThreadPoolExecutor(max_workers=1, thread_name_prefix="gapbook-sha256") as pool:
            digest = pool.submit(sha256_of, self.path)
            study = self._scan()
            study.sha256 = digest.result()
            return study

    def _scan(self) -> ScannedStudy:
        self.every_value: set = set()
        if self.fmt != "parquet":
            encoding = self.params.data.encoding
            if encoding.replace("_", "-").lower() in ("utf-8", "utf8"):
                encoding = "utf-8-sig"
            sep = self.params.data.delimiter or ("," if self.fmt == "csv" else "\t")
            self.file_names = [str(n).strip() for n in _text_header(self.path, sep, encoding)]
        self._load()
        summaries = self._summaries()
        if self.n_rows == 0:
            raise InputError(f"{self.path}: the data file has no data rows; it needs a header row and data rows")
        self._check_ids()
        columns: Dict[str, ScannedColumn] = {}
        listed = self._listed_cells(self.variables)
        for name in self.variables:
            decision, uniques = self._decide(name, summaries[name], listed[name])
            columns[name] = self._column_sql(name, decision, uniques)
        self._create_relation(columns)
        self.warnings.extend(self._condition_warnings(columns))
        issues = self._range_issues(columns)
        self._refuse_too_large(columns, summaries)
        extremes = self._extremes(columns, summaries)
        infos = {name: c.info for name, c in columns.items()}
        return ScannedStudy(connection=self.con, relation="study", n_rows=self.n_rows, columns=columns,
                            id_column=self.id_column, range_issues=issues, extreme_values=extremes,
                            source=str(self.path), sha256="", notes=inferred_notes(infos),
                            warnings=tuple(self.warnings), rows_kept=self.rows_kept)


def _reason_type(column: ScannedColumn) -> str:
    """The SQL type of a column's reason codes (-1 to the number of labels): a byte unless there are very many."""
    return "TINYINT" if len(column.reason_labels) < 127 else "SMALLINT"


def _range_checked(column: ScannedColumn) -> bool:
    """Whether intake checks this column's values against a declared range."""
    return column.info.range is not None and column.info.numeric_storage and column.value_sql is not None


# ---------------------------------------------------------------------------
# exact medians in SQL

def _numpy_median(middle: Sequence[float]) -> float:
    """The median from the middle order statistic(s), with numpy's arithmetic: the mean of one value or of two.

    (The mean of one value is not always the value itself: numpy's sum starts at +0.0, so a middle
    value of -0.0 gives a median of 0.0.)
    """
    with np.errstate(over="ignore", invalid="ignore"):  # two values near 1e308: inf, as numpy's median gives
        return float(np.mean(np.array(middle, dtype=float)))


@dataclass(frozen=True)
class _Gap:
    """Values not listed one by one: ``n`` of them, all within ``low`` to ``high`` (open ends where ``open``)."""

    low: float
    high: float
    n: int
    open: bool


def _ranked(values: np.ndarray, counts: np.ndarray, gaps: Sequence[_Gap], rank: int) -> Optional[float]:
    """The ``rank``-th smallest (from 0) of listed values (sorted, with their counts) and the gaps' values.

    None unless the listing decides it: the answer is a listed value ``c`` such that exactly so
    many values lie below ``c`` and so many at or below it, every gap lying wholly on one side.
    """
    ends = np.cumsum(counts)
    first = np.concatenate([[True], values[1:] != values[:-1]]) if len(values) else np.zeros(0, dtype=bool)
    last = np.concatenate([first[1:], [True]]) if len(values) else first
    candidates = values[first]
    lower = (ends - counts)[first]  # listed values below each candidate
    upper = ends[last]  # listed values at or below it
    decided = np.ones(len(candidates), dtype=bool)
    for gap in gaps:
        if gap.n == 0:
            continue
        below = gap.high <= candidates if gap.open else gap.high < candidates  # every value of the gap lies below
        above = gap.low >= candidates if gap.open else gap.low > candidates
        decided &= below | above
        lower, upper = lower + gap.n * below, upper + gap.n * below
    hit = np.flatnonzero(decided & (lower <= rank) & (rank < upper))
    return float(candidates[hit[0]]) if len(hit) else None


def _ranked_middle(values: np.ndarray, counts: np.ndarray, gaps: Sequence[_Gap], n: int) -> Optional[float]:
    """numpy's median of n values (the mean of the middle one or two) from a listing; None if it does not decide."""
    order = np.argsort(values, kind="stable")
    values, counts = values[order], counts[order]
    k1, k2 = (n - 1) // 2, n // 2
    low = _ranked(values, counts, gaps, k1)
    high = low if k1 == k2 else _ranked(values, counts, gaps, k2)
    if low is None or high is None:
        return None
    return _numpy_median([low] if k1 == k2 else [low, high])


def _spread_sql(expression: str, centre: Any) -> str:
    """:func:`gapbook.intake.spread_values` in SQL (division and abs only: the same floating point results)."""
    median = literal(centre.median)
    if centre.log:
        return f"greatest({expression} / {median}, {median} / {expression})"
    return f"abs({expression} - {median})"


def _outside_sql(expression: str, centre: RobustCentre, band: float) -> str:
    """True (at least) wherever :func:`_spread_sql` of the expression exceeds ``band``, as two bounds on it.

    The bounds are placed a thousandth of the band inside (and a spread above the band lies above
    the bound in exact arithmetic, so above its rounded value too): every row whose spread exceeds
    the band passes, and a few more, which the spread test that follows drops. NaN passes (DuckDB
    orders it above every number); NULL does not (its spread is NULL).
    """
    m = float(centre.median)
    if centre.log:  # greatest(x / m, m / x) > band, with m > 0
        inner = 0.999 * band
        if inner <= 1.0:
            return "true"
        return f"({expression} <= {literal(m / inner)} OR {expression} >= {literal(m * inner)})"
    inner = 0.999 * band
    return f"({expression} <= {literal(m - inner)} OR {expression} >= {literal(m + inner)})"


def _band(cutoff: float, centre: RobustCentre) -> float:
    """A spread a little below the cut of |robust z| > cutoff, so the SQL filter keeps every flagged value."""
    limit = cutoff * centre.scale
    return float(np.exp(limit) if centre.log else limit) * (1 - 1e-9)


def _sample_filter(row: str, n_rows: int) -> str:
    """A WHERE clause keeping about ``_SAMPLE`` of ``n_rows`` rows ("" for a small relation): one row in k.

    The rows are chosen by a hash of their number, so a run reads the same rows every time; a seeded
    Bernoulli sample (``USING SAMPLE ... (bernoulli, seed)``) gives that too, but DuckDB 2.0 draws it on
    one thread.
    """
    every = n_rows // _SAMPLE
    return f"WHERE hash({row} + {_SAMPLE_SEED}) % {every} = 0" if every > 1 else ""


def _sample(con, relation: str, expressions: Sequence[str], sample_relation: Optional[str] = None
            ) -> List[np.ndarray]:
    """Each expression's non-NULL values in a random sample of about ``_SAMPLE`` rows (every row of a small relation).

    The sample only places the windows; the medians come from every row whatever it holds.
    Sampling rows costs a tenth of a reservoir of each column's values.
    """
    if sample_relation is not None:
        relation, sampled = sample_relation, ""
    else:
        n_rows = int(con.execute(f"SELECT count(*) FROM {relation}").fetchone()[0])
        # Any relation (one without row numbers too): a seeded Bernoulli sample.
        sampled = f"USING SAMPLE {100.0 * _SAMPLE / n_rows!r}% (bernoulli, {_SAMPLE_SEED})" if n_rows > _SAMPLE else ""
    # The rows' order does not matter here, but without an ORDER BY DuckDB keeps the file's order and gathers
    # the result on one thread (1.4 s against 0.7 s of wall time over 10,000,000 rows x 30 on two cores).
    found = con.execute("SELECT " + ", ".join(f"({e})::DOUBLE AS s{j}" for j, e in enumerate(expressions))
                        + f" FROM {relation} {sampled} ORDER BY ALL").fetchnumpy()
    out = []
    for j in range(len(expressions)):
        values = np.ma.asarray(found[f"s{j}"], dtype=float)
        values = values.compressed() if np.ma.isMaskedArray(values) else np.asarray(values)
        out.append(values[~np.isnan(values)])
    return out


def _window(sample: np.ndarray) -> Optional[Tuple[float, float]]:
    """The sample's quantiles 0.49 and 0.51: the window searched for the exact median (None without a sample)."""
    if not len(sample):
        return None
    lo, hi = np.quantile(sample, [0.5 - _WINDOW, 0.5 + _WINDOW], method="inverted_cdf")
    return float(lo), float(hi)


def _robust_centres(con, relation: str, expressions: Sequence[str], sample_relation: Optional[str] = None,
                    positive: Optional[Sequence[Optional[bool]]] = None) -> List[Optional[RobustCentre]]:
    """Median and robust scale of each expression's non-NULL values (:class:`gapbook.intake.RobustCentre`).

    Exactly as :func:`gapbook.intake.robust_screen` computes them with numpy: the median, and the
    median of the spreads from it (absolute deviations, or folds for an all-positive variable),
    each the mean of its one or two middle values. A random sample of rows guesses a window of
    values around each median, and windows around the median minus and plus the median
    spread; one pass over the rows lists the distinct values inside the windows and counts the
    rows between them, and the middle values are read off that listing. Where the sample shows
    many distinct values in the windows (the listing would be long), or where the listing does
    not decide the median spread, a second pass lists a window of the spreads themselves from
    the exact median. None where there are fewer than 3 values or the scale is 0.
    ``sample_relation``, where given, holds sampled rows of the relation (the sample is then read
    from it whole). ``positive`` (one per expression, or None) says where every value is known to
    be positive or not before the pass (the spread is then a fold); where not known, the sample
    guesses it (a sample of 100,000 rows from 10,000,000 seldom holds the few values at or below 0).
    """
    if not expressions:
        return []
    sample = _sample(con, relation, expressions, sample_relation)
    windows = [_window(s) for s in sample]
    known = positive if positive is not None else [None] * len(expressions)
    around = [_spread_windows(s, w, k) for s, w, k in zip(sample, windows, known)]
    listings = _listed_values(con, relation, expressions,
                              [([w] + (a or [])) if w is not None else [] for w, a in zip(windows, around)])
    medians: List[Optional[float]] = []
    for e, listing in zip(expressions, listings):
        median = None
        if listing.n >= 3:
            median = _ranked_middle(listing.values, listing.counts, listing.gaps, listing.n)
            if median is None:  # the guess missed the middle (rare): take every value of that expression
                median = _every_value_median(con, relation, e, e)
        medians.append(median)
    folds = [listing.low is not None and float(listing.low) > 0 for listing in listings]  # every value positive
    middles: List[Optional[float]] = [
        _listed_spread_middle(listing, m, log) if m is not None and a is not None else None
        for listing, m, log, a in zip(listings, medians, folds, around)]
    second = [j for j, (m, middle) in enumerate(zip(medians, middles)) if m is not None and middle is None]
    if second:
        # The spreads from the exact median, in a window guessed from the sample's spreads.
        spreads = [_spread_sql(expressions[j], RobustCentre(median=medians[j], scale=0.0, log=folds[j]))
                   for j in second]
        guessed = [_window(spread_values(sample[j], medians[j], folds[j])) for j in second]
        found = _listed_values(con, relation, spreads, [[w] if w is not None else [] for w in guessed],
                               nonnull=[expressions[j] for j in second])
        for j, spread, listing in zip(second, spreads, found):
            middle = _ranked_middle(listing.values, listing.counts, listing.gaps, listing.n)
            middles[j] = middle if middle is not None else _every_value_median(con, relation, spread, expressions[j])
    out: List[Optional[RobustCentre]] = []
    for listing, median, middle, log in zip(listings, medians, middles, folds):
        if listing.n < 3 or median is None or middle is None:
            out.append(None)
            continue
        out.append(robust_centre(median, float(middle), log))
    return out


def _every_value_median(con, relation: str, expression: str, nonnull: str) -> float:
    """numpy's median of every value of an expression (where a window guessed from the sample missed the middle)."""
    found = con.execute(f"SELECT {expression} FROM {relation} WHERE ({nonnull}) IS NOT NULL").fetchnumpy()
    return float(np.median(np.asarray(next(iter(found.values())), dtype=float)))


def _spread_windows(sample: np.ndarray, window: Optional[Tuple[float, float]], positive: Optional[bool] = None
                    ) -> Optional[List[Tuple[float, float]]]:
    """Windows of values around the median minus and plus the median spread, both guessed from the sample.

    With the median in ``window`` and the median spread between the sample spreads' quantiles
    0.49 and 0.51, the values at the median minus and plus the median spread lie in these
    windows, so the pass that finds the median can list them too (``positive``: whether the spread
    is a fold, guessed from the sample where None). None (a second pass lists the spreads)
    without a sample, or where the sample holds more than ``_SPREAD_LISTED`` distinct values in
    the three windows: with few repeated values the pass would list too many.
    """
    if window is None or len(sample) == 0:
        return None
    a, b = window
    with np.errstate(all="ignore"):
        median = float(np.median(sample))
        log = bool(sample.min() > 0) if positive is None else positive
        spread = _window(spread_values(sample, median, log))
        if spread is None:
            return None
        t_low, t_high = spread
        windows = ([(a / t_high, b / t_low), (a * t_low, b * t_high)] if log
                   else [(a - t_high, b - t_low), (a + t_low, b + t_high)])
    if not all(np.isfinite(w).all() and w[0] <= w[1] for w in windows):
        return None
    # Each window reaches out to the sample's next value either side: where values repeat (whole numbers, say)
    # the spreads of the values just beyond a window's ends then differ from the median spread itself.
    distinct = np.unique(sample)
    windows = [(min(low, float(distinct[max(np.searchsorted(distinct, low) - 1, 0)])),
                max(high, float(distinct[min(np.searchsorted(distinct, high, side="right"), len(distinct) - 1)])))
               for low, high in windows]
    inside = np.zeros(len(sample), dtype=bool)
    for low, high in windows + [window]:
        inside |= (sample >= low) & (sample <= high)
    if len(np.unique(sample[inside])) > _SPREAD_LISTED:
        return None
    return windows


@dataclass(frozen=True)
class _Listing:
    """One expression over every row: its count of non-NULL values, its smallest value, the distinct values in
    its windows with their counts, and the gaps below, between and above the windows (rows counted only)."""

    n: int
    low: Optional[float]
    values: np.ndarray
    counts: np.ndarray
    gaps: Tuple[_Gap, ...]


def _merged(windows: Sequence[Tuple[float, float]]) -> List[Tuple[float, float]]:
    """Closed windows, sorted and merged where they overlap."""
    out: List[Tuple[float, float]] = []
    for low, high in sorted((float(a), float(b)) for a, b in windows):
        if out and low <= out[-1][1]:
            out[-1] = (out[-1][0], max(out[-1][1], high))
        else:
            out.append((low, high))
    return out


def _listed_values(con, relation: str, expressions: Sequence[str], windows: Sequence[Sequence[Tuple[float, float]]],
                   nonnull: Optional[Sequence[str]] = None) -> List[_Listing]:
    """One query over the rows: per expression, the distinct values inside its windows with their counts, the
    rows in each gap below, between and above the windows, and the count and smallest of its values.

    Values recorded to a few decimals repeat a lot, so a window lists few distinct values;
    grouping the rows this way costs about a third of histogram() over every row. ``nonnull``
    (one per expression) are simpler expressions that are NULL wherever theirs is (a spread's
    value): rows are filtered on them, so that DuckDB does not evaluate the expression twice.
    """
    parts, merged = [], []
    for j, e in enumerate(expressions):
        mine = _merged(windows[j])
        merged.append(mine)
        arms = " ".join(f"WHEN e < {literal(low)} THEN {2 * k} WHEN e <= {literal(high)} THEN {2 * k + 1}"
                        for k, (low, high) in enumerate(mine))
        part = f"CASE {arms} ELSE {2 * len(mine)} END" if mine else "0"
        rows = f"FROM (SELECT ({e})::DOUBLE AS e FROM {relation}) WHERE e IS NOT NULL" if nonnull is None else \
            f"FROM (SELECT ({e})::DOUBLE AS e FROM {relation} WHERE ({nonnull[j]}) IS NOT NULL)"
        # The value is kept inside the windows only (the odd parts): one test of the part, where a test of the
        # windows' bounds cost 1.2 CPU s more over 10,000,000 rows x 28. count(e), not count(*): where the
        # simpler test lets a NULL through, it counts for nothing.
        parts.append(f"SELECT {j} AS j, part, CASE WHEN part % 2 = 1 THEN e END AS value, count(e) AS n, "
                     f"min(e) AS low FROM (SELECT e, {part} AS part {rows}) GROUP BY part, value")
    found = con.execute(" UNION ALL ".join(parts)).fetchnumpy()
    j_of = np.asarray(found["j"], dtype=np.int64)
    order = np.argsort(j_of, kind="stable")  # each expression's rows together (millions of rows for continuous data)
    starts = np.searchsorted(j_of[order], np.arange(len(expressions) + 1))
    part_of = np.asarray(found["part"], dtype=np.int64)[order]
    n_of = np.asarray(found["n"], dtype=np.int64)[order]
    value_of = np.ma.asarray(found["value"], dtype=float).filled(np.nan)[order]
    low_of = np.ma.asarray(found["low"], dtype=float).filled(np.nan)[order]
    out: List[_Listing] = []
    for j, mine in enumerate(merged):
        rows = slice(starts[j], starts[j + 1])
        parts, counts = part_of[rows], n_of[rows]
        n = int(counts.sum())
        lows = low_of[rows]
        # min() as DuckDB orders doubles: NaN above every number.
        low = None if n == 0 else float(np.nanmin(lows)) if not np.isnan(lows).all() else float("nan")
        edges = [-np.inf] + [x for window in mine for x in window] + [np.inf]
        in_gap = np.bincount(parts, weights=counts, minlength=2 * len(mine) + 1)[::2]
        gaps = tuple(_Gap(low=edges[2 * k], high=edges[2 * k + 1], n=int(in_gap[k]), open=True)
                     for k in range(len(mine) + 1))
        listed = parts % 2 == 1
        out.append(_Listing(n=n, low=low, values=value_of[rows][listed], counts=counts[listed], gaps=gaps))
    return out


def _listed_spread_middle(listing: _Listing, median: float, log: bool) -> Optional[float]:
    """numpy's median of the spreads from ``median`` (:func:`gapbook.intake.spread_values`), read off a listing of
    the values themselves; None where the listing does not decide it.

    The spread grows monotonically away from the median on either side (rounded subtraction and
    division are monotone), so the spreads of a gap's values lie between the spreads of the
    nearest doubles inside its ends; the listed values' spreads are computed as numpy computes them.
    """
    if not np.isfinite(median):
        return None

    def spread(x: float) -> float:
        if not np.isfinite(x) or (log and x <= 0):
            return np.inf
        with np.errstate(all="ignore"):
            return float(spread_values(np.array([x]), median, log)[0])

    gaps = []
    for gap in listing.gaps:
        # The gap's values lie from the double after its lower end to the double before its upper end (its
        # lowest possible value is the column's smallest).
        low = float(listing.low) if gap.low == -np.inf and listing.low is not None else np.nextafter(gap.low, np.inf)
        high = np.nextafter(gap.high, -np.inf)
        if low >= median:
            bounds = (spread(low), spread(high))
        elif high <= median:
            bounds = (spread(high), spread(low))
        else:
            bounds = (1.0 if log else 0.0, max(spread(low), spread(high)))
        gaps.append(_Gap(low=bounds[0], high=bounds[1], n=gap.n, open=False))
    with np.errstate(all="ignore"):
        spreads = spread_values(listing.values, median, log)
    return _ranked_middle(spreads, listing.counts, gaps, listing.n)
