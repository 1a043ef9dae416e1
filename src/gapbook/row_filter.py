"""Which rows of the data file a study uses: the params key ``data.keep_rows``.

A multi-parameter file (a CDISC ADaM basic data structure dataset holds one row per subject,
parameter, visit and derivation type: ``PARAMCD``, ``ANL01FL``, ``DTYPE``) is analysed one
parameter's analysis rows at a time. ``data.keep_rows`` is a condition in gapbook's one
expression language (:mod:`gapbook.expressions`: parsed, checked against an allow-list and
computed by our own evaluator, never executed as Python). A row is kept where the condition
is true; rows where it is false or unknown are left out before any other step of intake, so
the audit, the checks and every stage see the kept rows only, as if the file held nothing
else; a column in ``data.ignore`` may be named in the condition (ADaM's ``PARAMCD``, ``ANL01FL``,
``DTYPE``): it is read for the filter only. The file's SHA-256 stays the whole file's, and the record says how many rows were read
and kept, and by which condition.

The condition reads the cells of the columns it names *as written in the file*: missing
markers do not apply (they belong to the analysis, and a filter is about the file's own
coding). A column whose every non-blank cell is a number is compared as numbers (a blank cell
there is unknown, so its row is left out); any other column is compared as text, surrounding
spaces ignored, and a blank cell is the text ``''`` (so ``DTYPE == ''`` keeps the observed,
not derived, rows of an ADaM file). A quoted value that no cell of that column holds is an
error (a typing slip would otherwise keep no row, or silently too many), and so is a
condition that keeps no row.

Both engines decide here, on the distinct combinations of the condition's columns (pandas
counts them in memory, DuckDB in SQL), so they keep the same rows by construction.
"""
from __future__ import annotations

import ast
from dataclasses import dataclass
from typing import Any, Dict, List, Optional, Sequence, Tuple

import numpy as np
import pandas as pd

from .errors import InputError, did_you_mean
from .expressions import CONDITION, Expression, parse_expression
from .params import Params
from .text import one_line

__all__ = ["KEEP_ROWS_KEY", "RowsKept", "keep_rows_expression", "filter_only_columns", "ignored_when_read",
           "decide_rows", "rows_to_keep"]

KEEP_ROWS_KEY = "data.keep_rows"


@dataclass(frozen=True)
class RowsKept:
    """What ``data.keep_rows`` kept: the condition as written, the rows read and the rows kept."""

    condition: str
    n_read: int
    n_kept: int

    def frame(self) -> pd.DataFrame:
        """One row: condition, rows_read, rows_kept, rows_left_out (the record's ``audit_rows_kept.csv``).

        Returns
        -------
        DataFrame
        """
        return pd.DataFrame([{"condition": self.condition, "rows_read": self.n_read, "rows_kept": self.n_kept,
                              "rows_left_out": self.n_read - self.n_kept}])

    def audit_sentence(self) -> str:
        """The audit page's sentence: rows read, rows kept and the condition (user text: escape where shown).

        Returns
        -------
        str
        """
        return (f"Rows kept by {KEEP_ROWS_KEY}: {self.n_kept:,} of the {self.n_read:,} rows of the data file, those "
                f"where {one_line(self.condition, 300)} is true; the other {self.n_read - self.n_kept:,} rows were "
                "left out before any count (the file's SHA-256 is that of the whole file).")

    def methods_sentence(self) -> str:
        """The drafted methods' sentence on which rows were analysed (user text: escape where shown).

        Returns
        -------
        str
        """
        return (f"The analysis used the {self.n_kept:,} of {self.n_read:,} rows of the data file for which "
                f"{one_line(self.condition, 300)} holds; the other rows were set aside before any step.")


