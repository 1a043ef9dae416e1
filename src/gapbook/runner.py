"""Running the stage notebooks with papermill and bundling them into a record.

Each stage is a notebook in ``notebooks/``; the runner injects the resolved params and
the record folder into its ``parameters`` cell, executes it on this Python's own kernel
(a kernelspec is written to a private folder, so a missing or foreign ``python3``
kernelspec cannot break a run), converts it to HTML, and finally writes the manifest and
renames the record into place.
"""
from __future__ import annotations

import json
import os
import sys
import tempfile
import time
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path
from typing import Any, Callable, Dict, List, Optional, Sequence, Tuple

from .errors import AnalysisError, InputError, did_you_mean
from .params import Params
from . import record as rec

STAGES: Dict[str, str] = {
    "audit": "01_audit.ipynb",
    "mechanism": "02_mechanism.ipynb",
    "cases": "03_cases.ipynb",
    "indicator": "04_indicator.ipynb",
    "impute": "05_impute.ipynb",
    "sensitivity": "06_sensitivity.ipynb",
    "simulate": "07_simulate.ipynb",
    "report": "08_report.ipynb",
}
STAGE_TITLES: Dict[str, str] = {
    "audit": "Audit: how much is missing, why, and in which patterns",
    "mechanism": "Mechanism: does missingness depend on what was observed?",
    "cases": "Complete cases and available cases",
    "indicator": "Missing category and missing indicator",
    "impute": "Multiple imputation by chained equations",
    "sensitivity": "Sensitivity to data missing not at random",
    "simulate": "Bias simulation for a study like this one",
    "report": "Summary for reporting",
}
MODEL_STAGES = frozenset({"cases", "indicator", "impute", "sensitivity", "simulate"})
KERNEL_NAME = "gapbook-python"

Log = Callable[[str], None]


def notebooks_dir() -> Path:
    """Where the stage notebooks live: $GAPBOOK_NOTEBOOKS, else the repository's notebooks/ folder."""
    override = os.environ.get("GAPBOOK_NOTEBOOKS")
    if override:
        return Path(override)
    return Path(__file__).resolve().parents[2] / "notebooks"


def available_stages() -> List[str]:
    folder = notebooks_dir()
    return [name for name, file in STAGES.items() if (folder / file).is_file()]


def resolve_stages(only: Optional[Sequence[str]], params: Optional[Params] = None,
                   log: Optional[Log] = None) -> List[str]:
    """The stages to run, in pipeline order; unknown names exit 2 with a suggestion.

    Without ``--only``, stages that need the analysis model are skipped (and said so) when
    the params have no ``analysis.formula``: describing the missing data needs no model.
    """
    available = available_stages()
    if not available:
        raise InputError(f"{notebooks_dir()}: no stage notebooks found; set GAPBOOK_NOTEBOOKS to the notebooks folder")
    no_model = params is not None and not params.analysis.formula
    if not only:
        if no_model:
            skipped = [s for s in available if s in MODEL_STAGES]
            if skipped and log is not None:
                log(f"skipped: {', '.join(skipped)} (they need analysis.formula in {params.label})")
            return [s for s in available if s not in MODEL_STAGES]
        return available
    wanted = []
    for name in only:
        name = name.strip()
        if name not in STAGES:
            raise InputError(f"--only: '{name}' is not a stage{did_you_mean(name, STAGES)} "
                             f"(stages: {', '.join(STAGES)})")
        if name not in available:
            raise InputError(f"--only: stage '{name}' has no notebook in {notebooks_dir()}")
        if no_model and name in MODEL_STAGES:
            raise InputError(f"{params.label}: stage '{name}' needs analysis.formula; add it to the analysis section "
                             "(e.g. formula: \"outcome ~ exposure + covariates\")")
        wanted.append(name)
    return [s for s in STAGES if s in wanted]


def ensure_kernel() -> str:
    """Write a kernelspec for this very interpreter into a private folder and put it on JUPYTER_PATH."""
    root = Path(tempfile.gettempdir()) / f"gapbook-kernels-{os.getuid() if hasattr(os, 'getuid') else 'user'}"
    spec_dir = root / "kernels" / KERNEL_NAME
    spec_dir.mkdir(parents=True, exist_ok=True)
    spec = {"argv": [sys.executable, "-m", "ipykernel_launcher", "-f", "{connection_file}",
                     "--IPKernelApp.log_level=CRITICAL"],
            "display_name": "Python (gapbook)", "language": "python",
            "env": {"PYTHONHASHSEED": "0", "MPLBACKEND": "module://matplotlib_inline.backend_inline"}}
    path = spec_dir / "kernel.json"
    text = json.dumps(spec, indent=1)
    if not path.is_file() or path.read_text() != text:
        path.write_text(text)
    paths = os.environ.get("JUPYTER_PATH", "")
    if str(root) not in paths.split(os.pathsep):
        os.environ["JUPYTER_PATH"] = os.pathsep.join([str(root)] + ([paths] if paths else []))
    return KERNEL_NAME


@dataclass(frozen=True)
class StageRun:
    stage: str
    notebook: str
    seconds: float


