"""Intake never lets a value silently lose its meaning (issue 9 §5), and reads only safe headers.

Every expected count below is hand-counted from the small frames written in each test.
"""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from gapbook.errors import InputError
from gapbook.intake import FREE_TEXT_LEVEL, load_study, read_raw
from gapbook.params import Params


def params_for(path, **sections):
    body = {"data": {"path": str(path), "id": "pid"}}
    for key, value in sections.items():
        if key == "data":
            body["data"].update(value)
        else:
            body[key] = value
    return Params.from_dict(body)


def write_csv(tmp_path, frame, name="s.csv"):
    path = tmp_path / name
    frame.to_csv(path, index=False)
    return path


AGES = pd.DataFrame({"pid": [f"p{i}" for i in range(8)], "age": ["34", "60", "71", "60", "45", "-9", "52", "66"]})


# ---------------------------------------------------------------------------
# codes and markers

def test_a_global_code_among_real_values_is_refused(tmp_path):
    # measured: '60: refused' set nine real ages missing with exit 0
    path = write_csv(tmp_path, AGES)
    with pytest.raises(InputError) as info:
        load_study(params_for(path, missing={"reasons": {60: "refused", -9: "lost"}}))
    message = str(info.value)
    assert "the missing code 60 ('refused', missing.reasons) lies among the real values of 'age' (34 to 71)" in message
    assert "its 2 cells" in message and "missing.columns.age.reasons" in message and "use_global: false" in message


def test_a_code_declared_for_the_column_itself_is_trusted(tmp_path):
    path = write_csv(tmp_path, AGES)
    study = load_study(params_for(path, missing={"columns": {"age": {"reasons": {60: "refused"}}}}))
    assert int(study.missing["age"].sum()) == 2  # the two 60s, as the user declared
    # with the global codes kept away, 60 is a real age and only -9 ... stays a number too
    study = load_study(params_for(path, missing={"reasons": {60: "refused"},
                                                 "columns": {"age": {"use_global": False}}}))
    assert int(study.missing["age"].sum()) == 0 and study.data["age"].tolist().count(60.0) == 2


def test_a_code_outside_the_real_values_is_a_code(tmp_path):
    path = write_csv(tmp_path, AGES.assign(age=AGES["age"].replace("60", "61")))
    study = load_study(params_for(path, missing={"reasons": {-9: "lost"}}))
    assert study.reasons["age"].astype(object).tolist()[5] == "lost"


def test_a_marker_that_is_a_declared_level_is_refused(tmp_path):
    # measured: marker 'no' blanked 73 % of a yes/no column
    path = write_csv(tmp_path, pd.DataFrame({"pid": ["a", "b", "c"], "smoker": ["yes", "no", "no"]}))
    with pytest.raises(InputError, match="'no' is both a missing marker \\(missing.markers\\) and a declared level of "
                                         "'smoker'"):
        load_study(params_for(path, missing={"markers": ["", "no"]},
                              variables={"smoker": {"type": "binary", "levels": ["no", "yes"]}}))


def test_a_marker_that_blanks_most_of_a_text_column_is_warned(tmp_path):
    path = write_csv(tmp_path, pd.DataFrame({"pid": list("abcde"), "smoker": ["yes", "no", "no", "no", "yes"]}))
    study = load_study(params_for(path, missing={"markers": ["", "no"]}))
    assert any("the missing marker 'no' (missing.markers) makes 60% of 'smoker' missing (3 cells)" in w
               for w in study.warnings)


# ---------------------------------------------------------------------------
# applies_if

CONDITION_DATA = pd.DataFrame({
    "pid": list("abcdef"),
    "on_insulin": ["yes", "no", "", "yes", "no", "yes"],
    "diabetic": ["1", "1", "1", "", "0", "1"],
    "dose": ["10", "", "", "12", "5", ""],
})


def test_applies_if_uses_three_valued_logic(tmp_path):
    # Kleene's logic (Kleene 1952): 'false or unknown' is unknown, 'true or unknown' is true.
    path = write_csv(tmp_path, CONDITION_DATA)
    study = load_study(params_for(path, variables={
        "dose": {"type": "continuous", "applies_if": "on_insulin == 'yes' or diabetic == 0"}}))
    # rows: a yes->applies; b no & diabetic 1 -> false -> n/a; c unknown & 1 -> unknown (blank stays missing);
    # d yes & unknown -> true; e no & 0 -> true; f yes -> true (blank dose is missing)
    reasons = study.reasons["dose"].astype(object).where(study.reasons["dose"].notna(), None).tolist()
    assert reasons == [None, "not applicable", "blank", None, None, "blank"]


