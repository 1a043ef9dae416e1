"""The one small expression language for everything a user writes.

Three params keys hold expressions: ``variables.<x>.applies_if`` (a condition per row),
``imputation.passive.<x>`` (a number per row) and ``analysis.formula`` (a statsmodels
formula whose terms are expressions). All three are parsed with Python's :mod:`ast`
(``mode="eval"``) and checked against an allow-list before anything else happens;
conditions and passive values are then computed by :func:`Expression.evaluate`, our own
evaluator over the checked tree (numpy, vectorised over columns). Nothing a user wrote is
ever given to ``eval``, ``exec``, ``DataFrame.eval`` or ``DataFrame.query``; a formula
goes to patsy only after every one of its terms passed the check, and patsy then
evaluates it in :data:`FORMULA_NAMESPACE`, which holds nothing but the listed functions.

What an expression may contain
------------------------------
- column names: bare (``age``), or for a name that is not a Python identifier
  ``Q("alk.phos")`` — and, in conditions and passive formulas only, ```alk.phos```;
- numbers, quoted text, ``True``/``False``;
- arithmetic ``+ - * / **`` and unary ``-``;
- comparisons ``== != < <= > >=`` (chains such as ``18 <= age < 65`` too), and
  ``in``/``not in`` with a list of numbers or texts (``site in ["A", "B"]``);
- ``and``, ``or``, ``not``;
- the functions in :data:`FUNCTIONS`, bare (``log(x)``) or as ``np.log(x)``.

Formula terms may use ``np.<function>`` (not the bare name: a plain statsmodels fit would
not know it) and patsy's own helpers ``C``, ``Q``, ``I``, ``center``, ``standardize``,
``scale``, ``bs``, ``cr``, ``cc`` with the keyword arguments listed in
:data:`FORMULA_KEYWORDS`, and the contrasts ``Treatment``, ``Sum``, ``Helmert``, ``Diff``,
``Poly`` as the second argument of ``C``. Nothing else: no attribute access beyond
``np.<listed function>``, no subscripts, no names starting with an underscore, no lambdas,
comprehensions, conditional expressions, starred or unlisted keyword arguments, f-strings
or ``:=``. A rejected expression is an :class:`~gapbook.errors.InputError` that names the
params key and the part that is not allowed.

Missing values: a missing input gives a missing (NaN) number; a comparison with a missing
value is *unknown*; ``and``/``or``/``not`` follow three-valued (Kleene) logic, so
``x > 1 or y == 2`` is true where ``y == 2`` even if ``x`` is missing.
"""
from __future__ import annotations

import ast
import functools
import keyword
import math
import types
from dataclasses import dataclass
from typing import Any, Dict, List, Mapping, Optional, Sequence, Tuple

import numpy as np
import pandas as pd

from .errors import InputError, did_you_mean

__all__ = ["FORMULA_NAMESPACE", "MAX_LENGTH", "MAX_DEPTH", "ExpressionError", "Expression", "parse_expression",
           "parse_formula", "formula_environment", "ColumnAliases"]

#: Functions an expression may call: name -> (numpy function, number of arguments).
FUNCTIONS: Dict[str, Tuple[Any, int]] = {
    "log": (np.log, 1), "log2": (np.log2, 1), "log10": (np.log10, 1), "log1p": (np.log1p, 1),
    "exp": (np.exp, 1), "expm1": (np.expm1, 1), "sqrt": (np.sqrt, 1), "abs": (np.abs, 1),
    "floor": (np.floor, 1), "ceil": (np.ceil, 1), "minimum": (np.minimum, 2), "maximum": (np.maximum, 2),
}
#: Patsy helpers a formula term may call, with the keyword arguments each accepts.
FORMULA_KEYWORDS: Dict[str, Tuple[str, ...]] = {
    "C": ("contrast", "levels"),
    "Q": (),
    "I": (),
    "center": (),
    "standardize": ("center", "rescale", "ddof"),
    "scale": ("center", "rescale", "ddof"),
    "bs": ("df", "knots", "degree", "include_intercept", "lower_bound", "upper_bound"),
    "cr": ("df", "knots", "lower_bound", "upper_bound", "constraints"),
    "cc": ("df", "knots", "lower_bound", "upper_bound", "constraints"),
}
#: Contrasts allowed as the second argument of ``C``, with the keyword each accepts.
CONTRASTS: Dict[str, Tuple[str, ...]] = {"Treatment": ("reference",), "Sum": ("omit",), "Helmert": (),
                                         "Diff": (), "Poly": ()}
#: What patsy sees besides the data when it evaluates a checked formula: ``np`` holding only
#: the listed functions (patsy adds its own helpers itself).
FORMULA_NAMESPACE: Dict[str, Any] = {
    "np": types.SimpleNamespace(**{name: function for name, (function, _) in FUNCTIONS.items()}),
}
MAX_LENGTH = 2_000            # characters in one applies_if or passive expression
MAX_FORMULA_LENGTH = 20_000   # characters in analysis.formula (about 2,000 covariates)
MAX_DEPTH = 40                # nesting of operators and calls; real expressions stay under ten

