"""The summary page of a follow-up study: participants (not rows) through the visits, and drafted
methods and results that say which analysis targets which estimand.

A follow-up record counts participants: how many were randomised to each arm, how many
attended each planned visit, how many left and why, and how many each strategy analysed.
The drafted paragraphs name the primary analysis (the mixed model for repeated measures
unless the estimand block names another), the imputation strategies with their
assumptions, the estimand (ICH E9(R1)) and the analysis that targets each of its
intercurrent-event strategies, and carry the reference-based caution. As in
:mod:`gapbook.report`, nothing is fitted here: every number comes from the record's tables.
"""
from __future__ import annotations

from typing import Dict, List, Mapping, Optional, Sequence, Tuple

import numpy as np
import pandas as pd

from ..inference import format_p
from ..row_filter import RowsKept
from ..report import Checklist, ChecklistItem, MissingSummary, ParticipantFlow, ReportSummary, effect_phrase
from ..text import first_upper, md_code, md_escape
from ..vocabulary import (FOLLOWUP_IMPUTED_STRATEGIES, INTERCURRENT_STRATEGIES, NOT_RECOMMENDED_STRATEGIES,
                          REFERENCE_BASED_STRATEGIES, STRATEGY_PHRASES, cautions as page_cautions,
                          reference_based_cautions)
from .estimand import EstimandDescription, estimand_sentences

FOLLOWUP_REPORT_TABLES: Tuple[str, ...] = (
    "followup_completeness", "followup_patterns", "followup_retention_test", "followup_stopping_reasons",
    "followup_leavers", "visit_effects", "estimates", "estimand", "audit_variables", "mcar_test")
__all__ = ["FOLLOWUP_REPORT_TABLES", "followup_flow", "draft_followup_methods", "draft_followup_results", "followup_checklist", "summarise_followup"]


def _n(value: object) -> str:
    return f"{int(round(float(value))):,}" if value is not None and not pd.isna(value) else "n/a"


def _pct(part: float, whole: float) -> str:
    return f"{100 * part / whole:.1f}%" if whole else "n/a"


def _phrase(strategies: Sequence[str]) -> str:
    names = [STRATEGY_PHRASES.get(s, s.replace("_", " ")) for s in strategies]
    return names[0] if len(names) == 1 else ", ".join(names[:-1]) + " and " + names[-1]


def _label(value: object) -> str:
    if isinstance(value, (float, np.floating)) and float(value).is_integer():
        return str(int(value))
    return str(value)


def followup_flow(*, completeness: pd.DataFrame, stopping_reasons: Optional[pd.DataFrame],
                  estimates: Optional[pd.DataFrame], exposure: Optional[str]) -> ParticipantFlow:
    """Participants per arm: randomised (analysed participants), attending each visit, leaving with reasons, analysed.

    Parameters
    ----------
    completeness : ``followup_completeness.csv`` (group, visit, n_participants, n_observed, ...).
    stopping_reasons : ``followup_stopping_reasons.csv`` (group, reason, n), or None.
    estimates : ``estimates.csv`` (its ``n_used`` per strategy), or None.
    exposure : the arm column, named in the flow.

    Returns
    -------
    ParticipantFlow with one column per arm.

    References
    ----------
    Schulz KF, Altman DG, Moher D (2010). CONSORT 2010 statement. BMJ 340:c332 (participant flow).
    """
    groups = [g for g in dict.fromkeys(completeness["group"].astype(str)) if g != "all"]
    visits = list(dict.fromkeys(completeness["visit"]))
    table = completeness.assign(group=completeness["group"].astype(str))

    def by_group(frame: pd.DataFrame, column: str) -> Dict[str, float]:
        values = {g: float(frame.loc[frame["group"] == g, column].sum()) for g in groups}
        return {"all": float(sum(values.values())), **values}

    first = table[table["visit"] == visits[0]]
    rows = [{"step": "participants", "description": "participants in the analysis (with every baseline covariate)",
             **by_group(first, "n_participants")}]
    for visit in visits:
        rows.append({"step": f"attended: {_label(visit)}", "description": f"attended visit {_label(visit)}",
                     **by_group(table[table["visit"] == visit], "n_observed")})
    if stopping_reasons is not None and len(stopping_reasons):
        reasons = stopping_reasons.assign(group=stopping_reasons["group"].astype(str))
        for reason in dict.fromkeys(reasons["reason"].astype(str)):
            part = reasons[reasons["reason"].astype(str) == reason]
            rows.append({"step": f"left: {reason}", "description": f"left before the last visit: {reason}",
                         **by_group(part, "n")})
    if estimates is not None and "n_used" in estimates.columns:
        # A strategy's arms are shown when its total is every participant or those at the last visit.
        candidates = [rows[0], rows[len(visits)]]
        for strategy, part in estimates.groupby("strategy", sort=False):
            used = part["n_used"].dropna()
            if len(used):
                total = float(used.iloc[0])
                match = next((row for row in candidates if row["all"] == total), None)
                rows.append({"step": f"analysed: {strategy}",
                             "description": f"analysed under {STRATEGY_PHRASES.get(strategy, strategy)}",
                             "all": total, **{g: match[g] if match else float("nan") for g in groups}})
    steps = pd.DataFrame(rows, columns=["step", "description", "all", *groups])
    n = int(steps.loc[0, "all"])
    last = steps[steps["step"] == f"attended: {_label(visits[-1])}"]["all"]
    return ParticipantFlow(steps=steps, group=exposure, n_rows=n, n_complete=int(last.iloc[0]) if len(last) else 0)


