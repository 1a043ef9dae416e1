"""Hostile and odd inputs found by trying the kit as an attacker and as a user with a real file.

Each case is one a user or an attacker can write; the expectation is the kit's own contract
(README "Writing a params file", "What intake refuses"): exit 2 with one line naming the file,
key, column or row and what to do, never a traceback, never a silent change of meaning.
"""
from __future__ import annotations

import pytest

from gapbook.cli import main
from gapbook.errors import InputError
from gapbook.params import load_params

CSV = "id,arm,age,y\n1,a,30,1.5\n2,b,40,NA\n3,a,50,2.5\n4,b,?,3.1\n5,a,60,2.2\n6,b,33,1.1\n"
PARAMS = """study: {name: odd inputs}
data: {path: d.csv, id: id}
variables: {arm: {type: binary, levels: [a, b]}}
missing: {markers: ["NA", "?"]}
analysis: {formula: "y ~ arm + age", exposure: arm}
"""


def study(tmp_path, params=PARAMS, csv=CSV):
    (tmp_path / "d.csv").write_bytes(csv.encode() if isinstance(csv, str) else csv)
    path = tmp_path / "params.yaml"
    path.write_text(params)
    return path


def check(path, capsys):
    """Run ``gapbook check`` in process; return (exit code, stderr)."""
    code = main(["check", str(path)])
    return code, capsys.readouterr().err


def test_a_nul_in_the_data_path_is_a_one_line_error(tmp_path, capsys):
    # A NUL byte cannot be in a file name (POSIX); the path resolution raised ValueError with a traceback.
    path = study(tmp_path, PARAMS.replace("path: d.csv", 'path: "d.csv\\0.txt"'))
    code, err = check(path, capsys)
    assert code == 2
    assert "Traceback" not in err and len(err.strip().splitlines()) == 1
    assert "data.path" in err and "NUL" in err


@pytest.mark.parametrize("text,key,lines", [
    # a second section of the same name: YAML 1.2 says mapping keys are unique; PyYAML keeps the last silently
    (PARAMS + "study: {name: other}\n", "study", "lines 1 and 6"),
    # a variable declared twice inside one section: the first declaration would be lost
    (PARAMS.replace("variables: {arm: {type: binary, levels: [a, b]}}",
                    "variables:\n  age: {range: [0, 120]}\n  arm: {type: binary, levels: [a, b]}\n"
                    "  age: {type: count}"), "age", "lines 4 and 6"),
])
def test_a_key_written_twice_is_refused_naming_it(tmp_path, text, key, lines):
    path = tmp_path / "params.yaml"
    path.write_text(text)
    with pytest.raises(InputError) as info:
        load_params(path)
    message = str(info.value)
    assert f"'{key}' is written twice ({lines})" in message and str(path) in message


def test_merge_keys_may_still_be_overridden(tmp_path):
    # '<<: *anchor' then an explicit key is the YAML merge-key idiom, not a repeated key.
    text = PARAMS + "imputation:\n  <<: {m: 5, iterations: 5}\n  m: 7\n"
    path = tmp_path / "params.yaml"
    path.write_text(text)
    params = load_params(path)
    assert params.imputation.m == 7 and params.imputation.iterations == 5


def test_a_first_row_longer_than_the_header_names_the_row(tmp_path, capsys):
    # pandas reads the extra leading fields as row labels and shifts every value one column along
    # (its documented index-column inference); the error was a type error about another column.
    path = study(tmp_path, csv=CSV.replace("1,a,30,1.5", "1,a,30,1.5,9,9"))
    code, err = check(path, capsys)
    assert code == 2 and len(err.strip().splitlines()) == 1
    assert "d.csv: the first data row has 6 values but the header row names 4 columns" in err


