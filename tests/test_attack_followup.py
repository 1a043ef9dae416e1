"""Follow-up studies that `check` passed and `run` then failed (exit 1 after minutes) or analysed in a
wrong order. The contract (README, "Follow-up studies"; mission: "`check` catches everything `run`
would refuse up front"): exit 2 at check, one line naming the key and what to do.
"""
from __future__ import annotations

from dataclasses import replace

import numpy as np
import pandas as pd
import pytest

from gapbook.cli import main
from gapbook.errors import InputError
from gapbook.params import load_params


@pytest.fixture
def study(followup_study):
    """The follow-up demo study copied for this test (conftest's ``followup_study``)."""
    return followup_study


def rewrite(study, change):
    path = study / "followup_trial.csv"
    data = pd.read_csv(path, dtype=str, keep_default_na=False)
    changed = change(data)  # edits in place, or returns the new frame
    (data if changed is None else changed).to_csv(path, index=False)


def edit_params(study, old, new):
    path = study / "params.yaml"
    text = path.read_text()
    assert old in text, old
    path.write_text(text.replace(old, new))
    return path


def refused(study, capsys):
    assert main(["check", str(study / "params.yaml")]) == 2
    err = capsys.readouterr().err
    lines = [line for line in err.splitlines() if line.strip()]
    assert len(lines) == 1 and "Traceback" not in err, err
    return lines[0]


def test_a_planned_visit_nobody_attended_is_refused_by_check(study, capsys):
    edit_params(study, "visits: [2, 4, 8, 12, 16]", "visits: [2, 4, 8, 12, 16, 20]")
    line = refused(study, capsys)
    assert "params.yaml: design.visits: no participant has the outcome at visit 20; drop it from the planned visits" in line


def test_a_visit_whose_outcomes_are_all_missing_is_refused_by_check(study, capsys):
    rewrite(study, lambda d: d.__setitem__("chg", d["chg"].where(d["week"] != "16", "NA")))
    line = refused(study, capsys)
    assert "no participant has the outcome at visit 16" in line


def test_a_file_with_one_arm_is_refused_by_check(study, capsys):
    rewrite(study, lambda d: d[d["arm"] != "active"])
    line = refused(study, capsys)
    assert "analysis.exposure: every participant is in arm control of 'arm'" in line


def test_an_arm_never_seen_at_a_visit_is_refused_by_check(study, capsys):
    def no_active_after_week_2(d):
        d.loc[(d["arm"] == "active") & (d["week"] != "2"), "chg"] = "NA"
    rewrite(study, no_active_after_week_2)
    line = refused(study, capsys)
    assert "design.visits: no participant of arm active has the outcome at visit 4" in line


def test_a_term_the_observed_visits_cannot_estimate_is_named(study):
    # A design column constant on the observed rows: the mixed model's normal equations are singular
    # (its AnalysisError said only "a term ... has no observed outcome"); the check names the term.
    from gapbook.intake import load_study
    from gapbook.stage import repeated_design, repeated_model_data

    params = load_params(study / "params.yaml")
    outcome = repeated_model_data(params, repeated_design(params, load_study(params)))
    assert outcome.unestimable() is None  # the demo as shipped is estimable
    broken = outcome.design.copy()
    broken[:, :, -1] = broken[:, :, 0] * 2.0  # last term = twice the intercept: not estimable
    problem = replace(outcome, design=broken).unestimable()
    assert problem.option == "formula" and problem.message.startswith(f"the term {outcome.terms[-1]} cannot be estimated")
    assert np.linalg.matrix_rank(broken[outcome.observed]) < len(outcome.terms)  # numpy agrees it is singular


def test_numbered_visits_out_of_time_order_are_refused(study):
    path = edit_params(study, "visits: [2, 4, 8, 12, 16]", "visits: [16, 2, 4, 8, 12]")
    with pytest.raises(InputError, match=r"design: visits 16, 2, 4, 8, 12 are not in increasing order"):
        load_params(path)


def test_text_visits_keep_the_order_written(study):
    # Text labels have no numeric order: the plan's order is the time order, as documented.
    path = edit_params(study, "visits: [2, 4, 8, 12, 16]", "visits: [w2, w4, w8, w12, w16]")
    assert [str(v) for v in load_params(path).design.visits] == ["w2", "w4", "w8", "w12", "w16"]


def test_one_outcome_column_for_two_visits_is_refused(tmp_path):
    path = tmp_path / "params.yaml"
    path.write_text("data: {path: x.csv, id: subject}\n"
                    "design: {layout: wide, subject: subject, visit: week, visits: [2, 4, 8],\n"
                    "         outcome_columns: [chg2, chg4, chg4]}\n")
    with pytest.raises(InputError, match=r"outcome_columns names 'chg4' for visits 4 and 8; each visit needs its "
                                         r"own outcome column"):
        load_params(path)
