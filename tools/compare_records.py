"""Compare the tables of two records byte for byte: did a change leave the results as they were?

A restructuring that promises "behaviour unchanged" is checked by running the same demo before
and after it and comparing every table the records hold (``tables/*.csv`` and the drafted
``tables/*.md``). Nothing else is compared: the manifest carries timestamps, paths and durations
that legitimately differ between runs, and figures depend on fonts and library versions
(``gapbook verify`` checks those separately).

Usage::

    python tools/compare_records.py RECORD_BEFORE RECORD_AFTER

A record is a record folder, or a folder holding exactly one (what ``gapbook demo --out DIR``
leaves). Prints one line per table that differs (with the first differing line) or is in only
one record, then a summary; exits 0 when every table is byte-identical, 1 otherwise, 2 when a
folder is not a record.
"""
from __future__ import annotations

import argparse
import sys
from pathlib import Path
from typing import List, Optional, Sequence

TABLE_SUFFIXES = (".csv", ".md")


def record_folder(path: Path) -> Path:
    """The record folder at ``path``, or the only record folder inside it."""
    path = Path(path)
    if (path / "tables").is_dir():
        return path
    inside = [p for p in path.iterdir() if (p / "tables").is_dir()] if path.is_dir() else []
    if len(inside) != 1:
        raise SystemExit(f"{path}: not a record folder, nor a folder holding exactly one (found {len(inside)})")
    return inside[0]


def tables(record: Path) -> dict:
    return {p.name: p for p in sorted((record / "tables").iterdir()) if p.suffix in TABLE_SUFFIXES}


def first_difference(before: bytes, after: bytes) -> str:
    old, new = before.decode("utf-8", "replace").splitlines(), after.decode("utf-8", "replace").splitlines()
    for number, (a, b) in enumerate(zip(old, new), start=1):
        if a != b:
            return f"line {number}: {a[:120]!r} -> {b[:120]!r}"
    return f"{len(old)} lines -> {len(new)} lines (same up to the shorter)"


def compare(before: Path, after: Path) -> List[str]:
    """One line per table that is not byte-identical in the two records (empty when all are)."""
    old, new = tables(before), tables(after)
    problems = [f"only before: {name}" for name in sorted(set(old) - set(new))]
    problems += [f"only after: {name}" for name in sorted(set(new) - set(old))]
    for name in sorted(set(old) & set(new)):
        a, b = old[name].read_bytes(), new[name].read_bytes()
        if a != b:
            problems.append(f"differs: {name}: {first_difference(a, b)}")
    return problems


def main(argv: Optional[Sequence[str]] = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("before", type=Path)
    parser.add_argument("after", type=Path)
    args = parser.parse_args(argv)
    try:
        before, after = record_folder(args.before), record_folder(args.after)
    except SystemExit as stop:
        print(stop, file=sys.stderr)
        return 2
    problems = compare(before, after)
    for line in problems:
        print(line)
    shared = len(set(tables(before)) & set(tables(after)))
    print(f"{before.name} vs {after.name}: {shared} tables in both, "
          f"{'all byte-identical' if not problems else f'{len(problems)} differences'}")
    return 1 if problems else 0


if __name__ == "__main__":
    sys.exit(main())
