"""Follow-up studies after intake: one frame with a row per participant per planned visit.

A follow-up study arrives in one of two layouts:
- long: one row per participant per visit (the CDISC ADaM basic data structure is one),
  with a subject column and a visit column; a missed visit is a row whose outcome holds a
  missing marker, or no row at all;
- wide: one row per participant with one outcome column per visit.

Intake (``gapbook.intake``) has already turned markers into missing values with reasons.
:func:`repeated_study` puts either layout into one long frame over the planned visits and
checks what only a follow-up design can get wrong, each an input error naming the subject
and the visit: a row without subject or visit, a visit not in the plan, two rows for one
visit. (An exposure that changes within a participant is refused when the model is built,
:func:`gapbook.followup.repeated.repeated_outcome`, also naming subject and visit.)
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Optional, Sequence, Tuple

import numpy as np
import pandas as pd

from ..errors import InputError, OptionName, data_row, did_you_mean
from ..vocabulary import LAYOUTS, NO_RECORD
from .repeated import RepeatedOutcome, label, repeated_outcome, wide_to_long

__all__ = ["repeated_study"]


def _as_number(value: Any) -> Optional[float]:
    try:
        number = float(str(value).strip())
    except (TypeError, ValueError):
        return None
    return number if np.isfinite(number) else None


def _planned_value(raw: Any, planned: Sequence[Any]) -> Any:
    """The planned visit a raw cell names (numbers compared as numbers, text as stripped text), or None."""
    if raw is None or (isinstance(raw, float) and np.isnan(raw)):
        return None
    number = _as_number(raw)
    for visit in planned:
        if isinstance(visit, (int, float, np.integer, np.floating)) and not isinstance(visit, bool):
            if number is not None and number == float(visit):
                return visit
        elif str(raw).strip() == str(visit).strip():
            return visit
    return None


@dataclass(frozen=True)
class RepeatedStudy:
    """A follow-up study as one long frame over the planned visits.

    Attributes
    ----------
    frame : one row per data row at a planned visit: the subject column, the visit column
        (holding the planned visit values) and every analysis column of the study.
    reasons : the intake's reasons for the same rows and columns (NaN where observed).
    subject, visit : the column names in ``frame``.
    visits : the analysed visits in plan order; ``baseline`` the baseline visit, if any.
    layout : "long" or "wide" (how the file was laid out).
    """

    frame: pd.DataFrame = field(repr=False)
    reasons: pd.DataFrame = field(repr=False)
    subject: str
    visit: str
    visits: Tuple[Any, ...]
    baseline: Any
    layout: str

    def outcome(self, *, formula: str, exposure: Optional[str] = None) -> RepeatedOutcome:
        """The participants x visits shape of the long-format model (see :func:`repeated_outcome`)."""
        return repeated_outcome(self.frame, formula=formula, subject=self.subject, visit=self.visit,
                                visits=self.visits, exposure=exposure, baseline_visit=self.baseline)

    def visit_reasons(self, outcome: RepeatedOutcome) -> np.ndarray:
        """(n, T) why each participant's outcome is missing at each visit; ``NO_RECORD`` where no row exists."""
        column = outcome.outcome_name
        reasons = np.full((outcome.n, outcome.n_visits), NO_RECORD, dtype=object)
        position = {s: i for i, s in enumerate(outcome.subjects)}
        visit_position = {v: k for k, v in enumerate(outcome.visits)}
        rows = self.frame[self.frame[self.visit].isin(list(outcome.visits))
                          & self.frame[self.subject].isin(list(position))]
        why = self.reasons.loc[rows.index, column] if column in self.reasons.columns else \
            pd.Series(np.nan, index=rows.index)
        i = rows[self.subject].map(position).to_numpy(dtype=int)
        k = rows[self.visit].map(visit_position).to_numpy(dtype=int)
        reasons[i, k] = [None if pd.isna(r) else str(r) for r in why]
        reasons[~np.isnan(outcome.values)] = None
        return reasons


def repeated_study(data: pd.DataFrame, reasons: pd.DataFrame, *, layout: str, subject: str, visits: Sequence[Any],
                   visit: str = "visit", baseline: Any = None, ids: Optional[pd.Series] = None,
                   outcome_columns: Sequence[str] = (), outcome: Optional[str] = None,
                   file_rows: Optional[np.ndarray] = None) -> RepeatedStudy:
    """Check a follow-up study's rows against its plan and lay it out long.

    Parameters
    ----------
    data, reasons : the study after intake (``Study.data`` and ``Study.reasons``).
    layout : ``long`` or ``wide``.
    subject : long: the subject column of ``data``; wide: the name the identifier gets (``ids`` holds it).
    visits : the planned visits in order, the baseline visit (if any) included.
    visit : long: the visit column of ``data``; wide: the name the visit column gets.
    baseline : the baseline visit's label, when it is one of ``visits``; it is not analysed.
    ids : wide: the participants' identifiers (``Study.ids``).
    outcome_columns : wide: the outcome's column at each planned visit, in plan order.
    outcome : wide: the outcome's name in the long-format formula.
    file_rows : each row's 0-based file row when rows were left out (``Study.file_rows``), for messages.

    Returns
    -------
    RepeatedStudy.
    """
    if layout not in LAYOUTS:
        raise InputError(f"'{layout}' is not one of {', '.join(LAYOUTS)}{did_you_mean(layout, LAYOUTS)}", option="layout")
    visits = tuple(visits)
    if len(visits) < 1 or len(set(map(str, visits))) != len(visits):
        raise InputError("list each planned visit once, in order", option="visits")
    if baseline is not None and baseline not in visits:
        raise InputError(f"{label(baseline)} is not one of ", OptionName("visits"), f" ({', '.join(map(label, visits))})",
                         option="baseline")
    analysed = tuple(v for v in visits if baseline is None or v != baseline)
    if not analysed:
        raise InputError("list at least one visit after baseline", option="visits")
    if layout == "wide":
        return _wide(data, reasons, subject=subject, visit=visit, visits=visits, analysed=analysed, baseline=baseline,
                     ids=ids, outcome_columns=outcome_columns, outcome=outcome)
    return _long(data, reasons, subject=subject, visit=visit, visits=visits, analysed=analysed, baseline=baseline,
                 file_rows=file_rows)


