"""Running the stage notebooks with papermill and bundling them into a record; ``verify``.

A run starts from a :class:`~gapbook.pipeline.Plan` (every up-front check already
passed), executes each stage notebook on a kernel private to the run
(:mod:`gapbook.kernels`), converts it to an HTML page, writes the manifest and renames
the record into place. A stage that fails keeps what finished under
``<name>-incomplete``; an interrupted run (Ctrl-C, SIGTERM) leaves nothing behind.

``verify`` checks every file of a record against its manifest before it re-runs
anything, and re-runs only the installed kit's notebooks unless told to trust the
record's own.
"""
from __future__ import annotations

import shutil
import threading
import time
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path
from typing import Any, Callable, Dict, List, Optional, Tuple

import yaml

from . import pages
from . import record as rec
from .compute import LOCAL
from .errors import AnalysisError, InputError
from .kernels import KERNEL_NAME, PrivateKernels, scratch_folder
from .params import Params
from .pipeline import RECORD, STAGE_TITLES, Plan, StageNotebook, kit_notebooks_dir, preflight, sha256_file
from .text import one_line

__all__ = ["run_study", "verify_record"]

Log = Callable[[str], None]


@dataclass(frozen=True)
class StageRun:
    notebook: StageNotebook
    seconds: float
    python: Optional[str]

    @property
    def stage(self) -> str:
        return self.notebook.stage

    def manifest_entry(self) -> Dict[str, Any]:
        return {"stage": self.stage, "notebook": self.notebook.file, "seconds": round(self.seconds, 2),
                "origin": self.notebook.origin, "source_sha256": self.notebook.sha256,
                "differs_from_kit": self.notebook.differs_from_kit}


class StageFailed(Exception):
    """A stage stopped with a user error (``InputError``) or an analysis failure."""

    def __init__(self, stage: str, error: Exception):
        super().__init__(str(error))
        self.stage = stage
        self.error = error


def _in_worker(work: Callable[[], Any]) -> Any:
    """Run ``work`` in a thread and wait for it, so this (main) thread keeps its signal handlers.

    nbclient installs its own SIGINT/SIGTERM handlers when it runs on the main thread,
    which would turn a stop request into a dead-kernel error deep inside a stage.
    """
    outcome: Dict[str, Any] = {}

    def target() -> None:
        try:
            outcome["value"] = work()
        except BaseException as exc:  # handed to the main thread below
            outcome["error"] = exc

    worker = threading.Thread(target=target, name="gapbook-stage", daemon=True)
    worker.start()
    while worker.is_alive():
        worker.join(0.2)
    if "error" in outcome:
        raise outcome["error"]
    return outcome.get("value")


def execute_stage(notebook: StageNotebook, params: Params, folder: Path, kernels: PrivateKernels) -> StageRun:
    """Execute one stage notebook into ``folder/notebooks`` on a private kernel."""
    import nbformat
    import papermill as pm
    from papermill.exceptions import PapermillExecutionError

    target = folder / "notebooks" / notebook.file
    start = time.perf_counter()

    def work() -> None:
        pm.execute_notebook(str(notebook.path), str(target),
                            parameters={"params": params.to_dict(), "out_dir": str(folder)},
                            kernel_name=KERNEL_NAME, language="python", cwd=str(folder), progress_bar=False,
                            log_output=False, report_mode=False, kernel_manager_class=kernels.manager_class())

    try:
        _in_worker(work)
    except PapermillExecutionError as exc:
        message = str(exc.evalue).strip().splitlines()[0] if exc.evalue else exc.ename
        if exc.ename == "InputError":
            raise StageFailed(notebook.stage, InputError(message)) from None
        raise StageFailed(notebook.stage, AnalysisError(
            f"stage '{notebook.stage}' failed: {exc.ename}: {message}")) from None
    except Exception as exc:  # the kernel died, could not start, timed out ...
        first = (str(exc).strip().splitlines() or [type(exc).__name__])[0]
        raise StageFailed(notebook.stage, AnalysisError(
            f"stage '{notebook.stage}' failed: {type(exc).__name__}: {first}")) from None
    python = None
    try:
        python = nbformat.read(target, as_version=4).metadata.get("language_info", {}).get("version")
    except Exception:
        pass
    return StageRun(notebook, time.perf_counter() - start, python)


