"""Intake: markers become missing values with their reasons; nothing is silently coerced.

Expected counts in the small frames below are hand-counted from the frames as written.
"""
from __future__ import annotations

import hashlib

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from gapbook.errors import InputError
from gapbook.intake import load_study, read_raw
from gapbook.vocabulary import BLANK, IMPLAUSIBLE, NOT_APPLICABLE
from gapbook.params import Params


def make_params(path, **sections):
    body = {"data": {"path": str(path), "id": "pid"}}
    body.update(sections)
    return Params.from_dict(body)


RAW = pd.DataFrame({
    "pid": ["a1", "a2", "a3", "a4", "a5", "a6", "a7", "a8"],
    "age": ["34", "", "NA", " na ", "?", "-9", "-9.0", "61"],
    "smoker": ["yes", "no", "Unknown", "UNKNOWN ", "yes", "prefer not to say", "no", "yes"],
    "treated": ["yes", "no", "no", "yes", "", "yes", "no", "yes"],
    "dose": ["10", "", "", "-7", "", "15", "3", "12"],
    "weight": ["70", "720", "65", "80", "7.2", "66", "71", "68"],
})


@pytest.fixture
def csv_file(tmp_path):
    path = tmp_path / "study.csv"
    RAW.to_csv(path, index=False)
    return path


MARKERS = {"markers": ["", "NA", "?", "unknown"], "reasons": {-9: "lost to follow-up", -7: "declined"}}


def study_of(path, **extra):
    params = make_params(
        path,
        variables={"age": {"type": "continuous"}, "smoker": {"type": "binary", "levels": ["no", "yes"]},
                   "treated": {"type": "binary", "levels": ["no", "yes"]},
                   "dose": {"type": "continuous", "applies_if": "treated == 'yes'"},
                   "weight": {"type": "continuous", "range": [30, 250]}},
        missing={"markers": ["", "NA", "?", "unknown"], "reasons": {-9: "lost to follow-up", -7: "declined"},
                 "columns": {"smoker": {"reasons": {"prefer not to say": "declined"}}}},
        **extra,
    )
    return load_study(params)


def test_every_marker_kind_keeps_its_reason(csv_file):
    study = study_of(csv_file)
    age = study.reasons["age"].astype(object).where(study.reasons["age"].notna(), None).tolist()
    # hand count: blank, "NA", " na " (case/space-insensitive), "?", -9 and -9.0 (numeric code)
    assert age == [None, BLANK, "marker NA", "marker NA", "marker ?", "lost to follow-up", "lost to follow-up", None]
    assert study.data["age"].tolist()[0] == 34.0 and np.isnan(study.data["age"].iloc[1])
    smoker = study.reasons["smoker"]
    assert smoker.value_counts().to_dict() == {"marker unknown": 2, "declined": 1}
    assert list(study.data["smoker"].cat.categories) == ["no", "yes"]


def test_not_applicable_is_kept_apart_from_missing(csv_file):
    study = study_of(csv_file)
    reasons = study.reasons["dose"].astype(object).tolist()
    # treated == no in rows 2, 3, 7 -> not applicable; row 5 treated blank -> applicability unknown, stays blank;
    # row 4 dose -7 -> declined.  (Row 7 had a dose of 3 while untreated: it does not apply.)
    assert reasons[1] == NOT_APPLICABLE and reasons[2] == NOT_APPLICABLE and reasons[6] == NOT_APPLICABLE
    assert reasons[4] == BLANK and reasons[3] == "declined"
    assert study.missing["dose"].sum() == 2
    assert study.not_applicable["dose"].sum() == 3
    assert not (study.missing & study.not_applicable).to_numpy().any()


def test_range_flags_or_sets_missing(csv_file):
    flagged = study_of(csv_file)
    assert flagged.range_issues["id"].tolist() == ["a2", "a5"]
    assert flagged.range_issues["value"].tolist() == [720.0, 7.2]
    assert flagged.data["weight"].notna().all()
    params_missing = {"out_of_range": "missing"}
    study = load_study(make_params(csv_file, variables={"weight": {"type": "continuous", "range": [30, 250],
                                                                    **params_missing}}, missing=MARKERS))
    assert study.reasons["weight"].astype(object).tolist()[1] == IMPLAUSIBLE
    assert study.data["weight"].isna().sum() == 2


