"""The ``gapbook`` command: demo, new, check, run, verify.

Exit codes: 0 success; 2 bad input (params, data, paths) with a one-line message naming
the file, key, column or row; 1 an analysis failure, explained.
"""
from __future__ import annotations

import argparse
import shutil
import signal
import sys
import threading
from pathlib import Path
from typing import List, Optional, Sequence

from . import __version__
from .compute import LOCAL, check_cluster_address
from .errors import AnalysisError, InputError
from .text import counted, one_line

__all__ = ["main"]

TEMPLATE_NAME = "params_template.yaml"


def _print(line: str) -> None:
    """Every line the command prints: user text in it (file and folder names, params values, column names) is
    shown with control and bidirectional characters escaped (``\\u202e``), never obeyed by the terminal."""
    print(one_line(line), flush=True)


def _print_error(line: str) -> None:
    print(one_line(line), file=sys.stderr, flush=True)


def _stages(text: Optional[str]) -> Optional[List[str]]:
    """The stages ``--only`` names; None without the option. ``--only ,`` named none and ran every stage."""
    if text is None:
        return None
    stages = [s.strip() for s in text.split(",") if s.strip()]
    if not stages:
        raise InputError(f"--only: {text!r} names no stage; give stages separated by commas, e.g. audit,mechanism")
    return stages


def _confirm_cluster(params, stages: Sequence[str], given: Optional[str]) -> None:
    """Refuse to send work to ``compute.cluster`` unless the command line names the same scheduler (``--cluster``).

    Work sent to a Dask cluster carries participant values, and its results come back pickled:
    unpickling runs whatever code the other side chose. A params file can come from anyone, and
    nothing in one may run code here, so a params file alone never starts that; the person
    running the command confirms the address they control.
    """
    from .pipeline import CLUSTER_STAGES

    confirmed = None
    if given is not None:
        try:
            confirmed = check_cluster_address(given)
        except InputError as exc:
            raise InputError(f"--cluster: {exc.message}") from None
    cluster = params.compute.cluster
    if cluster == LOCAL:
        if confirmed is not None:
            raise InputError(f"--cluster {confirmed}: the params' compute.cluster is local ({params.source}); "
                             "name the scheduler in compute.cluster too, or leave --cluster out")
        return
    if confirmed == cluster or not any(stage in CLUSTER_STAGES for stage in stages):
        return
    raise InputError(f"{params.source}: compute.cluster {cluster} would receive participant values and send back "
                     "results that are unpickled here, which runs code the cluster chooses; a params file alone "
                     f"never starts that: if you control that cluster, add --cluster {cluster} to the command")


def _run_and_print(params, args: argparse.Namespace) -> int:
    """Check, run the stages (one line each), and print the record's path last (the contract scripts rely on)."""
    from .pipeline import preflight
    from .runner import run_study

    plan = preflight(params, only=_stages(args.only), log=_print)
    _confirm_cluster(params, plan.stages, getattr(args, "cluster", None))
    if params.compute.cluster != LOCAL:  # before any data leaves this machine, say where it goes
        _print(f"compute: {plan.compute}")
    record = run_study(plan, Path(args.out), log=_print)
    _print(str(record))
    return 0


DEMO_STUDIES = ("trial", "followup")  # the one-visit trial; the follow-up trial with visits and dropout


def cmd_demo(args: argparse.Namespace) -> int:
    from .demo import demo_params
    from .followup.demo import followup_demo_params

    return _run_and_print(followup_demo_params() if args.study == "followup" else demo_params(), args)


def cmd_run(args: argparse.Namespace) -> int:
    from .params import load_params

    return _run_and_print(load_params(args.params), args)


