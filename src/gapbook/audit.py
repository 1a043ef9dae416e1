"""The audit stage: how much is missing, why, in which patterns, and together with what.

The audit describes what is missing; it does not say why values went missing (whether
missingness depends on observed or unobserved values is the mechanism stage's question,
and missing-at-random can never be verified from the data alone).

Conventions used in every table:
- A cell is *missing* when it has a missing reason other than ``"not applicable"``.
  Cells outside a variable's ``applies_if`` condition are *not applicable*: they are not
  missing, they are not a reason column, and they are left out of that variable's ``n``.
- For a variable, ``n`` = rows to which the variable applies (rows minus not-applicable
  cells) and ``pct_missing`` = ``n_missing / n * 100``; ``over_threshold`` is
  ``n_missing / n > threshold``.
- For patterns, co-missingness and per-participant counts, a not-applicable cell counts
  as observed (the row has nothing missing there).

Speed: each row's missingness is packed into integer codes (one bit per variable, the
first variable in the highest bit, so that sorting the codes sorts the patterns), the
distinct codes are counted with ``numpy.unique``, and reasons are counted on the
categorical codes with ``numpy.bincount``; nothing loops over rows in Python.
"""
from __future__ import annotations

import dataclasses
import re
from dataclasses import dataclass
from typing import Dict, List, Mapping, Optional, Sequence, Tuple

import numpy as np
import pandas as pd

from .errors import InputError, did_you_mean
from .intake import EXTREME_COLUMNS, RANGE_COLUMNS, Study
from .row_filter import RowsKept
from .params import DEFAULT_MAX_PATTERNS, MAX_PATTERNS_LISTED
from .text import counted, level_text
from .vocabulary import NOT_APPLICABLE, infer_type

__all__ = ["DEFAULT_THRESHOLD", "GroupCounts", "MissingnessCounts", "AuditResult", "reason_slug", "count_patterns",
           "patterns_from_words", "pattern_table", "is_monotone", "pattern_shape", "rows_in_dropout_order", "group_codes",
           "audit_frame", "audit_study", "audit_from_counts", "with_intake"]

DEFAULT_THRESHOLD = 0.20  # common practice, no source
UNSPECIFIED = "unspecified"  # reason given to NaN cells of a plain frame that carries no reasons
GROUP_MISSING = "(missing)"
GROUP_NOT_APPLICABLE = "(not applicable)"
MAX_GROUP_LEVELS = 50  # beyond this a by-group table is unreadable; group on a categorical variable
VARIABLE_COLUMNS = ("variable", "type", "n", "n_missing", "pct_missing", "over_threshold", "n_not_applicable")
PATTERN_COLUMNS = ("n_rows", "pct_rows", "n_missing_variables")
BY_GROUP_COLUMNS = ("group_variable", "group", "variable", "n", "n_missing", "pct_missing")
COMISSING_COLUMNS = ("variable_a", "variable_b", "n_missing_a", "n_missing_b", "n_both_missing", "phi",
                     "p_missing_b", "p_missing_b_given_a", "lift")
_CHUNK_ROWS = 131072


@dataclass(frozen=True)
class MissingCells:
    """The missingness of a table as arrays: what the audit computes from.

    ``codes[j]`` are the reason codes of variable j (-1 = observed) into ``categories[j]``;
    ``missing_columns[j]`` and ``not_applicable_columns[j]`` are its boolean indicators, and
    ``missing`` is the rows x variables matrix of the same (C order, for packing rows).
    """

    names: Tuple[str, ...]
    missing: np.ndarray
    missing_columns: Tuple[np.ndarray, ...]
    not_applicable_columns: Tuple[np.ndarray, ...]
    codes: Tuple[np.ndarray, ...]
    categories: Tuple[Tuple[str, ...], ...]

    @property
    def n_rows(self) -> int:
        return int(self.missing.shape[0])


@dataclass(frozen=True)
class PatternCounts:
    """Distinct missingness patterns: ``missing_bits[k, j]`` is 1 when pattern k lacks variable j."""

    missing_bits: np.ndarray
    n_rows: np.ndarray


@dataclass(frozen=True)
class GroupCounts:
    """Missingness per level of one grouping variable: what its by-group rows are built from.

    ``size[k]`` rows fall in level k; ``missing[k, j]`` and ``not_applicable[k, j]`` count
    the cells of variable j in those rows.
    """

    group: str
    labels: Tuple[str, ...]
    size: np.ndarray
    missing: np.ndarray
    not_applicable: np.ndarray


@dataclass(frozen=True)
class MissingnessCounts:
    """The counts every audit table is built from, whichever engine counted them.

    ``reasons[j]`` maps each reason label of variable j (``"not applicable"`` included) to
    its number of cells; ``patterns`` are the distinct missingness patterns with their rows;
    ``groups`` one :class:`GroupCounts` per grouping variable.
    """

    names: Tuple[str, ...]
    n_rows: int
    reasons: Tuple[Dict[str, int], ...]
    patterns: PatternCounts
    groups: Tuple[GroupCounts, ...] = ()


