"""The expression language: what it accepts, what it refuses, and what it computes.

Evaluation is checked against numpy computed by hand on the same arrays (numpy is the
reference library here); three-valued logic follows Kleene's strong logic of
indeterminacy (Kleene SC 1952, Introduction to Metamathematics, North-Holland, §64), the
rule SQL uses for NULL.
"""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from gapbook.errors import InputError
from gapbook.expressions import (FORMULA_NAMESPACE, MAX_DEPTH, MAX_LENGTH, ExpressionError, parse_expression,
                                 parse_formula)

COLUMNS = ["age", "sex", "bmi", "arm", "on_insulin", "alk.phos", "systolic bp", "center", "grade", "y"]
WHERE = "variables.bmi.applies_if"


@pytest.fixture(scope="module")
def frame() -> pd.DataFrame:
    return pd.DataFrame({
        "age": [10.0, 25.0, np.nan, 70.0, 45.0, 18.0],
        "sex": pd.Categorical(["female", "male", None, "female", "male", "female"], categories=["female", "male"]),
        "bmi": [17.0, 31.5, 22.0, np.nan, 27.0, 40.0],
        "arm": [0.0, 1.0, 1.0, 0.0, np.nan, 1.0],
        "on_insulin": pd.Categorical(["no", "yes", "yes", None, "no", "yes"], categories=["no", "yes"]),
        "alk.phos": [100.0, 250.0, 80.0, 120.0, np.nan, 300.0],
        "systolic bp": [120.0, 140.0, 135.0, np.nan, 150.0, 110.0],
        "center": pd.Categorical(["A", "B", "C", "A", "B", None]),
        "grade": pd.Categorical(["mild", "severe", "moderate", None, "mild", "moderate"],
                                categories=["mild", "moderate", "severe"], ordered=True),
        "y": [1.0, 2.0, 3.0, 4.0, 5.0, 6.0],
    })


# ---------------------------------------------------------------------------
# accepted, with the value numpy gives by hand

def _truth(values: np.ndarray, unknown: np.ndarray) -> np.ndarray:
    return np.where(unknown, np.nan, values.astype(float))


def test_conditions_match_numpy_by_hand(frame):
    age, bmi = frame["age"].to_numpy(), frame["bmi"].to_numpy()
    sex = frame["sex"].astype(object).to_numpy()
    cases = {
        "age >= 18": _truth(age >= 18, np.isnan(age)),
        "18 <= age < 65": _truth((age >= 18) & (age < 65), np.isnan(age)),
        "sex == 'female'": _truth(sex == "female", pd.isna(sex)),
        "sex != 'female'": _truth(sex != "female", pd.isna(sex)),
        "'female' == sex": _truth(sex == "female", pd.isna(sex)),
        "sex in ['male']": _truth(sex == "male", pd.isna(sex)),
        "sex not in ('male',)": _truth(sex != "male", pd.isna(sex)),
        "age * 2 + 1 > 50": _truth(age * 2 + 1 > 50, np.isnan(age)),
        "bmi / (age / 10) ** 2 < 3": _truth(bmi / (age / 10) ** 2 < 3, np.isnan(age) | np.isnan(bmi)),
        "log(bmi) > 3.3": _truth(np.log(bmi) > 3.3, np.isnan(bmi)),
        "np.sqrt(age) >= 5": _truth(np.sqrt(age) >= 5, np.isnan(age)),
        "maximum(age, bmi) > 30": _truth(np.maximum(age, bmi) > 30, np.isnan(age) | np.isnan(bmi)),
        "-age < -20": _truth(-age < -20, np.isnan(age)),
        "`alk.phos` > 110": _truth(frame["alk.phos"].to_numpy() > 110, frame["alk.phos"].isna().to_numpy()),
        "Q('systolic bp') >= 135": _truth(frame["systolic bp"].to_numpy() >= 135,
                                          frame["systolic bp"].isna().to_numpy()),
        "arm": _truth(frame["arm"].to_numpy() != 0, frame["arm"].isna().to_numpy()),
        "center == 'A'": _truth(frame["center"].astype(object).to_numpy() == "A", frame["center"].isna().to_numpy()),
    }
    for text, expected in cases.items():
        got = parse_expression(text, where=WHERE, columns=COLUMNS).evaluate(frame)
        np.testing.assert_array_equal(got, expected, err_msg=text)