def cmd_check(args: argparse.Namespace) -> int:
    """Everything ``run`` checks before its first stage (the same function), and a short description."""
    from .params import load_params
    from .pipeline import preflight

    params = load_params(args.params)
    plan = preflight(params, only=_stages(args.only), log=_print)
    _confirm_cluster(params, plan.stages, args.cluster)
    data = plan.data
    _print(f"params: {params.source}")
    _print(f"data:   {data.source} ({data.n_rows} rows, {len(data.columns)} variables, sha256 {data.sha256[:12]}; "
           f"read with {data.engine})")
    if data.rows_kept is not None:
        kept = data.rows_kept
        _print(f"rows:   {kept.n_kept:,} of {kept.n_read:,} kept by data.keep_rows ({one_line(kept.condition, 200)})")
    _print(f"missing: {counted(data.missing_cells, 'cell')} in {counted(data.incomplete_variables, 'variable')}; "
           f"{counted(data.complete_rows, 'row')} complete")
    for note in data.notes:
        _print(f"note: {note}")
    for note in plan.notes:
        _print(f"note: {note}")
    if data.range_issues:
        _print(f"range: {data.range_issues} values outside their plausible range (listed by the audit stage)")
    if plan.model is not None:
        outcome, used = plan.model
        event = params.analysis.event_column()
        follow_up = (f" (follow-up time; event column {event}, ties {params.analysis.ties})"
                     if event is not None else "")
        _print(f"model: {params.analysis.family} model of {outcome}{follow_up} on {', '.join(used)}")
    origins = {nb.origin for nb in plan.notebooks}
    _print(f"stages: {', '.join(plan.stages)} ({' and '.join(sorted(origins))} notebooks)")
    _print(f"compute: {plan.compute}")
    _print("ok")
    return 0


def cmd_new(args: argparse.Namespace) -> int:
    from .demo import data_dir
    from .pipeline import kit_notebooks_dir

    target = Path(args.dir)
    if target.exists() and not target.is_dir():
        raise InputError(f"{target}: a file of that name exists (gapbook new makes a folder); give the name of a "
                         "new folder, e.g. 'gapbook new mystudy', and put the data file in its data/ afterwards")
    if target.exists() and any(target.iterdir()):
        raise InputError(f"{target}: the folder exists and is not empty; give a new folder name")
    try:
        (target / "data").mkdir(parents=True, exist_ok=True)
        (target / "records").mkdir(exist_ok=True)
        shutil.copyfile(data_dir() / TEMPLATE_NAME, target / "params.yaml")
        notebooks = target / "notebooks"
        notebooks.mkdir(exist_ok=True)
        for notebook in sorted(kit_notebooks_dir().glob("*.ipynb")):
            shutil.copyfile(notebook, notebooks / notebook.name)
        (target / "data" / "README.txt").write_text(
            "Put the study's data file here (CSV, TSV, XLSX or Parquet) and set data.path in ../params.yaml.\n"
            "gapbook only reads it; it never changes or copies the file.\n", encoding="utf-8")
    except OSError as exc:
        raise InputError(f"{target}: cannot create the study folder ({exc.strerror}); choose another place") from None
    _print(f"created {target}: edit {target / 'params.yaml'}, then run 'gapbook check {target / 'params.yaml'}'")
    _print("the stage notebooks in notebooks/ are the ones 'run' uses for this study; edit them to change a stage")
    return 0


def cmd_verify(args: argparse.Namespace) -> int:
    from .runner import verify_record

    result = verify_record(Path(args.record), log=_print, data=Path(args.data) if args.data else None,
                           trust_record_notebooks=args.trust_record_notebooks)
    if result.integrity:
        for check in result.integrity:
            _print(check.line())
        _print(f"verify: {len(result.integrity)} file(s) of the record differ from its manifest; nothing was re-run")
        return 1
    for check in result.checks:
        _print(check.line())
    tables = [c for c in result.checks if not c.name.startswith("figures/")]
    figures = [c for c in result.checks if c.name.startswith("figures/")]
    _print(f"verify: every file matches the manifest; {sum(c.ok for c in tables)} of {len(tables)} tables and "
           f"{sum(c.ok for c in figures)} of {len(figures)} figures match the re-run")
    _print(PAGES_NOT_RERUN)
    return 0 if result.ok else 1