def test_robust_screen_matches_scipy_mad(tmp_path):
    # A variable with negative values is screened on its own scale.
    rng = np.random.default_rng(4)
    values = np.append(rng.normal(0, 5, 200).round(2), [70.0])
    path = tmp_path / "x.csv"
    pd.DataFrame({"pid": np.arange(201), "x": values}).to_csv(path, index=False)
    study = load_study(make_params(path, missing={"robust_z": 4}))
    # reference: scipy.stats.median_abs_deviation with the normal scale (1.4826)
    scale = stats.median_abs_deviation(values, scale="normal")
    expected = np.flatnonzero(np.abs(values - np.median(values)) / scale > 4)
    assert study.extreme_values["id"].tolist() == [str(i) for i in expected]
    assert 200 in expected and (study.extreme_values["z_scale"] == "linear").all()


def test_robust_screen_leaves_skewed_positive_values_alone_and_finds_real_outliers(tmp_path):
    # A right-skewed laboratory value: log-normal, 313 patients (a bilirubin-like spread, sigma 0.9 on the log scale).
    rng = np.random.default_rng(12)
    values = np.exp(rng.normal(np.log(0.8), 0.9, 313)).round(3)
    path = tmp_path / "lab.csv"
    pd.DataFrame({"pid": np.arange(313), "bili": values}).to_csv(path, index=False)
    study = load_study(make_params(path))
    assert study.extreme_values.empty
    # The same values on their own scale (reference: scipy MAD, cutoff 5) would list a long tail.
    linear = np.abs(values - np.median(values)) / stats.median_abs_deviation(values, scale="normal")
    assert (linear > 5).sum() >= 5
    # Real errors are still found: values 1000 times and 1/1000 of the median (a unit or decimal point slip).
    values[[7, 150]] = [np.median(values) * 1000, np.median(values) / 1000]
    pd.DataFrame({"pid": np.arange(313), "bili": values}).to_csv(path, index=False)
    study = load_study(make_params(path))
    found = study.extreme_values
    assert found["id"].tolist() == ["7", "150"] and (found["z_scale"] == "log").all()
    # Reference: robust z of the logs with scipy's normal MAD (an odd count, so the same middle values).
    logs = np.log(values)
    z = (logs - np.median(logs)) / stats.median_abs_deviation(logs, scale="normal")
    np.testing.assert_allclose(found["robust_z"], z[[7, 150]], rtol=1e-5)
    assert found["robust_z"].iloc[0] > 5 and found["robust_z"].iloc[1] < -5


def test_formats_read_alike(tmp_path, csv_file):
    tsv, xlsx, parquet = tmp_path / "s.tsv", tmp_path / "s.xlsx", tmp_path / "s.parquet"
    RAW.to_csv(tsv, sep="\t", index=False)
    RAW.to_excel(xlsx, index=False)
    RAW.to_parquet(parquet, index=False)
    reference = study_of(csv_file)
    for path in (tsv, xlsx, parquet):
        other = study_of(path)
        pd.testing.assert_frame_equal(other.data, reference.data)
        pd.testing.assert_frame_equal(other.reasons.astype(object), reference.reasons.astype(object))


def test_typed_excel_cells_and_empty_cells(tmp_path):
    path = tmp_path / "typed.xlsx"
    pd.DataFrame({"pid": [1, 2, 3], "x": [1.5, None, -9], "g": ["a", None, "b"]}).to_excel(path, index=False)
    study = load_study(make_params(path, missing={"reasons": {-9: "lost"}}))
    assert study.reasons["x"].astype(object).tolist()[1:] == [BLANK, "lost"]
    assert study.reasons["g"].astype(object).tolist()[1] == BLANK