def test_three_valued_logic_follows_kleene(frame):
    # Kleene (1952): false and unknown = false; true or unknown = true; not unknown = unknown.
    age_known = ~frame["age"].isna().to_numpy()
    adult = frame["age"].to_numpy() >= 18
    male = frame["sex"].astype(object).to_numpy() == "male"
    sex_known = frame["sex"].notna().to_numpy()
    got_and = parse_expression("age >= 18 and sex == 'male'", where=WHERE).evaluate(frame)
    got_or = parse_expression("age >= 18 or sex == 'male'", where=WHERE).evaluate(frame)
    got_not = parse_expression("not (age >= 18)", where=WHERE).evaluate(frame)
    for i in range(len(frame)):
        a = bool(adult[i]) if age_known[i] else None
        b = bool(male[i]) if sex_known[i] else None
        want_and = False if (a is False or b is False) else (None if a is None or b is None else True)
        want_or = True if (a is True or b is True) else (None if a is None or b is None else False)
        for got, want in ((got_and[i], want_and), (got_or[i], want_or)):
            assert (np.isnan(got) if want is None else got == float(want)), i
        assert np.isnan(got_not[i]) if a is None else got_not[i] == float(not a)


def test_ordinal_levels_compare_in_their_declared_order(frame):
    codes = frame["grade"].cat.codes.to_numpy()
    got = parse_expression("grade >= 'moderate'", where=WHERE).evaluate(frame)
    np.testing.assert_array_equal(got, _truth(codes >= 1, codes < 0))


def test_values_for_passive_formulas_match_numpy(frame):
    bmi, age = frame["bmi"].to_numpy(), frame["age"].to_numpy()
    got = parse_expression("bmi / (age / 100) ** 2", where="imputation.passive.x", kind="value").evaluate(frame)
    np.testing.assert_allclose(got, bmi / (age / 100) ** 2, equal_nan=True)
    got = parse_expression("log10(bmi) + exp(-age / 50)", where="p", kind="value").evaluate(frame)
    np.testing.assert_allclose(got, np.log10(bmi) + np.exp(-age / 50), equal_nan=True)
    got = parse_expression("bmi >= 30", where="p", kind="value").evaluate(frame)  # an indicator
    np.testing.assert_array_equal(got, _truth(bmi >= 30, np.isnan(bmi)))
    arrays = {"bmi": bmi, "age": age}  # plain arrays (how the imputation engine calls it)
    got = parse_expression("minimum(bmi, age)", where="p", kind="value").evaluate(arrays)
    np.testing.assert_array_equal(got, np.minimum(bmi, age))


def test_expression_lists_its_columns_in_order():
    parsed = parse_expression("sex == 'male' and `alk.phos` > age or age < 3", where=WHERE, columns=COLUMNS)
    assert parsed.columns == ("sex", "alk.phos", "age")


def test_a_column_named_like_a_function_is_a_column(frame):
    parsed = parse_expression("center in ['A', 'B']", where=WHERE)
    assert parsed.columns == ("center",)


def test_text_literals_may_contain_backticks_and_quotes(frame):
    data = pd.DataFrame({"note": pd.Categorical(["it's `x`", "other"])})
    got = parse_expression("note == \"it's `x`\"", where=WHERE).evaluate(data)
    np.testing.assert_array_equal(got, [1.0, 0.0])


# ---------------------------------------------------------------------------
# refused at parse time, naming the key and the part