@dataclass(frozen=True)
class AuditResult:
    """Everything the audit found; each table is written as ``audit_<field>.csv`` by the notebook.

    Fields
    ------
    variables : per variable counts (see module docstring for n and pct_missing).
    participants : distribution of the number of variables a row is missing.
    patterns : one row per missingness pattern, most common first (1 = observed), at most
        ``max_patterns`` of them; when there are more, one last *remainder* row holds the rows
        of all the rarer patterns, with n_missing_variables and the variable columns blank
        (:func:`pattern_table`; :meth:`listed_patterns`, :meth:`unlisted_patterns`).
    comissingness : for each ordered pair of incomplete variables, the rows missing each and
        both, phi, P(B missing), P(B missing | A missing) and lift (:func:`comissingness`).
    comissingness_matrix : phi as a square matrix (incomplete variables only).
    by_group : missingness per level of each grouping variable.
    summary : one-row overview (rows, complete rows, patterns, monotone, threshold, ...).
    reasons : each missing reason, its column in ``variables`` and how many cells carry it.
    range_issues, extremes, types : the intake's review lists and variable types.
    monotone : whether the patterns are monotone (a dropout design), 1 = yes, 0 = no.
    dropout_order : variables from least to most missing (the order used for monotonicity).
    notes : the intake's notes (types inferred, and why), to show with the types table.
    warnings : what intake found legitimate but worth a look (printed by ``check`` and ``run``),
        to show on the audit page.
    engine : what counted the cells: "pandas" (in memory) or "duckdb" (over the file).
    max_patterns : the most patterns the pattern table lists one per row.
    """

    variables: pd.DataFrame
    participants: pd.DataFrame
    patterns: pd.DataFrame
    comissingness: pd.DataFrame
    comissingness_matrix: pd.DataFrame
    by_group: pd.DataFrame
    summary: pd.DataFrame
    reasons: pd.DataFrame
    range_issues: pd.DataFrame
    extremes: pd.DataFrame
    types: pd.DataFrame
    n_rows: int
    n_variables: int
    n_complete_rows: int
    n_patterns: int
    monotone: int
    pct_rows_in_dropout_order: float
    dropout_order: Tuple[str, ...]
    threshold: float
    top_patterns: int
    by: Tuple[str, ...]
    sentences: Tuple[str, ...] = ()
    notes: Tuple[str, ...] = ()
    warnings: Tuple[str, ...] = ()
    engine: str = "pandas"
    max_patterns: int = DEFAULT_MAX_PATTERNS
    rows_kept: Optional[RowsKept] = None

    def listed_patterns(self) -> pd.DataFrame:
        """The pattern table's rows that are one pattern each (the remainder row left out)."""
        return self.patterns[self.patterns["n_missing_variables"].notna()]

    def unlisted_patterns(self) -> Tuple[int, int]:
        """(patterns, rows) folded into the remainder row; (0, 0) when every pattern is listed."""
        listed = self.listed_patterns()
        return self.n_patterns - len(listed), self.n_rows - int(listed["n_rows"].sum())

    def tables(self) -> Dict[str, pd.DataFrame]:
        """The tables to write, keyed by file name without ``.csv``."""
        return {
            "audit_variables": self.variables, "audit_participants": self.participants,
            "audit_patterns": self.patterns, "audit_summary": self.summary,
            "audit_comissingness": self.comissingness, "audit_by_group": self.by_group,
            "audit_reasons": self.reasons, "audit_range": self.range_issues,
            "audit_extremes": self.extremes, "audit_types": self.types,
        } | ({"audit_rows_kept": self.rows_kept.frame()} if self.rows_kept is not None else {})


# ---------------------------------------------------------------------------
# from reasons to arrays

def missing_cells(reasons: pd.DataFrame) -> MissingCells:
    """Missing and not-applicable indicators and reason codes from a frame of reasons.

    Parameters
    ----------
    reasons : one column per variable; NaN where observed, otherwise the reason label
        (``"not applicable"`` for cells a variable does not apply to). Categorical
        columns are used as they are; other columns are made categorical.

    Returns
    -------
    MissingCells
    """
    n = len(reasons)
    missing: List[np.ndarray] = []
    not_applicable: List[np.ndarray] = []
    codes_out: List[np.ndarray] = []
    categories_out: List[Tuple[str, ...]] = []
    for name in reasons.columns:
        column = reasons[name]
        cat = column.array if isinstance(column.dtype, pd.CategoricalDtype) else pd.Categorical(column)
        codes = np.asarray(cat.codes)
        categories = tuple(str(c) for c in cat.categories)
        observed = codes < 0
        if NOT_APPLICABLE in categories:
            is_na = codes == categories.index(NOT_APPLICABLE)
            not_applicable.append(is_na)
            missing.append(~observed & ~is_na)
        else:
            not_applicable.append(np.zeros(n, dtype=bool))
            missing.append(~observed)
        codes_out.append(codes)
        categories_out.append(categories)
    matrix = np.column_stack(missing) if missing else np.zeros((n, 0), dtype=bool)
    return MissingCells(tuple(str(c) for c in reasons.columns), matrix, tuple(missing), tuple(not_applicable),
                        tuple(codes_out), tuple(categories_out))


def reasons_from_values(data: pd.DataFrame, label: str = UNSPECIFIED) -> pd.DataFrame:
    """A reasons frame for a plain DataFrame that records none: ``label`` wherever a value is NaN.

    Parameters
    ----------
    data : the values; NaN/None/NA are taken as missing.
    label : the reason given to every missing cell.

    Returns
    -------
    DataFrame of Categorical columns, NaN where observed.
    """
    out = {}
    for name in data.columns:
        codes = np.where(data[name].isna().to_numpy(), 0, -1)
        out[name] = pd.Categorical.from_codes(codes, categories=[label])
    return pd.DataFrame(out, index=data.index)


def reason_slug(label: str) -> str:
    """The column-name form of a reason: lower case, every non-alphanumeric character as '_'.

    Parameters
    ----------
    label : str
        A reason label, e.g. ``lost to follow-up``.

    Returns
    -------
    str
        E.g. ``lost_to_follow_up`` (the audit's column is ``reason_<slug>``).
    """
    return re.sub(r"[^a-z0-9]", "_", str(label).lower())


# ---------------------------------------------------------------------------
# per variable

def reason_counts(cells: MissingCells) -> Tuple[Dict[str, int], ...]:
    """Cells per reason label, per variable (``"not applicable"`` included).

    Parameters
    ----------
    cells : from :func:`missing_cells`.

    Returns
    -------
    tuple of dicts, one per variable, reason label -> number of cells.
    """
    out = []
    for codes, categories in zip(cells.codes, cells.categories):
        counts = np.bincount(codes.astype(np.intp) + 1, minlength=len(categories) + 1)[1:]
        out.append({label: int(c) for label, c in zip(categories, counts)})
    return tuple(out)


