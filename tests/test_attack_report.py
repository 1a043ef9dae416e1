"""The landing page and the drafted results when one strategy's fit did not converge.

Found on the NCCTG lung data (lifelines): the missing-category Cox fit, with an indicator for a covariate
missing in one participant who died, left its estimate empty. That fit has a finite maximum, which
statsmodels' Newton steps from zero overshot (now reached: tests/test_survival.py); a fit that really has
none (monotone likelihood, Bryson & Johnson 1981) still leaves a row like the one below. The page then
showed the interval as ' to ' and the draft text said 'hazard ratio n/a (95% CI n/a to n/a; p not
available)'. A fit that did not converge but left numbers is shown with them, flagged, and never leads.
"""
from __future__ import annotations

import math

import pandas as pd

from gapbook.pages import effect_table
from gapbook.report import effect_phrase

NAN = math.nan
ROWS = pd.DataFrame([
    # strategy, term, estimate, ci_lower, ci_upper, p, n, exp..., converged
    ("complete_case", "sex", -0.557, -0.946, -0.168, 0.005, 170, 0.573, 0.388, 0.846, True),
    ("missing_category", "sex", NAN, NAN, NAN, NAN, 228, NAN, NAN, NAN, False),
    ("multiple_imputation", "sex", -0.601, -0.941, -0.262, 0.0006, 228, 0.548, 0.390, 0.770, True),
], columns=["strategy", "term", "estimate", "ci_lower", "ci_upper", "p_value", "n_used", "exp_estimate",
            "exp_ci_lower", "exp_ci_upper", "converged"])


def test_the_landing_table_says_not_estimated_instead_of_an_empty_interval():
    table = effect_table(ROWS, family="cox", exposure="sex", alpha=0.05)
    failed = table.frame[table.frame["strategy"].str.startswith("Missing")].iloc[0]
    assert failed["hazard ratio"] == "not estimated" and failed["95% CI"] == "did not converge"
    assert "0.548 (95% confidence interval 0.390 to 0.770" in table.lead  # the lead is still imputation's


def test_the_lead_skips_a_strategy_without_an_estimate():
    # the strategy the lead names first (multiple imputation) failed: the lead falls back to complete cases
    failed_imputation = ROWS.iloc[[1, 0]].assign(strategy=["multiple_imputation", "complete_case"])
    table = effect_table(failed_imputation, family="cox", exposure="sex", alpha=0.05)
    assert "0.573 (95% confidence interval 0.388 to 0.846" in table.lead and "not estimated" not in table.lead


def test_the_drafted_results_say_the_fit_did_not_converge():
    failed = ROWS.iloc[1].to_dict()
    assert effect_phrase(failed, 0.05, "cox") == "not estimated (the model fit did not converge)"
    read_back = {**failed, "converged": "False"}  # as read from estimates.csv
    assert effect_phrase(read_back, 0.05, "cox") == "not estimated (the model fit did not converge)"
    assert effect_phrase(ROWS.iloc[2].to_dict(), 0.05, "cox") == \
        "hazard ratio 0.548 (95% CI 0.390 to 0.770; p < 0.001)"


def test_numeric_levels_read_as_written_in_the_flow_and_the_descriptives(tmp_path):
    # NCCTG lung (lifelines) codes sex 1/2; the flow's columns and the descriptives read '1.0' and '2.0'.
    from lifelines.datasets import load_lung

    import gapbook
    from gapbook.cases import descriptive_table
    from gapbook.report import participant_flow

    data = load_lung()
    data.insert(0, "pid", range(1, len(data) + 1))
    data.to_csv(tmp_path / "lung.csv", index=False, na_rep="NA")
    study = gapbook.read_study(tmp_path / "lung.csv", id="pid", missing={"markers": ["NA"]},
                               variables={"sex": {"type": "binary", "levels": [1, 2]},
                                          "ph.ecog": {"type": "ordinal"}})
    flow = participant_flow(study, formula="time ~ sex + age", group="sex").steps
    assert [c for c in flow.columns if c not in ("step", "description")] == ["all", "1", "2"]
    # lung: 138 men (sex 1) and 90 women (sex 2), counted from the file itself
    assert flow.iloc[0][["all", "1", "2"]].tolist() == [228, (data["sex"] == 1).sum(), (data["sex"] == 2).sum()]
    table = descriptive_table(study.data, complete=study.data.notna().all(axis=1), types=study.types,
                              variables=["sex", "ph.ecog"])
    statistics = set(table["statistic"])
    assert {"count: 1", "count: 2", "proportion: 1", "count: 0", "count: 3"} <= statistics
    assert not any(s.endswith(".0") for s in statistics)


def test_numbers_from_a_fit_that_did_not_converge_are_flagged_and_never_lead():
    # a missing-category fit with an indicator whose rows have no event (monotone likelihood) leaves numbers
    unconverged = ROWS.copy()
    unconverged.loc[1, ["estimate", "ci_lower", "ci_upper", "p_value"]] = [-0.55, -0.94, -0.16, 0.006]
    unconverged.loc[1, ["exp_estimate", "exp_ci_lower", "exp_ci_upper"]] = [0.577, 0.391, 0.852]
    first = unconverged.iloc[[1, 0]].assign(strategy=["multiple_imputation", "complete_case"])
    table = effect_table(first, family="cox", exposure="sex", alpha=0.05)
    flagged = table.frame[table.frame["strategy"].str.startswith("Multiple")].iloc[0]
    assert flagged["hazard ratio"] == "0.577" and "did not converge: not reliable" in flagged["95% CI"]
    assert "0.573 (95% confidence interval 0.388 to 0.846" in table.lead
    phrase = effect_phrase({**unconverged.iloc[1].to_dict(), "converged": "False"}, 0.05, "cox")
    assert phrase.startswith("hazard ratio 0.577") and "did not converge, so these numbers are not reliable" in phrase