def keep_rows_expression(params: Params, columns: Sequence[str]) -> Optional[Expression]:
    """The checked ``data.keep_rows`` condition over the file's columns, or None when the params give none.

    Parameters
    ----------
    params : Params
        The study params.
    columns : sequence of str
        The file's columns (after ``data.ignore``); every name the condition uses must be one.

    Returns
    -------
    Expression or None
    """
    text = params.data.keep_rows
    if text is None:
        return None
    return parse_expression(text, where=f"{params.label}: {KEEP_ROWS_KEY}", kind=CONDITION, columns=list(columns))


def filter_only_columns(params: Params) -> Tuple[str, ...]:
    """Columns in ``data.ignore`` that ``data.keep_rows`` names: read for the filter, then left out of the study.

    Parameters
    ----------
    params : Params
        The study params.

    Returns
    -------
    tuple of str
    """
    if params.data.keep_rows is None or not params.data.ignore:
        return ()
    named = parse_expression(params.data.keep_rows, where=f"{params.label}: {KEEP_ROWS_KEY}", kind=CONDITION).columns
    return tuple(c for c in params.data.ignore if c in named)


def ignored_when_read(params: Params) -> Tuple[str, ...]:
    """The columns left out when the file is read: ``data.ignore`` minus :func:`filter_only_columns`.

    Parameters
    ----------
    params : Params
        The params whose ``data.ignore`` and ``data.keep_rows`` are read.

    Returns
    -------
    tuple of str
        Column names, in ``data.ignore``'s order.
    """
    kept = set(filter_only_columns(params))
    return tuple(c for c in params.data.ignore if c not in kept)


def _cell(value: Any) -> Any:
    """A raw cell as the condition reads it: None when blank, a float for a typed number, else stripped text."""
    if value is None or value is pd.NA or value is pd.NaT:
        return None
    if isinstance(value, (bool, np.bool_)):
        return str(bool(value))
    if isinstance(value, (int, float, np.integer, np.floating)):
        number = float(value)
        return None if np.isnan(number) else number
    text = str(value).strip()
    return None if text == "" else text


def _as_number(value: Any, params: Params) -> Optional[float]:
    from .intake import NumberFormat  # intake imports this module; the number rules are intake's

    if isinstance(value, float):
        return value
    return NumberFormat(params.data.decimal, params.data.thousands).parse(value)


def _typed_columns(columns: Sequence[str], combos: Sequence[Tuple[Any, ...]], params: Params
                   ) -> Tuple[Dict[str, np.ndarray], Dict[str, Tuple[str, ...]]]:
    """Each column of the condition over the combinations: numbers (float, NaN blank) or texts ('' blank)."""
    values: Dict[str, np.ndarray] = {}
    texts: Dict[str, Tuple[str, ...]] = {}
    for j, name in enumerate(columns):
        cells = [_cell(combo[j]) for combo in combos]
        filled = [c for c in cells if c is not None]
        numbers = [_as_number(c, params) for c in filled]
        if filled and all(n is not None for n in numbers):
            values[name] = np.array([np.nan if c is None else _as_number(c, params) for c in cells], dtype=float)
        else:
            shown = ["" if c is None else (format(c, "g") if isinstance(c, float) else str(c)) for c in cells]
            values[name] = np.array(shown, dtype=object)
            texts[name] = tuple(sorted(set(shown)))
    return values, texts


def _column_of(node: ast.AST) -> Optional[str]:
    if isinstance(node, ast.Name):
        return node.id
    if (isinstance(node, ast.Call) and isinstance(node.func, ast.Name) and node.func.id == "Q" and node.args
            and isinstance(node.args[0], ast.Constant)):
        return str(node.args[0].value)
    return None


def _texts_of(node: ast.AST) -> List[str]:
    if isinstance(node, ast.Constant) and isinstance(node.value, str):
        return [node.value]
    if isinstance(node, (ast.List, ast.Tuple)):
        return [e.value for e in node.elts if isinstance(e, ast.Constant) and isinstance(e.value, str)]
    return []


