"""A plain, non-editable install works from any folder (issue 10, "installs and runs").

The wheel is built offline from a copy of the source tree (no build isolation: the test
environment has setuptools), installed with ``--no-deps`` into a fresh virtual
environment that sees the test environment's packages through a ``.pth`` line, and run
from a folder that is not the repository.
"""
from __future__ import annotations

import json
import shutil
import subprocess
import sys
import sysconfig
import zipfile
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
SOURCE_FILES = ("pyproject.toml", "setup.py", "MANIFEST.in", "README.md", "LICENSE")


def run(*args, cwd=None, timeout=900):
    return subprocess.run([str(a) for a in args], capture_output=True, text=True, cwd=cwd, timeout=timeout)


def test_wheel_ships_the_notebooks_and_runs_from_any_folder(tmp_path):
    tree = tmp_path / "source"
    tree.mkdir()
    for name in SOURCE_FILES:
        shutil.copyfile(ROOT / name, tree / name)
    shutil.copytree(ROOT / "notebooks", tree / "notebooks")
    shutil.copytree(ROOT / "src", tree / "src", ignore=shutil.ignore_patterns("*.egg-info", "__pycache__"))
    built = run(sys.executable, "-m", "pip", "wheel", "-v", "--no-deps", "--no-build-isolation", "--no-index",
                "-w", tmp_path / "dist", tree)
    assert built.returncode == 0, built.stdout[-3000:] + built.stderr[-3000:]
    log = built.stdout + built.stderr
    # the SPDX license string: no deprecation block from setuptools about the license table
    assert "project.license" not in log and "License classifiers are deprecated" not in log
    wheel = next((tmp_path / "dist").glob("gapbook-*.whl"))
    with zipfile.ZipFile(wheel) as archive:
        shipped = {n: archive.read(n) for n in archive.namelist() if n.startswith("gapbook/notebooks/")}
        assert any(n.endswith("LICENSE") for n in archive.namelist())
    notebooks = sorted((ROOT / "notebooks").glob("*.ipynb"))
    assert {f"gapbook/notebooks/{p.name}": p.read_bytes() for p in notebooks} == shipped

    venv = tmp_path / "venv"
    assert run(sys.executable, "-m", "venv", "--without-pip", venv).returncode == 0
    python = venv / "bin" / "python"
    site = Path(run(python, "-c", "import sysconfig; print(sysconfig.get_paths()['purelib'])").stdout.strip())
    # the test environment's packages, but not its editable gapbook (.pth files there are not processed)
    (site / "test-env.pth").write_text(sysconfig.get_paths()["purelib"] + "\n")
    (venv / "share").mkdir()  # and the data files those packages install under the environment's prefix
    (venv / "share" / "jupyter").symlink_to(Path(sys.prefix) / "share" / "jupyter")
    installed = run(sys.executable, "-m", "pip", "--python", python, "install", "--no-deps", "--no-index", wheel)
    assert installed.returncode == 0, installed.stderr

    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    where = run(python, "-c", "import gapbook; print(gapbook.__file__)", cwd=elsewhere).stdout
    assert where.startswith(str(site)), where
    gapbook = venv / "bin" / "gapbook"
    demo = run(gapbook, "demo", "--only", "audit", "--out", "records", cwd=elsewhere)
    assert demo.returncode == 0, demo.stdout + demo.stderr
    record = Path(demo.stdout.strip().splitlines()[-1])
    assert record.parent == elsewhere / "records"
    manifest = json.loads((record / "manifest.json").read_text())
    assert manifest["kernel"]["executable"] == str(python)  # the installation that ran, not the test's
    assert manifest["stages"][0]["origin"] == "kit" and not manifest["stages"][0]["differs_from_kit"]
    verified = run(gapbook, "verify", record, cwd=elsewhere)
    assert verified.returncode == 0, verified.stdout + verified.stderr

    new = run(gapbook, "new", "mystudy", cwd=elsewhere)
    assert new.returncode == 0, new.stderr
    assert sorted(p.name for p in (elsewhere / "mystudy" / "notebooks").glob("*.ipynb")) == [p.name for p in notebooks]