# The manifest is not signed, so a page edited with its digest fixed passes the file check; the
# re-run compares tables and figures only. Said on every verify, so a reader never takes a pass
# as a check of the pages.
PAGES_NOT_RERUN = ("verify: the pages (report/*.html) and the notebooks' outputs were checked against the "
                   "manifest only, not against the re-run; for results you can rely on, read the tables and "
                   "figures, or the pages of a run of your own")


def _record_options(command: argparse.ArgumentParser) -> None:
    command.add_argument("--out", default="records", help="folder for the record (default: ./records)")
    command.add_argument("--only", help="comma-separated stages to run, e.g. audit,mechanism")


CLUSTER_HELP = ("confirm the Dask scheduler the params' compute.cluster names (the same address); without it, "
                "work is never sent to a cluster")


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(prog="gapbook", description="Analyse incomplete study data and keep a re-runnable record.")
    parser.add_argument("--version", action="version", version=f"gapbook {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    demo = sub.add_parser("demo", help="run every stage on a demo study")
    demo.add_argument("--study", choices=DEMO_STUDIES, default="trial",
                      help="trial: one outcome per participant (default); followup: a trial with visits and dropout")
    _record_options(demo)
    demo.set_defaults(func=cmd_demo)
    new = sub.add_parser("new", help="scaffold a study folder (params file, notebooks, data/)")
    new.add_argument("dir")
    new.set_defaults(func=cmd_new)
    check = sub.add_parser("check", help="validate params and data without running notebooks")
    check.add_argument("params")
    check.add_argument("--only", help="comma-separated stages 'run --only' would run")
    check.add_argument("--cluster", metavar="ADDRESS", help=CLUSTER_HELP)
    check.set_defaults(func=cmd_check)
    run = sub.add_parser("run", help="execute the stages and write a record")
    run.add_argument("params")
    _record_options(run)
    run.add_argument("--cluster", metavar="ADDRESS", help=CLUSTER_HELP)
    run.set_defaults(func=cmd_run)
    verify = sub.add_parser("verify", help="check a record's files, re-execute it and compare every table")
    verify.add_argument("record")
    verify.add_argument("--data", help="the record's data file, if it has moved (its sha256 must match)")
    verify.add_argument("--trust-record-notebooks", action="store_true",
                        help="run the record's own notebooks where they are not this kit's (runs their code)")
    verify.set_defaults(func=cmd_verify)
    return parser


class Terminated(KeyboardInterrupt):
    """SIGTERM, handled like Ctrl-C: a clean stop."""


def _on_sigterm(signum, frame):  # pragma: no cover - exercised through a subprocess
    signal.signal(signal.SIGTERM, signal.SIG_IGN)  # one stop is enough; let the clean-up finish
    raise Terminated()


def main(argv: Optional[Sequence[str]] = None) -> int:
    """Run the ``gapbook`` command: demo, new, check, run or verify.

    Parameters
    ----------
    argv : sequence of str, optional
        The arguments after ``gapbook``; default the process's own.

    Returns
    -------
    int
        The exit code: 0 success, 2 a user error (one line on standard error), 1 an analysis
        failure, 130/143 when stopped by an interrupt or SIGTERM.
    """
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "func", None):
        parser.print_help()
        return 2
    previous = None
    if threading.current_thread() is threading.main_thread():
        previous = signal.signal(signal.SIGTERM, _on_sigterm)
    try:
        return args.func(args)
    except InputError as exc:
        _print_error(f"gapbook: error: {exc}")
        return 2
    except AnalysisError as exc:
        _print_error(f"gapbook: analysis failed: {exc}")
        return 1
    except KeyboardInterrupt as exc:
        terminated = isinstance(exc, Terminated)
        _print_error(f"gapbook: stopped by {'SIGTERM' if terminated else 'an interrupt'}; kernels shut down, "
                     "no record was written")
        return 143 if terminated else 130
    finally:
        if previous is not None:
            signal.signal(signal.SIGTERM, previous)


if __name__ == "__main__":
    sys.exit(main())
