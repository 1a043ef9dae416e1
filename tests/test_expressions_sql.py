"""applies_if compiled to SQL (gapbook.expressions_sql) gives what the pandas evaluator gives.

The reference for every check is :meth:`gapbook.expressions.Expression.evaluate`, whose
three-valued logic and arithmetic are checked by hand in test_expressions.py (and follow
Kleene's strong logic of indeterminacy: Kleene SC 1952, Introduction to Metamathematics,
section 64). Property-based tests (hypothesis) draw random expressions over columns
holding missing values, infinities, signed zeros and text levels; both engines must give
the same true/false/unknown for every row, or refuse with the same one-line message.
"""
from __future__ import annotations

import math
from pathlib import Path

import duckdb
import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from gapbook.errors import InputError
from gapbook.expressions import parse_expression
from gapbook.expressions_sql import SqlColumn, compile_condition, layered_select
from gapbook.intake import load_study
from gapbook.intake_duckdb import scan_study
from gapbook.params import Params

X = [1.0, -2.5, 0.0, -0.0, np.nan, 3.0, np.inf, -np.inf, 1e299, 0.5, 2.0, np.nan, 7.0, -1.0]
Y = [0.0, 2.0, np.nan, -0.0, 1.0, 4.0, 3.0, -np.inf, 1e-300, np.nan, 0.5, 10.0, 2.0, 0.0]
LEVELS = ("no", "yes", "Maybe")
SITE = [0, 1, -1, 2, 1, 0, -1, 2, 0, 1, 1, 2, -1, 0]    # codes into LEVELS, -1 missing
GRADE = [2, 0, 1, -1, 0, 2, 1, 1, -1, 0, 2, 2, 1, 0]    # ordinal codes into ("low", "mid", "high")


def _frame() -> pd.DataFrame:
    return pd.DataFrame({
        "x": X, "y.z": Y,
        "site": pd.Categorical.from_codes(SITE, categories=list(LEVELS)),
        "grade": pd.Categorical.from_codes(GRADE, categories=["low", "mid", "high"], ordered=True),
    })


COLUMNS = {"x": SqlColumn("x"), "y.z": SqlColumn("yz"), "site": SqlColumn("site", categories=LEVELS),
           "grade": SqlColumn("grade", categories=("low", "mid", "high"), ordered=True)}


@pytest.fixture(scope="module")
def connection():
    con = duckdb.connect()
    con.execute("CREATE TABLE t AS SELECT * FROM (VALUES " + ", ".join(
        f"({i}, {_double(x)}, {_double(y)}, {'NULL' if s < 0 else s}, {'NULL' if g < 0 else g})"
        for i, (x, y, s, g) in enumerate(zip(X, Y, SITE, GRADE))) + ") AS v(i, x, yz, site, grade)")
    yield con
    con.close()


def _double(value: float) -> str:
    if math.isnan(value):
        return "'nan'::DOUBLE"
    if math.isinf(value):
        return f"'{'-' if value < 0 else ''}inf'::DOUBLE"
    return f"'{value!r}'::DOUBLE"


def both(connection, text: str):
    """(pandas result, SQL result) as 1/0/NaN arrays, or the two error messages."""
    try:
        expression = parse_expression(text, where="p.yaml: variables.x.applies_if", columns=list(COLUMNS))
    except InputError as exc:  # refused when the params are read (e.g. no column used): neither engine runs
        return str(exc), str(exc)
    try:
        expected = expression.evaluate(_frame())
    except InputError as exc:
        expected = str(exc)
    try:
        compiled = compile_condition(expression, COLUMNS, connection=connection, prefix="q_")
        rows = connection.execute(f"SELECT ({compiled.sql})::DOUBLE FROM {layered_select('t', compiled.bindings)} "
                                  "ORDER BY i").fetchall()
        got = np.array([np.nan if r[0] is None else r[0] for r in rows], dtype=float)
    except InputError as exc:
        got = str(exc)
    return expected, got


def assert_same(expected, got):
    if isinstance(expected, str) or isinstance(got, str):
        assert expected == got
    else:
        np.testing.assert_array_equal(expected, got)  # NaN (unknown) in the same rows


