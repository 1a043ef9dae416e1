"""Time-to-event building blocks: how the event column is read, the Cox fit, and the
Nelson–Aalen and Kaplan–Meier estimators every survival stage uses.

Censoring is not missing data. A censored row has a follow-up time and the knowledge that
the event had not happened by then; the Cox model uses it in full. A row whose time or
event status is unknown is missing data (with the reason the intake recorded), and the
stages count and handle it as such.

This module sits below :mod:`gapbook.models` (which fits the Cox model through
:func:`cox_model` and :func:`fit_cox_model`) and imports only the data layer.
"""
from __future__ import annotations

import math
import re
import warnings
from dataclasses import dataclass
from typing import Any, Dict, List, Optional, Sequence, Tuple, Union

import numpy as np
import pandas as pd

from .errors import AnalysisError, InputError, data_row
from .separation import UNBOUNDED_ADVICE, runs_off, unbounded_causes, unbounded_columns
from .text import counted
from .vocabulary import TIES_METHODS

__all__ = ["EventCoding", "check_follow_up", "cox_model", "fit_cox_model", "finite_fit", "unbounded_cox_terms", "unbounded_causes", "MONOTONE_ADVICE", "nelson_aalen", "cumulative_hazard_at",
           "kaplan_meier", "MissingFollowUp", "missing_follow_up", "WeibullFit", "weibull_times", "fit_weibull_ph", "CensoringDistribution", "censoring_distribution"]

Value = Union[str, int, float]


def _values_text(values: Sequence[Value]) -> str:
    return ", ".join(repr(v) if isinstance(v, str) else f"{v:g}" for v in values)


def _as_number(value: Value) -> Optional[float]:
    try:
        return float(value)
    except (TypeError, ValueError):
        return None


@dataclass(frozen=True)
class EventCoding:
    """The event column and which of its values mean "event" and which "censored".

    The default coding is the usual 1 = event, 0 = censored. A study coded otherwise
    (e.g. 2 = died, 1 = alive at last contact, or text such as ``died``/``alive``) lists its
    values; any other observed value is an error, never silently read as censored.
    """

    column: str
    event: Tuple[Value, ...] = (1,)
    censored: Tuple[Value, ...] = (0,)

    def _hits(self, values: pd.Series, wanted: Sequence[Value]) -> np.ndarray:
        if pd.api.types.is_numeric_dtype(values) and not isinstance(values.dtype, pd.CategoricalDtype):
            numbers = [n for n in (_as_number(w) for w in wanted) if n is not None]
            return np.isin(values.to_numpy(dtype=float, na_value=np.nan), numbers)
        text = values.astype(object).where(values.notna(), None)
        # Texts match ignoring case and surrounding spaces, as markers and levels do ('Yes' is 'yes').
        as_text = np.array([None if v is None else (f"{v:g}" if isinstance(v, float) else str(v).strip().casefold())
                            for v in text], dtype=object)
        wanted_text = {f"{w:g}" if isinstance(w, float) else str(w).strip().casefold() for w in wanted}
        return np.array([v is not None and v in wanted_text for v in as_text], dtype=bool)

    def unexpected(self, data: pd.DataFrame) -> np.ndarray:
        """Positions of rows whose event value is observed but neither an event nor a censored value."""
        values = data[self.column]
        known = self._hits(values, self.event) | self._hits(values, self.censored)
        return np.flatnonzero(values.notna().to_numpy() & ~known)

    def refuse_unexpected(self, data: pd.DataFrame, ids: Optional[pd.Series] = None,
                          file_rows: Optional[np.ndarray] = None) -> None:
        """Exit 2 (option ``event``) naming the first row (its file row, ``file_rows``) and id whose value is not in
        the coding."""
        bad = self.unexpected(data)
        if not len(bad):
            return
        value = data[self.column].iloc[bad[0]]
        shown = repr(value) if isinstance(value, str) else f"{float(value):g}"
        where = f"data row {data_row(bad[0], file_rows)}" + (f" (id {ids.iloc[bad[0]]})" if ids is not None else "")
        raise InputError(f"column '{self.column}' holds {shown} at {where} and in {len(bad)} row(s) in all, which is "
                         f"neither an event value ({_values_text(self.event)}) nor a censored value "
                         f"({_values_text(self.censored)}); list it under event or censored (a competing event "
                         "listed as censored gives the cause-specific hazard), or declare it a missing marker if "
                         "the status is unknown (a competing event is not missing data)", option="event")

    def indicator(self, data: pd.DataFrame) -> np.ndarray:
        """1.0 for an event, 0.0 for censored, NaN where the event status is missing.

        Exits 2 (option ``event``) when an observed value is neither an event nor a censored value.
        """
        if self.column not in data.columns:
            raise InputError(f"'{self.column}' is not a column", option="event")
        self.refuse_unexpected(data)
        values = data[self.column]
        out = np.full(len(values), np.nan)
        out[self._hits(values, self.censored)] = 0.0
        out[self._hits(values, self.event)] = 1.0
        return out

    def describe(self) -> str:
        """The coding in words, e.g. ``status (event: 2; censored: 1)``."""
        return f"{self.column} (event: {_values_text(self.event)}; censored: {_values_text(self.censored)})"


