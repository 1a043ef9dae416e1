"""Repeated-measures data shape: long layout to participants x visits, checks that name subject and visit."""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import statsmodels.formula.api as smf

from gapbook.errors import InputError
from gapbook.little import pattern_rows
from gapbook.followup.repeated import last_observed_index, repeated_outcome, wide_to_long

FORMULA = "y ~ arm * C(week) + base"


def small_trial() -> pd.DataFrame:
    """Three subjects, weeks 1-3; subject B has no row for week 2, subject C a missing week-3 outcome."""
    rows = [("A", "ctl", 10.0, 1, 1.0), ("A", "ctl", 10.0, 2, 2.0), ("A", "ctl", 10.0, 3, 3.0),
            ("B", "trt", 12.0, 1, 1.5), ("B", "trt", 12.0, 3, 4.0),
            ("C", "trt", 11.0, 1, 0.5), ("C", "trt", 11.0, 2, 2.5), ("C", "trt", 11.0, 3, np.nan),
            ("D", "ctl", 9.0, 1, 0.0), ("D", "ctl", 9.0, 2, 1.0), ("D", "ctl", 9.0, 3, 2.5)]
    frame = pd.DataFrame(rows, columns=["id", "arm", "base", "week", "y"])
    frame["arm"] = pd.Categorical(frame["arm"], categories=["ctl", "trt"])
    return frame


def build(frame: pd.DataFrame, **kwargs):
    options = dict(formula=FORMULA, subject="id", visit="week", visits=[1, 2, 3], exposure="arm")
    options.update(kwargs)
    return repeated_outcome(frame, **options)


def test_outcome_matrix_and_design_rows_at_missed_visits():
    outcome = build(small_trial())
    assert list(outcome.subjects) == ["A", "B", "C", "D"]
    expected = np.array([[1.0, 2.0, 3.0], [1.5, np.nan, 4.0], [0.5, 2.5, np.nan], [0.0, 1.0, 2.5]])
    np.testing.assert_array_equal(outcome.values, expected)
    # The design at every visit, also the missed ones, equals patsy's (via statsmodels) rows for that visit.
    grid = pd.DataFrame({"id": np.repeat(["A", "B", "C", "D"], 3), "week": np.tile([1, 2, 3], 4),
                         "arm": pd.Categorical(np.repeat(["ctl", "trt", "trt", "ctl"], 3), categories=["ctl", "trt"]),
                         "base": np.repeat([10.0, 12.0, 11.0, 9.0], 3), "y": 0.0})
    reference = smf.ols(FORMULA, grid).exog   # Source: statsmodels' formula design on the full grid
    np.testing.assert_array_equal(outcome.design.reshape(12, -1), reference)
    assert outcome.terms == tuple(smf.ols(FORMULA, grid).exog_names)
    np.testing.assert_array_equal(outcome.last_observed, [2, 2, 1, 2])


def test_exposure_contrast_at_each_visit_is_main_effect_plus_interaction():
    outcome = build(small_trial())
    contrasts = outcome.exposure_contrasts()
    assert list(contrasts) == ["arm[T.trt]"]
    terms = list(outcome.terms)
    matrix = contrasts["arm[T.trt]"]
    # Treatment coding: the arm effect at week w is arm[T.trt] + arm[T.trt]:C(week)[T.w] (week 1 the reference).
    for k, week in enumerate([1, 2, 3]):
        expected = np.zeros(len(terms))
        expected[terms.index("arm[T.trt]")] = 1.0
        if week > 1:
            expected[terms.index(f"arm[T.trt]:C(week)[T.{week}]")] = 1.0
        np.testing.assert_allclose(matrix[k], expected, atol=1e-12)


def test_two_rows_for_one_visit_names_subject_and_visit():
    frame = pd.concat([small_trial(), small_trial().iloc[[4]]], ignore_index=True)
    with pytest.raises(InputError, match=r"subject B has 2 rows for visit 3"):
        build(frame)


def test_visit_not_in_plan_names_subject_and_visit():
    frame = small_trial()
    frame.loc[5, "week"] = 7
    with pytest.raises(InputError, match=r"^visits: subject C has visit 7, which is not a planned visit \(1, 2, 3\); add it to the planned visits"):
        build(frame)


def test_arm_changing_within_subject_names_subject_and_visit():
    frame = small_trial()
    frame.loc[2, "arm"] = "trt"
    with pytest.raises(InputError, match=r"^exposure: the arm 'arm' changes within subject A \(from \w+ to trt at visit 3\)"):
        build(frame)


def test_covariate_missing_leaves_the_subject_out_and_says_why():
    frame = small_trial()
    frame.loc[frame["id"] == "D", "base"] = np.nan
    outcome = build(frame)
    assert list(outcome.subjects) == ["A", "B", "C"]
    assert outcome.excluded.to_dict("records") == [{"id": "D", "reason": "base missing"}]


def test_text_visits_keep_plan_order_and_wide_to_long_round_trip():
    wide = pd.DataFrame({"id": ["A", "B"], "arm": pd.Categorical(["ctl", "trt"]), "base": [1.0, 2.0],
                         "w10": [3.0, np.nan], "w2": [1.0, 2.0]})
    long = wide_to_long(wide, subject="id", outcome_columns=["w2", "w10"], visits=["week 2", "week 10"],
                        outcome="y", visit="week", keep=["arm", "base"])
    outcome = repeated_outcome(long, formula="y ~ arm + C(week)", subject="id", visit="week",
                               visits=["week 2", "week 10"], exposure="arm")
    np.testing.assert_array_equal(outcome.values, [[1.0, 3.0], [2.0, np.nan]])
    # Plan order, not alphabetical: "week 2" is the reference level, so the term names "week 10".
    assert "C(week)[T.week 10]" in outcome.terms


def test_pattern_groups_and_last_observed_by_definition():
    rng = np.random.default_rng(3)
    observed = rng.random((200, 5)) < 0.7
    masks, rows = pattern_rows(observed)
    # Every row is in exactly one group and equals its group's mask (definition of a pattern).
    assert sorted(np.concatenate(rows).tolist()) == list(range(200))
    for mask, members in zip(masks, rows):
        assert (observed[members] == mask).all()
    for i in range(200):
        seen = np.flatnonzero(observed[i])
        assert last_observed_index(observed)[i] == (seen[-1] if len(seen) else -1)