@pytest.mark.parametrize("engine", ["pandas", "duckdb"])
@pytest.mark.parametrize("csv,needle", [
    (CSV.replace("5,a,60", "5," + "x" * 100_000 + ",60"), "column 'arm' holds 'xxx"),           # a level
    (CSV.replace("5,a,60", "5,a," + "x" * 100_000), "column 'age' holds numbers and the text 'xxx"),  # stray text
    (CSV.replace("1,a,30", "9" * 100_000 + ",a,30").replace("3,a,50", "9" * 100_000 + ",a,50"),
     "duplicate id '999"),                                                                       # an id
])
def test_a_huge_value_is_cut_in_the_one_line_error(tmp_path, capsys, engine, csv, needle):
    # The error line quoted the whole cell: a 100,000-character line is no longer "one line naming the value".
    path = study(tmp_path, PARAMS.replace("id: id}", f"id: id, engine: {engine}}}"), csv)
    code, err = check(path, capsys)
    assert code == 2 and needle in err
    assert len(err) < 600 and "..." in err


@pytest.mark.parametrize("params,csv,n", [
    (PARAMS, "id,arm,age,y\n1,a,30,1.5\n", 1),                                      # a one-row file
    # y applies only in arm a, so the rows the model can use hold one arm
    (PARAMS.replace("variables: {arm: {type: binary, levels: [a, b]}}",
                    "variables: {arm: {type: binary, levels: [a, b]}, y: {applies_if: \"arm == 'a'\"}}"), CSV, 3),
])
def test_an_exposure_the_usable_rows_cannot_estimate_is_named_as_such(tmp_path, capsys, params, csv, n):
    # It was "'arm' matches no term of the model (Intercept)" (false: the formula has it), and statsmodels'
    # RuntimeWarning about zero residual degrees of freedom reached the output as two raw lines.
    code, err = check(study(tmp_path, params, csv), capsys)
    assert code == 2 and "Warning" not in err and len(err.strip().splitlines()) == 1, err
    assert (f"analysis.exposure: 'arm' cannot be estimated: its term arm[T.b] is constant among the {n} analysed "
            "rows") in err


@pytest.mark.parametrize("levels,message", [
    ("[a, a]", "level 'a' is listed twice;"),
    ("[a, ' A ']", "level ' A ' is listed twice (as 'a' too);"),  # values match levels ignoring case and spaces
    ("[1, 1.0]", "level '1.0' is listed twice (as '1' too);"),
])
def test_a_level_listed_twice_is_refused_naming_it(tmp_path, levels, message):
    # [a, a] passed the params and failed later as "'b' is not among variables.arm.levels (a, a)".
    path = study(tmp_path, PARAMS.replace("levels: [a, b]", f"levels: {levels}"))
    with pytest.raises(InputError) as info:
        load_params(path)
    assert "variables.arm.levels: " + message in str(info.value)


LUNG_LIKE = "pid,months,status,arm\n1,5,Yes,a\n2,7,no,b\n3,9, YES ,a\n4,3,No,b\n5,8,yes,b\n6,2,no,a\n"
COX = """data: {path: d.csv, id: pid}
variables: {arm: {type: binary, levels: [a, b]}}
analysis: {formula: "months ~ arm", family: cox, exposure: arm, event: {column: status, event: [yes], censored: [no]}}
"""


def test_event_values_match_ignoring_case_and_spaces_like_markers_and_levels(tmp_path, capsys):
    # README: markers and levels match ignoring case and surrounding spaces; the event coding refused 'Yes'
    # for 'yes' ("holds 'Yes' ... which is neither an event value ('yes') nor a censored value ('no')").
    from gapbook.survival import EventCoding

    assert main(["check", str(study(tmp_path, COX, LUNG_LIKE))]) == 0, capsys.readouterr().err
    coding = EventCoding("status", event=("yes",), censored=("no",))
    frame = __import__("pandas").DataFrame({"status": ["Yes", "no", " YES ", "No", None]})
    assert coding.unexpected(frame).tolist() == []


def test_one_text_as_event_and_as_censored_in_two_spellings_is_refused(tmp_path):
    path = study(tmp_path, COX.replace("censored: [no]", "censored: [no, ' YES']"), LUNG_LIKE)
    with pytest.raises(InputError, match="listed both as an event and as censored"):
        load_params(path)


