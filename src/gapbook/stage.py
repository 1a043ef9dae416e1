"""What a stage notebook needs: its params, the study after intake, one call per stage, and
where to write.

A notebook's ``parameters`` cell holds ``params = None`` (the demo study) and
``out_dir = "."``; the runner injects the resolved params dict and the record folder.
:func:`open_stage` turns those into a :class:`StageContext`.

This is the notebook-facing layer, the one place that reads ``Params``:

- the params -> options adapters: each stage method (``ctx.audit()``, ``ctx.mechanism()``,
  ...) takes the stage's options from the params and calls the stage module, whose
  functions take data and plain keyword-only options and never see ``Params``;
- the wording of errors that name a params key: a stage module's error names the option
  it was given (``InputError(..., option="auxiliary")``) and :func:`params_errors` renames
  it to the key it came from (``imputation.auxiliary``), with the params file;
- every table and figure goes through the context, so file names, CSV formatting and
  figure settings are the same everywhere and a rerun writes the same bytes.

Every stage result follows one contract (:class:`StageResult`): a frozen dataclass whose
``tables()`` gives ``{record table name: DataFrame}`` and whose ``sentences`` hold its
wording; :meth:`StageContext.save_result` writes a whole result with one call.
"""
from __future__ import annotations

import contextlib
import dataclasses
import typing
from dataclasses import dataclass
from functools import cached_property
from pathlib import Path
from typing import TYPE_CHECKING, Any, Dict, Iterator, Mapping, Optional, Protocol, Sequence, Tuple, Union

import pandas as pd
from pydantic import BaseModel

from .errors import InputError
from .intake import Study, load_study
from .params import DeltaGrid, Params, load_params
from .text import md_code, md_escape, spreadsheet_original, spreadsheet_safe
from .vocabulary import cautions, strategy_rank

if TYPE_CHECKING:  # the stage modules are imported where a stage is run, not when this module loads
    from .audit import AuditResult
    from .cases import AvailableCaseSummary, CompleteCaseResult, CompletenessBaseline, StrategyComparison
    from .followup.analysis import FollowupAnalysis
    from .followup.audit import FollowupAudit
    from .followup.estimand import EstimandDescription
    from .followup.intake import RepeatedStudy
    from .followup.repeated import RepeatedOutcome
    from .impute import ChainedImputation, ImputationPlan
    from .indicator import MissingCategoryResult
    from .mechanism import MechanismResult
    from .models import AnalysisModel
    from .pool import PooledResult, WaldTest
    from .report import RecordSuppression, ReportSummary
    from .sensitivity import DeltaSeries, SensitivityResult
    from .simulate import SimulationResult
    from .survival import EventCoding
    from .time_to_event import TimeToEventAudit, TimeToEventMechanism

__all__ = ["StageResult", "StageContext", "open_stage", "analysis_model", "params_errors", "write_csv", "read_csv",
           "merge_estimates", "imputation_plan", "sensitivity_series", "CSV_FLOAT_FORMAT", "ESTIMATE_COLUMNS", "FIGURE_DPI", "repeated_design",
           "repeated_model_data", "check_estimable"]

CSV_FLOAT_FORMAT = "%.10g"
ESTIMATE_COLUMNS = ("strategy", "term", "estimate", "std_error", "ci_lower", "ci_upper", "p_value", "n_used",
                    "df", "fmi", "riv", "exp_estimate", "exp_ci_lower", "exp_ci_upper", "converged")
FIGURE_DPI = 150
SVG_HASH_SALT = "gapbook"  # matplotlib's SVG ids are hashed with this salt, so reruns write the same bytes


class StageResult(Protocol):
    """The contract every stage result keeps (a frozen dataclass; derived values are methods)."""

    sentences: Tuple[str, ...]

    def tables(self) -> Dict[str, pd.DataFrame]:
        """``{record table name: DataFrame}``."""


def write_csv(frame: pd.DataFrame, path: Path) -> Path:
    """Write a table the one way gapbook writes tables (fixed float format, '\\n' line ends).

    Parameters
    ----------
    frame : DataFrame
        The table; its index is not written.
    path : Path
        The file to write.

    Returns
    -------
    Path
        ``path``, so reruns with the same inputs write the same bytes.
    """
    path.parent.mkdir(parents=True, exist_ok=True)
    safe = _map_text(frame, spreadsheet_safe)
    # Python's csv writer quotes a field for the line terminator's characters only ('\n' here), so a
    # text holding a bare carriage return would be written unquoted and split the row for every
    # reader. Such a CR goes through the writer as a stand-in holding '\n' (which it quotes) and is
    # put back afterwards; the stand-in is lengthened until no text holds it.
    texts = [str(c) for c in safe.columns] + [v for c in range(safe.shape[1]) if _is_text(safe.iloc[:, c])
                                              for v in safe.iloc[:, c].astype(object) if isinstance(v, str)]
    stand_in = None
    if any("\r" in text for text in texts):
        stand_in = "\x00\n\x00"
        while any(stand_in in text for text in texts):
            stand_in = f"\x00{stand_in}\x00"
        safe = _map_text(safe, lambda text: text.replace("\r", stand_in))
    written = safe.to_csv(None, index=False, float_format=CSV_FLOAT_FORMAT, lineterminator="\n")
    if stand_in is not None:
        written = written.replace(stand_in, "\r")
    path.write_bytes(written.encode("utf-8"))
    return path