CONDITION, VALUE, TERM = "condition", "value", "term"
_HELP = {
    CONDITION: "use column names, numbers, quoted text, comparisons (== != < <= > >=, in [...]), and/or/not, "
               "+ - * / ** and the functions " + ", ".join(FUNCTIONS),
    VALUE: "use column names, numbers, + - * / **, comparisons and the functions " + ", ".join(FUNCTIONS),
    TERM: "formula terms may use column names, Q(\"odd name\"), C(), I(), center(), standardize(), scale(), bs(), "
          "cr(), cc() and np." + ", np.".join(FUNCTIONS),
}
_COMPARE = {ast.Eq: "==", ast.NotEq: "!=", ast.Lt: "<", ast.LtE: "<=", ast.Gt: ">", ast.GtE: ">="}
_ARITHMETIC = (ast.Add, ast.Sub, ast.Mult, ast.Div, ast.Pow)


class ExpressionError(InputError, ValueError):
    """An expression that is not allowed; the message names the key and the part (also a ValueError for pydantic).

    ``where`` is the params key (may be empty when the caller names it), ``detail`` the rest.
    """

    def __init__(self, where: str, detail: str) -> None:
        self.where = where
        self.detail = detail
        super().__init__(f"{where}: {detail}" if where else detail)


def _shown(text: str, limit: int = 60) -> str:
    """A fragment of user text for an error message: one line, printable, not too long."""
    flat = "".join(ch if ch.isprintable() else f"\\x{ord(ch):02x}" if ord(ch) < 256 else f"\\u{ord(ch):04x}"
                   for ch in str(text))
    return flat if len(flat) <= limit else flat[: limit - 3] + "..."


# ---------------------------------------------------------------------------
# parsing and checking

@dataclass(frozen=True)
class Expression:
    """A checked condition or value expression, ready to evaluate over columns.

    ``columns`` lists the columns it uses, in order of first appearance; ``where`` is the
    params key it came from (used in error messages).
    """

    text: str
    kind: str
    where: str
    tree: ast.Expression
    columns: Tuple[str, ...]

    def evaluate(self, data: Mapping[str, Any]) -> np.ndarray:
        """The expression for every row of ``data`` (a DataFrame or {column: array}).

        Returns a float array: for a condition 1.0 (true), 0.0 (false) or NaN (unknown
        because an input is missing); for a value the number, NaN where it cannot be
        computed from the inputs.
        """
        n = _rows(data, self.columns)
        result = _Evaluator(data, self.where, n).visit(self.tree.body)
        if result.kind == "text":
            raise InputError(f"{self.where}: '{_shown(self.text)}' gives text, not "
                             f"{'true/false' if self.kind == CONDITION else 'a number'}")
        values = result.truth() if self.kind == CONDITION else result.number()
        return np.broadcast_to(values, (n,)).astype(float, copy=True)


def _rows(data: Mapping[str, Any], columns: Sequence[str]) -> int:
    if isinstance(data, pd.DataFrame):
        return len(data)
    lengths = {len(data[c]) for c in columns if c in data}
    if len(lengths) > 1:
        raise ValueError("columns of different lengths")
    return lengths.pop() if lengths else 0


def _parse_tree(text: str, where: str, limit: int, kind: str) -> ast.Expression:
    if not isinstance(text, str):
        raise ExpressionError(where, f"must be text (got {type(text).__name__})")
    if len(text) > limit:
        raise ExpressionError(where, f"the expression is {len(text):,} characters long; at most {limit:,} "
                              "are allowed")
    if not text.strip():
        raise ExpressionError(where, f"the expression is empty")
    try:
        tree = ast.parse(text.strip(), mode="eval")
    except SyntaxError as exc:
        detail = f" ({exc.msg})" if exc.msg else ""
        raise ExpressionError(where, f"'{_shown(text)}' is not a valid expression{detail}; "
                              f"{_HELP[kind]}{_odd_name_hint(text)}") from None
    except (ValueError, RecursionError, MemoryError, OverflowError):
        raise ExpressionError(where, f"'{_shown(text)}' cannot be read (too long, too deeply nested or a "
                              "number too large)") from None
    _check_depth(tree, where)
    return tree


def _odd_name_hint(text: str) -> str:
    words = text.split()
    if len(words) >= 2 and all(w.isidentifier() for w in words):
        return f"; a column name with spaces is written Q(\"{_shown(text.strip())}\")"
    return ""


def _check_depth(tree: ast.AST, where: str) -> None:
    """Refuse trees nested deeper than MAX_DEPTH before walking them recursively."""
    stack = [(tree, 0)]
    while stack:
        node, depth = stack.pop()
        if depth > MAX_DEPTH:
            raise ExpressionError(where, f"the expression is nested more than {MAX_DEPTH} levels deep; "
                                  "write it more simply")
        stack.extend((child, depth + 1) for child in ast.iter_child_nodes(node))


def _backticks_to_q(text: str, where: str) -> str:
    """Rewrite ```odd name``` as ``Q('odd name')``; backticks inside quoted text are left alone."""
    if "`" not in text:
        return text
    out: List[str] = []
    quote: Optional[str] = None
    i = 0
    while i < len(text):
        ch = text[i]
        if quote is not None:
            out.append(ch)
            if ch == "\\" and i + 1 < len(text):
                out.append(text[i + 1])
                i += 1
            elif ch == quote:
                quote = None
        elif ch in "'\"":
            quote = ch
            out.append(ch)
        elif ch == "`":
            end = text.find("`", i + 1)
            if end < 0:
                raise ExpressionError(where, f"a backtick-quoted column name is not closed; write `name`")
            out.append(f"Q({text[i + 1:end]!r})")
            i = end
        else:
            out.append(ch)
        i += 1
    return "".join(out)


