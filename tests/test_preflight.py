"""`check` means `run` will start: both go through one pre-flight function (issue 10), in process."""
from __future__ import annotations

import pytest
from conftest import make_demo_study

from gapbook.cli import main


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