def read_csv(path: Path, **options: Any) -> pd.DataFrame:
    """A table :func:`write_csv` wrote, with its text cells and column names as they were before writing.

    Text that a spreadsheet would read as a formula is written with a single quote in front
    (:func:`gapbook.text.spreadsheet_safe`); this removes it again, so a stage or page that reads
    a table back sees the original level, term or label.

    Parameters
    ----------
    path : Path
        The ``tables/<name>.csv`` file.
    **options
        Passed to :func:`pandas.read_csv` (e.g. ``keep_default_na``).

    Returns
    -------
    DataFrame
    """
    # write_csv writes a missing value as an empty cell and nothing else: a text such as 'NA', 'None' or
    # 'null' (a level, a column name in a term) is that text, not pandas' default missing value.
    options = {"keep_default_na": False, "na_values": [""], **options}
    return _map_text(pd.read_csv(path, **options), spreadsheet_original)


def _is_text(values: pd.Series) -> bool:
    """Whether a column can hold text cells (object, categorical or string dtype)."""
    return pd.api.types.is_object_dtype(values) or isinstance(values.dtype, (pd.CategoricalDtype, pd.StringDtype))


def _map_text(frame: pd.DataFrame, convert: Any) -> pd.DataFrame:
    """``frame`` with ``convert`` applied to every text column name and text cell; numbers untouched.

    Columns without a text cell that ``convert`` changes are left as they are (same dtype, same bytes).
    """
    renamed = {c: convert(c) for c in frame.columns if isinstance(c, str) and convert(c) != c}
    changed = {}
    for position, column in enumerate(frame.columns):
        values = frame.iloc[:, position]
        if not _is_text(values):
            continue
        converted = values.astype(object).map(lambda v: convert(v) if isinstance(v, str) else v)
        if not converted.equals(values.astype(object)):
            changed[position] = converted
    if not renamed and not changed:
        return frame
    out = frame.copy()
    for position, converted in changed.items():
        out.isetitem(position, converted)
    return out.rename(columns=renamed) if renamed else out


# ---------------------------------------------------------------------------
# params keys in error messages

_SPECIAL_KEYS = {"types": "variables.{}.type", "delta_by": "sensitivity.delta.{}.by"}


def _section_model(path: str) -> Any:
    """The pydantic model of a params section (``"design"``, ``"analysis.repeated"``), or None.

    An optional section (``design: Optional[DesignSection]``) is annotated as a Union with None:
    its model is the Union's one pydantic member.
    """
    model: Any = Params
    for name in path.split("."):
        field = getattr(model, "model_fields", {}).get(name)
        if field is None:
            return None
        candidates = (field.annotation, *typing.get_args(field.annotation))
        model = next((c for c in candidates if isinstance(c, type) and issubclass(c, BaseModel)), None)
    return model


def _params_key(option: str, sections: Sequence[str], keys: Optional[Mapping[str, str]] = None) -> Optional[str]:
    """The params key an option came from: ``keys`` first, then the schema of the given sections (first match).

    ``sections`` may name a section inside a section (``"analysis.repeated"``) and an optional one
    (``"design"``).
    """
    head, _, item = option.partition(".")
    keys = keys or {}
    if head in keys:
        return keys[head] + (f".{item}" if item else "")
    if head in _SPECIAL_KEYS and item:
        return _SPECIAL_KEYS[head].format(item)
    for section in sections:
        if head in getattr(_section_model(section), "model_fields", {}):
            return f"{section}.{option}"
    return None


@contextlib.contextmanager
def params_errors(params: Params, *sections: str, keys: Optional[Mapping[str, str]] = None,
                  data_file: Optional[str] = None) -> Iterator[None]:
    """Rename the option in a stage module's ``InputError`` to the params key it came from.

    ``sections`` are the params sections whose keys the options are, in order of precedence
    (e.g. ``"mechanism", "analysis"``: ``alpha`` is ``mechanism.alpha``). The message then
    names the params file and the key: ``study.yaml: imputation.auxiliary: 'x' is not a column``.
    Another option the message names (an :class:`~gapbook.errors.OptionName` part) is renamed the
    same way: ``study.yaml: design.baseline: 0 is not one of design.visits (1, 2)``.

    Parameters
    ----------
    params : Params
        The params the options were read from (its file names the error).
    *sections : str
        The params sections, in order of precedence; ``"analysis.repeated"`` names a section
        inside a section.
    keys : mapping of str to str
        Options whose params key is not found by their name, e.g. ``{"ids": "data.id"}`` or an
        option computed from a key (the wide layout's ``outcome``, from ``analysis.formula``).
    data_file : str, optional
        The data file's name: an error about the data the module was given (option ``data``,
        e.g. two rows for one visit) is named by the data file rather than a params key.

    Yields
    ------
    None
        The body runs inside; an ``InputError`` raised there is re-raised with the params key.
    """
    try:
        yield
    except InputError as exc:
        if exc.option == "data" and data_file is not None:
            raise InputError(f"{data_file}: {exc.message}") from None
        key = _params_key(exc.option, sections, keys) if exc.option else None
        if key is None:
            raise
        text = exc.text(lambda option: _params_key(option, sections, keys) or option)
        raise InputError(f"{params.label}: {key}: {text}") from None


