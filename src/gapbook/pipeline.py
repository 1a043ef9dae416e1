"""The stages, where their notebooks come from, and the one pre-flight check before a run.

``check`` and ``run`` (and ``verify``'s re-run) all go through :func:`preflight`, so a
params file that ``check`` accepts is one ``run`` starts: every up-front validation lives
here and nowhere else. Add a new up-front check to :func:`preflight` (or a helper it calls).

Notebooks: each stage runs the notebook in the study folder's ``notebooks/`` (the copies
``gapbook new`` made, which a team may edit) when present, otherwise the kit's own. The
kit's notebooks are the ones installed with the package (the wheel carries them as
``gapbook/notebooks``), or the repository's ``notebooks/`` in a source checkout.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Dict, List, Mapping, Optional, Sequence, Tuple

from .errors import InputError, did_you_mean
from .intake import sha256_of as sha256_file  # the one file digest, shared with intake and record
from .params import Params
from .row_filter import RowsKept
from .vocabulary import FOLLOWUP_IMPUTED_STRATEGIES

__all__ = ["STAGES", "STAGE_TITLES", "sha256_file", "kit_notebooks_dir", "StageNotebook", "resolve_stages",
           "check_model_up_front", "check_cox_up_front", "Plan", "preflight"]

STAGES: Dict[str, str] = {
    "audit": "01_audit.ipynb",
    "mechanism": "02_mechanism.ipynb",
    "cases": "03_cases.ipynb",
    "indicator": "04_indicator.ipynb",
    "followup": "04b_followup.ipynb",   # after the case strategies; 04b keeps the later stages' file names
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
    "followup": "Follow-up: the effect at every visit under every strategy",
    "impute": "Multiple imputation by chained equations",
    "sensitivity": "Sensitivity to data missing not at random",
    "simulate": "Bias simulation for a study like this one",
    "report": "Summary for reporting",
}
MODEL_STAGES = frozenset({"cases", "indicator", "followup", "impute", "sensitivity", "simulate"})
# Stages that analyse one row per participant: a follow-up study (a design section) skips them,
# its rows being visits; FOLLOWUP_STAGES run only for a follow-up study.
PARTICIPANT_ROW_STAGES = frozenset({"cases", "indicator", "impute", "sensitivity", "simulate"})
FOLLOWUP_STAGES = frozenset({"followup"})
# Stages that cannot yet handle a model family, and why (skipped with that sentence, never run half-way).
FAMILY_GAPS: Dict[str, Dict[str, str]] = {}
CLUSTER_STAGES = ("followup", "impute", "sensitivity", "simulate")  # their parallel tasks run where compute.cluster says
KIT, STUDY, RECORD = "kit", "study", "record"

Log = Callable[[str], None]


def kit_notebooks_dir() -> Path:
    """The installed kit's notebooks: inside the package (a wheel), else the source checkout's ``notebooks/``.

    Returns
    -------
    Path
        The folder holding one ``NN_<stage>.ipynb`` per stage.
    """
    packaged = Path(__file__).resolve().parent / "notebooks"
    if any(packaged.glob("*.ipynb")):
        return packaged
    return Path(__file__).resolve().parents[2] / "notebooks"


def study_notebooks_dir(params: Params) -> Optional[Path]:
    """The ``notebooks/`` folder beside the params file, when it is a study folder (not a record)."""
    if not params.source:
        return None
    folder = Path(params.source).parent
    # A record also has notebooks/ beside its params.yaml: those are someone's executed
    # notebooks, never run implicitly (verify runs them only with an explicit trust flag).
    if (folder / "manifest.json").exists():
        return None
    candidate = folder / "notebooks"
    return candidate if candidate.is_dir() else None


@dataclass(frozen=True)
class StageNotebook:
    """The notebook one stage runs: its path, where it came from, and whether it is the kit's."""

    stage: str
    path: Path
    origin: str  # "kit", "study" (the study folder's copy) or "record" (a record's own, trusted by flag)
    sha256: str
    kit_sha256: Optional[str]

    @property
    def file(self) -> str:
        return STAGES[self.stage]

    @property
    def differs_from_kit(self) -> bool:
        return self.sha256 != self.kit_sha256


