"""Speed of the chained-equations engine, printed side by side in one run.

1. Per sweep over the incomplete variables, on the same 10,000 x 9 continuous data with 4
   incomplete columns: ``gapbook.impute.impute_chained`` against statsmodels' chained
   equations (``MICEData.update_all``), both with predictive mean matching and 5 donors.
   Our sweep time is (time of 21 iterations - time of 1 iteration) / 20 for one chain, so
   set-up is not counted; theirs is the mean of ``update_all(1)`` calls after a warm-up;
   each is the best of 3 alternating runs.
2. 1,000,000 rows x 20 variables (10 incomplete, mixed types), m = 20, 10 iterations,
   n_jobs = 2: wall time and peak resident memory of this process and its workers
   (sampled from /proc every 0.2 s). Target: under 5 minutes and 4 GB.

Run: ``.venv/bin/python benchmarks/impute.py [--part 1|2|both] [--rows N] [--m M]``.
"""
from __future__ import annotations

import argparse
import os
import platform
import threading
import time
import warnings

import numpy as np
import pandas as pd
from scipy.special import expit

from gapbook.impute import impute_chained

SEED = 20261202


# ---------------------------------------------------------------------------
# part 1: per-sweep time against statsmodels

def continuous_data(n: int = 10_000, seed: int = SEED) -> pd.DataFrame:
    """9 correlated normal columns; x1..x4 missing at random given x5..x9 (about 15-30 %)."""
    rng = np.random.default_rng(seed)
    latent = rng.normal(size=(n, 3))
    loadings = rng.uniform(0.3, 0.9, size=(3, 9))
    values = latent @ loadings + rng.normal(scale=0.7, size=(n, 9))
    frame = pd.DataFrame(values, columns=[f"x{j}" for j in range(1, 10)])
    for j in range(1, 5):
        p = expit(-1.5 + 0.1 * j + 0.6 * frame[f"x{j + 4}"].to_numpy())
        frame.loc[rng.random(n) < p, f"x{j}"] = np.nan
    return frame


def time_ours(data: pd.DataFrame, sweeps: int = 20) -> float:
    impute_chained(data, m=1, iterations=2, seed=1, progress=False)              # warm-up (imports, caches)
    start = time.perf_counter()
    impute_chained(data, m=1, iterations=1, seed=1, progress=False)
    one = time.perf_counter() - start
    start = time.perf_counter()
    impute_chained(data, m=1, iterations=1 + sweeps, seed=1, progress=False)
    many = time.perf_counter() - start
    return (many - one) / sweeps


def time_statsmodels(data: pd.DataFrame, sweeps: int = 5) -> float:
    from statsmodels.imputation.mice import MICEData

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        engine = MICEData(data.copy(), k_pmm=5)
        engine.update_all(1)                                                     # warm-up
        start = time.perf_counter()
        for _ in range(sweeps):
            engine.update_all(1)
        return (time.perf_counter() - start) / sweeps


def part_one(repeats: int = 3) -> None:
    data = continuous_data()
    # best of several alternating runs, so a burst of load on a shared machine hits both alike
    ours, theirs = np.inf, np.inf
    for _ in range(repeats):
        ours = min(ours, time_ours(data))
        theirs = min(theirs, time_statsmodels(data))
    print(f"part 1: 10,000 x 9 continuous, 4 incomplete columns, pmm with 5 donors, one sweep (best of {repeats})")
    print(f"  gapbook impute_chained      {ours * 1000:9.1f} ms per sweep")
    print(f"  statsmodels MICEData        {theirs * 1000:9.1f} ms per sweep")
    print(f"  ratio statsmodels / gapbook {theirs / ours:9.1f} x (target: at least 10)")


# ---------------------------------------------------------------------------
# part 2: a million rows