def variable_table(per_variable: Sequence[Mapping[str, int]], names: Sequence[str], n_rows: int,
                   types: Mapping[str, str], threshold: float) -> Tuple[pd.DataFrame, pd.DataFrame]:
    """Per-variable counts of missing values by reason, with not-applicable cells kept apart.

    Parameters
    ----------
    per_variable : from :func:`reason_counts` (reason label -> cells, per variable).
    names : the variable names, in column order.
    n_rows : rows of the table.
    types : variable name -> type (continuous, binary, nominal, ordinal, count).
    threshold : missing fraction above which ``over_threshold`` is True.

    Returns
    -------
    (variables, reasons): the ``audit_variables`` table and the reason -> column table.
    """
    totals: Dict[str, int] = {}
    for by_reason in per_variable:
        for label, c in by_reason.items():
            if label != NOT_APPLICABLE and c > 0:
                totals[label] = totals.get(label, 0) + c
    # Most common reason first; ties by label so the column order never depends on input order.
    labels = sorted(totals, key=lambda r: (-totals[r], r))
    columns = _unique_slugs(labels)

    rows = []
    for name, by_reason in zip(names, per_variable):
        n_na = by_reason.get(NOT_APPLICABLE, 0)
        n_missing = sum(c for label, c in by_reason.items() if label != NOT_APPLICABLE)
        n = n_rows - n_na
        fraction = n_missing / n if n else float("nan")
        row = {"variable": name, "type": types.get(name, ""), "n": n, "n_missing": n_missing,
               "pct_missing": fraction * 100, "over_threshold": bool(n and fraction > threshold),
               "n_not_applicable": n_na}
        row.update({column: by_reason.get(label, 0) for label, column in zip(labels, columns)})
        rows.append(row)
    variables = pd.DataFrame(rows, columns=list(VARIABLE_COLUMNS) + columns)
    variables["over_threshold"] = variables["over_threshold"].astype(bool)
    reasons = pd.DataFrame({
        "reason": labels, "column": columns, "n_cells": [totals[r] for r in labels],
        "n_variables": [sum(1 for b in per_variable if b.get(r, 0) > 0) for r in labels],
    }, columns=["reason", "column", "n_cells", "n_variables"])
    return variables, reasons


def _unique_slugs(labels: Sequence[str]) -> List[str]:
    out: List[str] = []
    for label in labels:
        base = "reason_" + reason_slug(label)
        column, k = base, 2
        while column in out:  # two labels with the same slug (e.g. "marker ?" and "marker !")
            column, k = f"{base}_{k}", k + 1
        out.append(column)
    return out


# ---------------------------------------------------------------------------
# per participant

def participant_table(patterns: PatternCounts) -> pd.DataFrame:
    """Distribution of how many variables each row is missing (no ids, no rows).

    Parameters
    ----------
    patterns : from :func:`count_patterns`; a row misses as many variables as its pattern.

    Returns
    -------
    DataFrame: n_missing_variables (0 to the largest seen), n_rows, pct_rows.
    """
    n_missing = patterns.missing_bits.sum(axis=1, dtype=np.int64)
    counts = np.zeros(int(n_missing.max()) + 1 if len(n_missing) else 1, dtype=np.int64)
    np.add.at(counts, n_missing, patterns.n_rows)
    total = int(counts.sum())
    return pd.DataFrame({
        "n_missing_variables": np.arange(len(counts), dtype=np.int64),
        "n_rows": counts.astype(np.int64),
        "pct_rows": counts / total * 100 if total else np.full(len(counts), np.nan),
    })


# ---------------------------------------------------------------------------
# patterns