def stage_notebooks(params: Params, override: Optional[Mapping[str, Path]] = None,
                    origin: str = RECORD) -> Dict[str, StageNotebook]:
    """The notebook for every stage that has one, study folder's copy first (``override`` replaces both)."""
    kit = kit_notebooks_dir()
    study = study_notebooks_dir(params) if override is None else None
    found: Dict[str, StageNotebook] = {}
    for stage, file in STAGES.items():
        kit_path = kit / file
        kit_sha = sha256_file(kit_path) if kit_path.is_file() else None
        if override is not None:
            if stage in override:
                path = Path(override[stage])
                sha = sha256_file(path)
                found[stage] = StageNotebook(stage, path, KIT if sha == kit_sha else origin, sha, kit_sha)
        elif study is not None and (study / file).is_file():
            found[stage] = StageNotebook(stage, study / file, STUDY, sha256_file(study / file), kit_sha)
        elif kit_sha is not None:
            found[stage] = StageNotebook(stage, kit_path, KIT, kit_sha, kit_sha)
    return found


def resolve_stages(only: Optional[Sequence[str]], params: Optional[Params] = None, log: Optional[Log] = None,
                   available: Optional[Sequence[str]] = None) -> List[str]:
    """The stages to run, in pipeline order; unknown names exit 2 with a suggestion.

    Without ``--only``, stages that need the analysis model are skipped (and said so) when
    the params have no ``analysis.formula``: describing the missing data needs no model.

    Parameters
    ----------
    only : sequence of str, optional
        The stages asked for (``--only``); default every stage.
    params : Params, optional
        The params; without ``analysis.formula`` the model stages are skipped.
    log : callable, optional
        Receives the line naming skipped stages.
    available : sequence of str, optional
        The stages there are notebooks for; default those the installed kit has.

    Returns
    -------
    list of str
        Stage names in pipeline order.
    """
    if available is None:
        available = [s for s in STAGES if (kit_notebooks_dir() / STAGES[s]).is_file()]
    available = [s for s in STAGES if s in set(available)]
    if not available:
        raise InputError(f"{kit_notebooks_dir()}: no stage notebooks found; reinstall gapbook "
                         "(pip install gapbook, or make demo in a source checkout)")
    no_model = params is not None and not params.analysis.formula
    followup = params is not None and params.is_followup
    gaps = FAMILY_GAPS.get(params.analysis.family, {}) if params is not None and not no_model else {}
    if not only:
        if params is not None:
            unsuited = FOLLOWUP_STAGES if not followup else PARTICIPANT_ROW_STAGES
            skipped = [s for s in available if s in unsuited]
            if skipped and log is not None:
                log(f"skipped: {', '.join(skipped)} ("
                    + ("they analyse one row per participant; a follow-up study (design section) is analysed by "
                       "the follow-up stage" if followup else "they are for follow-up studies, which have a design "
                       f"section in {params.label}") + ")")
            available = [s for s in available if s not in unsuited]
        if no_model:
            skipped = [s for s in available if s in MODEL_STAGES]
            if skipped and log is not None:
                log(f"skipped: {', '.join(skipped)} (they need analysis.formula in {params.label})")
            return [s for s in available if s not in MODEL_STAGES]
        if log is not None:
            for stage in (s for s in available if s in gaps):
                log(f"skipped: {stage} (family {params.analysis.family}: {gaps[stage]})")
        return [s for s in available if s not in gaps]
    wanted = []
    for name in only:
        name = name.strip()
        if name not in STAGES:
            raise InputError(f"--only: '{name}' is not a stage{did_you_mean(name, STAGES)} "
                             f"(stages: {', '.join(STAGES)})")
        if name not in available:
            raise InputError(f"--only: stage '{name}' has no notebook (looked in {kit_notebooks_dir()})")
        if followup and name in PARTICIPANT_ROW_STAGES:
            raise InputError(f"{params.label}: stage '{name}' analyses one row per participant; a follow-up study "
                             "(design section) is analysed by the follow-up stage")
        if params is not None and not followup and name in FOLLOWUP_STAGES:
            raise InputError(f"{params.label}: stage '{name}' is for follow-up studies; add a design section "
                             "(subject, visit, planned visits) to the params")
        if no_model and name in MODEL_STAGES:
            raise InputError(f"{params.label}: stage '{name}' needs analysis.formula; add it to the analysis section "
                             "(e.g. formula: \"outcome ~ exposure + covariates\")")
        if name in gaps:
            raise InputError(f"--only: stage '{name}' does not run with family {params.analysis.family} in "
                             f"{params.label}: {gaps[name]}")
        wanted.append(name)
    return [s for s in STAGES if s in wanted]


