"""Speed of the audit stage: 1,000,000 rows x 30 variables, 5-40 % missing per variable.

Prints, side by side in one run, the time and peak memory of ``gapbook.audit.audit_study``
and of a plain-pandas baseline that builds the same core tables (missing counts with
``isna().sum()``, reason counts with ``value_counts``, patterns with a ``groupby`` on the
indicator frame, co-missingness with ``DataFrame.corr``), and their ratio.

The study is built directly as a :class:`gapbook.intake.Study` (intake is not timed here:
its cost is reading and normalising the file, not the audit). Run:
``.venv/bin/python benchmarks/audit.py [--rows N] [--repeats R]``.
"""
from __future__ import annotations

import argparse
import os
import platform
import resource
import time
import tracemalloc

import numpy as np
import pandas as pd

from gapbook.audit import audit_study
from gapbook.intake import Study, VariableInfo
from gapbook.vocabulary import NOT_APPLICABLE

SEED = 20261202
REASONS = ("blank", "declined", "lost to follow-up", "not measured")


def make_study(n_rows: int, n_vars: int = 30, seed: int = SEED) -> Study:
    """A synthetic study: variable j is missing with probability from 5 % to 40 %, reasons drawn at random.

    Two variables have a 'not applicable' block (a third of rows) so that path is timed too;
    one variable is a six-level group (clinic) used for the by-group table.
    """
    rng = np.random.default_rng(seed)
    rates = np.linspace(0.05, 0.40, n_vars)
    data, reasons, infos = {}, {}, {}
    categories = list(REASONS) + [NOT_APPLICABLE]
    clinic_codes = rng.integers(0, 6, n_rows)
    for j in range(n_vars):
        name = "clinic" if j == 0 else f"x{j:02d}"
        missing = rng.random(n_rows) < rates[j]
        codes = np.where(missing, rng.integers(0, len(REASONS), n_rows), -1)
        if j in (7, 8):
            codes = np.where(clinic_codes < 2, len(REASONS), codes)
        reasons[name] = pd.Categorical.from_codes(codes, categories=categories)
        if name == "clinic":
            data[name] = pd.Categorical.from_codes(np.where(missing, -1, clinic_codes),
                                                   categories=[f"C{k}" for k in range(1, 7)])
            infos[name] = VariableInfo(name, "nominal", True, "benchmark", levels=tuple(f"C{k}" for k in range(1, 7)),
                                       numeric_storage=False)
        else:
            values = rng.normal(size=n_rows)
            values[codes >= 0] = np.nan
            data[name] = values
            infos[name] = VariableInfo(name, "continuous", True, "benchmark")
    return Study(data=pd.DataFrame(data), reasons=pd.DataFrame(reasons), variables=infos,
                 ids=pd.Series(np.arange(1, n_rows + 1), name="row"), id_column=None,
                 range_issues=pd.DataFrame(columns=["variable", "id", "value", "rule", "action"]),
                 extreme_values=pd.DataFrame(columns=["variable", "id", "value", "median", "robust_z"]))


def pandas_baseline(study: Study) -> dict:
    """The same core tables with plain pandas calls."""
    indicators = study.missing
    counts = study.data.isna().sum()
    reason_counts = {c: study.reasons[c].value_counts() for c in study.reasons.columns}
    patterns = indicators.groupby(list(indicators.columns), sort=True).size().sort_values(ascending=False)
    incomplete = indicators.loc[:, indicators.any()]
    correlation = incomplete.astype(float).corr()
    by_group = indicators.groupby(study.data["clinic"], observed=True, dropna=False).sum()
    per_row = indicators.sum(axis=1).value_counts()
    return {"counts": counts, "reasons": reason_counts, "patterns": patterns, "corr": correlation,
            "by_group": by_group, "per_row": per_row}


def timed(function, repeats: int):
    best, value = float("inf"), None
    for _ in range(repeats):
        start = time.perf_counter()
        value = function()
        best = min(best, time.perf_counter() - start)
    return best, value


def peak_mib(function) -> float:
    """Peak memory allocated while the function runs (tracemalloc, which numpy reports to)."""
    tracemalloc.start()
    tracemalloc.reset_peak()
    function()
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    return peak / 2**20


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=1_000_000)
    parser.add_argument("--vars", type=int, default=30)
    parser.add_argument("--repeats", type=int, default=3)
    args = parser.parse_args()

    start = time.perf_counter()
    study = make_study(args.rows, args.vars)
    build = time.perf_counter() - start
    print(f"machine: {platform.machine()}, {os.cpu_count()} cores, {platform.python_version()}, "
          f"numpy {np.__version__}, pandas {pd.__version__}")
    print(f"study: {args.rows:,} rows x {args.vars} variables, built in {build:.2f} s (not timed below)")

    ours = lambda: audit_study(study, threshold=0.20, by=["clinic"], top_patterns=15)  # noqa: E731
    base = lambda: pandas_baseline(study)  # noqa: E731
    t_ours, result = timed(ours, args.repeats)
    t_base, reference = timed(base, args.repeats)
    m_ours, m_base = peak_mib(ours), peak_mib(base)
    rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024

    # The two must agree, or the comparison means nothing.
    assert (result.variables["n_missing"].to_numpy() == study.missing.sum().to_numpy()).all()
    assert result.n_patterns == len(reference["patterns"])
    assert np.allclose(result.comissingness_matrix.to_numpy(), reference["corr"].to_numpy())

    print(f"patterns: {result.n_patterns:,}; monotone: {result.monotone}")
    print(f"{'':24}{'time (s, best of ' + str(args.repeats) + ')':>24}{'peak alloc (MiB)':>20}")
    print(f"{'gapbook audit_study':24}{t_ours:>24.3f}{m_ours:>20.0f}")
    print(f"{'plain pandas baseline':24}{t_base:>24.3f}{m_base:>20.0f}")
    print(f"{'ratio ours / baseline':24}{t_ours / t_base:>24.2f}{m_ours / m_base:>20.2f}")
    print(f"process peak RSS (whole run, getrusage): {rss:.0f} MiB")


if __name__ == "__main__":
    main()
