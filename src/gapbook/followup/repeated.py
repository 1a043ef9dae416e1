"""Repeated-measures data in the one shape every follow-up computation uses.

A follow-up study measures the outcome of each participant at several planned visits.
In the long layout (one row per participant per visit) a missed visit is either a row
whose outcome is missing or no row at all. :func:`repeated_outcome` turns such a frame
into a :class:`RepeatedOutcome`: the outcome as a participants x visits matrix (NaN
where not observed), the design rows of the long-format formula for every participant at
every planned visit (also where the outcome is missing, so a model can predict there),
and each participant's exposure group. The follow-up audit, the mixed model for repeated
measures, the imputation strategies and the comparison strategies all work on this shape.

Covariates in the formula must be fixed for a participant (measured at or before
baseline, as a trial's analysis plan asks of a mixed model for repeated measures) or
fixed for a visit (e.g. the planned week); anything that changes within a participant is
refused, because a post-baseline covariate would be missing exactly when the outcome is.
"""
from __future__ import annotations

from dataclasses import dataclass, field, replace
from typing import Any, Dict, Optional, Sequence, Tuple

import numpy as np
import pandas as pd

from ..errors import AnalysisError, InputError, did_you_mean
from ..expressions import formula_environment
from ..models import check_formula, exposure_terms, refuse_overflowing_design

__all__ = ["label", "last_observed_index", "RepeatedOutcome", "repeated_outcome", "wide_to_long"]

MAX_SHOWN = 3   # subjects named in one error message


def _shown(values: Sequence[Any]) -> str:
    values = list(values)
    text = ", ".join(label(v) for v in values[:MAX_SHOWN])
    return text + (f" and {len(values) - MAX_SHOWN} more" if len(values) > MAX_SHOWN else "")


def label(value: Any) -> str:
    """A subject or visit as a user wrote it (numpy scalars as plain numbers).

    Parameters
    ----------
    value : object
        A subject or visit.

    Returns
    -------
    str
    """
    if isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, float) and value.is_integer():
        return str(int(value))
    return str(value)


def last_observed_index(observed: np.ndarray) -> np.ndarray:
    """Per row, the position of the last True cell, or -1 when there is none.

    Parameters
    ----------
    observed : ndarray of bool, shape (rows, visits)

    Returns
    -------
    ndarray of int
    """
    observed = np.asarray(observed, dtype=bool)
    t = observed.shape[1]
    flipped = np.argmax(observed[:, ::-1], axis=1)
    return np.where(observed.any(axis=1), t - 1 - flipped, -1)