def analysis_model(params: Params) -> "AnalysisModel":
    """The ``analysis`` section as an :class:`~gapbook.models.AnalysisModel`; exits 2 without a formula.

    Parameters
    ----------
    params : Params
        The resolved params.

    Returns
    -------
    AnalysisModel
        Formula, family, exposure, offset, robust and alpha as the params give them.
    """
    from .models import AnalysisModel

    section = params.analysis
    if not section.formula:
        raise InputError(f"{params.label}: analysis.formula is required for this stage; "
                         "write it as 'outcome ~ exposure + covariates'")
    return AnalysisModel(formula=section.formula, family=section.family, exposure=section.exposure,
                         robust=section.robust, offset=section.offset, alpha=section.alpha,
                         event=event_coding(params), ties=section.ties)


def event_coding(params: Params) -> "Optional[EventCoding]":
    """``analysis.event`` as an :class:`~gapbook.survival.EventCoding` (None without a time-to-event model)."""
    from .survival import EventCoding
    from .time_to_event import TimeToEventAudit, TimeToEventMechanism

    event = params.analysis.event
    if event is None:
        return None
    if isinstance(event, str):
        return EventCoding(column=event)
    return EventCoding(column=event.column, event=tuple(event.event), censored=tuple(event.censored))


# ---------------------------------------------------------------------------
# follow-up studies: the design section and analysis.repeated -> options

# The sections a follow-up module's options come from, in order of precedence: ``subject`` and ``visit``
# are the design's (analysis.repeated may only repeat them), ``method`` is the mixed model's, ``m`` and
# ``seed`` the imputation's, ``formula``, ``exposure`` and ``alpha`` the analysis model's.
FOLLOWUP_SECTIONS = ("design", "analysis.repeated", "imputation", "analysis")


@contextlib.contextmanager
def followup_errors(params: Params, data_file: str, keys: Optional[Mapping[str, str]] = None) -> Iterator[None]:
    """:func:`params_errors` for the follow-up modules: their options are keys of ``design``,
    ``analysis.repeated``, ``imputation`` or ``analysis``; an error about the data rows names ``data_file``."""
    with params_errors(params, *FOLLOWUP_SECTIONS, keys=keys, data_file=data_file):
        yield


def _outcome_name(params: Params) -> str:
    formula = params.analysis.formula or ""
    name = formula.split("~", 1)[0].strip()
    if not name.isidentifier():
        raise InputError(f"{params.label}: analysis.formula: in the wide layout the left of '~' names the repeated "
                         f"outcome (e.g. 'chg ~ arm * C(visit)'); use a plain name, not '{name}'")
    return name


def repeated_design(params: Params, study: Study) -> "RepeatedStudy":
    """A follow-up study laid out long over its planned visits, checked against the ``design`` section.

    Exits 2 naming subject and visit for a row without a visit, a visit not in the plan or two
    rows for one visit.

    Parameters
    ----------
    params : Params
        The resolved params (``design`` and ``data`` sections).
    study : Study
        The study after intake.

    Returns
    -------
    RepeatedStudy
        One row per participant per planned visit.
    """
    from .followup.intake import repeated_study

    design = params.design
    if design is None:
        raise InputError(f"{params.label}: this stage needs a design section (a follow-up study)")
    subject = params.subject_column
    # the subject is design.subject, else data.id (as the wide layout's ids are); the wide layout's outcome is
    # the left side of analysis.formula
    keys = {"ids": "data.id", "outcome": "analysis.formula", "subject": "design.subject" if design.subject else "data.id",
            "keep_rows": "data.keep_rows"}
    with followup_errors(params, study.source or "data", keys=keys):
        if design.layout == "long":
            data = study.data.assign(**{subject: study.ids.to_numpy()})  # intake kept the subject apart, as an id
            return repeated_study(data, study.reasons, layout="long", subject=subject, visit=design.visit,
                                  visits=design.visits, baseline=design.baseline, file_rows=study.file_rows)
        return repeated_study(study.data, study.reasons, layout="wide", subject=subject, visit=design.visit,
                              visits=design.visits, baseline=design.baseline, ids=study.ids,
                              outcome_columns=design.outcome_columns, outcome=_outcome_name(params))