REFUSED = {
    # the measured attacks (issue 9 §1)
    "@np.load.__globals__['os']": "not a valid expression",
    "np.load.__globals__['os']": "'__globals__' is not allowed",
    "np.lib._npyio_impl.os.system('touch F')": "'_npyio_impl' is not allowed",
    "__import__('os').system('touch F')": "'__import__' is not allowed",
    "().__class__.__bases__": "'__class__' is not allowed",
    "''.__class__.__mro__[1].__subclasses__()": "not allowed",
    # attribute chains, subscripts, dunder and private names
    "np.lib": "'np.lib' is not allowed",
    "np.load('x.npy')": "'np.load' is not allowed",
    "np.random.normal(age)": "'np.random' is not allowed",
    "age.values": "'age.values' is not allowed",
    "age[0] > 1": "'age[0]' is not allowed",
    "__builtins__": "'__builtins__' is not allowed",
    "_secret > 1": "'_secret' is not allowed",
    "np > 1": "'np' is not allowed",
    # constructs the language does not have
    "lambda: age": "'lambda: age' is not allowed",
    "(lambda x: x)(age) > 1": "is not allowed",
    "[a for a in age]": "is not allowed",
    "{a: 1 for a in age}": "is not allowed",
    "sum(a for a in age)": "is not allowed",
    "age if sex == 'male' else bmi": "is not allowed",
    "(age := 3) > 1": "is not allowed",
    "f'{age}' == 'x'": "is not allowed",
    "log(*age)": "*/** arguments",
    "log(**age)": "*/** arguments",
    "log(age, base=2)": "log() takes 1 argument",
    "maximum(age)": "maximum() takes 2 arguments",
    "eval('1') > 0": "'eval' is not allowed",
    "exec('x')": "'exec' is not allowed",
    "open('/etc/passwd')": "'open' is not allowed",
    "getattr(age, 'x')": "'getattr' is not allowed",
    "C(sex) == 'a'": "'C' is not allowed",
    "age in bmi": "'in' takes a list",
    "age in []": "the list after 'in' is empty",
    "age in [bmi]": "only numbers and quoted text are allowed here",
    "age is None": "comparison",
    "age > None": "'None' is not allowed",
    "b'x' == sex": "is not allowed",
    "age > 1j": "is not allowed",
    "age > 1e999": "numbers must be finite",
    "age % 2 == 0": "is not allowed",
    "age // 2 > 1": "is not allowed",
    "age << 2": "is not allowed",
    "~age": "is not allowed",
    "...": "is not allowed",
    "Q(age) > 1": "Q() takes one quoted column name",
    "Q('a', 'b') > 1": "Q() takes one quoted column name",
    "age > 1; import os": "not a valid expression",
    "import os": "not a valid expression",
    "`alk.phos > 1": "backtick-quoted column name is not closed",
    "": "the expression is empty",
    "1 + 2 > 0": "uses no column",
}


@pytest.mark.parametrize("text,part", list(REFUSED.items()))
def test_refused_expressions_name_the_key_and_the_part(text, part):
    with pytest.raises(InputError) as caught:
        parse_expression(text, where=WHERE)
    message = str(caught.value)
    assert message.startswith(WHERE + ": "), message
    assert part in message, message
    assert "\n" not in message


def test_expression_errors_are_input_errors_and_value_errors():
    # pydantic validators must raise ValueError; the CLI catches InputError (exit 2)
    assert issubclass(ExpressionError, InputError) and issubclass(ExpressionError, ValueError)


def test_unknown_and_dotted_columns_get_the_nearest_name_and_the_q_spelling():
    with pytest.raises(InputError, match="'agee' is not a column of the data; did you mean 'age'"):
        parse_expression("agee > 1", where=WHERE, columns=COLUMNS)
    with pytest.raises(InputError, match=r"'alk.phos' is a column name with a dot; write it as Q\(\"alk.phos\"\)"):
        parse_expression("alk.phos > 1", where=WHERE, columns=COLUMNS)


