"""Time-to-event outcomes in the audit and mechanism stages (issue 14), on the NCCTG lung cancer
data shipped by lifelines (lifelines.datasets.load_lung; Loprinzi et al. 1994, J Clin Oncol 12:601).

lifelines is used as a dataset source and as the Kaplan-Meier and log-rank reference only;
statsmodels is the reference for the Cox model.
"""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from lifelines import KaplanMeierFitter
from lifelines.datasets import load_lung
from lifelines.statistics import logrank_test
from statsmodels.duration.survfunc import SurvfuncRight

from gapbook.plots.survival import plot_survival_by_group
from gapbook.survival import EventCoding
from gapbook.time_to_event import audit_time_to_event, missingness_against_outcome

# lifelines 0.30 calls pandas in a way pandas 4 will refuse; the warning is about lifelines, not these checks
pytestmark = pytest.mark.filterwarnings("ignore:Starting with pandas version 4.0")


@pytest.fixture(scope="module")
def lung() -> pd.DataFrame:
    data = load_lung()
    data["sex"] = data["sex"].map({1: "male", 2: "female"})
    return data


def test_audit_counts_events_censoring_and_follow_up_against_references(lung):
    audit = audit_time_to_event(lung, time="time", event=EventCoding("status"), group="sex")
    summary = audit.summary.set_index("group")
    assert summary.loc["all", "n"] == 228 and summary.loc["all", "n_events"] == 165  # pandas counts of the file
    assert summary.loc["all", "n_censored"] == 63
    for group, rows in (("all", lung), ("male", lung[lung["sex"] == "male"]), ("female", lung[lung["sex"] == "female"])):
        # Reference: lifelines' Kaplan-Meier median (survival), and the same fitter on 1 - status for the
        # reverse Kaplan-Meier median follow-up (Schemper & Smith 1996)
        km = KaplanMeierFitter().fit(rows["time"], rows["status"])
        assert summary.loc[group, "median_survival"] == pytest.approx(km.median_survival_time_)
        reverse = KaplanMeierFitter().fit(rows["time"], 1 - rows["status"])
        assert summary.loc[group, "median_follow_up"] == pytest.approx(reverse.median_survival_time_)
        # Reference: statsmodels' SurvfuncRight gives the same curve at every time
        sf = SurvfuncRight(rows["time"].to_numpy(float), rows["status"].to_numpy(float))
        ours = audit.curves[audit.curves["group"] == group].set_index("time")["survival"]
        np.testing.assert_allclose(ours.loc[sf.surv_times], sf.surv_prob, atol=1e-12)
    plot_survival_by_group(audit)


def test_missing_times_and_statuses_are_counted_with_reasons_not_as_censored(lung):
    data = lung.copy()
    data.loc[[0, 1], "time"] = np.nan
    data.loc[[2], "status"] = np.nan
    reasons = pd.DataFrame({"time": [np.nan] * len(data), "status": [np.nan] * len(data)}, dtype=object)
    reasons.loc[[0, 1], "time"] = "lost to follow-up"
    reasons.loc[[2], "status"] = "vital status unknown"
    audit = audit_time_to_event(data, time="time", event=EventCoding("status"), reasons=reasons)
    row = audit.summary.set_index("group").loc["all"]
    known = data.dropna(subset=["time", "status"])
    assert row["n_time_missing"] == 2 and row["n_event_missing"] == 1
    assert row["n_events"] + row["n_censored"] == len(known) == 225
    assert row["n_censored"] == (known["status"] == 0).sum()
    assert audit.reasons.to_dict("records") == [
        {"variable": "time", "role": "follow-up time", "reason": "lost to follow-up", "n": 2},
        {"variable": "status", "role": "event status", "reason": "vital status unknown", "n": 1}]


def test_missingness_against_survival_by_log_rank(lung):
    result = missingness_against_outcome(lung, time="time", event=EventCoding("status"),
                                         variables=["age", "ph.karno", "meal.cal", "wt.loss"])
    table = result.comparisons.set_index("variable")
    assert "age" not in table.index  # complete: nothing to compare
    for name in ("meal.cal", "wt.loss"):
        lack = lung[name].isna()
        # Reference: lifelines' log-rank test of the rows lacking the value against the rows having it
        reference = logrank_test(lung.loc[lack, "time"], lung.loc[~lack, "time"], lung.loc[lack, "status"],
                                 lung.loc[~lack, "status"])
        assert table.loc[name, "log_rank_chi2"] == pytest.approx(reference.test_statistic, rel=1e-8)
        assert table.loc[name, "p_value"] == pytest.approx(reference.p_value, rel=1e-8)
        assert table.loc[name, "n_without"] == lack.sum() and table.loc[name, "events_without"] == \
            lung.loc[lack, "status"].sum()
