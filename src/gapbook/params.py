"""The params schema: the single source of truth for keys, defaults and error messages.

A study is described by one YAML file. :func:`load_params` reads it safely, validates
every key against the models below and returns a frozen :class:`Params` whose paths are
resolved against the file's folder. Notebooks receive ``Params.to_dict()`` from the
runner and rebuild it with :meth:`Params.from_dict`; they never read YAML themselves.

Unknown keys and bad values raise :class:`~gapbook.errors.InputError` with a one-line
message that names the file and key and suggests the nearest valid word.
"""
from __future__ import annotations

import re
from pathlib import Path
from typing import Annotated, Any, Dict, List, Literal, Optional, Tuple, Union

import yaml
from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator, model_validator

from .compute import LOCAL, check_cluster_address
from .errors import InputError, did_you_mean
from .text import one_line
from .vocabulary import (COVARIANCE_STRUCTURES, FAMILY_NAMES, FOLLOWUP_STRATEGY_NAMES, IMPUTATION_METHODS,
                         INTERCURRENT_STRATEGY_NAMES, LAYOUTS, MIXED_MODEL_METHODS, TIES_METHODS,
                         TIME_TO_EVENT_FAMILIES, VARIABLE_TYPES)
from .expressions import CONDITION, VALUE, ExpressionError, parse_expression, parse_formula

__all__ = ["VariableSpec", "DeltaGrid", "Params", "load_params"]

DATA_FORMATS: Tuple[str, ...] = ("auto", "csv", "tsv", "xlsx", "parquet")
# pydantic checks a value against a Literal; the Literals are built from the vocabulary's tuples.
VariableType = Literal.__getitem__(VARIABLE_TYPES)
FamilyName = Literal.__getitem__(FAMILY_NAMES)
ImputationMethod = Literal.__getitem__(IMPUTATION_METHODS)
DataFormat = Literal.__getitem__(DATA_FORMATS)
Layout = Literal.__getitem__(LAYOUTS)
CovarianceStructure = Literal.__getitem__(COVARIANCE_STRUCTURES)
MixedModelMethod = Literal.__getitem__(MIXED_MODEL_METHODS)
FollowupStrategy = Literal.__getitem__(FOLLOWUP_STRATEGY_NAMES)
IntercurrentStrategy = Literal.__getitem__(INTERCURRENT_STRATEGY_NAMES)
STAGES: Tuple[str, ...] = ("audit", "mechanism", "cases", "indicator", "followup", "impute", "sensitivity", "simulate",
                           "report")
TiesMethod = Literal.__getitem__(TIES_METHODS)

Marker = Union[str, int, float]

# Upper bounds, checked when the params are read (documented in params/template.yaml). Each
# is far above what a real study uses (common practice, no source: m and iterations in the
# tens, a few hundred replicates) and keeps memory and time within a workstation's reach.
MAX_M = 500                  # imputations (imputation.m, sensitivity.m, simulation.m)
MAX_ITERATIONS = 1_000       # chained-equations iterations
MAX_DONORS = 100             # predictive-mean-matching donors
MAX_JOBS = 256               # parallel workers
MAX_REPLICATES = 10_000      # simulation replicates
MAX_GRID = 101               # values in one delta grid (per variable, or per group)
MAX_DELTA_VARIABLES = 20     # variables with a delta grid
MAX_TOP_PATTERNS = 1_000     # missingness patterns shown in the figures
MAX_PATTERNS_LISTED = 100_000  # missingness patterns listed one per row in audit_patterns.csv (~10 MB)
DEFAULT_MAX_PATTERNS = 1_000   # the rarer patterns share the table's last row
MAX_EM_ITERATIONS = 100_000  # EM iterations for Little's test
MAX_SEED = 2 ** 63 - 1
MAX_LIST = 1_000             # markers, reasons, levels, predictors ... in one list
MAX_TEXT = 500               # characters in a name, title or label
MAX_PARAMS_BYTES = 5_000_000 # size of the params file
MAX_PARAMS_DEPTH = 20        # nesting of the YAML (the schema itself needs 5)
MAX_VISITS = 100             # planned visits of a follow-up study (the unstructured covariance has T(T+1)/2 terms)


class _Section(BaseModel):
    # inf/nan in a range, a grid or a threshold would silently disable a check: refuse them
    model_config = ConfigDict(extra="forbid", frozen=True, allow_inf_nan=False)


Text = Annotated[str, Field(max_length=MAX_TEXT)]
Name = Annotated[str, Field(min_length=1, max_length=MAX_TEXT)]


def _bounded(kind: Any) -> Any:
    return Annotated[List[kind], Field(max_length=MAX_LIST)]


class StudySection(_Section):
    name: Text = "Unnamed study"