@pytest.mark.parametrize("text", [
    "x > 1", "x > 1 or Q('y.z') == 2", "not x", "x", "x and `y.z`",
    "1 / x > 0",                      # 1/-0 is -inf, 1/0 is inf (IEEE, as numpy)
    "x / `y.z` >= 0",                 # 0/0 is NaN: unknown
    "x ** 0 == 1",                    # numpy: NaN ** 0 is 1, so a missing x gives true here
    "1 ** `y.z` == 1",                # and 1 ** NaN is 1
    "log(x) > 0", "np.log1p(x) < 1", "sqrt(x) >= 0", "exp(x) > 1e299", "np.expm1(`y.z`) > 0",
    "minimum(x, `y.z`) > 0", "maximum(x, 2) == 2", "floor(x) == ceil(x)", "abs(x) > 1",
    "x * 1e299 > 1e299",              # overflow to inf
    "0 < x < 5", "0 <= x * 2 < `y.z` + 3 != 4", "x in [1, 2, -0.0]", "x not in [1, 3]",
    "site == 'yes'", "site != 'YES'", "site in ['no', 'maybe']", "'yes' == site", "grade >= 'mid'",
    "'mid' < grade", "site == site", "site != grade", "not (site == 'no' and x > 0)",
    "(x > 0) + (Q('y.z') > 0) >= 1", "True and x > 0", "x > 0 or False",
    "-x > -1", "x - -1 > 0", "x == 2 ** 0.5", "x ** 0.5 > 1", "2 ** x > 4", "x ** `y.z` > 1",
    # refused alike
    "site > 'no'", "site == 'perhaps'", "site + 1 > 0", "site == 1", "site", "site < grade", "x == 'yes'",
])
def test_conditions_give_what_the_evaluator_gives(connection, text):
    assert_same(*both(connection, text))


ATOMS = ["x", "`y.z`", "Q('y.z')", "0", "-0.0", "1", "2.5", "1e299", "-3", "True", "False", "'yes'", "'no'",
         "site", "grade", "'mid'"]
COMPARE = ["==", "!=", "<", "<=", ">", ">="]


def _extend(inner):
    return st.one_of(
        st.builds(lambda a, op, b: f"({a} {op} {b})", inner, st.sampled_from(["+", "-", "*", "/", "**"]), inner),
        st.builds(lambda a, op, b: f"({a} {op} {b})", inner, st.sampled_from(COMPARE), inner),
        st.builds(lambda a, op1, b, op2, c: f"({a} {op1} {b} {op2} {c})", inner, st.sampled_from(COMPARE), inner,
                  st.sampled_from(COMPARE), inner),
        st.builds(lambda a, op, b: f"({a} {op} {b})", inner, st.sampled_from(["and", "or"]), inner),
        st.builds(lambda op, a: f"({op} {a})", st.sampled_from(["not", "-"]), inner),
        st.builds(lambda f, a: f"{f}({a})", st.sampled_from(["log", "np.log1p", "sqrt", "exp", "np.expm1", "abs",
                                                             "floor", "ceil", "log10", "log2"]), inner),
        st.builds(lambda f, a, b: f"{f}({a}, {b})", st.sampled_from(["minimum", "maximum"]), inner, inner),
        st.builds(lambda a, neg, members: f"({a} {'not in' if neg else 'in'} [{', '.join(members)}])", inner,
                  st.booleans(), st.lists(st.sampled_from(["1", "0", "-0.0", "2.5", "'yes'", "'mid'", "True"]),
                                          min_size=1, max_size=3)),
    )


EXPRESSIONS = st.recursive(st.sampled_from(ATOMS), _extend, max_leaves=10)


@settings(max_examples=300, derandomize=True, deadline=None, database=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow])
@given(text=EXPRESSIONS)
def test_random_conditions_give_what_the_evaluator_gives(connection, text):
    assert_same(*both(connection, text))


def test_shared_operands_are_computed_once(connection):
    # A chain's middle operand feeds two comparisons; nested chains would double the SQL at every level if
    # it were written twice. Ten levels: the SQL stays about as long as the expression.
    text = "x"
    for _ in range(10):
        text = f"(0 < ({text} + 1) * 2 < 1e299)"
    expression = parse_expression(text, where="k", columns=list(COLUMNS))
    compiled = compile_condition(expression, COLUMNS, connection=connection, prefix="s_")
    size = len(compiled.sql) + sum(len(sql) for _, sql, _ in compiled.bindings)
    assert size < 20 * len(text)
    assert len(compiled.bindings) == 10
    assert_same(*both(connection, text))


# ---------------------------------------------------------------------------
# no user text in SQL

HOSTILE = ['x"; DROP TABLE study; --', "a'b", "); SELECT 1; --", "k0_c0", "rn", "study"]


def test_user_text_never_reaches_sql(connection):
    columns = {name: SqlColumn(f"v{j}") for j, name in enumerate(HOSTILE)}
    columns["t"] = SqlColumn("t", categories=("'); DROP TABLE t; --", "b"))
    for name in HOSTILE:
        for text in (f"Q({name!r}) > 1", f"Q({name!r}) in [1, 2] or t == \"'); DROP TABLE t; --\"",
                     f"t != 'B' and Q({name!r}) ** 0.5 < 3"):
            expression = parse_expression(text, where="k", columns=list(columns))
            compiled = compile_condition(expression, columns, connection=connection, prefix="h_")
            sql = compiled.sql + " ".join(b[1] for b in compiled.bindings)
            assert name not in sql  # columns enter as their aliases v0, v1, ...
            assert "DROP" not in sql and "--" not in sql and ";" not in sql  # the level became its code