class _Checker:
    """Walks a parsed tree and refuses any node outside the allow-list for its context."""

    def __init__(self, source: str, where: str, kind: str, columns: Optional[Sequence[str]]):
        self.source = source
        self.where = where
        self.kind = kind
        self.columns = None if columns is None else list(columns)
        self.known = None if columns is None else set(self.columns)
        self.used: List[str] = []
        self.coded: List[str] = []   # columns given categorical coding by C()

    # -- messages
    def part(self, node: ast.AST) -> str:
        segment = ast.get_source_segment(self.source, node)
        return _shown(segment if segment is not None else ast.unparse(node))

    def refuse(self, node: ast.AST, text: Optional[str] = None, help_text: Optional[str] = None) -> ExpressionError:
        return ExpressionError(self.where, f"'{text or self.part(node)}' is not allowed; "
                               f"{help_text or _HELP[self.kind]}")

    # -- columns
    def column(self, name: str, node: ast.AST) -> None:
        if self.known is not None and name not in self.known:
            raise ExpressionError(self.where, f"'{_shown(name)}' is not a column of the data"
                                  f"{did_you_mean(name, self.columns)}")
        if name not in self.used:
            self.used.append(name)

    def name(self, node: ast.Name) -> None:
        if node.id.startswith("_"):
            help_text = (None if node.id.startswith("__") or (self.known is not None and node.id not in self.known)
                         else f"a column whose name starts with '_' is written Q(\"{_shown(node.id)}\")")
            raise self.refuse(node, help_text=help_text)
        if node.id == "np" and (self.known is None or node.id not in self.known):
            raise self.refuse(node, help_text="np. offers only " + ", ".join(FUNCTIONS))
        self.column(node.id, node)

    def quoted_column(self, node: ast.Call) -> None:
        if len(node.args) != 1 or node.keywords or not (isinstance(node.args[0], ast.Constant)
                                                         and isinstance(node.args[0].value, str)):
            raise self.refuse(node, help_text='Q() takes one quoted column name, e.g. Q("alk.phos")')
        self.column(node.args[0].value, node)

    # -- the walk
    def value(self, node: ast.AST) -> None:
        """Anything that computes per row: arithmetic, comparisons, logic, calls, columns, constants."""
        if isinstance(node, ast.Constant):
            if isinstance(node.value, bool) or isinstance(node.value, (int, float, str)) and not isinstance(
                    node.value, complex):
                if isinstance(node.value, (int, float)) and not isinstance(node.value, bool) and not (
                        abs(node.value) < 10 ** 300 and math.isfinite(node.value)):
                    raise self.refuse(node, help_text="numbers must be finite and below 1e300")
                return
            raise self.refuse(node)
        if isinstance(node, ast.Name):
            return self.name(node)
        if isinstance(node, ast.BinOp) and isinstance(node.op, _ARITHMETIC):
            self.value(node.left)
            return self.value(node.right)
        if isinstance(node, ast.UnaryOp) and isinstance(node.op, (ast.USub, ast.UAdd, ast.Not)):
            return self.value(node.operand)
        if isinstance(node, ast.BoolOp):
            for operand in node.values:
                self.value(operand)
            return None
        if isinstance(node, ast.Compare):
            self.value(node.left)
            for op, right in zip(node.ops, node.comparators):
                if isinstance(op, (ast.In, ast.NotIn)):
                    self.literal_list(right)
                elif type(op) in _COMPARE:
                    self.value(right)
                else:
                    raise self.refuse(node, text=f"{type(op).__name__.lower()} comparison")
            return None
        if isinstance(node, ast.Call):
            return self.call(node)
        if isinstance(node, ast.Attribute):
            raise self.attribute_error(node)
        if isinstance(node, ast.Subscript):
            self.value(node.value)  # name the inner part when it is the one not allowed
        raise self.refuse(node)

    def literal(self, node: ast.AST) -> None:
        """A number, text or True/False, possibly negated (arguments of helpers, members of lists)."""
        if isinstance(node, ast.UnaryOp) and isinstance(node.op, (ast.USub, ast.UAdd)):
            node = node.operand
            if isinstance(node, ast.Constant) and isinstance(node.value, (int, float)) \
                    and not isinstance(node.value, bool):
                return None
        if isinstance(node, ast.Constant) and isinstance(node.value, (bool, int, float, str)):
            return None
        raise self.refuse(node, help_text="only numbers and quoted text are allowed here")

    def literal_list(self, node: ast.AST) -> None:
        if not isinstance(node, (ast.List, ast.Tuple, ast.Set)):
            raise self.refuse(node, help_text="'in' takes a list of numbers or quoted texts, e.g. site in ['A', 'B']")
        if not node.elts:
            raise self.refuse(node, help_text="the list after 'in' is empty")
        for element in node.elts:
            self.literal(element)

    def function_name(self, func: ast.AST) -> Optional[str]:
        """``log`` or ``np.log`` -> 'log' (None for a patsy helper or anything else)."""
        if isinstance(func, ast.Attribute) and isinstance(func.value, ast.Name) and func.value.id == "np":
            if func.attr in FUNCTIONS:
                return func.attr
            raise self.attribute_error(func)
        if isinstance(func, ast.Name) and func.id in FUNCTIONS:
            if self.kind == TERM:
                raise self.refuse(func, help_text=f"in a formula write np.{func.id}(...), as statsmodels expects")
            return func.id
        return None

    def attribute_error(self, node: ast.Attribute) -> ExpressionError:
        chain: List[str] = []
        inner: ast.AST = node
        while isinstance(inner, ast.Attribute):
            chain.append(inner.attr)
            inner = inner.value
        dunder = next((a for a in reversed(chain) if a.startswith("_")), None)
        if dunder is not None:
            return self.refuse(node, text=_shown(dunder))
        if isinstance(inner, ast.Name):
            dotted = ".".join([inner.id] + list(reversed(chain)))
            if inner.id == "np":
                return self.refuse(node, text=_shown(f"np.{chain[-1]}"),
                                   help_text="np. offers only " + ", ".join(FUNCTIONS))
            if self.known is not None and dotted in self.known:
                return ExpressionError(self.where, f"'{_shown(dotted)}' is a column name with a dot; write it as "
                                       f"Q(\"{_shown(dotted)}\")")
            return self.refuse(node, text=_shown(dotted),
                               help_text=f"a column name with dots is written Q(\"{_shown(dotted)}\")")
        if not isinstance(inner, ast.Name):
            try:
                self.value(inner)  # name the inner call when it is the one not allowed
            except ExpressionError as inner_error:
                return inner_error
        return self.refuse(node)

    def call(self, node: ast.Call) -> None:
        if any(isinstance(a, ast.Starred) for a in node.args) or any(k.arg is None for k in node.keywords):
            raise self.refuse(node, text="*/** arguments")
        function = self.function_name(node.func)
        if function is not None:
            _, arity = FUNCTIONS[function]
            if node.keywords or len(node.args) != arity:
                raise self.refuse(node, help_text=f"{function}() takes {arity} argument{'s' if arity > 1 else ''} "
                                  "and no keywords")
            for argument in node.args:
                self.value(argument)
            return None
        if isinstance(node.func, ast.Name) and node.func.id == "Q":
            return self.quoted_column(node)
        if self.kind == TERM and isinstance(node.func, ast.Name) and node.func.id in FORMULA_KEYWORDS:
            return self.helper(node, node.func.id)
        if isinstance(node.func, ast.Name) and not node.func.id.startswith("_"):
            listed = ", ".join(FUNCTIONS) if self.kind != TERM else ", ".join(
                ["np." + f for f in FUNCTIONS] + list(FORMULA_KEYWORDS))
            raise self.refuse(node.func, help_text=f"the functions allowed are {listed}")
        if isinstance(node.func, ast.Attribute):
            raise self.attribute_error(node.func)
        raise self.refuse(node.func)

    def helper(self, node: ast.Call, name: str) -> None:
        allowed = FORMULA_KEYWORDS[name]
        for keyword_arg in node.keywords:
            if keyword_arg.arg not in allowed:
                raise self.refuse(node, text=f"{name}(..., {keyword_arg.arg}=...)",
                                  help_text=f"{name}() accepts " + (", ".join(f"{k}=" for k in allowed)
                                                                    if allowed else "no keywords"))
        if name == "C":
            if not 1 <= len(node.args) <= 2:
                raise self.refuse(node, help_text="C() takes the variable and optionally a contrast, "
                                  "e.g. C(site, Treatment('B'))")
            self.value(node.args[0])
            for inner in ast.walk(node.args[0]):
                if isinstance(inner, ast.Name) and inner.id in self.used:
                    self.coded.append(inner.id)
                elif (isinstance(inner, ast.Call) and isinstance(inner.func, ast.Name) and inner.func.id == "Q"
                      and inner.args and isinstance(inner.args[0], ast.Constant)):
                    self.coded.append(str(inner.args[0].value))
            contrasts = ([node.args[1]] if len(node.args) == 2 else []) + [
                k.value for k in node.keywords if k.arg == "contrast"]
            for contrast in contrasts:
                self.contrast(contrast)
            for keyword_arg in node.keywords:
                if keyword_arg.arg == "levels":
                    self.literal_list(keyword_arg.value)
            return None
        if len(node.args) != 1:
            raise self.refuse(node, help_text=f"{name}() takes one argument")
        self.value(node.args[0])
        for keyword_arg in node.keywords:
            if keyword_arg.arg == "knots":
                self.literal_list(keyword_arg.value)
            else:
                self.literal(keyword_arg.value)
        return None

    def contrast(self, node: ast.AST) -> None:
        if isinstance(node, ast.Name) and node.id in CONTRASTS:
            return None
        if isinstance(node, ast.Call) and isinstance(node.func, ast.Name) and node.func.id in CONTRASTS:
            allowed = CONTRASTS[node.func.id]
            if any(isinstance(a, ast.Starred) for a in node.args) or len(node.args) > (1 if allowed else 0) or any(
                    k.arg not in allowed for k in node.keywords) or len(node.args) + len(node.keywords) > 1:
                raise self.refuse(node, help_text=f"{node.func.id}() takes "
                                  + (f"one level, e.g. {node.func.id}({allowed[0]}='B')" if allowed else "nothing"))
            for argument in list(node.args) + [k.value for k in node.keywords]:
                self.literal(argument)
            return None
        raise self.refuse(node, help_text="the contrast of C() is one of " + ", ".join(CONTRASTS))


