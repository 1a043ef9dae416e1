"""The audit's counts in SQL over a file read by DuckDB (``data.engine: duckdb``).

Two passes over the rows, whatever the number of variables: one groups rows by their
missingness bitmask (the pattern table; 64 variables per word), the other counts every
variable's reasons per level of the grouping variables. Both feed the same table builder
as the pandas path (:func:`gapbook.audit.audit_from_counts`), so the tables are the same;
it works in numpy while DuckDB's cached pages are let go (millions of patterns need the memory).
"""
from __future__ import annotations

import dataclasses
from typing import Dict, List, Sequence

import numpy as np
import pandas as pd

from .audit import (DEFAULT_MAX_PATTERNS, DEFAULT_THRESHOLD, AuditResult, GroupCounts, MissingnessCounts, _check_options,
                    _grouping_variables, audit_from_counts, group_codes, patterns_from_words, with_intake)
from .vocabulary import NOT_APPLICABLE
from .intake_duckdb import ScannedColumn, ScannedStudy

__all__ = ["audit_scanned"]


def _missing_sql(column: ScannedColumn) -> str:
    """True where the cell is missing (a reason other than not applicable)."""
    r = f"r_{column.alias}"
    not_applicable = column.label_code(NOT_APPLICABLE)
    if column.missing_sql is not None:
        return f"m_{column.alias}"  # the cheapest test, on the number as read (over a view of a Parquet file)
    return f"({r} >= 0 AND {r} <> {not_applicable})" if not_applicable >= 0 else f"({r} >= 0)"


def pattern_words_sql(scanned: ScannedStudy):
    """Distinct missingness patterns grouped in SQL on packed bitmask words: the words (sorted as numpy.unique
    sorts them), their rows and the number of variables, for :func:`gapbook.audit.patterns_from_words`."""
    columns = list(scanned.columns.values())
    p = len(columns)
    if p == 0:
        return np.zeros((1, 1), dtype=np.uint64), np.array([scanned.n_rows]), 0
    words = []
    for start in range(0, p, 64):
        block = columns[start:start + 64]
        words.append(" | ".join(f"({_missing_sql(c)}::UBIGINT << {63 - k})" for k, c in enumerate(block)))
    select = ", ".join(f"{w} AS w{i}" for i, w in enumerate(words))
    keys = ", ".join(f"w{i}" for i in range(len(words)))
    found = scanned.connection.execute(
        f"SELECT {keys}, count(*) AS n FROM (SELECT {select} FROM {scanned.relation}) GROUP BY {keys}").fetchnumpy()
    codes = np.column_stack([np.asarray(found[f"w{i}"], dtype=np.uint64) for i in range(len(words))])
    counts = np.asarray(found["n"], dtype=np.int64)
    # Lexicographic by word, as numpy.unique sorts packed rows; the words are distinct (grouped), so with one
    # word an unstable sort gives the same order (0.16 s against 0.43 for 3,360,000 patterns).
    order = np.argsort(codes[:, 0]) if codes.shape[1] == 1 else np.lexsort(codes.T[::-1])
    return codes[order], counts[order], p


def count_reasons_sql(scanned: ScannedStudy, by: Sequence[str]):
    """Cells per reason of every variable, and the by-group counts, in one grouped pass."""
    columns = list(scanned.columns.values())
    keys: List[str] = []
    for name in by:
        c = scanned.columns[name]
        value = f"k_{c.alias}" if c.code_sql is not None else f"v_{c.alias}"
        not_applicable = c.label_code(NOT_APPLICABLE)
        keys += [f"CASE WHEN r_{c.alias} = -1 THEN {value} END AS g{len(keys) // 2}",
                 f"CASE WHEN r_{c.alias} = -1 THEN 0 WHEN r_{c.alias} = {not_applicable} THEN 2 ELSE 1 END "
                 f"AS s{len(keys) // 2}"]
    sums = [f"{c.reason_counts_sql[k] if c.reason_counts_sql else f'sum((r_{c.alias} = {k})::BIGINT)'} "
            f"AS n_{c.alias}_{k}" for c in columns for k in range(len(c.reason_labels))]
    group = ", ".join(f"g{i}, s{i}" for i in range(len(by)))
    query = (f"SELECT {', '.join(keys + ['count(*) AS n_rows'] + sums)} FROM {scanned.relation}"
             + (f" GROUP BY {group}" if by else ""))
    table = scanned.connection.execute(query).df()
    reasons = []
    for c in columns:
        reasons.append({label: int(table[f"n_{c.alias}_{k}"].sum()) for k, label in enumerate(c.reason_labels)})
    groups = [_group_counts(scanned, name, i, table, columns) for i, name in enumerate(by)]
    return tuple(reasons), tuple(groups)