@dataclass(frozen=True)
class RepeatedOutcome:
    """Participants x planned visits: outcome, design rows of the formula, exposure group.

    Attributes
    ----------
    outcome_name, formula, subject, visit, exposure : what the data were built from.
    subjects : (n,) subject identifiers, in order of first appearance in the data.
    visits : the analysed visits in plan order (baseline excluded).
    values : (n, T) outcome, NaN where not observed.
    design : (n, T, p) design rows of the formula's right-hand side at every visit.
    terms : the p design column names, as statsmodels names them.
    groups : (n,) exposure level of each participant (None without a categorical exposure).
    levels : the exposure levels in order; the first is the reference group.
    baseline : (n,) the outcome at the baseline visit, when the plan has one and it was measured.
    excluded : participants left out, with the reason (a covariate missing).
    covariates : the formula's participant-level covariates other than the exposure.
    """

    outcome_name: str
    formula: str
    subject: str
    visit: str
    exposure: Optional[str]
    subjects: np.ndarray
    visits: Tuple[Any, ...]
    values: np.ndarray
    design: np.ndarray
    terms: Tuple[str, ...]
    groups: Optional[np.ndarray]
    levels: Tuple[Any, ...]
    baseline: Optional[np.ndarray]
    excluded: pd.DataFrame
    covariates: Tuple[str, ...]
    grid: pd.DataFrame = field(repr=False, compare=False)
    design_info: Any = field(repr=False, compare=False)

    # -- shape -------------------------------------------------------------------------
    @property
    def n(self) -> int:
        return int(self.values.shape[0])

    @property
    def n_visits(self) -> int:
        return int(self.values.shape[1])

    @property
    def observed(self) -> np.ndarray:
        return ~np.isnan(self.values)

    @property
    def last_observed(self) -> np.ndarray:
        """Per participant, the position of the last observed visit (-1: none after baseline)."""
        return last_observed_index(self.observed)

    @property
    def reference(self) -> Any:
        return self.levels[0] if self.levels else None

    def unestimable(self) -> Optional[InputError]:
        """Why the formula's effects cannot be estimated from the observed outcomes, or None when they can.

        The mixed model (and every strategy fitted with it) needs the design rows of the
        observed outcomes to have full column rank: every planned visit attended by someone,
        at least two arms, every arm observed at every visit, no term a combination of others.

        Returns
        -------
        InputError or None
            The error to raise: its option is the one to change (``visits``, ``exposure`` or
            ``formula``), its message one sentence naming the visit, arm or term, and what to do.
        """
        observed = self.observed
        for j, visit in enumerate(self.visits):
            if not observed[:, j].any():
                return InputError(f"no participant has the outcome at visit {label(visit)}; drop it from the planned "
                                  "visits (or check the visit column and the outcome's missing markers)",
                                  option="visits")
        if self.groups is not None:
            present = [level for level in self.levels if (self.groups == level).any()]
            if len(present) < 2:
                return InputError(f"every participant is in arm {', '.join(map(label, present)) or '(none)'} of "
                                  f"'{self.exposure}'; the follow-up analyses compare at least two arms",
                                  option="exposure")
            for j, visit in enumerate(self.visits):
                for level in present:
                    if not observed[(self.groups == level), j].any():
                        return InputError(f"no participant of arm {label(level)} has the outcome at visit "
                                          f"{label(visit)}, so the arms cannot be compared there; drop the visit "
                                          "from the planned visits or check the data", option="visits")
        rows = self.design[observed]
        rank = 0
        for k, term in enumerate(self.terms):
            if np.linalg.matrix_rank(rows[:, :k + 1]) == rank:
                return InputError(f"the term {term} cannot be estimated from the observed outcomes (it is constant, "
                                  "or a combination of the terms before it, on the attended visits); simplify the "
                                  "formula", option="formula")
            rank += 1
        return None

    def group_rows(self, level: Any) -> np.ndarray:
        """Positions of the participants in one exposure group."""
        if self.groups is None:
            raise InputError("a categorical exposure (the arm) is needed for this analysis", option="exposure")
        return np.flatnonzero(self.groups == level)

    # -- derived copies ----------------------------------------------------------------
    def with_values(self, values: np.ndarray) -> "RepeatedOutcome":
        """The same participants and design with another outcome matrix (e.g. a completed one)."""
        values = np.asarray(values, dtype=float)
        if values.shape != self.values.shape:
            raise AnalysisError(f"outcome matrix {values.shape} does not match {self.values.shape}")
        return replace(self, values=values)

    def subset(self, rows: np.ndarray) -> "RepeatedOutcome":
        """Only the participants at ``rows`` (positions or a boolean mask)."""
        rows = np.asarray(rows)
        if rows.dtype == bool:
            rows = np.flatnonzero(rows)
        t = self.n_visits
        grid_rows = (rows[:, None] * t + np.arange(t)[None, :]).ravel()
        return replace(self, subjects=self.subjects[rows], values=self.values[rows], design=self.design[rows],
                       groups=None if self.groups is None else self.groups[rows],
                       baseline=None if self.baseline is None else self.baseline[rows],
                       grid=self.grid.iloc[grid_rows].reset_index(drop=True))

    # -- designs for contrasts ---------------------------------------------------------
    def design_at(self, **values: Any) -> np.ndarray:
        """(n, T, p) design rows with some formula variables set to a value for everybody."""
        import patsy

        grid = self.grid.copy()
        for name, value in values.items():
            column = grid[name]
            if isinstance(column.dtype, pd.CategoricalDtype):
                grid[name] = pd.Categorical([value] * len(grid), categories=column.cat.categories,
                                            ordered=column.cat.ordered)
            else:
                grid[name] = value
        (matrix,) = patsy.build_design_matrices([self.design_info], grid, NA_action="raise")
        return np.asarray(matrix, dtype=float).reshape(self.n, self.n_visits, -1)

    def exposure_contrasts(self) -> Dict[str, np.ndarray]:
        """Per exposure term, a (T, p) matrix whose row t gives the exposure effect at visit t.

        The effect is the difference in the model's mean between an exposure level and the
        reference level, averaged over the participants' own covariates (for a linear model
        without exposure-by-covariate interactions it is the same for every participant).
        A numeric exposure gives the effect of one unit more.
        """
        if self.exposure is None:
            raise InputError("name the exposure (the arm) whose effect is reported at each visit", option="exposure")
        if self.levels:
            reference = self.design_at(**{self.exposure: self.levels[0]}).mean(axis=0)
            return {self.term_of(level): self.design_at(**{self.exposure: level}).mean(axis=0) - reference
                    for level in self.levels[1:]}
        column = self.grid[self.exposure].to_numpy(dtype=float)
        import patsy

        shifted = self.grid.assign(**{self.exposure: column + 1.0})
        (matrix,) = patsy.build_design_matrices([self.design_info], shifted, NA_action="raise")
        return {self.exposure: (np.asarray(matrix).reshape(self.n, self.n_visits, -1) - self.design).mean(axis=0)}

    def mean_designs(self) -> Dict[Any, np.ndarray]:
        """Per exposure level, the (T, p) design averaged over all participants' covariates with that level."""
        if not self.levels:
            return {"all": self.design.mean(axis=0)}
        return {level: self.design_at(**{self.exposure: level}).mean(axis=0) for level in self.levels}

    def term_of(self, level: Any) -> str:
        """The name statsmodels gives the main-effect term of one exposure level."""
        candidates = [t for t in exposure_terms(self.terms, self.exposure) if ":" not in t]
        if self.exposure in self.terms:          # a 0/1 indicator is its own term
            return self.exposure
        for term in candidates:
            if term.endswith(f"[T.{level}]"):
                return term
        return f"{self.exposure}[T.{level}]"

    def covariate_matrix(self) -> np.ndarray:
        """(n, q) intercept and participant-level covariates (categories as 0/1 columns, first level left out)."""
        first = self.grid.iloc[::self.n_visits].reset_index(drop=True)
        columns = [np.ones(self.n)]
        for name in self.covariates:
            column = first[name]
            if isinstance(column.dtype, pd.CategoricalDtype) or not pd.api.types.is_numeric_dtype(column):
                levels = list(column.cat.categories) if isinstance(column.dtype, pd.CategoricalDtype) \
                    else sorted(pd.unique(column))
                columns.extend((column == level).to_numpy(dtype=float) for level in levels[1:])
            else:
                columns.append(column.to_numpy(dtype=float))
        return np.column_stack(columns)

    def long(self) -> pd.DataFrame:
        """subject, visit, group, outcome: one row per participant per analysed visit."""
        t = self.n_visits
        frame = pd.DataFrame({self.subject: np.repeat(self.subjects, t),
                              self.visit: np.tile(np.array(self.visits, dtype=object), self.n)})
        if self.groups is not None:
            frame[self.exposure] = np.repeat(self.groups, t)
        frame[self.outcome_name] = self.values.ravel()
        return frame