def check_follow_up(data: pd.DataFrame, *, time: str, event: EventCoding,
                    ids: Optional[pd.Series] = None, file_rows: Optional[np.ndarray] = None) -> None:
    """Exit 2 when a follow-up time is negative or not a number, or an event value is not in the coding.

    Missing times and event values are not errors: they are missing data, counted with their reasons.
    A time of 0 (an event or censoring on the day of entry, common in registries) is valid: the
    Cox partial likelihood only orders the times, and a row at 0 is in the risk set of every
    event at 0 (Cox 1972; statsmodels' PHReg fits it).

    Parameters
    ----------
    data : the analysis frame.
    time : the follow-up time column (the formula's left side).
    event : the event coding.
    ids : the participants' ids (``study.ids``), to name the first offending row.
    file_rows : each row's 0-based file row when ``data.keep_rows`` left rows out (``study.file_rows``).
    """
    column = data[time]
    if not pd.api.types.is_numeric_dtype(column) or isinstance(column.dtype, pd.CategoricalDtype):
        raise InputError(f"the follow-up time '{time}' is not numeric; give the time from the start of "
                         "follow-up to the event or censoring as a number", option="formula")
    values = column.to_numpy(dtype=float, na_value=np.nan)
    bad = np.flatnonzero(~np.isnan(values) & ~(values >= 0))
    if len(bad):
        where = f"data row {data_row(bad[0], file_rows)}" + (f" (id {ids.iloc[bad[0]]})" if ids is not None else "")
        raise InputError(f"the follow-up time '{time}' is {values[bad[0]]:g} at {where} and is negative in "
                         f"{len(bad)} row(s); follow-up times are 0 or more (check the dates: an end before the "
                         "start)", option="formula")
    if not np.isfinite(values[~np.isnan(values)]).all():
        raise InputError(f"the follow-up time '{time}' holds an infinite value; give a finite time",
                         option="formula")
    event.refuse_unexpected(data, ids, file_rows)