def check_model_up_front(params: Params, study: Any) -> Tuple[str, List[str]]:
    """Stop before any stage when the model cannot be fitted for a reason the user can fix.

    A bad formula, a model variable with no observed value, a wrong outcome for the family
    or an impossible offset would otherwise surface in the middle of a run. A complete-case
    fit is cheap next to the stages; analysis failures are left for the stages to explain.
    Returns the outcome and the right-hand-side columns.

    Parameters
    ----------
    params : Params
        The params; errors name ``analysis.<key>`` and the params file.
    study : Study
        The study after intake.

    Returns
    -------
    (outcome, columns) : tuple of str and list of str
        The outcome and the right-hand-side columns as the formula writes them.
    """
    from .cases import check_model_data
    from .errors import AnalysisError
    from .models import check_formula, exposure_terms
    from .stage import analysis_model, params_errors
    from .survival import check_follow_up

    with params_errors(params, "analysis"):
        found = check_formula(params.analysis.formula, list(study.data.columns))
        model = analysis_model(params)
        outcome, covariates = check_model_data(study.data, model)
        if model.is_time_to_event():  # times 0 or more, event values in the coding; names the row and id
            check_follow_up(study.data, time=outcome, event=model.event, ids=study.ids, file_rows=study.file_rows)
    for column in covariates:
        if study.data[column].notna().sum() == 0:
            raise InputError(f"{params.label}: analysis.formula uses '{column}', which has no observed values; "
                             "drop it from the formula or check its missing markers")
    try:
        with params_errors(params, "analysis"):
            fitted = model.fit(study.data)
    except AnalysisError:
        return found
    with params_errors(params, "analysis"):
        # Every model stage follows the exposure's terms: an exposure the formula lacks stops them all.
        matched = exposure_terms(list(fitted.terms) + list(fitted.dropped_terms()), model.exposure)
    why = dict(fitted.dropped)
    if matched and all(term in why for term in matched):
        # The formula has the exposure, but the rows the model can use cannot estimate it (one arm left,
        # e.g. after applies_if or a tiny file): say so, not that the exposure matches no term.
        raise InputError(f"{params.label}: analysis.exposure: '{model.exposure}' cannot be estimated: its term "
                         f"{matched[0]} is {why[matched[0]].replace('{n}', f'{fitted.nobs:,}')} (rows with every "
                         "model variable observed); check its values and missing markers")
    return found


def check_cox_up_front(params: Params, study: Any, stages: Sequence[str]) -> Tuple[str, ...]:
    """Warnings for Cox and logistic fits whose likelihood has no maximum, named before any stage runs.

    A level of a category, or a missing-value indicator, whose rows have no event (or all the
    events) makes the fit run off without converging: a monotone likelihood for a Cox model, a
    complete or quasi-complete separation for a logistic one (:mod:`gapbook.separation`). The complete-case
    and missing-category stages make the same fits as here (the stage functions); each fit
    that would run off is named with the term and why. Not refused: the other strategies can
    still answer. An error the missing-category stage would stop on stops here.

    Parameters
    ----------
    params : Params
        The params (family cox or binomial, else nothing is checked).
    study : Study
        The study after intake.
    stages : sequence of str
        The stages that will run.

    Returns
    -------
    tuple of str
        One warning per stage whose fit would not converge, naming the terms and why.
    """
    from .errors import AnalysisError
    from .models import unbounded_words
    from .separation import UNBOUNDED_ADVICE, unbounded_causes
    from .stage import StageContext

    context = StageContext(params=params, out_dir=Path("."))
    if not (context.model().is_time_to_event() or params.analysis.family == "binomial"):
        return ()
    words = unbounded_words(params.analysis.family)
    context.study = study  # the study already read (a cached property of the context)
    fits: List[Tuple[str, Callable[[], Any]]] = []
    if "cases" in stages:
        fits.append(("cases", lambda: context.model().fit(study.data)))
    if "indicator" in stages:
        fits.append(("indicator", lambda: context.missing_category().model_fit))
    found = []
    for stage, fit in fits:
        try:
            fitted = fit()
        except AnalysisError:  # the stage explains a fit that fails outright
            continue
        if fitted.unbounded:
            found.append(f"{stage}: the {words.model} model has no finite estimate ({words.cause}), so the stage "
                         f"will report a fit that did not converge: {unbounded_causes(fitted.unbounded)}; "
                         f"{UNBOUNDED_ADVICE}")
        elif not fitted.converged:
            # One column at a time names the usual causes; a continuous covariate that orders the events (or a
            # combination of columns) runs off the same way and was not said at all.
            found.append(f"{stage}: the {words.model} model did not converge, so the stage will report a fit that "
                         f"did not converge; a covariate, or a combination of them, may account for the outcome "
                         f"perfectly ({words.cause} along it): check the covariates against the outcome")
    return tuple(found)