def test_yes_and_no_in_the_params_stay_text(tmp_path):
    # YAML 1.1 (PyYAML's safe loader) reads yes/no/on/off as booleans: `levels: [no, yes]` became
    # [False, True] and `event: [yes]` became 1, matching nothing in a file that says yes/no. YAML 1.2
    # (yaml.org/spec/1.2.2, core schema) has only true/false; switches still take yes (pydantic's bool).
    params = PARAMS.replace("levels: [a, b]", "levels: [no, yes]").replace(
        "analysis: {formula", "analysis: {robust: yes, formula").replace('markers: ["NA", "?"]', 'markers: [NA, off]')
    loaded = load_params(study(tmp_path, params, CSV.replace(",a,", ",no,").replace(",b,", ",yes,")))
    assert loaded.variables["arm"].levels == ["no", "yes"]
    assert loaded.missing.markers == ["NA", "off"]
    assert loaded.analysis.robust is True


def test_the_event_column_as_a_covariate_of_its_own_cox_model_is_refused(tmp_path, capsys):
    # months ~ arm + status: the event indicator "explains" the hazard by itself; check passed it.
    params = COX.replace('"months ~ arm"', '"months ~ arm + status"').replace(
        "event: {column: status, event: [yes], censored: [no]}", "event: status")
    code, err = check(study(tmp_path, params, LUNG_LIKE.replace("Yes", "1").replace("YES", "1").replace(
        "yes", "1").replace("No", "0").replace("no", "0")), capsys)
    assert code == 2 and "analysis.event: 'status' is the event column and a covariate of the formula" in err


@pytest.mark.parametrize("engine", ["pandas", "duckdb"])
def test_spaces_around_a_column_name_are_dropped_and_said(tmp_path, capsys, engine):
    # The README's contract: gapbook never renames a column silently. A header ' age ' is read as
    # 'age' (what the params name), and check says so, whichever engine reads the file.
    params = PARAMS.replace("data: {path: d.csv, id: id}", f"data: {{path: d.csv, id: id, engine: {engine}}}")
    path = study(tmp_path, params=params, csv=CSV.replace("id,arm,age,y", "id,arm, age ,y"))
    code = main(["check", str(path)])
    out = capsys.readouterr()
    assert code == 0, out.err
    assert "column 3 is named ' age ' in the header; it is read as 'age'" in out.out + out.err


def _near_limit_study(tmp_path, engine, age, fmt="parquet"):
    import numpy as np
    import pandas as pd

    n = 60
    frame = pd.DataFrame({"id": np.arange(n), "arm": np.where(np.arange(n) % 2, "a", "b"),
                          "age": np.resize(np.asarray(age, dtype=float), n),
                          "y": np.where(np.arange(n) == 5, np.nan, np.linspace(-1, 1, n))})
    params = PARAMS.replace("path: d.csv, id: id}", f"path: d.{fmt}, id: id, engine: {engine}}}")
    if fmt == "csv":
        return study(tmp_path, params, frame.to_csv(index=False))
    frame.to_parquet(tmp_path / "d.parquet", index=False)
    return study(tmp_path, params)


@pytest.mark.parametrize("engine", ["pandas", "duckdb"])
@pytest.mark.parametrize("fmt,age,shown,rows", [
    ("parquet", [30.0, 1e308, -0.0, 41.0], "1e+308", "data rows 2, 6, 10 (ids 1, 5, 9)"),
    ("csv", [30.0, 40.0, -1e200, 41.0] + [50.0] * 56, "-1e+200", "data rows 3 (ids 2)"),
    ("parquet", [30.0, 40.0, 50.0, float("inf")], "inf", "data rows 4, 8, 12 (ids 3, 7, 11)"),
])
def test_a_value_too_large_to_square_is_refused_in_check_naming_column_and_rows(tmp_path, capsys, engine, fmt, age,
                                                                               shown, rows):
    # 1e308 passed check, then Little's test stopped the mechanism stage with numpy's LinAlgError (exit 1):
    # its square overflows a double (IEEE 754: the largest finite value is about 1.8e308). Both engines
    # refuse it up front with the same line, whether or not a model stage runs.
    import warnings

    path = _near_limit_study(tmp_path, engine, age, fmt)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        code = main(["check", str(path), "--only", "audit"])
    err = capsys.readouterr().err
    assert code == 2 and len(err.strip().splitlines()) == 1, err
    assert f"d.{fmt}: column 'age' holds {shown} at {rows}; " in err
    assert ("an infinite value cannot be analysed: correct it in the file" if shown == "inf" else
            "values beyond \u00b11e+70 cannot be analysed (their squares and products overflow a double): rescale "
            "the column") in err
    assert not [w for w in caught if issubclass(w.category, RuntimeWarning)], [str(w.message) for w in caught]