def cox_model(data: pd.DataFrame, *, formula: str, event: EventCoding, ties: str = "efron", eval_env: Any = None,
              columns: Optional[Sequence[int]] = None) -> Any:
    """statsmodels' ``PHReg`` for the rows with every model value, before fitting.

    Parameters
    ----------
    data : the analysis frame; the formula's left side is the follow-up time.
    formula : ``"time ~ exposure + covariates"`` (no intercept: the baseline hazard absorbs it).
    event : the event coding of the status column.
    ties : ``efron`` or ``breslow``, the approximation to the partial likelihood for tied times.
    eval_env : the namespace patsy evaluates the formula's functions in.
    columns : positions of the design columns to keep (all by default); the model's
        ``exog_names`` then still lists every term of the formula.

    Returns
    -------
    The ``PHReg`` model; its ``exog_names`` are the term names.

    References
    ----------
    Cox DR (1972). Regression models and life-tables. JRSS B 34:187-220.
    Efron B (1977). The efficiency of Cox's likelihood function for censored data. JASA 72:557-565.
    Breslow N (1974). Covariance analysis of censored survival data. Biometrics 30:89-99.
    """
    from statsmodels.duration.hazard_regression import PHReg

    if ties not in TIES_METHODS:
        raise InputError(f"'{ties}' is not one of {', '.join(TIES_METHODS)}", option="ties")
    status = event.indicator(data)
    frame = data.loc[~np.isnan(status)]
    status = status[~np.isnan(status)]
    model = PHReg.from_formula(formula, frame, status=pd.Series(status, index=frame.index), ties=ties,
                               missing="drop", eval_env=eval_env)
    if model.exog.shape[0] == 0:
        raise InputError(f"no row has every variable of '{formula}' observed", option="formula")
    if model.exog.shape[1] == 0:
        raise InputError(f"the Cox model '{formula}' has no covariate; add the exposure to its right side",
                         option="formula")
    if not (model.status > 0).any():
        raise InputError(f"no row used by '{formula}' has an event; a Cox model needs events "
                         f"(check the coding of '{event.column}')", option="event")
    if columns is not None:
        model = PHReg(model.endog, model.exog[:, list(columns)], status=model.status, ties=ties)
    return model


def fit_cox_model(model: Any, *, robust: bool = False) -> Any:
    """Fit a ``PHReg`` model; ``robust`` gives the Lin & Wei (1989) sandwich covariance, each row its own cluster.

    statsmodels' own robust covariance (``fit(groups=...)``) is NaN whenever a row is censored
    before the first event time, because it marks such rows' score residuals NaN; they are
    never at risk at an event time, so their score residual is 0, which is what is used here.
    The score residuals are statsmodels' (Breslow's form, whichever ties method is fitted).

    Parameters
    ----------
    model : statsmodels PHReg
        The unfitted model.
    robust : bool
        Use the Lin & Wei sandwich covariance.

    Returns
    -------
    PHRegResults
        statsmodels' fit, with the robust covariance when asked.

    References
    ----------
    Lin DY, Wei LJ (1989). The robust inference for the proportional hazards model. JASA 84:1074-1078.
    """
    from statsmodels.duration.hazard_regression import PHRegResults

    result = _maximise_partial_likelihood(model)
    if not robust:
        return result
    scores = np.nan_to_num(model.score_residuals(result.params), nan=0.0)
    bread = np.linalg.inv(model.hessian(result.params))
    return PHRegResults(model, result.params, bread @ (scores.T @ scores) @ bread)


def finite_fit(result: Any) -> bool:
    """Whether a fitted Cox model has finite estimates and a covariance with finite, positive variances.

    statsmodels' Newton can end on NaN estimates or a NaN or negative variance without a warning;
    such a fit is no fit.

    Parameters
    ----------
    result : PHRegResults
        A fitted model (its ``params`` and ``cov_params()``).

    Returns
    -------
    bool
    """
    covariance = np.asarray(result.cov_params(), dtype=float)
    return bool(np.all(np.isfinite(result.params)) and np.all(np.isfinite(covariance))
                and np.all(np.diag(covariance) > 0))


def _maximise_partial_likelihood(model: Any) -> Any:
    """Newton-Raphson from zero (statsmodels' default); BFGS to the maximum's neighbourhood, then Newton, if it fails.

    A full Newton step from zero can overshoot far past a finite maximum when a design column
    covers few rows (an indicator marking one participant with an early event): exp() then
    overflows and statsmodels returns NaN or stops on a singular matrix, although the
    maximum exists. BFGS, which limits its steps, finds the neighbourhood; Newton from there
    converges in a few steps. Fits that Newton handles from zero are unchanged.
    """
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            with np.errstate(all="ignore"):
                result = model.fit()
            failed = not finite_fit(result)
        except (np.linalg.LinAlgError, ValueError, OverflowError, FloatingPointError):
            failed = True
    if not failed:
        for item in caught:  # the fit's own warnings reach the caller (they say whether it converged)
            warnings.warn_explicit(item.message, item.category, item.filename, item.lineno)
        return result
    with np.errstate(over="ignore", invalid="ignore"):
        start = model.fit(method="bfgs", maxiter=1000).params
    return model.fit(method="newton", start_params=start)