def _checked_condition(value: Optional[str]) -> Optional[str]:
    """A condition (applies_if, keep_rows) passes the expression language's check when the params are read."""
    if value is not None:
        parse_expression(value, where="", kind=CONDITION)
    return value


class DataSection(_Section):
    path: str
    id: Optional[str] = None
    format: DataFormat = "auto"
    sheet: Optional[Union[str, int]] = None
    encoding: str = "utf-8"
    delimiter: Optional[Literal[",", ";", "\t", "|"]] = None
    decimal: Literal[".", ","] = "."
    thousands: Optional[Literal[",", ".", " ", "'"]] = None
    ignore: _bounded(str) = Field(default_factory=list)
    engine: Literal["auto", "pandas", "duckdb"] = "auto"
    # rows the study uses: a condition in the expression language (gapbook.row_filter says how it reads cells)
    keep_rows: Optional[str] = None

    _allowed_filter = field_validator("keep_rows")(lambda value: _checked_condition(value))

    @model_validator(mode="after")
    def _distinct_marks(self) -> "DataSection":
        delimiter = self.delimiter or ("\t" if self.format == "tsv" else ",")
        if self.decimal == delimiter and self.format in ("auto", "csv", "tsv"):
            raise ValueError(f"decimal '{self.decimal}' is also the delimiter; a file with comma decimals is "
                             "usually semicolon-delimited: set delimiter: ';'")
        if self.thousands is not None and self.thousands == self.decimal:
            raise ValueError(f"thousands '{self.thousands}' is also the decimal mark")
        return self

    @field_validator("path")
    @classmethod
    def _usable_path(cls, value: str) -> str:
        # A NUL byte cannot be part of a file name: the operating system refuses it (a traceback otherwise).
        if "\x00" in value:
            raise ValueError("the path holds a NUL character (\\x00); write the data file's path as it is on disk")
        return value

    @field_validator("encoding")
    @classmethod
    def _known_encoding(cls, value: str) -> str:
        import codecs
        try:
            codecs.lookup(value)
        except LookupError:
            raise ValueError("unknown text encoding; use one Python knows, e.g. utf-8, latin-1, cp1252") from None
        return value


class VariableSpec(_Section):
    type: Optional[VariableType] = None
    label: Optional[Text] = None
    unit: Optional[Text] = None
    levels: Optional[_bounded(Union[str, int, float])] = None
    range: Optional[Tuple[Optional[float], Optional[float]]] = None
    out_of_range: Optional[Literal["flag", "missing"]] = None
    applies_if: Optional[str] = None

    _allowed_condition = field_validator("applies_if")(lambda value: _checked_condition(value))

    @field_validator("levels")
    @classmethod
    def _distinct_levels(cls, value: Optional[List[Union[str, int, float]]]) -> Optional[List[Union[str, int, float]]]:
        # Data values match levels ignoring case and surrounding spaces (as markers do), so 'a' and ' A ' are one
        # level; a repeated level would otherwise surface later as an unrelated data error.
        seen: Dict[Any, Any] = {}
        for level in value or ():
            if isinstance(level, str) and not level.strip():
                # ADSL-style flags are coded 'Y'/blank; a blank cell is always missing (reason 'blank') in
                # gapbook, in both engines, so listing it as a level would be silently ignored: say so instead.
                raise ValueError("a blank ('') cannot be a level: every blank cell is read as missing (reason "
                                 "'blank'); for a flag coded 'Y'/blank, code the blank as a word in the file (e.g. "
                                 "'N') and list it, or choose rows by the flag with data.keep_rows (e.g. "
                                 "\"FLAG == 'Y'\", where a blank cell reads as '')")
            key = str(level).strip().casefold() if isinstance(level, str) else float(level)
            if key in seen:
                raise ValueError(f"level '{one_line(level, 80)}' is listed twice"
                                 + (f" (as '{one_line(seen[key], 80)}' too)" if str(seen[key]) != str(level) else "")
                                 + "; list each level once, the reference first")
            seen[key] = level
        return value

    @model_validator(mode="after")
    def _range_ordered(self) -> "VariableSpec":
        if self.range is not None:
            lo, hi = self.range
            if lo is not None and hi is not None and lo > hi:
                raise ValueError(f"range [{lo}, {hi}] has its lower bound above its upper bound")
        return self


ReasonLabel = Annotated[str, Field(min_length=1, max_length=200)]
Reasons = Annotated[Dict[Marker, ReasonLabel], Field(max_length=MAX_LIST)]


class ColumnMissing(_Section):
    markers: _bounded(Marker) = Field(default_factory=list)
    reasons: Reasons = Field(default_factory=dict)
    use_global: bool = True     # false: only this column's own markers and reasons apply to it
    # a column whose text is the reason for this column's blank cells (e.g. ADaM DCSREAS for a missing outcome)
    reason_from: Optional[Annotated[str, Field(min_length=1, max_length=500)]] = None


