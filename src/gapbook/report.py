"""The summary page of a record: participant flow, missing data per variable, a reporting
checklist and drafted methods and results paragraphs filled with this run's numbers.

Every function reads tables that earlier stages wrote (passed in as DataFrames, None when
that stage did not run) plus the study after intake, and returns frozen results. Nothing
here fits a model: the numbers in the text are the numbers in the tables, so the page and
the record cannot disagree.
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Dict, List, Mapping, Optional, Sequence, Tuple

import numpy as np
import pandas as pd

from .errors import InputError, did_you_mean
from .intake import Study
from .impute import ImputationSettings
from .models import AnalysisModel, check_formula, exposure_rows, exposure_terms
from .inference import format_estimate, format_p, is_false_cell
from .text import first_upper, level_text, md_escape
from .vocabulary import STRATEGY_PHRASES, cautions as page_cautions, effect_scale, has_ratio_scale

__all__ = ["COUNT_TABLES", "RecordSuppression", "suppress_small_counts", "suppress_record_tables", "ReportSummary",
           "REPORT_TABLES", "summarise"]

# Count columns of the record's tables that small-count suppression masks, by table.
COUNT_TABLES: Dict[str, Tuple[str, ...]] = {
    "audit_variables": ("n", "n_missing"),
    "audit_patterns": ("n_rows",),
    "audit_by_group": ("n", "n_missing"),
    "flow_complete_case": ("n", "n_rows", "n_complete", "n_excluded"),
    "participant_flow": (),
    "descriptives": ("n", "n_missing", "count"),
    # follow-up studies (their visit column holds whole numbers too, so the count columns are named)
    "followup_completeness": ("n_participants", "n_observed"),
    "followup_patterns": ("n",),
    "followup_stopping_reasons": ("n",),
    "followup_retention": ("n_at_risk", "n_left_after"),
    "followup_leavers": ("n_leaving", "n_staying"),
    "followup_profiles": ("n_cohort", "n"),
}
# A derived cell that would give a masked count away, masked with it: {table: {count column: derived}}.
FOLLOWUP_LINKED: Dict[str, Dict[str, str]] = {
    "followup_completeness": {"n_observed": "pct_observed"},
    "followup_patterns": {"n": "pct"},
    "followup_stopping_reasons": {"n": "pct_of_leavers"},
    "followup_leavers": {"n_leaving": "mean_leaving"},
    "followup_profiles": {"n": "mean"},
}


# ---------------------------------------------------------------------------
# small-count suppression

@dataclass(frozen=True)
class SuppressedTable:
    """A count table with small counts masked (``masked``), and how many cells were masked."""

    masked: pd.DataFrame
    n_masked: int
    columns: Tuple[str, ...]


@dataclass(frozen=True)
class RecordSuppression:
    """Small-count suppression of the record's count tables: each masked table and the count masked."""

    suppressed: Dict[str, SuppressedTable]
    min_cell: int
    sentences: Tuple[str, ...] = ()

    def tables(self) -> Dict[str, pd.DataFrame]:
        """The masked tables, under their record names (they replace the unmasked ones)."""
        return {name: part.masked for name, part in self.suppressed.items()}


def suppress_small_counts(frame: pd.DataFrame, *, min_cell: int, columns: Optional[Sequence[str]] = None,
                          linked: Optional[Mapping[str, str]] = None) -> SuppressedTable:
    """Mask counts from 1 to ``min_cell - 1`` (zero is kept: it discloses nobody).

    Parameters
    ----------
    frame : a table of counts.
    min_cell : the smallest count that may be shown (``report.min_cell``).
    columns : the count columns; by default every column named ``n``, ``n_*`` or ``*_n`` plus
        integer-valued numeric columns that are not flags.
    linked : {count column: derived column} — the derived cell (e.g. a percentage) is masked
        wherever its count is, since it would give the count away.

    Returns
    -------
    SuppressedTable whose masked cells read ``"<min_cell"`` (the column becomes text).

    References
    ----------
    Common practice in statistical disclosure control (threshold rules); no single source.
    """
    columns = tuple(columns) if columns is not None else count_columns(frame)
    linked = dict(linked or {})
    table = frame.copy()
    shown = f"<{min_cell}"
    masked_total = 0
    if min_cell <= 1:
        return SuppressedTable(table, 0, columns)
    for column in columns:
        if column not in table.columns:
            continue
        values = pd.to_numeric(table[column], errors="coerce")
        small = (values >= 1) & (values < min_cell)
        if not small.any():
            continue
        masked_total += int(small.sum())
        table[column] = table[column].astype(object).where(~small, shown)
        derived = linked.get(column)
        if derived is not None and derived in table.columns:
            table[derived] = table[derived].astype(object).where(~small, "suppressed")
    return SuppressedTable(table, masked_total, columns)


def count_columns(frame: pd.DataFrame) -> Tuple[str, ...]:
    """Columns that hold counts: named n / n_* / *_n, or whole non-negative numbers that are not 0/1 flags."""
    found: List[str] = []
    for column in frame.columns:
        name = str(column)
        if name == "n" or name.startswith("n_") or name.endswith("_n"):
            found.append(name)
            continue
        values = frame[column]
        if not pd.api.types.is_numeric_dtype(values) or pd.api.types.is_bool_dtype(values):
            continue
        observed = values.dropna().to_numpy(dtype=float)
        if len(observed) == 0 or np.any(observed < 0) or np.any(np.mod(observed, 1) != 0):
            continue
        if set(np.unique(observed)) <= {0.0, 1.0}:
            continue  # a 0/1 pattern or flag column, not a count
        if name.startswith(("pct", "p_", "df")) or name in ("statistic", "df", "m", "iterations"):
            continue
        found.append(name)
    return tuple(found)


