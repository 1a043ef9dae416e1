"""The record of a run: its folder, its manifest (with a schema), file digests, and comparisons.

A record is written under a hidden temporary name beside its final place and renamed
only when complete, so a half-written record never looks like a finished one, and a
new record never replaces an old one (a numbered suffix is added instead). A run that
stops at a failing stage keeps what finished under ``<name>-incomplete``.

The manifest lists every file of the record with its sha256; ``verify`` checks them all
before re-running anything. The manifest itself is read only through :class:`Manifest`,
so a damaged or hand-edited one is a one-line error naming the key, never a traceback.
"""
from __future__ import annotations

import hashlib
import json
import os
import platform
import re
import shutil
import sys
import tempfile
from dataclasses import dataclass
from datetime import datetime
from importlib import metadata
from pathlib import Path, PurePosixPath
from typing import Any, Dict, Iterator, List, Literal, Optional, Sequence

import numpy as np
import pandas as pd
from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator, model_validator

from . import __version__
from .errors import InputError
from .intake import sha256_of as sha256_file  # the one file digest, shared with intake and the pipeline
from .pipeline import STAGES

__all__ = ["MANIFEST", "OWNER_FILE", "SOURCE_NOTEBOOKS", "record_name", "owned_by_dead_process", "RecordFolder",
           "Manifest", "build_manifest", "write_json", "read_manifest", "Check", "check_files",
           "check_params_agree", "compare_tables", "same_environment", "compare_figures"]

# Every package whose version can change a number, a figure or how the work ran: the data engines
# (pyarrow, duckdb) and the cluster client (dask, distributed) included.
PACKAGES = ("numpy", "pandas", "scipy", "statsmodels", "matplotlib", "seaborn", "pydantic", "PyYAML", "joblib",
            "papermill", "nbconvert", "nbformat", "nbclient", "ipykernel", "pyarrow", "duckdb", "dask",
            "distributed", "openpyxl", "formulaic", "patsy")
MANIFEST = "manifest.json"
MANIFEST_FORMAT = "gapbook-record/2"
OWNER_FILE = ".gapbook-owner"  # pid of the process writing a partial record (removed on commit)
PARTIAL_MARK = ".partial-"
INCOMPLETE_SUFFIX = "-incomplete"
SOURCE_NOTEBOOKS = "notebooks/source"  # the notebooks as they were before execution
TABLE_TOLERANCE = 1e-9
SHA256 = r"^[0-9a-f]{64}$"


