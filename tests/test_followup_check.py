"""Follow-up studies through `check`: the design section, analysis.repeated and the estimand are read
and every problem of a follow-up file is refused up front, exit 2, in one line naming subject and visit."""
from __future__ import annotations

from pathlib import Path

import pytest

from gapbook.cli import main
from gapbook.errors import InputError
from gapbook.followup.demo import followup_demo_files, followup_demo_frame
from gapbook.params import Params, load_params

HEADER = "subject,arm,base,week,chg\n"


def one_line(capsys, argv, code=2):
    assert main([str(a) for a in argv]) == code
    out, err = capsys.readouterr()
    lines = [line for line in err.splitlines() if line.strip()]
    assert len(lines) == 1 and "Traceback" not in err, err
    return out, lines[0]


@pytest.fixture
def study(followup_study):
    """The follow-up demo study copied for this test (conftest's ``followup_study``)."""
    return followup_study


def edit_data(study: Path, old: str, new: str, count: int = 1) -> None:
    path = study / "followup_trial.csv"
    text = path.read_text()
    assert old in text, old
    path.write_text(text.replace(old, new, count))


def edit_params(study: Path, old: str, new: str) -> Path:
    path = study / "params.yaml"
    text = path.read_text()
    assert old in text, old
    path.write_text(text.replace(old, new))
    return path


def test_the_shipped_demo_file_is_what_the_generator_writes():
    csv, _ = followup_demo_files()
    written = followup_demo_frame().to_csv(index=False, lineterminator="\n")
    assert csv.read_text() == written


def test_check_accepts_the_followup_demo_and_skips_the_participant_row_stages(study, capsys):
    assert main(["check", str(study / "params.yaml")]) == 0
    out, _ = capsys.readouterr()
    assert "ok" in out.splitlines()[-1]
    assert "skipped: cases, indicator, impute, sensitivity, simulate" in out
    params = load_params(study / "params.yaml")
    assert params.is_followup and params.subject_column == "subject"
    assert params.design.visits == [2, 4, 8, 12, 16] and params.analysis.repeated.covariance == "unstructured"
    assert [e.strategy for e in params.estimand.intercurrent_events] == ["treatment_policy", "hypothetical"]


@pytest.mark.parametrize("old, new, expected", [
    ("P0001,control,49.6,4,-11.3\n", "P0001,control,49.6,4,-11.3\nP0001,control,49.6,4,-10.0\n",
     ["followup_trial.csv: subject P0001 has 2 rows for visit 4"]),
    ("P0001,control,49.6,4,-11.3", "P0001,control,49.6,5,-11.3",
     ["params.yaml: design.visits: subject P0001 has visit 5", "not a planned visit"]),
    ("P0001,control,49.6,4,-11.3", "P0001,control,49.6,,-11.3", ["subject P0001 has no visit"]),
    ("P0001,control,49.6,4,-11.3", ",control,49.6,4,-11.3", ["subject column 'subject'", "data row 2"]),
    ("P0001,control,49.6,8,-13.8", "P0001,control,52.0,8,-13.8",
     ["analysis.formula: 'base' changes within subject P0001 (at visit 8)"]),
], ids=["two rows for one visit", "a visit not in the plan", "a row without visit", "a row without subject",
        "a covariate that changes after baseline"])
def test_data_problems_are_one_line_naming_subject_and_visit(study, capsys, old, new, expected):
    edit_data(study, old, new)
    _, line = one_line(capsys, ["check", study / "params.yaml"])
    assert all(part in line for part in expected), line


def test_an_arm_that_changes_within_a_participant_names_subject_and_visit(study, capsys):
    edit_data(study, "P0001,control,49.6,8,-13.8", "P0001,active,49.6,8,-13.8")
    _, line = one_line(capsys, ["check", study / "params.yaml"])
    assert ("analysis.exposure: the arm 'arm' changes within subject P0001 (from control to active at visit 8)"
            in line)
    # run refuses it the same way, before any stage, and writes nothing
    _, ran = one_line(capsys, ["run", study / "params.yaml", "--out", study / "records"])
    assert ran == line and not (study / "records").exists()


@pytest.mark.parametrize("old, new, expected", [
    ("visits: [2, 4, 8, 12, 16]", "visits: [2, 4, 4, 16]", "design: visit 4 is listed twice"),
    ("visits: [2, 4, 8, 12, 16]", "visits: [2, 4, 8, 12, 16]\n  baseline: 0", "design: baseline 0 is not one of"),
    ("layout: long", "layout: wide", "the wide layout needs outcome_columns"),
    ("layout: long", "layout: tall", "design.layout: 'tall' is not one of long, wide"),
    ("covariance: unstructured", "covariance: compound", "analysis.repeated.covariance: 'compound' is not one of "
                                                         "unstructured"),
    ("method: reml", "method: remI", "analysis.repeated.method: 'remI' is not one of reml, ml"),
    ("reference: control", "reference: placebo", "analysis.repeated.reference 'placebo' is not a level of arm"),
    ("reference: control", "reference: control\n    strategies: [mixed_model, jump_to_refrence]",
     "'jump_to_refrence' is not one of"),
    ("delta: 2.0", "delta: [1, 2]", "analysis.repeated.delta has 2 values; give one number or one per analysed "
                                    "visit (5"),
    ("delta: 2.0", "strategies: [delta_adjusted]", "the delta_adjusted strategy needs delta"),
    ("covariance: unstructured", "subject: patient", "analysis.repeated.subject 'patient' differs from "
                                                     "design.subject 'subject'"),
    ("strategy: hypothetical", "strategy: hypothetic", "estimand.intercurrent_events.1.strategy: 'hypothetic' is "
                                                       "not one of hypothetical, treatment_policy"),
    ("family: gaussian", "family: binomial", "analysis.family is 'binomial'; the follow-up analyses"),
    ("  exposure: arm\n", "", "analysis.exposure is required for the follow-up analyses"),
    ("subject: subject", "subject: USUBJID", "design.subject 'USUBJID' is not a column"),
    ("visit: week", "visit: AVISITN", "design.visit: 'AVISITN' is not a column"),
    ("formula: \"chg ~ arm * C(week) + base * C(week)\"", "formula: \"chg ~ arm * C(week) + __import__('os')\"",
     "analysis.formula"),
])
def test_params_problems_are_one_line_naming_the_key(study, capsys, old, new, expected):
    edit_params(study, old, new)
    _, line = one_line(capsys, ["check", study / "params.yaml"])
    assert expected in line and "params.yaml" in line