def suppress_record_tables(tables: Mapping[str, Optional[pd.DataFrame]], *, min_cell: int) -> RecordSuppression:
    """Small-count suppression for every count table of the record that is present.

    ``audit_variables`` also masks its reason-count columns and the ``pct_missing`` of a
    masked ``n_missing``.

    Parameters
    ----------
    tables : the record's count tables by name (None for a table the record lacks).
    min_cell : the smallest count that may be shown.

    Returns
    -------
    RecordSuppression whose :meth:`~RecordSuppression.tables` replace the unmasked tables.

    References
    ----------
    Common practice in statistical disclosure control (threshold rules); no single source.
    """
    out: Dict[str, SuppressedTable] = {}
    for name, frame in tables.items():
        if frame is None:
            continue
        if name == "audit_variables":
            known = ("variable", "type", "n", "n_missing", "pct_missing", "over_threshold")
            reason_columns = [c for c in frame.columns if c not in known and pd.api.types.is_numeric_dtype(frame[c])]
            out[name] = suppress_small_counts(frame, min_cell=min_cell, columns=["n", "n_missing", *reason_columns],
                                              linked={"n_missing": "pct_missing"})
        elif name in FOLLOWUP_LINKED or name == "followup_retention":
            out[name] = suppress_small_counts(frame, min_cell=min_cell, columns=COUNT_TABLES[name],
                                              linked=FOLLOWUP_LINKED.get(name))
        elif name == "audit_patterns":
            out[name] = suppress_small_counts(frame, min_cell=min_cell, columns=["n_rows"],
                                              linked={"n_rows": "pct_rows"})
        else:
            out[name] = suppress_small_counts(frame, min_cell=min_cell)
    sentence = (f"Counts below {min_cell} masked: "
                + (", ".join(f"{name} {part.n_masked}" for name, part in out.items()) or "none") + ".")
    return RecordSuppression(suppressed=out, min_cell=min_cell, sentences=(sentence,))


# ---------------------------------------------------------------------------
# participant flow

@dataclass(frozen=True)
class ParticipantFlow:
    """Rows at each step from the file to each analysis, overall and by group.

    ``steps`` has columns step, description, all, and one column per group level.
    """

    steps: pd.DataFrame
    group: Optional[str]
    n_rows: int
    n_complete: int


def flow_group(study: Study, *, group: Optional[str] = None, exposure: Optional[str] = None) -> Optional[str]:
    """The grouping column of the flow: ``group`` when given, else a categorical exposure, else none."""
    if group is not None:
        if group not in study.data.columns:
            raise InputError(f"'{group}' is not a column of the data{did_you_mean(group, study.data.columns)}",
                             option="group")
        return group
    if exposure in study.data.columns and study.variables[exposure].is_categorical:
        return exposure
    return None