def _one_sided(time: np.ndarray, event: np.ndarray, inside: np.ndarray) -> Optional[str]:
    """Whether the partial likelihood keeps rising as the coefficient of the 0/1 column ``inside`` runs off.

    'low' (to minus infinity): each event among the rows inside comes after every row outside
    has left follow-up (in particular, no row inside has an event); 'high' (to plus infinity):
    the same with inside and outside swapped. None when the events of both sides overlap
    the other's follow-up. Breslow's risk sets: a row followed to t is at risk at t.
    """
    def first_event(rows: np.ndarray) -> float:
        times = time[rows & event]
        return float(times.min()) if len(times) else math.inf

    if first_event(inside) > time[~inside].max():
        return "low"
    if first_event(~inside) > time[inside].max():
        return "high"
    return None


def unbounded_cox_terms(time: np.ndarray, event: np.ndarray, exog: np.ndarray,
                        names: Sequence[str]) -> Tuple[Tuple[str, str], ...]:
    """Design columns along which the Cox partial likelihood has no maximum (monotone likelihood), with why.

    A two-valued column (a level of a category, a missing-value indicator, a 0/1 covariate)
    whose rows of one value have no event, or have all their events only after every other
    row has left follow-up, makes the partial likelihood rise for ever as its coefficient
    runs to minus (or plus) infinity: the fit cannot converge, its estimate runs off and its
    standard error explodes (Bryson & Johnson 1981). The same is checked for the reference
    level of a treatment-coded category (the rows where all its level columns are 0). This
    looks at one column at a time, so it names the usual causes; monotone likelihood along
    a combination of columns is left to the fit's own convergence check.

    Parameters
    ----------
    time : array of float
        The follow-up times of the rows fitted.
    event : array
        1 for an event, 0 for censored, per row.
    exog : 2-D array
        The design matrix fitted (no intercept).
    names : sequence of str
        The design columns' names (statsmodels' term names).

    Returns
    -------
    tuple of (term, why)
        ``why`` says which rows and which way the hazard ratio runs, without the term's name.

    References
    ----------
    Bryson MC, Johnson ME (1981). The incidence of monotone likelihood in the Cox model.
    Technometrics 23:381-383.
    Heinze G, Schemper M (2001). A solution to the problem of monotone likelihood in Cox
    regression. Biometrics 57:114-119.
    """
    time = np.asarray(time, dtype=float)
    event = np.asarray(event, dtype=float) > 0

    def why(inside: np.ndarray, rows: str, reference: bool) -> Optional[str]:
        side = _one_sided(time, event, inside)
        return None if side is None else _unbounded_why(side, event, inside, rows, reference=reference)

    return unbounded_columns(exog, names, why)


# What to do about a monotone likelihood: the page's sentence and check's warning say it alike (as for separation).
MONOTONE_ADVICE = UNBOUNDED_ADVICE


def _unbounded_why(side: str, event: np.ndarray, inside: np.ndarray, rows: str, reference: bool = False) -> str:
    """Why one column's coefficient runs off, in words (``side`` as :func:`_one_sided` says it for ``inside``).

    For a category's reference level (``reference``) it is the other levels' hazard ratios,
    relative to it, that run off, the other way.
    """
    n = int(inside.sum())
    counted_rows = f"{counted(n, 'row')} {rows}"
    if side == "low":
        why = (f"none of the {counted_rows} has an event" if not (inside & event).any() else
               f"the {counted_rows} have their events only after every other row has left follow-up")
    else:
        why = (f"every event is among the {counted_rows}" if not (~inside & event).any() else
               f"the other rows have their events only after the {counted_rows} have all left follow-up")
    return f"{why}, {runs_off(side, reference, 'hazard ratio')}"


