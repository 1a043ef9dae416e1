"""The command line as a user meets it: exit codes, one-line errors, records and verify."""
from __future__ import annotations

import hashlib
import json
import subprocess
import sys
from pathlib import Path

import pandas as pd
import pytest

from gapbook.cli import main
from gapbook.demo import demo_csv_path, demo_params_path

ROOT = Path(__file__).resolve().parents[1]


def gapbook(*args, cwd=None):
    """The command in a subprocess, as a user runs it: for runs that start kernels and write records."""
    return subprocess.run([sys.executable, "-m", "gapbook.cli", *map(str, args)], capture_output=True, text=True,
                          cwd=cwd, timeout=600)


@pytest.fixture
def gapbook_here(capsys):
    """``gapbook.cli.main`` called in this process: for refusals that stop before any stage starts.

    Returns the same fields a finished subprocess has (returncode, stdout, stderr)."""
    def call(*args):
        capsys.readouterr()  # drop anything printed before this call
        code = main([str(arg) for arg in args])
        out, err = capsys.readouterr()
        return subprocess.CompletedProcess(["gapbook", *map(str, args)], code, out, err)
    return call


def digest(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def assert_user_error(result, needle):
    assert result.returncode == 2, result.stderr
    lines = [line for line in result.stderr.splitlines() if line.strip()]
    assert len(lines) == 1, result.stderr
    assert needle in lines[0]
    assert "Traceback" not in result.stderr


@pytest.fixture
def study(tmp_path):
    """A small study folder with its own copy of the demo data."""
    data = tmp_path / "data"
    data.mkdir()
    (data / "trial.csv").write_bytes(demo_csv_path().read_bytes())
    text = demo_params_path().read_text().replace("path: demo_trial.csv", "path: data/trial.csv")
    params = tmp_path / "params.yaml"
    params.write_text(text)
    return tmp_path


def test_check_accepts_the_demo(study, gapbook_here):
    result = gapbook_here("check", study / "params.yaml")
    assert result.returncode == 0, result.stderr
    assert result.stdout.strip().endswith("ok")
    assert "1200 rows" in result.stdout


@pytest.mark.parametrize("edit,needle", [
    (lambda p, d: p.write_text(p.read_text().replace("imputation:", "imputaton:")), "did you mean 'imputation'?"),
    (lambda p, d: p.write_text(p.read_text().replace("type: continuous, range: [18, 100]", "type: continous")),
     "did you mean 'continuous'?"),
    (lambda p, d: d.write_text(d.read_text().replace("P0002,", "P0001,", 1)), "duplicate id 'P0001'"),
    (lambda p, d: d.write_text(d.read_text().replace(",58,", ",fifty-eight,", 1)),
     "column 'age' is declared continuous but holds the text 'fifty-eight'"),
    (lambda p, d: d.write_text(""), "the data file is empty"),
    (lambda p, d: d.unlink(), "data file not found"),
    (lambda p, d: p.write_text(p.read_text().replace("id: participant_id", "id: participant")),
     "did you mean 'participant_id'?"),
])
def test_bad_input_exits_2_with_one_line_and_leaves_nothing(study, edit, needle, gapbook_here):
    params, data = study / "params.yaml", study / "data" / "trial.csv"
    edit(params, data)
    before = {p: digest(p) for p in study.rglob("*") if p.is_file()}
    for args in (("check", params), ("run", params, "--out", study / "records", "--only", "audit")):
        assert_user_error(gapbook_here(*args), needle)
    after = {p: digest(p) for p in study.rglob("*") if p.is_file()}
    assert after == before  # input files untouched, no record (or partial record) left behind
    assert not (study / "records").exists() or not any((study / "records").iterdir())


def test_unknown_stage_and_missing_record(study, tmp_path, gapbook_here):
    assert_user_error(gapbook_here("run", study / "params.yaml", "--only", "audti", "--out", tmp_path / "r"),
                      "did you mean 'audit'?")
    assert_user_error(gapbook_here("verify", tmp_path), "not a gapbook record")
    assert_user_error(gapbook_here("check", tmp_path / "none.yaml"), "params file not found")


def test_an_error_the_user_causes_is_one_line_without_traceback_in_a_real_process(study):
    # The in-process calls above check the wording; this one checks what a shell sees: exit status 2
    # and a single line on standard error from the installed command's module.
    params = study / "params.yaml"
    params.write_text(params.read_text().replace("imputation:", "imputaton:"))
    assert_user_error(gapbook("check", params), "did you mean 'imputation'?")


def test_new_scaffolds_a_study_folder(tmp_path, gapbook_here):
    result = gapbook_here("new", tmp_path / "mystudy")
    assert result.returncode == 0, result.stderr
    assert (tmp_path / "mystudy" / "params.yaml").is_file()
    assert (tmp_path / "mystudy" / "data").is_dir()
    assert sorted(p.name for p in (tmp_path / "mystudy" / "notebooks").glob("*.ipynb")) == \
        sorted(p.name for p in (ROOT / "notebooks").glob("*.ipynb"))
    assert_user_error(gapbook_here("new", tmp_path / "mystudy"), "not empty")
    # pointed at the data file itself, it says a file is there and what to give instead (it said 'folder exists')
    (tmp_path / "extract.csv").write_text("id,y\n1,2\n")
    assert_user_error(gapbook_here("new", tmp_path / "extract.csv"), "a file of that name exists")


def test_run_audit_then_verify_and_tamper(study, gapbook_here):
    params, data = study / "params.yaml", study / "data" / "trial.csv"
    before = digest(data)
    # a relative --out, as a user types it, resolved against the working directory
    result = gapbook("run", "params.yaml", "--out", "records", "--only", "audit", cwd=study)
    assert result.returncode == 0, result.stderr
    lines = result.stdout.strip().splitlines()
    record = Path(lines[-1])
    assert lines[0].startswith("audit") and lines[0].rstrip().endswith("s")
    assert record.is_dir() and record.parent == study / "records"
    assert digest(data) == before
    manifest = json.loads((record / "manifest.json").read_text())
    for key in ("params", "data", "stages", "files", "kernel", "packages", "python", "platform", "seed", "started",
                "ended", "gapbook_version"):
        assert key in manifest
    assert manifest["data"]["sha256"] == before
    # the versions that can change a number or where the work ran: the data engines and the cluster client too
    from importlib import metadata
    for package in ("numpy", "statsmodels", "pyarrow", "duckdb", "dask", "distributed"):
        assert manifest["packages"][package] == metadata.version(package)
    for name in ("audit_variables", "audit_patterns"):
        assert (record / "tables" / f"{name}.csv").is_file()
    variables = pd.read_csv(record / "tables" / "audit_variables.csv")
    assert list(variables.columns[:6]) == ["variable", "type", "n", "n_missing", "pct_missing", "over_threshold"]
    assert (record / "report" / "index.html").is_file() and (record / "report" / "01_audit.html").is_file()
    assert (record / "notebooks" / "01_audit.ipynb").is_file()
    # raw rows never reach the record: no participant's outcome value row appears in any table
    assert not any("hba1c_12m" in p.read_text() and "P0001," in p.read_text() for p in (record / "tables").glob("*.csv"))

    # a second run never overwrites the first
    second = Path(gapbook("run", params, "--out", study / "records", "--only", "audit").stdout.strip().splitlines()[-1])
    assert second != record and record.is_dir()
    for table in (record / "tables").glob("*.csv"):  # same inputs, same bytes
        assert table.read_bytes() == (second / "tables" / table.name).read_bytes(), table.name

    verified = gapbook("verify", record)
    assert verified.returncode == 0, verified.stdout + verified.stderr
    assert "FAIL" not in verified.stdout

    table = record / "tables" / "audit_variables.csv"
    table.write_text(table.read_text().replace(",13,", ",14,", 1) + "")
    frame = pd.read_csv(table)
    frame.loc[0, "n_missing"] = frame.loc[0, "n_missing"] + 1
    frame.to_csv(table, index=False)
    tampered = gapbook_here("verify", record)   # refused before any re-run: no kernel needed
    assert tampered.returncode == 1
    assert "FAIL tables/audit_variables.csv: differs from its sha256" in tampered.stdout
    assert "nothing was re-run" in tampered.stdout
    table.write_bytes((second / "tables" / "audit_variables.csv").read_bytes())  # restored: verifiable again

    data.write_text(data.read_text() + "")  # unchanged bytes: still verifiable
    data.write_text(data.read_text().replace("P1200", "P9999"))
    assert_user_error(gapbook_here("verify", record), "data file changed")


def test_without_a_model_the_missing_data_stages_still_run(tmp_path, gapbook_here):
    data = tmp_path / "small.csv"
    pd.DataFrame({"id": range(1, 41), "x": [1.5, None] * 20, "g": ["a", "b", "?", "a"] * 10}).to_csv(data, index=False)
    params = tmp_path / "p.yaml"
    params.write_text("data: {path: small.csv, id: id}\nmissing: {markers: ['', '?']}\n")
    result = gapbook("run", params, "--out", tmp_path / "out")
    assert result.returncode == 0, result.stderr
    assert "skipped: cases" in result.stdout
    record = Path(result.stdout.strip().splitlines()[-1])
    assert (record / "tables" / "audit_variables.csv").is_file() and (record / "tables" / "mcar_test.csv").is_file()
    assert not (record / "tables" / "estimates.csv").exists()
    flow = pd.read_csv(record / "tables" / "participant_flow.csv").set_index("step")["all"]
    assert flow["in_file"] == 40 and flow["complete_all_variables"] == 10  # x missing in odd rows, g '?' in 3rd of 4
    assert "report" not in result.stdout.split("skipped:")[1].splitlines()[0]
    assert (record / "tables" / "report_text.md").is_file()
    assert_user_error(gapbook_here("run", params, "--out", tmp_path / "out", "--only", "impute"),
                      "needs analysis.formula")


def test_a_formula_that_does_not_parse_stops_the_run_before_any_stage(study, gapbook_here):
    params = study / "params.yaml"
    text = params.read_text()
    assert 'formula: "hba1c_12m ~ arm +' in text
    params.write_text(text.replace('formula: "hba1c_12m ~ arm +', 'formula: "hba1c_12m ~ (arm +'))
    result = gapbook_here("run", params, "--out", study / "records")
    assert_user_error(result, "analysis.formula")
    assert "is not a valid formula" in result.stderr
    assert "audit" not in result.stdout  # no stage ran
    assert not (study / "records").exists() or not any((study / "records").iterdir())


def test_demo_runs_every_stage_into_one_record(demo_record):
    """The whole pipeline on the demo trial, as `make demo` runs it; the DESIGN.md table contracts hold."""
    lines = (demo_record.parent / "stdout.txt").read_text().strip().splitlines()
    record = Path(lines[-1])
    assert record == demo_record
    timed = [line.split()[0] for line in lines[:-1] if line.rstrip().endswith(" s")]
    assert timed == ["audit", "mechanism", "cases", "indicator", "impute", "sensitivity", "simulate", "report",
                     "html"]
    tables = record / "tables"
    contracts = {
        "audit_variables": ["variable", "type", "n", "n_missing", "pct_missing", "over_threshold"],
        "audit_patterns": ["n_rows", "n_missing_variables"],
        "mcar_test": ["statistic", "df", "p_value", "n_patterns", "variables"],
        "estimates": ["strategy", "term", "estimate", "std_error", "ci_lower", "ci_upper", "p_value", "n_used",
                      "df", "fmi", "riv"],
        "sensitivity_delta": ["variable", "group", "delta", "term", "estimate", "ci_lower", "ci_upper", "p_value"],
    }
    for name, columns in contracts.items():
        frame = pd.read_csv(tables / f"{name}.csv")
        assert set(columns) <= set(frame.columns), name
    estimates = pd.read_csv(tables / "estimates.csv")
    assert set(estimates["strategy"]) == {"complete_case", "missing_category", "multiple_imputation"}
    arm = estimates[estimates["term"] == "arm[T.sms]"].set_index("strategy")
    # the generator's true programme effect is -0.40 (gapbook.demo); every strategy's CI covers it here
    assert ((arm["ci_lower"] < -0.40) & (arm["ci_upper"] > -0.40)).all()
    mi = arm.loc["multiple_imputation"]
    assert 0 < mi["fmi"] < 1 and mi["df"] > 0 and mi["n_used"] == 1200
    assert (tables / "tipping_point.csv").is_file() and (tables / "simulation_performance.csv").is_file()
    index = (record / "report" / "index.html").read_text()
    assert "Results (draft" in index and "cannot be verified" in index
    for notebook in ("01_audit", "05_impute", "08_report"):
        assert (record / "report" / f"{notebook}.html").is_file()