@pytest.mark.parametrize("engine", ["pandas", "duckdb"])
def test_values_up_to_the_limit_run_and_a_huge_value_set_missing_by_its_range_is_no_value(tmp_path, capsys, engine):
    # At the limit (1e70) every stage's sums stay finite; a value the range check sets missing is not analysed.
    import warnings

    path = _near_limit_study(tmp_path, engine, [1e70, -1e70, 30.0, 1e308])
    text = path.read_text().replace("variables: {arm: {type: binary, levels: [a, b]}}",
                                    "variables: {arm: {type: binary, levels: [a, b]}, "
                                    "age: {range: [-1e71, 1e71], out_of_range: missing}}")
    path.write_text(text)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        code = main(["check", str(path)] + (["--only", "audit"] if engine == "duckdb" else []))
    out = capsys.readouterr()
    assert code == 0, out.err
    assert "15 values outside their plausible range" in out.out
    assert not [w for w in caught if issubclass(w.category, RuntimeWarning)], [str(w.message) for w in caught]


@pytest.mark.parametrize("term,shown", [("np.exp(age)", "inf at data row 3"), ("I(age ** 100)", "1.60694e+160 at data row 2")])
def test_a_formula_term_too_large_to_square_is_refused_by_check(tmp_path, capsys, term, shown):
    # exp(800) is inf (IEEE 754): check passed and every model stage stopped with statsmodels' "exog contains
    # inf or nans" (exit 1); 40 ** 100 (1.6e160) has a square past 1e308, and the term was silently left out
    # as "aliased". The first row past the bound (1e300 / 59 rows, squared root: 1.3e149) is named.
    path = _near_limit_study(tmp_path, "pandas", [30.0, 40.0, 800.0 if "exp" in term else 41.0, 50.0])
    path.write_text(path.read_text().replace("y ~ arm + age", f"y ~ arm + {term}"))
    code, err = check(path, capsys)
    assert code == 2 and len(err.strip().splitlines()) == 1, err
    assert f"analysis.formula: the term {term} is {shown}, too large to square" in err


def test_a_pipe_or_folder_as_data_or_params_is_named_as_such(tmp_path, capsys):
    # It exists, so "not found" sent the user looking for a missing file.
    import os

    os.mkfifo(tmp_path / "d.csv")
    path = tmp_path / "params.yaml"
    path.write_text(PARAMS)
    code, err = check(path, capsys)
    assert code == 2 and "d.csv: is not a regular file (a folder, pipe or device); check data.path" in err
    code, err = check(tmp_path, capsys)
    assert code == 2 and f"{tmp_path}: is not a regular file" in err and len(err.strip().splitlines()) == 1


def test_a_params_file_that_is_not_utf8_says_so(tmp_path, capsys):
    # UnicodeDecodeError is a ValueError: it was reported as "a number thousands of digits long?".
    path = tmp_path / "params.yaml"
    path.write_bytes(PARAMS.replace("odd inputs", "caf\xe9").encode("latin-1"))
    code, err = check(path, capsys)
    assert code == 2 and "not a UTF-8 text file; save the params file as UTF-8" in err


@pytest.mark.parametrize("engine", ["pandas", "duckdb"])
@pytest.mark.parametrize("content,needle", [
    (b"\x00" * (2 << 20), "d.csv: a NUL character on line 1 (within its first 64 KiB): this is not a text file"),
    (b"a" * (2 << 20), "d.csv: no line break in its first 1 MiB, so its header row alone would be longer; this is "
                       "not a delimited text file gapbook reads as utf-8: check data.path, data.format and "
                       "data.encoding"),
    (CSV.encode("utf-16"), "d.csv: the file starts with a UTF-16 or UTF-32 byte-order mark but data.encoding is "
                           "utf-8; set data.encoding: utf-16"),
    (CSV.encode("utf-16-le"), "d.csv: a NUL character on line 1 (within its first 64 KiB): this is not a text file "
                              "gapbook reads (or UTF-16/UTF-32 text: then set data.encoding, e.g. utf-16)"),
])
def test_a_binary_file_or_one_without_line_breaks_is_refused_from_its_first_bytes(tmp_path, capsys, engine, content,
                                                                                  needle):
    # A 3 GiB file of NUL bytes was read whole as one header line (check still running after 120 s); the
    # 2 MiB ones here stopped on the csv module's "field larger than field limit" after reading every byte.
    # NUL is no character of a CSV file (RFC 4180: text, commas, quotes and line breaks).
    code, err = check(study(tmp_path, PARAMS.replace("id: id}", f"id: id, engine: {engine}}}"), content), capsys)
    assert code == 2 and len(err.strip().splitlines()) == 1, err
    assert needle in err