def _group_counts(scanned: ScannedStudy, name: str, i: int, table: pd.DataFrame,
                  columns: Sequence[ScannedColumn]) -> GroupCounts:
    """The counts of one grouping variable from the grouped rows, its levels named as the pandas path names them."""
    c = scanned.columns[name]
    state = table[f"s{i}"].to_numpy(dtype=np.int64)
    keys = table[f"g{i}"]
    if c.code_sql is not None:
        codes = keys.fillna(-1).to_numpy(dtype=np.int64)
        values = pd.Series(pd.Categorical.from_codes(codes, categories=list(c.decision.categories)))
    else:
        values = pd.Series(keys.to_numpy(dtype=float))
    group_of, labels = group_codes(values, state == 1, state == 2, name)
    k = len(labels)
    size = np.bincount(group_of, weights=table["n_rows"].to_numpy(dtype=float), minlength=k).astype(np.int64)
    missing = np.zeros((k, len(columns)), dtype=np.int64)
    not_applicable = np.zeros((k, len(columns)), dtype=np.int64)
    for j, column in enumerate(columns):
        na_code = column.label_code(NOT_APPLICABLE)
        for code in range(len(column.reason_labels)):
            cells = np.bincount(group_of, weights=table[f"n_{column.alias}_{code}"].to_numpy(dtype=float),
                                minlength=k).astype(np.int64)
            if code == na_code:
                not_applicable[:, j] += cells
            else:
                missing[:, j] += cells
    return GroupCounts(name, tuple(labels), size, missing, not_applicable)


def audit_scanned(scanned: ScannedStudy, *, threshold: float = DEFAULT_THRESHOLD, by: Sequence[str] = (),
                  top_patterns: int = 15, max_patterns: int = DEFAULT_MAX_PATTERNS) -> AuditResult:
    """Audit a study read by DuckDB: the same tables as :func:`gapbook.audit.audit_study`, counted in SQL.

    Parameters
    ----------
    scanned : from :func:`gapbook.intake_duckdb.scan_study`.
    threshold : missing fraction above which a variable is flagged (0.20 is common practice, no source).
    by : grouping variables.
    top_patterns : how many of the most common patterns the figures show.
    max_patterns : the most patterns the pattern table lists one per row (the rest share a remainder row).

    Returns
    -------
    AuditResult
    """
    _check_options(threshold, top_patterns, max_patterns)
    names = list(scanned.columns)
    by = _grouping_variables(by, names)
    reasons, groups = count_reasons_sql(scanned, by)
    words = pattern_words_sql(scanned)
    types: Dict[str, str] = scanned.types
    with scanned.buffers_released():  # the tables are built in numpy from the fetched counts
        counts = MissingnessCounts(names=tuple(names), n_rows=scanned.n_rows, reasons=reasons,
                                   patterns=patterns_from_words(*words), groups=groups)
        result = audit_from_counts(counts, types=types, threshold=float(threshold), top_patterns=int(top_patterns),
                                   range_issues=scanned.range_issues.reset_index(drop=True),
                                   extremes=scanned.extreme_values.reset_index(drop=True),
                                   types_table=scanned.variables_table(), max_patterns=int(max_patterns))
    return with_intake(result, notes=scanned.notes, warnings=scanned.warnings, rows_kept=scanned.rows_kept,
                       engine="duckdb")
