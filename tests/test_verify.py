"""`verify` proves a record is what it claims and never runs a stranger's code (issue 9 section 2).

Checks without a re-run go through ``gapbook.cli.main`` in process; the ones that re-run
stages use a subprocess, as a user would. Records come from the session fixtures in
conftest.py and are copied before they are changed.
"""
from __future__ import annotations

import hashlib
import json
import shutil
from pathlib import Path

import pytest
import yaml
from conftest import copy_record, make_demo_study, record_path, run_gapbook

from gapbook.cli import PAGES_NOT_RERUN, main


def one_line_error(capsys, code, argv, *needles):
    assert main([str(a) for a in argv]) == code
    out, err = capsys.readouterr()
    lines = [line for line in err.splitlines() if line.strip()]
    assert len(lines) == 1, err
    assert "Traceback" not in err + out
    for needle in needles:
        assert needle in lines[0], lines[0]
    return lines[0]


def edit_manifest(record: Path, change) -> None:
    path = record / "manifest.json"
    body = json.loads(path.read_text())
    result = change(body)
    path.write_text(result if isinstance(result, str) else json.dumps(body))


def rehash(record: Path, name: str) -> None:
    """Forge the manifest's digest of ``name`` to match the file as it now is."""
    digest = hashlib.sha256((record / name).read_bytes()).hexdigest()
    edit_manifest(record, lambda body: body["files"].__setitem__(name, digest))


def _deep(body):
    return "[" * 100000 + "]" * 100000


@pytest.mark.parametrize("change,key", [
    (lambda b: b.pop("stages") and None, "'stages' is missing"),
    (lambda b: b.__setitem__("stages", []), "stages"),
    (lambda b: b["stages"][0].__setitem__("stage", "audti"), "stages.0.stage"),
    (lambda b: b["stages"][0].__setitem__("seconds", "fast"), "stages.0.seconds"),
    (lambda b: b["stages"][0].__setitem__("notebook", "../../evil.ipynb"), "stages.0"),
    (lambda b: b["stages"].append(dict(b["stages"][0])), "stages"),
    (lambda b: b.__setitem__("files", "all of them"), "files"),
    (lambda b: b["files"].__setitem__("../../etc/passwd", "0" * 64), "files"),
    (lambda b: b["data"].__setitem__("sha256", 5), "data.sha256"),
    (lambda b: b.__setitem__("status", "done"), "status"),
    (lambda b: b.__setitem__("run_this", "import os"), "'run_this' is not a manifest key"),
    (lambda b: b.pop("format") and None, "'format' is missing"),
    (lambda b: b.__setitem__("params", ["a", "list"]), "params"),
    (lambda b: "{not json", "not valid JSON"),
    (lambda b: "[1, 2]", "not an object"),
    (_deep, "not valid JSON"),
    # an integer of 100,000 digits: Python's json refuses it with a ValueError that is no JSONDecodeError
    # (int max str digits, 4300 by default since Python 3.11); it came out as a traceback
    (lambda b: '{"format": ' + "9" * 100_000 + "}", "not valid JSON"),
])
def test_a_malformed_manifest_is_exit_2_naming_the_file_and_key(audit_record, tmp_path, capsys, change, key):
    record = copy_record(audit_record, tmp_path)
    edit_manifest(record, change)
    one_line_error(capsys, 2, ["verify", record], "manifest.json", key)


def test_every_file_is_checked_before_anything_runs(audit_record, tmp_path, capsys):
    record = copy_record(audit_record, tmp_path)
    figure = next((record / "figures").glob("*.png"))
    figure.write_bytes(figure.read_bytes() + b"forged")
    (record / "notebooks" / "01_audit.ipynb").unlink()
    (record / "report" / "index.html").write_text("<p>forged</p>")
    (record / "tables" / "planted.csv").write_text("a\n1\n")
    source = record / "notebooks" / "source" / "01_audit.ipynb"
    source.write_text(source.read_text().replace("open_stage", "open_stage "))
    assert main(["verify", str(record)]) == 1
    out, err = capsys.readouterr()
    assert f"FAIL figures/{figure.name}: differs from its sha256" in out
    assert "FAIL notebooks/01_audit.ipynb: missing" in out
    assert "FAIL report/index.html: differs" in out
    assert "FAIL tables/planted.csv: present but not listed" in out
    assert "FAIL notebooks/source/01_audit.ipynb: differs" in out
    assert "nothing was re-run" in out and "rerun" not in out
    assert "Traceback" not in err


def test_params_yaml_must_agree_with_the_manifest(audit_record, tmp_path, capsys):
    record = copy_record(audit_record, tmp_path)
    params = record / "params.yaml"
    params.write_text(params.read_text().replace("threshold: 0.2", "threshold: 0.3"))
    rehash(record, "params.yaml")  # a forger who also fixed the digest
    assert main(["verify", str(record)]) == 1
    out, _ = capsys.readouterr()
    assert "FAIL params.yaml: differs from the params in the manifest" in out


