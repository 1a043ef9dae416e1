"""`check` means `run` will start: both go through one pre-flight function (issue 10), in process."""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from conftest import make_demo_study

from gapbook.cli import main
from gapbook.stage import open_stage


def one_line(capsys, argv, code=2):
    assert main([str(a) for a in argv]) == code
    out, err = capsys.readouterr()
    lines = [line for line in err.splitlines() if line.strip()]
    assert len(lines) == 1 and "Traceback" not in err, err
    return out, lines[0]


@pytest.fixture
def study(tmp_path):
    return make_demo_study(tmp_path / "study")


def test_check_and_run_refuse_the_same_problem_with_the_same_line(study, capsys):
    params = study / "params.yaml"
    params.write_text(params.read_text().replace("by: [arm, clinic]", "by: [arm, clinik]"))
    _, checked = one_line(capsys, ["check", params])
    out, ran = one_line(capsys, ["run", params, "--out", study / "records"])
    assert checked == ran and "audit.by 'clinik' is not a column; did you mean 'clinic'?" in ran
    assert not (study / "records").exists()


def test_check_takes_only_like_run(tmp_path, capsys):
    data = tmp_path / "s.csv"
    data.write_text("id,x\n1,2\n2,\n3,4\n")
    params = tmp_path / "p.yaml"
    params.write_text("data: {path: s.csv, id: id}\n")
    _, line = one_line(capsys, ["check", params, "--only", "audit,impute"])
    assert "stage 'impute' needs analysis.formula" in line
    assert main(["check", str(params), "--only", "audit"]) == 0
    assert "stages: audit (kit notebooks)" in capsys.readouterr().out
    assert main(["check", str(params), "--only", " audit , "]) == 0  # spaces around a name are not part of it
    assert "stages: audit (kit notebooks)" in capsys.readouterr().out
    for empty in (",", " , ", ""):  # naming no stage ran every stage
        _, line = one_line(capsys, ["check", params, "--only", empty])
        assert "--only:" in line and "names no stage" in line


@pytest.mark.parametrize("out", ["/sys/kernel", "/proc/self/status", "FILE"])
def test_an_output_place_that_cannot_hold_a_record_is_exit_2(study, capsys, out):
    if out == "FILE":
        out = study / "params.yaml"
    _, line = one_line(capsys, ["demo", "--only", "audit", "--out", out])
    assert f"{out}" in line and "choose another --out" in line


def test_a_record_folder_is_not_taken_for_a_study_folder(audit_record, capsys):
    """A record also has notebooks/ beside params.yaml: running its params uses the kit's notebooks."""
    assert main(["check", str(audit_record / "params.yaml"), "--only", "audit"]) == 0
    assert "stages: audit (kit notebooks)" in capsys.readouterr().out


def _complete_outcome_study(tmp_path, extra: str = ""):
    """An outcome y observed in every row, age missing in a fifth of the rows, and two awkward column names."""
    rng = np.random.default_rng(3)
    n = 150
    frame = pd.DataFrame({"pid": np.arange(n), "y": rng.normal(size=n), "arm": rng.choice(["a", "b"], n),
                          "age": rng.normal(50, 10, n).round(1), "sex": rng.choice(["f", "m"], n),
                          "alk.phos": rng.lognormal(4, 0.4, n).round(1), "crp level": rng.lognormal(1, 1, n).round(2)})
    frame.loc[::5, "age"] = np.nan
    frame.loc[::7, "sex"] = np.nan
    frame.to_csv(tmp_path / "d.csv", index=False)
    params = tmp_path / "p.yaml"
    params.write_text("data: {path: d.csv, id: pid}\n"
                      "analysis: {formula: \"y ~ arm + age + sex\", exposure: arm}\n"
                      "imputation: {m: 3, iterations: 2}\n" + extra)
    return params


def test_a_complete_outcome_without_a_sensitivity_section_shifts_the_most_incomplete_model_variable(tmp_path, capsys):
    params = _complete_outcome_study(tmp_path)
    assert main(["check", str(params)]) == 0
    # What the sensitivity notebook runs: age (30 missing) rather than sex (22 missing) or the complete outcome.
    ctx = open_stage(str(params), str(tmp_path / "out"))
    result = ctx.sensitivity(ctx.imputation_plan())
    assert {s.variable for s in result.deltas.series} == {"age"} and not result.skipped()
    assert set(result.deltas.curves["variable"]) == {"age"}


def test_with_every_model_variable_complete_the_sensitivity_stage_says_why_it_shifts_nothing(tmp_path, capsys):
    params = _complete_outcome_study(tmp_path)
    params.write_text(params.read_text().replace("y ~ arm + age + sex", "y ~ arm"))
    assert main(["check", str(params)]) == 0
    ctx = open_stage(str(params), str(tmp_path / "out"))
    result = ctx.sensitivity(ctx.imputation_plan())
    assert result.skipped() and result.sentences[0].startswith("Nothing to shift")
    assert result.deltas.curves.empty and result.deltas.tipping_points.empty


@pytest.mark.parametrize("extra, needle", [
    ("sensitivity: {variable: y}\n", "sensitivity.variable: 'y' has no missing value to shift"),
    ("sensitivity: {delta: {y: [0, 0.5]}}\n", "sensitivity.delta.y: 'y' has no missing value to shift"),
    ("sensitivity: {delta: {alk.phos: [0, 1]}}\n", "sensitivity.delta.alk.phos: 'alk.phos' is not imputed"),
])
def test_check_refuses_a_sensitivity_variable_the_stage_could_not_shift(tmp_path, capsys, extra, needle):
    params = _complete_outcome_study(tmp_path, extra)
    _, checked = one_line(capsys, ["check", params])
    assert needle in checked and str(params) in checked
    _, ran = one_line(capsys, ["run", params, "--out", tmp_path / "records"])
    assert ran == checked and not (tmp_path / "records").exists()


def test_check_refuses_an_exposure_the_formula_lacks(tmp_path, capsys):
    params = _complete_outcome_study(tmp_path)
    params.write_text(params.read_text().replace("exposure: arm", "exposure: smoking"))
    _, line = one_line(capsys, ["check", params])
    assert "analysis.exposure: 'smoking' matches no term of the model" in line


@pytest.mark.parametrize("term, hint", [("alk.phos", 'Q("alk.phos")'), ("crp level", 'Q("crp level")')])
def test_a_dotted_or_spaced_name_in_the_formula_gets_the_q_spelling(tmp_path, capsys, term, hint):
    params = _complete_outcome_study(tmp_path)
    params.write_text(params.read_text().replace("y ~ arm + age + sex", f"y ~ arm + {term}"))
    _, line = one_line(capsys, ["check", params])
    assert "analysis.formula" in line and hint in line