def test_types_inferred_and_reported(tmp_path):
    path = tmp_path / "t.csv"
    pd.DataFrame({"pid": range(6), "flag": [0, 1, 1, 0, 1, 0], "visits": [0, 2, 5, 1, 3, 2],
                  "score": [1.5, 2.25, 3.0, 10.0, 44.5, 3.0], "site": ["a", "b", "c", "a", "b", "c"]}).to_csv(path, index=False)
    study = load_study(make_params(path))
    assert study.types == {"flag": "binary", "visits": "count", "score": "continuous", "site": "nominal"}
    assert len(study.notes) == 4 and all("inferred" in n for n in study.notes)


@pytest.mark.parametrize("column,content,needle", [
    ("age", ["34", "thirty"], "column 'age' is declared continuous but holds the text 'thirty' at data rows 2"),
    ("smoker", ["yes", "maybe"], "holds 'maybe'"),
])
def test_unexpected_text_is_an_input_error(tmp_path, column, content, needle):
    path = tmp_path / "bad.csv"
    pd.DataFrame({"pid": ["p1", "p2"], column: content}).to_csv(path, index=False)
    variables = {"age": {"type": "continuous"}, "smoker": {"type": "binary", "levels": ["no", "yes"]}}
    before = hashlib.sha256(path.read_bytes()).hexdigest()
    with pytest.raises(InputError, match=needle):
        load_study(make_params(path, variables={column: variables[column]}))
    assert hashlib.sha256(path.read_bytes()).hexdigest() == before  # input files are read-only to us


def test_duplicate_ids_empty_file_and_unknown_columns(tmp_path):
    dup = tmp_path / "dup.csv"
    pd.DataFrame({"pid": ["a", "b", "a"], "x": [1, 2, 3]}).to_csv(dup, index=False)
    with pytest.raises(InputError, match=r"duplicate id 'a' in column 'pid' \(data rows 1, 3\)"):
        load_study(make_params(dup))
    empty = tmp_path / "empty.csv"
    empty.write_text("")
    with pytest.raises(InputError, match="empty"):
        load_study(make_params(empty))
    header_only = tmp_path / "header.csv"
    header_only.write_text("pid,x\n")
    with pytest.raises(InputError, match="no data rows"):
        load_study(make_params(header_only))
    fine = tmp_path / "fine.csv"
    pd.DataFrame({"pid": ["a", "b"], "x": [1, 2]}).to_csv(fine, index=False)
    with pytest.raises(InputError, match="variables.xx is not a column .*did you mean 'x'"):
        load_study(make_params(fine, variables={"xx": {"type": "count"}}))
    with pytest.raises(InputError, match="not found"):
        load_study(make_params(tmp_path / "nowhere.csv"))


def test_bad_applies_if_names_the_key(csv_file):
    with pytest.raises(InputError, match=r"variables\.dose\.applies_if"):
        load_study(make_params(csv_file, variables={"dose": {"type": "continuous", "applies_if": "treatd == 'yes'"}},
                               missing=MARKERS))


def test_read_raw_keeps_cells_as_written(csv_file):
    raw = read_raw(csv_file)
    assert raw["age"].tolist()[3] == " na "
    assert raw["age"].tolist()[6] == "-9.0"


def test_undeclared_numbers_with_stray_text_are_refused(tmp_path):
    path = tmp_path / "stray.csv"
    pd.DataFrame({"pid": range(5), "sbp": ["120", "135", "n.d.", "128", "141"],
                  "site": ["north", "south", "2", "north", "east"]}).to_csv(path, index=False)
    with pytest.raises(InputError, match="column 'sbp' holds numbers and the text 'n.d.' at data rows 3"):
        load_study(make_params(path))
    # declared as a marker, the same column reads as a number; a mostly-text column stays nominal
    study = load_study(make_params(path, missing={"markers": ["n.d."]}))
    assert study.types["sbp"] == "continuous" and study.types["site"] == "nominal"