def test_applies_if_true_for_no_row_or_every_row_and_recorded_values_are_warned(tmp_path):
    path = write_csv(tmp_path, CONDITION_DATA)
    none = load_study(params_for(path, variables={"dose": {"type": "continuous", "applies_if": "diabetic > 5"}}))
    assert any("is true for no row: every value of 'dose' is treated as not applicable (3 recorded values set aside)"
               in w for w in none.warnings)
    every = load_study(params_for(path, variables={"dose": {"type": "continuous", "applies_if": "diabetic >= -1"},
                                                   "diabetic": {"type": "binary"}},
                                  missing={"markers": [""]}))
    assert not any("true for every row" in w for w in every.warnings)  # row d is unknown
    filled = CONDITION_DATA.assign(diabetic=["1", "1", "1", "1", "0", "1"])
    every = load_study(params_for(write_csv(tmp_path, filled, "f.csv"),
                                  variables={"dose": {"type": "continuous", "applies_if": "diabetic >= 0"}}))
    assert any("is true for every row" in w for w in every.warnings)
    recorded = load_study(params_for(path, variables={"dose": {"type": "continuous",
                                                               "applies_if": "on_insulin == 'yes'"}}))
    assert any("is false for 1 rows that hold a value of 'dose' (data rows 5 (ids e))" in w for w in recorded.warnings)


def test_applies_if_with_a_level_not_declared_is_refused(tmp_path):
    path = write_csv(tmp_path, CONDITION_DATA)
    with pytest.raises(InputError, match="variables.dose.applies_if: 'Yes please' is not a level of 'on_insulin'"):
        load_study(params_for(path, variables={
            "on_insulin": {"type": "binary", "levels": ["no", "yes"]},
            "dose": {"type": "continuous", "applies_if": "on_insulin == 'Yes please'"}}))
    with pytest.raises(InputError, match="variables.dose.applies_if: 'insulin' is not a column of the data"):
        load_study(params_for(path, variables={"dose": {"type": "continuous", "applies_if": "insulin == 'yes'"}}))


def test_passive_formulas_name_columns_of_the_data(tmp_path):
    path = write_csv(tmp_path, CONDITION_DATA)
    with pytest.raises(InputError, match="imputation.passive.dose: 'doses' is not a column of the data"):
        load_study(params_for(path, imputation={"passive": {"dose": "doses * 2"}}))
    with pytest.raises(InputError, match="imputation.passive.dose: the formula uses 'dose' itself"):
        load_study(params_for(path, imputation={"passive": {"dose": "dose * 2"}}))


# ---------------------------------------------------------------------------
# how the file is written

def test_duplicate_headers_are_refused_naming_both(tmp_path):
    path = tmp_path / "dup.csv"
    path.write_text("pid,x,y,x\na,1,2,3\nb,4,5,6\n")
    with pytest.raises(InputError, match="columns 2 and 4 are both named 'x'"):
        read_raw(path)
    xlsx = tmp_path / "dup.xlsx"
    pd.DataFrame([["pid", "x", "x"], ["a", 1, 2]]).to_excel(xlsx, index=False, header=False)
    with pytest.raises(InputError, match="columns 2 and 3 are both named 'x'"):
        read_raw(xlsx)


def test_a_semicolon_file_is_recognised_and_read_with_its_marks(tmp_path):
    path = tmp_path / "eu.csv"
    path.write_text("pid;weight;height\na;72,5;1.701\nb;80,25;1.655\nc;NA;1.802\n")
    with pytest.raises(InputError, match="looks semicolon-delimited; set data.delimiter: ';'.*data.decimal: ','"):
        load_study(params_for(path))
    with pytest.raises(InputError, match=r"column 'weight' holds numbers written like '72,5'.*set data.decimal: ','"):
        load_study(params_for(path, data={"delimiter": ";"}))
    study = load_study(params_for(path, data={"delimiter": ";", "decimal": ",", "thousands": "."}))
    assert study.data["weight"].tolist()[:2] == [72.5, 80.25]
    assert study.data["height"].tolist() == [1701.0, 1655.0, 1802.0]  # '.' as thousands, as declared