def _headline(estimates: Optional[pd.DataFrame]) -> pd.DataFrame:
    if estimates is None or not len(estimates) or "visit" not in estimates.columns:
        return pd.DataFrame()
    return estimates[estimates["visit"].notna() & (estimates["term"] != "Intercept")]


def draft_followup_methods(*, formula: str, exposure: str, visits: Sequence[object], method: str,
                           strategies: Sequence[str], m: int, seed: int, reference: Optional[str],
                           delta: object, reasons: Sequence[str], primary: str,
                           estimand: Optional[EstimandDescription]) -> str:
    """A methods paragraph for a follow-up trial, filled with this run's choices (Markdown; user text escaped).

    Parameters
    ----------
    formula, exposure : the long-format analysis formula and the arm column.
    visits : the planned visits in order.
    method : ``reml`` or ``ml`` for the mixed model.
    strategies : the strategies estimated.
    m, seed : imputations and seed of the imputation strategies.
    reference : the reference arm of reference-based imputation.
    delta : the delta of the delta-adjusted strategy (None when not run).
    reasons : reasons for stopping found in the data.
    primary : the primary strategy.
    estimand : the estimand block, when params give one.

    Returns
    -------
    str
        The paragraph in Markdown.

    References
    ----------
    Carpenter JR, Roger JH, Kenward MG (2013). Analysis of longitudinal trials with protocol
    deviation: a framework for relevant, accessible assumptions, and inference via multiple
    imputation. J Biopharm Stat 23:1352-1371.
    """
    reasons = [md_escape(r) for r in reasons]
    exposure, reference = md_escape(exposure), None if reference is None else md_escape(reference)
    sentences = [
        f"Missing outcomes were recorded with their reasons ({', '.join(reasons) or 'none recorded'}). Attendance "
        f"at each of the {len(visits)} planned visits ({', '.join(md_escape(_label(v)) for v in visits)}) was "
        "described by arm, as "
        "monotone dropout against intermittent missed visits, as retention by arm (Kaplan-Meier estimates of the "
        "time to the last attended visit, with a log-rank test; Kaplan & Meier 1958; Mantel 1966), and by the "
        "outcomes of participants before they left."]
    mixed = (f"a mixed model for repeated measures ({md_code(formula)}) with an unstructured covariance between visits, "
             f"fitted by {'restricted ' if method == 'reml' else ''}maximum likelihood to every attended visit, with "
             "Satterthwaite degrees of freedom (Satterthwaite 1946; Fai & Cornelius 1996); it is valid if visits "
             "are missing at random and imputes nothing")
    if "mixed_model" in strategies:
        lead = "The primary analysis was " if primary == "mixed_model" else "The analyses included "
        sentences.append(f"{lead}{mixed}. The effect of {exposure} was estimated at every visit.")
    imputed = [s for s in strategies if s in FOLLOWUP_IMPUTED_STRATEGIES]
    if imputed:
        rules = [s for s in imputed if s in REFERENCE_BASED_STRATEGIES]
        text = (f"Missing visits were multiply imputed (m = {m}, seed {seed}) from each arm's multivariate normal "
                "model, drawn by data augmentation, ")
        parts = []
        if "multiple_imputation" in imputed:
            parts.append("under missing at random")
        if rules:
            parts.append(f"under the reference-based assumptions {_phrase(rules)} with {reference or 'the first arm'} "
                         "as the reference arm (Carpenter, Roger & Kenward 2013)")
        if "delta_adjusted" in imputed:
            parts.append(f"and in each participant's own arm with the outcomes after leaving shifted by {delta}")
        text += "; ".join(parts) + (". Each completed dataset was analysed with the same mixed model and the results "
                                    "combined with Rubin's rules (Rubin 1987).")
        if primary != "mixed_model" and primary in imputed:
            text += f" The plan names {_phrase([primary])} primary."
        sentences.append(text)
    comparisons = [s for s in strategies if s in NOT_RECOMMENDED_STRATEGIES]
    if comparisons:
        sentences.append(f"{first_upper(_phrase(comparisons))} {'is' if len(comparisons) == 1 else 'are'} "
                         "reported for comparison only and not recommended (National Research Council 2010).")
    if estimand is not None:
        attributes = estimand.attributes
        plain = attributes[attributes["attribute"] != "intercurrent event"]
        events = attributes[attributes["attribute"] == "intercurrent event"]
        described = "; ".join(f"{r.attribute}: {md_escape(r.description)}" for r in plain.itertuples())
        titles = {s.name: s.title.lower() for s in INTERCURRENT_STRATEGIES}
        handled = "; ".join(f"{md_escape(r.description)} ({titles.get(r.strategy, r.strategy)} strategy)"
                            for r in events.itertuples())
        sentences.append("The estimand (ICH E9(R1)) was stated before the analysis: " + described
                         + (f"; intercurrent events: {handled}" if handled else "") + ".")
        sentences.extend(estimand_sentences(list(zip(events["description"], events["strategy"])),
                                            primary=estimand.primary, analyses=strategies, quote=md_escape))
    return " ".join(sentences)


