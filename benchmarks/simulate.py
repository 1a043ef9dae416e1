"""Bias simulation: the least-squares fast path against fitting every model through statsmodels formulas.

Both runs use the demo study, the same seed and the same replicates (n_jobs=1, R=20,
MCAR/MAR/MNAR, complete case + missing category + multiple imputation with m=5); the
script checks they give the same performance table before printing times and the ratio.
"""
from __future__ import annotations

import dataclasses
import os
import platform
import time

import numpy as np

from gapbook import simulate
from gapbook.demo import demo_params
from gapbook.intake import load_study
from gapbook.models import analysis_model


def main(replicates: int = 20) -> None:
    params = demo_params()
    study = load_study(params)
    design = simulate.design_from_data(study.data, analysis_model(params), missing=study.missing, types=study.types)
    fast = simulate.default_strategies(design, m=5, iterations=simulate.SIMULATION_ITERATIONS)
    slow = {name: dataclasses.replace(s, fast=None) for name, s in fast.items()}
    timings = {}
    results = {}
    for label, strategies in (("fast path", fast), ("statsmodels formulas", slow)):
        started = time.perf_counter()
        results[label] = simulate.run_simulation(design, strategies, replicates=replicates, seed=1, n_jobs=1,
                                                 progress=False)
        timings[label] = time.perf_counter() - started
    a, b = (results[k].performance for k in ("fast path", "statsmodels formulas"))
    numeric = [c for c in a.columns if a[c].dtype.kind == "f"]
    np.testing.assert_allclose(a[numeric].to_numpy(), b[numeric].to_numpy(), rtol=1e-7, atol=1e-10)
    print(f"machine: {platform.machine()}, {os.cpu_count()} cores, Python {platform.python_version()}; "
          f"load average {os.getloadavg()[0]:.1f}")
    for label, seconds in timings.items():
        print(f"{label:22s} {seconds:6.1f} s for {replicates} replicates ({seconds / replicates:.2f} s each)")
    print(f"ratio fast / statsmodels: {timings['fast path'] / timings['statsmodels formulas']:.2f}")


if __name__ == "__main__":
    main()
