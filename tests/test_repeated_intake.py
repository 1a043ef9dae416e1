"""Follow-up layouts after intake: long and wide give the same participants x visits; errors name subject and visit."""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from gapbook.errors import InputError
from gapbook.followup.intake import NO_RECORD, repeated_study

VISITS = [0, 4, 8]
FORMULA = "y ~ arm * C(week) + base"


def long_frame():
    """Subject B left after week 4 (week 8 'withdrew'); C has no row for week 4; baseline rows at week 0."""
    rows = [("A", 0, "ctl", 5.0, 0.0), ("A", 4, "ctl", 5.0, 1.0), ("A", 8, "ctl", 5.0, 2.0),
            ("B", 0, "trt", 6.0, 0.0), ("B", 4, "trt", 6.0, 1.5), ("B", 8, "trt", 6.0, np.nan),
            ("C", 0, "trt", 4.0, 0.0), ("C", 8, "trt", 4.0, 3.5),
            ("D", 0, "ctl", 5.5, 0.0), ("D", 4, "ctl", 5.5, 0.5), ("D", 8, "ctl", 5.5, 1.0)]
    data = pd.DataFrame(rows, columns=["id", "week", "arm", "base", "y"])
    data["week"] = data["week"].astype(str)          # as intake leaves a text visit column
    data["arm"] = pd.Categorical(data["arm"], categories=["ctl", "trt"])
    reasons = pd.DataFrame({"y": [np.nan] * 5 + ["withdrew"] + [np.nan] * 5, "base": np.nan, "arm": np.nan})
    return data, reasons


def test_long_layout_to_outcome_matrix_with_reasons():
    data, reasons = long_frame()
    study = repeated_study(data, reasons, layout="long", subject="id", visit="week", visits=VISITS, baseline=0)
    outcome = study.outcome(formula=FORMULA, exposure="arm")
    np.testing.assert_array_equal(outcome.values, [[1.0, 2.0], [1.5, np.nan], [np.nan, 3.5], [0.5, 1.0]])
    np.testing.assert_array_equal(outcome.baseline, [0.0, 0.0, 0.0, 0.0])
    why = study.visit_reasons(outcome)
    assert why[1, 1] == "withdrew" and why[2, 0] == NO_RECORD and why[0, 0] is None


def test_wide_layout_gives_the_same_outcome_as_long():
    data, reasons = long_frame()
    long = repeated_study(data, reasons, layout="long", subject="id", visit="week", visits=VISITS, baseline=0)
    wide = pd.DataFrame({"arm": pd.Categorical(["ctl", "trt", "trt", "ctl"], categories=["ctl", "trt"]),
                         "base": [5.0, 6.0, 4.0, 5.5], "y0": 0.0, "y4": [1.0, 1.5, np.nan, 0.5],
                         "y8": [2.0, np.nan, 3.5, 1.0]})
    wide_reasons = pd.DataFrame({c: [np.nan] * 4 for c in wide.columns}).astype(object)
    wide_reasons.loc[1, "y8"] = "withdrew"
    study = repeated_study(wide, wide_reasons, layout="wide", subject="id", visit="week", visits=VISITS, baseline=0,
                           ids=pd.Series(["A", "B", "C", "D"]), outcome_columns=["y0", "y4", "y8"], outcome="y")
    a = long.outcome(formula=FORMULA, exposure="arm")
    b = study.outcome(formula=FORMULA, exposure="arm")
    np.testing.assert_array_equal(a.values, b.values)
    np.testing.assert_array_equal(a.design, b.design)
    assert study.visit_reasons(b)[1, 1] == "withdrew"


def test_two_rows_for_one_visit_names_subject_and_visit():
    data, reasons = long_frame()
    data = pd.concat([data, data.iloc[[4]]], ignore_index=True)
    reasons = pd.concat([reasons, reasons.iloc[[4]]], ignore_index=True)
    with pytest.raises(InputError, match="subject B has 2 rows for visit 4") as error:
        repeated_study(data, reasons, layout="long", subject="id", visit="week", visits=VISITS)
    # a CDISC ADaM BDS file with several parameters (PARAMCD) arrives like this: the message names the row filter
    # option (data.keep_rows in a params file) and a condition to write
    assert "PARAMCD" in str(error.value) and "DTYPE" in str(error.value) and "keep_rows" in str(error.value)


def test_visit_not_in_plan_and_missing_visit_name_the_subject():
    data, reasons = long_frame()
    data.loc[7, "week"] = "12"
    with pytest.raises(InputError, match=r"subject C has visit 12 \(data row 8\), which is not a planned visit") as error:
        repeated_study(data, reasons, layout="long", subject="id", visit="week", visits=VISITS)
    # an unscheduled or early-termination row of an ADaM file: keep the analysis visits with the row filter
    assert "ANL01FL == 'Y'" in str(error.value) and "keep_rows" in str(error.value)
    data.loc[7, "week"] = np.nan
    with pytest.raises(InputError, match=r"subject C has no visit \(data row 8\)"):
        repeated_study(data, reasons, layout="long", subject="id", visit="week", visits=VISITS)


def test_arm_changing_within_subject_names_subject_and_visit():
    data, reasons = long_frame()
    data.loc[10, "arm"] = "trt"
    study = repeated_study(data, reasons, layout="long", subject="id", visit="week", visits=VISITS, baseline=0)
    with pytest.raises(InputError, match=r"the arm 'arm' changes within subject D \(from ctl to trt at visit 8\)"):
        study.outcome(formula=FORMULA, exposure="arm")


def test_wide_layout_needs_one_column_per_visit():
    wide = pd.DataFrame({"y4": [1.0], "y8": [2.0]})
    with pytest.raises(InputError, match="one outcome column per planned visit"):
        repeated_study(wide, wide.isna(), layout="wide", subject="id", visits=VISITS, ids=pd.Series(["A"]),
                       outcome_columns=["y4", "y8"], outcome="y")