def test_size_and_nesting_are_bounded():
    with pytest.raises(InputError, match=f"at most {MAX_LENGTH:,}"):
        parse_expression("age" + " + age" * 1000, where=WHERE)
    with pytest.raises(InputError, match="nested more than"):
        parse_expression("-" * (MAX_DEPTH + 5) + "age > 1", where=WHERE)
    with pytest.raises(InputError, match="nested more than"):
        parse_expression("log(" * (MAX_DEPTH + 5) + "age" + ")" * (MAX_DEPTH + 5), where=WHERE)
    with pytest.raises(InputError):  # Python's own parser limit on brackets, reported as one line
        parse_expression("(" * 500 + "age" + ")" * 500, where=WHERE)
    with pytest.raises(InputError):  # an integer literal too long to convert
        parse_expression("age > " + "9" * 1990, where=WHERE)


def test_control_characters_in_messages_are_shown_escaped():
    with pytest.raises(InputError) as caught:
        parse_expression("age >\x1b[31m 1", where=WHERE)
    assert "\x1b" not in str(caught.value)


# ---------------------------------------------------------------------------
# refused at evaluation, where the data tell

def test_an_unknown_level_of_a_declared_column_is_refused(frame):
    with pytest.raises(InputError, match="'F' is not a level of 'sex' \\(female, male\\)"):
        parse_expression("sex == 'F'", where=WHERE).evaluate(frame)
    # case is ignored, as intake ignores it for levels
    got = parse_expression("sex == 'FEMALE'", where=WHERE).evaluate(frame)
    np.testing.assert_array_equal(got, parse_expression("sex == 'female'", where=WHERE).evaluate(frame))


def test_text_and_numbers_are_not_compared_or_added(frame):
    with pytest.raises(InputError, match="column 'sex' is text and 1 is a number"):
        parse_expression("sex == 1", where=WHERE).evaluate(frame)
    with pytest.raises(InputError, match="column 'age' is a number"):
        parse_expression("age == 'old'", where=WHERE).evaluate(frame)
    with pytest.raises(InputError, match="arithmetic needs numbers"):
        parse_expression("sex + 1 > 0", where=WHERE).evaluate(frame)
    with pytest.raises(InputError, match="not ordinal"):
        parse_expression("center > 'A'", where=WHERE).evaluate(frame)
    with pytest.raises(InputError, match="gives text"):
        parse_expression("sex", where="imputation.passive.x", kind="value").evaluate(frame)


# ---------------------------------------------------------------------------
# formulas

ACCEPTED_FORMULAS = {
    "y ~ age + sex": ("y", ("age", "sex")),
    'y ~ arm + C(center, Treatment("B")) + np.log(bmi)': ("y", ("arm", "center", "bmi")),
    "y ~ C(center, Treatment(reference='B'))": ("y", ("center",)),
    "y ~ C(center, Sum) + C(grade, levels=['mild', 'moderate', 'severe'])": ("y", ("center", "grade")),
    "y ~ C(arm)": ("y", ("arm",)),
    'Q("systolic bp") ~ Q("alk.phos") + I(age ** 2) + center(bmi)': ("systolic bp", ("alk.phos", "age", "bmi")),
    "y ~ bs(age, df=4, degree=3) + cr(bmi, df=3) + standardize(age, ddof=1)": ("y", ("age", "bmi")),
    "y ~ arm * sex + age:bmi - 1": ("y", ("arm", "sex", "age", "bmi")),
    "y ~ (age + bmi) ** 2 + I(age > 65) + np.minimum(age, 80)": ("y", ("age", "bmi")),
    "y ~ center": ("y", ("center",)),  # a column named like patsy's helper
}


@pytest.mark.parametrize("text,expected", list(ACCEPTED_FORMULAS.items()))
def test_formulas_the_trade_writes_are_accepted(text, expected):
    parsed = parse_formula(text, columns=COLUMNS)
    assert (parsed.outcome, parsed.columns) == expected


