"""gapbook: a Jupyter-first kit for analysing incomplete study data.

Most users fill a params file and run every stage (``gapbook run``). For a one-off question
in a notebook, the stages are plain functions taking data and keyword-only options::

    import gapbook
    study = gapbook.read_study(gapbook.demo_csv_path(), id="participant_id",
                               missing={"markers": ["", "NA", "?"], "reasons": {-9: "lost to follow-up"}})
    print(gapbook.audit_study(study, by=["arm"]).sentences)
    model = gapbook.AnalysisModel("hba1c_12m ~ arm + hba1c_0 + age", exposure="arm")
    print(gapbook.complete_case_analysis(study.data, model=model).estimates())

Every name in ``__all__`` is loaded on first use, so ``import gapbook`` (and with it the
command line) stays quick. The figures are in :mod:`gapbook.plots` (one module per stage,
each function taking a result object).
"""
from __future__ import annotations

from .lazy import lazy_exports

__version__ = "0.1.0"

# public name -> the module that defines it (relative to this package)
_EXPORTS = {
    # reading a study
    "read_study": "intake", "load_study": "intake", "Study": "intake",
    "Params": "params", "load_params": "params",
    # audit and mechanism
    "audit_study": "audit", "audit_frame": "audit",
    "assess_study": "mechanism", "assess_mechanism": "mechanism",
    "little_mcar_test": "little", "em_multivariate_normal": "little",
    # the analysis model under each strategy
    "AnalysisModel": "models", "fit_model": "models",
    "complete_case_analysis": "cases", "compare_strategies": "cases",
    "missing_category_analysis": "indicator",
    "plan_imputation": "impute", "impute_chained": "impute",
    "pool_fits": "pool", "rubin_pool": "pool", "barnard_rubin_df": "pool", "wald_d1": "pool",
    # departures from missing at random, simulation, report
    "delta_series": "sensitivity", "sensitivity_analysis": "sensitivity",
    "simulate_study": "simulate",
    "summarise": "report",
    # a stage as its notebook runs it, errors, the demo study
    "open_stage": "stage",
    "InputError": "errors", "AnalysisError": "errors",
    "demo_params": "demo", "demo_csv_path": "demo",
}

__all__ = ["__version__", *_EXPORTS]


__getattr__, __dir__ = lazy_exports(__name__, _EXPORTS)