def mixed_data(n: int, seed: int = SEED) -> pd.DataFrame:
    """20 variables: 10 complete (6 continuous, binary, 4-level nominal, count, 3-level ordinal) and
    10 incomplete (5 continuous, 1 count, 2 binary, a 3-level nominal, a 4-level ordinal), 8-30 % missing,
    missing at random given complete variables."""
    rng = np.random.default_rng(seed)
    latent = rng.normal(size=(n, 2))
    frame = {}
    for j in range(6):
        frame[f"c{j}"] = latent @ rng.uniform(0.2, 0.8, 2) + rng.normal(scale=0.8, size=n)
    frame["group"] = pd.Categorical(np.where(rng.random(n) < 0.5, "a", "b"))
    frame["site"] = pd.Categorical(rng.choice(["s1", "s2", "s3", "s4"], size=n))
    frame["visits"] = rng.poisson(np.exp(0.5 + 0.3 * latent[:, 0])).astype(float)
    frame["grade"] = pd.Categorical(np.array(["low", "mid", "high"])[np.digitize(latent[:, 1], [-0.5, 0.7])],
                                    categories=["low", "mid", "high"], ordered=True)
    for j in range(5):
        frame[f"y{j}"] = latent @ rng.uniform(0.3, 0.9, 2) + 0.3 * frame["c0"] + rng.normal(scale=0.7, size=n)
    frame["events"] = rng.poisson(np.exp(0.2 + 0.4 * latent[:, 1])).astype(float)
    frame["smoker"] = pd.Categorical(np.where(rng.random(n) < expit(-0.5 + latent[:, 0]), "yes", "no"),
                                     categories=["no", "yes"])
    frame["treated"] = pd.Categorical(np.where(rng.random(n) < expit(0.3 * latent[:, 1]), "yes", "no"),
                                      categories=["no", "yes"])
    frame["region"] = pd.Categorical(np.array(["north", "south", "west"])[
        np.digitize(latent[:, 0] + rng.logistic(size=n) * 0.5, [-0.4, 0.6])], categories=["north", "south", "west"])
    frame["stage"] = pd.Categorical(np.array(["I", "II", "III", "IV"])[
        np.digitize(latent[:, 1] + rng.logistic(size=n) * 0.5, [-0.8, 0.1, 1.0])],
        categories=["I", "II", "III", "IV"], ordered=True)
    data = pd.DataFrame(frame)
    incomplete = ["y0", "y1", "y2", "y3", "y4", "events", "smoker", "treated", "region", "stage"]
    for k, name in enumerate(incomplete):
        p = expit(-2.2 + 0.1 * k + 0.5 * data[f"c{k % 6}"].to_numpy())
        data.loc[rng.random(n) < p, name] = np.nan
    return data


class PeakMemory:
    """Peak resident memory of this process plus its child processes, sampled from /proc."""

    def __init__(self, interval: float = 0.2):
        self.interval, self.peak, self._stop = interval, 0, threading.Event()

    @staticmethod
    def _rss(pid: int) -> int:
        try:
            with open(f"/proc/{pid}/status") as handle:
                for line in handle:
                    if line.startswith("VmRSS:"):
                        return int(line.split()[1]) * 1024
        except OSError:
            return 0
        return 0

    @staticmethod
    def _children(pid: int):
        found = []
        try:
            for task in os.listdir(f"/proc/{pid}/task"):
                with open(f"/proc/{pid}/task/{task}/children") as handle:
                    found.extend(int(c) for c in handle.read().split())
        except OSError:
            pass
        return found

    def _tree(self, pid: int):
        stack, seen = [pid], []
        while stack:
            current = stack.pop()
            seen.append(current)
            stack.extend(self._children(current))
        return seen

    def _run(self):
        while not self._stop.is_set():
            self.peak = max(self.peak, sum(self._rss(p) for p in self._tree(os.getpid())))
            time.sleep(self.interval)

    def __enter__(self):
        self._thread = threading.Thread(target=self._run, daemon=True)
        self._thread.start()
        return self

    def __exit__(self, *exc):
        self._stop.set()
        self._thread.join()


def part_two(rows: int, m: int, iterations: int, jobs: int) -> None:
    data = mixed_data(rows)
    missing = data.isna().mean()
    print(f"part 2: {rows:,} rows x {data.shape[1]} variables, {int((missing > 0).sum())} incomplete "
          f"({missing[missing > 0].min():.0%}-{missing.max():.0%} missing), m = {m}, {iterations} iterations, "
          f"n_jobs = {jobs}")
    with PeakMemory() as memory:
        start = time.perf_counter()
        result = impute_chained(data, m=m, iterations=iterations, seed=SEED, n_jobs=jobs, progress=False)
        elapsed = time.perf_counter() - start
    print(f"  methods: {', '.join(f'{k}={v}' for k, v in result.methods.items())}")
    print(f"  wall time      {elapsed:8.1f} s   (target: under 300 s)")
    print(f"  peak memory    {memory.peak / 2 ** 30:8.2f} GiB (this process and its workers; target: under 4 GiB)")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--part", choices=["1", "2", "both"], default="both")
    parser.add_argument("--rows", type=int, default=1_000_000)
    parser.add_argument("--m", type=int, default=20)
    parser.add_argument("--iterations", type=int, default=10)
    parser.add_argument("--jobs", type=int, default=2)
    args = parser.parse_args()
    print(f"machine: {platform.machine()}, {os.cpu_count()} cores, {platform.processor() or 'cpu'}; "
          f"Python {platform.python_version()}, numpy {np.__version__}, pandas {pd.__version__}; "
          f"load average {os.getloadavg()[0]:.1f}")
    if args.part in ("1", "both"):
        part_one()
    if args.part in ("2", "both"):
        part_two(args.rows, args.m, args.iterations, args.jobs)


if __name__ == "__main__":
    main()