@pytest.mark.parametrize("engine", ["pandas", "duckdb"])
@pytest.mark.parametrize("encoding,text", [("utf-16", CSV), ("utf-8", CSV.replace("\n", "\r")),
                                           ("utf-8", CSV.replace("\n", "\r\n"))])
def test_utf16_text_and_any_line_ending_are_still_read(tmp_path, capsys, engine, encoding, text):
    # UTF-16 text holds NUL bytes (every ASCII character is two bytes, one of them 0) but no NUL character.
    params = PARAMS.replace("id: id}", f"id: id, engine: {engine}, encoding: {encoding}}}")
    code = main(["check", str(study(tmp_path, params, text.encode(encoding)))])
    out = capsys.readouterr()
    assert code == 0, out.err
    assert "(6 rows, 3 variables" in out.out


LONG = "id,arm,age,y\n" + "".join(f"{i},{'ab'[i % 2]},{30 + i % 40},{i % 7}.5\n" for i in range(1, 8001))


@pytest.mark.parametrize("engine", ["pandas", "duckdb"])
@pytest.mark.parametrize("old,new,needle", [
    ("7000,a,", "7000,a\x00x,", "column 'arm' holds 'a\\x00x' at data rows 7000 (ids 7000), with a NUL character"),
    ("7000,a,30", "7000,a,3\x000", "column 'age' holds '3\\x000' at data rows 7000 (ids 7000), with a NUL character"),
    ("\n7000,", "\n7\x00000,", "column 'id' holds '7\\x00000' at data rows 7000 (ids 7\\x00000), with a NUL character"),
])
def test_a_nul_in_a_cell_past_the_first_bytes_names_column_and_row_in_both_engines(tmp_path, capsys, engine, old, new,
                                                                                   needle):
    # DuckDB said only "data.engine duckdb: a value holds a NUL character; set data.engine to pandas"; pandas took
    # 'a\x00x' as a level of its own. Both now give the same line.
    assert LONG.index(old) > 64 * 1024
    params = PARAMS.replace("id: id}", f"id: id, engine: {engine}}}").replace(", levels: [a, b]", "")
    code, err = check(study(tmp_path, params, LONG.replace(old, new)), capsys)
    assert code == 2 and len(err.strip().splitlines()) == 1, err
    assert needle in err and "remove it from the file" in err


@pytest.mark.parametrize("engine", ["pandas", "duckdb"])
def test_a_nul_in_a_parquet_text_cell_names_column_and_row(tmp_path, capsys, engine):
    import pandas as pd

    pd.DataFrame({"id": [1, 2, 3, 4], "arm": ["a", "b\x00", "a", "b"], "age": [1.0, 2.0, 3.0, 4.0],
                  "y": [1.0, 2.0, 3.0, 4.0]}).to_parquet(tmp_path / "d.parquet", index=False)
    params = PARAMS.replace("path: d.csv, id: id}", f"path: d.parquet, id: id, engine: {engine}}}")
    code, err = check(study(tmp_path, params.replace(", levels: [a, b]", "")), capsys)
    assert code == 2 and "column 'arm' holds 'b\\x00' at data rows 2 (ids 2), with a NUL character" in err