class MissingSection(_Section):
    markers: _bounded(Marker) = Field(default_factory=lambda: ["", "NA", "N/A", "NaN", "null", "."])
    reasons: Reasons = Field(default_factory=dict)
    columns: Dict[str, ColumnMissing] = Field(default_factory=dict)
    out_of_range: Literal["flag", "missing"] = "flag"
    robust_z: float = Field(5.0, gt=0)


class AuditSection(_Section):
    threshold: float = Field(0.20, ge=0, le=1)
    by: List[str] = Field(default_factory=list)
    top_patterns: int = Field(15, ge=1, le=MAX_TOP_PATTERNS)
    max_patterns: int = Field(DEFAULT_MAX_PATTERNS, ge=1, le=MAX_PATTERNS_LISTED)

    @field_validator("by", mode="before")
    @classmethod
    def _one_or_many(cls, value: Any) -> Any:
        return [value] if isinstance(value, str) else value


class MechanismSection(_Section):
    variables: Optional[List[str]] = None
    alpha: float = Field(0.05, gt=0, lt=1)
    min_missing: int = Field(10, ge=1)
    em_tolerance: float = Field(1e-8, gt=0)
    em_max_iterations: int = Field(1000, ge=1, le=MAX_EM_ITERATIONS)


VisitLabel = Union[int, float, Annotated[str, Field(min_length=1, max_length=MAX_TEXT)]]


class DesignSection(_Section):
    """A follow-up study: who the participant is, which visits were planned, how the file is laid out."""

    layout: Layout = "long"
    subject: Optional[Name] = None
    visit: Name = "visit"
    visits: Annotated[List[VisitLabel], Field(min_length=1, max_length=MAX_VISITS)]
    baseline: Optional[VisitLabel] = None
    outcome_columns: Annotated[List[Name], Field(max_length=MAX_VISITS)] = Field(default_factory=list)

    @model_validator(mode="after")
    def _plan(self) -> "DesignSection":
        labels = [str(v).strip() for v in self.visits]
        repeated = [v for v in labels if labels.count(v) > 1]
        if repeated:
            raise ValueError(f"visit {repeated[0]} is listed twice; list each planned visit once, in order")
        if self.baseline is not None and str(self.baseline).strip() not in labels:
            raise ValueError(f"baseline {self.baseline} is not one of the planned visits ({', '.join(labels)}); "
                             "list it first in visits")
        if self.baseline is not None and len(labels) < 2:
            raise ValueError("list at least one visit after the baseline visit")
        if self.layout == "wide" and len(self.outcome_columns) != len(self.visits):
            raise ValueError(f"the wide layout needs outcome_columns: one outcome column per planned visit "
                             f"({len(self.visits)} visits, {len(self.outcome_columns)} columns), in the order of visits")
        columns = [c.strip() for c in self.outcome_columns]
        twice = [c for c in columns if columns.count(c) > 1]
        if twice:
            at = [label for label, c in zip(labels, columns) if c == twice[0]]
            raise ValueError(f"outcome_columns names '{twice[0]}' for visits {' and '.join(at[:2])}; each visit "
                             "needs its own outcome column")
        numbered = [v for v in self.visits if isinstance(v, (int, float)) and not isinstance(v, bool)]
        if len(numbered) == len(self.visits) and any(b <= a for a, b in zip(numbered, numbered[1:])):
            first = next(b for a, b in zip(numbered, numbered[1:]) if b <= a)
            raise ValueError(f"visits {', '.join(labels)} are not in increasing order (visit {first:g} is listed after "
                             "a later one); numbered visits are the study's time order: list them in increasing "
                             "order (dropout, last observation and the reference-based strategies follow it)")
        if self.layout == "long" and self.outcome_columns:
            raise ValueError("outcome_columns is for the wide layout; in the long layout the formula names the "
                             "outcome column")
        return self


class RepeatedSection(_Section):
    """The mixed model for repeated measures and the follow-up strategies (needs a design section)."""

    subject: Optional[Name] = None          # default design.subject; must agree with it
    visit: Optional[Name] = None            # default design.visit; must agree with it
    covariance: CovarianceStructure = "unstructured"
    method: MixedModelMethod = "reml"
    strategies: Optional[Annotated[List[FollowupStrategy], Field(min_length=1)]] = None
    reference: Optional[Union[str, int, float]] = None
    delta: Optional[Union[float, Annotated[List[float], Field(min_length=1, max_length=MAX_VISITS)]]] = None

    @model_validator(mode="after")
    def _delta_when_asked(self) -> "RepeatedSection":
        if self.strategies is not None:
            twice = [s for s in self.strategies if self.strategies.count(s) > 1]
            if twice:
                raise ValueError(f"strategy {twice[0]} is listed twice")
            if "delta_adjusted" in self.strategies and self.delta is None:
                raise ValueError("the delta_adjusted strategy needs delta: the shift of outcomes imputed after "
                                 "leaving (one number, or one per analysed visit)")
        return self