def test_params_from_a_record_are_validated_like_a_params_file(audit_record, tmp_path, capsys):
    record = copy_record(audit_record, tmp_path)
    params = record / "params.yaml"
    body = yaml.safe_load(params.read_text())
    body["imputation"]["m"] = -3
    body["analysis"]["famly"] = "gaussian"
    params.write_text(yaml.safe_dump(body, sort_keys=False))
    rehash(record, "params.yaml")
    edit_manifest(record, lambda m: m.__setitem__("params", body))
    one_line_error(capsys, 2, ["verify", record], "params.yaml", "famly")


def test_forged_record_params_cannot_run_code(audit_record, tmp_path, capsys):
    """The measured attack: params edited consistently in params.yaml, its digest and the manifest."""
    record = copy_record(audit_record, tmp_path)
    canary = tmp_path / "CANARY"
    params = record / "params.yaml"
    body = yaml.safe_load(params.read_text())
    body["analysis"]["formula"] = f"hba1c_12m ~ arm + I(__import__('os').system('touch {canary}'))"
    params.write_text(yaml.safe_dump(body, sort_keys=False))
    rehash(record, "params.yaml")
    edit_manifest(record, lambda m: m.__setitem__("params", body))
    one_line_error(capsys, 2, ["verify", record], "params.yaml", "analysis.formula")
    assert not canary.exists()


def test_verify_refuses_a_missing_folder_and_a_plain_folder(tmp_path, capsys):
    one_line_error(capsys, 2, ["verify", tmp_path / "nowhere"], "not a gapbook record")
    one_line_error(capsys, 2, ["verify", tmp_path], "not a gapbook record")


def test_a_record_moved_with_its_data_verifies_and_moved_data_needs_data_flag(tmp_path):
    """Relative layout kept: no --data needed; data moved apart: --data with the same sha256."""
    small = tmp_path / "first" / "study"
    (small / "data").mkdir(parents=True)
    (small / "data" / "s.csv").write_text("id,x,g\n" + "".join(
        f"{i},{'' if i % 3 == 0 else i * 1.5},{'a' if i % 2 else 'b'}\n" for i in range(1, 41)))
    (small / "params.yaml").write_text("study: {name: moved}\ndata: {path: data/s.csv, id: id}\n")
    record = record_path(run_gapbook("run", small / "params.yaml", "--only", "audit", "--out", small / "records"))
    manifest = json.loads((record / "manifest.json").read_text())
    assert manifest["data"]["path_from_record"] == "../../data/s.csv"

    moved = tmp_path / "second" / "study"
    moved.parent.mkdir()
    shutil.move(str(small), str(moved))  # the absolute path in the manifest is gone now
    moved_record = moved / "records" / record.name
    result = run_gapbook("verify", moved_record)
    assert result.returncode == 0, result.stdout + result.stderr
    assert "every file matches the manifest" in result.stdout

    elsewhere = tmp_path / "archive" / "s-copy.csv"
    elsewhere.parent.mkdir()
    shutil.move(str(moved / "data" / "s.csv"), str(elsewhere))
    gone = run_gapbook("verify", moved_record)
    assert gone.returncode == 2 and "--data" in gone.stderr and len(gone.stderr.strip().splitlines()) == 1
    other = tmp_path / "archive" / "other.csv"
    other.write_text(elsewhere.read_text().replace("1.5", "1.6"))
    wrong = run_gapbook("verify", moved_record, "--data", other)
    assert wrong.returncode == 2 and "sha256 differs" in wrong.stderr
    given = run_gapbook("verify", moved_record, "--data", elsewhere)
    assert given.returncode == 0, given.stdout + given.stderr


def _with_cell(notebook: Path, source: str, after_parameters: bool = True) -> None:
    """Insert a code cell into a study-folder notebook (a team's edit)."""
    body = json.loads(notebook.read_text())
    index = next(i for i, c in enumerate(body["cells"]) if "parameters" in c.get("metadata", {}).get("tags", []))
    body["cells"].insert(index + 2 if after_parameters else 0, {
        "cell_type": "code", "execution_count": None, "id": f"edit-{len(body['cells'])}", "metadata": {},
        "outputs": [], "source": source})
    notebook.write_text(json.dumps(body, indent=1))