def _long(data, reasons, *, subject, visit, visits, analysed, baseline, file_rows=None) -> RepeatedStudy:
    for option, column in (("subject", subject), ("visit", visit)):
        if column not in data.columns:
            raise InputError(f"'{column}' is not a column of the data{did_you_mean(column, data.columns)}", option=option)
    subjects = data[subject]
    blank = np.flatnonzero(subjects.isna().to_numpy())
    if len(blank):
        raise InputError(f"data row {data_row(blank[0], file_rows)} has no subject in '{subject}'; every row needs one", option="subject")
    subjects = subjects.astype(str).str.strip()
    planned = [_planned_value(v, visits) for v in data[visit].astype(object).to_numpy()]
    unknown = [k for k, v in enumerate(planned) if v is None]
    if unknown:
        k = unknown[0]
        raw = data[visit].iloc[k]
        shown = "no visit" if pd.isna(raw) else f"visit {label(raw)}"
        raise InputError(f"subject {subjects.iloc[k]} has {shown} (data row {data_row(k, file_rows)}), which is not a planned visit "
                         f"({', '.join(map(label, visits))}); add it to the planned visits, correct the '{visit}' "
                         "column, or keep only the planned visits' rows with ", OptionName("keep_rows"),
                         " (unscheduled and early-termination rows are not analysis visits; in ADaM, e.g. "
                         "ANL01FL == 'Y')", option="visits")
    frame = data.drop(columns=[visit]).copy()
    frame[subject] = subjects.to_numpy()
    frame[visit] = pd.Series(planned, index=data.index, dtype=object)
    if all(isinstance(v, (int, float, np.integer, np.floating)) for v in visits):
        frame[visit] = pd.to_numeric(frame[visit])
    duplicated = frame.duplicated([subject, visit], keep=False).to_numpy()
    if duplicated.any():
        first = frame.loc[duplicated, [subject, visit]].iloc[0]
        count = int(((frame[subject] == first[subject]) & (frame[visit] == first[visit])).sum())
        raise InputError(f"subject {first[subject]} has {count} rows for visit {label(first[visit])} "
                         "(one row per subject per visit is expected); remove or merge the duplicates, or keep one "
                         "parameter's observed rows with ", OptionName("keep_rows"), " (a file with several "
                         "parameters, such as ADaM's, e.g. PARAMCD == 'ADAS' and DTYPE == '')", option="data")
    return RepeatedStudy(frame=frame, reasons=reasons.drop(columns=[c for c in (visit, subject) if c in reasons]),
                         subject=subject, visit=visit, visits=analysed, baseline=baseline, layout="long")


def _wide(data, reasons, *, subject, visit, visits, analysed, baseline, ids, outcome_columns,
          outcome) -> RepeatedStudy:
    if ids is None:
        raise InputError("the wide layout needs the subject identifier column; name it here", option="ids")
    outcome_columns = list(outcome_columns)
    if len(outcome_columns) != len(visits):
        raise InputError(f"give one outcome column per planned visit ({len(visits)} visits, {len(outcome_columns)} "
                         "columns), in the order of ", OptionName("visits"), option="outcome_columns")
    for column in outcome_columns:
        if column == subject:
            raise InputError(f"'{column}' is the subject column (", OptionName("subject"), "); list the outcome's own "
                             "column at each planned visit", option="outcome_columns")
        if column not in data.columns:
            raise InputError(f"'{column}' is not a column of the data{did_you_mean(column, data.columns)}",
                             option="outcome_columns")
        if not pd.api.types.is_numeric_dtype(data[column]):
            raise InputError(f"'{column}' holds categories, not the outcome's numbers; list the outcome's own column "
                             "at each planned visit", option="outcome_columns")
    for name, option in ((visit, "visit"), (outcome, "outcome")):
        if name in data.columns and name not in outcome_columns:
            # wide_to_long would write the visits (or the outcome) over that column
            raise InputError(f"'{name}' is already a column of the data; in the wide layout it names the column "
                             "gapbook makes: choose another name", option=option)
    if not outcome:
        raise InputError("name the repeated outcome (the left side of the long-format formula, e.g. 'chg' in "
                         "'chg ~ arm * C(visit)')", option="outcome")
    keep = [c for c in data.columns if c not in outcome_columns]
    frame_in = data.assign(**{subject: ids.to_numpy()}) if subject not in data.columns else data
    frame = wide_to_long(frame_in, subject=subject, outcome_columns=outcome_columns, visits=visits, outcome=outcome,
                         visit=visit, keep=[c for c in keep if c != subject])
    t = len(visits)
    reason_frame = pd.DataFrame(index=frame.index)
    for column in keep:
        if column in reasons.columns:
            reason_frame[column] = np.repeat(reasons[column].to_numpy(dtype=object), t)
    reason_frame[outcome] = reasons[outcome_columns].to_numpy(dtype=object).ravel()
    return RepeatedStudy(frame=frame, reasons=reason_frame, subject=subject, visit=visit, visits=analysed,
                         baseline=baseline, layout="wide")