class EventSpec(_Section):
    """The event column of a time-to-event model, with the values that mean event and censored."""

    column: Name
    event: Annotated[List[Marker], Field(min_length=1, max_length=MAX_LIST)] = Field(default_factory=lambda: [1])
    censored: Annotated[List[Marker], Field(min_length=1, max_length=MAX_LIST)] = Field(
        default_factory=lambda: [0])

    @model_validator(mode="after")
    def _apart(self) -> "EventSpec":
        def key(value: Any) -> str:  # event values match ignoring case and surrounding spaces
            return str(value).strip().casefold()

        both = [v for v in self.event if key(v) in {key(c) for c in self.censored}]
        if both:
            raise ValueError(f"{both[0]!r} is listed both as an event and as censored; give it one meaning")
        return self


class AnalysisSection(_Section):
    formula: Optional[str] = None
    family: FamilyName = "gaussian"
    exposure: Optional[str] = None
    offset: Optional[str] = None
    robust: bool = False
    alpha: float = Field(0.05, gt=0, lt=1)
    repeated: Optional[RepeatedSection] = None
    event: Optional[Union[Name, EventSpec]] = None
    ties: TiesMethod = "efron"

    @model_validator(mode="after")
    def _time_to_event(self) -> "AnalysisSection":
        if self.family in TIME_TO_EVENT_FAMILIES:
            if self.event is None:
                raise ValueError(f"family {self.family} needs analysis.event, the column that is 1 for an event and "
                                 "0 for censored (or {column: ..., event: [...], censored: [...]})")
            if self.offset is not None:
                raise ValueError(f"family {self.family} takes no offset; drop analysis.offset (follow-up time is "
                                 "the formula's left side)")
        elif self.event is not None:
            raise ValueError(f"analysis.event is used only with family: {', '.join(TIME_TO_EVENT_FAMILIES)}; "
                             "drop it, or set the family")
        return self

    def event_column(self) -> Optional[str]:
        """The event column's name, or None without a time-to-event model."""
        return self.event.column if isinstance(self.event, EventSpec) else self.event

    @field_validator("formula")
    @classmethod
    def _allowed_formula(cls, value: Optional[str]) -> Optional[str]:
        if value is not None:
            parse_formula(value, where="")
        return value


class ImputationSection(_Section):
    m: int = Field(20, ge=1, le=MAX_M)
    iterations: int = Field(10, ge=1, le=MAX_ITERATIONS)
    seed: int = Field(20261202, ge=0, le=MAX_SEED)
    donors: int = Field(5, ge=1, le=MAX_DONORS)
    n_jobs: int = Field(1, ge=1, le=MAX_JOBS)
    methods: Dict[str, ImputationMethod] = Field(default_factory=dict)
    passive: Dict[str, str] = Field(default_factory=dict)
    predictors: Dict[str, List[str]] = Field(default_factory=dict)
    exclude_predictors: Dict[str, List[str]] = Field(default_factory=dict)
    auxiliary: List[str] = Field(default_factory=list)

    @field_validator("passive")
    @classmethod
    def _allowed_passive(cls, value: Dict[str, str]) -> Dict[str, str]:
        for name, formula in value.items():
            parse_expression(formula, where=str(name), kind=VALUE)
        return value


def _grid(values: List[float], what: str) -> List[float]:
    if not values:
        raise ValueError(f"the delta grid {what}is empty; give at least one value, e.g. [0, 0.5, 1.0]")
    if len(values) > MAX_GRID:
        raise ValueError(f"the delta grid {what}has {len(values)} values; at most {MAX_GRID} are allowed")
    return values


class DeltaGrid(_Section):
    values: Optional[List[float]] = None
    by: Optional[str] = None
    groups: Dict[str, List[float]] = Field(default_factory=dict)

    @model_validator(mode="after")
    def _some_grid(self) -> "DeltaGrid":
        if self.values is not None:
            _grid(self.values, "")
        for group, values in self.groups.items():
            _grid(values, f"of group '{group}' ")
        if self.values is None and not self.groups:
            raise ValueError("give the delta grid as values: [...] or, with by:, as groups: {group: [...]}")
        if len(self.groups) > MAX_GRID:
            raise ValueError(f"{len(self.groups)} groups; at most {MAX_GRID} are allowed")
        return self