def parse_expression(text: str, *, where: str, kind: str = CONDITION,
                     columns: Optional[Sequence[str]] = None) -> Expression:
    """Parse and check a condition (``applies_if``) or a value (``passive``) expression.

    Parameters
    ----------
    text : what the user wrote.
    where : the params key, for messages (e.g. ``"params.yaml: variables.bmi.applies_if"``).
    kind : ``"condition"`` or ``"value"``.
    columns : the data's columns; when given, every name must be one of them.

    Returns
    -------
    Expression, with the columns it uses.

    Raises
    ------
    ExpressionError (an InputError-compatible ValueError) naming ``where`` and the part
    that is not allowed.
    """
    if kind not in (CONDITION, VALUE):
        raise ValueError(f"kind must be {CONDITION!r} or {VALUE!r}")
    source = _backticks_to_q(text, where) if isinstance(text, str) else text
    tree = _parse_tree(source, where, MAX_LENGTH, kind)
    checker = _Checker(source.strip(), where, kind, columns)
    checker.value(tree.body)
    if not checker.used:
        raise ExpressionError(where, f"'{_shown(text)}' uses no column")
    return Expression(text=text, kind=kind, where=where, tree=tree, columns=tuple(checker.used))


# ---------------------------------------------------------------------------
# formulas