def participant_flow(study: Study, *, formula: Optional[str], group: Optional[str] = None,
                     estimates: Optional[pd.DataFrame] = None, event: Optional[str] = None) -> ParticipantFlow:
    """Count participants from the file to each analysis (CONSORT-style flow), by group when given.

    Parameters
    ----------
    study : the study after intake.
    formula : the analysis formula (its variables define "complete data for the model"), or None
        when there is no model: the flow is then rows in the file and rows with every
        variable observed.
    group : a column to split the counts by (e.g. the trial arm), or None.
    estimates : ``estimates.csv``; its ``n_used`` per strategy gives the analysed counts.
        A strategy's counts by group are shown when the rows it used can be identified
        (complete rows, rows with the outcome observed, or all rows) by matching its total.
    event : a time-to-event model's event column: the outcome is then observed when both the
        follow-up time and the event status are, and the rows lacking either are counted by reason.

    Returns
    -------
    ParticipantFlow.

    References
    ----------
    Schulz KF, Altman DG, Moher D (2010). CONSORT 2010 statement. BMJ 340:c332 (participant flow).
    """
    data = study.data
    missing = study.missing
    if formula:
        outcome, used = check_formula(formula, list(data.columns))
        model_columns = [outcome] + [c for c in used if c != outcome]
    else:
        outcome, model_columns = None, list(data.columns)
    complete = ~missing[model_columns].any(axis=1).to_numpy()
    everyone = np.ones(len(data), dtype=bool)
    levels: List[str] = []
    if group is not None:
        if group not in data.columns:
            raise InputError(f"report.group: '{group}' is not a column of the data{did_you_mean(group, data.columns)}")
        group_values = data[group].astype(object).map(level_text).where(data[group].notna(), "(missing)")
        levels = list(pd.unique(group_values))
        if isinstance(data[group].dtype, pd.CategoricalDtype):
            ordered = [str(c) for c in data[group].cat.categories]
            levels = [c for c in ordered if c in levels] + [c for c in levels if c not in ordered]
    else:
        group_values = pd.Series(["all"] * len(data))

    def counts(mask: np.ndarray) -> Dict[str, float]:
        row = {"all": float(mask.sum())}
        for level in levels:
            row[level] = float((mask & (group_values == level).to_numpy()).sum())
        return row

    kept = study.rows_kept  # data.keep_rows: the flow starts from the kept rows, and says so
    described = ("rows in the data file" if kept is None else
                 f"rows kept by data.keep_rows ({kept.n_kept:,} of the {kept.n_read:,} in the data file)")
    rows = [{"step": "in_file", "description": described, **counts(everyone)}]
    if outcome is None:
        rows.append({"step": "complete_all_variables", "description": "every variable observed", **counts(complete)})
        table = pd.DataFrame(rows, columns=["step", "description", "all", *levels])
        return ParticipantFlow(steps=table, group=group, n_rows=int(everyone.sum()), n_complete=int(complete.sum()))
    observed_outcome = ~missing[outcome].to_numpy()
    described = f"outcome ({outcome}) observed"
    reasons = study.reasons[outcome]
    if event is not None:  # the time's reason, else the status's
        observed_outcome = observed_outcome & ~missing[event].to_numpy()
        described = f"outcome observed: follow-up time ({outcome}) and event status ({event})"
        labels = list(dict.fromkeys([*reasons.cat.categories, *study.reasons[event].cat.categories]))
        reasons = pd.Categorical(reasons.astype(object).where(reasons.notna(), study.reasons[event].astype(object)),
                                 categories=labels)
        reasons = pd.Series(reasons, index=study.reasons.index)
    rows.append({"step": "outcome_observed", "description": described, **counts(observed_outcome)})
    for reason in [r for r in reasons.cat.categories if (reasons == r).any()]:
        rows.append({"step": f"outcome_missing: {reason}", "description": f"outcome missing: {reason}",
                     **counts((reasons == reason).fillna(False).to_numpy(dtype=bool))})
    rows.append({"step": "complete_for_model", "description": "every model variable observed", **counts(complete)})
    if estimates is not None and "n_used" in estimates.columns:
        candidates = [complete, observed_outcome, everyone]
        for strategy, part in estimates.groupby("strategy", sort=False):
            total = part["n_used"].dropna()
            if total.empty:
                continue
            n_used = float(total.iloc[0])
            row = {"step": f"analysed: {strategy}",
                   "description": f"analysed under {STRATEGY_PHRASES.get(strategy, strategy)}", "all": n_used}
            match = next((mask for mask in candidates if float(mask.sum()) == n_used), None)
            for level in levels:
                row[level] = counts(match)[level] if match is not None else float("nan")
            rows.append(row)
    table = pd.DataFrame(rows, columns=["step", "description", "all", *levels])
    return ParticipantFlow(steps=table, group=group, n_rows=int(everyone.sum()), n_complete=int(complete.sum()))


# ---------------------------------------------------------------------------
# missing data per variable

@dataclass(frozen=True)
class MissingSummary:
    """Missing values per variable with the reasons (``variables``), and the variables above the audit threshold."""

    variables: pd.DataFrame
    threshold: float
    over_threshold: Tuple[str, ...]


def missing_summary(study: Study, *, threshold: float,
                    audit_variables: Optional[pd.DataFrame] = None) -> MissingSummary:
    """Per variable: n, n_missing, pct_missing, over_threshold and the reasons in words.

    Parameters
    ----------
    study : the study after intake (gives the reasons when the audit table lacks them).
    threshold : the audit threshold fraction (``audit.threshold``).
    audit_variables : ``audit_variables.csv`` when the audit stage ran; its counts are used
        as they are so the summary and the audit table agree.

    Returns
    -------
    MissingSummary with columns variable, n, n_missing, pct_missing, over_threshold, reasons.

    References
    ----------
    von Elm E et al. (2007). STROBE statement. Lancet 370:1453-1457 (item on missing data per variable).
    """
    missing = study.missing
    not_applicable = study.not_applicable.sum()
    rows = []
    for variable in study.data.columns:
        reasons = study.reasons[variable]
        counts = reasons[missing[variable].to_numpy()].value_counts()
        counts = counts[counts > 0]
        words = "; ".join(f"{reason} {int(n)}" for reason, n in counts.items())
        n_missing = int(missing[variable].sum())
        n = int(len(study.data) - not_applicable[variable])
        rows.append({"variable": variable, "n": n, "n_missing": n_missing,
                     "pct_missing": 100.0 * n_missing / n if n else float("nan"),
                     "over_threshold": bool(n and n_missing / n > threshold), "reasons": words})
    table = pd.DataFrame(rows)
    if audit_variables is not None and {"variable", "n_missing"} <= set(audit_variables.columns):
        audit = audit_variables.set_index("variable")
        for column in ("n", "n_missing", "pct_missing"):
            if column in audit.columns:
                # a rerun on a record whose tables are already suppressed holds text like "<5": keep our own count
                mapped = pd.to_numeric(table["variable"].map(audit[column]), errors="coerce")
                table[column] = mapped.where(mapped.notna(), table[column])
        if "over_threshold" in audit.columns:
            mapped = table["variable"].map(audit["over_threshold"].astype(str).str.lower().eq("true"))
            table["over_threshold"] = mapped.where(mapped.notna(), table["over_threshold"]).astype(bool)
    flagged = tuple(table.loc[table["over_threshold"].astype(bool), "variable"])
    return MissingSummary(variables=table, threshold=threshold, over_threshold=flagged)


# ---------------------------------------------------------------------------
# the reporting checklist