def check_sensitivity_up_front(params: Params, study: Any) -> Tuple[str, ...]:
    """Stop before any stage when the sensitivity stage could not shift what the params ask for.

    The same function as the stage (:func:`gapbook.stage.sensitivity_series`): the imputation
    plan and the delta series are built and checked, and no imputation runs. When there is
    nothing to shift, the stage's own sentence saying why is returned as a note.
    """
    from .sensitivity import nothing_to_shift
    from .stage import imputation_plan, sensitivity_series

    plan = imputation_plan(params, study)
    if sensitivity_series(params, study, plan):
        return ()
    return (f"sensitivity: {nothing_to_shift(plan)}",)


def check_followup_up_front(params: Params, study: Any, stages: Sequence[str]) -> Tuple[str, ...]:
    """A follow-up study's rows against its design, and its model, before any stage.

    Refuses (exit 2, naming subject and visit) a row without a visit, a visit not in the
    plan, two rows for one visit, an arm that changes within a participant, a covariate that
    changes after baseline, a formula that cannot be built on the visit grid, and options
    the imputation strategies cannot run with. Returns a note describing the design for ``check``.
    """
    from .followup.repeated import label
    from .stage import check_estimable, repeated_design, repeated_model_data

    repeated = repeated_design(params, study)
    visits = ", ".join(map(label, repeated.visits))
    described = f"follow-up design: {params.design.layout} layout, planned visits {visits}" + (
        f" after baseline {label(repeated.baseline)}" if repeated.baseline is not None else "")
    if not params.analysis.formula:
        return (described,)
    outcome = repeated_model_data(params, repeated, study.source or "data")
    described += (f"; {outcome.n} participants, outcome {outcome.outcome_name}, arms "
                  f"{', '.join(map(label, outcome.levels))}")
    if not outcome.observed.any():
        raise InputError(f"{params.label}: analysis.formula: the outcome '{outcome.outcome_name}' is observed at no "
                         "planned visit; check design.visits and the outcome's missing markers")
    section = params.analysis.repeated
    imputing = section is None or section.strategies is None or any(
        s in FOLLOWUP_IMPUTED_STRATEGIES for s in section.strategies)
    if any(s in FOLLOWUP_STAGES for s in stages):
        check_estimable(params, outcome, study.source or "data")
    if imputing and any(s in FOLLOWUP_STAGES for s in stages) and params.imputation.m < 2:
        raise InputError(f"{params.label}: imputation.m is {params.imputation.m}; the follow-up imputation strategies "
                         "pool at least two imputed datasets: raise it (e.g. 20)")
    if len(outcome.excluded):
        described += f" ({len(outcome.excluded)} left out: a baseline covariate missing)"
    return (described,)


@dataclass(frozen=True)
class DataCheck:
    """What the up-front check learnt about the data file, whichever engine read it (``data.engine``)."""

    source: str
    sha256: str
    n_rows: int
    columns: Tuple[str, ...]
    missing_cells: int
    incomplete_variables: int
    complete_rows: int
    notes: Tuple[str, ...]
    warnings: Tuple[str, ...]
    range_issues: int
    engine: str
    why: str
    rows_kept: Optional[RowsKept] = None   # data.keep_rows: the condition, rows read and kept


def check_data(params: Params, need_frame: bool) -> Tuple[DataCheck, Any]:
    """Read the data file once with the engine ``data.engine`` picks: (what check reports, the Study or None).

    With DuckDB (a large file) the file is never loaded into pandas unless ``need_frame``
    (a model stage will run and its model is checked up front on the data in memory).
    """
    from .intake import load_study
    from .intake_duckdb import choose_engine

    engine, why = choose_engine(params)
    if engine == "duckdb" and not need_frame:
        from .audit_duckdb import audit_scanned
        from .intake_duckdb import scan_study

        with scan_study(params) as scanned:  # data errors stop here, exit 2
            summary = audit_scanned(scanned).summary.iloc[0]
            return DataCheck(source=scanned.source, sha256=scanned.sha256, n_rows=scanned.n_rows,
                             columns=tuple(scanned.columns), missing_cells=int(summary["missing_cells"]),
                             incomplete_variables=int(summary["incomplete_variables"]),
                             complete_rows=int(summary["complete_rows"]), notes=scanned.notes,
                             warnings=scanned.warnings, range_issues=len(scanned.range_issues), engine=engine,
                             why=why, rows_kept=scanned.rows_kept), None
    study = load_study(params)  # data errors stop here, exit 2
    missing = study.missing
    return DataCheck(source=study.source or "", sha256=study.sha256 or "", n_rows=len(study.data),
                     columns=tuple(study.data.columns), missing_cells=int(missing.to_numpy().sum()),
                     incomplete_variables=int(missing.any(axis=0).sum()),
                     complete_rows=int((~missing.any(axis=1)).sum()), notes=study.notes, warnings=study.warnings,
                     range_issues=len(study.range_issues), engine="pandas", why=why,
                     rows_kept=study.rows_kept), study