@dataclass(frozen=True)
class Formula:
    """A checked ``outcome ~ terms`` formula: the outcome column and the columns the terms use.

    ``coded`` lists the columns the formula gives categorical coding with ``C()``.
    """

    text: str
    outcome: str
    columns: Tuple[str, ...]
    coded: Tuple[str, ...] = ()


def parse_formula(text: str, *, where: str = "analysis.formula",
                  columns: Optional[Sequence[str]] = None) -> Formula:
    """Check a statsmodels/patsy formula term by term before patsy evaluates any of it.

    The formula is split by patsy's own parser (which evaluates nothing), so each term
    checked here is exactly the Python code patsy would later evaluate.

    Parameters
    ----------
    text : the formula, e.g. ``'hba1c_12m ~ arm + C(site, Treatment("B")) + np.log(bmi)'``.
    where : the params key, for messages.
    columns : the data's columns; when given, every name must be one of them.

    Returns
    -------
    Formula with the outcome and the right-hand side's columns in order of first appearance.
    """
    if isinstance(text, str) and len(text) <= MAX_FORMULA_LENGTH:  # the same formula is checked once per fit
        return _parse_formula_cached(text, where, None if columns is None else tuple(map(str, columns)))
    return _parse_formula(text, where, columns)


@functools.lru_cache(maxsize=64)
def _parse_formula_cached(text: str, where: str, columns: Optional[Tuple[str, ...]]) -> Formula:
    return _parse_formula(text, where, columns)


def _parse_formula(text: str, where: str, columns: Optional[Sequence[str]]) -> Formula:
    if not isinstance(text, str):
        raise ExpressionError(where, f"must be text (got {type(text).__name__})")
    if len(text) > MAX_FORMULA_LENGTH:
        raise ExpressionError(where, f"the formula is {len(text):,} characters long; at most "
                              f"{MAX_FORMULA_LENGTH:,} are allowed")
    if "~" not in text:
        raise ExpressionError(where, f"'{_shown(text)}' has no '~'; write it as 'outcome ~ exposure + covariates'")
    lhs_text = text.split("~", 1)[0]
    import patsy

    try:
        description = patsy.ModelDesc.from_formula(text)  # parses only; nothing is evaluated
    except RecursionError:
        raise ExpressionError(where, f"the formula has more terms than statsmodels' formula parser handles "
                              "(a few hundred); combine or drop covariates") from None
    except Exception as exc:  # patsy's syntax errors (unmatched brackets, dangling operators, odd names)
        first = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        raise ExpressionError(where, f"'{_shown(text)}' is not a valid formula ({_shown(first, 80)})"
                              f"{_formula_name_hint(text, columns)}; check its brackets and operators") from None
    used: List[str] = []
    coded: List[str] = []
    outcome: Optional[str] = None
    for side, terms in (("lhs", description.lhs_termlist), ("rhs", description.rhs_termlist)):
        for term in terms:
            for factor in term.factors:
                code = getattr(factor, "code", None)
                if not isinstance(code, str):
                    raise ExpressionError(where, f"a term of '{_shown(text)}' cannot be checked")
                checker = _check_term(code, where, columns)
                if side == "lhs":
                    outcome = _outcome(code, checker.used, where)
                else:
                    used.extend(n for n in checker.used if n not in used)
                    coded.extend(n for n in checker.coded if n not in coded)
    if outcome is None or len(description.lhs_termlist) != 1:
        raise ExpressionError(where, f"'{_shown(lhs_text.strip())}' is not one outcome column; write "
                              "'outcome ~ exposure + covariates'")
    return Formula(text=text, outcome=outcome, columns=tuple(used), coded=tuple(coded))