@dataclass(frozen=True)
class ChecklistItem:
    item: str
    guideline: str
    answered_in: str
    value: str


@dataclass(frozen=True)
class Checklist:
    """What the reporting guidelines ask about missing data, where the record answers it, and the answer."""

    items: pd.DataFrame

    def item_names(self) -> Tuple[str, ...]:
        """The items' names, in order."""
        return tuple(self.items["item"])


def _fmt(value: object, digits: int = 2) -> str:
    """A number as text: whole numbers plainly, others to ``digits`` decimals; 'n/a' when missing."""
    try:
        number = float(value)  # type: ignore[arg-type]
    except (TypeError, ValueError):
        return str(value)
    if not math.isfinite(number):
        return "n/a"
    if number == int(number) and (abs(number) >= 1 or number == 0):
        return f"{int(number):,}"
    return f"{number:.{digits}f}"


def _count(value: object, min_cell: int = 0) -> str:
    """A count as text, shown as '<min_cell' when it is small enough to identify people (1..min_cell-1)."""
    try:
        number = float(value)  # type: ignore[arg-type]
    except (TypeError, ValueError):
        return str(value)
    if min_cell > 1 and 1 <= number < min_cell:
        return f"<{min_cell}"
    return _fmt(number)


def _is_number(value: object) -> bool:
    try:
        return math.isfinite(float(value))  # type: ignore[arg-type]
    except (TypeError, ValueError):
        return False


def effect_phrase(row: Mapping[str, object], alpha: float, family: str = "gaussian") -> str:
    """One estimates row in words, naming its scale.

    'difference -0.40 (95% CI -0.49 to -0.31; p < 0.001)' for a gaussian model; 'odds ratio
    1.65 (95% CI 1.11 to 2.45; p = 0.013)' for a binomial one (the exponentiated log odds
    ratio, as in the ``exp_*`` columns), likewise rate ratios for poisson.
    """
    level = f"{100 * (1 - alpha):g}"
    failed = is_false_cell(row.get("converged") if hasattr(row, "get") else None)
    if not _is_number(row["estimate"]):
        # a fit that did not converge leaves the estimate empty: 'n/a (95% CI n/a to n/a)' read as a result
        return "not estimated" + (" (the model fit did not converge)" if failed else "")
    # numbers from a fit that did not converge are no result: say so beside them
    unreliable = "; the model fit did not converge, so these numbers are not reliable" if failed else ""
    if has_ratio_scale(family):
        values = [row.get(f"exp_{name}") if hasattr(row, "get") else None
                  for name in ("estimate", "ci_lower", "ci_upper")]
        if any(v is None or (isinstance(v, float) and math.isnan(v)) for v in values):
            values = [math.exp(float(row[name])) for name in ("estimate", "ci_lower", "ci_upper")]
        words = effect_scale(family, exponentiated=True)
        estimate, lower, upper = (format_estimate(v) for v in values)
    else:
        words = "difference"
        estimate, lower, upper = (_fmt(row[name]) for name in ("estimate", "ci_lower", "ci_upper"))
    return f"{words} {estimate} ({level}% CI {lower} to {upper}; {format_p(row['p_value'])}{unreliable})"