@dataclass(frozen=True)
class MissingFollowUp:
    """The rows whose follow-up time or event status is missing, and why: every strategy leaves them out.

    A row without its time or status has no outcome for the Cox model, no place on the
    cumulative hazard its covariates would be imputed with, and nothing a delta could shift,
    so the default (what the analysis plan usually says) is to leave it out; each page that
    reports an n says how many such rows there are. ``reasons`` pairs each missing reason
    (the time's, else the status's) with its number of rows.
    """

    time: str
    event: str
    n_rows: int
    n_missing: int
    reasons: Tuple[Tuple[str, int], ...] = ()

    def sentence(self) -> str:
        """The rows left out and their reasons in one sentence ("" when every row has both).

        Returns
        -------
        str
        """
        if not self.n_missing:
            return ""
        why = "; ".join(f"{label}: {count:,}" for label, count in self.reasons)
        return (f"{self.n_missing:,} of {self.n_rows:,} rows lack the follow-up time ({self.time}) or the event "
                f"status ({self.event}) ({why}) and are left out of every strategy: without its outcome a row "
                "cannot enter the Cox model, and it is not imputed.")


def missing_follow_up(data: pd.DataFrame, *, time: str, event: EventCoding,
                      reasons: Optional[pd.DataFrame] = None) -> MissingFollowUp:
    """Count the rows without a follow-up time or event status, by missing reason.

    Parameters
    ----------
    data : the analysis frame (NaN where missing).
    time : the follow-up time column.
    event : the event coding.
    reasons : the study's missing-reason frame (``study.reasons``); "missing" when not given.

    Returns
    -------
    MissingFollowUp
    """
    time_lacking = data[time].isna().to_numpy()
    event_lacking = data[event.column].isna().to_numpy()
    lacking = time_lacking | event_lacking
    labels = pd.Series("missing", index=data.index, dtype=object)
    if reasons is not None:
        for column, column_lacking in ((event.column, event_lacking), (time, time_lacking)):  # the time's reason wins
            if column in reasons:
                given = reasons[column].astype(object)
                labels = labels.where(~(column_lacking & given.notna().to_numpy()), given)
    counts = labels[lacking].value_counts(sort=False)
    return MissingFollowUp(time=time, event=event.column, n_rows=int(len(data)), n_missing=int(lacking.sum()),
                           reasons=tuple((str(k), int(v)) for k, v in counts.items()))


# ---------------------------------------------------------------------------
# nonparametric estimators

def nelson_aalen(time: np.ndarray, event: np.ndarray) -> Tuple[np.ndarray, np.ndarray]:
    """The Nelson–Aalen cumulative hazard: (distinct event times, H at each of them).

    H(t) = sum over event times s <= t of d(s) / n(s), with d the events at s and n the
    number at risk just before s (rows with time >= s).

    Parameters
    ----------
    time : ndarray
        Each row's follow-up time.
    event : ndarray
        1 where the row's follow-up ended with the event, 0 where it was censored.

    Returns
    -------
    (times, hazard) : ndarray

    References
    ----------
    Nelson W (1972). Theory and applications of hazard plotting for censored failure data.
    Technometrics 14:945-966. Aalen O (1978). Nonparametric inference for a family of
    counting processes. Ann Stat 6:701-726.
    """
    time = np.asarray(time, dtype=float)
    event = np.asarray(event, dtype=float)
    order = np.sort(time)
    at, deaths = np.unique(time[event > 0], return_counts=True)
    at_risk = len(time) - np.searchsorted(order, at, side="left")
    return at, np.cumsum(deaths / at_risk)


def cumulative_hazard_at(time: np.ndarray, event: np.ndarray) -> np.ndarray:
    """Each row's Nelson–Aalen cumulative hazard at its own follow-up time (ties included).

    The predictor White & Royston (2009) advise for imputing covariates of a Cox model, with
    the event indicator.

    Parameters
    ----------
    time : ndarray
        Each row's follow-up time.
    event : ndarray
        1 where the row's follow-up ended with the event, 0 where it was censored.

    Returns
    -------
    ndarray
        One value per row.

    References
    ----------
    White IR, Royston P (2009). Imputing missing covariate values for the Cox model.
    Stat Med 28:1982-1998.
    """
    at, hazard = nelson_aalen(time, event)
    position = np.searchsorted(at, np.asarray(time, dtype=float), side="right") - 1
    return np.where(position >= 0, hazard[np.clip(position, 0, None)] if len(hazard) else 0.0, 0.0)