def _check_term(code: str, where: str, columns: Optional[Sequence[str]]) -> "_Checker":
    try:
        tree = _parse_tree(code, where, MAX_FORMULA_LENGTH, TERM)
    except ExpressionError:
        if keyword.iskeyword(code.strip()) or code.strip() in ("True", "False", "None"):
            raise ExpressionError(where, f"'{_shown(code)}' is a Python word; write the column as "
                                  f"Q(\"{_shown(code.strip())}\")") from None
        hint = _odd_name_hint(code) or _formula_name_hint(code, columns)
        if hint:
            raise ExpressionError(where, f"'{_shown(code)}' is not a valid term{hint}") from None
        raise
    checker = _Checker(code.strip(), where, TERM, columns)
    checker.value(tree.body)
    return checker


def _outcome(code: str, names: List[str], where: str) -> str:
    tree = ast.parse(code, mode="eval").body
    if isinstance(tree, ast.Name) or (isinstance(tree, ast.Call) and isinstance(tree.func, ast.Name)
                                      and tree.func.id == "Q"):
        return names[0]
    raise ExpressionError(where, f"the outcome '{_shown(code)}' must be a column (transform it in the data, "
                          "or write Q(\"name\") for an odd name)")


def _formula_name_hint(text: str, columns: Optional[Sequence[str]]) -> str:
    """For a name with dots or spaces written bare: the Q("...") spelling."""
    odd = [c for c in (columns or ()) if not str(c).isidentifier() and str(c) in text
           and f'Q("{c}")' not in text and f"Q('{c}')" not in text]
    if odd:
        name = max(odd, key=len)
        return f"; a column name with dots or spaces is written Q(\"{_shown(name)}\")"
    if columns is None:
        return "; a column name with dots or spaces is written Q(\"name\")"
    return ""


def formula_environment() -> Any:
    """The namespace patsy evaluates a checked formula in: ``np`` with only the listed functions.

    Pass it as ``eval_env`` to statsmodels' formula functions (which accept the mapping
    :data:`FORMULA_NAMESPACE` too) and to patsy's ``dmatrices``/``dmatrix``, so that a
    formula never sees the caller's variables.

    Returns
    -------
    patsy.EvalEnvironment
        An environment holding :data:`FORMULA_NAMESPACE` only.
    """
    import patsy

    return patsy.EvalEnvironment([dict(FORMULA_NAMESPACE)])


def written(name: str) -> str:
    """How a column is written in a formula term name: bare when a plain name, else ``Q("name")``."""
    import re

    plain = re.fullmatch(r"[A-Za-z_][A-Za-z0-9_]*", name) is not None and not keyword.iskeyword(name)
    return name if plain else f'Q("{name}")'


@dataclass(frozen=True)
class ColumnAliases:
    """Safe internal names for columns in formulas the package writes itself.

    A formula gapbook builds (a missingness model, added indicator terms) never contains a
    column's own name: the frame's columns are renamed to ``gapbook_v0, gapbook_v1, ...``
    and the formula refers to those. :meth:`display` maps the fitted term names back to
    how a user's formula would write each column (``age``, ``sex[T.male]``,
    ``Q("dose.mg")``), so tables read as statsmodels would name them.
    """

    names: Tuple[str, ...]
    aliases: Tuple[str, ...]

    @classmethod
    def for_columns(cls, names: Sequence[str], *, taken: Sequence[str] = (), prefix: str = "gapbook_v") -> "ColumnAliases":
        used = set(map(str, taken)) | set(map(str, names))
        aliases: List[str] = []
        index = 0
        for _ in names:
            while f"{prefix}{index}" in used:
                index += 1
            aliases.append(f"{prefix}{index}")
            used.add(aliases[-1])
        return cls(tuple(names), tuple(aliases))

    def alias(self, name: str) -> str:
        return self.aliases[self.names.index(name)]

    def frame(self, data: pd.DataFrame) -> pd.DataFrame:
        """The named columns of ``data`` under their aliases."""
        return data[list(self.names)].set_axis(list(self.aliases), axis=1)

    def display(self, term: str) -> str:
        """A design column or term name with each alias replaced by the column as a formula writes it."""
        lookup = dict(zip(self.aliases, self.names))
        parts = []
        for part in _split_interaction(term):
            head, bracket, rest = part.partition("[")
            parts.append(written(lookup[head]) + bracket + rest if head in lookup else part)
        return ":".join(parts)


def _split_interaction(term: str) -> List[str]:
    """``a[T.x]:b`` -> ``['a[T.x]', 'b']``; a ':' inside brackets (a level's text) does not split."""
    parts, depth, current = [], 0, []
    for ch in term:
        if ch == "[":
            depth += 1
        elif ch == "]":
            depth = max(depth - 1, 0)
        if ch == ":" and depth == 0:
            parts.append("".join(current))
            current = []
        else:
            current.append(ch)
    parts.append("".join(current))
    return parts


# ---------------------------------------------------------------------------
# evaluation