REFUSED_FORMULAS = {
    "y ~ I(0*np.lib._npyio_impl.os.system('touch F'))": "'_npyio_impl' is not allowed",
    "y ~ np.load('x')": "'np.load' is not allowed",
    "y ~ I(__import__('os').system('touch F'))": "'__import__' is not allowed",
    "y ~ x.__class__": "'__class__' is not allowed",
    "y ~ age[0]": "'age[0]' is not allowed",
    "y ~ log(age)": "write np.log(...)",
    "y ~ alk.phos": "write it as Q(\"alk.phos\")",
    "y ~ systolic bp": "Q(\"systolic bp\")",
    "y ~ class": "write the column as Q(\"class\")",
    "y ~ C(sex, Treatment(__import__('os')))": "'__import__('os')' is not allowed",
    "y ~ C(sex, Treatment('a', 'b'))": "Treatment() takes one level",
    "y ~ C(sex, contrast=np.load)": "'np.load' is not allowed",
    "y ~ C(sex, Foo)": "the contrast of C() is one of",
    "y ~ bs(age, df=4, extrapolate=True)": "bs() accepts df=",
    "y ~ bs(age, knots=age)": "'in' takes a list",
    "y ~ poly(age, 2)": "'poly' is not allowed",
    "y ~ (lambda: 1)()": "is not a valid formula",
    "y ~ I((lambda: 1)())": "is not allowed",
    "y ~ agee": "'agee' is not a column of the data; did you mean 'age'",
    "yy ~ age": "'yy' is not a column",
    "np.log(y) ~ age": "the outcome 'np.log(y)' must be a column",
    "y ~ age +": "is not a valid formula",
    "y = age": "has no '~'",
}


@pytest.mark.parametrize("text,part", list(REFUSED_FORMULAS.items()))
def test_refused_formulas_name_the_part(text, part):
    with pytest.raises(InputError) as caught:
        parse_formula(text, columns=COLUMNS)
    assert part in str(caught.value), str(caught.value)
    assert str(caught.value).startswith("analysis.formula: ")


def test_formula_terms_are_named_as_a_plain_statsmodels_fit_names_them():
    # statsmodels is the reference: the restricted namespace must not change names or values
    import statsmodels.formula.api as smf

    rng = np.random.default_rng(7)
    data = pd.DataFrame({"y": rng.normal(size=60), "bmi": rng.uniform(18, 40, 60),
                         "center": rng.choice(["A", "B", "C"], 60)})
    formula = 'y ~ np.log(bmi) + C(center, Treatment("B")) + center(bmi) + I(bmi ** 2)'
    parse_formula(formula, columns=list(data.columns))
    ours = smf.ols(formula, data, eval_env=FORMULA_NAMESPACE).fit()
    plain = smf.ols(formula, data).fit()
    assert list(ours.params.index) == list(plain.params.index)
    np.testing.assert_allclose(ours.params.to_numpy(), plain.params.to_numpy())


def test_the_formula_namespace_offers_nothing_but_the_listed_functions():
    # even if a check were missed, np.lib / np.load do not exist where patsy evaluates
    assert not hasattr(FORMULA_NAMESPACE["np"], "lib")
    assert not hasattr(FORMULA_NAMESPACE["np"], "load")
    assert set(FORMULA_NAMESPACE) == {"np"}


def test_formula_size_is_bounded_with_one_line():
    with pytest.raises(InputError, match="at most"):
        parse_formula("y ~ " + " + ".join(f"x{i}" for i in range(5000)))
    with pytest.raises(InputError, match="more terms than statsmodels' formula parser handles"):
        parse_formula("y ~ " + " + ".join(f"x{i}" for i in range(1500)))
    wide = "y ~ " + " + ".join(f"x{i}" for i in range(300))  # 300 covariates still parse
    assert len(parse_formula(wide).columns) == 300