def build_checklist(flow: ParticipantFlow, missing: MissingSummary, tables: Mapping[str, Optional[pd.DataFrame]], *,
                    model: Optional[AnalysisModel], imputation: Optional[ImputationSettings],
                    terms: Sequence[str], min_cell: int = 0) -> Checklist:
    """The missing-data reporting checklist with where each item is answered and its value.

    Parameters
    ----------
    flow, missing : from :func:`participant_flow` and :func:`missing_summary`.
    tables : the record's tables by name (None for a stage that did not run).
    model : the analysis model, None when there is none (the items on analysis then do not apply).
    imputation : the imputation settings (m, iterations, seed), None when not known.
    terms : the exposure's model terms.
    min_cell : counts from 1 to min_cell - 1 are shown as '<min_cell' (0: show every count).

    Returns
    -------
    Checklist with columns item, guideline, answered_in, value.

    References
    ----------
    von Elm E et al. (2007). The STROBE statement. Lancet 370:1453-1457 (items 12c, 13, 14b).
    Schulz KF, Altman DG, Moher D (2010). CONSORT 2010 statement. BMJ 340:c332 (items 13a, 13b, 16).
    Sterne JAC et al. (2009). Multiple imputation for missing data in epidemiological and clinical
    research: potential and pitfalls. BMJ 338:b2393 (box on reporting multiple imputation).
    Item numbers recalled from memory; check them against the current guideline text.
    """
    items: List[ChecklistItem] = []
    outcome = check_formula(model.formula, list(flow_columns(missing)))[0] if model is not None else None
    n_rows = flow.n_rows
    estimates = tables.get("estimates")
    exposure = exposure_rows(estimates, terms)

    # Participant flow (CONSORT 13a/16; STROBE 13a)
    flow_all = flow.steps.set_index("step")["all"]
    analysed = "; ".join(f"{row['step'].split(': ', 1)[1]} {_fmt(row['all'])}"
                         for _, row in flow.steps.iterrows() if str(row["step"]).startswith("analysed: "))
    if outcome is None:
        items.append(ChecklistItem(
            "participants in the file and with every variable observed", "CONSORT 13a; STROBE 13a",
            "tables/participant_flow.csv",
            f"in file {_fmt(n_rows)}; every variable observed {_fmt(flow.n_complete)} (no analysis model given)"))
    else:
        items.append(ChecklistItem(
            "participants at each step and analysed under each strategy", "CONSORT 13a, 16; STROBE 13a",
            "tables/participant_flow.csv",
            f"in file {_fmt(n_rows)}; complete for the model {_fmt(flow.n_complete)}"
            + (f"; analysed: {analysed}" if analysed else "; no analysis stage has run")))
    # Losses with reasons (CONSORT 13b; STROBE 13b)
    if outcome is not None:
        losses = [f"{step.split(': ', 1)[1]} {_count(n, min_cell)}" for step, n in flow_all.items()
                  if str(step).startswith("outcome_missing: ")]
        by_group = ""
        if flow.group is not None:
            levels = [c for c in flow.steps.columns if c not in ("step", "description", "all")]
            observed = flow.steps.set_index("step").loc["outcome_observed"]
            total = flow.steps.set_index("step").loc["in_file"]
            by_group = " (outcome missing by " + flow.group + ": " + ", ".join(
                f"{level} {_count(total[level] - observed[level], min_cell)}" for level in levels) + ")"
        items.append(ChecklistItem(
            "losses of the outcome with reasons, by group", "CONSORT 13b; STROBE 13b",
            "tables/participant_flow.csv",
            f"{outcome}{'' if model is None or model.event is None else ' or ' + model.event.column} missing "
            f"{_count(n_rows - flow_all['outcome_observed'], min_cell)}: "
            + ("; ".join(losses) if losses else "none") + by_group))
    # Missing data per variable (STROBE 14b; Sterne et al. 2009)
    with_missing = missing.variables[missing.variables["n_missing"].astype(float) > 0]
    items.append(ChecklistItem(
        "number missing for each variable", "STROBE 14b; Sterne et al. 2009",
        "tables/audit_variables.csv" if tables.get("audit_variables") is not None else "summary table (this page)",
        "; ".join(f"{r.variable} {_count(r.n_missing, min_cell)}"
                  + ("" if _count(r.n_missing, min_cell).startswith("<") else f" ({_fmt(r.pct_missing, 1)}%)")
                  for r in with_missing.itertuples()) or "no missing values"))
    items.append(ChecklistItem(
        "reasons for missing values", "Sterne et al. 2009; CONSORT 13b",
        "summary table (this page), reasons column",
        "; ".join(f"{r.variable}: {_suppress_reasons(r.reasons, min_cell)}" for r in with_missing.itertuples()
                  if r.reasons) or "none recorded"))
    items.append(ChecklistItem(
        f"variables above the audit threshold ({_fmt(100 * missing.threshold, 0)}% missing)",
        "common practice, no source", "tables/audit_variables.csv, over_threshold",
        ", ".join(missing.over_threshold) or "none"))
    # Patterns and the mechanism (Sterne et al. 2009: differences between complete and incomplete)
    patterns = tables.get("audit_patterns")
    items.append(ChecklistItem(
        "missingness patterns", "Sterne et al. 2009", "tables/audit_patterns.csv",
        _patterns_listed(patterns) if patterns is not None else "audit stage not run"))
    mcar = tables.get("mcar_test")
    if mcar is not None and len(mcar):
        first = mcar.iloc[0]
        mcar_value = (f"Little's test chi-square {_fmt(first['statistic'])}, df {_fmt(first['df'])}, "
                      f"{format_p(first['p_value'])}")
    else:
        mcar_value = "mechanism stage not run"
    items.append(ChecklistItem(
        "comparison of participants with and without missing data; test of MCAR", "Sterne et al. 2009",
        "tables/mcar_test.csv, tables/mechanism_groups.csv, tables/mechanism_models.csv", mcar_value))
    if outcome is None:
        # without an analysis model the items on handling missing data in the analysis do not apply
        table = pd.DataFrame([item.__dict__ for item in items], columns=["item", "guideline", "answered_in", "value"])
        return Checklist(items=table)
    # Methods for handling missing data (STROBE 12c; Sterne et al. 2009)
    strategies = sorted(set(exposure["strategy"])) if len(exposure) else []
    items.append(ChecklistItem(
        "how missing data were addressed", "STROBE 12c",
        "tables/estimates.csv, strategy column",
        ", ".join(STRATEGY_PHRASES.get(s, s) for s in strategies) or "no analysis stage has run"))
    imputation_table = tables.get("imputation_summary")
    mi = exposure[exposure["strategy"] == "multiple_imputation"]
    items.append(ChecklistItem(
        "imputation model: variables, methods, number of imputations and iterations", "Sterne et al. 2009",
        "tables/imputation_summary.csv; params.yaml (imputation)",
        (f"m = {imputation.m}, iterations = {imputation.iterations}, seed = {imputation.seed}; "
         + imputation_methods_phrase(imputation_table))
        if imputation is not None and (len(mi) or imputation_table is not None) else "imputation stage not run"))
    items.append(ChecklistItem(
        "assumption about the missingness (missing at random) and its plausibility", "Sterne et al. 2009",
        "this page, cautions; the mechanism stage", "missing at random assumed for imputation; not verifiable "
        "from the data"))
    items.append(ChecklistItem(
        "results of complete-case and imputed analyses side by side", "Sterne et al. 2009",
        "tables/estimates.csv; tables/strategy_comparison.csv",
        "; ".join(f"{STRATEGY_PHRASES.get(r['strategy'], r['strategy'])} {effect_phrase(r, model.alpha, model.family)}"
                  for _, r in exposure.iterrows()) or "no analysis stage has run"))
    sensitivity = tables.get("tipping_point")
    items.append(ChecklistItem(
        "sensitivity analysis for data missing not at random", "Sterne et al. 2009; Carpenter & Kenward 2013",
        "tables/sensitivity_delta.csv, tables/tipping_point.csv",
        tipping_phrase(sensitivity) if sensitivity is not None else "sensitivity stage not run"))
    performance = tables.get("simulation_performance")
    items.append(ChecklistItem(
        "behaviour of each strategy in simulated studies like this one", "Morris et al. 2019 (not a reporting item)",
        "tables/simulation_performance.csv",
        simulation_phrase(performance) if performance is not None else "simulation stage not run"))
    table = pd.DataFrame([item.__dict__ for item in items], columns=["item", "guideline", "answered_in", "value"])
    return Checklist(items=table)