def repeated_model_data(params: Params, repeated: "RepeatedStudy", data_label: str = "data") -> "RepeatedOutcome":
    """The participants x visits outcome and design of ``analysis.formula``; exits 2 on what cannot be modelled.

    An exposure (arm) that changes within a participant, a post-baseline covariate, a
    formula that cannot be built on the visit grid, or a reference group that is not an arm.

    Parameters
    ----------
    params : Params
        The resolved params (``analysis`` and ``design`` sections).
    repeated : RepeatedStudy
        From :func:`repeated_design`.
    data_label : str
        The data file's name for messages.

    Returns
    -------
    RepeatedOutcome
    """
    section = params.analysis
    if not section.formula:
        raise InputError(f"{params.label}: analysis.formula is required for the follow-up analyses; write the "
                         f"long-format model, e.g. 'chg ~ arm * C({params.design.visit}) + base * C({params.design.visit})'")
    if not section.exposure:
        raise InputError(f"{params.label}: analysis.exposure is required for the follow-up analyses: name the "
                         "arm whose effect is reported at every visit")
    with followup_errors(params, data_label):
        outcome = repeated.outcome(formula=section.formula, exposure=section.exposure)
    if not outcome.levels:
        raise InputError(f"{params.label}: analysis.exposure '{section.exposure}' must be categorical (the "
                         "randomised arm) for the follow-up analyses")
    reference = section.repeated.reference if section.repeated is not None else None
    if reference is not None and _level(outcome.levels, reference) is None:
        from .followup.repeated import label

        raise InputError(f"{params.label}: analysis.repeated.reference '{reference}' is not a level of "
                         f"{section.exposure} ({', '.join(map(label, outcome.levels))})")
    return outcome


def check_estimable(params: Params, outcome: "RepeatedOutcome", data_label: str = "data") -> None:
    """Exit 2 when the mixed model cannot estimate the formula's effects from the observed outcomes.

    ``check`` calls it for the follow-up stage, so a visit nobody attended, a single arm or a
    term the attended visits cannot estimate stops ``check`` with the params key to change,
    instead of stopping the run after minutes.

    Parameters
    ----------
    params : Params
        The resolved params (``design`` and ``analysis`` sections).
    outcome : RepeatedOutcome
        From :func:`repeated_model_data`.
    data_label : str
        The data file's name for messages.

    Returns
    -------
    None
    """
    problem = outcome.unestimable()
    if problem is not None:
        with followup_errors(params, data_label):
            raise problem


def _level(levels: Sequence[Any], wanted: Any) -> Any:
    from .followup.repeated import label

    for level in levels:
        if label(level) == label(wanted):
            return level
    return None


# ---------------------------------------------------------------------------
# the context

