"""``applies_if`` conditions as SQL, for the DuckDB engine (``data.engine: duckdb``).

The checked tree of a condition (:func:`gapbook.expressions.parse_expression`) is compiled
node by node into a DuckDB expression that gives, for every row, what
:meth:`gapbook.expressions.Expression.evaluate` gives over a pandas frame of the same
values: true, false or NULL (unknown). Nothing the user wrote is pasted into SQL:

- columns enter as the engine's internal aliases (``v0_c3``, ``k0_c3``), never by name;
- a text level is turned into its category code here, in Python, so text the user wrote
  never reaches SQL (two text columns are compared through their categories, which come
  from the data and enter as quoted literals);
- numbers enter as the ``repr`` of a finite float (the checker refuses anything else);
- a part that uses no column is computed here by the pandas path's own evaluator, and
  its value enters as a literal.

The same three-valued (Kleene) logic: a missing number is NULL (or NaN, which every
comparison and truth test turns into NULL first); SQL's ``AND``, ``OR`` and ``NOT`` are
Kleene's. Arithmetic ``+ - * /`` is IEEE double arithmetic in both (division by zero
gives an infinity or NaN); powers and the listed functions are computed by the very numpy
functions of :data:`gapbook.expressions.FUNCTIONS`, registered in the connection as
vectorised functions, so a ``log`` or ``x ** 0.5`` is bit-for-bit numpy's (a constant
argument is passed as the scalar numpy is given on the pandas path).

An operand that two comparisons share (``18 <= age * 12 < 65``) or that a list of
``in`` members tests is computed once as its own column (a *binding*) instead of being
written twice, so the SQL stays as long as the expression, however deeply it nests.
"""
from __future__ import annotations

import ast
import itertools
from dataclasses import dataclass, field
from typing import Any, Callable, Dict, List, Mapping, Optional, Sequence, Tuple

import numpy as np

from .errors import InputError
from .expressions import _COMPARE, _NUMBER_COMPARE, FUNCTIONS, Expression, _Evaluator, _shown, _Value

__all__ = ["SqlColumn", "CompiledCondition", "compile_condition", "layered_select"]

NAN = "'nan'::DOUBLE"
_FUNCTION_PREFIX = "gapbook_np_"
_counter = itertools.count()


@dataclass(frozen=True)
class SqlColumn:
    """How the compiler reads one column: a DOUBLE value or an INTEGER category code (NULL where missing)."""

    sql: str
    categories: Optional[Tuple[str, ...]] = None  # None: a number column
    ordered: bool = False


@dataclass(frozen=True)
class CompiledCondition:
    """A condition in SQL: ``sql`` is BOOLEAN (NULL unknown) over the columns and the bindings.

    ``bindings`` are (name, sql, layer): a binding's SQL reads the columns and the bindings
    of lower layers; every binding of layer k is computed in one projection over the ones
    below (:func:`layered_select`).
    """

    sql: str
    bindings: Tuple[Tuple[str, str, int], ...] = ()
    layer: int = 0


def _number_literal(value: float) -> str:
    value = float(value)
    if np.isnan(value):
        return NAN
    if np.isinf(value):
        return "'inf'::DOUBLE" if value > 0 else "'-inf'::DOUBLE"
    return f"({value!r}::DOUBLE)"


def _sql_text(value: str) -> str:
    return "'" + value.replace("'", "''") + "'"


# ---------------------------------------------------------------------------
# numpy's functions inside DuckDB

def _vectorised(function: Callable, constants: Sequence[Tuple[int, Any]], arity: int) -> Callable:
    """An Arrow function computing ``function`` with numpy: NULL in, NaN to numpy (as pandas holds it)."""
    import pyarrow as pa

    def run(*arrays):
        columns = iter(arrays)
        given = dict(constants)
        arguments = [given[k] if k in given else
                     np.asarray(next(columns).to_numpy(zero_copy_only=False), dtype=float)
                     for k in range(arity)]
        with np.errstate(all="ignore"):
            out = function(*arguments)
        return pa.array(np.asarray(out, dtype=float), type=pa.float64())

    # DuckDB reads the number of inputs from the signature.
    if arity - len(constants) == 1:
        return lambda a: run(a)
    return lambda a, b: run(a, b)