def _refuse_unknown_texts(expression: Expression, texts: Dict[str, Tuple[str, ...]], where: str,
                          label: str) -> None:
    """A quoted value compared with a text column must be one of that column's cells (case aside)."""
    for node in ast.walk(expression.tree):
        if not isinstance(node, ast.Compare):
            continue
        operands = [node.left] + list(node.comparators)
        named = [c for c in (_column_of(o) for o in operands) if c in texts]
        quoted = [t for o in operands for t in _texts_of(o)]
        for column in named:
            folded = {t.casefold() for t in texts[column]}
            for text in quoted:
                if text.strip().casefold() not in folded:
                    shown = ", ".join(repr(t) for t in texts[column][:12]) + (", ..." if len(texts[column]) > 12 else "")
                    raise InputError(f"{where}: no row of {label} has '{one_line(text, 60)}' in column "
                                     f"'{one_line(column, 60)}' (its values: {shown})"
                                     f"{did_you_mean(text, list(texts[column]))}; correct the value, or leave it out "
                                     "of the condition")


def decide_rows(columns: Sequence[str], combos: Sequence[Tuple[Any, ...]], counts: Sequence[int],
                expression: Expression, *, params: Params, label: str) -> Tuple[np.ndarray, RowsKept, List[str]]:
    """Which distinct combinations of the condition's cells the study keeps.

    Parameters
    ----------
    columns : sequence of str
        The columns the condition names (``expression.columns``), in the order of each combination.
    combos : sequence of tuples
        The distinct combinations of those columns' raw cells in the file.
    counts : sequence of int
        How many rows hold each combination.
    expression : Expression
        The checked condition (:func:`keep_rows_expression`).
    params : Params
        The params (the number format of text files; the params file for messages).
    label : str
        The data file's name for messages.

    Returns
    -------
    (keep, kept, warnings) : bool array over the combinations, :class:`RowsKept`, list of str

    Raises
    ------
    InputError
        A quoted value no cell of its column holds, a comparison the evaluator refuses (text
        against a number), or a condition true for no row: exit 2 naming ``data.keep_rows``.
    """
    where = f"{params.label}: {KEEP_ROWS_KEY}"
    values, texts = _typed_columns(columns, combos, params)
    _refuse_unknown_texts(expression, texts, where, label)
    truth = expression.evaluate({name: pd.Series(array) for name, array in values.items()}) if len(combos) else \
        np.zeros(0)
    keep = np.asarray(truth) == 1
    counts = np.asarray(counts, dtype=np.int64)
    n_read, n_kept = int(counts.sum()), int(counts[keep].sum())
    shown = one_line(expression.text, 120)
    if n_kept == 0 and n_read:
        raise InputError(f"{where}: '{shown}' is true for no row of {label} ({n_read:,} rows read; a row whose "
                         "condition is unknown, a blank number, is left out too); check the column names and values")
    warnings = []
    if n_kept == n_read and n_read:
        warnings.append(f"{where}: '{shown}' is true for every row of {label}: no row is left out")
    return keep, RowsKept(condition=expression.text, n_read=n_read, n_kept=n_kept), warnings


def rows_to_keep(raw: pd.DataFrame, expression: Expression, *, params: Params, label: str
                 ) -> Tuple[np.ndarray, RowsKept, List[str]]:
    """The rows of a raw frame (cells as read) that ``data.keep_rows`` keeps.

    Parameters
    ----------
    raw : DataFrame
        The file's cells as read (:func:`gapbook.intake.read_table`).
    expression : Expression
        The checked condition.
    params : Params
        The params.
    label : str
        The data file's name for messages.

    Returns
    -------
    (keep, kept, warnings) : bool array over the rows, :class:`RowsKept`, list of str
    """
    columns = list(expression.columns)
    keys = pd.Series(list(zip(*[raw[c].map(_cell).tolist() for c in columns])), dtype=object)
    codes, uniques = pd.factorize(keys)
    counts = np.bincount(codes, minlength=len(uniques))
    keep, kept, warnings = decide_rows(columns, list(uniques), counts, expression, params=params, label=label)
    return keep[codes], kept, warnings