def run_study(plan: Plan, out_root: Path, log: Log = print, name: Optional[str] = None,
              with_pages: bool = True) -> Path:
    """Run the planned stages and write the record; returns the record folder.

    A stage that fails leaves the finished stages under ``<name>-incomplete`` (its manifest
    says which stage failed and why) and re-raises the stage's error with that path, so
    the exit code stays 2 for a user error and 1 for an analysis failure.

    Parameters
    ----------
    plan : Plan
        From :func:`gapbook.pipeline.preflight`.
    out_root : Path
        The folder the record is created in (never overwritten).
    log : callable
        Receives one line per stage.
    name : str, optional
        The record's name; default the study name and start time.
    with_pages : bool
        Render each notebook and the landing page as HTML.

    Returns
    -------
    Path
        The record folder.
    """
    params = plan.params
    for note in plan.notes:
        log(f"note: {note}")
    started = datetime.now(timezone.utc)
    folder = rec.RecordFolder.create(out_root, name or rec.record_name(params.study.name, started))
    kernels: Optional[PrivateKernels] = None
    runs: List[StageRun] = []
    try:
        kernels = PrivateKernels.create()
        params_text = params.to_yaml()
        (folder.temp / "params.yaml").write_text(params_text, encoding="utf-8")
        for notebook in plan.notebooks:
            shutil.copyfile(notebook.path, folder.temp / rec.SOURCE_NOTEBOOKS / notebook.file)
        failure: Optional[StageFailed] = None
        for notebook in plan.notebooks:
            try:
                run = execute_stage(notebook, params, folder.temp, kernels)
            except StageFailed as exc:
                failure = exc
                log(f"{notebook.stage:<12} failed")
                break
            runs.append(run)
            log(f"{run.stage:<12} {run.seconds:7.1f} s")
        stage_pages = []
        if with_pages:
            bundle_start = time.perf_counter()
            summary = pages.parameters_summary(params)
            for run in runs:
                page = f"{Path(run.notebook.file).stem}.html"
                pages.notebook_to_html(folder.temp / "notebooks" / run.notebook.file, folder.temp / "report" / page,
                                       title=STAGE_TITLES[run.stage], parameters=summary)
                stage_pages.append((STAGE_TITLES[run.stage], page, run.seconds))
            log(f"{'html pages':<12} {time.perf_counter() - bundle_start:7.1f} s")
        kernel = {"executable": kernels.executable,
                  "python": next((r.python for r in runs if r.python), None) or "unknown"}
        error = None
        if failure is not None:
            kind = "input" if isinstance(failure.error, InputError) else "analysis"
            error = {"kind": kind, "stage": failure.stage, "message": str(failure.error)}
        if with_pages:
            pages.write_index(folder.temp, params=params, pages=stage_pages, error=error,
                              started=started.strftime("%Y-%m-%d %H:%M UTC"), data_sha256=plan.data.sha256)
        manifest = rec.build_manifest(
            status="incomplete" if failure else "complete", params_body=yaml.safe_load(params_text),
            data_path=params.data_path, data_sha256=plan.data.sha256, record_final=folder.final,
            stages=[r.manifest_entry() for r in runs], folder=folder.temp, started=started,
            ended=datetime.now(timezone.utc), kernel=kernel, error=error)
        rec.write_json(folder.temp / rec.MANIFEST, manifest)
    except BaseException:
        # Interrupted (Ctrl-C, SIGTERM) or a fault in gapbook itself: stop the kernels, keep nothing.
        if kernels is not None:
            kernels.close(kill=True)
        folder.discard()
        raise
    kernels.close()
    if failure is None:
        return folder.commit()
    kept = folder.commit(incomplete=True)
    finished = ", ".join(r.stage for r in runs) or "none"
    message = f"{failure.error}; finished stages ({finished}) kept in {kept}"
    raise type(failure.error)(message)


# ---------------------------------------------------------------------------
# verify

@dataclass(frozen=True)
class VerifyResult:
    record: Path
    integrity: Tuple[rec.Check, ...]
    checks: Tuple[rec.Check, ...] = ()

    @property
    def ok(self) -> bool:
        return not self.integrity and bool(self.checks) and all(c.ok for c in self.checks)