def _check_rows(data: pd.DataFrame, subject: str, visit: str, planned: Sequence[Any]) -> None:
    """Exit 2 naming subject and visit for a duplicated visit or a visit not in the plan."""
    if data[subject].isna().any():
        row = int(np.flatnonzero(data[subject].isna().to_numpy())[0])
        raise InputError(f"row {row + 1} has no subject identifier in column '{subject}'", option="subject")
    known = pd.Series(data[visit]).isin(list(planned))
    if not known.all():
        bad = data.loc[~known.to_numpy(), [subject, visit]].iloc[0]
        raise InputError(f"subject {label(bad[subject])} has visit {label(bad[visit])}, which is not a planned visit "
                         f"({_shown(planned)}); add it to the planned visits or correct the visit column", option="visits")
    duplicated = data.duplicated([subject, visit], keep=False).to_numpy()
    if duplicated.any():
        bad = data.loc[duplicated, [subject, visit]].iloc[0]
        raise InputError(f"subject {label(bad[subject])} has {int(duplicated.sum())} rows for visit {label(bad[visit])} "
                         "(one row per subject per visit is expected); remove or merge the duplicates", option="data")


def _subject_level(data: pd.DataFrame, subject: str, column: str) -> bool:
    """Whether a column holds at most one distinct non-missing value per subject."""
    counts = data.groupby(subject, sort=False, observed=True)[column].nunique(dropna=True)
    return bool((counts <= 1).all())