def _write(tmp_path: Path, frame: pd.DataFrame, conditions, types=None) -> Params:
    path = tmp_path / "study.csv"
    frame.to_csv(path, index=False)
    variables = {name: {"applies_if": text} for name, text in conditions.items()}
    for name, kind in (types or {}).items():
        variables.setdefault(name, {})["type"] = kind
    return Params.from_dict({"data": {"path": str(path), "id": "pid"}, "variables": variables})


def test_hostile_names_and_texts_give_the_same_audit_in_both_engines(tmp_path):
    from test_engines import _assert_same, audit_both
    # Names intake accepts (it refuses double quotes in names) that look like SQL or like the engine's own
    # aliases; a level and a quoted text that would end a SQL string.
    names = ["x -- DROP TABLE study", "k0_c0", "rn", "r_c1"]
    frame = pd.DataFrame({
        "pid": [f"P{i}" for i in range(8)],
        names[0]: ["1", "2", "", "4", "5", "NA", "7", "8"],
        names[1]: ["'); DROP TABLE study; --", "b", "b", "", "'); DROP TABLE study; --", "b", "c", "c"],
        names[2]: ["3", "", "1", "1", "2", "3", "9", "1"],
        names[3]: ["1", "1", "0", "", "0", "1", "0", "1"],
    })
    params = _write(tmp_path, frame, {
        names[2]: f"Q({names[0]!r}) > 2 and Q({names[1]!r}) != \"'); DROP TABLE study; --\"",
        names[0]: f"Q({names[1]!r}) in ['b', 'c'] or Q({names[2]!r}) ** 2 > 4",
        names[3]: f"not (rn == 1) or Q({names[1]!r}) == Q({names[1]!r})",
    }, types={names[1]: "nominal"})
    pair = audit_both(params, tmp_path)
    assert isinstance(pair[0], dict), pair[0]
    _assert_same(pair)
    with scan_study(params) as scanned:
        assert scanned.warnings == load_study(params).warnings
        assert scanned.connection.execute("SELECT count(*) FROM study").fetchone()[0] == 8


# ---------------------------------------------------------------------------
# whole files through both engines

CELLS = ["", "NA", "-9", "0", "1", "2", "3.5", "-0", "1e3", "yes", "no", "Yes", "maybe"]


@st.composite
def conditioned_files(draw):
    n_rows = draw(st.integers(1, 10))
    names = ["a", "b.c", "d"]
    frame = pd.DataFrame({
        "pid": [f"P{i}" for i in range(n_rows)],
        "a": [draw(st.sampled_from(["", "NA", "-9", "0", "1", "2", "3.5", "-0", "1e3"])) for _ in range(n_rows)],
        "b.c": [draw(st.sampled_from(["", "yes", "no", "Yes", "maybe", "-9"])) for _ in range(n_rows)],
        "d": [draw(st.sampled_from(CELLS)) for _ in range(n_rows)],
    })
    conditioned = draw(st.lists(st.sampled_from(names), min_size=1, max_size=2, unique=True))
    atoms = st.sampled_from(["a", "`b.c`", "d", "0", "1", "'yes'", "'no'", "-0.0", "2.5"])
    comparison = st.builds(lambda a, op, b: f"{a} {op} {b}", atoms, st.sampled_from(COMPARE), atoms)
    term = st.one_of(comparison, st.builds(lambda a: f"log(a + {a}) > 0", st.sampled_from(["0", "1", "d"])),
                     st.builds(lambda m: f"`b.c` in [{m}]", st.sampled_from(["'yes'", "'no', 'maybe'", "'YES'"])))
    conditions = {name: draw(st.builds(lambda t1, op, t2: f"{t1} {op} {t2}", term, st.sampled_from(["and", "or"]),
                                       term)) for name in conditioned}
    types = {"b.c": draw(st.sampled_from(["nominal", "ordinal", None]))}
    if types["b.c"] == "ordinal":
        types = {"b.c": "ordinal"}
    elif types["b.c"] is None:
        types = {}
    return frame, conditions, types


@settings(max_examples=25, derandomize=True, deadline=None, database=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow])
@given(drawn=conditioned_files())
def test_random_files_with_conditions_give_the_same_audit_in_both_engines(tmp_path_factory, drawn):
    from test_engines import _assert_same, audit_both
    frame, conditions, types = drawn
    folder = tmp_path_factory.mktemp("cond")
    try:
        params = _write(folder, frame, conditions, types)
    except InputError:
        return  # refused when the params are read: neither engine runs
    _assert_same(audit_both(params, folder))
    try:
        expected = load_study(params).warnings
    except InputError as exc:
        expected = str(exc)
    try:
        with scan_study(params) as scanned:
            got = scanned.warnings
    except InputError as exc:
        got = str(exc)
    assert expected == got