@dataclass
class StageContext:
    """The params, the study and the record folder of one stage run, with one call per stage."""

    params: Params
    out_dir: Path

    @cached_property
    def study(self) -> Study:
        return load_study(self.params)

    @property
    def tables_dir(self) -> Path:
        return self.out_dir / "tables"

    @property
    def figures_dir(self) -> Path:
        return self.out_dir / "figures"

    # -- writing and reading the record
    def save_table(self, name: str, frame: pd.DataFrame) -> Path:
        """Write ``tables/<name>.csv``."""
        return write_csv(frame, self.tables_dir / f"{name}.csv")

    def save_text(self, name: str, text: str) -> Path:
        """Write ``tables/<name>`` as UTF-8 text (e.g. the drafted report text)."""
        self.tables_dir.mkdir(parents=True, exist_ok=True)
        path = self.tables_dir / name
        path.write_text(text, encoding="utf-8")
        return path

    def save_result(self, result: StageResult) -> None:
        """Write every table of a stage result; ``estimates`` rows replace this strategy's rows only."""
        for name, frame in result.tables().items():
            if name == "estimates":
                self.update_estimates(frame)
            else:
                self.save_table(name, frame)

    def read_table(self, name: str) -> Optional[pd.DataFrame]:
        """A table an earlier stage wrote to this record, or None when that stage has not run."""
        path = self.tables_dir / f"{name}.csv"
        return read_csv(path) if path.is_file() else None

    def read_tables(self, names: Sequence[str]) -> Dict[str, Optional[pd.DataFrame]]:
        """Several tables by name (None for each one the record lacks)."""
        return {name: self.read_table(name) for name in names}

    def save_figure(self, name: str, figure: Any) -> Path:
        """Save a matplotlib figure as PNG (150 dpi) and SVG, with no time stamps, so reruns write the same bytes.

        Returns the PNG's path.
        """
        import matplotlib

        self.figures_dir.mkdir(parents=True, exist_ok=True)
        png = self.figures_dir / f"{name}.png"
        figure.savefig(png, dpi=FIGURE_DPI, bbox_inches="tight", metadata={"Software": None})
        with matplotlib.rc_context({"svg.hashsalt": SVG_HASH_SALT}):
            figure.savefig(self.figures_dir / f"{name}.svg", format="svg", bbox_inches="tight",
                           metadata={"Date": None})
        return png

    def update_estimates(self, rows: pd.DataFrame) -> pd.DataFrame:
        """Replace this strategy's rows in ``estimates.csv``, keep the others, and return the whole table."""
        return merge_estimates(self.read_table("estimates"), rows, self.tables_dir / "estimates.csv")

    # -- what a page shows
    def show_figure(self, name: str, figure: Any) -> None:
        """Save a figure to the record, close it, and show the saved PNG."""
        import matplotlib.pyplot as plt
        from IPython.display import Image, display

        path = self.save_figure(name, figure)
        plt.close(figure)
        display(Image(filename=str(path)))

    def show_sentences(self, sentences: Union[StageResult, Sequence[str]]) -> None:
        """Show a result's sentences (or the sentences given) as a list."""
        from IPython.display import Markdown, display

        lines = getattr(sentences, "sentences", sentences)
        if lines:  # sentences carry user text (column names, formulas): shown literally, never as markup
            display(Markdown("\n".join(f"- {md_escape(line)}" for line in lines)))

    def model_header(self) -> str:
        """The analysis model in one line of Markdown: family, robust SEs, formula, offset, exposure."""
        model = self.model()
        return (f"**Analysis model** ({model.family}{', sandwich standard errors' if model.robust else ''}): "
                f"{md_code(model.formula)}" + (f", offset log({md_code(model.offset)})" if model.offset else "")
                + (f", follow-up time on the left, event {md_code(model.event.describe())}, {model.ties} ties"
                   if model.event is not None else "")
                # statsmodels' score residuals are Breslow's form: with tied event times and Efron's ties the
                # sandwich then differs slightly from one built on Efron-form residuals (survival.fit_cox_model)
                + (" (the sandwich of Lin & Wei 1989 from Breslow-form score residuals, whatever the ties method)"
                   if model.robust and model.event is not None else "")
                + f"; exposure: {md_code(model.exposure or '(first term)')}.")

    def show_model(self) -> None:
        """Show :meth:`model_header`."""
        from IPython.display import Markdown, display

        display(Markdown(self.model_header()))

    def show_cautions(self) -> None:
        """Show the cautions of the trade (one wording, from the vocabulary)."""
        self.show_sentences(cautions(with_model=bool(self.params.analysis.formula)))

    def is_demo(self) -> bool:
        """Whether this run is the shipped demo study with its own model (whose true effect is known)."""
        from .demo import demo_csv_path, demo_params

        return (self.params.data_path == demo_csv_path().resolve()
                and self.params.analysis.formula == demo_params().analysis.formula)

    def reference_effect(self) -> Optional[float]:
        """The demo's true exposure effect for figures, or None for any other study."""
        from .demo import TRUE_ARM_EFFECT

        return TRUE_ARM_EFFECT if self.is_demo() else None

    # -- one call per stage: params -> options
    def model(self) -> "AnalysisModel":
        """The analysis model from ``analysis``."""
        return analysis_model(self.params)

    # -- follow-up studies (a design section)
    def is_followup(self) -> bool:
        """Whether the params describe a follow-up study (a ``design`` section)."""
        return self.params.is_followup

    @cached_property
    def repeated(self) -> "RepeatedStudy":
        """The study laid out long over the planned visits (``design``)."""
        return repeated_design(self.params, self.study)

    @cached_property
    def repeated_outcome(self) -> "RepeatedOutcome":
        """The participants x visits outcome of ``analysis.formula``."""
        return repeated_model_data(self.params, self.repeated, self.study.source or "data")

    def followup_audit(self) -> Optional["FollowupAudit"]:
        """The audit of follow-up (visits attended, dropout, retention, reasons, leavers); None without a design.

        Needs ``analysis.formula`` and ``analysis.exposure`` (the outcome and the arms).
        """
        from .followup.audit import audit_followup

        if not self.params.is_followup or not self.params.analysis.formula:
            return None
        outcome = self.repeated_outcome
        with params_errors(self.params, "analysis"):
            return audit_followup(outcome, reasons=self.repeated.visit_reasons(outcome), alpha=self.params.analysis.alpha)

    def estimand(self, analyses: Sequence[str] = ()) -> Optional["EstimandDescription"]:
        """The ``estimand`` section as a table, with which of ``analyses`` targets each intercurrent event; None without one."""
        from .followup.estimand import describe_estimand

        section = self.params.estimand
        if section is None:
            return None
        with params_errors(self.params, "estimand"):
            return describe_estimand(population=section.population, treatment=section.treatment,
                                     variable=section.variable, summary=section.summary, primary=section.primary,
                                     intercurrent_events=[(e.event, e.strategy) for e in section.intercurrent_events],
                                     analyses=analyses)

    def followup(self) -> Optional["FollowupAnalysis"]:
        """Every follow-up strategy side by side (``analysis.repeated``, ``imputation.m``/``seed``/``n_jobs``, the chains on
        ``compute.cluster``); None without a design."""
        from .followup.analysis import DEFAULT_STRATEGIES, analyse_followup
        from .vocabulary import FOLLOWUP_STRATEGY_NAMES

        if not self.params.is_followup:
            return None
        outcome = self.repeated_outcome
        section = self.params.analysis.repeated
        strategies, reference, delta, method = DEFAULT_STRATEGIES, None, None, "reml"
        if section is not None:
            method = section.method
            delta = section.delta
            reference = None if section.reference is None else _level(outcome.levels, section.reference)
            if section.strategies is not None:
                strategies = tuple(section.strategies)
            elif delta is not None:
                strategies = tuple(s for s in FOLLOWUP_STRATEGY_NAMES if s in DEFAULT_STRATEGIES
                                   or s == "delta_adjusted")
        imputation = self.params.imputation
        with self.on_cluster(), followup_errors(self.params, self.study.source or "data"):
            return analyse_followup(outcome, strategies=strategies, m=imputation.m, seed=imputation.seed,
                                    reference=reference, delta=delta, method=method, alpha=self.params.analysis.alpha,
                                    n_jobs=imputation.n_jobs)

    def audit(self) -> "AuditResult":
        """The audit stage with the ``audit`` section, counted by the engine ``data.engine`` picks.

        pandas counts the study in memory; DuckDB counts over the file without loading it.
        The tables are the same either way; a sentence says which engine counted and why.
        """
        from .audit import audit_study
        from .audit_duckdb import audit_scanned
        from .intake_duckdb import choose_engine, scan_study

        # A follow-up study is read in memory: its subject column repeats, which only the pandas intake allows.
        engine, why = (("pandas", "a follow-up design is read in memory") if self.params.is_followup
                       else choose_engine(self.params))
        section = self.params.audit
        options = dict(threshold=section.threshold, by=section.by, top_patterns=section.top_patterns,
                       max_patterns=section.max_patterns)
        with params_errors(self.params, "audit"):
            if engine == "duckdb":
                with scan_study(self.params) as scanned:
                    result = audit_scanned(scanned, **options)
            else:
                result = audit_study(self.study, **options)
        return dataclasses.replace(result, sentences=result.sentences + (f"Counted with {engine} ({why}).",),
                                   warnings=tuple(self._file_names(w) for w in result.warnings))

    def _file_names(self, message: str) -> str:
        """A message with the data and params files named by their names, not by where they are on this machine
        (a record travels)."""
        for path in (self.params.data_path, self.params.source):
            if path:
                message = message.replace(str(path), Path(path).name)
        return message

    def time_to_event_audit(self) -> "Optional[TimeToEventAudit]":
        """Events, censoring, follow-up and missing times or statuses per exposure group (None unless family cox)."""
        from .cases import exposure_column
        from .time_to_event import audit_time_to_event

        if not self.params.analysis.formula or self.params.analysis.event is None:
            return None
        model = self.model()
        study = self.study
        with params_errors(self.params, "analysis"):
            time, _ = model.variables(list(study.data.columns))
            return audit_time_to_event(study.data, time=time, event=model.event, reasons=study.reasons,
                                       group=exposure_column(model, list(study.data.columns)))

    def time_to_event_mechanism(self) -> "Optional[TimeToEventMechanism]":
        """Log-rank comparison of rows with and without each incomplete model covariate (None unless family cox)."""
        from .time_to_event import missingness_against_outcome

        if not self.params.analysis.formula or self.params.analysis.event is None:
            return None
        model = self.model()
        study = self.study
        with params_errors(self.params, "mechanism", "analysis"):
            time, used = model.variables(list(study.data.columns))
            covariates = [c for c in used if c != model.event.column]
            return missingness_against_outcome(study.data, time=time, event=model.event, variables=covariates,
                                               missing=study.missing, alpha=self.params.mechanism.alpha)

    def mechanism(self) -> "MechanismResult":
        """The mechanism stage with the ``mechanism`` section."""
        from .mechanism import assess_study

        section = self.params.mechanism
        study, variables = self.study, section.variables
        if self.params.is_followup and self.params.design.layout == "long":
            study, variables = self.participant_study(variables)
        with params_errors(self.params, "mechanism"):
            result = assess_study(study, variables=variables, alpha=section.alpha,
                                  min_missing=section.min_missing, em_tolerance=section.em_tolerance,
                                  em_max_iterations=section.em_max_iterations)
        return dataclasses.replace(result, sentences=study.notes + result.sentences) if study.notes else result

    def participant_study(self, variables: Optional[Sequence[str]] = None
                          ) -> Tuple["Study", Optional[Tuple[str, ...]]]:
        """A long follow-up file one row per participant (variables that change over visits once per visit).

        Returns the participant-level study and ``mechanism.variables`` in its names (a variable
        spread over the visits stands for all its visit columns).
        """
        from .followup.participants import participant_study, planned_visits, visit_column

        outcome = _outcome_name(self.params) if self.params.analysis.formula else None
        with params_errors(self.params, "design"):
            study = participant_study(self.repeated, self.study, time_varying=(outcome,) if outcome else ())
        if variables is None:
            return study, None
        chosen = []
        for name in variables:
            spread = [visit_column(name, visit) for visit in planned_visits(self.repeated)]
            chosen.extend(spread if name not in study.data.columns and spread[0] in study.data.columns else [name])
        return study, tuple(chosen)

    def complete_cases(self) -> "CompleteCaseResult":
        """The analysis model on the complete cases."""
        from .cases import complete_case_analysis

        study = self.study
        with params_errors(self.params, "analysis"):
            return complete_case_analysis(study.data, model=self.model(), reasons=study.reasons,
                                          not_applicable=study.not_applicable)

    def available_cases(self, complete: pd.Series) -> "AvailableCaseSummary":
        """Descriptives and correlations from every available value, beside the complete cases."""
        from .cases import available_case_summary

        return available_case_summary(self.study.data, complete=complete, types=self.study.types)

    def completeness(self, complete: pd.Series) -> "CompletenessBaseline":
        """Complete against incomplete rows on the fully observed variables."""
        from .cases import completeness_baseline

        return completeness_baseline(self.study.data, complete=complete, types=self.study.types)

    def missing_category(self, *, indicator_for_continuous: bool = True) -> "MissingCategoryResult":
        """The missing-category strategy (with the missing-indicator method for continuous covariates)."""
        from .indicator import missing_category_analysis

        study = self.study
        with params_errors(self.params, "analysis"):
            return missing_category_analysis(study.data, model=self.model(), types=study.types, missing=study.missing,
                                             reasons=study.reasons, not_applicable=study.not_applicable,
                                             indicator_for_continuous=indicator_for_continuous)

    def strategy_comparison(self) -> "StrategyComparison":
        """The exposure under every strategy in this record's ``estimates.csv``."""
        from .cases import compare_strategies

        model = self.model()
        with params_errors(self.params, "analysis"):
            return compare_strategies(self.read_table("estimates"), exposure=model.exposure, family=model.family,
                                      alpha=model.alpha)

    def imputation_plan(self) -> "ImputationPlan":
        """What to impute and how, from the ``imputation`` section and the analysis model."""
        return imputation_plan(self.params, self.study)

    @contextlib.contextmanager
    def on_cluster(self) -> Iterator[None]:
        """Run the parallel tasks inside this block where ``compute.cluster`` says (this machine or a Dask cluster)."""
        from .compute import on_cluster

        with params_errors(self.params, "compute"), on_cluster(self.params.compute.cluster):
            yield

    def impute(self, plan: "ImputationPlan") -> "ChainedImputation":
        """Run the plan (m chains, on ``compute.cluster``); no progress bar on the page."""
        with self.on_cluster(), params_errors(self.params, "imputation", "analysis", "sensitivity"):
            return plan.run()

    def pool(self, imputation: "ChainedImputation") -> "PooledResult":
        """The analysis model fitted to every completed dataset and pooled with Rubin's rules."""
        with params_errors(self.params, "analysis"):
            return imputation.analyse(self.model())

    def exposure_test(self, pooled: "PooledResult") -> "WaldTest":
        """The pooled Wald test (D1) that every exposure term is zero."""
        with params_errors(self.params, "analysis"):
            return pooled.wald(self.model().exposure)

    def sensitivity(self, plan: "ImputationPlan") -> "SensitivityResult":
        """Delta adjustment over the ``sensitivity`` grids, tipping points and every analysis side by side (imputations
        on ``compute.cluster``)."""
        from .sensitivity import sensitivity_analysis

        series = sensitivity_series(self.params, self.study, plan)
        units = {name: spec.unit for name, spec in self.params.variables.items() if spec.unit}
        with self.on_cluster(), params_errors(self.params, "sensitivity", "imputation", "analysis"):
            return sensitivity_analysis(plan, series=series, m=self.params.sensitivity.m,
                                        estimates=self.read_table("estimates"), units=units)

    def simulation(self) -> "SimulationResult":
        """The bias simulation with the ``simulation`` section (replicates on ``compute.cluster``)."""
        from .simulate import simulate_study

        section = self.params.simulation
        study = self.study
        with self.on_cluster(), params_errors(self.params, "simulation", "analysis"):
            return simulate_study(study.data, model=self.model(), missing=study.missing, types=study.types,
                                  mar_on=section.mar_on, replicates=section.replicates, seed=section.seed,
                                  n_jobs=section.n_jobs, m=section.m)

    def report(self) -> "ReportSummary":
        """The summary page from the record's tables, with ``report``, ``audit.threshold`` and the model."""
        from .impute import ImputationSettings
        from .report import REPORT_TABLES, summarise

        params = self.params
        if params.is_followup and params.analysis.formula:
            return self.followup_report()
        imp = params.imputation
        settings = ImputationSettings(m=imp.m, iterations=imp.iterations, seed=imp.seed, donors=imp.donors,
                                      n_jobs=imp.n_jobs, methods=dict(imp.methods), passive=dict(imp.passive),
                                      auxiliary=tuple(imp.auxiliary))
        model = self.model() if params.analysis.formula else None
        with params_errors(params, "report", "audit", "analysis"):
            return summarise(self.study, tables=self.read_tables(REPORT_TABLES),
                             title=params.report.title or f"Missing data in {params.study.name}", model=model,
                             imputation=settings, threshold=params.audit.threshold, group=params.report.group,
                             min_cell=params.report.min_cell if params.report.suppress_small else 0)

    def followup_report(self) -> "ReportSummary":
        """The summary page of a follow-up study: participants through the visits, the estimand, every strategy."""
        from .followup.repeated import label
        from .followup.report import FOLLOWUP_REPORT_TABLES, summarise_followup
        from .report import missing_summary

        params = self.params
        tables = self.read_tables(FOLLOWUP_REPORT_TABLES)
        outcome = self.repeated_outcome
        section = params.analysis.repeated
        estimates = tables.get("estimates")
        ran = () if estimates is None else tuple(dict.fromkeys(estimates["strategy"]))
        reference = section.reference if section is not None and section.reference is not None else outcome.reference
        with params_errors(params, "report", "audit", "analysis"):
            missing = missing_summary(self.study, threshold=params.audit.threshold,
                                      audit_variables=tables.get("audit_variables"))
            return summarise_followup(tables=tables, missing=missing,
                                      title=params.report.title or f"Missing data in {params.study.name}",
                                      formula=params.analysis.formula, exposure=params.analysis.exposure,
                                      visits=outcome.visits, method=section.method if section else "reml",
                                      m=params.imputation.m, seed=params.imputation.seed, reference=label(reference),
                                      delta=section.delta if section else None, alpha=params.analysis.alpha,
                                      estimand=self.estimand(ran), rows_kept=self.study.rows_kept)

    def suppression(self) -> Tuple[Optional["RecordSuppression"], Tuple[str, ...]]:
        """Small-count suppression of the record's count tables when ``report.suppress_small`` asks for it.

        Returns the suppression (None when it is off) and the sentence to show.
        """
        from .report import COUNT_TABLES, suppress_record_tables

        section = self.params.report
        if not section.suppress_small:
            return None, (f"Small-count suppression is off (report.suppress_small: false); turn it on before sharing "
                          f"tables outside the study team (threshold report.min_cell = {section.min_cell}).",)
        result = suppress_record_tables(self.read_tables(list(COUNT_TABLES)), min_cell=section.min_cell)
        return result, result.sentences