class SensitivitySection(_Section):
    variable: Optional[str] = None
    delta: Dict[str, Union[List[float], DeltaGrid]] = Field(default_factory=dict)
    m: Optional[int] = Field(None, ge=1, le=MAX_M)

    @field_validator("delta")
    @classmethod
    def _grids(cls, value: Dict[str, Any]) -> Dict[str, Any]:
        if len(value) > MAX_DELTA_VARIABLES:
            raise ValueError(f"{len(value)} variables have a delta grid; at most {MAX_DELTA_VARIABLES} are allowed")
        for name, grid in value.items():
            if isinstance(grid, list):
                _grid(grid, f"of '{name}' ")
        return value


class SimulationSection(_Section):
    # About a minute for the demo's simulate stage on 2 cores; the page gives the Monte Carlo SEs this buys.
    replicates: int = Field(40, ge=2, le=MAX_REPLICATES)
    seed: int = Field(20261203, ge=0, le=MAX_SEED)
    n_jobs: int = Field(2, ge=1, le=MAX_JOBS)
    m: int = Field(5, ge=1, le=MAX_M)
    mar_on: List[str] = Field(default_factory=list)


class IntercurrentEvent(_Section):
    event: Name
    strategy: IntercurrentStrategy


class EstimandSection(_Section):
    """The estimand (ICH E9(R1), 2019): what the analysis is meant to estimate, stated before it is estimated."""

    population: Optional[Text] = None
    treatment: Optional[Text] = None
    variable: Optional[Text] = None
    intercurrent_events: Annotated[List[IntercurrentEvent], Field(max_length=MAX_LIST)] = Field(default_factory=list)
    summary: Optional[Text] = None
    primary: Optional[FollowupStrategy] = None


class ComputeSection(_Section):
    cluster: str = LOCAL

    @field_validator("cluster")
    @classmethod
    def _address(cls, value: str) -> str:
        try:
            return check_cluster_address(value)
        except InputError as exc:
            raise ValueError(exc.message) from None


class ReportSection(_Section):
    title: Optional[Text] = None
    min_cell: int = Field(5, ge=0)
    suppress_small: bool = False
    group: Optional[str] = None


SECTIONS: Tuple[str, ...] = (
    "study", "data", "design", "variables", "missing", "audit", "mechanism", "estimand", "analysis",
    "imputation", "sensitivity", "simulation", "report", "compute",
)


class Params(_Section):
    """Resolved, validated study params. ``source`` is the params file (None when built in code)."""

    study: StudySection = Field(default_factory=StudySection)
    data: DataSection
    design: Optional[DesignSection] = None
    variables: Dict[str, VariableSpec] = Field(default_factory=dict)
    missing: MissingSection = Field(default_factory=MissingSection)
    audit: AuditSection = Field(default_factory=AuditSection)
    mechanism: MechanismSection = Field(default_factory=MechanismSection)
    estimand: Optional[EstimandSection] = None
    analysis: AnalysisSection = Field(default_factory=AnalysisSection)
    imputation: ImputationSection = Field(default_factory=ImputationSection)
    sensitivity: SensitivitySection = Field(default_factory=SensitivitySection)
    simulation: SimulationSection = Field(default_factory=SimulationSection)
    report: ReportSection = Field(default_factory=ReportSection)
    compute: ComputeSection = Field(default_factory=ComputeSection)
    source: Optional[str] = None

    @model_validator(mode="before")
    @classmethod
    def _empty_sections(cls, raw: Any) -> Any:
        # A section whose keys are all commented out reads as None: treat it as absent.
        if isinstance(raw, dict):
            return {k: v for k, v in raw.items() if not (v is None and k in SECTIONS)}
        return raw

    @property
    def data_path(self) -> Path:
        """The data file, resolved against the params file's folder."""
        path = Path(self.data.path).expanduser()
        if not path.is_absolute() and self.source:
            path = Path(self.source).parent / path
        return path.resolve()

    @property
    def label(self) -> str:
        return self.source or "params"

    @property
    def is_followup(self) -> bool:
        """Whether the study is a follow-up study (a ``design`` section names subject and planned visits)."""
        return self.design is not None

    @property
    def subject_column(self) -> Optional[str]:
        """The participant column of a follow-up study: ``design.subject``, else ``data.id``."""
        if self.design is None:
            return None
        return self.design.subject or self.data.id

    def to_dict(self) -> Dict[str, Any]:
        """Plain JSON/YAML-ready dict with the data path made absolute (what notebooks receive)."""
        out = self.model_dump(mode="json")
        out["data"]["path"] = str(self.data_path)
        return out

    def to_yaml(self) -> str:
        body = self.to_dict()
        body.pop("source", None)
        return yaml.safe_dump(body, sort_keys=False, allow_unicode=True)

    @classmethod
    def from_dict(cls, raw: Dict[str, Any], source: Optional[str] = None) -> "Params":
        """Validate a params mapping; errors name ``source`` (the file) and the key."""
        label = source or raw.get("source") or "params"
        if not isinstance(raw, dict):
            raise InputError(f"{label}: the params file must be a mapping of sections ({', '.join(SECTIONS)})")
        _check_depth(raw, label)
        body = dict(raw)
        if source is not None:
            body["source"] = str(source)
        try:
            params = cls.model_validate(body)
        except ValidationError as exc:
            raise InputError(_explain(exc, label)) from None
        except RecursionError:
            raise InputError(f"{label}: the params are nested too deeply") from None
        _check_followup(params, label)
        _check_reason_sources(params, label)
        return params