def execute_stage(stage: str, params: Params, folder: Path, kernel: str) -> StageRun:
    """Execute one stage notebook into ``folder/notebooks``; a user error inside it becomes InputError."""
    import papermill as pm
    from papermill.exceptions import PapermillExecutionError

    source = notebooks_dir() / STAGES[stage]
    target = folder / "notebooks" / STAGES[stage]
    start = time.perf_counter()
    try:
        pm.execute_notebook(str(source), str(target), parameters={"params": params.to_dict(), "out_dir": str(folder)},
                            kernel_name=kernel, language="python", cwd=str(folder), progress_bar=False, log_output=False,
                            report_mode=False)
    except PapermillExecutionError as exc:
        message = str(exc.evalue).strip().splitlines()[0] if exc.evalue else exc.ename
        if exc.ename == "InputError":
            raise InputError(message) from None
        raise AnalysisError(f"stage '{stage}' failed: {exc.ename}: {message} (see {target})") from None
    return StageRun(stage, STAGES[stage], time.perf_counter() - start)


def check_model_up_front(params: Params, study: Any) -> None:
    """Stop before any stage when the model cannot be fitted for a reason the user can fix.

    A bad formula, a model variable with no observed value, a wrong outcome for the family
    or an impossible offset would otherwise surface in the middle of a run. A complete-case
    fit is cheap next to the stages; analysis failures are left for the stages to explain.
    """
    from .cases import check_model_data
    from .models import analysis_model

    model = analysis_model(params)
    outcome, covariates = check_model_data(study.data, model)
    for column in covariates:
        if study.data[column].notna().sum() == 0:
            raise InputError(f"{params.label}: analysis.formula uses '{column}', which has no observed values; "
                             "drop it from the formula or check its missing markers")
    try:
        model.fit(study.data)
    except AnalysisError:
        pass


def run_study(params: Params, out_root: Path, only: Optional[Sequence[str]] = None, log: Log = print,
              name: Optional[str] = None) -> Path:
    """Run the chosen stages and write a complete record; returns the record folder.

    The study is read once up front so that data errors stop the run before any notebook
    starts. On an input error nothing is left behind; on an analysis failure the partial
    record is kept under its temporary name for inspection and its path is given.
    """
    from .intake import load_study

    stages = resolve_stages(only, params, log)
    study = load_study(params)  # fails fast, exit 2, on bad data
    if params.analysis.formula and any(stage in MODEL_STAGES or stage == "report" for stage in stages):
        check_model_up_front(params, study)
    started = datetime.now(timezone.utc)
    folder = rec.RecordFolder.create(out_root, name or rec.record_name(params.study.name, started))
    kernel = ensure_kernel()
    runs: List[StageRun] = []
    try:
        (folder.temp / "params.yaml").write_text(params.to_yaml(), encoding="utf-8")
        for stage in stages:
            run = execute_stage(stage, params, folder.temp, kernel)
            runs.append(run)
            log(f"{stage:<12} {run.seconds:7.1f} s")
        pages = []
        bundle_start = time.perf_counter()
        for run in runs:
            page = f"{Path(run.notebook).stem}.html"
            rec.notebook_to_html(folder.temp / "notebooks" / run.notebook, folder.temp / "report" / page)
            pages.append((STAGE_TITLES[run.stage], page, run.seconds))
        log(f"{'html pages':<12} {time.perf_counter() - bundle_start:7.1f} s")
        source_dir = notebooks_dir()
        manifest = rec.build_manifest(
            params_dict=params.to_dict(), data_path=str(params.data_path), data_sha256=study.sha256 or "",
            stages=[{"stage": r.stage, "notebook": r.notebook, "seconds": round(r.seconds, 2)} for r in runs],
            notebook_digests={r.notebook: rec.sha256_file(source_dir / r.notebook) for r in runs},
            started=started, ended=datetime.now(timezone.utc), folder=folder.temp)
        rec.write_index(folder.temp, params.report.title or params.study.name, pages, manifest)
        rec.write_json(folder.temp / "manifest.json", manifest)
    except InputError:
        folder.discard()
        raise
    except AnalysisError as exc:
        raise AnalysisError(f"{exc}; the partial record is kept at {folder.temp}") from None
    except BaseException:
        folder.discard()
        raise
    return folder.commit()


@dataclass(frozen=True)
class VerifyResult:
    record: Path
    checks: Tuple[rec.TableCheck, ...]

    @property
    def ok(self) -> bool:
        return bool(self.checks) and all(c.ok for c in self.checks)


def verify_record(record: Path, log: Log = print) -> VerifyResult:
    """Re-execute a record's stages from its own params and data and compare every table."""
    import shutil

    record = Path(record)
    manifest = rec.read_manifest(record)
    data_path = Path(manifest["data"]["path"])
    if not data_path.is_file():
        raise InputError(f"{data_path}: the record's data file is gone; restore it to re-run this record")
    if rec.sha256_file(data_path) != manifest["data"]["sha256"]:
        raise InputError(f"{data_path}: the data file changed since the record was made (sha256 differs); "
                         "verify refuses to compare against different data")
    params_body = dict(manifest["params"])
    params_body.pop("source", None)
    params = Params.from_dict(params_body, source=str(record / "params.yaml"))
    stages = [s["stage"] for s in manifest["stages"]]
    for stage in stages:
        notebook = notebooks_dir() / STAGES[stage]
        recorded = manifest["notebooks"].get(STAGES[stage])
        if notebook.is_file() and recorded and rec.sha256_file(notebook) != recorded:
            log(f"note: notebook {notebook.name} has changed since the record was made")
    scratch = Path(tempfile.mkdtemp(prefix="gapbook-verify-"))
    try:
        rerun = run_study(params, scratch, only=stages, log=lambda line: log(f"rerun {line}"), name="rerun")
        checks = rec.compare_tables(record, rerun)
    finally:
        shutil.rmtree(scratch, ignore_errors=True)
    return VerifyResult(record, tuple(checks))