def test_constant_and_many_level_columns_are_described_plainly(tmp_path):
    path = tmp_path / "c.csv"
    pd.DataFrame({"pid": range(30), "site": ["A"] * 30, "batch": [7] * 30,
                  "visit_date": [f"2026-01-{d:02d}" for d in range(1, 31)]}).to_csv(path, index=False)
    # declared nominal (an explicit choice), dates are categories whose long level list is cut
    study = load_study(make_params(path, variables={"visit_date": {"type": "nominal"}}))
    assert study.types["site"] == "nominal" and study.types["batch"] == "continuous"
    assert "constant" in study.variables["site"].reason
    levels = study.variables_table().set_index("variable").loc["visit_date", "levels"]
    assert levels.endswith("... (30 levels)")


def test_an_infinite_value_makes_a_column_continuous_without_a_numpy_warning():
    # inf is not a whole number (IEEE 754: inf mod 1 is NaN, with an 'invalid' warning numpy would print)
    import warnings

    from gapbook.vocabulary import infer_type

    with warnings.catch_warnings():
        warnings.simplefilter("error")
        kind, _ = infer_type(pd.Series([0.0, 1.0, 2.0, np.inf, 3.0]))
    assert kind == "continuous"


def test_blank_outcomes_take_their_reason_from_the_discontinuation_column(tmp_path):
    # An ADSL-like file (CDISC ADaM: DCSREAS holds the reason for discontinuation, blank for completers).
    # Expected counts: pandas counting the file itself.
    frame = pd.DataFrame({"pid": [f"01-{i:03d}" for i in range(12)],
                          "arm": ["A", "B"] * 6,
                          "y": ["3.1", "", "2.5", "", "-9", "1.0", "", "4.2", "", "2.2", "", "3.3"],
                          "DCSREAS": ["", "ADVERSE EVENT", "", "LACK OF EFFICACY", "ADVERSE EVENT", "",
                                      "ADVERSE EVENT", "", "", "", "NA", ""]})
    path = tmp_path / "adsl.csv"
    frame.to_csv(path, index=False)
    params = make_params(path, missing={"markers": ["", "NA"], "reasons": {-9: "refused"},
                                        "columns": {"y": {"reason_from": "DCSREAS"}}})
    study = load_study(params)
    blank_y = frame["y"] == ""
    expected = frame.loc[blank_y & ~frame["DCSREAS"].isin(["", "NA"]), "DCSREAS"].value_counts()
    reasons = study.reasons["y"].value_counts()
    for reason, count in expected.items():
        assert reasons[reason] == count
    # a code in the cell keeps its own reason; a blank cell whose reason column is blank or a marker stays 'blank'
    assert reasons["refused"] == (frame["y"] == "-9").sum()
    assert reasons[BLANK] == (blank_y & frame["DCSREAS"].isin(["", "NA"])).sum()
    # the reason column is no variable (its blanks mean 'no reason'), and check says so
    assert "DCSREAS" not in study.data.columns
    assert any(note.startswith("DCSREAS: the reasons for the blank cells of y") for note in study.notes)


def test_a_reason_column_that_is_free_text_or_absent_is_refused(tmp_path):
    frame = pd.DataFrame({"pid": range(60), "y": [""] * 60, "why": [f"comment {i}" for i in range(60)]})
    path = tmp_path / "study.csv"
    frame.to_csv(path, index=False)
    with pytest.raises(InputError, match="60 distinct texts .* looks like free text"):
        load_study(make_params(path, missing={"columns": {"y": {"reason_from": "why"}}}))
    with pytest.raises(InputError, match="missing.columns.y.reason_from: 'whyy' is not a column .* did you mean 'why'"):
        load_study(make_params(path, missing={"columns": {"y": {"reason_from": "whyy"}}}))
    from gapbook.intake_duckdb import choose_engine
    with pytest.raises(InputError, match="reason_from is read with pandas only"):
        choose_engine(make_params(path, data={"path": str(path), "engine": "duckdb"},
                                  missing={"columns": {"y": {"reason_from": "why"}}}))