class _RepeatedKey(Exception):
    """A key written twice in one mapping of the params file."""


class _UniqueKeyLoader(yaml.SafeLoader):
    """YAML's safe loader, refusing a key written twice in one mapping.

    Plain YAML loading keeps the last of two equal keys and drops the first without a word, so a
    second ``variables:`` section or a repeated variable would silently replace what was written
    first. Safe loading otherwise (no tags that build Python objects).
    """

    def construct_mapping(self, node: yaml.MappingNode, deep: bool = False) -> Dict[Any, Any]:
        seen: Dict[Any, int] = {}
        for key_node, _ in node.value:
            if key_node.tag == "tag:yaml.org,2002:merge":
                continue  # '<<: *anchor' brings keys that the mapping's own keys may override
            key = self.construct_object(key_node, deep=True)
            try:
                first = seen.get(key)
            except TypeError:  # an unhashable key; the schema refuses it with its own message
                continue
            if first is not None:
                raise _RepeatedKey(f"the key '{one_line(str(key), 80)}' is written twice (lines {first} and "
                                   f"{key_node.start_mark.line + 1}); keep one (YAML would silently keep "
                                   "only the last)")
            seen[key] = key_node.start_mark.line + 1
        return super().construct_mapping(node, deep=deep)


# YAML 1.1 reads yes/no/on/off (any case) as true/false, so `event: [yes]`, `levels: [no, yes]` or
# `markers: ["n", no]` silently became booleans (then 1 and 0) and never matched the data's text. Only
# true/false are booleans here (as in YAML 1.2); switches still take yes/no, which the schema reads as
# booleans itself.
_UniqueKeyLoader.yaml_implicit_resolvers = {
    first: [(tag, pattern) for tag, pattern in resolvers if tag != "tag:yaml.org,2002:bool"]
    for first, resolvers in yaml.SafeLoader.yaml_implicit_resolvers.items()}
_UniqueKeyLoader.add_implicit_resolver("tag:yaml.org,2002:bool", re.compile(r"^(?:true|True|TRUE|false|False|FALSE)$"),
                                       list("tTfF"))


def load_params(path: Union[str, Path]) -> Params:
    """Read and validate a params YAML file (safe loading only).

    Parameters
    ----------
    path : str or Path
        The params file; a relative ``data.path`` in it is taken from the file's folder.

    Returns
    -------
    Params
        The resolved params; an unknown key or bad value exits 2 naming it.
    """
    path = Path(path)
    if not path.is_file():
        what = "is not a regular file (a folder, pipe or device)" if path.exists() else "params file not found"
        raise InputError(f"{path}: {what}; give the path to a YAML file (see 'gapbook new DIR')")
    size = path.stat().st_size
    if size > MAX_PARAMS_BYTES:
        raise InputError(f"{path}: the params file is {size:,} bytes; at most {MAX_PARAMS_BYTES:,} are allowed "
                         "(is it the data file?)")
    try:
        raw = yaml.load(path.read_text(encoding="utf-8"), Loader=_UniqueKeyLoader)
    except RecursionError:
        raise InputError(f"{path}: the YAML is nested too deeply; the params need at most {MAX_PARAMS_DEPTH} "
                         "levels") from None
    except _RepeatedKey as exc:
        raise InputError(f"{path}: {exc}") from None
    except UnicodeDecodeError:  # before ValueError, of which it is a kind
        raise InputError(f"{path}: not a UTF-8 text file; save the params file as UTF-8") from None
    except ValueError:  # e.g. an integer of thousands of digits
        raise InputError(f"{path}: holds a value YAML cannot read (a number thousands of digits long?)") from None
    except yaml.YAMLError as exc:
        mark = getattr(exc, "problem_mark", None)
        where = f" at line {mark.line + 1}" if mark is not None else ""
        raise InputError(f"{path}: not valid YAML{where}; check indentation and quoting") from None
    if raw is None:
        raise InputError(f"{path}: the params file is empty; it needs at least a 'data' section with 'path'")
    return Params.from_dict(raw, source=str(path.resolve()))