@pytest.mark.parametrize("values,advice", [
    (["1,234", "12,000", "3,500"], "set data.thousands: ',' if the comma separates thousands, or data.decimal: ','"),
    (["1,234.5", "12,000.25", "3,500.0"], "set data.thousands: ','"),
    (["1 234", "12 000", "3 500"], "set data.thousands: ' '"),
    (["12,5", "13,25", "NA"], "set data.decimal: ','"),
])
def test_numbers_with_other_marks_are_not_read_as_categories(tmp_path, values, advice):
    path = write_csv(tmp_path, pd.DataFrame({"pid": ["a", "b", "c"], "income": values}))
    with pytest.raises(InputError, match="column 'income' holds numbers written like") as info:
        load_study(params_for(path, missing={"markers": ["NA"]}))
    assert advice in str(info.value)


def test_thousands_separators_read_when_declared(tmp_path):
    path = write_csv(tmp_path, pd.DataFrame({"pid": ["a", "b", "c"], "income": ["1,234.5", "12,000", "350"]}))
    study = load_study(params_for(path, data={"thousands": ","}))
    assert study.data["income"].tolist() == [1234.5, 12000.0, 350.0]


@pytest.mark.parametrize("dates", [
    [f"2024-03-{d:02d}" for d in range(1, 29)],
    [f"{d:02d}/03/2024" for d in range(1, 29)],
    [f"{d:02d}MAR2024" for d in range(1, 29)],
    [f"2024-03-{d:02d}T08:30:00" for d in range(1, 29)],
])
def test_dates_are_refused_with_what_to_do(tmp_path, dates):
    # measured: dates became a 28-level nominal variable
    path = write_csv(tmp_path, pd.DataFrame({"pid": range(28), "visit": dates}))
    with pytest.raises(InputError, match="column 'visit' holds dates .* data.ignore: \\['visit'\\]"):
        load_study(params_for(path))
    study = load_study(params_for(path, data={"ignore": ["visit"]}))
    assert "visit" not in study.data.columns


def test_excel_date_cells_are_dates(tmp_path):
    path = tmp_path / "d.xlsx"
    pd.DataFrame({"pid": [1, 2, 3], "visit": pd.to_datetime(["2024-01-02", "2024-02-03", None])}).to_excel(
        path, index=False)
    with pytest.raises(InputError, match="column 'visit' holds dates"):
        load_study(params_for(path))


def test_free_text_values_never_leave_intake(tmp_path):
    names = [f"Participant Name {i}" for i in range(30)]
    names[3] = ""
    path = write_csv(tmp_path, pd.DataFrame({"pid": range(30), "name": names, "site": ["A", "B", "C"] * 10}))
    study = load_study(params_for(path))
    info = study.variables["name"]
    assert info.free_text and info.n_distinct == 29
    assert set(study.data["name"].dropna()) == {FREE_TEXT_LEVEL}
    assert int(study.missing["name"].sum()) == 1
    table = study.variables_table()
    text = table.to_csv()
    assert "Participant Name" not in text and "29 distinct texts (not shown)" in text
    assert not study.variables["site"].free_text  # a 3-level category stays a category


def test_a_few_repeated_comments_are_free_text_too(tmp_path):
    # palmerpenguins ships the raw LTER table (load_penguins_raw): its Comments column holds 10
    # distinct sentences in 54 cells ("Nest never observed with full clutch.", pandas counting the
    # shipped file), too few distinct texts for the counting rule, but sentences all the same.
    from palmerpenguins import load_penguins_raw

    raw = load_penguins_raw()
    comments = raw["Comments"]
    assert comments.nunique() == 10 and comments.notna().sum() == 54
    frame = pd.DataFrame({"pid": raw["Individual ID"] + "-" + raw["studyName"], "Comments": comments.fillna(""),
                          "Island": raw["Island"]})
    study = load_study(params_for(write_csv(tmp_path, frame)))
    info = study.variables["Comments"]
    assert info.free_text and info.n_distinct == 10
    assert int(study.missing["Comments"].sum()) == 344 - 54
    text = study.variables_table().to_csv()
    assert "clutch" not in text and "isotopes" not in text
    assert "sentences, read as free text (10 distinct texts)" in info.reason
    assert not study.variables["Island"].free_text  # three island names stay a category


def test_answer_options_of_several_words_stay_categories(tmp_path):
    # Questionnaire answers are several words but no sentences (no full stop ending one).
    options = ["Never", "Less than once a month", "Once a month", "2 to 4 times a month", "4 or more times a week"]
    path = write_csv(tmp_path, pd.DataFrame({"pid": range(50), "often": options * 10}))
    info = load_study(params_for(path)).variables["often"]
    assert not info.free_text and info.type == "nominal"