def _register(connection, function: Callable, arity: int, constants: Sequence[Tuple[int, Any]]) -> str:
    """A DuckDB function computing ``function`` with the given arguments fixed to numpy scalars; its name."""
    from duckdb.sqltypes import DOUBLE

    name = f"{_FUNCTION_PREFIX}{next(_counter)}"
    connection.create_function(name, _vectorised(function, constants, arity), [DOUBLE] * (arity - len(constants)),
                               DOUBLE, type="arrow", null_handling="special", side_effects=False)
    return name


# ---------------------------------------------------------------------------
# the compiler

@dataclass
class _Part:
    """A compiled sub-expression: its kind (number, logic, text) and SQL, or a constant computed in Python."""

    kind: str
    sql: Optional[str] = None          # number: DOUBLE; logic: BOOLEAN; text column: INTEGER code
    constant: Optional[_Value] = None  # a part that uses no column, as the pandas evaluator computed it
    categories: Tuple[str, ...] = ()
    ordered: bool = False
    column: Optional[str] = None
    layer: int = 0
    simple: bool = False               # a column or a literal: cheap to write twice

    @property
    def text(self) -> Optional[str]:
        """The text of a constant text part (a quoted literal in the expression)."""
        if self.constant is not None and self.kind == "text":
            return self.constant.data
        return None


