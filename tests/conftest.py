"""Fixtures shared by several test files: the open penguins data and the demo study."""
from __future__ import annotations

import pandas as pd
import pytest
from palmerpenguins import load_penguins

from gapbook.demo import demo_params
from gapbook.intake import load_study


@pytest.fixture(scope="session")
def penguins() -> pd.DataFrame:
    """palmerpenguins (PyPI package palmerpenguins): 344 rows, 11 missing sex."""
    return load_penguins()


@pytest.fixture(scope="session")
def demo():
    """The demo params and the study after intake."""
    params = demo_params()
    return params, load_study(params)


# ---------------------------------------------------------------------------
# records made once per test session through the real CLI (subprocesses: the runner
# starts kernels); tests that change a record work on a copy (see copy_record).

import shutil  # noqa: E402
import subprocess  # noqa: E402
import sys  # noqa: E402
from pathlib import Path  # noqa: E402

from gapbook.demo import demo_csv_path, demo_params_path  # noqa: E402


def run_gapbook(*args, cwd=None, env=None, timeout=900):
    """``python -m gapbook.cli ARGS`` in a subprocess, as a user runs it."""
    return subprocess.run([sys.executable, "-m", "gapbook.cli", *map(str, args)], capture_output=True, text=True,
                          cwd=cwd, env=env, timeout=timeout)


def make_demo_study(folder: Path) -> Path:
    """A study folder with its own copy of the demo data: ``params.yaml`` and ``data/trial.csv``."""
    (folder / "data").mkdir(parents=True)
    (folder / "data" / "trial.csv").write_bytes(demo_csv_path().read_bytes())
    text = demo_params_path().read_text().replace("path: demo_trial.csv", "path: data/trial.csv")
    (folder / "params.yaml").write_text(text)
    return folder


def record_path(result) -> Path:
    assert result.returncode == 0, result.stdout + result.stderr
    return Path(result.stdout.strip().splitlines()[-1])


def copy_record(record: Path, target: Path) -> Path:
    """A copy of a record to tamper with, keeping its place relative to the data (one level down)."""
    copy = target / record.parent.name / record.name
    shutil.copytree(record, copy, symlinks=True)
    return copy


@pytest.fixture(scope="session")
def audit_study(tmp_path_factory) -> Path:
    """A demo study folder with one audit-only record made by ``gapbook run --only audit``."""
    folder = make_demo_study(tmp_path_factory.mktemp("audit-study"))
    record_path(run_gapbook("run", "params.yaml", "--only", "audit", "--out", "records", cwd=folder))
    return folder


@pytest.fixture(scope="session")
def audit_record(audit_study) -> Path:
    return next(p for p in (audit_study / "records").iterdir() if not p.name.startswith("."))


@pytest.fixture(scope="session")
def demo_record(tmp_path_factory) -> Path:
    """The whole demo, every stage, made once per session by ``gapbook demo``."""
    out = tmp_path_factory.mktemp("demo-record")
    result = run_gapbook("demo", "--out", out)
    record = record_path(result)
    (out / "stdout.txt").write_text(result.stdout)
    return record


@pytest.fixture
def followup_study(tmp_path) -> Path:
    """A copy of the follow-up demo study (long layout, visits 2, 4, 8, 12, 16, arms control and active) that a
    test may edit: its data file and params.yaml in one folder."""
    from gapbook.followup.demo import followup_demo_files

    csv, params = followup_demo_files()
    folder = tmp_path / "trial"
    folder.mkdir()
    shutil.copy(csv, folder / csv.name)
    shutil.copy(params, folder / "params.yaml")
    return folder
