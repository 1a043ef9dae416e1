"""The ``gapbook`` command: demo, new, check, run, verify.

Exit codes: 0 success; 2 bad input (params, data, paths) with a one-line message naming
the file, key, column or row; 1 an analysis failure, explained.
"""
from __future__ import annotations

import argparse
import shutil
import sys
from pathlib import Path
from typing import List, Optional, Sequence

from . import __version__
from .errors import AnalysisError, InputError, did_you_mean

TEMPLATE_NAME = "params_template.yaml"


def _print(line: str) -> None:
    print(line, flush=True)


def _stages(text: Optional[str]) -> Optional[List[str]]:
    return [s for s in text.split(",") if s.strip()] if text else None


def _run_and_print(params, args: argparse.Namespace) -> int:
    """Run the stages, one line each, and print the record's path last (the contract scripts rely on)."""
    from .runner import run_study

    record = run_study(params, Path(args.out), only=_stages(args.only), log=_print)
    _print(str(record))
    return 0


def cmd_demo(args: argparse.Namespace) -> int:
    from .demo import demo_params

    return _run_and_print(demo_params(), args)


def cmd_run(args: argparse.Namespace) -> int:
    from .params import load_params

    return _run_and_print(load_params(args.params), args)


def cmd_check(args: argparse.Namespace) -> int:
    from .intake import load_study
    from .models import check_formula
    from .params import load_params

    params = load_params(args.params)
    study = load_study(params)
    _print(f"params: {params.source}")
    _print(f"data:   {study.source} ({len(study.data)} rows, {study.data.shape[1]} variables, sha256 {study.sha256[:12]})")
    missing = study.missing
    incomplete = [c for c in missing.columns if missing[c].any()]
    _print(f"missing: {int(missing.to_numpy().sum())} cells in {len(incomplete)} variables; "
           f"{int((~missing.any(axis=1)).sum())} rows complete")
    for note in study.notes:
        _print(f"note: {note}")
    if len(study.range_issues):
        _print(f"range: {len(study.range_issues)} values outside their plausible range (listed by the audit stage)")
    for column in params.audit.by:
        if column not in study.data.columns:
            raise InputError(f"{params.label}: audit.by '{column}' is not a column{did_you_mean(column, study.data.columns)}")
    if params.analysis.formula:
        outcome, used = check_formula(params.analysis.formula, list(study.data.columns))
        _print(f"model: {params.analysis.family} model of {outcome} on {', '.join(used)}")
    _print("ok")
    return 0


def cmd_new(args: argparse.Namespace) -> int:
    from .demo import data_dir
    from .runner import notebooks_dir

    target = Path(args.dir)
    if target.exists() and any(target.iterdir()):
        raise InputError(f"{target}: the folder exists and is not empty; give a new folder name")
    (target / "data").mkdir(parents=True, exist_ok=True)
    (target / "records").mkdir(exist_ok=True)
    shutil.copyfile(data_dir() / TEMPLATE_NAME, target / "params.yaml")
    notebooks = target / "notebooks"
    notebooks.mkdir(exist_ok=True)
    for notebook in sorted(notebooks_dir().glob("*.ipynb")):
        shutil.copyfile(notebook, notebooks / notebook.name)
    (target / "data" / "README.txt").write_text(
        "Put the study's data file here (CSV, TSV, XLSX or Parquet) and set data.path in ../params.yaml.\n"
        "gapbook only reads it; it never changes or copies the file.\n", encoding="utf-8")
    _print(f"created {target}: edit {target / 'params.yaml'}, then run 'gapbook check {target / 'params.yaml'}'")
    return 0


def cmd_verify(args: argparse.Namespace) -> int:
    from .runner import verify_record

    result = verify_record(Path(args.record), log=_print)
    for check in result.checks:
        _print(f"{'ok  ' if check.ok else 'FAIL'} {check.table}: {check.status}{(' - ' + check.detail) if check.detail else ''}")
    matched = sum(c.ok for c in result.checks)
    _print(f"verify: {matched} of {len(result.checks)} tables match")
    return 0 if result.ok else 1


def _record_options(command: argparse.ArgumentParser) -> None:
    command.add_argument("--out", default="records", help="folder for the record (default: ./records)")
    command.add_argument("--only", help="comma-separated stages to run, e.g. audit,mechanism")


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(prog="gapbook", description="Analyse incomplete study data and keep a re-runnable record.")
    parser.add_argument("--version", action="version", version=f"gapbook {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    demo = sub.add_parser("demo", help="run every stage on the demo study")
    _record_options(demo)
    demo.set_defaults(func=cmd_demo)
    new = sub.add_parser("new", help="scaffold a study folder (params file, notebooks, data/)")
    new.add_argument("dir")
    new.set_defaults(func=cmd_new)
    check = sub.add_parser("check", help="validate params and data without running notebooks")
    check.add_argument("params")
    check.set_defaults(func=cmd_check)
    run = sub.add_parser("run", help="execute the stages and write a record")
    run.add_argument("params")
    _record_options(run)
    run.set_defaults(func=cmd_run)
    verify = sub.add_parser("verify", help="re-execute a record and compare every table")
    verify.add_argument("record")
    verify.set_defaults(func=cmd_verify)
    return parser


def main(argv: Optional[Sequence[str]] = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "func", None):
        parser.print_help()
        return 2
    try:
        return args.func(args)
    except InputError as exc:
        print(f"gapbook: error: {exc}", file=sys.stderr, flush=True)
        return 2
    except AnalysisError as exc:
        print(f"gapbook: analysis failed: {exc}", file=sys.stderr, flush=True)
        return 1
    except KeyboardInterrupt:
        print("gapbook: interrupted; no record was written", file=sys.stderr)
        return 130


if __name__ == "__main__":
    sys.exit(main())