def count_patterns(missing: np.ndarray) -> PatternCounts:
    """The distinct rows of a boolean missingness matrix and how many rows have each.

    Each row is packed into bits (first variable = most significant bit) and the codes
    are counted with ``numpy.unique``, so patterns come out in lexicographic order of
    their missing bits (observed before missing, left to right).

    Parameters
    ----------
    missing : n x p boolean array (True = missing).

    Returns
    -------
    PatternCounts
    """
    n, p = missing.shape
    if p == 0 or n == 0:
        return PatternCounts(np.zeros((1 if n else 0, p), dtype=np.uint8), np.array([n] if n else [], dtype=np.int64))
    packed = np.packbits(np.ascontiguousarray(missing), axis=1, bitorder="big")
    width = -(-packed.shape[1] // 8) * 8
    if width != packed.shape[1]:
        packed = np.concatenate([packed, np.zeros((n, width - packed.shape[1]), dtype=np.uint8)], axis=1)
    words = np.ascontiguousarray(packed).view(">u8").astype(np.uint64)  # big-endian read: integer order = bit order
    if words.shape[1] == 1:
        unique, counts = np.unique(words[:, 0], return_counts=True)
        unique = unique[:, None]
    else:
        unique, counts = np.unique(words, axis=0, return_counts=True)
    return patterns_from_words(unique, counts, p)


def patterns_from_words(words: np.ndarray, counts: np.ndarray, n_variables: int) -> PatternCounts:
    """Pattern counts from distinct packed codes: 64 variables per word, the first in the highest bit.

    Parameters
    ----------
    words : k x w unsigned 64-bit codes, one row per distinct pattern, sorted (as ``numpy.unique``
        sorts them: lexicographic order of the missing bits).
    counts : rows with each pattern.
    n_variables : number of variables (the bits beyond it are zero).

    Returns
    -------
    PatternCounts
    """
    words = np.ascontiguousarray(words, dtype=np.uint64)
    # Big-endian bytes put variable j at bit j of each row's bytes, so only the first n_variables bits are
    # unpacked (with 3,360,000 patterns of 28 variables, 0.04 s against 0.74 s for every bit and a copy).
    octets = words.astype(">u8").view(np.uint8).reshape(len(words), -1)
    bits = np.unpackbits(octets[:, :-(-n_variables // 8)], axis=1, count=n_variables, bitorder="big")
    return PatternCounts(np.ascontiguousarray(bits), np.asarray(counts, dtype=np.int64))


def pattern_table(patterns: PatternCounts, names: Sequence[str], *,
                  max_patterns: Optional[int] = None) -> pd.DataFrame:
    """One row per pattern: n_rows, pct_rows, n_missing_variables, then 0/1 per variable (1 = observed).

    Sorted by n_rows descending, then fewer missing variables first, then the pattern read
    left to right with observed before missing, so the order is fully determined.

    With more than ``max_patterns`` patterns, the first ``max_patterns`` in that order are
    listed and one remainder row follows: its n_rows and pct_rows are the rows of every
    other pattern together, and its n_missing_variables and variable columns are blank (it
    is no single pattern). A million rows with scattered gaps can have a pattern per row;
    the cap keeps the table a readable size while the counts built from every pattern
    (participants, co-missingness, monotonicity) stay exact.

    Parameters
    ----------
    patterns : from :func:`count_patterns` (already in pattern order).
    names : the variable names, in column order.
    max_patterns : the most patterns listed one per row; None lists them all.

    Returns
    -------
    DataFrame; n_missing_variables and the variable columns are nullable integers.
    """
    bits, counts = patterns.missing_bits, patterns.n_rows
    chosen = np.arange(len(counts))
    if max_patterns is not None and len(counts) > max_patterns:
        # Only patterns at least as common as the max_patterns-th most common can be listed: those (ties
        # included) are sorted, not every pattern (3,360,000 patterns: 0.47 s for the whole sort).
        cut = np.partition(counts, len(counts) - max_patterns)[len(counts) - max_patterns]
        chosen = np.flatnonzero(counts >= cut)
    n_missing = bits[chosen].sum(axis=1, dtype=np.int64)
    order = np.lexsort((chosen, n_missing, -counts[chosen]))
    if max_patterns is not None:
        order = order[:max_patterns]
    total = int(counts.sum())
    folded = len(counts) - len(order)
    listed_rows = counts[chosen[order]]
    missing_listed = n_missing[order]
    observed = (1 - bits[chosen[order]]).astype(np.int8)
    if folded:
        listed_rows = np.append(listed_rows, total - int(listed_rows.sum()))
    with np.errstate(divide="ignore", invalid="ignore"):
        pct = listed_rows / total * 100 if total else np.full(len(listed_rows), np.nan)
    head = pd.DataFrame({"n_rows": listed_rows.astype(np.int64), "pct_rows": pct,
                         "n_missing_variables": pd.array(np.append(missing_listed, 0) if folded
                                                         else missing_listed, dtype="Int64")})
    body = pd.DataFrame({j: pd.array(np.append(observed[:, j], 0) if folded else observed[:, j], dtype="Int8")
                         for j in range(len(names))})
    body.columns = list(names)
    if folded:  # the remainder row is no single pattern: nothing to say per variable
        head.loc[len(order), "n_missing_variables"] = pd.NA
        body.loc[len(order), :] = pd.NA
    return pd.concat([head, body], axis=1)


def dropout_order(missing_counts: Sequence[int], names: Sequence[str]) -> Tuple[str, ...]:
    """Variables from least to most missing (ties kept in column order).

    Parameters
    ----------
    missing_counts : missing values per variable, in column order.
    names : the variable names, in column order.

    Returns
    -------
    tuple of names; for monotone patterns this is an order in which the gaps are tails.
    """
    order = np.argsort(np.asarray(missing_counts), kind="stable")
    return tuple(names[i] for i in order)


def is_monotone(missing_bits: np.ndarray) -> bool:
    """Whether a set of missingness patterns is monotone.

    Monotone (a dropout design): the variables can be ordered so that once a variable is
    missing every later one is missing too. That holds exactly when the patterns' sets of
    missing variables are nested (each contains the smaller ones), which is checked on
    the patterns sorted by their number of missing variables.

    Parameters
    ----------
    missing_bits : patterns x variables, 1 = missing.

    Returns
    -------
    bool

    References
    ----------
    Little RJA, Rubin DB (2019). Statistical Analysis with Missing Data, 3rd ed. Wiley,
    section 1.3 (monotone missingness patterns).
    """
    if len(missing_bits) < 2:
        return True
    if len(missing_bits) > missing_bits.shape[1] + 1:
        return False  # a nested chain of subsets of p variables has at most p + 1 members
    bits = missing_bits.astype(bool)
    order = np.argsort(bits.sum(axis=1), kind="stable")
    smaller, larger = bits[order[:-1]], bits[order[1:]]
    return not bool(np.any(smaller & ~larger))


def rows_in_dropout_order(patterns: PatternCounts, order_index: Sequence[int]) -> float:
    """Percent of rows whose missing variables are the last ones of the dropout order.

    100 for monotone patterns; lower values say how many rows break a dropout reading.

    Parameters
    ----------
    patterns : from :func:`count_patterns`.
    order_index : column positions from least to most missing (:func:`dropout_order`).

    Returns
    -------
    float, percent of rows.
    """
    total = int(patterns.n_rows.sum())
    if total == 0:
        return float("nan")
    fits = np.ones(len(patterns.n_rows), dtype=bool)
    if len(order_index) > 1:
        # In chunks: the reordered bits and their differences are pattern-sized temporaries.
        for start in range(0, len(fits), _CHUNK_ROWS):
            bits = patterns.missing_bits[start:start + _CHUNK_ROWS][:, list(order_index)].astype(np.int8)
            fits[start:start + _CHUNK_ROWS] = np.all(np.diff(bits, axis=1) >= 0, axis=1)
    return float(patterns.n_rows[fits].sum() / total * 100)


# ---------------------------------------------------------------------------
# co-missingness

def comissingness(patterns: PatternCounts, names: Sequence[str]) -> Tuple[pd.DataFrame, pd.DataFrame]:
    """Which incomplete variables go missing together: counts, phi, conditional probabilities and lift.

    Computed from the pattern counts alone (so every engine that counts patterns gives the
    same table): with n rows, a and b the rows missing A and B, and ab the rows missing both,

    * phi = (n ab - a b) / sqrt(a (n - a) b (n - b)), the Pearson correlation of the two
      missingness indicators (NaN for a variable missing in every row: no variance);
    * P(B missing) = b / n and P(B missing | A missing) = ab / a (asymmetric);
    * lift = P(B missing | A missing) / P(B missing) = n ab / (a b): how many times more
      often B is missing in rows lacking A than in all rows (1: as often as by chance,
      0: never together). Lift itself is symmetric (it equals P(A | B) / P(A)); the
      conditional probabilities carry the direction.

    Not-applicable cells count as observed.

    Parameters
    ----------
    patterns : from :func:`count_patterns`.
    names : variable names in column order.

    Returns
    -------
    (long, matrix): long form with one row per ordered pair (A, B) of distinct incomplete
    variables (variable_a, variable_b, n_missing_a, n_missing_b, n_both_missing, phi,
    p_missing_b, p_missing_b_given_a, lift), A then B in column order; and the square phi
    matrix of the incomplete variables.

    References
    ----------
    Yule GU (1912). On the methods of measuring association between two attributes.
    J R Stat Soc 75:579-652 (the phi coefficient).
    Brin S, Motwani R, Ullman JD, Tsur S (1997). Dynamic itemset counting and implication
    rules for market basket data. SIGMOD Record 26(2):255-264 (lift, there called interest).
    """
    n = float(patterns.n_rows.sum())
    # The counts of rows are whole numbers: single precision adds them exactly while every sum stays below 2**24
    # (half the time of double precision for 3,360,000 patterns).
    exact = np.float32 if n < 2 ** 24 else np.float64
    counts = patterns.n_rows.astype(exact)
    both = np.zeros((len(names), len(names)))
    # Chunks keep the float copy of the pattern bits small (about 32 MB) when nearly every row is its own pattern.
    step = max(1024, _CHUNK_ROWS * 32 // max(len(names), 1))
    for start in range(0, len(counts), step):
        block = patterns.missing_bits[start:start + step].astype(exact)
        both += block.T @ (block * counts[start:start + step, None])
    both = np.rint(both)
    incomplete = [j for j in range(len(names)) if both[j, j] > 0]  # the diagonal: rows missing each variable
    labels = [names[j] for j in incomplete]
    both = both[np.ix_(incomplete, incomplete)]
    single = np.diag(both).copy()
    with np.errstate(divide="ignore", invalid="ignore"):
        spread = np.sqrt(single * (n - single))
        phi = (n * both - np.outer(single, single)) / np.outer(spread, spread)
        given = both / single[:, None]                   # row A, column B: P(B missing | A missing)
        lift = n * both / np.outer(single, single)
    phi[~np.isfinite(phi)] = np.nan
    matrix = pd.DataFrame(phi, index=labels, columns=labels)
    first, second = np.nonzero(~np.eye(len(labels), dtype=bool))  # ordered pairs, row-major
    long = pd.DataFrame({
        "variable_a": [labels[i] for i in first], "variable_b": [labels[j] for j in second],
        "n_missing_a": single[first].astype(np.int64), "n_missing_b": single[second].astype(np.int64),
        "n_both_missing": both[first, second].astype(np.int64), "phi": phi[first, second],
        "p_missing_b": single[second] / n if n else np.full(len(first), np.nan),
        "p_missing_b_given_a": given[first, second], "lift": lift[first, second],
    }, columns=list(COMISSING_COLUMNS))
    return long, matrix


# ---------------------------------------------------------------------------
# by group

def group_codes(values: pd.Series, missing: np.ndarray, not_applicable: np.ndarray,
                name: str) -> Tuple[np.ndarray, List[str]]:
    """Integer group codes and labels for a grouping variable; missing rows form "(missing)".

    Parameters
    ----------
    values : the grouping variable's values.
    missing, not_applicable : its boolean indicators.
    name : its name (for the error message).

    Returns
    -------
    (codes, labels): codes index into labels.
    """
    usable = ~(missing | not_applicable) & values.notna().to_numpy()
    codes = np.full(len(values), -1, dtype=np.int64)
    if isinstance(values.dtype, pd.CategoricalDtype):
        raw_codes = np.asarray(values.array.codes).astype(np.int64)
        present = np.unique(raw_codes[usable])  # declared levels in their order, empty ones left out
        levels = [str(values.cat.categories[k]) for k in present]
        remap = np.full(len(values.cat.categories), -1, dtype=np.int64)
        remap[present] = np.arange(len(present))
        codes[usable] = remap[raw_codes[usable]]
    else:
        uniques, inverse = np.unique(values.to_numpy()[usable], return_inverse=True)
        levels = [level_text(u) for u in uniques]
        codes[usable] = inverse
    if len(levels) > MAX_GROUP_LEVELS:
        raise InputError(f"'{name}' has {len(levels)} distinct values (more than {MAX_GROUP_LEVELS}); "
                         "group by a categorical variable such as arm or clinic", option="by")
    labels = list(levels)
    outside = (codes < 0) & not_applicable
    if outside.any():
        codes[outside] = len(labels)
        labels.append(GROUP_NOT_APPLICABLE)
    unknown = codes < 0
    if unknown.any():
        codes[unknown] = len(labels)
        labels.append(GROUP_MISSING)
    return codes, labels


def group_counts(cells: MissingCells, group: str, codes: np.ndarray, labels: Sequence[str]) -> GroupCounts:
    """Rows, missing and not-applicable cells per level of one grouping variable and per variable.

    Parameters
    ----------
    cells : from :func:`missing_cells`.
    group : the grouping variable's name.
    codes, labels : from :func:`group_codes`.

    Returns
    -------
    GroupCounts
    """
    k = len(labels)
    size = np.bincount(codes, minlength=k)
    missing = np.zeros((k, len(cells.names)), dtype=np.int64)
    not_applicable = np.zeros((k, len(cells.names)), dtype=np.int64)
    for j in range(len(cells.names)):
        # One pass per variable: each row lands in cell (group, state) with state 0 observed,
        # 1 missing, 2 not applicable.
        state = cells.missing_columns[j].view(np.int8) + 2 * cells.not_applicable_columns[j].view(np.int8)
        by_state = np.bincount(codes * 3 + state, minlength=3 * k).reshape(k, 3)
        missing[:, j], not_applicable[:, j] = by_state[:, 1], by_state[:, 2]
    return GroupCounts(group, tuple(labels), size, missing, not_applicable)


def missing_by_group(cells: MissingCells, group: str, codes: np.ndarray, labels: Sequence[str]) -> pd.DataFrame:
    """Per level of one grouping variable and per other variable: n, n_missing, pct_missing.

    Parameters
    ----------
    cells : from :func:`missing_cells`.
    group : the grouping variable's name (left out of its own rows).
    codes, labels : from :func:`group_codes`.

    Returns
    -------
    DataFrame with columns group_variable, group, variable, n, n_missing, pct_missing.
    """
    return by_group_table(group_counts(cells, group, codes, labels), cells.names)


def by_group_table(counts: GroupCounts, names: Sequence[str]) -> pd.DataFrame:
    """The by-group rows of one grouping variable from its counts (see :func:`missing_by_group`).

    Parameters
    ----------
    counts : from :func:`group_counts`.
    names : the variable names, in column order.

    Returns
    -------
    DataFrame with columns group_variable, group, variable, n, n_missing, pct_missing.
    """
    group, labels, size = counts.group, list(counts.labels), counts.size
    k = len(labels)
    frames = []
    for j, name in enumerate(names):
        if name == group:
            continue
        n_missing = counts.missing[:, j]
        n = size - counts.not_applicable[:, j]
        with np.errstate(divide="ignore", invalid="ignore"):
            pct = np.where(n > 0, n_missing / np.maximum(n, 1) * 100, np.nan)
        frames.append(pd.DataFrame({"group_variable": group, "group": list(labels), "variable": name,
                                    "n": n.astype(np.int64), "n_missing": n_missing.astype(np.int64),
                                    "pct_missing": pct}))
    if not frames:
        return pd.DataFrame(columns=list(BY_GROUP_COLUMNS))
    table = pd.concat(frames, ignore_index=True)
    # Group-major order: every variable for the first level, then the next level.
    order = np.lexsort((np.repeat(np.arange(len(frames)), k), np.tile(np.arange(k), len(frames))))
    return table.iloc[order].reset_index(drop=True)[list(BY_GROUP_COLUMNS)]


# ---------------------------------------------------------------------------
# the whole audit

def audit_frame(data: pd.DataFrame, *, reasons: Optional[pd.DataFrame] = None,
                types: Optional[Mapping[str, str]] = None, threshold: float = DEFAULT_THRESHOLD,
                by: Sequence[str] = (), top_patterns: int = 15,
                max_patterns: int = DEFAULT_MAX_PATTERNS) -> AuditResult:
    """Audit the missingness of a plain DataFrame (values, optionally with a frame of reasons).

    Parameters
    ----------
    data : one column per variable; NaN where missing or not applicable.
    reasons : same shape; NaN where observed, otherwise the reason label
        (``"not applicable"`` is not missing). None: every NaN gets the reason
        ``"unspecified"``.
    types : variable -> type; None infers them from the values (common practice, no source).
    threshold : a variable is flagged when its missing fraction exceeds this
        (0.20 is common practice, no source).
    by : grouping variables for the by-group table.
    top_patterns : how many of the most common patterns the figures show.
    max_patterns : the most patterns the pattern table lists one per row (the rest share a remainder row).

    Returns
    -------
    AuditResult (range_issues, extremes and types are empty/inferred for a plain frame).
    """
    _check_options(threshold, top_patterns, max_patterns)
    if reasons is None:
        reasons = reasons_from_values(data)
    if list(reasons.columns) != list(data.columns) or len(reasons) != len(data):
        raise InputError("must have the same columns and rows as the data", option="reasons")
    if types is None:
        types = {name: infer_type(data[name])[0] for name in data.columns}
    by = _grouping_variables(by, data.columns)
    types_table = pd.DataFrame({"variable": list(data.columns), "type": [types.get(c, "") for c in data.columns]})
    return _audit(data, reasons, dict(types), float(threshold), by, int(top_patterns),
                  _empty_review(list(RANGE_COLUMNS)), _empty_review(list(EXTREME_COLUMNS)), types_table,
                  int(max_patterns))


def audit_study(study: Study, *, threshold: float = DEFAULT_THRESHOLD, by: Sequence[str] = (),
                top_patterns: int = 15, max_patterns: int = DEFAULT_MAX_PATTERNS) -> AuditResult:
    """Audit a study after intake: missing counts by reason, patterns, co-missingness, groups.

    Parameters
    ----------
    study : from :func:`gapbook.intake.load_study`.
    threshold : missing fraction above which a variable is flagged (0.20 is common practice,
        no source).
    by : grouping variables, e.g. arm, clinic.
    top_patterns : how many of the most common patterns the figures show.
    max_patterns : the most patterns the pattern table lists one per row (the rest share a remainder row).

    Returns
    -------
    AuditResult, including the intake's range issues, extreme values and variable types.

    References
    ----------
    Little RJA, Rubin DB (2019). Statistical Analysis with Missing Data, 3rd ed. Wiley
    (missingness patterns, monotone patterns).
    """
    _check_options(threshold, top_patterns, max_patterns)
    by = _grouping_variables(by, study.data.columns)
    result = _audit(study.data, study.reasons, study.types, float(threshold), by, int(top_patterns),
                    study.range_issues.reset_index(drop=True), study.extreme_values.reset_index(drop=True),
                    study.variables_table(), int(max_patterns))
    return with_intake(result, notes=study.notes, warnings=study.warnings, rows_kept=study.rows_kept)


def with_intake(result: AuditResult, *, notes: Sequence[str], warnings: Sequence[str],
                rows_kept: Optional[RowsKept], engine: str = "pandas") -> AuditResult:
    """The audit with what intake found: its notes and warnings, and the rows ``data.keep_rows`` kept.

    Parameters
    ----------
    result : AuditResult
        The counts' audit.
    notes, warnings : sequence of str
        The intake's notes and warnings.
    rows_kept : RowsKept or None
        What the row filter kept (its sentence leads the page; its table is ``audit_rows_kept``).
    engine : str
        Which engine counted.

    Returns
    -------
    AuditResult
    """
    result = dataclasses.replace(result, notes=tuple(notes), warnings=tuple(warnings), engine=engine,
                                 rows_kept=rows_kept)
    return dataclasses.replace(result, sentences=audit_sentences(result))


def count_missingness(data: pd.DataFrame, reasons: pd.DataFrame, by: Sequence[str] = ()) -> MissingnessCounts:
    """Count reasons, patterns and by-group missingness of a study held in memory.

    Parameters
    ----------
    data : one column per variable (the grouping variables' values are read from it).
    reasons : same shape; NaN where observed, otherwise the reason label.
    by : grouping variables.

    Returns
    -------
    MissingnessCounts
    """
    cells = missing_cells(reasons)
    names = cells.names
    groups = []
    for group in by:
        j = names.index(group)
        codes, labels = group_codes(data[group], cells.missing_columns[j], cells.not_applicable_columns[j], group)
        groups.append(group_counts(cells, group, codes, labels))
    return MissingnessCounts(names=names, n_rows=cells.n_rows, reasons=reason_counts(cells),
                             patterns=count_patterns(cells.missing), groups=tuple(groups))


def _audit(data: pd.DataFrame, reasons: pd.DataFrame, types: Mapping[str, str], threshold: float,
           by: Tuple[str, ...], top_patterns: int, range_issues: pd.DataFrame, extremes: pd.DataFrame,
           types_table: pd.DataFrame, max_patterns: int) -> AuditResult:
    return audit_from_counts(count_missingness(data, reasons, by), types=types, threshold=threshold,
                             top_patterns=top_patterns, range_issues=range_issues, extremes=extremes,
                             types_table=types_table, max_patterns=max_patterns)


def audit_from_counts(counts: MissingnessCounts, *, types: Mapping[str, str], threshold: float, top_patterns: int,
                      range_issues: pd.DataFrame, extremes: pd.DataFrame, types_table: pd.DataFrame,
                      max_patterns: int = DEFAULT_MAX_PATTERNS) -> AuditResult:
    """Build every audit table from the counts (the one table builder for every engine).

    Parameters
    ----------
    counts : from :func:`count_missingness` or an engine that counts in SQL.
    types : variable -> type.
    threshold : missing fraction above which a variable is flagged.
    top_patterns : how many of the most common patterns the figures show.
    range_issues, extremes, types_table : the intake's review lists and types table.
    max_patterns : the most patterns the pattern table lists (the rest share one remainder row).

    Returns
    -------
    AuditResult
    """
    names = counts.names
    patterns = counts.patterns
    variables, reason_table = variable_table(counts.reasons, names, counts.n_rows, types, threshold)
    participants = participant_table(patterns)
    pattern_frame = pattern_table(patterns, names, max_patterns=max_patterns)
    missing_counts = variables["n_missing"].to_numpy()
    order = dropout_order(missing_counts, names)
    order_index = [names.index(v) for v in order]
    monotone = int(is_monotone(patterns.missing_bits))
    in_order = rows_in_dropout_order(patterns, order_index)
    comissing_long, comissing_matrix = comissingness(patterns, names)
    by = tuple(g.group for g in counts.groups)
    group_tables = [by_group_table(g, names) for g in counts.groups]
    by_group = (pd.concat(group_tables, ignore_index=True) if group_tables
                else pd.DataFrame(columns=list(BY_GROUP_COLUMNS)))

    n_rows, n_vars = counts.n_rows, len(names)
    complete = int(patterns.n_rows[patterns.missing_bits.sum(axis=1) == 0].sum()) if len(patterns.n_rows) else 0
    applicable_cells = int(variables["n"].sum())
    missing_cells_total = int(variables["n_missing"].sum())
    summary = pd.DataFrame([{
        "rows": n_rows, "variables": n_vars, "complete_rows": complete,
        "pct_complete_rows": complete / n_rows * 100 if n_rows else float("nan"),
        "incomplete_variables": int((missing_counts > 0).sum()),
        "over_threshold_variables": int(variables["over_threshold"].sum()),
        "n_patterns": int(len(patterns.n_rows)), "monotone": monotone,
        "pct_rows_in_dropout_order": in_order, "threshold": threshold,
        "missing_cells": missing_cells_total, "applicable_cells": applicable_cells,
        "pct_missing_cells": missing_cells_total / applicable_cells * 100 if applicable_cells else float("nan"),
        "not_applicable_cells": int(variables["n_not_applicable"].sum()),
        "patterns_listed": int(min(len(patterns.n_rows), max_patterns)),
    }])
    result = AuditResult(
        variables=variables, participants=participants, patterns=pattern_frame, comissingness=comissing_long,
        comissingness_matrix=comissing_matrix, by_group=by_group, summary=summary, reasons=reason_table,
        range_issues=range_issues, extremes=extremes, types=types_table,
        n_rows=n_rows, n_variables=n_vars, n_complete_rows=complete, n_patterns=int(len(patterns.n_rows)),
        monotone=monotone, pct_rows_in_dropout_order=in_order, dropout_order=order, threshold=threshold,
        top_patterns=top_patterns, by=by, max_patterns=max_patterns,
    )
    return dataclasses.replace(result, sentences=audit_sentences(result))


def pattern_shape(result: AuditResult, *, short: bool = False) -> str:
    """What the patterns' shape says: monotone (as with dropout), not monotone, or trivially monotone.

    With at most one incomplete variable, or one pattern of gaps (the incomplete variables
    always missing together), every set of patterns is monotone by definition (Little & Rubin
    2019, section 1.3): there is no order of gaps to read, so calling it a dropout design would
    say something the data do not show.

    Parameters
    ----------
    result : AuditResult
        The audit.
    short : bool
        The few words a figure title has room for.

    Returns
    -------
    str
    """
    incomplete = [name for name, n in zip(result.variables["variable"], result.variables["n_missing"]) if n > 0]
    if not incomplete:
        return "nothing missing" if short else "complete: no variable has a missing value"
    if len(incomplete) == 1:
        if short:
            return "one incomplete variable"
        return (f"monotone only trivially: one variable ('{incomplete[0]}') is incomplete, so each row either "
                "has it or lacks it and there is no order of dropout to read (whether its gaps depend on the "
                "other variables is the mechanism stage's question)")
    if result.n_patterns - (result.n_complete_rows > 0) == 1:
        if short:
            return "one pattern of gaps"
        shown = ", ".join(f"'{name}'" for name in incomplete[:6]) + (", ..." if len(incomplete) > 6 else "")
        return (f"monotone only trivially: the {len(incomplete)} incomplete variables ({shown}) are missing together "
                "in every incomplete row, one pattern of gaps, so there is no order of dropout to read")
    if result.monotone:
        return ("monotone (dropout)" if short else
                f"monotone: the {len(incomplete)} incomplete variables can be ordered so that a row missing one "
                "misses every later one, as when participants drop out")
    return ("not monotone" if short else
            f"not monotone; {result.pct_rows_in_dropout_order:.1f} % of rows fit the dropout order")


def audit_sentences(result: AuditResult) -> Tuple[str, ...]:
    """The study at a glance: rows, complete rows, incomplete and flagged variables, cells, patterns."""
    summary = result.summary.iloc[0]
    pattern_words = pattern_shape(result)
    kept = (result.rows_kept.audit_sentence(),) if result.rows_kept is not None else ()
    return kept + (
        f"{result.n_rows:,} rows and {result.n_variables} variables.",
        f"{result.n_complete_rows:,} rows ({summary['pct_complete_rows']:.1f} %) have nothing missing; "
        f"{counted(int(summary['incomplete_variables']), 'variable')} "
        f"{'has' if int(summary['incomplete_variables']) == 1 else 'have'} at least one missing value, and "
        f"{int(summary['over_threshold_variables'])} "
        f"{'lacks' if int(summary['over_threshold_variables']) == 1 else 'lack'} more than {result.threshold:.0%} "
        "of their values.",
        f"Of all cells that apply, {summary['pct_missing_cells']:.1f} % are missing.",
        f"The rows fall into {result.n_patterns:,} missingness patterns, which are {pattern_words}.",
    ) + _remainder_sentence(result)


def _remainder_sentence(result: AuditResult) -> Tuple[str, ...]:
    folded_patterns, folded_rows = result.unlisted_patterns()
    if not folded_patterns:
        return ()
    listed = result.n_patterns - folded_patterns
    pct = folded_rows / result.n_rows * 100 if result.n_rows else float("nan")
    return (f"The pattern table lists the {listed:,} most common patterns, one per row (max_patterns = "
            f"{result.max_patterns:,}); its last row holds the other {folded_patterns:,} patterns together "
            f"({folded_rows:,} rows, {pct:.1f} %), with the variable columns left blank.",)


def _check_options(threshold: float, top_patterns: int, max_patterns: int = DEFAULT_MAX_PATTERNS) -> None:
    try:
        value = float(threshold)
    except (TypeError, ValueError):
        raise InputError(f"'{threshold}' is not a number; give a fraction from 0 to 1, "
                         "e.g. 0.20", option="threshold") from None
    if not 0 <= value <= 1:
        raise InputError(f"{threshold} is outside 0 to 1; give a fraction, e.g. 0.20 for 20 %", option="threshold")
    if isinstance(top_patterns, bool) or not isinstance(top_patterns, (int, np.integer)) or top_patterns < 1:
        raise InputError(f"'{top_patterns}' must be a whole number of at least 1, e.g. 15", option="top_patterns")
    if (isinstance(max_patterns, bool) or not isinstance(max_patterns, (int, np.integer))
            or not 1 <= max_patterns <= MAX_PATTERNS_LISTED):
        raise InputError(f"'{max_patterns}' must be a whole number from 1 to {MAX_PATTERNS_LISTED:,}, e.g. "
                         f"{DEFAULT_MAX_PATTERNS}", option="max_patterns")


def _grouping_variables(by, columns: Sequence[str]) -> Tuple[str, ...]:
    """The grouping variables as a tuple (one name or several), each checked to be a column."""
    names = () if by is None else (by,) if isinstance(by, str) else tuple(by)
    for name in names:
        if name not in columns:
            raise InputError(f"'{name}' is not a variable of the study{did_you_mean(name, columns)}; "
                             "list grouping variables by their column names", option="by")
    return names


def _empty_review(columns: Sequence[str]) -> pd.DataFrame:
    return pd.DataFrame(columns=list(columns))