def imputation_plan(params: Params, study: Study) -> "ImputationPlan":
    """What to impute and how, from the ``imputation`` section and the analysis model (the stages and ``check``).

    Parameters
    ----------
    params : Params
        The study's params.
    study : Study
        The study after intake.

    Returns
    -------
    ImputationPlan
    """
    from .impute import plan_imputation

    section = params.imputation
    with params_errors(params, "imputation", "analysis", "sensitivity"):
        return plan_imputation(study, model=analysis_model(params), m=section.m, iterations=section.iterations,
                               seed=section.seed, donors=section.donors, n_jobs=section.n_jobs,
                               methods=section.methods, passive=section.passive, predictors=section.predictors,
                               exclude_predictors=section.exclude_predictors, auxiliary=section.auxiliary)


def sensitivity_series(params: Params, study: Study, plan: "ImputationPlan") -> Tuple["DeltaSeries", ...]:
    """The delta series the sensitivity stage will run, checked against the plan without imputing.

    The stage and ``check`` (:func:`gapbook.pipeline.preflight`) both call it, so a variable
    that cannot be shifted stops ``check`` as it would stop ``run``. Empty when the params
    name no variable and every analysis-model variable is complete.

    Parameters
    ----------
    params : Params
        The study's params.
    study : Study
        The study after intake.
    plan : ImputationPlan
        The imputation plan the series are checked against.

    Returns
    -------
    tuple of DeltaSeries
    """
    from .sensitivity import DeltaSpec, plan_series

    section = params.sensitivity
    grids = {variable: (DeltaSpec(values=grid.values, by=grid.by, groups=dict(grid.groups))
                        if isinstance(grid, DeltaGrid) else list(grid))
             for variable, grid in section.delta.items()}
    with params_errors(params, "sensitivity", "imputation", "analysis"):
        return plan_series(plan, study.data, variable=section.variable, grids=grids, types=study.types)