def draft_followup_results(*, flow: ParticipantFlow, patterns: Optional[pd.DataFrame],
                           retention_test: Optional[pd.DataFrame], estimates: Optional[pd.DataFrame],
                           alpha: float, last_visit: object) -> str:
    """A results paragraph on attendance, dropout and the effect at the last visit under every strategy.

    Parameters
    ----------
    flow : participants through the visits by arm.
    patterns : monotone against intermittent missing visits (None when not computed).
    retention_test : the log-rank test of retention by arm (None when not computed).
    estimates : the headline rows of ``estimates.csv``.
    alpha : the significance level of the intervals.
    last_visit : the last planned visit.

    Returns
    -------
    str
        The paragraph in Markdown.
    """
    steps = flow.steps
    groups = [c for c in steps.columns if c not in ("step", "description", "all")]
    first = steps.iloc[0]
    last = steps[steps["step"] == f"attended: {_label(last_visit)}"]
    sentences = []
    if len(last):
        row = last.iloc[0]
        arms = "; ".join(f"{md_escape(g)} {_n(row[g])} of {_n(first[g])}" for g in groups)
        sentences.append(f"Of {_n(first['all'])} participants, {_n(row['all'])} ({_pct(row['all'], first['all'])}) "
                         f"attended the last planned visit ({md_escape(_label(last_visit))})"
                         + (f" ({arms})" if arms else "") + ".")
    if patterns is not None and len(patterns):
        total = patterns.groupby("pattern", sort=False)["n"].sum()
        words = ", ".join(f"{_n(n)} {md_escape(pattern)}" for pattern, n in total.items() if n > 0)
        sentences.append(f"Follow-up patterns: {words}.")
    if retention_test is not None and len(retention_test):
        row = retention_test.iloc[0]
        sentences.append(f"Retention differed between arms by the log-rank test with chi-square "
                         f"{float(row['statistic']):.2f} on {_n(row['df'])} df ({format_p(row['p_value'])})."
                         if float(row["p_value"]) < alpha else
                         f"The log-rank test gave chi-square {float(row['statistic']):.2f} on {_n(row['df'])} df "
                         f"({format_p(row['p_value'])}) for a difference in retention between arms.")
    headline = _headline(estimates)
    if len(headline):
        for term, rows in headline.groupby("term", sort=False):
            parts = [f"{STRATEGY_PHRASES.get(r['strategy'], r['strategy'])} {effect_phrase(r, alpha)}"
                     for _, r in rows.iterrows()]
            sentences.append(f"The effect ({md_escape(term)}) at visit {md_escape(_label(last_visit))} was "
                             + "; ".join(parts) + ".")
        sentences.extend(reference_based_cautions(headline["strategy"]))
    else:
        sentences.append("The follow-up stage has not written estimates yet.")
    return " ".join(sentences)