def _locate_data(record: Path, manifest: rec.Manifest, data: Optional[Path]) -> Path:
    """The data file to re-run with: ``--data``, else beside the record as it was, else its absolute path."""
    expected = manifest.data.sha256
    if data is not None:
        data = Path(data).expanduser().absolute()
        if not data.is_file():
            raise InputError(f"{data}: --data file not found")
        if sha256_file(data) != expected:
            raise InputError(f"{data}: --data is not the record's data file (sha256 differs from the manifest's)")
        return data.resolve()
    candidates = []
    if manifest.data.path_from_record:
        candidates.append((record / manifest.data.path_from_record))
    candidates.append(Path(manifest.data.path))
    changed = None
    for candidate in candidates:
        if candidate.is_file():
            if sha256_file(candidate) == expected:
                return candidate.resolve()
            changed = changed or candidate
    if changed is not None:
        raise InputError(f"{changed}: the data file changed since the record was made (sha256 differs); "
                         "verify refuses to compare against different data (give the original with --data PATH)")
    raise InputError(f"{candidates[-1]}: the record's data file is gone; restore it or give it with --data PATH")


def _notebooks_to_run(record: Path, manifest: rec.Manifest, trust: bool) -> Dict[str, Path]:
    """The kit's notebooks when the record ran the kit's; the record's own only when trusted."""
    kit = kit_notebooks_dir()
    chosen: Dict[str, Path] = {}
    foreign = []
    for entry in manifest.stages:
        kit_path = kit / entry.notebook
        if kit_path.is_file() and sha256_file(kit_path) == entry.source_sha256:
            chosen[entry.stage] = kit_path
        else:
            foreign.append(entry.notebook)
            chosen[entry.stage] = record / rec.SOURCE_NOTEBOOKS / entry.notebook
    if foreign and not trust:
        raise InputError(f"{record}: the record ran notebooks that are not this kit's ({', '.join(foreign)}: edited "
                         "by the study team or from another gapbook version); verify will not run them unless you "
                         "trust whoever made the record: add --trust-record-notebooks")
    return chosen


def verify_record(record: Path, log: Log = print, *, data: Optional[Path] = None,
                  trust_record_notebooks: bool = False) -> VerifyResult:
    """Check every file of a record against its manifest, then re-execute it and compare every table.

    Parameters
    ----------
    record : Path
        The record folder.
    log : callable
        Receives one line per check.
    data : Path, optional
        The data file when it was moved apart from the record (same SHA-256 required).
    trust_record_notebooks : bool
        Run the record's own notebooks instead of the installed kit's.

    Returns
    -------
    VerifyResult
        The integrity failures, then every table and figure check.
    """
    record = Path(record).expanduser().absolute()
    manifest = rec.read_manifest(record)
    if manifest.status != "complete":
        where = f" at stage '{manifest.error.stage}'" if manifest.error and manifest.error.stage else ""
        raise InputError(f"{record}: an incomplete record (the run stopped{where}); verify checks complete records "
                         "only - run the study again")
    integrity = rec.check_files(record, manifest) + rec.check_params_agree(record, manifest)
    if integrity:
        return VerifyResult(record, tuple(integrity))
    data_path = _locate_data(record, manifest, data)
    body = dict(manifest.params)
    body["data"] = {**body.get("data", {}), "path": str(data_path)}
    # A record received from elsewhere must not send its data to a host it names: verify always
    # re-runs on this machine (the results are the same bytes wherever the tasks ran).
    compute = body.get("compute")
    cluster = compute.get("cluster", LOCAL) if isinstance(compute, dict) else LOCAL
    if isinstance(compute, dict):
        body["compute"] = {**compute, "cluster": LOCAL}
    params = Params.from_dict(body, source=str(record / "params.yaml"))
    log("verify: re-running on this machine" + (f", not on the record's compute.cluster {one_line(cluster, limit=100)}"
                                                  if cluster != LOCAL else "")
        + " (results are the same bytes wherever the work runs)")
    notebooks = _notebooks_to_run(record, manifest, trust_record_notebooks)
    plan = preflight(params, only=manifest.stage_names(), notebooks=notebooks, notebook_origin=RECORD)
    scratch = scratch_folder()
    try:
        rerun = run_study(plan, scratch, log=lambda line: log(f"rerun {line}"), name="rerun", with_pages=False)
        strict = rec.same_environment(manifest)
        checks = rec.compare_tables(record, rerun) + rec.compare_figures(record, rerun, strict=strict)
    finally:
        shutil.rmtree(scratch, ignore_errors=True)
    return VerifyResult(record, (), tuple(checks))