def merge_estimates(existing: Optional[pd.DataFrame], rows: pd.DataFrame, path: Path) -> pd.DataFrame:
    """``estimates.csv`` with ``rows`` in place of their strategies' rows, in the vocabulary's strategy order.

    Parameters
    ----------
    existing : DataFrame or None
        The rows ``estimates.csv`` already holds, if any.
    rows : DataFrame
        The rows of one or more strategies.
    path : Path
        The ``estimates.csv`` to write.

    Returns
    -------
    DataFrame
        The merged rows as written.
    """
    strategies = set(rows["strategy"])
    parts = [rows] if existing is None else [existing[~existing["strategy"].isin(strategies)], rows]
    table = pd.concat([p for p in parts if len(p)], ignore_index=True)
    for column in ESTIMATE_COLUMNS:
        if column not in table.columns:
            table[column] = float("nan")
    extra = [c for c in table.columns if c not in ESTIMATE_COLUMNS]
    table = table.assign(_order=table["strategy"].map(strategy_rank))
    table = table.sort_values(["_order", "strategy"], kind="stable").drop(columns="_order")
    table = table[list(ESTIMATE_COLUMNS) + extra].reset_index(drop=True)
    write_csv(table, path)
    return table


def open_stage(params: Union[None, str, Path, Dict[str, Any]] = None, out_dir: str = ".") -> StageContext:
    """The context for a stage notebook.

    Parameters
    ----------
    params : the resolved dict the runner injects, a path to a params YAML file (handy when a
        notebook is opened by hand for a one-off question), or None for the demo study.
    out_dir : the record folder; ``tables/`` and ``figures/`` are written under it.

    Returns
    -------
    StageContext
    """
    if params is None:
        from .demo import demo_params
        resolved = demo_params()
    elif isinstance(params, (str, Path)):
        resolved = load_params(params)
    else:
        resolved = Params.from_dict(params, source=params.get("source"))
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    # A stage notebook's tables are read whole on its page: no cell cut at 50 characters and no
    # columns hidden in the middle (wide tables scroll on the page instead).
    pd.set_option("display.max_colwidth", None)
    pd.set_option("display.max_columns", None)
    return StageContext(params=resolved, out_dir=out)