def repeated_outcome(data: pd.DataFrame, *, formula: str, subject: str, visit: str, visits: Sequence[Any],
                     exposure: Optional[str] = None, baseline_visit: Any = None) -> RepeatedOutcome:
    """Turn long-layout data into a :class:`RepeatedOutcome`.

    Parameters
    ----------
    data : one row per participant per visit; the outcome may be missing, a missed visit may have no row.
    formula : long-format model, e.g. ``"chg ~ arm * C(visit) + base * C(visit)"``.
    subject, visit : the subject identifier and visit columns.
    visits : the analysed visits in plan order (the baseline visit not among them).
    exposure : the exposure (arm) variable; its first category is the reference group.
    baseline_visit : the baseline visit's label when rows for it exist; its outcome is kept
        as ``baseline`` (used when carrying a last observation forward) and it is not analysed.

    Returns
    -------
    RepeatedOutcome. Participants with a covariate missing are left out and listed in ``excluded``.
    """
    for option, column in (("subject", subject), ("visit", visit)):
        if column not in data.columns:
            raise InputError(f"'{column}' is not a column of the data{did_you_mean(column, data.columns)}", option=option)
    visits = tuple(visits)
    if len(visits) == 0:
        raise InputError("list the planned visits in order", option="visits")
    if len(set(visits)) != len(visits):
        raise InputError("a visit is listed twice; list each planned visit once, in order", option="visits")
    planned = visits + (() if baseline_visit is None else (baseline_visit,))
    _check_rows(data, subject, visit, planned)
    outcome, used = check_formula(formula, list(data.columns))
    if outcome in (subject, visit):
        raise InputError(f"the outcome '{outcome}' is the subject or visit column", option="formula")
    if not pd.api.types.is_numeric_dtype(data[outcome]):
        raise InputError(f"the repeated outcome '{outcome}' must be numeric", option="formula")
    if exposure is not None and exposure not in data.columns:
        raise InputError(f"'{exposure}' is not a column{did_you_mean(exposure, data.columns)}", option="exposure")
    covariates = [c for c in used if c not in (outcome, visit, subject)]
    if exposure is not None and exposure not in covariates:
        covariates.append(exposure)
    subject_columns, visit_columns = [], []
    for column in covariates:
        if _subject_level(data, subject, column):
            subject_columns.append(column)
        elif column != exposure and _subject_level(data, visit, column):  # the arm is never a per-visit column
            visit_columns.append(column)
        else:
            counts = data.groupby(subject, sort=False, observed=True)[column].nunique(dropna=True)
            who = counts.index[counts.to_numpy() > 1][0]
            rows = data[data[subject] == who]
            first = rows[column].dropna().iloc[0]
            changed = rows.loc[rows[column].notna() & (rows[column] != first), visit].iloc[0]
            if column == exposure:
                raise InputError(f"the arm '{column}' changes within subject {label(who)} (from {label(first)} to "
                                 f"{label(rows.loc[rows[visit] == changed, column].iloc[0])} at visit "
                                 f"{label(changed)}); a participant keeps the arm they were randomised to: correct "
                                 "the data", option="exposure")
            raise InputError(f"'{column}' changes within subject {label(who)} (at visit {label(changed)}); a "
                             "repeated-measures model takes covariates fixed per subject (baseline values) or per visit",
                             option="formula")
    analysed = data[data[visit].isin(list(visits))]
    order = pd.unique(data[subject])
    per_subject = data.groupby(subject, sort=False, observed=True)[subject_columns].first().reindex(order) \
        if subject_columns else pd.DataFrame(index=pd.Index(order, name=subject))
    for column in subject_columns:  # keep each column's dtype (categories in their declared order)
        if isinstance(data[column].dtype, pd.CategoricalDtype):
            per_subject[column] = pd.Categorical(per_subject[column], categories=data[column].cat.categories,
                                                 ordered=data[column].cat.ordered)
    incomplete = per_subject.isna()
    excluded = pd.DataFrame({subject: per_subject.index[incomplete.any(axis=1).to_numpy()]})
    excluded["reason"] = [", ".join(f"{c} missing" for c in subject_columns if incomplete.loc[s, c])
                          for s in excluded[subject]]
    per_subject = per_subject[~incomplete.any(axis=1).to_numpy()]
    if len(per_subject) == 0:
        raise InputError(f"no subject has every covariate of '{formula}' observed", option="formula")
    subjects = per_subject.index.to_numpy()
    n, t = len(subjects), len(visits)
    # The long grid: every kept subject at every analysed visit, subject-major.
    grid = per_subject.loc[np.repeat(subjects, t)].reset_index(drop=True)
    visit_values = np.tile(np.array(visits, dtype=object), n)
    if pd.api.types.is_numeric_dtype(data[visit]):
        grid[visit] = pd.to_numeric(pd.Series(visit_values))
    else:  # text visits keep the plan's order in C(visit)
        grid[visit] = pd.Categorical(visit_values, categories=list(visits))
    for column in visit_columns:
        per_visit = data.groupby(visit, sort=False, observed=True)[column].first()
        missing = [v for v in visits if v not in per_visit.index or pd.isna(per_visit.get(v))]
        if missing:
            raise InputError(f"'{column}' has no value at visit {label(missing[0])}", option="formula")
        grid[column] = grid[visit].map(per_visit).astype(data[column].dtype)
    design_info, matrix = _design(formula, grid)
    # np.exp(base) at a base of 800 is inf: the mixed model stopped on "SVD did not converge" after check passed
    refuse_overflowing_design(matrix, design_info.column_names,
                              lambda r: f"subject {label(subjects[r // t])}, visit {label(visits[r % t])}")
    # The outcome matrix.
    position = pd.Series(np.arange(n), index=subjects)
    visit_position = {v: k for k, v in enumerate(visits)}
    values = np.full((n, t), np.nan)
    kept = analysed[analysed[subject].isin(subjects)]
    values[position.loc[kept[subject]].to_numpy(), kept[visit].map(visit_position).to_numpy(dtype=int)] = \
        kept[outcome].to_numpy(dtype=float)
    baseline = None
    if baseline_visit is not None:
        at_baseline = data[(data[visit] == baseline_visit) & data[subject].isin(subjects)]
        baseline = np.full(n, np.nan)
        baseline[position.loc[at_baseline[subject]].to_numpy()] = at_baseline[outcome].to_numpy(dtype=float)
    groups, levels = None, ()
    if exposure is not None:
        column = per_subject[exposure]
        if isinstance(column.dtype, pd.CategoricalDtype):
            groups = column.to_numpy(dtype=object)
            levels = tuple(lvl for lvl in column.cat.categories if (groups == lvl).any())
        elif not pd.api.types.is_numeric_dtype(column):
            groups = column.to_numpy(dtype=object)
            levels = tuple(sorted(pd.unique(groups)))
        elif set(pd.unique(column)) <= {0.0, 1.0}:
            # A 0/1 arm indicator: two groups, 0 the reference; its term is the column itself.
            groups = column.to_numpy(dtype=float)
            levels = tuple(v for v in (0.0, 1.0) if (groups == v).any())
    return RepeatedOutcome(outcome_name=outcome, formula=formula, subject=subject, visit=visit, exposure=exposure,
                           subjects=subjects, visits=visits, values=values, design=matrix.reshape(n, t, -1),
                           terms=tuple(design_info.column_names), groups=groups, levels=levels, baseline=baseline,
                           excluded=excluded, covariates=tuple(c for c in subject_columns if c != exposure),
                           grid=grid, design_info=design_info)


