"""Time-to-event outcomes in the audit and mechanism stages: censoring kept apart from missing data.

The audit counts, per exposure group, the events, the censored rows, and the rows whose
follow-up time or event status is missing (with their reasons): censoring is information
about the outcome, a missing time or status is not. Follow-up is summarised by the
reverse Kaplan–Meier median (Schemper & Smith 1996), which counts the censored rows'
times and the event rows' times as "still followed", so early deaths do not shorten it.

The mechanism stage asks whether the rows lacking a covariate fare differently: for each
incomplete covariate it compares the Kaplan–Meier curves of the rows with and without the
value by the log-rank test (Mantel 1966). A difference means missingness is related to the
outcome, which makes complete cases biased and calls for the outcome (event indicator and
cumulative hazard) in the imputation model; no difference does not show missingness is
ignorable.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Dict, List, Mapping, Optional, Sequence, Tuple

import numpy as np
import pandas as pd

from .inference import format_p
from .survival import EventCoding, kaplan_meier

__all__ = ["TimeToEventAudit", "audit_time_to_event", "TimeToEventMechanism", "missingness_against_outcome",
           "km_median"]

ALL = "all"
MAX_GROUPS = 12  # an exposure with more levels is summarised overall only (curves would not be readable)

AUDIT_COLUMNS = ("group", "n", "n_events", "n_censored", "n_time_missing", "n_event_missing", "pct_censored",
                 "median_follow_up", "follow_up_lower_quartile", "follow_up_upper_quartile", "median_survival",
                 "longest_time")


def km_median(curve: pd.DataFrame, level: float = 0.5) -> float:
    """The first time at which a Kaplan–Meier curve drops to ``level`` or below (NaN when it never does).

    Parameters
    ----------
    curve : a Kaplan–Meier curve with ``time`` and ``survival`` columns.
    level : the survival probability (0.5 for the median).

    Returns
    -------
    float
    """
    reached = curve.loc[curve["survival"] <= level + 1e-12, "time"]
    return float(reached.iloc[0]) if len(reached) else float("nan")


@dataclass(frozen=True)
class TimeToEventAudit:
    """Events, censoring, follow-up and missing outcome data of a time-to-event study, overall and by group.

    ``summary`` has one row per group (``all`` first): n, n_events, n_censored,
    n_time_missing, n_event_missing, pct_censored (of the rows with time and status),
    median_follow_up and its quartiles (reverse Kaplan–Meier), median_survival
    (Kaplan–Meier; NaN when not reached) and longest_time. ``curves`` holds the
    Kaplan–Meier estimate per group: group, time, at_risk, events, censored, survival.
    """

    summary: pd.DataFrame
    curves: pd.DataFrame
    time: str
    event: str
    group: Optional[str]
    reasons: pd.DataFrame
    sentences: Tuple[str, ...] = ()

    def groups(self) -> Tuple[str, ...]:
        """The groups of the curves, ``all`` first."""
        return tuple(dict.fromkeys(self.curves["group"]))

    def tables(self) -> Dict[str, pd.DataFrame]:
        """``audit_time_to_event``, ``audit_survival_curves`` and ``audit_outcome_missing_reasons``."""
        return {"audit_time_to_event": self.summary, "audit_survival_curves": self.curves,
                "audit_outcome_missing_reasons": self.reasons}


def _reason_counts(reasons: Optional[pd.DataFrame], column: str, lacking: np.ndarray) -> Dict[str, int]:
    if not lacking.any():
        return {}
    if reasons is None or column not in reasons:
        return {"missing": int(lacking.sum())}
    labels = reasons[column][lacking].astype(object).fillna("missing")
    return {str(k): int(v) for k, v in labels.value_counts(sort=False).items()}


def _group_row(name: str, time: np.ndarray, status: np.ndarray, time_missing: int, event_missing: int) -> Dict:
    known = ~np.isnan(time) & ~np.isnan(status)
    t, d = time[known], status[known]
    row: Dict[str, object] = {"group": name, "n": int(len(time)), "n_events": int((d > 0).sum()),
                              "n_censored": int((d == 0).sum()), "n_time_missing": time_missing,
                              "n_event_missing": event_missing,
                              "pct_censored": 100.0 * float((d == 0).mean()) if len(d) else float("nan")}
    if len(t):
        follow = kaplan_meier(t, 1.0 - d)  # reverse Kaplan-Meier: censoring is the "event"
        row.update(median_follow_up=km_median(follow), follow_up_lower_quartile=km_median(follow, 0.75),
                   follow_up_upper_quartile=km_median(follow, 0.25),
                   median_survival=km_median(kaplan_meier(t, d)), longest_time=float(t.max()))
    return row


def audit_time_to_event(data: pd.DataFrame, *, time: str, event: EventCoding, group: Optional[str] = None,
                        reasons: Optional[pd.DataFrame] = None) -> TimeToEventAudit:
    """Count events, censored rows and missing outcome values; summarise follow-up and survival per group.

    Parameters
    ----------
    data : the analysis frame (NaN where missing).
    time : the follow-up time column.
    event : the event column and its coding.
    group : a categorical column (e.g. the exposure) to summarise and draw per level, or None.
    reasons : the study's missing-reason frame (``study.reasons``), to say why times or statuses are missing.

    Returns
    -------
    TimeToEventAudit.

    References
    ----------
    Kaplan EL, Meier P (1958). Nonparametric estimation from incomplete observations. JASA 53:457-481.
    Schemper M, Smith TL (1996). A note on quantifying follow-up in studies of failure time.
    Control Clin Trials 17:343-346.
    """
    times = data[time].to_numpy(dtype=float, na_value=np.nan)
    status = event.indicator(data)
    time_lacking, event_lacking = np.isnan(times), np.isnan(status)
    labels: Optional[np.ndarray] = None
    if group is not None:
        values = data[group]
        levels = [str(v) for v in (values.cat.categories if isinstance(values.dtype, pd.CategoricalDtype)
                                   else pd.unique(values.dropna()))]
        if 1 < len(levels) <= MAX_GROUPS:
            labels = values.astype(object).map(lambda v: None if pd.isna(v) else str(v)).to_numpy(dtype=object)
        else:
            group = None
    parts = [(ALL, np.ones(len(times), dtype=bool))]
    if labels is not None:
        parts += [(level, labels == level) for level in levels]
    rows, curves = [], []
    for name, rows_in in parts:
        rows.append(_group_row(name, times[rows_in], status[rows_in], int((time_lacking & rows_in).sum()),
                               int((event_lacking & ~time_lacking & rows_in).sum())))
        known = rows_in & ~time_lacking & ~event_lacking
        if known.any():
            curves.append(kaplan_meier(times[known], status[known]).assign(group=name))
    summary = pd.DataFrame(rows).reindex(columns=list(AUDIT_COLUMNS))
    curve_table = (pd.concat(curves, ignore_index=True) if curves else
                   pd.DataFrame(columns=["time", "at_risk", "events", "censored", "survival", "group"]))
    curve_table = curve_table[["group", "time", "at_risk", "events", "censored", "survival"]]
    reason_rows = [{"variable": column, "role": role, "reason": reason, "n": count}
                   for column, role, lacking in ((time, "follow-up time", time_lacking),
                                                 (event.column, "event status", event_lacking))
                   for reason, count in _reason_counts(reasons, column, lacking).items()]
    reason_table = pd.DataFrame(reason_rows, columns=["variable", "role", "reason", "n"])
    overall = rows[0]
    sentences = [
        f"{overall['n_events']:,} events and {overall['n_censored']:,} censored of {overall['n']:,} rows "
        f"({overall['pct_censored']:.1f}% censored among rows with a time and status); censoring is part of the "
        "outcome, not missing data.",
        f"Follow-up time '{time}' missing in {overall['n_time_missing']:,} rows, event status '{event.column}' "
        f"in {overall['n_event_missing']:,} more: these are missing data, left out of every fit of the model "
        "and counted with their reasons below, never treated as censored.",
    ]
    if len(curves):
        median_survival = overall["median_survival"]
        sentences.append(
            f"Median follow-up (reverse Kaplan-Meier) {overall['median_follow_up']:.4g} (quartiles "
            f"{overall['follow_up_lower_quartile']:.4g} to {overall['follow_up_upper_quartile']:.4g}); median "
            + (f"survival {median_survival:.4g}." if np.isfinite(median_survival)
               else "survival not reached (more than half the rows event-free at the longest time)."))
    return TimeToEventAudit(summary=summary, curves=curve_table, time=time, event=event.column, group=group,
                            reasons=reason_table, sentences=tuple(sentences))


# ---------------------------------------------------------------------------
# mechanism: does missingness of a covariate go with the outcome?

MECHANISM_COLUMNS = ("variable", "n_with", "n_without", "events_with", "events_without", "median_survival_with",
                     "median_survival_without", "log_rank_chi2", "df", "p_value", "note")


@dataclass(frozen=True)
class TimeToEventMechanism:
    """Survival of rows with and without each incomplete covariate, compared by the log-rank test.

    ``comparisons``: variable, n_with, n_without, events_with, events_without,
    median_survival_with, median_survival_without (Kaplan–Meier; NaN when not reached),
    log_rank_chi2, df (1), p_value and a note when no test was made.
    """

    comparisons: pd.DataFrame
    time: str
    event: str
    alpha: float
    sentences: Tuple[str, ...] = ()

    def related(self) -> Tuple[str, ...]:
        """The covariates whose missingness goes with survival at level ``alpha``."""
        p = self.comparisons["p_value"]
        return tuple(self.comparisons.loc[p.notna() & (p < self.alpha), "variable"])

    def tables(self) -> Dict[str, pd.DataFrame]:
        """``mechanism_time_to_event``."""
        return {"mechanism_time_to_event": self.comparisons}


def missingness_against_outcome(data: pd.DataFrame, *, time: str, event: EventCoding, variables: Sequence[str],
                                missing: Optional[pd.DataFrame] = None,
                                alpha: float = 0.05) -> TimeToEventMechanism:
    """For each incomplete covariate, the log-rank test of survival in rows lacking it against rows having it.

    Parameters
    ----------
    data : the analysis frame.
    time : the follow-up time column.
    event : the event column and its coding.
    variables : the covariates to compare (those with no missing value are skipped).
    missing : the study's missing frame (not-applicable cells are not missing); default: every NaN.
    alpha : the level at which a difference is named in the sentences.

    Returns
    -------
    TimeToEventMechanism.

    References
    ----------
    Mantel N (1966). Evaluation of survival data and two new rank order statistics arising in its
    consideration. Cancer Chemother Rep 50:163-170.
    Peto R, Peto J (1972). Asymptotically efficient rank invariant test procedures. JRSS A 135:185-207.
    """
    from statsmodels.duration.survfunc import survdiff

    times = data[time].to_numpy(dtype=float, na_value=np.nan)
    status = event.indicator(data)
    known = ~np.isnan(times) & ~np.isnan(status)
    rows: List[Dict[str, object]] = []
    for name in variables:
        lacking = (missing[name].to_numpy(dtype=bool) if missing is not None and name in missing
                   else data[name].isna().to_numpy())
        have = known & ~lacking & data[name].notna().to_numpy()
        lack = known & lacking
        row: Dict[str, object] = {"variable": name, "n_with": int(have.sum()), "n_without": int(lack.sum()),
                                  "events_with": int(status[have].sum()), "events_without": int(status[lack].sum())}
        if not lack.any():
            continue
        row["median_survival_with"] = km_median(kaplan_meier(times[have], status[have])) if have.any() else np.nan
        row["median_survival_without"] = km_median(kaplan_meier(times[lack], status[lack]))
        if not have.any() or status[have | lack].sum() == 0:
            row["note"] = "no test: one group is empty or there is no event"
        else:
            used = have | lack
            chi2, p = survdiff(times[used], status[used], lack[used].astype(int))
            row.update(log_rank_chi2=float(chi2), df=1, p_value=float(p), note="")
        rows.append(row)
    table = pd.DataFrame(rows).reindex(columns=list(MECHANISM_COLUMNS))
    table["note"] = table["note"].fillna("")
    result = TimeToEventMechanism(comparisons=table, time=time, event=event.column, alpha=alpha)
    related = result.related()
    sentences = [f"Survival of rows lacking each incomplete covariate against rows having it (log-rank test): "
                 + ("; ".join(f"{r['variable']} {format_p(r['p_value'])}" for r in table.to_dict("records")
                              if np.isfinite(r["p_value"])) or "no covariate could be tested") + "."]
    if related:
        sentences.append(f"Missingness of {', '.join(related)} goes with survival (p < {alpha:g}): complete cases "
                         "can be biased, and the imputation model needs the outcome (event indicator and cumulative "
                         "hazard, as gapbook uses).")
    else:
        sentences.append("No covariate's missingness goes clearly with survival; that does not show the data are "
                         "missing at random.")
    return TimeToEventMechanism(comparisons=table, time=time, event=event.column, alpha=alpha,
                                sentences=tuple(sentences))
