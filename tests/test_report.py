"""Tests of the summary page: flow, missing data per variable, checklist, drafted text, small counts."""
from __future__ import annotations

import re

import pandas as pd
import pytest
import statsmodels.formula.api as smf

from gapbook import report
from gapbook.vocabulary import CAUTIONS, MAR_CAUTION
from gapbook.audit import audit_study
from gapbook.cases import complete_case_analysis
from gapbook.demo import demo_csv_path, demo_params
from gapbook.indicator import missing_category_analysis
from gapbook.intake import load_study
from gapbook.stage import analysis_model


@pytest.fixture(scope="module")
def demo():
    params = demo_params()
    study = load_study(params)
    model = analysis_model(params)
    audit = audit_study(study, threshold=params.audit.threshold, by=params.audit.by)
    cc = complete_case_analysis(study.data, model=model, reasons=study.reasons, not_applicable=study.not_applicable)
    mc = missing_category_analysis(study.data, model=model, types=study.types, missing=study.missing,
                                   reasons=study.reasons, not_applicable=study.not_applicable,
                                   indicator_for_continuous=True)
    estimates = pd.concat([cc.estimates(), mc.estimates()], ignore_index=True)
    tables = {name: None for name in report.REPORT_TABLES}
    tables.update(audit_variables=audit.variables, audit_patterns=audit.patterns, estimates=estimates)
    return params, study, tables, summarise(params, study, tables)


def summarise(params, study, tables, min_cell=0):
    """``report.summarise`` with the demo's options, as the report stage passes them."""
    model = analysis_model(params) if params.analysis.formula else None
    return report.summarise(study, tables=tables, title="demo", model=model, threshold=params.audit.threshold,
                            min_cell=min_cell)


# Items on missing data the reporting guidelines ask for (von Elm et al. 2007, STROBE items 12c, 13b, 14b;
# Schulz et al. 2010, CONSORT 13a, 13b; Sterne et al. 2009, BMJ 338:b2393, box on reporting multiple
# imputation), written here from the guidelines, not from the checklist the code builds.
GUIDELINE_ITEMS = {
    "STROBE 12c": "how missing data were addressed",
    "STROBE 13a": "participants at each step",
    "STROBE 13b": "losses of the outcome",
    "STROBE 14b": "number missing for each variable",
    "CONSORT 13b": "reasons for missing values",
    "Sterne et al. 2009": "missingness patterns",
}


def test_checklist_covers_the_guidelines_missing_data_items(demo):
    params, study, tables, summary = demo
    items = summary.checklist.items
    for guideline, item in GUIDELINE_ITEMS.items():
        rows = items[items["item"].str.startswith(item)]
        assert len(rows) == 1, item
        assert guideline in rows["guideline"].iloc[0], (guideline, item)
        assert rows["value"].iloc[0].strip(), item          # every item is answered
    text = summary.markdown()
    # Stages that did not run are named, not crashed on, and the page carries the cautions.
    assert "mechanism stage not run" in text and "sensitivity stage not run" in text
    for caution in CAUTIONS:
        assert caution in text
    # ... and each caution DESIGN.md requires, in words written here rather than taken from the vocabulary:
    for words in ("cannot be verified", "analysis plan", "qualified statistician", "reporting guideline",
                  "data-protection"):
        assert words in text, words


def test_flow_numbers_match_the_file_and_statsmodels(demo):
    params, study, tables, summary = demo
    flow = summary.flow.steps.set_index("step")
    raw = pd.read_csv(demo_csv_path(), dtype=str, keep_default_na=False)  # pandas reading the shipped file
    assert flow.loc["in_file", "all"] == len(raw)
    # Reference library: statsmodels drops every row with a missing model variable.
    fitted = smf.ols(params.analysis.formula, data=study.data).fit()
    assert flow.loc["complete_for_model", "all"] == fitted.nobs
    assert flow.loc["analysed: complete_case", "all"] == fitted.nobs
    # By arm: the groups add up to the total, and match a pandas cross-tabulation of the raw markers.
    assert flow.loc["in_file", ["control", "sms"]].sum() == len(raw)
    lost = raw["hba1c_12m"].str.strip().isin(["-9", "na", "NA", ""])
    by_arm = pd.crosstab(raw["arm"], lost)[True]
    outcome_missing = flow.loc["in_file", ["control", "sms"]] - flow.loc["outcome_observed", ["control", "sms"]]
    assert outcome_missing.to_dict() == {"control": by_arm["control"], "sms": by_arm["sms"]}


def test_checklist_numbers_match_the_tables(demo):
    params, study, tables, summary = demo
    checklist = summary.checklist.items.set_index("item")
    per_variable = checklist.loc["number missing for each variable", "value"]
    audit = tables["audit_variables"].set_index("variable")
    for variable, row in audit[audit["n_missing"] > 0].iterrows():
        assert f"{variable} {int(row['n_missing'])} ({row['pct_missing']:.1f}%)" in per_variable
        assert int(row["n_missing"]) == int(study.missing[variable].sum())  # pandas count of the missing cells
    flow_value = checklist.loc["participants at each step and analysed under each strategy", "value"]
    for strategy, n_used in tables["estimates"].groupby("strategy")["n_used"].first().items():
        assert f"{strategy} {int(n_used):,}" in flow_value
    effects = checklist.loc["results of complete-case and imputed analyses side by side", "value"]
    arm = tables["estimates"][tables["estimates"]["term"] == "arm[T.sms]"]
    for estimate in arm["estimate"]:
        assert f"{estimate:.2f}" in effects
    patterns = checklist.loc["missingness patterns", "value"]
    assert patterns.startswith(f"{len(tables['audit_patterns'])} patterns")
    # The results paragraph carries the same complete-case count as the flow.
    assert f"{summary.flow.n_complete:,} (" in summary.results_text