def followup_checklist(flow: ParticipantFlow, missing: MissingSummary, tables: Mapping[str, Optional[pd.DataFrame]],
                       *, primary: str, estimand: Optional[EstimandDescription]) -> Checklist:
    """The reporting items of a follow-up trial, where the record answers them, and the answer.

    Parameters
    ----------
    flow : participants through the visits by arm.
    missing : the record's missing-data summary.
    tables : the record's tables by name (None for a stage that did not run).
    primary : the primary strategy.
    estimand : the estimand block, when params give one.

    Returns
    -------
    Checklist
        One row per reporting item.
    """
    steps = flow.steps
    attended = steps[steps["step"].str.startswith("attended: ")]
    left = steps[steps["step"].str.startswith("left: ")]
    analysed = steps[steps["step"].str.startswith("analysed: ")]
    estimates = tables.get("estimates")
    strategies = [] if estimates is None else list(dict.fromkeys(estimates["strategy"]))
    sensitivity = [s for s in strategies if s in REFERENCE_BASED_STRATEGIES + ("delta_adjusted",)]
    test = tables.get("followup_retention_test")
    items: List[ChecklistItem] = [
        ChecklistItem("participants randomised, attending each visit and analysed, by arm", "CONSORT 13a, 16",
                      "tables/participant_flow.csv, tables/followup_completeness.csv",
                      "; ".join(f"{md_escape(r.description)} {_n(r.all)}"
                                for r in pd.concat([steps.iloc[:1], attended, analysed]).itertuples())),
        ChecklistItem("losses after randomisation with reasons, by arm", "CONSORT 13b",
                      "tables/followup_stopping_reasons.csv",
                      "; ".join(f"{md_escape(r.step[len('left: '):])} {_n(r.all)}" for r in left.itertuples())
                      or "none"),
        ChecklistItem("retention by arm", "CONSORT 13b (common practice, no source, for the log-rank test)",
                      "tables/followup_retention.csv, tables/followup_retention_test.csv",
                      "not run" if test is None or not len(test) else
                      f"log-rank chi-square {float(test.iloc[0]['statistic']):.2f}, {format_p(test.iloc[0]['p_value'])}"),
        ChecklistItem("number missing for each variable", "STROBE 14b; Sterne et al. 2009",
                      "tables/audit_variables.csv (rows are visits)",
                      "; ".join(f"{md_escape(r.variable)} {_n(r.n_missing)}" for r in missing.variables.itertuples()
                                if float(r.n_missing) > 0) or "none"),
        ChecklistItem("estimand: population, treatment, variable, intercurrent events and their strategies, summary",
                      "ICH E9(R1) (2019)", "tables/estimand.csv; params.yaml (estimand)",
                      "not stated (add an estimand section)" if estimand is None else
                      f"{len(estimand.attributes)} attributes stated"),
        ChecklistItem("primary analysis and its assumption about the missing visits", "ICH E9(R1) (2019); "
                      "National Research Council 2010", "tables/visit_effects.csv; the follow-up page",
                      f"{STRATEGY_PHRASES.get(primary, primary)}; "
                      + ("missing at random (not verifiable from the data)" if primary in
                         ("mixed_model", "multiple_imputation") else "a stated departure from missing at random")),
        ChecklistItem("sensitivity analyses under departures from missing at random", "ICH E9(R1) (2019); "
                      "Carpenter, Roger & Kenward 2013", "tables/visit_effects.csv, tables/estimates.csv",
                      _phrase(sensitivity) if sensitivity else "none run"),
        ChecklistItem("comparison analyses not recommended", "National Research Council 2010",
                      "tables/visit_effects.csv",
                      _phrase([s for s in strategies if s in NOT_RECOMMENDED_STRATEGIES]) + " (comparison only)"
                      if any(s in NOT_RECOMMENDED_STRATEGIES for s in strategies) else "none shown"),
    ]
    return Checklist(items=pd.DataFrame([vars(i) for i in items], columns=["item", "guideline", "answered_in",
                                                                          "value"]))


