"""The follow-up stage wired into the kit: params -> ctx.followup() -> record tables, the estimand, the
report page, and `gapbook demo --study followup` end to end (verified)."""
from __future__ import annotations

import shutil
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from conftest import record_path, run_gapbook

from gapbook.followup.demo import EFFECT, followup_demo_files, followup_demo_params
from gapbook.followup.estimand import describe_estimand
from gapbook.pipeline import FOLLOWUP_STAGES, PARTICIPANT_ROW_STAGES, STAGES, resolve_stages
from gapbook.stage import open_stage
from gapbook.vocabulary import FOLLOWUP_STRATEGY_NAMES, NO_RECORD

VISIT_EFFECT_COLUMNS = ["strategy", "visit", "term", "estimate", "std_error", "ci_lower", "ci_upper", "p_value", "df",
                        "n_used"]


@pytest.fixture(scope="module")
def stage_run(tmp_path_factory):
    """The follow-up stage on the demo, called as its notebook calls it (m lowered to keep the test short)."""
    params = followup_demo_params().to_dict()
    params["imputation"]["m"] = 5
    out = tmp_path_factory.mktemp("followup-stage")
    ctx = open_stage(params, str(out))
    analysis = ctx.followup()
    ctx.save_result(analysis)
    return ctx, analysis


def test_the_stage_is_registered_between_the_case_strategies_and_imputation():
    order = list(STAGES)
    assert order.index("indicator") < order.index("followup") < order.index("impute")
    # the other stages keep their notebook names (records made before stay comparable)
    assert STAGES["impute"] == "05_impute.ipynb" and STAGES["followup"] == "04b_followup.ipynb"
    assert FOLLOWUP_STAGES == {"followup"}


def test_followup_studies_skip_the_participant_row_stages_and_others_skip_followup():
    lines = []
    stages = resolve_stages(None, followup_demo_params(), lines.append)
    assert stages == ["audit", "mechanism", "followup", "report"]
    assert not set(stages) & PARTICIPANT_ROW_STAGES and "analyse one row per participant" in lines[0]
    from gapbook.demo import demo_params

    lines = []
    assert "followup" not in resolve_stages(None, demo_params(), lines.append)
    assert "skipped: followup (they are for follow-up studies" in lines[0]


def test_visit_effects_and_the_headline_rows_in_estimates(stage_run):
    ctx, analysis = stage_run
    effects = pd.read_csv(ctx.tables_dir / "visit_effects.csv")
    assert list(effects.columns[:10]) == VISIT_EFFECT_COLUMNS
    # every strategy of the issue, plus delta_adjusted because the demo params give a delta
    assert list(dict.fromkeys(effects["strategy"])) == list(FOLLOWUP_STRATEGY_NAMES)
    assert sorted(effects["visit"].unique()) == [2, 4, 8, 12, 16]
    estimates = pd.read_csv(ctx.tables_dir / "estimates.csv")
    assert "visit" in estimates.columns and set(estimates["visit"]) == {16}
    assert list(estimates["strategy"]) == list(FOLLOWUP_STRATEGY_NAMES)
    # the headline rows are the visit_effects rows at the last planned visit, number for number
    last = effects[effects["visit"] == 16].reset_index(drop=True)
    np.testing.assert_allclose(estimates["estimate"], last["estimate"], rtol=1e-9)
    np.testing.assert_allclose(estimates["ci_upper"], last["ci_upper"], rtol=1e-9)
    # the mixed model recovers the demo's true week-16 effect (-4; gapbook.followup.demo docstring) within its interval
    mixed = estimates.set_index("strategy").loc["mixed_model"]
    assert mixed["ci_lower"] < EFFECT[-1] < mixed["ci_upper"]
    assert analysis.effect_grid().shape == (len(FOLLOWUP_STRATEGY_NAMES), 5)


def test_the_params_choose_strategies_method_reference_and_delta(tmp_path):
    params = followup_demo_params().to_dict()
    params["analysis"]["repeated"].update(strategies=["mixed_model", "completers"], method="ml")
    analysis = open_stage(params, str(tmp_path)).followup()
    assert analysis.strategies() == ("mixed_model", "completers")
    reml = open_stage(followup_demo_params().to_dict(), str(tmp_path)).repeated_outcome
    from gapbook.followup.mixed_model import fit_mixed_model

    # ML and REML give the same means with complete balance only; here the SEs differ: the method reached the model
    by_ml = fit_mixed_model(reml, method="ml").visit_effects()
    mixed = analysis.effects[analysis.effects["strategy"] == "mixed_model"].reset_index(drop=True)
    np.testing.assert_allclose(mixed["std_error"], by_ml["std_error"], rtol=1e-8)