@pytest.mark.parametrize("engine", ["pandas", "duckdb"])
def test_a_parquet_file_with_two_columns_of_one_name_says_so_in_both_engines(tmp_path, capsys, engine):
    # pandas gave pyarrow's "Multiple matches for FieldRef.Name(x) in id: int64"; DuckDB intake's own line.
    import pyarrow as pa
    import pyarrow.parquet as pq

    pq.write_table(pa.table([pa.array([1, 2, 3]), pa.array([1.0, 2.0, 3.0]), pa.array([4.0, 5.0, 6.0])],
                            names=["id", "age", "age"]), tmp_path / "d.parquet")
    params = PARAMS.replace("path: d.csv, id: id}", f"path: d.parquet, id: id, engine: {engine}}}")
    code, err = check(study(tmp_path, params), capsys)
    assert code == 2 and len(err.strip().splitlines()) == 1, err
    assert "d.parquet: columns 2 and 3 are both named 'age'; rename one in the file" in err


@pytest.mark.parametrize("engine", ["pandas", "duckdb"])
@pytest.mark.parametrize("metadata,detail", [
    (b"{not json", "Expecting property name"),                                   # not JSON
    (b'{"columns": 5}', "'index_columns'"),                                       # JSON without the keys
    (b'{"index_columns": ["zz"], "columns": []}', "'zz'"),                        # an index column that is not there
])
def test_a_parquet_file_with_broken_pandas_metadata_says_so_in_both_engines(tmp_path, capsys, engine, metadata, detail):
    # pyarrow's own words ("cannot be read as parquet ('index_columns')") named neither the metadata nor a remedy.
    import pyarrow as pa
    import pyarrow.parquet as pq

    table = pa.table({"id": [1, 2, 3], "arm": ["a", "b", "a"], "age": [30.0, None, 50.0], "y": [1.0, 2.0, 3.0]})
    pq.write_table(table.replace_schema_metadata({b"pandas": metadata}), tmp_path / "d.parquet")
    params = PARAMS.replace("path: d.csv, id: id}", f"path: d.parquet, id: id, engine: {engine}}}")
    code, err = check(study(tmp_path, params), capsys)
    assert code == 2 and len(err.strip().splitlines()) == 1, err
    assert "d.parquet: its pandas metadata (the schema's 'pandas' entry" in err and detail in err
    assert "write the file again" in err


def test_a_parquet_file_that_is_damaged_is_not_called_a_metadata_problem(tmp_path, capsys):
    (tmp_path / "d.parquet").write_bytes(b"PAR1" + b"\x01" * 100 + b"PAR1")
    code, err = check(study(tmp_path, PARAMS.replace("path: d.csv", "path: d.parquet")), capsys)
    assert code == 2 and "cannot be read as parquet" in err and "metadata" not in err



WIDE = "pid,arm,base,y2,y4\n1,a,5,1.5,2.5\n2,b,6,1.0,\n3,a,4,2.0,3.0\n4,b,5,0.5,1.5\n5,a,6,1.0,2.0\n6,b,4,,\n"
WIDE_PARAMS = """data: {path: d.csv, id: pid}
design: {layout: wide, subject: pid, visit: week, visits: [2, 4], outcome_columns: [y2, y4]}
variables: {arm: {type: binary, levels: [a, b]}}
analysis: {formula: "y ~ arm * C(week) + base", exposure: arm}
"""


@pytest.mark.parametrize("columns,needle", [
    # the subject is the id, kept apart from the variables: "'pid' is not a column of the data" was false
    ("[pid, y4]", "design.outcome_columns names 'pid', the subject column (design.subject); list the outcome's own "
                  "column at each planned visit"),
    # a covariate of the formula became the outcome at a visit: "analysis.formula: 'base' is not a column" was false
    ("[y2, base]", "design.outcome_columns names 'base', which analysis.formula uses as a covariate"),
    # a text column as an outcome column stopped with a ValueError traceback ("could not convert string to float")
    ("[y2, arm2]", "design.outcome_columns: 'arm2' holds categories, not the outcome's numbers"),
])
def test_a_wide_layout_outcome_column_that_is_no_outcome_is_named_as_such(tmp_path, capsys, columns, needle):
    csv = WIDE.replace("pid,arm,", "pid,arm,arm2,").replace(",a,", ",a,x,").replace(",b,", ",b,y,")
    code, err = check(study(tmp_path, WIDE_PARAMS.replace("[y2, y4]", columns), csv), capsys)
    assert code == 2 and len(err.strip().splitlines()) == 1 and "Traceback" not in err, err
    assert needle in err