@dataclass(frozen=True)
class Plan:
    """What a run will do, after every up-front check passed."""

    params: Params
    data: DataCheck
    study: Any  # gapbook.intake.Study, or None when DuckDB checked a large file and no model stage runs
    stages: Tuple[str, ...]
    notebooks: Tuple[StageNotebook, ...]
    model: Optional[Tuple[str, List[str]]] = None  # outcome and right-hand-side columns, when checked
    notes: Tuple[str, ...] = field(default_factory=tuple)
    compute: str = ""  # where the parallel work runs and what leaves this machine (check and run print it)


def preflight(params: Params, *, only: Optional[Sequence[str]] = None, log: Optional[Log] = None,
              notebooks: Optional[Mapping[str, Path]] = None, notebook_origin: str = RECORD) -> Plan:
    """Every check a run makes before its first stage: stages, notebooks, data, model.

    Raises :class:`~gapbook.errors.InputError` (exit 2, one line) for anything the user
    can fix. ``notebooks`` maps stage names to the notebooks to run instead of the study
    folder's or the kit's (``verify`` uses it for the kit's or a trusted record's copies).

    Parameters
    ----------
    params : Params
        The resolved params.
    only : sequence of str, optional
        The stages asked for; default every stage the params allow.
    log : callable, optional
        Receives one line per finding (skipped stages, warnings).
    notebooks : mapping of str to Path, optional
        Notebooks to run in place of the kit's or the study folder's.
    notebook_origin : str
        What the manifest calls an override notebook that differs from the kit's (``record``).

    Returns
    -------
    Plan
        The stages, their notebooks, the data check and the params, ready for the runner.
    """
    found = stage_notebooks(params, notebooks, notebook_origin)
    stages = resolve_stages(only, params, log, available=list(found))
    model_stages = bool(params.analysis.formula) and any(s in MODEL_STAGES or s == "report" for s in stages)
    data, study = check_data(params, need_frame=model_stages or params.is_followup)
    if log is not None:
        for warning in data.warnings:  # legitimate but worth a look (also shown on the audit page)
            log(f"warning: {warning}")
    for column in params.audit.by:
        if column not in data.columns:
            raise InputError(f"{params.label}: audit.by '{column}' is not a column{did_you_mean(column, data.columns)}")
    model = None
    design_notes: Tuple[str, ...] = ()
    if params.is_followup:
        design_notes = check_followup_up_front(params, study, stages)
    elif model_stages:
        model = check_model_up_front(params, study)
        for warning in check_cox_up_front(params, study, stages):
            if log is not None:
                log(f"warning: {warning}")
        if "sensitivity" in stages:
            design_notes = check_sensitivity_up_front(params, study)
    chosen = tuple(found[s] for s in stages)
    notes = design_notes + tuple(f"notebook {nb.file}: the study folder's copy, which differs from the kit's"
                                 for nb in chosen if nb.origin == STUDY and nb.differs_from_kit)
    return Plan(params=params, data=data, study=study, stages=tuple(stages), notebooks=chosen, model=model,
                notes=notes, compute=where_stages_compute(params, stages))


def where_stages_compute(params: Params, stages: Sequence[str]) -> str:
    """Where the stages' parallel work runs (``compute.cluster``) and what leaves this machine; never connects."""
    from .compute import LOCAL, where_work_runs

    cluster = params.compute.cluster
    sending = [s for s in stages if s in CLUSTER_STAGES]
    if cluster == LOCAL:
        return where_work_runs(LOCAL)
    if not sending:
        return f"this machine: none of these stages sends work to compute.cluster {cluster}"
    return f"{where_work_runs(cluster)} (stages {', '.join(sending)})"