def test_estimand_says_which_analysis_targets_which_strategy():
    # ICH E9(R1) (2019): hypothetical strategy <- analyses valid under missing at random; treatment policy
    # <- reference-based imputation when off-treatment outcomes were not collected (Carpenter, Roger &
    # Kenward 2013); composite/while-on-treatment/principal-stratum: none of the follow-up analyses.
    described = describe_estimand(population="adults", variable="change at week 16",
                                  intercurrent_events=[("stopped for lack of efficacy", "treatment_policy"),
                                                       ("stopped for an adverse event", "hypothetical"),
                                                       ("rescue medication", "composite")],
                                  primary="mixed_model", analyses=["mixed_model", "jump_to_reference",
                                                                   "completers"])
    assert described.targeted_by("treatment_policy") == ("jump_to_reference",)
    assert described.targeted_by("hypothetical") == ("mixed_model",)
    assert described.targeted_by("composite") == ()
    text = " ".join(described.sentences)
    assert "no analysis run here targets it" in text
    assert "Primary analysis: the mixed model for repeated measures, which targets the hypothetical strategy" in text
    assert "completers-only analysis targets no estimand cleanly" in text
    assert list(described.tables()["estimand"]["attribute"]) == ["population", "variable"] + \
        ["intercurrent event"] * 3


def test_report_of_a_followup_record_counts_participants_and_names_the_estimand(stage_run):
    ctx, _ = stage_run
    ctx.save_result(ctx.followup_audit())
    summary = ctx.report()
    flow = summary.flow.steps.set_index("step")
    assert flow.loc["participants", "all"] == 300 and flow.loc["participants", "control"] == 150
    # the shipped data file: participants attending week 16 = rows with an observed chg at week 16
    data = pd.read_csv(followup_demo_files()[0])
    at_16 = data[(data["week"] == 16) & pd.to_numeric(data["chg"], errors="coerce").notna()]
    assert flow.loc["attended: 16", "all"] == len(at_16)
    assert flow.loc["analysed: completers", "all"] == len(at_16)
    assert "The primary analysis was a mixed model for repeated measures" in summary.methods_text
    assert "ICH E9(R1)" in summary.methods_text and "targeted here by jump-to-reference" in summary.methods_text
    assert "Rubin's variance formula overstates" in summary.results_text
    assert "information anchoring" in summary.results_text
    assert "fully conditional specification" not in summary.methods_text


@pytest.mark.slow
def test_demo_followup_runs_end_to_end_and_verifies(tmp_path):
    result = run_gapbook("demo", "--study", "followup", "--out", tmp_path)
    record = record_path(result)
    assert "skipped: cases, indicator, impute, sensitivity, simulate" in result.stdout
    tables = {p.stem for p in (record / "tables").glob("*.csv")}
    assert {"visit_effects", "estimates", "estimand", "visit_means", "followup_completeness",
            "followup_retention", "participant_flow"} <= tables
    figures = {p.stem for p in (record / "figures").glob("*.png")}
    assert {"followup_means", "strategy_comparison", "followup_retention", "followup_profiles"} <= figures
    landing = (record / "report" / "index.html").read_text()
    assert "Mixed model for repeated measures" in landing and "not recommended" in landing
    verified = run_gapbook("verify", record)
    assert verified.returncode == 0, verified.stdout + verified.stderr


def test_small_counts_of_the_followup_tables_are_masked_but_not_their_visits():
    # Threshold rule of statistical disclosure control (common practice, no source): counts 1..min_cell-1.
    from gapbook.report import suppress_record_tables

    completeness = pd.DataFrame({"group": ["a", "a"], "visit": [2, 4], "n_participants": [3, 30],
                                 "n_observed": [3, 20], "pct_observed": [100.0, 66.7]})
    reasons = pd.DataFrame({"group": ["a", "a"], "reason": ["x", "y"], "n": [2, 9], "pct_of_leavers": [18.2, 81.8]})
    masked = suppress_record_tables({"followup_completeness": completeness, "followup_stopping_reasons": reasons},
                                    min_cell=5).tables()
    table = masked["followup_completeness"]
    assert list(table["visit"]) == [2, 4]
    assert list(table["n_observed"]) == ["<5", 20] and list(table["pct_observed"]) == ["suppressed", 66.7]
    assert list(masked["followup_stopping_reasons"]["n"]) == ["<5", 9]


def _wide_copy_of_the_demo(tmp_path):
    """The demo trial laid out one row per participant (one chg column per week) by pandas' pivot; its params path."""
    csv, params_path = followup_demo_files()
    long = pd.read_csv(csv, dtype=str)
    wide = long.pivot(index="subject", columns="week", values="chg")
    wide.columns = [f"chg_w{w}" for w in wide.columns]
    weeks = [2, 4, 8, 12, 16]
    wide = wide[[f"chg_w{w}" for w in weeks]].fillna("")       # lost to follow-up: no row -> an empty cell
    first = long.groupby("subject", sort=False)[["arm", "base"]].first()
    frame = first.join(wide).reset_index()
    frame.to_csv(tmp_path / "wide.csv", index=False)
    text = params_path.read_text()
    text = text.replace("path: followup_trial.csv", "path: wide.csv").replace("layout: long", "layout: wide")
    text = text.replace("visit: week", "visit: week\n  outcome_columns: [" + ", ".join(f"chg_w{w}" for w in weeks)
                        + "]")
    text = text.replace("  week:  {type: count, label: \"Planned week\"}\n", "")
    text = text.replace("  chg:   {type: continuous", "  chg_w16: {type: continuous")
    text = text.replace("path: wide.csv", "path: wide.csv\n  id: subject")
    (tmp_path / "params.yaml").write_text(text)
    return tmp_path / "params.yaml"