def _patterns_listed(patterns: pd.DataFrame) -> str:
    """How many patterns audit_patterns.csv lists; a last row with blank pattern columns holds the rarer ones."""
    folded = patterns["n_missing_variables"].isna() if "n_missing_variables" in patterns else pd.Series(False)
    if not folded.any():
        return f"{len(patterns)} patterns listed"
    return f"the {int((~folded).sum())} most common patterns listed; the rarer ones share the last row"


def _suppress_reasons(text: str, min_cell: int) -> str:
    """'declined 3; blank 40' with small counts masked."""
    parts = []
    for part in str(text).split("; "):
        reason, _, n = part.rpartition(" ")
        parts.append(f"{reason} {_count(n, min_cell)}" if reason else part)
    return "; ".join(parts)


def flow_columns(missing: MissingSummary) -> List[str]:
    return list(missing.variables["variable"])


def imputation_methods_phrase(imputation: Optional[pd.DataFrame]) -> str:
    """'bmi passive, hba1c_12m pmm, ...' from ``imputation_summary.csv`` when it names variables and methods."""
    if imputation is None or not {"variable", "method"} <= set(imputation.columns):
        return "methods per variable: see the imputation stage"
    rows = imputation.dropna(subset=["method"])
    return "methods: " + ", ".join(f"{r.variable} {r.method}" for r in rows.itertuples())


def tipping_phrase(tipping: pd.DataFrame) -> str:
    """The tipping-point sentences from ``tipping_point.csv`` (its ``statement`` column when present)."""
    if tipping.empty:
        return "no tipping point computed"
    if "statement" in tipping.columns:
        return " ".join(str(s) for s in tipping["statement"].dropna())
    return "; ".join(f"{r.variable} {getattr(r, 'group', 'all')}: {_fmt(r.tipping_delta)}" for r in tipping.itertuples())


def simulation_phrase(performance: pd.DataFrame) -> str:
    """'MAR: complete case bias 0.01, coverage 94%; ...' from ``simulation_performance.csv``."""
    if performance.empty:
        return "no simulation results"
    parts = []
    for row in performance.itertuples():
        parts.append(f"{row.mechanism} {row.strategy}: bias {_fmt(row.bias, 3)}, "
                     f"coverage {_fmt(100 * row.coverage, 1)}%")
    return "; ".join(parts) + f" ({int(performance['n_rep'].max())} replicates)"


# ---------------------------------------------------------------------------
# drafted paragraphs

def draft_methods(flow: ParticipantFlow, missing: MissingSummary, tables: Mapping[str, Optional[pd.DataFrame]], *,
                  model: Optional[AnalysisModel], imputation: Optional[ImputationSettings]) -> str:
    """A methods paragraph on the handling of missing data, filled with this run's choices.

    Plain text holding user text (variable names, reason labels, the formula): escape it where it
    becomes Markdown (:meth:`ReportSummary.drafted_markdown`)."""
    estimates = tables.get("estimates")
    strategies = [] if estimates is None else list(dict.fromkeys(estimates["strategy"]))
    reasons = sorted({part.rsplit(" ", 1)[0] for text in missing.variables["reasons"] if text
                      for part in text.split("; ")})
    sentences = [
        f"Missing values were recorded with their reasons ({', '.join(reasons) or 'none recorded'}) rather than "
        "as a single missing code, and the amount and pattern of missing data were described per variable.",
    ]
    if tables.get("mcar_test") is not None:
        sentences.append("Whether the data were missing completely at random was assessed with Little's test "
                         "(Little 1988), and participants with and without missing values were compared.")
    if model is None:
        return " ".join(sentences)
    sentences.append(f"The analysis model was {model.formula} ({model.family} family"
                     + (", robust standard errors" if model.robust else "") + ").")
    if "multiple_imputation" in strategies and imputation is not None:
        imp = imputation
        aux = f" and the auxiliary variables {', '.join(imp.auxiliary)}" if imp.auxiliary else ""
        passive = (f"; {', '.join(imp.passive)} {'was' if len(imp.passive) == 1 else 'were'} derived passively from "
                   "the imputed components" if imp.passive else "")
        sentences.append(
            f"The primary analysis used multiple imputation by fully conditional specification with m = {imp.m} "
            f"imputed datasets and {imp.iterations} iterations (seed {imp.seed}); the imputation model included "
            f"the outcome, the exposure and every covariate of the analysis model{aux}{passive}. "
            f"{first_upper(imputation_methods_phrase(tables.get('imputation_summary')))}. Estimates were "
            "combined with Rubin's rules (Rubin 1987) with small-sample degrees of freedom (Barnard & Rubin 1999), "
            "taking n - p (rows analysed minus estimated coefficients) as the complete-data degrees of freedom"
            + (" (for a generalised linear model a common choice without a published source)"
               if model.family != "gaussian" else "")
            + (f"; {effect_scale(model.family, exponentiated=True)}s were pooled on the log scale and "
               "exponentiated" if has_ratio_scale(model.family) else "") + ".")
    others = [STRATEGY_PHRASES[s] for s in ("complete_case", "missing_category") if s in strategies]
    if others:
        sentences.append(f"For comparison the model was also fitted by {' and '.join(others)}.")
    sensitivity = tables.get("sensitivity_delta")
    if sensitivity is not None and len(sensitivity):
        deltas = sorted(sensitivity["delta"].unique())
        variables = ", ".join(dict.fromkeys(sensitivity["variable"]))
        sentences.append(
            f"Sensitivity to data missing not at random was explored by delta adjustment (Carpenter & Kenward "
            f"2013): the imputed values of {variables} were shifted by delta from {_fmt(deltas[0])} to "
            f"{_fmt(deltas[-1])} after each imputation step and the results re-pooled, and the tipping point at "
            "which the conclusion changes was searched for.")
    performance = tables.get("simulation_performance")
    if performance is not None and len(performance):
        sentences.append(
            f"The bias, empirical and model standard errors and coverage of each strategy were estimated in "
            f"{int(performance['n_rep'].max())} simulated studies of the same size under completely-at-random, "
            "at-random and not-at-random missingness, with Monte Carlo standard errors (Morris, White & Crowther "
            "2019).")
    return " ".join(sentences)