def _check_wide_columns(params: Params, subject: str, label: str) -> None:
    """A wide layout's outcome columns are neither the subject column nor a covariate of the formula.

    The subject column is the id, kept apart from the variables: 'not a column of the data' sent
    the user looking for a column that is there. A covariate listed as an outcome column became
    the outcome at a visit and vanished from the covariates, so the formula's 'not a column' was
    wrong too.
    """
    key = "design.subject" if params.design.subject else "data.id"
    columns = [c.strip() for c in params.design.outcome_columns]
    if subject in columns:
        raise InputError(f"{label}: design.outcome_columns names '{one_line(subject, 80)}', the subject column "
                         f"({key}); list the outcome's own column at each planned visit")
    try:
        covariates = parse_formula(params.analysis.formula, where="").columns if params.analysis.formula else ()
    except ExpressionError:
        return  # the formula's own check names what is wrong with it
    both = [c for c in columns if c in covariates]
    if both:
        raise InputError(f"{label}: design.outcome_columns names '{one_line(both[0], 80)}', which analysis.formula "
                         "uses as a covariate (one value per participant); list the outcome's own column at each "
                         "planned visit, or take it out of the formula")


def _check_reason_sources(params: Params, label: str) -> None:
    """A reason column (``missing.columns.<x>.reason_from``) is set apart from the variables, so nothing may use it.

    Intake drops it from the study's variables; named by the formula (or as the column itself)
    the study lost that variable, and check said "analysis.formula: 'arm' is not a column of the
    data" about a column that is in the file.
    """
    uses: Dict[str, str] = {}
    if params.analysis.formula:
        try:
            parsed = parse_formula(params.analysis.formula, where="")
            uses.update({column: "analysis.formula" for column in (parsed.outcome, *parsed.columns)})
        except ExpressionError:
            pass  # the formula's own check names what is wrong with it
    event = params.analysis.event_column()
    if event is not None:
        uses[event] = "analysis.event"
    uses.update({column: "audit.by" for column in params.audit.by})
    for name, section in params.missing.columns.items():
        source = section.reason_from
        if source is None:
            continue
        key = f"missing.columns.{name}.reason_from"
        if source == name:
            raise InputError(f"{label}: {key} names '{one_line(name, 80)}' itself; name the column that says why "
                             f"{one_line(name, 80)} is blank (e.g. a discontinuation reason)")
        if source in uses:
            raise InputError(f"{label}: {key}: '{one_line(source, 80)}' is used by {uses[source]}, but a reason column "
                             "gives reasons and is no variable of the study; name another column, or take it out of "
                             f"{uses[source]}")


def _check_followup(params: Params, label: str) -> None:
    """Keys of different sections that must agree in a follow-up study (design, analysis.repeated, estimand)."""
    design, repeated = params.design, params.analysis.repeated
    if design is None:
        if repeated is not None:
            raise InputError(f"{label}: analysis.repeated needs a design section naming the subject column, the "
                             "visit column and the planned visits (see params/template.yaml)")
        return
    subject = params.subject_column
    if subject is None:
        raise InputError(f"{label}: design.subject is required: name the column that identifies the participant "
                         "(e.g. USUBJID)")
    if design.layout == "wide" and params.data.id is None:
        raise InputError(f"{label}: data.id is required in the wide layout: name the participant column "
                         f"(design.subject '{subject}')")
    if params.data.id is not None and params.data.id != subject:
        raise InputError(f"{label}: data.id '{params.data.id}' and design.subject '{subject}' differ; in a follow-up "
                         "study the participant column is the id: give one of them, or the same column in both")
    if design.layout == "long" and design.visit == subject:
        raise InputError(f"{label}: design.visit '{design.visit}' is also the subject column")
    if design.layout == "wide":
        _check_wide_columns(params, subject, label)
    if repeated is not None:
        for key, given, expected in (("subject", repeated.subject, subject), ("visit", repeated.visit, design.visit)):
            if given is not None and given != expected:
                raise InputError(f"{label}: analysis.repeated.{key} '{given}' differs from design.{key} "
                                 f"'{expected}'; the model's {key} column is the design's (leave it out or make "
                                 "them the same)")
        if isinstance(repeated.delta, list):
            analysed = len(design.visits) - (design.baseline is not None)
            if len(repeated.delta) != analysed:
                raise InputError(f"{label}: analysis.repeated.delta has {len(repeated.delta)} values; give one number "
                                 f"or one per analysed visit ({analysed}, baseline excluded)")
    if params.analysis.family != "gaussian":
        raise InputError(f"{label}: analysis.family is '{params.analysis.family}'; the follow-up analyses (mixed "
                         "model for repeated measures) take a continuous outcome: use family gaussian")