@dataclass
class _Value:
    """An intermediate result: numbers (float, NaN missing), logic (1/0/NaN) or text codes."""

    kind: str                      # "number", "logic" or "text"
    data: Any                      # float array / scalar; for text: int codes (-1 missing) or a str scalar
    categories: Tuple[str, ...] = ()
    ordered: bool = False
    column: Optional[str] = None
    declared: bool = False

    def number(self) -> Any:
        if self.kind == "text":
            raise TypeError
        return self.data

    def truth(self) -> Any:
        # numbers count as true when non-zero (0/1 indicators), NaN stays unknown
        if self.kind == "text":
            raise TypeError
        if self.kind == "logic":
            return self.data
        with np.errstate(invalid="ignore"):
            return np.where(np.isnan(self.data), np.nan, (np.asarray(self.data) != 0).astype(float))


def _column_value(values: Any, name: str) -> _Value:
    if isinstance(values, pd.Series) and isinstance(values.dtype, pd.CategoricalDtype):
        categories = values.cat.categories
        if pd.api.types.is_numeric_dtype(categories.dtype):
            return _Value("number", values.astype(float).to_numpy(), column=name)
        return _Value("text", values.cat.codes.to_numpy(dtype=np.int64), tuple(str(c) for c in categories),
                      bool(values.cat.ordered), name, declared=True)
    array = values.to_numpy() if isinstance(values, pd.Series) else np.asarray(values)
    if array.dtype == bool:
        return _Value("logic", array.astype(float), column=name)
    if array.dtype.kind in "fiu":
        return _Value("number", array.astype(float), column=name)
    series = pd.Series(array, dtype=object)
    missing = series.isna().to_numpy()
    if not missing.all() and all(isinstance(v, (int, float, np.integer, np.floating)) and not isinstance(v, bool)
                                 for v in series[~missing]):
        return _Value("number", pd.to_numeric(series).to_numpy(dtype=float), column=name)
    codes, uniques = pd.factorize(series.where(~missing, None).map(lambda v: None if v is None else str(v)))
    return _Value("text", codes.astype(np.int64), tuple(uniques), False, name)


def _kleene_and(a: Any, b: Any) -> Any:
    with np.errstate(invalid="ignore"):
        false = (a == 0) | (b == 0)
        unknown = np.isnan(a) | np.isnan(b)
    return np.where(false, 0.0, np.where(unknown, np.nan, 1.0))


def _kleene_or(a: Any, b: Any) -> Any:
    with np.errstate(invalid="ignore"):
        true = (a == 1) | (b == 1)
        unknown = np.isnan(a) | np.isnan(b)
    return np.where(true, 1.0, np.where(unknown, np.nan, 0.0))


def _with_unknown(result: Any, *inputs: Any) -> Any:
    unknown = np.zeros(np.shape(result), dtype=bool)
    for values in inputs:
        unknown = unknown | np.isnan(values)
    return np.where(unknown, np.nan, np.asarray(result, dtype=float))


_NUMBER_COMPARE = {ast.Eq: np.equal, ast.NotEq: np.not_equal, ast.Lt: np.less, ast.LtE: np.less_equal,
                   ast.Gt: np.greater, ast.GtE: np.greater_equal}


def _described(value: _Value) -> str:
    if value.column is not None:
        return f"column '{_shown(value.column)}'"
    if isinstance(value.data, str):
        return f"'{_shown(value.data)}'"
    return f"{float(value.data):g}" if np.ndim(value.data) == 0 else "a computed value"