def kaplan_meier(time: np.ndarray, event: np.ndarray) -> pd.DataFrame:
    """The Kaplan–Meier estimate at each distinct time: time, at_risk, events, censored, survival, std_error.

    The product-limit estimate and its Greenwood standard error are statsmodels'
    ``SurvfuncRight``, which reports them at the event times; here each distinct time (a
    censoring-only one too) gets a row, carrying the value of the last event time at or before
    it (1 and 0 before the first event). Reversing the roles of event and censoring
    (``event = 1 - event``) gives the reverse Kaplan–Meier estimate of follow-up (Schemper &
    Smith 1996).

    Parameters
    ----------
    time : ndarray
        Each row's follow-up time.
    event : ndarray
        1 where the row's follow-up ended with the event, 0 where it was censored.

    Returns
    -------
    DataFrame

    References
    ----------
    Kaplan EL, Meier P (1958). Nonparametric estimation from incomplete observations. JASA 53:457-481.
    Greenwood M (1926). The natural duration of cancer. Reports on Public Health and Medical
    Subjects 33. HMSO.
    Schemper M, Smith TL (1996). A note on quantifying follow-up in studies of failure time.
    Control Clin Trials 17:343-346.
    """
    from statsmodels.duration.survfunc import SurvfuncRight

    time = np.asarray(time, dtype=float)
    event = np.asarray(event, dtype=float) > 0
    times = np.unique(time)
    order = np.sort(time)
    at_risk = len(time) - np.searchsorted(order, times, side="left")
    events = np.bincount(np.searchsorted(times, time[event]), minlength=len(times))
    totals = np.bincount(np.searchsorted(times, time), minlength=len(times))
    curve = SurvfuncRight(time, event.astype(float))
    step = np.searchsorted(curve.surv_times, times, side="right")  # 0 before the first event time
    survival = np.r_[1.0, curve.surv_prob][step]
    std_error = np.r_[0.0, curve.surv_prob_se][step]
    return pd.DataFrame({"time": times, "at_risk": at_risk, "events": events, "censored": totals - events,
                         "survival": survival, "std_error": std_error})


# ---------------------------------------------------------------------------
# parametric model and censoring distribution (what the simulation stage draws from)

@dataclass(frozen=True)
class WeibullFit:
    """A Weibull proportional-hazards model: hazard h(t | x) = rate * shape * t**(shape - 1) * exp(x'beta).

    ``coefficients`` are log hazard ratios, on the same scale as a Cox model's; ``log_rate``
    is the log of the baseline rate (x = 0). Without covariates the survival function is
    exp(-(t / scale)**shape) with scale = rate**(-1 / shape), scipy's ``weibull_min``.
    """

    shape: float
    log_rate: float
    coefficients: Tuple[float, ...]
    log_likelihood: float
    n: int
    events: int
    zero_times: int = 0   # times of 0 fitted at half the smallest positive time (weibull_times)

    def scale(self) -> float:
        """The baseline scale, rate**(-1 / shape) (``scipy.stats.weibull_min``'s ``scale``).

        Returns
        -------
        float
        """
        return float(np.exp(-self.log_rate / self.shape))

    def draw_times(self, linear_predictor: np.ndarray, rng: np.random.Generator) -> np.ndarray:
        """Event times for rows with the given linear predictors x'beta, by inverting the survival function.

        T = (-log U / (rate * exp(x'beta)))**(1 / shape) with U uniform on (0, 1).

        Parameters
        ----------
        linear_predictor : ndarray
            Each row's x'beta.
        rng : numpy.random.Generator
            The generator to draw with.

        Returns
        -------
        ndarray
            One event time per row.

        References
        ----------
        Bender R, Augustin T, Blettner M (2005). Generating survival times to simulate Cox
        proportional hazards models. Stat Med 24:1713-1723.
        """
        eta = self.log_rate + np.asarray(linear_predictor, dtype=float)
        exponential = rng.standard_exponential(len(eta))  # -log U
        return np.exp((np.log(exponential) - eta) / self.shape)