class _Compiler:
    """Compiles a checked tree to SQL, visiting nodes in the order the pandas evaluator visits them.

    Every error a condition can raise is raised at the same node with the same words as
    :class:`gapbook.expressions._Evaluator` raises it, so both engines refuse a condition alike.
    """

    def __init__(self, columns: Mapping[str, SqlColumn], where: str, connection, prefix: str):
        self.columns = columns
        self.where = where
        self.connection = connection
        self.prefix = prefix
        self.bindings: List[Tuple[str, str, int]] = []
        self.constants = _Evaluator({}, where, 0)

    def fail(self, message: str) -> InputError:
        return InputError(f"{self.where}: {message}")

    # -- parts
    def column(self, name: str) -> _Part:
        if name not in self.columns:
            raise self.fail(f"'{_shown(name)}' is not a column of the data")
        column = self.columns[name]
        if column.categories is None:
            return _Part("number", column.sql, column=name, simple=True)
        return _Part("text", column.sql, categories=column.categories, ordered=column.ordered, column=name,
                     simple=True)

    def constant(self, node: ast.AST) -> _Part:
        value = self.constants.visit(node)  # numpy's own arithmetic on scalars, as on the pandas path
        if value.kind == "text":
            return _Part("text", constant=value, simple=True)
        data = float(np.asarray(value.data, dtype=float))
        if value.kind == "logic":
            sql = "NULL::BOOLEAN" if np.isnan(data) else ("true" if data == 1 else "false")
        else:
            sql = _number_literal(data)
        return _Part(value.kind, sql, constant=value, simple=True)

    def share(self, part: _Part) -> _Part:
        """The part computed once as a binding column when it is not cheap to write twice."""
        if part.simple:
            return part
        name = f"{self.prefix}b{len(self.bindings)}"
        layer = part.layer + 1
        self.bindings.append((name, part.sql, layer))
        return _Part(part.kind, name, categories=part.categories, ordered=part.ordered, column=part.column,
                     layer=layer, simple=True)

    # -- the walk
    def visit(self, node: ast.AST) -> _Part:
        if not _uses_columns(node):
            return self.constant(node)
        if isinstance(node, ast.Name):
            return self.column(node.id)
        if isinstance(node, ast.BinOp):
            left, right = self.numbers(node.left, node), self.numbers(node.right, node)
            layer = max(left.layer, right.layer)
            symbol = {ast.Add: "+", ast.Sub: "-", ast.Mult: "*", ast.Div: "/"}.get(type(node.op))
            if symbol is not None:
                return _Part("number", f"({left.sql} {symbol} {right.sql})", layer=layer)
            return self.function(lambda a, b: np.power(np.asarray(a, dtype=float), b), [left, right])
        if isinstance(node, ast.UnaryOp):
            if isinstance(node.op, ast.Not):
                truth = self.truth(node.operand, node)
                return _Part("logic", f"(NOT {truth.sql})", layer=truth.layer)
            value = self.numbers(node.operand, node)
            return _Part("number", f"(-{value.sql})" if isinstance(node.op, ast.USub) else value.sql,
                         layer=value.layer)
        if isinstance(node, ast.BoolOp):
            parts = [self.truth(operand, node) for operand in node.values]
            joiner = " AND " if isinstance(node.op, ast.And) else " OR "
            return _Part("logic", "(" + joiner.join(p.sql for p in parts) + ")", layer=max(p.layer for p in parts))
        if isinstance(node, ast.Compare):
            return self.compare(node)
        if isinstance(node, ast.Call):
            if isinstance(node.func, ast.Name) and node.func.id == "Q":
                return self.column(node.args[0].value)
            name = node.func.id if isinstance(node.func, ast.Name) else node.func.attr
            function, _ = FUNCTIONS[name]
            return self.function(function, [self.numbers(a, node) for a in node.args])
        raise self.fail(f"'{_shown(ast.unparse(node))}' cannot be evaluated")  # the checker let nothing else through

    def function(self, function: Callable, arguments: Sequence[_Part]) -> _Part:
        """A numpy function of the arguments; constant ones are passed as the scalars numpy gets on the pandas path."""
        constants = [(k, a.constant.data) for k, a in enumerate(arguments) if a.constant is not None]
        name = _register(self.connection, function, len(arguments), constants)
        given = [a.sql for a in arguments if a.constant is None]
        return _Part("number", f"{name}({', '.join(given)})", layer=max(a.layer for a in arguments))

    def numbers(self, node: ast.AST, parent: ast.AST) -> _Part:
        value = self.visit(node)
        if value.kind == "text":
            what = f"column '{_shown(value.column)}' holds text" if value.column else f"'{_shown(value.text)}' is text"
            raise self.fail(f"{what}; arithmetic needs numbers (in '{_shown(ast.unparse(parent))}')")
        if value.kind == "logic":
            if value.constant is not None:
                return _Part("number", _number_literal(float(np.asarray(value.constant.data, dtype=float))),
                             constant=_Value("number", value.constant.data), simple=True)
            return _Part("number", f"CAST({value.sql} AS DOUBLE)", layer=value.layer)
        return value

    def truth(self, node: ast.AST, parent: ast.AST) -> _Part:
        value = self.visit(node)
        if value.kind == "text":
            raise self.fail(f"'{_shown(ast.unparse(node))}' is text, not true/false; compare it, e.g. "
                            f"{_shown(ast.unparse(node))} == 'yes'")
        return value if value.kind == "logic" else _Part("logic", f"(nullif({value.sql}, {NAN}) <> 0)",
                                                          layer=value.layer)

    def compare(self, node: ast.Compare) -> _Part:
        left = self.visit(node.left)
        parts: List[_Part] = []
        for index, (op, right_node) in enumerate(zip(node.ops, node.comparators)):
            again = index + 1 < len(node.ops)  # the right operand is the next comparison's left one
            if isinstance(op, (ast.In, ast.NotIn)):
                members = [self.visit(e) for e in right_node.elts]
                if len(members) > 1 or again:
                    left = self.share(left)
                hits = [self.pair(ast.Eq(), left, member) for member in members]
                part = _Part("logic", "(" + " OR ".join(h.sql for h in hits) + ")",
                             layer=max(h.layer for h in hits))
                if isinstance(op, ast.NotIn):
                    part = _Part("logic", f"(NOT {part.sql})", layer=part.layer)
                right = left
            else:
                right = self.visit(right_node)
                if again:
                    right = self.share(right)
                part = self.pair(op, left, right)
            parts.append(part)
            left = right
        return _Part("logic", "(" + " AND ".join(p.sql for p in parts) + ")", layer=max(p.layer for p in parts))

    def pair(self, op: ast.cmpop, left: _Part, right: _Part) -> _Part:
        if left.kind == "text" or right.kind == "text":
            return self.compare_text(op, left, right)
        a, b = self.numbers_of(left), self.numbers_of(right)
        return _Part("logic", f"(nullif({a.sql}, {NAN}) {_COMPARE[type(op)].replace('==', '=')} nullif({b.sql}, {NAN}))",
                     layer=max(a.layer, b.layer))

    def numbers_of(self, part: _Part) -> _Part:
        if part.kind == "logic":
            if part.constant is not None:
                return _Part("number", _number_literal(float(np.asarray(part.constant.data, dtype=float))),
                             simple=True)
            return _Part("number", f"CAST({part.sql} AS DOUBLE)", layer=part.layer)
        return part

    def compare_text(self, op: ast.cmpop, left: _Part, right: _Part) -> _Part:
        symbol = _COMPARE[type(op)]
        if left.kind != "text" or right.kind != "text":
            text, number = (left, right) if left.kind == "text" else (right, left)
            raise self.fail(f"{_described(text)} is text and {_described(number)} is a number; they cannot be "
                            "compared (quote a level, e.g. == 'yes', or compare numbers with numbers)")
        if left.text is not None and right.text is not None:
            hit = bool(_NUMBER_COMPARE[type(op)](left.text, right.text))
            return _Part("logic", "true" if hit else "false", simple=True)
        if left.text is not None:  # literal on the left: flip the comparison
            flipped = {ast.Lt: ast.Gt, ast.LtE: ast.GtE, ast.Gt: ast.Lt, ast.GtE: ast.LtE}.get(type(op), type(op))
            return self.compare_text(flipped(), right, left)
        sql_symbol = symbol.replace("==", "=").replace("!=", "<>")
        if right.text is not None:
            position = self.level(left, right.text)
            if symbol not in ("==", "!=") and not left.ordered:
                raise self.fail(f"'{_shown(left.column)}' is not ordinal, so '{symbol}' has no meaning for it; "
                                "use == or in [...], or declare the variable ordinal with its levels in order")
            return _Part("logic", f"({left.sql} {sql_symbol} {position})", layer=left.layer)
        if symbol not in ("==", "!="):
            raise self.fail(f"'{symbol}' between two text columns has no meaning; use == or !=")
        return _Part("logic", f"({_labels(left)} {sql_symbol} {_labels(right)})", layer=max(left.layer, right.layer))

    def level(self, column: _Part, text: str) -> int:
        """The position of ``text`` among the column's levels, found (or refused) as the evaluator finds it."""
        return self.constants.level(_Value("text", None, column.categories, column.ordered, column.column,
                                           declared=True), text)


