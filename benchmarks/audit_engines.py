"""The audit over a Parquet file: DuckDB engine against the pandas engine, side by side.

Builds a seeded study file under /tmp (never committed): N rows x 30 columns (an integer id,
a six-level text clinic, 28 measurements with 5-40 % missing, half of it blank and half the
reason code -9, values outside a declared range in two of them), then runs the whole audit
stage (intake and audit tables) with ``data.engine: duckdb`` and ``data.engine: pandas``,
each in a fresh process so its peak resident memory is its own. Where both run, the script
checks that every table is byte-identical and prints the time ratio.

Run: ``.venv/bin/python benchmarks/audit_engines.py [--rows 10000000] [--compare 1000000,3000000]``.
"""
from __future__ import annotations

import argparse
import json
import os
import platform
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

SEED = 20261202
N_MEASURES = 28
CHUNK = 1_000_000


def make_file(path: Path, n_rows: int, seed: int = SEED) -> None:
    """Write the study file in row groups of a million rows (seeded, the same bytes for the same n)."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    rng = np.random.default_rng(seed)
    rates = np.linspace(0.05, 0.40, N_MEASURES + 1)
    fields = [("pid", pa.int64()), ("clinic", pa.string())] + [(f"x{j:02d}", pa.float64())
                                                              for j in range(1, N_MEASURES + 1)]
    schema = pa.schema(fields)
    clinics = pa.array([f"C{k}" for k in range(1, 7)])
    with pq.ParquetWriter(path, schema) as writer:
        for start in range(0, n_rows, CHUNK):
            m = min(CHUNK, n_rows - start)
            codes = rng.integers(0, 6, m)
            clinic = pa.array(np.asarray(clinics)[codes], type=pa.string(),
                              mask=rng.random(m) < rates[0])
            arrays = [pa.array(np.arange(start + 1, start + m + 1, dtype=np.int64)), clinic]
            for j in range(1, N_MEASURES + 1):
                values = np.round(rng.normal(50, 10, m), 1)
                missing = rng.random(m) < rates[j]
                coded = missing & (rng.random(m) < 0.5)
                values[coded] = -9.0
                arrays.append(pa.array(values, mask=missing & ~coded))
            writer.write_table(pa.Table.from_arrays(arrays, schema=schema), row_group_size=CHUNK)


def params_for(path: Path, engine: str):
    from gapbook.params import Params

    variables = {"clinic": {"type": "nominal"}}
    variables.update({f"x{j:02d}": {"type": "continuous"} for j in range(1, N_MEASURES + 1)})
    variables["x01"] = {"type": "continuous", "range": [20, 80]}
    variables["x02"] = {"type": "continuous", "range": [15, 85], "out_of_range": "missing"}
    return Params.from_dict({"data": {"path": str(path), "id": "pid", "engine": engine},
                             "variables": variables, "missing": {"reasons": {-9: "refused"}},
                             "audit": {"by": ["clinic"]}})


def child(path: Path, engine: str, out: Path) -> None:
    """One engine's whole audit stage; prints a JSON line with its time and peak memory."""
    from gapbook.stage import StageContext, write_csv

    start = time.perf_counter()
    result = StageContext(params=params_for(path, engine), out_dir=out).audit()
    seconds = time.perf_counter() - start
    for name, table in result.tables().items():
        write_csv(table, out / f"{name}.csv")
    usage = resource.getrusage(resource.RUSAGE_SELF)
    peak = usage.ru_maxrss / 2**20  # KiB -> GiB
    # CPU seconds of the whole process (every DuckDB thread): on a shared machine the wall time mostly
    # says how busy the machine was, the CPU time what the work cost.
    print(json.dumps({"engine": engine, "seconds": seconds, "cpu_seconds": usage.ru_utime + usage.ru_stime,
                      "peak_gib": peak, "patterns": result.n_patterns}))


def measure(path: Path, engine: str, out: Path) -> dict:
    done = subprocess.run([sys.executable, __file__, "--child", engine, "--file", str(path), "--out", str(out)],
                          capture_output=True, text=True, check=True)
    return json.loads(done.stdout.strip().splitlines()[-1])


def same_tables(a: Path, b: Path) -> bool:
    names = sorted(p.name for p in a.glob("*.csv"))
    return names == sorted(p.name for p in b.glob("*.csv")) and all(
        (a / n).read_bytes() == (b / n).read_bytes() for n in names)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=10_000_000)
    parser.add_argument("--compare", default="1000000,3000000", help="sizes run with both engines")
    parser.add_argument("--child")
    parser.add_argument("--file")
    parser.add_argument("--out")
    args = parser.parse_args()
    if args.child:
        child(Path(args.file), args.child, Path(args.out))
        return
    import duckdb
    import pandas as pd

    print(f"machine: {platform.machine()}, {os.cpu_count()} cores, Python {platform.python_version()}, "
          f"duckdb {duckdb.__version__}, pandas {pd.__version__}, numpy {np.__version__}")
    with tempfile.TemporaryDirectory(prefix="gapbook-bench-") as tmp:
        tmp = Path(tmp)
        for rows in [int(r) for r in args.compare.split(",") if r]:
            path = tmp / f"study_{rows}.parquet"
            make_file(path, rows)
            duck = measure(path, "duckdb", tmp / f"duckdb_{rows}")
            pand = measure(path, "pandas", tmp / f"pandas_{rows}")
            same = same_tables(tmp / f"duckdb_{rows}", tmp / f"pandas_{rows}")
            print(f"{rows:>11,} rows ({path.stat().st_size / 2**20:,.0f} MiB, {duck['patterns']:,} patterns): "
                  f"duckdb {duck['seconds']:.1f} s ({duck['cpu_seconds']:.1f} CPU s), {duck['peak_gib']:.2f} GiB; "
                  f"pandas {pand['seconds']:.1f} s ({pand['cpu_seconds']:.1f} CPU s), {pand['peak_gib']:.2f} GiB; "
                  f"time ratio duckdb/pandas {duck['seconds'] / pand['seconds']:.2f} "
                  f"(CPU {duck['cpu_seconds'] / pand['cpu_seconds']:.2f}); "
                  f"tables byte-identical: {same}")
            path.unlink()
        path = tmp / f"study_{args.rows}.parquet"
        start = time.perf_counter()
        make_file(path, args.rows)
        made = time.perf_counter() - start
        duck = measure(path, "duckdb", tmp / "duckdb_big")
        print(f"{args.rows:>11,} rows ({path.stat().st_size / 2**20:,.0f} MiB, written in {made:.0f} s, "
              f"{duck['patterns']:,} patterns): duckdb {duck['seconds']:.1f} s ({duck['cpu_seconds']:.1f} CPU s), "
              f"peak resident {duck['peak_gib']:.2f} GiB")


if __name__ == "__main__":
    main()