def draft_results(flow: ParticipantFlow, missing: MissingSummary, tables: Mapping[str, Optional[pd.DataFrame]], *,
                  model: Optional[AnalysisModel], terms: Sequence[str], min_cell: int = 0) -> str:
    """A results paragraph on missing data and the exposure effect, with this run's numbers.

    Plain text holding user text, like :func:`draft_methods`."""
    scope = "of the analysis model " if model is not None else ""
    share = _fmt(100 * flow.n_complete / flow.n_rows, 1) if flow.n_rows else "n/a"
    sentences = [f"Of {_fmt(flow.n_rows)} participants, {_fmt(flow.n_complete)} "
                 f"({share}%) had every variable {scope}observed."]
    with_missing = missing.variables[missing.variables["n_missing"].astype(float) > 0].sort_values(
        "n_missing", ascending=False, key=lambda s: s.astype(float))
    if len(with_missing):
        sentences.append("Values were missing for " + "; ".join(
            f"{r.variable} {_count(r.n_missing, min_cell)}"
            + ("" if _count(r.n_missing, min_cell).startswith("<") else f" ({_fmt(r.pct_missing, 1)}%)")
            for r in with_missing.itertuples()) + ".")
    sentences.append(f"{'No variable' if not missing.over_threshold else ', '.join(missing.over_threshold)} "
                     f"{'was' if len(missing.over_threshold) <= 1 else 'were'} missing for more than "
                     f"{_fmt(100 * missing.threshold, 0)}% of participants.")
    mcar = tables.get("mcar_test")
    if mcar is not None and len(mcar):
        row = mcar.iloc[0]
        sentences.append(f"Little's test gave chi-square {_fmt(row['statistic'])} on {_fmt(row['df'])} degrees of "
                         f"freedom ({format_p(row['p_value'])}); a small p-value is evidence against missing "
                         "completely at random, a large one is not evidence for it.")
    if model is None:
        return " ".join(sentences)
    exposure = exposure_rows(tables.get("estimates"), terms)
    if len(exposure):
        parts = [f"{STRATEGY_PHRASES.get(r['strategy'], r['strategy'])} {effect_phrase(r, model.alpha, model.family)}"
                 for _, r in exposure.iterrows()]
        scale = (f"{effect_scale(model.family, exponentiated=True)}, the exponentiated model coefficient"
                 if has_ratio_scale(model.family) else "difference in the outcome")
        sentences.append(f"The estimated effect of {', '.join(terms)} ({scale}) was " + "; ".join(parts) + ".")
    else:
        sentences.append("No analysis stage has written estimates yet.")
    tipping = tables.get("tipping_point")
    if tipping is not None and len(tipping):
        sentences.append(tipping_phrase(tipping))
    return " ".join(sentences)


# ---------------------------------------------------------------------------
# the whole summary