class _Evaluator:
    """Computes a checked tree over columns with numpy; never calls Python's eval."""

    def __init__(self, data: Mapping[str, Any], where: str, n: int):
        self.data = data
        self.where = where
        self.n = n
        self.cache: Dict[str, _Value] = {}

    def fail(self, message: str) -> InputError:
        return InputError(f"{self.where}: {message}")

    def column(self, name: str) -> _Value:
        if name not in self.cache:
            if name not in self.data:
                raise self.fail(f"'{_shown(name)}' is not a column of the data"
                                f"{did_you_mean(name, [str(c) for c in self.data])}")
            self.cache[name] = _column_value(self.data[name], name)
        return self.cache[name]

    def visit(self, node: ast.AST) -> _Value:
        with np.errstate(all="ignore"):
            return self._visit(node)

    def _visit(self, node: ast.AST) -> _Value:
        if isinstance(node, ast.Constant):
            if isinstance(node.value, bool):
                return _Value("logic", float(node.value))
            if isinstance(node.value, str):
                return _Value("text", node.value)
            return _Value("number", float(node.value))
        if isinstance(node, ast.Name):
            return self.column(node.id)
        if isinstance(node, ast.BinOp):
            left, right = self.numbers(node.left, node), self.numbers(node.right, node)
            op = node.op
            if isinstance(op, ast.Add):
                return _Value("number", np.add(left, right))
            if isinstance(op, ast.Sub):
                return _Value("number", np.subtract(left, right))
            if isinstance(op, ast.Mult):
                return _Value("number", np.multiply(left, right))
            if isinstance(op, ast.Div):
                return _Value("number", np.true_divide(left, right))
            return _Value("number", np.power(np.asarray(left, dtype=float), right))
        if isinstance(node, ast.UnaryOp):
            if isinstance(node.op, ast.Not):
                truth = self.truth(node.operand, node)
                return _Value("logic", np.where(np.isnan(truth), np.nan, 1.0 - np.asarray(truth, dtype=float)))
            value = self.numbers(node.operand, node)
            return _Value("number", -value if isinstance(node.op, ast.USub) else value)
        if isinstance(node, ast.BoolOp):
            combine = _kleene_and if isinstance(node.op, ast.And) else _kleene_or
            result = self.truth(node.values[0], node)
            for operand in node.values[1:]:
                result = combine(result, self.truth(operand, node))
            return _Value("logic", result)
        if isinstance(node, ast.Compare):
            return self.compare(node)
        if isinstance(node, ast.Call):
            if isinstance(node.func, ast.Name) and node.func.id == "Q":
                return self.column(node.args[0].value)
            name = node.func.id if isinstance(node.func, ast.Name) else node.func.attr
            function, _ = FUNCTIONS[name]
            return _Value("number", function(*[self.numbers(a, node) for a in node.args]))
        raise self.fail(f"'{_shown(ast.unparse(node))}' cannot be evaluated")  # the checker let nothing else through

    def numbers(self, node: ast.AST, parent: ast.AST) -> Any:
        value = self._visit(node)
        if value.kind == "text":
            what = f"column '{_shown(value.column)}' holds text" if value.column else f"'{_shown(value.data)}' is text"
            raise self.fail(f"{what}; arithmetic needs numbers (in '{_shown(ast.unparse(parent))}')")
        return value.data

    def truth(self, node: ast.AST, parent: ast.AST) -> Any:
        value = self._visit(node)
        if value.kind == "text":
            raise self.fail(f"'{_shown(ast.unparse(node))}' is text, not true/false; compare it, e.g. "
                            f"{_shown(ast.unparse(node))} == 'yes'")
        return value.truth()

    def compare(self, node: ast.Compare) -> _Value:
        left = self._visit(node.left)
        result: Any = None
        for op, right_node in zip(node.ops, node.comparators):
            if isinstance(op, (ast.In, ast.NotIn)):
                members = [self._visit(e) for e in right_node.elts]
                part = None
                for member in members:
                    hit = self.pair(ast.Eq(), left, member)
                    part = hit if part is None else _kleene_or(part, hit)
                if isinstance(op, ast.NotIn):
                    part = np.where(np.isnan(part), np.nan, 1.0 - part)
                right = left
            else:
                right = self._visit(right_node)
                part = self.pair(op, left, right)
            result = part if result is None else _kleene_and(result, part)
            left = right
        return _Value("logic", result)

    def pair(self, op: ast.cmpop, left: _Value, right: _Value) -> Any:
        if left.kind == "text" or right.kind == "text":
            return self.compare_text(op, left, right)
        a, b = left.data, right.data
        return _with_unknown(_NUMBER_COMPARE[type(op)](a, b), a, b)

    def compare_text(self, op: ast.cmpop, left: _Value, right: _Value) -> Any:
        symbol = _COMPARE[type(op)]
        if left.kind != "text" or right.kind != "text":
            text, number = (left, right) if left.kind == "text" else (right, left)
            raise self.fail(f"{_described(text)} is text and {_described(number)} is a number; they cannot be "
                            "compared (quote a level, e.g. == 'yes', or compare numbers with numbers)")
        if isinstance(left.data, str) and isinstance(right.data, str):
            return float(_NUMBER_COMPARE[type(op)](left.data, right.data))
        if isinstance(left.data, str):  # literal on the left: flip the comparison
            flipped = {ast.Lt: ast.Gt, ast.LtE: ast.GtE, ast.Gt: ast.Lt, ast.GtE: ast.LtE}.get(type(op), type(op))
            return self.compare_text(flipped(), right, left)
        codes = left.data
        unknown = codes < 0
        if isinstance(right.data, str):
            position = self.level(left, right.data)
            if symbol in ("==", "!="):
                hit = codes == position
                result = hit if symbol == "==" else ~hit
            else:
                if not left.ordered:
                    raise self.fail(f"'{_shown(left.column)}' is not ordinal, so '{symbol}' has no meaning for it; "
                                    "use == or in [...], or declare the variable ordinal with its levels in order")
                result = _NUMBER_COMPARE[type(op)](codes, position)
            return np.where(unknown, np.nan, result.astype(float))
        # column against column: compare the texts
        if symbol not in ("==", "!="):
            raise self.fail(f"'{symbol}' between two text columns has no meaning; use == or !=")
        a = np.asarray(left.categories + ("",), dtype=object)[codes]
        b = np.asarray(right.categories + ("",), dtype=object)[right.data]
        hit = a == b
        result = hit if symbol == "==" else ~hit
        return np.where(unknown | (right.data < 0), np.nan, result.astype(float))

    def level(self, column: _Value, text: str) -> int:
        """The position of ``text`` among the column's levels; a declared column refuses an unknown level."""
        try:
            return column.categories.index(text)
        except ValueError:
            folded = [c.casefold() for c in column.categories]
            if text.casefold() in folded:
                return folded.index(text.casefold())
            if column.declared:
                shown = ", ".join(_shown(c, 30) for c in column.categories[:12])
                raise self.fail(f"'{_shown(text)}' is not a level of '{_shown(column.column)}' ({shown})"
                                f"{did_you_mean(text, column.categories)}; if it is a valid level with no rows, "
                                "add it to the variable's levels") from None
            return -2  # matches no row