def test_the_wide_layout_gives_the_same_mixed_model_as_the_long(tmp_path):
    # The same trial laid out one row per participant (one chg column per week) must give the same analysis.
    _, params_path = followup_demo_files()
    _wide_copy_of_the_demo(tmp_path)
    wide_ctx = open_stage(str(tmp_path / "params.yaml"), str(tmp_path / "w"))
    long_ctx = open_stage(str(params_path), str(tmp_path / "l"))
    a, b = wide_ctx.repeated_outcome, long_ctx.repeated_outcome
    np.testing.assert_array_equal(a.values, b.values)
    from gapbook.followup.mixed_model import fit_mixed_model

    pd.testing.assert_frame_equal(fit_mixed_model(a).visit_effects(), fit_mixed_model(b).visit_effects())
    # the reasons of the wide cells reach the follow-up audit as they do from the long file
    audit_wide, audit_long = wide_ctx.followup_audit(), long_ctx.followup_audit()
    pd.testing.assert_frame_equal(audit_wide.completeness, audit_long.completeness)


def test_the_mechanism_stage_sees_a_long_file_one_row_per_participant(tmp_path):
    # Little's test (Little 1988, JASA 83:1198) and the group comparisons assume independent rows. On a long
    # file they run one row per participant, the outcome one column per visit; the reference is the same
    # trial laid out wide by pandas' pivot, which the mechanism stage reads one row per participant as it is.
    csv, params_path = followup_demo_files()
    raw = pd.read_csv(csv)
    long_ctx = open_stage(str(params_path), str(tmp_path / "l"))
    wide_ctx = open_stage(str(_wide_copy_of_the_demo(tmp_path)), str(tmp_path / "w"))
    long_result, wide_result = long_ctx.mechanism(), wide_ctx.mechanism()
    a, b = long_result.mcar.as_row().iloc[0], wide_result.mcar.as_row().iloc[0]
    assert int(a["n_rows"]) == raw["subject"].nunique() == int(b["n_rows"])
    for key in ("statistic", "df", "p_value", "n_patterns"):
        assert a[key] == pytest.approx(b[key], rel=1e-9), key
    assert "chg @ 16" in a["variables"].split(",")
    assert long_result.sentences[0].startswith(f"One row per participant ({raw['subject'].nunique()})")
    # a planned visit with no row is missing with its own reason (pandas counts the absent subject-visit pairs)
    study, _ = long_ctx.participant_study()
    absent = raw["subject"].nunique() - int((raw["week"] == 16).sum())
    assert int((study.reasons["chg @ 16"] == NO_RECORD).sum()) == absent
    assert study.data["arm"].dtype == long_ctx.study.data["arm"].dtype  # a category keeps its levels
    # mechanism.variables names the outcome once for all its visit columns
    _, chosen = long_ctx.participant_study(["base", "chg"])
    assert chosen == ("base", "chg @ 2", "chg @ 4", "chg @ 8", "chg @ 12", "chg @ 16")


def test_user_text_in_the_drafted_followup_text_is_shown_literally():
    # DESIGN.md security: user text on a page is text, never markup (text.md_escape for Markdown).
    from gapbook.followup.report import draft_followup_methods

    hostile = "<script>alert(1)</script> ![x](http://example.invalid/x.png)"
    described = describe_estimand(population=hostile, intercurrent_events=[(hostile, "hypothetical")],
                                  analyses=["mixed_model"])
    text = draft_followup_methods(formula="y ~ arm * C(visit)", exposure="<b>arm</b>", visits=["<i>1</i>", 2],
                                  method="reml", strategies=["mixed_model"], m=5, seed=1, reference="[a](b)",
                                  delta=None, reasons=["*bold*"], primary="mixed_model", estimand=described)
    import mistune

    # read as Jupyter renders it (raw HTML allowed) and as the pages do (raw HTML escaped): no element
    # from the user's text, and the text reads as written
    for escape in (True, False):
        shown = mistune.create_markdown(escape=escape)(text)
        for markup in ("<script", "<b>", "<i>", "<img", "<a ", "<em>"):
            assert markup not in shown, (markup, escape)
        assert "&lt;script&gt;alert(1)&lt;/script&gt; ![x](http://example.invalid/x.png)" in shown
        assert "(*bold*)" in shown