def _design(formula: str, grid: pd.DataFrame) -> Tuple[Any, np.ndarray]:
    """The right-hand side's design on the long grid (patsy, the library statsmodels' formulas use)."""
    import patsy

    rhs = formula.split("~", 1)[1]
    try:
        # Only the expression language's functions are visible to the (checked) formula.
        with np.errstate(over="ignore", invalid="ignore"):  # an inf term is named by the caller, not warned of
            matrix = patsy.dmatrix(rhs, grid, eval_env=formula_environment(), NA_action="raise")
    except Exception as exc:
        first = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        raise InputError(f"'{formula}' could not be built on the visit grid ({first})", option="formula") from None
    return matrix.design_info, np.asarray(matrix, dtype=float)


def wide_to_long(data: pd.DataFrame, *, subject: str, outcome_columns: Sequence[str], visits: Sequence[Any],
                 outcome: str, visit: str = "visit", keep: Sequence[str] = ()) -> pd.DataFrame:
    """One row per participant per visit from one column per visit (the wide layout).

    Parameters
    ----------
    data : one row per participant.
    subject : the subject identifier column.
    outcome_columns : the outcome's column at each visit, in plan order.
    visits : the visit labels, in the same order.
    outcome, visit : names of the outcome and visit columns of the result.
    keep : participant-level columns repeated on every row (arm, baseline covariates).

    Returns
    -------
    DataFrame
        subject, visit, outcome and the kept columns, one row per participant per visit.
    """
    if len(outcome_columns) != len(visits):
        raise InputError("give one outcome column per planned visit", option="outcome_columns")
    n, t = len(data), len(visits)
    frame = pd.DataFrame({subject: np.repeat(data[subject].to_numpy(), t)})
    for column in keep:
        frame[column] = data[column].iloc[np.repeat(np.arange(n), t)].reset_index(drop=True)
    frame[visit] = np.tile(np.array(visits, dtype=object), n)
    if all(isinstance(v, (int, float, np.integer, np.floating)) for v in visits):
        frame[visit] = pd.to_numeric(frame[visit])
    frame[outcome] = data[list(outcome_columns)].to_numpy(dtype=float).ravel()
    return frame