def test_checklist_says_when_rarer_patterns_share_the_last_row(demo, tmp_path):
    params, study, tables, _ = demo
    capped = audit_study(study, max_patterns=5)
    # As the report stage reads it back from the record: the remainder row's blanks are NaN.
    path = tmp_path / "audit_patterns.csv"
    capped.patterns.to_csv(path, index=False)
    summary = summarise(params, study, dict(tables, audit_patterns=pd.read_csv(path)))
    value = summary.checklist.items.set_index("item").loc["missingness patterns", "value"]
    assert value == "the 5 most common patterns listed; the rarer ones share the last row"


def test_small_counts_are_masked_and_zero_and_large_counts_kept():
    # Threshold rule of statistical disclosure control (common practice, no source): 1..min_cell-1 hidden.
    frame = pd.DataFrame({"variable": list("abcd"), "n": [100, 100, 100, 100], "n_missing": [0, 1, 4, 5],
                          "pct_missing": [0.0, 1.0, 4.0, 5.0]})
    masked = report.suppress_small_counts(frame, min_cell=5, columns=["n", "n_missing"],
                                          linked={"n_missing": "pct_missing"})
    assert masked.n_masked == 2
    assert list(masked.masked["n_missing"]) == [0, "<5", "<5", 5]
    assert list(masked.masked["pct_missing"]) == [0.0, "suppressed", "suppressed", 5.0]
    assert list(masked.masked["n"]) == [100] * 4
    assert report.suppress_small_counts(frame, min_cell=1).n_masked == 0


def raw_missing_count(column: str) -> int:
    """Cells of the shipped demo file holding a missing marker or reason code, counted by pandas on the text."""
    raw = pd.read_csv(demo_csv_path(), dtype=str, keep_default_na=False)
    codes = {"", "na", "?", "unknown", "-7", "-8", "-9"}   # the demo params' missing.markers and reason codes
    return int(raw[column].str.strip().str.casefold().isin(codes).sum())    # markers match whatever the case


def test_record_tables_and_text_are_suppressed_when_asked(demo):
    params, study, tables, _ = demo
    ages, outcomes = raw_missing_count("age"), raw_missing_count("hba1c_12m")
    assert 0 < ages < 5 <= outcomes                      # the demo has a small count to hide and a large one
    suppressed = report.suppress_record_tables({"audit_variables": tables["audit_variables"]}, min_cell=5)
    table = suppressed.suppressed["audit_variables"].masked.set_index("variable")
    assert table.loc["age", "n_missing"] == "<5"
    assert table.loc["hba1c_12m", "n_missing"] == outcomes
    summary = summarise(params, study, tables, min_cell=5)
    value = summary.checklist.items.set_index("item").loc["number missing for each variable", "value"]
    assert "age <5" in value and f"age {ages}" not in value
    assert not re.search(rf"\bage {ages}\b", summary.results_text)


def test_summary_without_an_analysis_model_reports_the_missing_data(tmp_path, penguins):
    from gapbook.params import Params

    # palmerpenguins ships 344 penguins; sex is missing for 11 and the four body measures for 2
    # (Horst, Hill & Gorman 2020, the package's documented counts)
    path = tmp_path / "penguins.csv"
    penguins.to_csv(path, index=False)
    params = Params.from_dict({"data": {"path": str(path)}})
    study = load_study(params)
    tables = {name: None for name in report.REPORT_TABLES}
    tables["audit_variables"] = audit_study(study, threshold=params.audit.threshold).variables
    summary = summarise(params, study, tables)
    flow = summary.flow.steps.set_index("step")["all"]
    assert list(flow.index) == ["in_file", "complete_all_variables"]
    assert flow["in_file"] == len(penguins) == 344
    assert flow["complete_all_variables"] == len(penguins.dropna()) == 333  # pandas' own count of complete rows
    missing = summary.missing.variables.set_index("variable")["n_missing"]
    assert missing["sex"] == penguins["sex"].isna().sum() == 11
    assert missing["bill_length_mm"] == penguins["bill_length_mm"].isna().sum() == 2
    items = " ".join(summary.checklist.item_names())
    assert "number missing for each variable" in items and "reasons for missing values" in items
    assert "imputation" not in items and "sensitivity" not in items  # items about a model do not apply
    assert "analysis model" not in summary.methods_text and "analysis model" not in summary.results_text
    assert "333" in summary.results_text and "344" in summary.results_text
    assert summary.not_run == ("mechanism",)  # model stages are not reported as missing from the record
    assert MAR_CAUTION in summary.markdown()


def test_the_drafted_methods_keep_column_names_as_written():
    # CDISC ADaM names are upper case (ADAS_WK24); str.capitalize() turned them into 'adas_wk24' in the draft
    from types import SimpleNamespace

    from gapbook.impute import ImputationSettings
    from gapbook.models import AnalysisModel
    from gapbook.report import draft_methods

    tables = {"estimates": pd.DataFrame({"strategy": ["multiple_imputation"]}),
              "imputation_summary": pd.DataFrame({"variable": ["ADAS_WK24"], "method": ["pmm"]})}
    text = draft_methods(SimpleNamespace(), SimpleNamespace(variables=pd.DataFrame({"reasons": [""]})), tables,
                         model=AnalysisModel("ADAS_WK24 ~ TRT01P"),
                         imputation=ImputationSettings(m=5, iterations=10, seed=1))
    assert "Methods: ADAS_WK24 pmm." in text