def summarise_followup(*, tables: Mapping[str, Optional[pd.DataFrame]], missing: MissingSummary, title: str,
                       formula: str, exposure: str, visits: Sequence[object], method: str = "reml", m: int = 20,
                       seed: int = 0, reference: Optional[str] = None, delta: object = None, alpha: float = 0.05,
                       estimand: Optional[EstimandDescription] = None,
                       rows_kept: Optional[RowsKept] = None) -> ReportSummary:
    """The summary page of a follow-up record from its tables.

    Parameters
    ----------
    tables : the record's tables by name (None for a stage that did not run); see ``FOLLOWUP_REPORT_TABLES``.
    missing : missing values per variable (:func:`gapbook.report.missing_summary`; rows are visits).
    title : the page's title.
    formula, exposure, visits, method : the long-format model, the arm, the analysed visits, reml or ml.
    m, seed, reference, delta : the imputation settings the text reports.
    alpha : 1 - confidence level.
    estimand : the estimand block (:func:`gapbook.followup.estimand.describe_estimand`), or None.
    rows_kept : which rows of the data file ``data.keep_rows`` kept (the methods say so), or None.

    Returns
    -------
    ReportSummary.

    References
    ----------
    ICH E9(R1) (2019). Addendum on estimands and sensitivity analysis in clinical trials.
    Schulz KF, Altman DG, Moher D (2010). CONSORT 2010 statement. BMJ 340:c332.
    Carpenter JR, Roger JH, Kenward MG (2013). J Biopharm Stat 23:1352-1371.
    """
    completeness = tables.get("followup_completeness")
    estimates = tables.get("estimates")
    not_run = tuple(stage for stage, name in (("audit", "followup_completeness"), ("followup", "visit_effects"))
                    if tables.get(name) is None)
    primary = (estimand.primary if estimand is not None and estimand.primary else "mixed_model")
    strategies = [] if estimates is None else list(dict.fromkeys(estimates["strategy"]))
    reasons = sorted({part.rsplit(" ", 1)[0] for text in missing.variables["reasons"] if text
                      for part in text.split("; ")})
    if completeness is None:
        steps = pd.DataFrame(columns=["step", "description", "all"])
        flow = ParticipantFlow(steps=steps, group=exposure, n_rows=0, n_complete=0)
    else:
        flow = followup_flow(completeness=completeness, stopping_reasons=tables.get("followup_stopping_reasons"),
                             estimates=estimates, exposure=exposure)
    methods = draft_followup_methods(formula=formula, exposure=exposure, visits=visits, method=method,
                                     strategies=strategies, m=m, seed=seed, reference=reference, delta=delta,
                                     reasons=reasons, primary=primary, estimand=estimand)
    if rows_kept is not None:  # data.keep_rows: which of the file's rows were analysed
        methods = f"{md_escape(rows_kept.methods_sentence())} {methods}"
    results = ("The audit stage has not run: no attendance to report." if completeness is None else
               draft_followup_results(flow=flow, patterns=tables.get("followup_patterns"),
                                      retention_test=tables.get("followup_retention_test"), estimates=estimates,
                                      alpha=alpha, last_visit=visits[-1]))
    checklist = followup_checklist(flow, missing, tables, primary=primary, estimand=estimand)
    sentences = (("Stages whose tables are not in this record: " + ", ".join(not_run) + ".",) if not_run else ())
    return ReportSummary(title=title, flow=flow, missing=missing, checklist=checklist, methods_text=methods,
                         results_text=results, cautions=page_cautions(with_model=True), not_run=not_run,
                         sentences=sentences)