def test_a_wide_layout_visit_name_that_is_a_column_is_refused(tmp_path, capsys):
    # wide_to_long wrote the visits over the column 'base', a covariate of the model
    code, err = check(study(tmp_path, WIDE_PARAMS.replace("visit: week", "visit: base").replace("C(week)", "C(base)"),
                            WIDE), capsys)
    assert code == 2 and "design.visit: 'base' is already a column of the data" in err, err


def test_the_wide_layout_itself_still_checks(tmp_path, capsys):
    code, err = check(study(tmp_path, WIDE_PARAMS, WIDE), capsys)
    assert code == 0, err



BIDI = "\u202e"


def test_new_shows_control_and_bidi_characters_of_a_folder_name_escaped(tmp_path, capsys):
    # A right-to-left override in the folder name reached the terminal raw: 'gapbook new' printed it, and the
    # rest of the line was shown reversed (Unicode UAX #9).
    target = tmp_path / f"study{BIDI}vsc.exe\x1b[2J"
    assert main(["new", str(target)]) == 0
    out = capsys.readouterr().out
    assert BIDI not in out and "\x1b" not in out
    assert "study\\u202evsc.exe\\x1b[2J" in out


def test_check_shows_a_data_file_name_with_a_bidi_override_escaped(tmp_path, capsys):
    folder = tmp_path / f"a{BIDI}b"
    folder.mkdir()
    (folder / "d.csv").write_text(CSV)
    (folder / "params.yaml").write_text(PARAMS)
    assert main(["check", str(folder / "params.yaml")]) == 0
    out = capsys.readouterr().out
    assert BIDI not in out and "a\\u202eb" in out
    (folder / "d.csv").unlink()
    assert main(["check", str(folder / "params.yaml")]) == 2
    err = capsys.readouterr().err
    assert BIDI not in err and "a\\u202eb" in err


@pytest.mark.parametrize("text,meaning", [("not applicable", "outside a variable's applies_if condition"),
                                          ("implausible", "a range check set missing")])
def test_a_reason_column_cannot_give_a_reason_intake_keeps_for_itself(tmp_path, capsys, text, meaning):
    # 'not applicable' from the reason column made a blank outcome not missing (left out of the missing-data
    # analysis without a word); 'implausible' claimed a range check that never ran.
    csv = "id,arm,age,y,why\n1,a,30,1.5,\n2,b,40,,lost\n3,a,50,2.5,\n4,b,33,,TEXT\n5,a,60,2.2,\n6,b,35,3.0,\n"
    params = PARAMS.replace('missing: {markers: ["NA", "?"]}', "missing: {columns: {y: {reason_from: why}}}")
    code, err = check(study(tmp_path, params, csv.replace("TEXT", text)), capsys)
    assert code == 2 and len(err.strip().splitlines()) == 1, err
    assert (f"missing.columns.y.reason_from: 'why' holds '{text}' at data rows 4 (ids 4), the reason gapbook keeps "
            f"for") in err and meaning in err


def test_record_tables_read_back_texts_that_pandas_would_take_for_missing_values(tmp_path):
    # A column named NA (or None, null) is a term of estimates.csv; read back with pandas' default missing
    # markers it became NaN, and the landing page stopped on a TypeError in exposure_terms.
    import numpy as np
    import pandas as pd

    from gapbook.pages import effect_table
    from gapbook.record import compare_table
    from gapbook.stage import read_csv, write_csv

    texts = ["NA", "None", "null", "nan", "N/A", "NULL", "#N/A", "n/a", "-nan"]
    frame = pd.DataFrame({"term": texts + [None], "estimate": np.arange(len(texts) + 1.0)})
    back = read_csv(write_csv(frame, tmp_path / "t.csv"))
    assert back["term"].tolist()[:-1] == texts and pd.isna(back["term"].iloc[-1])
    estimates = pd.DataFrame({"strategy": "complete_case", "term": ["Intercept", "NA"], "estimate": [1.0, 0.5],
                              "std_error": [0.1, 0.2], "ci_lower": [0.8, 0.1], "ci_upper": [1.2, 0.9],
                              "p_value": [0.001, 0.02], "n_used": 50})
    effect = effect_table(read_csv(write_csv(estimates, tmp_path / "estimates.csv")), family="gaussian",
                          exposure="NA", alpha=0.05)
    assert effect is not None and list(effect.terms) == ["NA"]
    # verify's comparison reads tables the same way: 'NA' and 'null' are two texts, not one missing value
    other = write_csv(frame.assign(term=["null"] + texts[1:] + [None]), tmp_path / "u.csv")
    assert not compare_table(tmp_path / "t.csv", other).ok