def test_study_notebooks_run_and_verify_needs_trust_to_run_them(tmp_path, capsys):
    """`run` uses the study folder's notebooks (manifest says so); verify runs them only when trusted."""
    study = tmp_path / "mystudy"
    assert main(["new", str(study)]) == 0
    capsys.readouterr()
    make_demo_study(tmp_path / "demo")
    shutil.copytree(tmp_path / "demo" / "data", study / "data", dirs_exist_ok=True)
    shutil.copyfile(tmp_path / "demo" / "params.yaml", study / "params.yaml")
    _with_cell(study / "notebooks" / "01_audit.ipynb", "print('edited by the study team')")
    result = run_gapbook("run", study / "params.yaml", "--only", "audit", "--out", study / "records")
    record = record_path(result)
    assert "note: notebook 01_audit.ipynb: the study folder's copy, which differs from the kit's" in result.stdout
    manifest = json.loads((record / "manifest.json").read_text())
    assert manifest["stages"][0]["origin"] == "study" and manifest["stages"][0]["differs_from_kit"] is True
    assert "edited by the study team" in (record / "report" / "01_audit.html").read_text()

    refused = run_gapbook("verify", record)
    assert refused.returncode == 2 and "Traceback" not in refused.stderr
    assert "01_audit.ipynb" in refused.stderr and "--trust-record-notebooks" in refused.stderr
    assert "rerun" not in refused.stdout
    trusted = run_gapbook("verify", record, "--trust-record-notebooks")
    assert trusted.returncode == 0, trusted.stdout + trusted.stderr


def test_a_failing_stage_keeps_what_finished_and_verify_refuses_it(tmp_path, capsys):
    study = tmp_path / "s"
    make_demo_study(study)
    (study / "notebooks").mkdir()
    from gapbook.pipeline import kit_notebooks_dir

    for name in ("01_audit.ipynb", "02_mechanism.ipynb"):
        shutil.copyfile(kit_notebooks_dir() / name, study / "notebooks" / name)
    _with_cell(study / "notebooks" / "02_mechanism.ipynb", "raise ValueError('planted failure')")
    failed = run_gapbook("run", study / "params.yaml", "--only", "audit,mechanism", "--out", study / "records")
    assert failed.returncode == 1, failed.stdout + failed.stderr
    lines = failed.stderr.strip().splitlines()
    assert len(lines) == 1 and "planted failure" in lines[0] and "finished stages (audit) kept in" in lines[0]
    kept = Path(lines[0].rsplit(" kept in ", 1)[1])
    assert kept.name.endswith("-incomplete") and kept.is_dir()
    manifest = json.loads((kept / "manifest.json").read_text())
    assert manifest["status"] == "incomplete"
    assert [s["stage"] for s in manifest["stages"]] == ["audit"]
    assert manifest["error"]["stage"] == "mechanism" and manifest["error"]["kind"] == "analysis"
    assert (kept / "tables" / "audit_variables.csv").is_file()
    assert not [p for p in (study / "records").iterdir() if p.name.startswith(".")]  # no hidden partial left
    one_line_error(capsys, 2, ["verify", kept], "incomplete record", "mechanism")

    # a user error raised inside a stage: exit 2, and the record is kept just the same
    _with_cell(study / "notebooks" / "02_mechanism.ipynb",
               "from gapbook.errors import InputError\nraise InputError('params.yaml: planted user error')")
    user = run_gapbook("run", study / "params.yaml", "--only", "mechanism", "--out", study / "records")
    assert user.returncode == 2, user.stdout + user.stderr
    assert len(user.stderr.strip().splitlines()) == 1 and "planted user error" in user.stderr
    assert "finished stages (none) kept in" in user.stderr
    assert len([p for p in (study / "records").iterdir() if p.name.endswith(("-incomplete", "-incomplete-2"))]) == 2


def test_a_forger_who_also_fixes_the_digests_is_caught_by_the_rerun(audit_record, tmp_path):
    """Digests only prove the files are the ones the manifest lists; the re-run proves what they say."""
    record = copy_record(audit_record, tmp_path)
    table = record / "tables" / "audit_variables.csv"
    table.write_text(table.read_text().replace("continuous", "nominal", 1))
    figure = record / "figures" / "audit_map.png"
    figure.write_bytes(figure.read_bytes()[:-12] + b"forged-bytes")
    for name in ("tables/audit_variables.csv", "figures/audit_map.png"):
        rehash(record, name)
    result = run_gapbook("verify", record)
    assert result.returncode == 1, result.stdout + result.stderr
    assert "every file matches the manifest" in result.stdout  # the forgery passed the digest check ...
    assert "FAIL audit_variables.csv: different" in result.stdout  # ... not the re-run
    assert "FAIL figures/audit_map.png: different" in result.stdout


def test_a_forged_page_with_its_digest_fixed_is_named_as_not_compared(audit_record, tmp_path, capsys):
    """verify re-runs tables and figures only, so its last line must say the pages were not compared."""
    record = copy_record(audit_record, tmp_path)
    page = record / "report" / "index.html"
    page.write_text(page.read_text().replace("</body>", "<script>alert(1)</script></body>"))
    rehash(record, "report/index.html")
    code = main(["verify", str(record)])
    out = capsys.readouterr().out
    assert code == 0  # the tables and figures still match: the forged page is not caught ...
    assert out.strip().splitlines()[-1] == PAGES_NOT_RERUN  # ... and the verdict says it was not compared
