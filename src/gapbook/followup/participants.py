"""A long follow-up file seen one row per participant, for the tests that assume independent rows.

The mechanism stage's group comparisons, Little's test and missingness models treat rows as
independent units. In a long file a participant contributes one row per visit, so those
rows are not independent and a participant who left early counts several times. Here the
long rows become one row per participant: a variable that does not change within any
participant (a baseline covariate, the arm) keeps one column, and a variable that does (the
outcome, a visit-level measurement) becomes one column per planned visit, named
``<variable> @ <visit>``. A planned visit with no row is missing, with the reason
``NO_RECORD``.
"""
from __future__ import annotations

import dataclasses
from typing import Any, List, Sequence

import pandas as pd

from ..intake import Study
from ..vocabulary import NO_RECORD
from .intake import RepeatedStudy
from .repeated import label

__all__ = ["participant_study", "planned_visits", "visit_column"]


def visit_column(variable: str, visit: Any) -> str:
    """The name of one visit's column of a variable that changes over visits, e.g. ``chg @ week 4``.

    Parameters
    ----------
    variable : str
        The variable.
    visit : object
        The planned visit.

    Returns
    -------
    str
    """
    return f"{variable} @ {label(visit)}"


def _varies_within(frame: pd.DataFrame, subject: str, column: str) -> bool:
    """Whether any participant has two different recorded values (missing values do not count)."""
    return bool((frame.groupby(subject, sort=False)[column].nunique(dropna=True) > 1).any())


def planned_visits(repeated: RepeatedStudy) -> List[Any]:
    """Every planned visit in order, the baseline visit (when the plan has one) first.

    Parameters
    ----------
    repeated : RepeatedStudy
        The study laid out long over its planned visits.

    Returns
    -------
    list
    """
    return ([repeated.baseline] if repeated.baseline is not None else []) + list(repeated.visits)


def participant_study(repeated: RepeatedStudy, study: Study, *, time_varying: Sequence[str] = ()) -> Study:
    """One row per participant: constant variables once, variables that change over visits once per visit.

    Parameters
    ----------
    repeated : RepeatedStudy
        The study laid out long over its planned visits.
    study : Study
        The study after intake (its variables' types, levels and labels).
    time_varying : sequence of str
        Variables to spread over the visits even if no participant's value changes (the
        outcome: a value recorded at one visit only is still that visit's value).

    Returns
    -------
    Study
        ``data`` and ``reasons`` with one row per participant, in order of first appearance;
        ``ids`` the participants; the range and extreme-value tables empty (they are the
        audit's, on the rows as read).
    """
    frame, reasons = repeated.frame, repeated.reasons
    subject, visit = repeated.subject, repeated.visit
    planned = planned_visits(repeated)
    subjects = frame[subject].astype(str)
    participants = pd.Index(pd.unique(subjects), name=subject)
    columns = [c for c in frame.columns if c not in (subject, visit) and c in study.variables]
    index = pd.RangeIndex(len(participants))
    data, why, infos = {}, {}, {}
    for column in columns:
        info = study.variables[column]
        if column not in time_varying and not _varies_within(frame, subject, column):
            # the first recorded value; a participant with none keeps the reason (every missing cell has one)
            values = frame[column].groupby(subjects, sort=False).first().reindex(participants)
            reason = reasons[column].astype(object).groupby(subjects, sort=False).first().reindex(participants)
            data[column] = values.set_axis(index)
            why[column] = reason.where(values.isna()).set_axis(index)
            infos[column] = info
            continue
        for planned_visit in planned:
            at = (frame[visit] == planned_visit).to_numpy()
            keys = subjects[at].to_numpy()
            name = visit_column(column, planned_visit)
            values = frame.loc[at, column].set_axis(keys).reindex(participants)  # keeps a category's levels
            reason = reasons.loc[at, column].astype(object).set_axis(keys).reindex(participants)
            reason = reason.where(values.notna() | reason.notna(), NO_RECORD)
            data[name] = values.set_axis(index)
            why[name] = reason.set_axis(index)
            infos[name] = dataclasses.replace(info, name=name, label=f"{info.label or column} at {label(planned_visit)}")
    table = pd.DataFrame(data, index=index)
    reason_table = pd.DataFrame(why, index=index)
    notes = (f"One row per participant ({len(participants):,}) from the {len(frame):,} visit rows; variables that "
             f"change over visits have one column per planned visit ('<variable> @ <visit>'), and a visit with no "
             f"row is missing ('{NO_RECORD}').",)
    return Study(data=table, reasons=reason_table, variables=infos,
                 ids=pd.Series(participants.to_numpy(), index=index, name=subject), id_column=subject,
                 range_issues=study.range_issues.iloc[0:0], extreme_values=study.extreme_values.iloc[0:0],
                 source=study.source, sha256=study.sha256, notes=notes)

