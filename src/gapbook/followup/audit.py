"""Audit of follow-up: who attended which visit, who left when and why, and whether leavers differed.

Questions answered, each as a table:
- how complete is each visit in each group (``completeness``);
- did participants leave and not come back (monotone dropout) or miss a visit and return
  (intermittent), per group (``patterns``);
- how long did participants stay, per group: time to the last attended visit as a
  Kaplan-Meier curve, with a log-rank test of equal retention (``retention``,
  ``retention_test``; :func:`gapbook.survival.kaplan_meier` and statsmodels' ``survdiff``);
- why did those who left stop, per group (``stopping_reasons``, from the reasons intake
  recorded for the first missed visit);
- do those who leave early differ before they leave: the mean outcome at each visit by the
  visit at which participants were last seen (``profiles``), and at each visit the outcome of
  those who leave after it against those who stay (``leavers``, Welch's t-test). A
  difference is what missing at random allows (dropout explained by the observed outcome)
  and what completers-only and last-observation analyses ignore.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Dict, List, Optional, Sequence, Tuple

import numpy as np
import pandas as pd
from scipy import stats

from ..inference import format_p
from ..survival import kaplan_meier
from ..vocabulary import REASON_NOT_GIVEN
from .repeated import RepeatedOutcome, last_observed_index

__all__ = ["PATTERN_LABELS", "classify_follow_up", "FollowupAudit", "audit_followup"]

PATTERN_LABELS = ("complete", "monotone dropout", "intermittent", "intermittent and dropout", "no visit attended")
ALL_GROUPS = "all"


def classify_follow_up(observed: np.ndarray) -> np.ndarray:
    """Per participant, one of PATTERN_LABELS.

    complete: every planned visit attended; monotone dropout: attended visits form an
    unbroken run from the first visit, then none; intermittent: a visit missed before the
    last attended one, the last planned visit attended; intermittent and dropout: both.

    Parameters
    ----------
    observed : ndarray of bool, shape (participants, visits)
        Whether each planned visit's outcome was observed.

    Returns
    -------
    ndarray of str
    """
    observed = np.asarray(observed, dtype=bool)
    t = observed.shape[1]
    last = last_observed_index(observed)
    attended = observed.sum(axis=1)
    gaps = attended < last + 1                      # a miss before the last attended visit
    finished = last == t - 1
    labels = np.where(attended == 0, PATTERN_LABELS[4],
                      np.where(finished & ~gaps, PATTERN_LABELS[0],
                               np.where(~finished & ~gaps, PATTERN_LABELS[1],
                                        np.where(finished, PATTERN_LABELS[2], PATTERN_LABELS[3]))))
    return labels


@dataclass(frozen=True)
class FollowupAudit:
    """Tables of the follow-up audit (see the module docstring) and sentences describing them."""

    completeness: pd.DataFrame
    patterns: pd.DataFrame
    retention: pd.DataFrame
    retention_test: pd.DataFrame
    stopping_reasons: pd.DataFrame
    profiles: pd.DataFrame
    leavers: pd.DataFrame
    sentences: Tuple[str, ...] = field(default_factory=tuple)

    def tables(self) -> Dict[str, pd.DataFrame]:
        return {"followup_completeness": self.completeness, "followup_patterns": self.patterns,
                "followup_retention": self.retention, "followup_retention_test": self.retention_test,
                "followup_stopping_reasons": self.stopping_reasons, "followup_profiles": self.profiles,
                "followup_leavers": self.leavers}


def _group_positions(outcome: RepeatedOutcome) -> List[Tuple[Any, np.ndarray]]:
    if not outcome.levels:
        return [(ALL_GROUPS, np.arange(outcome.n))]
    return [(level, outcome.group_rows(level)) for level in outcome.levels]


def _visit_times(outcome: RepeatedOutcome, times: Optional[Sequence[float]]) -> np.ndarray:
    """Numeric visit labels are their own times (e.g. weeks); otherwise positions 1..T."""
    if times is not None:
        return np.asarray(times, dtype=float)
    try:
        values = np.array([float(v) for v in outcome.visits])
        if np.all(np.diff(values) > 0):
            return values
    except (TypeError, ValueError):
        pass
    return np.arange(1, outcome.n_visits + 1, dtype=float)


def _completeness(outcome: RepeatedOutcome, groups) -> pd.DataFrame:
    rows = []
    observed = outcome.observed
    for level, members in groups:
        for k, visit in enumerate(outcome.visits):
            values = outcome.values[members, k]
            values = values[~np.isnan(values)]
            rows.append({"group": level, "visit": visit, "n_participants": len(members), "n_observed": len(values),
                         "pct_observed": 100.0 * len(values) / len(members) if len(members) else np.nan,
                         "mean_observed": float(values.mean()) if len(values) else np.nan,
                         "sd_observed": float(values.std(ddof=1)) if len(values) > 1 else np.nan})
    return pd.DataFrame(rows)


def _patterns(labels: np.ndarray, groups) -> pd.DataFrame:
    rows = []
    for level, members in groups:
        for label in PATTERN_LABELS:
            count = int(np.sum(labels[members] == label))
            rows.append({"group": level, "pattern": label, "n": count,
                         "pct": 100.0 * count / len(members) if len(members) else np.nan})
    return pd.DataFrame(rows)


def _retention(outcome: RepeatedOutcome, groups, times: np.ndarray, alpha: float
               ) -> Tuple[pd.DataFrame, pd.DataFrame]:
    """Kaplan-Meier of the time to the last attended visit; leaving early is the event."""
    from statsmodels.duration.survfunc import survdiff

    last = outcome.last_observed
    t = outcome.n_visits
    time = np.where(last >= 0, times[np.clip(last, 0, None)], 0.0)
    left = (last < t - 1).astype(float)          # attended the last planned visit: censored at its time
    rows = []
    z = stats.norm.ppf(1 - alpha / 2)
    for level, members in groups:
        if len(members) == 0:
            continue
        curve = kaplan_meier(time[members], left[members])
        for k, visit in enumerate(outcome.visits):
            # Retained after visit k: share whose last attended visit is later than visit k.
            position = np.searchsorted(curve["time"].to_numpy(), times[k], side="right") - 1
            if position >= 0:
                share = float(curve["survival"].iloc[position])
                se = float(curve["std_error"].iloc[position])
            else:
                share, se = 1.0, 0.0
            at_risk = int(np.sum(time[members] >= times[k]))
            leaving = int(np.sum((time[members] == times[k]) & (left[members] == 1)))
            rows.append({"group": level, "visit": visit, "time": times[k], "n_at_risk": at_risk,
                         "n_left_after": leaving, "retained": share,
                         "ci_lower": max(0.0, share - z * se), "ci_upper": min(1.0, share + z * se)})
    retention = pd.DataFrame(rows)
    test = pd.DataFrame(columns=["test", "statistic", "df", "p_value"])
    if len(groups) > 1:
        labels = np.empty(outcome.n, dtype=object)
        for level, members in groups:
            labels[members] = str(level)
        if left.sum() > 0:
            statistic, p_value = survdiff(time, left, labels)
            test = pd.DataFrame([{"test": "log-rank", "statistic": float(statistic), "df": len(groups) - 1,
                                  "p_value": float(p_value)}])
    return retention, test


def _stopping_reasons(outcome: RepeatedOutcome, groups, reasons: Optional[np.ndarray]) -> pd.DataFrame:
    last = outcome.last_observed
    t = outcome.n_visits
    left = np.flatnonzero(last < t - 1)
    labels = np.full(outcome.n, REASON_NOT_GIVEN, dtype=object)
    if reasons is not None:
        reasons = np.asarray(reasons, dtype=object)
        if reasons.ndim == 1:
            chosen = reasons[left]
        else:
            chosen = reasons[left, last[left] + 1]
        labels[left] = [REASON_NOT_GIVEN if (r is None or (isinstance(r, float) and np.isnan(r)) or str(r) == "")
                        else str(r) for r in chosen]
    rows = []
    for level, members in groups:
        leavers = members[last[members] < t - 1]
        if len(leavers) == 0:
            continue
        values, counts = np.unique(labels[leavers].astype(str), return_counts=True)
        for value, count in sorted(zip(values, counts), key=lambda pair: (-pair[1], pair[0])):
            rows.append({"group": level, "reason": value, "n": int(count), "pct_of_leavers": 100.0 * count / len(leavers)})
    return pd.DataFrame(rows, columns=["group", "reason", "n", "pct_of_leavers"])


def _profiles(outcome: RepeatedOutcome, groups) -> pd.DataFrame:
    last = outcome.last_observed
    rows = []
    for level, members in groups:
        for cohort in range(-1, outcome.n_visits):
            who = members[last[members] == cohort]
            if len(who) == 0:
                continue
            cohort_label = outcome.visits[cohort] if cohort >= 0 else None
            for k in range(cohort + 1):
                values = outcome.values[who, k]
                values = values[~np.isnan(values)]
                rows.append({"group": level, "last_visit": cohort_label, "n_cohort": len(who),
                             "visit": outcome.visits[k], "n": len(values),
                             "mean": float(values.mean()) if len(values) else np.nan,
                             "sd": float(values.std(ddof=1)) if len(values) > 1 else np.nan})
    return pd.DataFrame(rows, columns=["group", "last_visit", "n_cohort", "visit", "n", "mean", "sd"])


def _leavers(outcome: RepeatedOutcome, groups) -> pd.DataFrame:
    """At each visit but the last: outcome of those who leave after it against those who stay (Welch)."""
    last = outcome.last_observed
    rows = []
    for level, members in groups:
        for k in range(outcome.n_visits - 1):
            values = outcome.values[members, k]
            seen = ~np.isnan(values)
            leaving = values[seen & (last[members] == k)]
            staying = values[seen & (last[members] > k)]
            if len(leaving) >= 2 and len(staying) >= 2:
                test = stats.ttest_ind(leaving, staying, equal_var=False)
                p_value = float(test.pvalue)
            else:
                p_value = np.nan
            rows.append({"group": level, "visit": outcome.visits[k], "n_leaving": len(leaving),
                         "n_staying": len(staying),
                         "mean_leaving": float(leaving.mean()) if len(leaving) else np.nan,
                         "mean_staying": float(staying.mean()) if len(staying) else np.nan,
                         "difference": float(leaving.mean() - staying.mean()) if len(leaving) and len(staying)
                         else np.nan, "p_value": p_value})
    return pd.DataFrame(rows, columns=["group", "visit", "n_leaving", "n_staying", "mean_leaving", "mean_staying",
                                       "difference", "p_value"])


def _sentences(outcome: RepeatedOutcome, completeness: pd.DataFrame, patterns: pd.DataFrame,
               test: pd.DataFrame, leavers: pd.DataFrame) -> Tuple[str, ...]:
    final = completeness[completeness["visit"] == outcome.visits[-1]]
    shares = "; ".join(f"{row.group}: {row.pct_observed:.0f} % ({row.n_observed} of {row.n_participants})"
                       for row in final.itertuples())
    sentences = [f"Outcome observed at the last planned visit ({outcome.visits[-1]}): {shares}."]
    totals = patterns.groupby("pattern", sort=False)["n"].sum()
    n = outcome.n
    dropout = int(totals.get("monotone dropout", 0))
    intermittent = int(totals.get("intermittent", 0) + totals.get("intermittent and dropout", 0))
    sentences.append(f"{dropout} of {n} participants left and did not return (monotone dropout); {intermittent} "
                     "missed a visit before their last attended one (intermittent).")
    if not test.empty:
        row = test.iloc[0]
        sentences.append(f"Time to the last attended visit by group: log-rank chi-square {row.statistic:.2f} on "
                         f"{int(row.df)} df, {format_p(row.p_value)}.")
    usable = leavers.dropna(subset=["p_value"])
    if not usable.empty:
        strongest = usable.loc[usable["p_value"].idxmin()]
        sentences.append(f"Largest difference before leaving: in group {strongest.group}, those who left after visit "
                         f"{strongest.visit} had a mean outcome there {strongest.difference:+.3g} from those who "
                         f"stayed (Welch test, {format_p(strongest.p_value)}). Dropout related to observed outcomes is "
                         "compatible with missing at random, but completers-only and last-observation analyses "
                         "ignore it.")
    return tuple(sentences)


def audit_followup(outcome: RepeatedOutcome, *, reasons: Optional[np.ndarray] = None,
                   times: Optional[Sequence[float]] = None, alpha: float = 0.05) -> FollowupAudit:
    """Audit of follow-up: completeness, dropout patterns, retention, reasons and leavers' outcomes.

    Parameters
    ----------
    outcome : repeated-measures data.
    reasons : why each missing visit is missing, as intake recorded it: an (n, T) array of
        labels (the label at the first missed visit after the last attended one is used),
        or an (n,) array of one reason per participant (e.g. the reason for discontinuation).
    times : the visits' times (e.g. weeks); default the visit labels when numeric, else 1..T.
    alpha : 1 - confidence level of the retention intervals.

    Returns
    -------
    FollowupAudit.

    References
    ----------
    Kaplan EL, Meier P (1958). Nonparametric estimation from incomplete observations. JASA 53:457-481.
    Mantel N (1966). Evaluation of survival data and two new rank order statistics arising
    in its consideration. Cancer Chemother Rep 50:163-170 (the log-rank test).
    Welch BL (1947). The generalization of 'Student's' problem when several different
    population variances are involved. Biometrika 34:28-35.
    """
    groups = _group_positions(outcome)
    times_ = _visit_times(outcome, times)
    labels = classify_follow_up(outcome.observed)
    completeness = _completeness(outcome, groups)
    patterns = _patterns(labels, groups)
    retention, test = _retention(outcome, groups, times_, alpha)
    stopping = _stopping_reasons(outcome, groups, reasons)
    profiles = _profiles(outcome, groups)
    leavers = _leavers(outcome, groups)
    return FollowupAudit(completeness=completeness, patterns=patterns, retention=retention, retention_test=test,
                         stopping_reasons=stopping, profiles=profiles, leavers=leavers,
                         sentences=_sentences(outcome, completeness, patterns, test, leavers))