def sha256_bytes(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def slug(text: str) -> str:
    cleaned = re.sub(r"[^A-Za-z0-9]+", "-", text).strip("-").lower()
    return cleaned[:40] or "study"


def package_versions() -> Dict[str, Optional[str]]:
    versions: Dict[str, Optional[str]] = {}
    for name in PACKAGES:
        try:
            versions[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            versions[name] = None
    return versions


def record_name(study_name: str, when: datetime) -> str:
    """A record folder's name: the study name as a slug and the start time.

    Parameters
    ----------
    study_name : str
        The params' ``study.name``.
    when : datetime
        The run's start.

    Returns
    -------
    str
        ``<slug>-YYYYMMDD-HHMMSS``.
    """
    return f"{slug(study_name)}-{when.strftime('%Y%m%d-%H%M%S')}"


# ---------------------------------------------------------------------------
# the folder

def pid_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:  # another user's process: alive, and not ours to judge
        return True
    return True


def owned_by_dead_process(folder: Path) -> bool:
    """True when ``folder`` belongs to this user and the pid written in it is no longer running.

    Parameters
    ----------
    folder : Path
        A scratch or temporary record folder.

    Returns
    -------
    bool
    """
    try:
        if folder.is_symlink() or folder.lstat().st_uid != os.getuid():
            return False
        pid = int((folder / OWNER_FILE).read_text().strip())
    except (OSError, ValueError):
        return False
    return pid != os.getpid() and not pid_alive(pid)


def remove_stale_partials(out_root: Path) -> List[Path]:
    """Remove partial records left in ``out_root`` by this user's processes that died (e.g. SIGKILL)."""
    removed = []
    try:
        candidates = [p for p in Path(out_root).iterdir() if p.name.startswith(".") and PARTIAL_MARK in p.name]
    except OSError:
        return removed
    for folder in candidates:
        if owned_by_dead_process(folder):
            shutil.rmtree(folder, ignore_errors=True)
            removed.append(folder)
    return removed


@dataclass
class RecordFolder:
    """A record being written: a temporary folder that becomes ``final`` on :meth:`commit`."""

    final: Path
    temp: Path

    @classmethod
    def create(cls, out_root: Path, name: str) -> "RecordFolder":
        # Absolute, because notebooks run with the record as their working directory.
        out_root = Path(out_root).expanduser().absolute()
        try:
            out_root.mkdir(parents=True, exist_ok=True)
            out_root = out_root.resolve()
            if not out_root.is_dir():
                raise NotADirectoryError(20, "not a folder")
            if not os.access(out_root, os.W_OK | os.X_OK):
                raise PermissionError(13, "not writable")
            remove_stale_partials(out_root)
            temp = Path(tempfile.mkdtemp(prefix=f".{name}{PARTIAL_MARK}", dir=out_root))
            (temp / OWNER_FILE).write_text(f"{os.getpid()}\n")
            for sub in ("notebooks", SOURCE_NOTEBOOKS, "tables", "figures", "report"):
                (temp / sub).mkdir(parents=True)
        except OSError as exc:
            reason = exc.strerror or type(exc).__name__
            raise InputError(f"{out_root}: cannot write a record there ({reason}); choose another --out") from None
        return cls(final=out_root / name, temp=temp)

    def commit(self, incomplete: bool = False) -> Path:
        """Rename the record into place under a name no other record has (``-incomplete`` when a stage failed)."""
        (self.temp / OWNER_FILE).unlink(missing_ok=True)
        base = self.final.with_name(self.final.name + (INCOMPLETE_SUFFIX if incomplete else ""))
        target, suffix = base, 2
        while True:
            try:
                # os.rename onto an existing non-empty folder fails, so no record is ever replaced.
                if target.exists() or target.is_symlink():
                    raise FileExistsError(target)
                os.rename(self.temp, target)
                _open_permissions(target)
                return target
            except OSError:
                if not (target.exists() or target.is_symlink()):
                    raise
                target = base.with_name(f"{base.name}-{suffix}")
                suffix += 1

    def discard(self) -> None:
        shutil.rmtree(self.temp, ignore_errors=True)


def _open_permissions(folder: Path) -> None:
    """mkdtemp makes the folder private; give the finished record the user's usual permissions."""
    mask = os.umask(0)
    os.umask(mask)
    os.chmod(folder, 0o777 & ~mask)


def record_files(folder: Path) -> Iterator[str]:
    """Every file of a record as a relative POSIX path, the manifest itself excepted."""
    for path in sorted(Path(folder).rglob("*")):
        if path.is_file() or path.is_symlink():
            rel = path.relative_to(folder).as_posix()
            if rel not in (MANIFEST, OWNER_FILE):
                yield rel


def file_digests(folder: Path) -> Dict[str, str]:
    return {rel: sha256_file(Path(folder) / rel) for rel in record_files(folder) if not (Path(folder) / rel).is_symlink()}


# ---------------------------------------------------------------------------
# the manifest

class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True, strict=True)


class DataEntry(_Strict):
    path: str
    path_from_record: Optional[str] = None
    sha256: str = Field(pattern=SHA256)


class StageEntry(_Strict):
    stage: str
    notebook: str
    seconds: float = Field(ge=0)
    origin: Literal["kit", "study", "record"]
    source_sha256: str = Field(pattern=SHA256)
    differs_from_kit: bool

    @field_validator("stage")
    @classmethod
    def _known_stage(cls, value: str) -> str:
        if value not in STAGES:
            raise ValueError(f"'{value}' is not a stage ({', '.join(STAGES)})")
        return value

    @model_validator(mode="after")
    def _notebook_of_stage(self) -> "StageEntry":
        if self.notebook != STAGES[self.stage]:
            raise ValueError(f"notebook '{self.notebook}' is not stage {self.stage}'s ({STAGES[self.stage]})")
        return self


class KernelEntry(_Strict):
    executable: str
    python: str


class ErrorEntry(_Strict):
    kind: Literal["input", "analysis"]
    stage: Optional[str] = None
    message: str


class Manifest(_Strict):
    """What a record claims: params, data, stages, every file's sha256, and where it was run."""

    format: Literal["gapbook-record/2"]
    status: Literal["complete", "incomplete"]
    gapbook_version: str
    study: str
    params: Dict[str, Any]
    data: DataEntry
    stages: List[StageEntry]
    files: Dict[str, str]
    seed: Dict[str, Optional[int]]
    kernel: Optional[KernelEntry] = None
    packages: Dict[str, Optional[str]]
    python: str
    platform: str
    started: str
    ended: str
    error: Optional[ErrorEntry] = None

    @field_validator("files")
    @classmethod
    def _safe_paths(cls, files: Dict[str, str]) -> Dict[str, str]:
        for name, digest in files.items():
            parts = PurePosixPath(name).parts
            if (not name or name.startswith("/") or "\\" in name or ".." in parts or name == MANIFEST
                    or any(ord(ch) < 32 for ch in name)):
                raise ValueError(f"'{name}' is not a path inside the record")
            if not re.fullmatch(SHA256, digest):
                raise ValueError(f"the digest of '{name}' is not a sha256")
        return files

    @model_validator(mode="after")
    def _consistent(self) -> "Manifest":
        names = [s.stage for s in self.stages]
        if len(set(names)) != len(names):
            raise ValueError("stages: a stage is listed twice")
        order = list(STAGES)
        if names != sorted(names, key=order.index):
            raise ValueError("stages: not in pipeline order")
        if self.status == "complete":
            if not self.stages:
                raise ValueError("stages: a complete record lists at least one stage")
            if self.error is not None:
                raise ValueError("error: a complete record has no error")
        if "params.yaml" not in self.files:
            raise ValueError("files: params.yaml is not listed")
        return self

    def stage_names(self) -> List[str]:
        return [s.stage for s in self.stages]


def build_manifest(*, status: str, params_body: Dict[str, Any], data_path: Path, data_sha256: str,
                   record_final: Path, stages: Sequence[Dict[str, Any]], folder: Path, started: datetime,
                   ended: datetime, kernel: Optional[Dict[str, str]], error: Optional[Dict[str, Any]] = None
                   ) -> Dict[str, Any]:
    """The manifest of a record whose every other file is already written in ``folder``.

    Parameters
    ----------
    status : str
        ``complete`` or ``incomplete``.
    params_body : dict
        The resolved params as written to ``params.yaml``.
    data_path : Path
        The data file.
    data_sha256 : str
        Its digest.
    record_final : Path
        The record's final place (the data path is stored relative to it).
    stages : sequence of dict
        One entry per stage run (name, notebook, seconds).
    folder : Path
        The folder holding the record's files, all of which get a digest.
    started, ended : datetime
        The run's start and end.
    kernel : dict, optional
        The kernel's name and interpreter.
    error : dict, optional
        The failing stage and its message, for an incomplete record.

    Returns
    -------
    dict
        The manifest body, valid for :class:`Manifest`.
    """
    try:
        relative = os.path.relpath(data_path, record_final)
    except ValueError:  # another drive (Windows): only the absolute path holds
        relative = None
    body = {
        "format": MANIFEST_FORMAT,
        "status": status,
        "gapbook_version": __version__,
        "study": str(params_body.get("study", {}).get("name")),
        "params": params_body,
        "data": {"path": str(data_path), "path_from_record": relative, "sha256": data_sha256},
        "stages": list(stages),
        "files": file_digests(folder),
        "seed": {"imputation": params_body.get("imputation", {}).get("seed"),
                 "simulation": params_body.get("simulation", {}).get("seed")},
        "kernel": kernel,
        "packages": package_versions(),
        "python": sys.version.split()[0],
        "platform": platform.platform(),
        "started": started.isoformat(timespec="seconds"),
        "ended": ended.isoformat(timespec="seconds"),
        "error": error,
    }
    Manifest.model_validate(body)  # what we write, we can read back
    return body


def write_json(path: Path, body: Dict[str, Any]) -> None:
    """Write a JSON file the one way records write them (indented, UTF-8, final newline).

    Parameters
    ----------
    path : Path
        The file.
    body : dict
        What to write; values JSON does not know are written as text.
    """
    path.write_text(json.dumps(body, indent=2, sort_keys=False, default=str) + "\n", encoding="utf-8")


def _schema_problem(exc: ValidationError, path: Path) -> str:
    error = exc.errors()[0]
    key = ".".join(str(part) for part in error["loc"]) or "(top level)"
    kind = error["type"]
    if kind == "missing":
        what = "is missing"
    elif kind == "extra_forbidden":
        what = "is not a manifest key"
    else:
        what = error["msg"].replace("Value error, ", "")
    return f"{path}: key '{key}' {what}; the record's manifest is damaged or was edited by hand"


def read_manifest(record: Path) -> Manifest:
    """The record's manifest, validated; a missing, unreadable or malformed one exits 2 naming the key.

    Parameters
    ----------
    record : Path
        The record folder.

    Returns
    -------
    Manifest
    """
    path = Path(record) / MANIFEST
    if not Path(record).is_dir() or not path.is_file():
        raise InputError(f"{record}: not a gapbook record (no {MANIFEST}); give the folder that 'run' printed")
    try:
        body = json.loads(path.read_text(encoding="utf-8"))
    except (ValueError, RecursionError):  # JSONDecodeError, UnicodeDecodeError, and an integer too long to read
        raise InputError(f"{path}: not valid JSON; the record is damaged") from None
    except OSError as exc:
        raise InputError(f"{path}: cannot be read ({exc.strerror})") from None
    if not isinstance(body, dict):
        raise InputError(f"{path}: key '(top level)' is not an object; the record's manifest is damaged")
    if "format" not in body:
        raise InputError(f"{path}: key 'format' is missing; the record was made by an older gapbook or edited by hand "
                         "and cannot be verified")
    try:
        return Manifest.model_validate(body)
    except ValidationError as exc:
        raise InputError(_schema_problem(exc, path)) from None


# ---------------------------------------------------------------------------
# checks used by verify

@dataclass(frozen=True)
class Check:
    """One line of ``verify``'s report: a file or table, and whether it holds."""

    name: str
    status: str
    detail: str = ""
    ok: bool = False

    def line(self) -> str:
        return f"{'ok  ' if self.ok else 'FAIL'} {self.name}: {self.status}{(' - ' + self.detail) if self.detail else ''}"


def check_files(record: Path, manifest: Manifest) -> List[Check]:
    """Every file's sha256 against the manifest, and the files the manifest does not list.

    Parameters
    ----------
    record : Path
        The record folder.
    manifest : Manifest
        Its manifest.

    Returns
    -------
    list of Check
        One failed check per file that differs, is missing, or is not listed.
    """
    record = Path(record)
    failures: List[Check] = []
    present = set(record_files(record))
    for name, digest in manifest.files.items():
        path = record / name
        if path.is_symlink():
            failures.append(Check(name, "is a symbolic link, not a file"))
        elif not path.is_file():
            failures.append(Check(name, "missing (listed in the manifest)"))
        elif sha256_file(path) != digest:
            failures.append(Check(name, "differs from its sha256 in the manifest"))
    for name in sorted(present - set(manifest.files)):
        failures.append(Check(name, "present but not listed in the manifest"))
    return failures


def check_params_agree(record: Path, manifest: Manifest) -> List[Check]:
    """``params.yaml`` must say what the manifest's params say.

    Parameters
    ----------
    record : Path
        The record folder.
    manifest : Manifest
        Its manifest.

    Returns
    -------
    list of Check
        Empty when they agree, else one failed check.
    """
    import yaml

    path = Path(record) / "params.yaml"
    try:
        written = yaml.safe_load(path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, yaml.YAMLError, RecursionError):
        return [Check("params.yaml", "cannot be read as YAML")]
    if written != manifest.params:
        return [Check("params.yaml", "differs from the params in the manifest")]
    return []


def compare_table(recorded: Path, rerun: Path) -> Check:
    """Whether a rerun table matches the recorded one: bytes first, then values within 1e-9 (relative)."""
    name = recorded.name
    if not rerun.is_file():
        return Check(name, "missing in rerun")
    if recorded.read_bytes() == rerun.read_bytes():
        return Check(name, "identical", ok=True)
    try:
        from .stage import read_csv  # the reader of every record table: 'NA' stays text, '' is missing

        a, b = read_csv(recorded), read_csv(rerun)
    except Exception as exc:  # a tampered file may not even parse
        return Check(name, "different", f"cannot be read: {type(exc).__name__}")
    if list(a.columns) != list(b.columns) or a.shape != b.shape:
        return Check(name, "different", f"shape {a.shape} vs {b.shape} or columns differ")
    for column in a.columns:
        x, y = a[column], b[column]
        if pd.api.types.is_numeric_dtype(x) and pd.api.types.is_numeric_dtype(y):
            xv, yv = x.to_numpy(dtype=float), y.to_numpy(dtype=float)
            close = np.isclose(xv, yv, rtol=TABLE_TOLERANCE, atol=TABLE_TOLERANCE, equal_nan=True)
            if not close.all():
                row = int(np.flatnonzero(~close)[0])
                return Check(name, "different", f"column {column}, row {row + 1}: {xv[row]!r} vs {yv[row]!r}")
        elif not x.astype(str).equals(y.astype(str)):
            row = int(np.flatnonzero((x.astype(str) != y.astype(str)).to_numpy())[0])
            return Check(name, "different", f"column {column}, row {row + 1}: {x.iloc[row]!r} vs {y.iloc[row]!r}")
    return Check(name, "equal within tolerance", ok=True)


def compare_text(recorded: Path, rerun: Path) -> Check:
    """A generated text (the drafted report) must come out byte for byte."""
    if not rerun.is_file():
        return Check(recorded.name, "missing in rerun")
    if recorded.read_bytes() == rerun.read_bytes():
        return Check(recorded.name, "identical", ok=True)
    return Check(recorded.name, "different")


def compare_tables(record: Path, rerun: Path) -> List[Check]:
    """Every table (and the drafted report text) of the record against the re-run.

    Parameters
    ----------
    record : Path
        The record folder.
    rerun : Path
        The re-executed record.

    Returns
    -------
    list of Check
        One per table: same bytes, or same values within 1e-9.
    """
    recorded = {p.name: p for p in (Path(record) / "tables").iterdir() if p.suffix in (".csv", ".md")}
    fresh = {p.name for p in (Path(rerun) / "tables").iterdir() if p.suffix in (".csv", ".md")}
    checks = [(compare_table if n.endswith(".csv") else compare_text)(recorded[n], Path(rerun) / "tables" / n)
              for n in sorted(recorded)]
    checks += [Check(n, "not in record") for n in sorted(fresh - set(recorded))]
    return checks


def same_environment(manifest: Manifest) -> bool:
    """Whether this machine has the platform and package versions the record was made with.

    Parameters
    ----------
    manifest : Manifest
        The record's manifest.

    Returns
    -------
    bool
    """
    return manifest.platform == platform.platform() and manifest.packages == package_versions()


def compare_figures(record: Path, rerun: Path, *, strict: bool) -> List[Check]:
    """Figures byte for byte. Rendering depends on fonts and library versions, so a difference
    fails only when ``strict`` (same platform and package versions as the record), and only for
    PNG: an SVG twin carries ids matplotlib may draw at random, and its PNG is checked.

    Parameters
    ----------
    record : Path
        The record folder.
    rerun : Path
        The re-executed record.
    strict : bool
        Whether a differing PNG fails.

    Returns
    -------
    list of Check
    """
    checks = []
    recorded = {p.name: p for p in (Path(record) / "figures").glob("*") if p.is_file()}
    for name in sorted(recorded):
        fresh = Path(rerun) / "figures" / name
        if not fresh.is_file():
            checks.append(Check(f"figures/{name}", "missing in rerun"))
        elif fresh.read_bytes() == recorded[name].read_bytes():
            checks.append(Check(f"figures/{name}", "identical", ok=True))
        elif strict and name.endswith(".png"):
            checks.append(Check(f"figures/{name}", "different", "same platform and versions as the record"))
        else:
            why = ("platform or package versions differ from the record's; tables decide" if not strict
                   else "an SVG's internal ids may differ between renderings; its PNG decides")
            checks.append(Check(f"figures/{name}", "rendered differently", why, ok=True))
    return checks