def test_check_warns_when_a_cox_fit_runs_off_along_a_continuous_covariate(tmp_path, capsys):
    # x = -months orders every event first in its risk set, so the partial likelihood rises for ever in x's
    # coefficient (Bryson & Johnson 1981, Technometrics 23:381): statsmodels gave NaN estimates that did not
    # converge, and check said nothing (its monotone-likelihood check looks at two-valued columns only).
    csv = "pid,months,status,arm,x\n" + "".join(
        f"{i},{m},{s},{a},{-m}\n" for i, (m, s, a) in enumerate(
            [(5, 1, "a"), (7, 0, "b"), (9, 1, "a"), (3, 1, "b"), (8, 1, "b"), (2, 0, "a"), (4, 1, "a"), (6, 1, "b"),
             (10, 0, "a"), (11, 1, "b")], start=1))
    params = COX.replace('"months ~ arm"', '"months ~ arm + x"').replace(
        "event: {column: status, event: [yes], censored: [no]}", "event: status")
    code = main(["check", str(study(tmp_path, params, csv)), "--only", "cases"])
    out = capsys.readouterr()
    assert code == 0, out.err
    assert "warning: cases: the Cox model did not converge, so the stage will report a fit that did not converge" \
        in out.out + out.err


def test_a_follow_up_formula_term_too_large_to_square_is_refused_by_check(tmp_path, capsys):
    # exp(800) is inf (IEEE 754): check passed and the mixed model stopped on numpy's "SVD did not converge".
    csv = WIDE + "7,a,800,1.1,2.1\n8,b,6,0.9,1.7\n"
    import warnings

    params = WIDE_PARAMS.replace("+ base", "+ np.exp(base)")
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        code, err = check(study(tmp_path, params, csv), capsys)
    assert not [w for w in caught if issubclass(w.category, RuntimeWarning)], [str(w.message) for w in caught]
    assert code == 2 and len(err.strip().splitlines()) == 1, err
    assert "analysis.formula: the term np.exp(base) is inf at subject 7, visit 2, too large to square" in err


@pytest.mark.parametrize("source,needle", [
    ("arm", "missing.columns.y.reason_from: 'arm' is used by analysis.formula, but a reason column gives reasons"),
    ("y", "missing.columns.y.reason_from names 'y' itself"),
])
def test_a_reason_column_that_the_study_uses_is_refused_naming_both_keys(tmp_path, source, needle):
    # Intake sets a reason column apart from the variables: check said "analysis.formula: 'arm' is not a column
    # of the data" about a column that is in the file.
    params = PARAMS.replace('missing: {markers: ["NA", "?"]}', f"missing: {{columns: {{y: {{reason_from: {source}}}}}}}")
    with pytest.raises(InputError) as info:
        load_params(study(tmp_path, params))
    assert needle in str(info.value)


@pytest.mark.parametrize("engine", ["pandas", "duckdb"])
def test_a_value_near_the_smallest_double_raises_no_numpy_warning(tmp_path, capsys, engine):
    # median / 5e-324 overflows (IEEE 754): numpy's "overflow encountered in divide" was printed beside check's
    # output by the robust screen; the value is listed as extreme with an infinite z, as DuckDB's SQL gives it.
    import warnings

    path = _near_limit_study(tmp_path, engine, [30.0, 40.0, 5e-324, 41.0])
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        code = main(["check", str(path), "--only", "audit"])
    assert code == 0, capsys.readouterr().err
    assert not [w for w in caught if issubclass(w.category, RuntimeWarning)], [str(w.message) for w in caught]