def _weibull_negative_log_likelihood(theta: np.ndarray, log_time: np.ndarray, event: np.ndarray,
                                     design: np.ndarray) -> Tuple[float, np.ndarray, np.ndarray]:
    """Minus the log-likelihood, its gradient and Hessian in (log rate, beta..., log shape)."""
    log_shape = theta[-1]
    shape = np.exp(log_shape)
    eta = design @ theta[:-1]
    s = shape * log_time
    cumulative = np.exp(np.clip(eta + s, -700.0, 700.0))  # each row's cumulative hazard at its time
    loglik = float(np.sum(event * (eta + log_shape + s - log_time) - cumulative))
    gradient = np.concatenate([design.T @ (event - cumulative), [np.sum(event * (1.0 + s) - cumulative * s)]])
    p = design.shape[1]
    hessian = np.empty((p + 1, p + 1))
    hessian[:p, :p] = -(design * cumulative[:, None]).T @ design
    hessian[:p, p] = hessian[p, :p] = -design.T @ (cumulative * s)
    hessian[p, p] = np.sum(event * s - cumulative * s * (1.0 + s))
    return -loglik, -gradient, -hessian


def weibull_times(time: np.ndarray) -> np.ndarray:
    """Follow-up times for the Weibull fit: a time of 0 becomes half the smallest positive time.

    A Weibull hazard is infinite or zero at t = 0 unless shape = 1, so the likelihood of an
    event at exactly 0 has no maximum. A time recorded as 0 means "within the first unit of
    time" (an event or censoring on the day of entry); placing it at half the smallest positive
    time is common practice, no source. Only the simulation's generating model uses this; the
    Cox fits take 0 as it is.

    Parameters
    ----------
    time : ndarray
        Follow-up times (0 or more, at least one above 0).

    Returns
    -------
    ndarray
    """
    time = np.asarray(time, dtype=float)
    positive = time[time > 0]
    if not (time == 0).any() or not len(positive):
        return time
    return np.where(time == 0, 0.5 * float(positive.min()), time)


def fit_weibull_ph(time: np.ndarray, event: np.ndarray, exog: Optional[np.ndarray] = None) -> WeibullFit:
    """Maximum-likelihood Weibull proportional-hazards fit with right censoring.

    The log-likelihood is sum_i d_i log h(t_i | x_i) - H(t_i | x_i), with cumulative hazard
    H(t | x) = rate * t**shape * exp(x'beta) and d_i = 1 for an event, 0 for censored. It is
    maximised by Newton's method with a trust region (scipy ``trust-exact``) in log rate,
    beta and log shape, with the covariates centred and the times divided by their median
    for the numerics (the estimates are transformed back).

    Parameters
    ----------
    time : ndarray
        Follow-up times (> 0).
    event : ndarray
        1 for an event, 0 for censored.
    exog : ndarray, optional
        Covariate design (rows x terms, no constant column); None for no covariates.

    Returns
    -------
    WeibullFit

    References
    ----------
    Collett D (2015). Modelling Survival Data in Medical Research, 3rd ed., Chapman & Hall/CRC,
    section 5.6 (the Weibull proportional hazards model and its likelihood).
    Kalbfleisch JD, Prentice RL (2002). The Statistical Analysis of Failure Time Data, 2nd ed., Wiley.
    """
    from scipy import optimize

    time = np.asarray(time, dtype=float)
    event = (np.asarray(event, dtype=float) > 0).astype(float)
    x = np.zeros((len(time), 0)) if exog is None else np.asarray(exog, dtype=float).reshape(len(time), -1)
    if not len(time) or not (time > 0).all() or not np.isfinite(time).all():
        raise InputError("the Weibull model needs positive, finite follow-up times", option="formula")
    if not event.any():
        raise InputError("the Weibull model needs at least one event", option="event")
    unit = float(np.median(time))
    centre = x.mean(axis=0)
    design = np.column_stack([np.ones(len(time)), x - centre])
    log_time = np.log(time / unit)
    start = np.zeros(design.shape[1] + 1)
    start[0] = np.log(event.sum() / np.sum(time / unit))  # the exponential model's rate

    def value(theta):
        return _weibull_negative_log_likelihood(theta, log_time, event, design)[0]

    def gradient(theta):
        return _weibull_negative_log_likelihood(theta, log_time, event, design)[1]

    def hessian(theta):
        return _weibull_negative_log_likelihood(theta, log_time, event, design)[2]

    found = optimize.minimize(value, start, jac=gradient, hess=hessian, method="trust-exact",
                              options={"gtol": 1e-9, "maxiter": 500})
    theta = found.x
    if not np.all(np.isfinite(theta)) or np.max(np.abs(gradient(theta))) > 1e-4 * max(1.0, event.sum()):
        raise AnalysisError(f"the Weibull proportional-hazards model did not converge ({found.message})")
    shape = float(np.exp(theta[-1]))
    beta = theta[1:-1]
    # back from centred covariates and time in units of the median: H = exp(a - c'beta) (t / unit)**shape exp(x'beta)
    log_rate = float(theta[0] - centre @ beta - shape * np.log(unit))
    loglik = -value(theta) - float(np.sum(event) * np.log(unit))
    return WeibullFit(shape=shape, log_rate=log_rate, coefficients=tuple(float(b) for b in beta),
                      log_likelihood=float(loglik), n=int(len(time)), events=int(event.sum()))