# ---------------------------------------------------------------------------
# column names

@pytest.mark.parametrize("name,what", [
    ('x") + I(0*Q("x") + __import__(\'os\').system(\'touch F\')) + Q("x', "a double quote"),
    ("it's", "a single quote"),
    ("a\\b", "a backslash"),
    ("a`b", "a backtick"),
    ("line\nbreak", "the control character U+000A"),
    ("esc\x1b[31m", "the control character U+001B"),
    ("rtl\u202eevil", "the control character U+202E"),
])
def test_unsafe_column_names_are_refused_naming_the_column(tmp_path, name, what):
    path = write_csv(tmp_path, pd.DataFrame({"pid": ["a", "b"], name: ["1", "2"]}))
    with pytest.raises(InputError) as info:
        load_study(params_for(path))
    message = str(info.value)
    assert f"has {what} in its name" in message and "\n" not in message and "\x1b" not in message
    study = load_study(params_for(path, data={"ignore": [name]}))  # left out, it is never read
    assert list(study.data.columns) == []


def test_a_byte_order_mark_is_not_part_of_the_first_name(tmp_path):
    path = tmp_path / "bom.csv"
    path.write_bytes("\ufeffpid,x\na,1\nb,2\n".encode("utf-8"))
    assert list(read_raw(path).columns) == ["pid", "x"]


def test_unnamed_columns(tmp_path):
    empty = tmp_path / "trailing.csv"
    empty.write_text("pid,x,\na,1,\nb,2,\n")  # a trailing delimiter on every line
    raw = read_raw(empty)
    assert list(raw.columns) == ["pid", "x"]
    study = load_study(params_for(empty))
    assert any("column 3 has no name and no values; it was left out" in w for w in study.warnings)
    filled = tmp_path / "unnamed.csv"
    filled.write_text("pid,,x\na,5,1\nb,6,2\n")
    with pytest.raises(InputError, match="column 2 has values but no name"):
        read_raw(filled)


@pytest.mark.parametrize("kind", ["csv_as_xlsx", "nested_parquet", "latin1", "binary"])
def test_odd_files_stop_with_one_line(tmp_path, kind):
    if kind == "csv_as_xlsx":
        path = tmp_path / "data.xlsx"
        path.write_text("pid,x\na,1\n")
        needle = "cannot be read as xlsx"
    elif kind == "nested_parquet":
        path = tmp_path / "n.parquet"
        pd.DataFrame({"pid": [1, 2], "x": [[1, 2], [3]]}).to_parquet(path)
        needle = "column 'x' holds list<element: int64> values"
    elif kind == "latin1":
        path = tmp_path / "l.csv"
        path.write_bytes("pid,caf\xe9\na,1\n".encode("latin-1"))
        needle = "not readable as utf-8"
    else:
        path = tmp_path / "b.csv"
        path.write_bytes(bytes(range(256)) * 8)
        needle = str(path)
    with pytest.raises(InputError) as info:
        load_study(params_for(path))
    assert needle in str(info.value) and "\n" not in str(info.value)


@pytest.mark.parametrize("blank", ["", "  "])
def test_a_blank_listed_as_a_level_is_refused_not_ignored(tmp_path, blank):
    # An ADSL-style flag coded 'Y'/blank (hand-written three rows): listing '' among the levels used to keep
    # the blank cells missing silently. Every blank is missing in gapbook, so the params are refused, naming
    # the key and how to code the flag; the refusal comes with the params, so both engines give it alike.
    path = write_csv(tmp_path, pd.DataFrame({"pid": ["A", "B", "C"], "SAFFL": ["Y", "", "Y"]}))
    for engine in ("pandas", "duckdb"):
        with pytest.raises(InputError, match=r"variables\.SAFFL\.levels: a blank \(''\) cannot be a level.*"
                                             r"code the blank as a word in the file.*data\.keep_rows"):
            load_study(params_for(path, data={"engine": engine}, variables={"SAFFL": {"levels": [blank, "Y"]}}))
    # Without the blank among the levels, the blank cell is missing with the reason 'blank' (one of three).
    study = load_study(params_for(path, variables={"SAFFL": {"levels": ["Y"]}}))
    assert int(study.missing["SAFFL"].sum()) == 1 and study.reasons["SAFFL"].iloc[1] == "blank"