@dataclass(frozen=True)
class ReportSummary:
    """Everything on the summary page: flow, missing data per variable, checklist and drafted text.

    ``sentences`` name the stages whose tables were not found; :meth:`markdown` is
    ``report_text.md``.
    """

    title: str
    flow: ParticipantFlow
    missing: MissingSummary
    checklist: Checklist
    methods_text: str
    results_text: str
    cautions: Tuple[str, ...]
    not_run: Tuple[str, ...]
    sentences: Tuple[str, ...] = ()

    def tables(self) -> Dict[str, pd.DataFrame]:
        """``participant_flow``, ``report_missing`` and ``report_checklist``."""
        return {"participant_flow": self.flow.steps, "report_missing": self.missing.variables,
                "report_checklist": self.checklist.items}

    # Titles, the checklist's values and the drafted paragraphs are plain text that quotes the params and
    # the data (names, labels, reasons, levels); they become Markdown only here, escaped (md_escape).
    def title_markdown(self, level: int = 2) -> str:
        """The title as a Markdown heading of ``level``."""
        return f"{'#' * level} {md_escape(self.title)}"

    def checklist_markdown(self) -> str:
        """The checklist as a Markdown list: item, guideline, where the record answers it, the answer."""
        return "\n".join(f"- **{row.item}** ({row.guideline}). *Where:* {md_escape(row.answered_in)}. "
                         f"{md_escape(row.value)}" for row in self.checklist.items.itertuples())

    def drafted_markdown(self, level: int = 3) -> str:
        """The drafted methods and results paragraphs under Markdown headings of ``level``."""
        heading = "#" * level
        return (f"{heading} Methods (draft, edit before use)\n\n{md_escape(self.methods_text)}\n\n"
                f"{heading} Results (draft, edit before use)\n\n{md_escape(self.results_text)}")

    def markdown(self) -> str:
        """The drafted text as markdown (what ``report_text.md`` holds)."""
        lines = [self.title_markdown(1), "", self.drafted_markdown(2), "", "## Reporting checklist", "",
                 self.checklist_markdown()]
        lines += ["", "## Cautions", ""] + [f"- {c}" for c in self.cautions]
        if self.not_run:
            lines += ["", "Stages whose tables were not found in this record: " + ", ".join(self.not_run) + "."]
        return "\n".join(lines) + "\n"


REPORT_TABLES: Tuple[str, ...] = (
    "audit_variables", "audit_patterns", "audit_summary", "audit_by_group", "mcar_test", "mechanism_groups",
    "mechanism_models", "flow_complete_case", "descriptives", "estimates", "strategy_comparison",
    "imputation_summary", "sensitivity_delta", "tipping_point", "simulation_performance",
)
STAGE_OF_TABLE = {"audit_variables": "audit", "mcar_test": "mechanism", "estimates": "cases/indicator/impute",
                  "imputation_summary": "impute", "tipping_point": "sensitivity",
                  "simulation_performance": "simulate"}


def summarise(study: Study, *, tables: Mapping[str, Optional[pd.DataFrame]], title: str,
              model: Optional[AnalysisModel] = None, imputation: Optional[ImputationSettings] = None,
              threshold: float = 0.20, group: Optional[str] = None, terms: Optional[Sequence[str]] = None,
              min_cell: int = 0) -> ReportSummary:
    """Build the summary page from the study and the record's tables.

    Parameters
    ----------
    study : the study after intake.
    tables : the record's tables by name, None for a stage that did not run.
    title : the page's title.
    model : the analysis model; None when there is none (only the missing-data items apply).
    imputation : the imputation settings the text reports (m, iterations, seed, auxiliary, passive).
    threshold : the audit threshold fraction (0.20 is common practice, no source).
    group : the column the flow is split by (default: the exposure when it is categorical).
    terms : the exposure's model terms; by default taken from ``estimates.csv`` with
        :func:`gapbook.models.exposure_terms`.
    min_cell : mask counts from 1 to min_cell - 1 in the text (0: no masking).

    Returns
    -------
    ReportSummary.

    References
    ----------
    von Elm E et al. (2007). The STROBE statement. Lancet 370:1453-1457.
    Schulz KF, Altman DG, Moher D (2010). CONSORT 2010 statement. BMJ 340:c332.
    Sterne JAC et al. (2009). Multiple imputation for missing data in epidemiological and clinical
    research: potential and pitfalls. BMJ 338:b2393.
    """
    estimates = tables.get("estimates")
    if terms is None:
        terms = exposure_terms(list(dict.fromkeys(estimates["term"])), model.exposure) \
            if model is not None and estimates is not None and len(estimates) else []
    group = flow_group(study, group=group, exposure=model.exposure if model is not None else None)
    flow = participant_flow(study, formula=model.formula if model is not None else None, group=group,
                            estimates=estimates, event=model.event.column if model is not None and model.event else None)
    missing = missing_summary(study, threshold=threshold, audit_variables=tables.get("audit_variables"))
    checklist = build_checklist(flow, missing, tables, model=model, imputation=imputation, terms=terms,
                                min_cell=min_cell)
    # without a model only the audit and mechanism stages apply; the others are not "missing" from the record
    applies = STAGE_OF_TABLE if model is not None else {
        name: stage for name, stage in STAGE_OF_TABLE.items() if name in ("audit_variables", "mcar_test")}
    not_run = tuple(dict.fromkeys(stage for name, stage in applies.items() if tables.get(name) is None))
    sentences = (("Stages whose tables are not in this record (their items say so below): "
                  + ", ".join(not_run) + ".",) if not_run else ())
    return ReportSummary(title=title, flow=flow, missing=missing, checklist=checklist,
                         methods_text=" ".join(([study.rows_kept.methods_sentence()] if study.rows_kept else [])
                                               + [draft_methods(flow, missing, tables, model=model,
                                                                imputation=imputation)]),
                         results_text=draft_results(flow, missing, tables, model=model, terms=terms,
                                                    min_cell=min_cell),
                         cautions=page_cautions(with_model=model is not None), not_run=not_run, sentences=sentences)