def _labels(part: _Part) -> str:
    """The category text of a text column's code (NULL where missing)."""
    if not part.categories:
        return "NULL::VARCHAR"
    return f"([{', '.join(_sql_text(c) for c in part.categories)}])[{part.sql} + 1]"


def _described(part: _Part) -> str:
    if part.column is not None:
        return f"column '{_shown(part.column)}'"
    if part.text is not None:
        return f"'{_shown(part.text)}'"
    if part.constant is not None:
        return f"{float(part.constant.data):g}"
    return "a computed value"


def _uses_columns(node: ast.AST) -> bool:
    """Whether a checked sub-tree reads a column (a name, or Q("...")); ``np`` in ``np.log`` is no column."""
    if isinstance(node, ast.Name):
        return True
    if isinstance(node, ast.Call):
        if isinstance(node.func, ast.Name) and node.func.id == "Q":
            return True
        return any(_uses_columns(argument) for argument in node.args)
    return any(_uses_columns(child) for child in ast.iter_child_nodes(node))


def compile_condition(expression: Expression, columns: Mapping[str, SqlColumn], *, connection,
                      prefix: str) -> CompiledCondition:
    """Compile a checked ``applies_if`` condition to a DuckDB expression (true, false or NULL per row).

    Parameters
    ----------
    expression : from :func:`gapbook.expressions.parse_expression` (kind ``"condition"``).
    columns : each column the data holds, as the SQL of its as-read value or category code.
    connection : the DuckDB connection the condition will run in (numpy's functions are
        registered there).
    prefix : a prefix, made of letters, digits and '_', for the names of the bindings.

    Returns
    -------
    CompiledCondition

    Raises
    ------
    InputError, with the words and at the node the pandas evaluator would raise it.
    """
    compiler = _Compiler(columns, expression.where, connection, prefix)
    with np.errstate(all="ignore"):
        result = compiler.visit(expression.tree.body)
    if result.kind == "text":
        raise InputError(f"{expression.where}: '{_shown(expression.text)}' gives text, not true/false")
    if result.kind == "number":
        result = _Part("logic", f"(nullif({result.sql}, {NAN}) <> 0)", layer=result.layer)
    return CompiledCondition(sql=result.sql, bindings=tuple(compiler.bindings), layer=result.layer)


def layered_select(source: str, bindings: Sequence[Tuple[str, str, int]]) -> str:
    """A relation of ``source``'s columns and every binding, each layer computed over the ones below.

    Parameters
    ----------
    source : str
        The SQL of the relation the bindings are computed over.
    bindings : sequence of (name, sql, layer)
        The bindings of :class:`CompiledCondition`.

    Returns
    -------
    str
        The SQL of the relation with one more column per binding.
    """
    relation = source
    for layer in sorted({b[2] for b in bindings}):
        columns = ", ".join(f"{sql} AS {name}" for name, sql, at in bindings if at == layer)
        relation = f"(SELECT *, {columns} FROM {relation})"
    return relation