@dataclass(frozen=True)
class CensoringDistribution:
    """The censoring times' distribution as the reverse Kaplan–Meier estimate gives it.

    ``times`` are the distinct censoring times, ``cumulative`` P(C <= t) at each of them;
    the mass left beyond the last one (when the longest follow-up ended in an event) is put
    at ``end``, the largest observed follow-up time: a participant still event-free there
    is censored there, as at the end of the study.
    """

    times: Tuple[float, ...]
    cumulative: Tuple[float, ...]
    end: float

    def draw(self, rng: np.random.Generator, n: int) -> np.ndarray:
        """n censoring times drawn by inverting the distribution function.

        Parameters
        ----------
        rng : numpy.random.Generator
            The generator to draw with.
        n : int
            How many times.

        Returns
        -------
        ndarray
        """
        times = np.append(np.asarray(self.times, dtype=float), self.end)
        position = np.searchsorted(np.asarray(self.cumulative, dtype=float), rng.random(n), side="right")
        return times[position]

    def survival_at(self, t: np.ndarray) -> np.ndarray:
        """P(C > t), the reverse Kaplan–Meier curve, at the given times.

        Parameters
        ----------
        t : ndarray
            Times.

        Returns
        -------
        ndarray
        """
        position = np.searchsorted(np.asarray(self.times, dtype=float), np.asarray(t, dtype=float), side="right")
        cumulative = np.concatenate([[0.0], np.asarray(self.cumulative, dtype=float)])
        return 1.0 - cumulative[position]


def censoring_distribution(time: np.ndarray, event: np.ndarray) -> CensoringDistribution:
    """The censoring distribution of a study: the reverse Kaplan–Meier estimate (censoring as the "event").

    Censoring is treated as independent of the covariates (the usual assumption of the Cox
    model's analysis); a study without censored rows censors everyone at the largest follow-up.

    Parameters
    ----------
    time : ndarray
        Follow-up times.
    event : ndarray
        1 for an event, 0 for censored.

    Returns
    -------
    CensoringDistribution

    References
    ----------
    Schemper M, Smith TL (1996). A note on quantifying follow-up in studies of failure time.
    Control Clin Trials 17:343-346.
    """
    time = np.asarray(time, dtype=float)
    censored = (np.asarray(event, dtype=float) <= 0).astype(float)
    curve = kaplan_meier(time, censored)
    steps = curve[curve["events"] > 0]  # kaplan_meier's "events" are the censorings here
    return CensoringDistribution(times=tuple(float(t) for t in steps["time"]),
                                 cumulative=tuple(float(1.0 - s) for s in steps["survival"]),
                                 end=float(time.max()))
