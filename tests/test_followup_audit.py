"""The follow-up audit on a small trial worked by hand: counts, patterns, Kaplan-Meier, log-rank, reasons."""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from gapbook.followup.audit import PATTERN_LABELS, audit_followup, classify_follow_up
from gapbook.followup.demo import simulate_followup_trial
from gapbook.followup.repeated import repeated_outcome

# 1 = attended. Control: A, B, C, G; active: D, E, F, H (weeks 1-4).
ATTENDED = {"A": [1, 1, 1, 1], "B": [1, 0, 0, 0], "C": [1, 0, 1, 1], "G": [1, 1, 1, 1],
            "D": [1, 1, 0, 0], "E": [0, 0, 0, 0], "F": [1, 0, 1, 0], "H": [1, 1, 1, 1]}
ARM = {"A": "ctl", "B": "ctl", "C": "ctl", "G": "ctl", "D": "trt", "E": "trt", "F": "trt", "H": "trt"}


@pytest.fixture(scope="module")
def worked():
    rows = []
    for k, (subject, attended) in enumerate(ATTENDED.items()):
        for week, seen in zip((1, 2, 3, 4), attended):
            rows.append({"id": subject, "arm": ARM[subject], "week": week,
                         "y": float(10 * k + week) if seen else np.nan})
    frame = pd.DataFrame(rows)
    frame["arm"] = pd.Categorical(frame["arm"], categories=["ctl", "trt"])
    outcome = repeated_outcome(frame, formula="y ~ arm * C(week)", subject="id", visit="week", visits=[1, 2, 3, 4],
                               exposure="arm")
    reasons = np.full((8, 4), None, dtype=object)
    subjects = list(ATTENDED)
    reasons[subjects.index("B"), 1:] = "adverse event"
    reasons[subjects.index("C"), 1] = "missed visit"
    reasons[subjects.index("D"), 2:] = "lack of efficacy"
    reasons[subjects.index("F"), 1] = "missed visit"
    reasons[subjects.index("F"), 3] = "lost to follow-up"
    return outcome, audit_followup(outcome, reasons=reasons)


def test_completeness_and_patterns_by_hand(worked):
    _, audit = worked
    table = audit.completeness.set_index(["group", "visit"])
    assert table.loc[("ctl", 2), "n_observed"] == 2 and table.loc[("ctl", 2), "pct_observed"] == 50.0
    assert table.loc[("trt", 1), "n_observed"] == 3 and table.loc[("trt", 4), "n_observed"] == 1
    patterns = audit.patterns.set_index(["group", "pattern"])["n"]
    assert patterns[("ctl", "complete")] == 2 and patterns[("ctl", "monotone dropout")] == 1
    assert patterns[("ctl", "intermittent")] == 1
    assert patterns[("trt", "intermittent and dropout")] == 1 and patterns[("trt", "no visit attended")] == 1
    assert patterns[("trt", "monotone dropout")] == 1 and patterns[("trt", "complete")] == 1


def test_classification_by_definition_on_random_patterns():
    rng = np.random.default_rng(1)
    observed = rng.random((300, 5)) < 0.6
    labels = classify_follow_up(observed)
    for row, label in zip(observed, labels):
        seen = np.flatnonzero(row)
        if len(seen) == 0:
            expected = "no visit attended"
        else:
            gap = len(seen) < seen[-1] + 1           # a miss before the last attended visit
            finished = seen[-1] == len(row) - 1
            expected = {(False, True): "complete", (False, False): "monotone dropout", (True, True): "intermittent",
                        (True, False): "intermittent and dropout"}[(gap, finished)]
        assert label == expected
    assert set(labels) <= set(PATTERN_LABELS)


def test_kaplan_meier_and_log_rank_by_hand(worked):
    _, audit = worked
    retained = audit.retention.set_index(["group", "visit"])["retained"]
    # Product-limit (Kaplan & Meier 1958) by hand; time = last attended week, leaving early = event,
    # E (no visit) leaves at time 0. Control: one event at week 1 among 4 -> 3/4 thereafter.
    assert retained[("ctl", 1)] == pytest.approx(0.75) and retained[("ctl", 4)] == pytest.approx(0.75)
    # Active: events at 0 (4 at risk), 2 (3 at risk), 3 (2 at risk): 3/4, 3/4 * 2/3, * 1/2.
    assert retained[("trt", 1)] == pytest.approx(0.75)
    assert retained[("trt", 2)] == pytest.approx(0.5)
    assert retained[("trt", 3)] == pytest.approx(0.25)
    # Log-rank (Mantel 1966) by hand: O - E and hypergeometric variance at times 0, 1, 2, 3.
    expected_events = 4 / 8 + 4 / 7 + 3 / 6 + 3 / 5
    variance = 0.25 + (4 / 7) * (3 / 7) + 0.25 + (3 / 5) * (2 / 5)
    statistic = (1 - expected_events) ** 2 / variance
    row = audit.retention_test.iloc[0]
    assert row["statistic"] == pytest.approx(statistic, rel=1e-10)
    assert row["p_value"] == pytest.approx(stats.chi2.sf(statistic, 1), rel=1e-10)


def test_stopping_reasons_come_from_the_first_missed_visit_after_leaving(worked):
    _, audit = worked
    reasons = {(r.group, r.reason): r.n for r in audit.stopping_reasons.itertuples()}
    assert reasons == {("ctl", "adverse event"): 1, ("trt", "lack of efficacy"): 1, ("trt", "reason not given"): 1,
                       ("trt", "lost to follow-up"): 1}


def test_profiles_and_leavers_by_hand(worked):
    outcome, audit = worked
    profiles = audit.profiles
    # Control participants last seen at week 4 (A, C, G: rows 0, 2, 3): week-2 outcome observed for A and G.
    row = profiles[(profiles.group == "ctl") & (profiles.last_visit == 4) & (profiles.visit == 2)].iloc[0]
    assert row["n"] == 2 and row["mean"] == pytest.approx((2 + 32) / 2)
    leavers = audit.leavers.set_index(["group", "visit"])
    # Control at week 1: B (y = 11) leaves after it; A, C, G (1, 21, 31) stay.
    row = leavers.loc[("ctl", 1)]
    assert row["n_leaving"] == 1 and row["n_staying"] == 3
    assert row["difference"] == pytest.approx(11 - np.mean([1, 21, 31]))


def test_simulated_trial_audit_sees_dropout_that_depends_on_the_outcome():
    # The demo scenario makes those with less improvement leave: the audit's leavers table
    # must show leavers' outcomes above stayers' at the visit before they leave.
    trial = simulate_followup_trial(n_per_arm=400, seed=3)
    outcome = repeated_outcome(trial.data, formula="chg ~ arm * C(week)", subject="subject", visit="week",
                               visits=trial.weeks, exposure="arm")
    audit = audit_followup(outcome, reasons=trial.reasons)
    pooled = audit.leavers.dropna()
    assert (pooled["difference"] > 0).mean() > 0.8
    assert audit.retention_test.iloc[0]["p_value"] < 0.05    # the scenario's arms lose participants at different rates
    assert set(audit.tables()) == {"followup_completeness", "followup_patterns", "followup_retention",
                                   "followup_retention_test", "followup_stopping_reasons", "followup_profiles",
                                   "followup_leavers"}