def _check_depth(raw: Any, label: str) -> None:
    """Refuse params nested deeper than any valid params file (before anything walks them recursively)."""
    stack = [(raw, 0)]
    seen = 0
    while stack:
        node, depth = stack.pop()
        if depth > MAX_PARAMS_DEPTH:
            raise InputError(f"{label}: the params are nested more than {MAX_PARAMS_DEPTH} levels deep; "
                             "see params/template.yaml for the layout")
        if isinstance(node, dict):
            children = list(node.keys()) + list(node.values())
        elif isinstance(node, (list, tuple)):
            children = list(node)
        else:
            continue
        seen += len(children)
        if seen > MAX_LIST * MAX_LIST:  # YAML aliases can make a small file a huge structure
            raise InputError(f"{label}: the params hold too many entries; see params/template.yaml")
        stack.extend((child, depth + 1) for child in children)


# ---------------------------------------------------------------------------
# error messages

def _inner_model(annotation: Any) -> Any:
    """Unwrap Optional/Dict/List annotations to the nested model, if any."""
    args = getattr(annotation, "__args__", None)
    if isinstance(annotation, type) and issubclass(annotation, BaseModel):
        return annotation
    if args:
        for arg in reversed(args):
            inner = _inner_model(arg)
            if inner is not None:
                return _DictOf(inner) if getattr(annotation, "__origin__", None) is dict else inner
    return None


class _DictOf:
    def __init__(self, model: type):
        self.model = model


def _dotted(loc: Tuple[Any, ...]) -> str:
    parts = [str(p) for p in loc if not str(p).startswith(("function-", "union", "tagged"))]
    return ".".join(parts) if parts else "(top level)"


def _parent_fields(loc: Tuple[Any, ...]) -> List[str]:
    model: Any = Params
    for part in loc:
        if isinstance(model, _DictOf):
            model = model.model
            continue
        if not (isinstance(model, type) and issubclass(model, BaseModel)):
            return []
        field = model.model_fields.get(str(part))
        if field is None:
            return []
        model = _inner_model(field.annotation)
    if isinstance(model, _DictOf):
        return []
    if isinstance(model, type) and issubclass(model, BaseModel):
        return [k for k in model.model_fields if k != "source"]
    return []


def _explain(exc: ValidationError, label: str) -> str:
    """One line for the first validation error, naming file and key, with a suggestion."""
    # Several errors (or one per member of a Union) may be reported; name the most telling:
    # an unknown key before a missing one, and the deepest location first.
    priority = {"extra_forbidden": 0, "literal_error": 1, "value_error": 1}
    error = min(exc.errors(), key=lambda e: (priority.get(e["type"], 2), -len(e["loc"])))
    loc = tuple(p for p in error["loc"] if not str(p).startswith(("function-", "tagged-union")))
    # Union members add their class name to the location; drop those.
    loc = tuple(p for p in loc if not (isinstance(p, str) and p[:1].isupper() and p.endswith(("Grid", "Spec"))))
    loc = tuple(p for p in loc if p not in ("list[float]", "str", "int", "float", "list[union[str,int,float]]"))
    kind = error["type"]
    key = _dotted(loc)
    cause = error.get("ctx", {}).get("error")
    if isinstance(cause, ExpressionError):
        return f"{label}: {key}{'.' + cause.where if cause.where else ''}: {cause.detail}"
    if kind in ("less_than_equal", "too_long") and not isinstance(error.get("input"), (dict, list)):
        bound = error.get("ctx", {}).get("le", error.get("ctx", {}).get("max_length"))
        what = "characters" if isinstance(error.get("input"), str) else "items" if kind == "too_long" else ""
        return (f"{label}: {key}: {_short(error.get('input'))} is above the upper bound {bound}{' ' + what if what else ''}"
                " (bounds keep memory and time sane; see params/template.yaml)")
    if kind == "too_long":
        bound = error.get("ctx", {}).get("max_length")
        return f"{label}: {key}: more than {bound} entries; see params/template.yaml"
    if kind == "extra_forbidden":
        word = str(loc[-1])
        valid = _parent_fields(loc[:-1])
        where = _dotted(loc[:-1])
        return (f"{label}: unknown key '{word}' in {where}{did_you_mean(word, valid)}"
                + (f" (valid keys: {', '.join(valid)})" if valid else ""))
    if kind == "literal_error":
        given = error.get("input")
        expected = error.get("ctx", {}).get("expected", "")
        choices = [c.strip().strip("'") for c in expected.replace(" or ", ",").split(",") if c.strip()]
        return (f"{label}: {key}: '{given}' is not one of {', '.join(choices)}"
                f"{did_you_mean(str(given), choices)}")
    if kind == "missing":
        return f"{label}: {key} is required; add it to the params file"
    message = error.get("msg", "invalid value").replace("Value error, ", "")
    given = error.get("input")
    shown = "" if isinstance(given, (dict, list)) else f" (got {_short(given)})"
    return f"{label}: {key}: {message}{shown}"


def _short(value: Any, limit: int = 80) -> str:
    text = repr(value) if not isinstance(value, int) or isinstance(value, bool) else str(value)
    return text if len(text) <= limit else text[: limit - 3] + "..."