def test_repeated_without_design_is_refused():
    with pytest.raises(InputError, match="analysis.repeated needs a design section"):
        Params.from_dict({"data": {"path": "x.csv"}, "analysis": {"repeated": {"covariance": "unstructured"}}})


def test_long_layout_data_id_must_be_the_subject():
    body = {"data": {"path": "x.csv", "id": "row"}, "design": {"subject": "subject", "visits": [1, 2]}}
    with pytest.raises(InputError, match="data.id 'row' and design.subject 'subject' differ"):
        Params.from_dict(body)
    body["data"]["id"] = "subject"
    assert Params.from_dict(body).subject_column == "subject"


def test_imputation_strategies_need_two_imputations(study, capsys):
    path = edit_params(study, "  m: 20", "  m: 1")
    _, line = one_line(capsys, ["check", path])
    assert "imputation.m is 1; the follow-up imputation strategies pool at least two" in line
    # without the follow-up stage (or with only strategies that impute nothing) one imputation is no problem
    assert main(["check", str(path), "--only", "audit"]) == 0


def _baseline_params(path: Path, formula: str, **design) -> Params:
    body = {"data": {"path": str(path)},
            "design": {"layout": "long", "subject": "subject", "visit": "week", "visits": [0, 4, 8], "baseline": 0,
                       **design},
            "variables": {"arm": {"type": "binary", "levels": ["ctl", "trt"]}},
            "missing": {"markers": [""]}, "analysis": {"formula": formula, "exposure": "arm"}}
    return Params.from_dict(body)


def test_a_change_from_baseline_is_not_applicable_at_the_baseline_visit(tmp_path):
    # Hand-written long file: 3 subjects x weeks 0, 4, 8; chg is blank at every baseline row (as ADaM's CHG is
    # by construction) and at one later visit (subject B, week 8: a real gap). aval is blank at one baseline.
    from gapbook.intake import load_study
    rows = ["A,ctl,0,10,,", "A,ctl,4,9,-1,", "A,ctl,8,8,-2,", "B,trt,0,,,", "B,trt,4,7,-3,", "B,trt,8,,,",
            "C,trt,0,12,0,", "C,trt,4,10,-2,", "C,trt,8,9,-3,"]
    path = tmp_path / "long.csv"
    path.write_text("subject,arm,week,aval,chg,note\n" + "\n".join(rows) + "\n")
    study = load_study(_baseline_params(path, "chg ~ arm * C(week)"))
    # chg: baseline cells blank or 0 -> the 2 blank ones are not applicable; only B's week 8 is missing.
    assert int(study.not_applicable["chg"].sum()) == 2 and int(study.missing["chg"].sum()) == 1
    assert any("chg: blank or 0 in every row of the baseline visit" in n for n in study.notes)
    # aval as the outcome has a real baseline value elsewhere, so its baseline gap (B) stays missing.
    study = load_study(_baseline_params(path, "aval ~ arm * C(week)"))
    assert int(study.missing["aval"].sum()) == 2 and int(study.not_applicable["aval"].sum()) == 0
    # A condition the user wrote decides instead (here: applies everywhere, so the baseline blanks are missing).
    params = _baseline_params(path, "chg ~ arm * C(week)").to_dict()
    params["variables"]["chg"] = {"applies_if": "week >= 0"}
    study = load_study(Params.from_dict(params))
    assert int(study.missing["chg"].sum()) == 3


def test_wide_layout_baseline_change_column_is_not_applicable(tmp_path):
    from gapbook.intake import load_study
    path = tmp_path / "wide.csv"
    path.write_text("subject,arm,chg0,chg4,chg8\nA,ctl,,-1,-2\nB,trt,,-3,\nC,trt,0,-2,-3\n")
    params = Params.from_dict({
        "data": {"path": str(path), "id": "subject"}, "missing": {"markers": [""]},
        "design": {"layout": "wide", "subject": "subject", "visit": "week", "visits": [0, 4, 8], "baseline": 0,
                   "outcome_columns": ["chg0", "chg4", "chg8"]},
        "variables": {"arm": {"type": "binary", "levels": ["ctl", "trt"]}},
        "analysis": {"formula": "chg ~ arm * C(week)", "exposure": "arm"}})
    study = load_study(params)
    assert int(study.not_applicable["chg0"].sum()) == 2 and int(study.missing["chg0"].sum()) == 0
    assert int(study.missing["chg8"].sum()) == 1
