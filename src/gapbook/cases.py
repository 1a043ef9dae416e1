"""Complete cases, available cases, and the comparison of strategies side by side.

The complete-case analysis fits the study's model to the rows where every model
variable is present; a flow table says where the other rows went. The available-case
summaries describe every variable from every value it has, beside the same summaries in
the complete-case subset, so a reader sees what the restriction changes. The baseline
table compares complete with incomplete rows on the fully observed variables.

Complete-case regression is unbiased when missingness does not depend on the outcome
given the model's covariates, even when it is not completely at random; it is biased
when it depends on the outcome (Little 1992; White & Carlin 2010). Which of these holds
cannot be verified from the data.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Dict, List, Mapping, Optional, Sequence, Tuple, Union

import numpy as np
import pandas as pd

from .errors import InputError
from .inference import standardised_difference
from .intake import levels_of
from .models import (AnalysisModel, ModelFit, add_ratio_columns, exposure_rows, exposure_terms, formula_columns,
                     scale_sentence)
from .survival import missing_follow_up
from .text import level_text
from .vocabulary import CATEGORICAL_TYPES, NUMBER_CODED_TYPES, STRATEGY_TITLES, infer_type, ratio_name

__all__ = ["CompleteCaseFlow", "exposure_column", "complete_case_flow", "CompleteCaseResult", "check_model_data",
           "require_rows", "complete_case_analysis", "is_categorical", "pairwise_correlations",
           "AvailableCaseSummary", "available_case_summary", "CompletenessBaseline", "completeness_baseline",
           "StrategyComparison", "compare_strategies", "follow_up_sentences"]
FLOW_COLUMNS = ("step", "variable", "role", "n_excluded", "n_not_applicable", "n_lacking", "reasons", "n_remaining")


# ---------------------------------------------------------------------------
# the flow of rows into the complete-case analysis

@dataclass(frozen=True)
class CompleteCaseFlow:
    """Where the rows of the file went on the way to the complete-case analysis.

    ``steps`` has one row for the file, one per model variable (outcome first, then the
    formula's order, then the offset) and one for the rows used. ``n_excluded`` counts a
    row once, under the first model variable it lacks; ``n_lacking`` counts every row that
    lacks the variable, whatever else it lacks; ``n_not_applicable`` is the part of
    ``n_excluded`` that is "not applicable" rather than missing; ``reasons`` breaks
    ``n_lacking`` down by missing reason. ``complete`` marks the rows used.
    """

    steps: pd.DataFrame
    n_rows: int
    n_used: int
    complete: pd.Series
    outcome: str
    covariates: Tuple[str, ...]


def _roles(outcome: str, covariates: Sequence[str], model: AnalysisModel, columns: Sequence[str]) -> Dict[str, str]:
    exposure = exposure_column(model, columns)
    roles = {outcome: "outcome"}
    for name in covariates:
        roles[name] = ("offset" if name == model.offset else "event" if model.event and name == model.event.column
                       else "exposure" if name == exposure else "covariate")
    return roles


def exposure_column(model: AnalysisModel, columns: Sequence[str]) -> Optional[str]:
    """The data column behind the exposure (a column name or a term such as ``arm[T.sms]``).

    Parameters
    ----------
    model : AnalysisModel
        The model; its ``exposure`` is read.
    columns : sequence of str
        The data's columns.

    Returns
    -------
    str or None
        The column; without an exposure the first covariate (None when there is none).
    """
    _, covariates = model.variables(columns)
    if model.exposure is None:
        return covariates[0] if covariates else None
    found = formula_columns(model.exposure, covariates)
    return found[0] if found else None


def _reason_text(reasons: Optional[pd.Series], lacking: np.ndarray) -> str:
    """'lost to follow-up 138; marker NA 15' for the rows that lack a variable (largest first)."""
    if not lacking.any():
        return ""
    if reasons is None:
        return f"missing {int(lacking.sum())}"
    labels = reasons[lacking].astype(object).fillna("missing")
    counts = labels.value_counts(sort=False)
    ordered = sorted(counts.items(), key=lambda kv: (-kv[1], str(kv[0])))
    return "; ".join(f"{label} {count}" for label, count in ordered)


def complete_case_flow(data: pd.DataFrame, *, model: AnalysisModel, reasons: Optional[pd.DataFrame] = None,
                       not_applicable: Optional[pd.DataFrame] = None) -> CompleteCaseFlow:
    """Count the rows excluded by each model variable and the rows left for the complete-case fit.

    Parameters
    ----------
    data : the analysis frame, NaN where a value is missing or not applicable.
    model : the analysis model (formula, family, exposure, offset).
    reasons : optional frame of missing-reason labels (``study.reasons``) to break counts down.
    not_applicable : optional boolean frame (``study.not_applicable``): such cells are not
        missing, but a model variable that does not apply still excludes the row.

    Returns
    -------
    CompleteCaseFlow.
    """
    outcome, covariates = model.variables(list(data.columns))
    order = [outcome] + [c for c in covariates if c != outcome]
    roles = _roles(outcome, covariates, model, list(data.columns))
    n = len(data)
    lacking_so_far = np.zeros(n, dtype=bool)
    rows: List[Dict[str, object]] = [{"step": "rows in the file", "variable": "", "role": "", "n_remaining": n}]
    for name in order:
        lacking = data[name].isna().to_numpy()
        first = lacking & ~lacking_so_far
        na = (not_applicable[name].to_numpy(dtype=bool) if not_applicable is not None and name in not_applicable
              else np.zeros(n, dtype=bool))
        lacking_so_far |= lacking
        column_reasons = reasons[name] if reasons is not None and name in reasons else None
        rows.append({"step": "excluded", "variable": name, "role": roles.get(name, "covariate"),
                     "n_excluded": int(first.sum()), "n_not_applicable": int((first & na).sum()),
                     "n_lacking": int(lacking.sum()), "reasons": _reason_text(column_reasons, lacking),
                     "n_remaining": int(n - lacking_so_far.sum())})
    n_used = int(n - lacking_so_far.sum())
    rows.append({"step": "rows used", "variable": "", "role": "", "n_remaining": n_used})
    table = pd.DataFrame(rows, columns=list(FLOW_COLUMNS))
    for column in ("n_excluded", "n_not_applicable", "n_lacking", "n_remaining"):
        table[column] = table[column].astype("Int64")
    table["reasons"] = table["reasons"].fillna("")
    complete = pd.Series(~lacking_so_far, index=data.index, name="complete")
    return CompleteCaseFlow(steps=table, n_rows=n, n_used=n_used, complete=complete, outcome=outcome,
                            covariates=tuple(covariates))


# ---------------------------------------------------------------------------
# the complete-case fit

@dataclass(frozen=True)
class CompleteCaseResult:
    """The model fitted to the complete cases: where the rows went, the fit and the exposure terms."""

    flow: CompleteCaseFlow
    model_fit: ModelFit
    exposure_terms: Tuple[str, ...]
    sentences: Tuple[str, ...] = ()
    strategy: str = "complete_case"

    def estimates(self) -> pd.DataFrame:
        """Rows for ``estimates.csv`` (strategy ``complete_case``)."""
        return self.model_fit.estimates(self.strategy)

    def exposure_estimates(self) -> pd.DataFrame:
        """The rows of :meth:`estimates` for the exposure terms."""
        return exposure_rows(self.estimates(), self.exposure_terms)

    def tables(self) -> Dict[str, pd.DataFrame]:
        """``flow_complete_case`` and this strategy's rows of ``estimates``."""
        return {"flow_complete_case": self.flow.steps, "estimates": self.estimates()}


def check_model_data(data: pd.DataFrame, model: AnalysisModel) -> Tuple[str, List[str]]:
    """The outcome and covariates after checking that the outcome has observed values (exit 2 otherwise).

    Parameters
    ----------
    data : DataFrame
        The analysis frame.
    model : AnalysisModel
        The model.

    Returns
    -------
    (outcome, covariates) : str and list of str
    """
    outcome, covariates = model.variables(list(data.columns))
    if data[outcome].notna().sum() == 0:
        raise InputError(f"the outcome '{outcome}' has no observed values; "
                         "check the outcome column and its missing markers", option="formula")
    return outcome, covariates


def require_rows(flow: CompleteCaseFlow) -> None:
    """Exit 2, naming the variable lacking most often, when no row is left to fit the model to.

    Parameters
    ----------
    flow : CompleteCaseFlow
        The rows lost per variable.
    """
    if flow.n_used > 0:
        return
    lacking = flow.steps[flow.steps["step"] == "excluded"].sort_values("n_lacking", ascending=False, kind="stable")
    worst = lacking.iloc[0]
    raise InputError(f"no row has every model variable observed ('{worst['variable']}' is "
                     f"missing in {int(worst['n_lacking'])} of {flow.n_rows} rows); drop a variable from the "
                     "formula or use another strategy", option="formula")


def complete_case_analysis(data: pd.DataFrame, *, model: AnalysisModel, reasons: Optional[pd.DataFrame] = None,
                           not_applicable: Optional[pd.DataFrame] = None) -> CompleteCaseResult:
    """Fit the analysis model to the rows with every model variable present.

    Parameters
    ----------
    data, reasons, not_applicable : as for :func:`complete_case_flow`.
    model : the analysis model.

    Returns
    -------
    CompleteCaseResult with rows for ``estimates.csv`` (strategy ``complete_case``).

    References
    ----------
    Little RJA (1992). Regression with missing X's: a review. JASA 87:1227-1237.
    White IR, Carlin JB (2010). Bias and efficiency of multiple imputation compared with
    complete-case analysis for missing covariate values. Stat Med 29:2920-2931.
    """
    check_model_data(data, model)
    flow = complete_case_flow(data, model=model, reasons=reasons, not_applicable=not_applicable)
    require_rows(flow)
    fit = model.fit(data.loc[flow.complete.to_numpy()])
    terms = tuple(exposure_terms(fit.terms, model.exposure))
    sentence = (f"{fit.nobs:,} of {flow.n_rows:,} rows used (every model variable observed); exposure term(s): "
                f"{', '.join(terms)}.")
    return CompleteCaseResult(flow=flow, model_fit=fit, exposure_terms=terms,
                              sentences=(sentence, *follow_up_sentences(data, model, reasons),
                                         scale_sentence(fit.family), *fit.fit_sentences()))


def follow_up_sentences(data: pd.DataFrame, model: AnalysisModel, reasons: Optional[pd.DataFrame]) -> Tuple[str, ...]:
    """For a time-to-event model, the rows left out for a missing time or event status and why (else nothing).

    Parameters
    ----------
    data : the analysis frame.
    model : the analysis model.
    reasons : the study's missing-reason frame, or None.

    Returns
    -------
    tuple of str
    """
    if not model.is_time_to_event() or model.event is None:
        return ()
    outcome = model.variables(list(data.columns))[0]
    sentence = missing_follow_up(data, time=outcome, event=model.event, reasons=reasons).sentence()
    return (sentence,) if sentence else ()


# ---------------------------------------------------------------------------
# available cases: every value of every variable

def is_categorical(column: pd.Series, declared: Optional[str] = None) -> bool:
    """Whether a column is summarised by counts: its declared type, else the inferred one, is categorical.

    Parameters
    ----------
    column : Series
        The column.
    declared : str, optional
        Its declared type.

    Returns
    -------
    bool
    """
    return (declared or infer_type(column)[0]) in CATEGORICAL_TYPES


def _numeric_summary(values: pd.Series) -> Dict[str, float]:
    values = values.dropna().astype(float)
    if values.empty:
        return {k: np.nan for k in ("mean", "sd", "median", "lower_quartile", "upper_quartile")}
    return {"mean": values.mean(), "sd": values.std(ddof=1), "median": values.median(),
            "lower_quartile": values.quantile(0.25), "upper_quartile": values.quantile(0.75)}


def _category_summary(values: pd.Series, levels: Sequence[object]) -> Dict[str, float]:
    observed = values.dropna()
    total = len(observed)
    counts = observed.astype(object).value_counts()
    out: Dict[str, float] = {}
    for level in levels:
        out[f"count: {level_text(level)}"] = float(counts.get(level, 0))
    for level in levels:
        out[f"proportion: {level_text(level)}"] = counts.get(level, 0) / total if total else np.nan
    return out


def descriptive_table(data: pd.DataFrame, *, complete: pd.Series, types: Optional[Mapping[str, str]] = None,
                      variables: Optional[Sequence[str]] = None) -> pd.DataFrame:
    """Summaries of each variable from every available value, beside the same in the complete cases.

    Continuous and count variables: mean, SD (n - 1), median and quartiles (linear
    interpolation, pandas' default). Categories: counts and proportions of the observed values.

    Parameters
    ----------
    data : the analysis frame.
    complete : boolean Series marking the complete-case rows.
    types : optional {column: type} (``study.types``); undeclared columns go by dtype.
    variables : the columns to describe (default: all).

    Returns
    -------
    DataFrame with columns variable, statistic, available_case, n_available, complete_case, n_complete.
    """
    types = types or {}
    mask = complete.to_numpy(dtype=bool)
    rows: List[Dict[str, object]] = []
    for name in variables or list(data.columns):
        column = data[name]
        subset = column[mask]
        if is_categorical(column, types.get(name)):
            levels = levels_of(column)
            available, in_complete = _category_summary(column, levels), _category_summary(subset, levels)
        else:
            available, in_complete = _numeric_summary(column), _numeric_summary(subset)
        n_available, n_complete = int(column.notna().sum()), int(subset.notna().sum())
        for statistic, value in available.items():
            rows.append({"variable": name, "statistic": statistic, "available_case": value,
                         "n_available": n_available, "complete_case": in_complete[statistic],
                         "n_complete": n_complete})
    return pd.DataFrame(rows, columns=["variable", "statistic", "available_case", "n_available", "complete_case",
                                       "n_complete"])


def numeric_variables(data: pd.DataFrame, types: Optional[Mapping[str, str]] = None) -> List[str]:
    """Columns that carry numbers a correlation can use (continuous, count, and 0/1 numbers)."""
    types = types or {}
    return [c for c in data.columns if pd.api.types.is_numeric_dtype(data[c])
            and not isinstance(data[c].dtype, pd.CategoricalDtype)
            and types.get(c, "continuous") in NUMBER_CODED_TYPES]


def pairwise_correlations(data: pd.DataFrame, *, complete: Optional[pd.Series] = None,
                          variables: Optional[Sequence[str]] = None) -> pd.DataFrame:
    """Pearson correlations from every pair of values observed together, with each pair's n.

    Each correlation uses its own rows, so the matrix need not be positive semi-definite
    and its entries describe different subsets; the complete-case column shows one subset.

    Returns
    -------
    DataFrame: variable_1, variable_2, correlation, n_pairwise, and when ``complete`` is
    given correlation_complete_case, n_complete.

    Parameters
    ----------
    data : DataFrame
        The analysis frame.
    complete : Series of bool, optional
        The complete-case rows, for the comparison columns.
    variables : sequence of str, optional
        The numeric variables; default every numeric column.
    """
    names = list(variables) if variables is not None else list(data.columns)
    values = data[names].astype(float)
    present = values.notna().to_numpy()
    mask = None if complete is None else complete.to_numpy(dtype=bool)
    rows: List[Dict[str, object]] = []
    for i, first in enumerate(names):
        for second in names[i + 1:]:
            both = present[:, i] & present[:, names.index(second)]
            row: Dict[str, object] = {"variable_1": first, "variable_2": second,
                                      "correlation": _pearson(values[first].to_numpy()[both],
                                                              values[second].to_numpy()[both]),
                                      "n_pairwise": int(both.sum())}
            if mask is not None:
                used = both & mask
                row["correlation_complete_case"] = _pearson(values[first].to_numpy()[used],
                                                            values[second].to_numpy()[used])
                row["n_complete"] = int(used.sum())
            rows.append(row)
    columns = ["variable_1", "variable_2", "correlation", "n_pairwise"]
    if mask is not None:
        columns += ["correlation_complete_case", "n_complete"]
    return pd.DataFrame(rows, columns=columns)


def _pearson(x: np.ndarray, y: np.ndarray) -> float:
    if len(x) < 2:
        return float("nan")
    dx, dy = x - x.mean(), y - y.mean()
    denominator = np.sqrt((dx * dx).sum() * (dy * dy).sum())
    return float((dx * dy).sum() / denominator) if denominator > 0 else float("nan")


@dataclass(frozen=True)
class AvailableCaseSummary:
    """Descriptives and pairwise correlations from every available value, beside the complete cases."""

    descriptives: pd.DataFrame
    correlations: pd.DataFrame
    n_rows: int
    n_complete: int
    sentences: Tuple[str, ...] = ()

    def tables(self) -> Dict[str, pd.DataFrame]:
        """``descriptives`` and ``pairwise_correlations``."""
        return {"descriptives": self.descriptives, "pairwise_correlations": self.correlations}


def available_case_summary(data: pd.DataFrame, *, complete: pd.Series,
                           types: Optional[Mapping[str, str]] = None) -> AvailableCaseSummary:
    """Every variable summarised from all its values and from the complete cases.

    Parameters
    ----------
    data : the analysis frame.
    complete : boolean Series marking the complete-case rows.
    types : optional {column: type}; undeclared columns get the inferred type.

    Returns
    -------
    AvailableCaseSummary: :func:`descriptive_table` and :func:`pairwise_correlations`.
    """
    return AvailableCaseSummary(descriptives=descriptive_table(data, complete=complete, types=types),
                                correlations=pairwise_correlations(data, complete=complete,
                                                                   variables=numeric_variables(data, types)),
                                n_rows=len(data), n_complete=int(complete.sum()))


# ---------------------------------------------------------------------------
# complete against incomplete rows

@dataclass(frozen=True)
class CompletenessBaseline:
    """Fully observed variables compared between complete and incomplete rows.

    ``differences``: variable, level, statistic (mean or proportion), complete, complete_sd,
    incomplete, incomplete_sd, smd (complete minus incomplete), n_complete, n_incomplete.
    """

    differences: pd.DataFrame
    n_complete: int
    n_incomplete: int
    variables: Tuple[str, ...]
    sentences: Tuple[str, ...] = ()

    def largest_smd(self) -> float:
        """The largest absolute standardised difference (NaN when none could be computed)."""
        smd = self.differences["smd"].abs()
        return float(smd.max()) if smd.notna().any() else float("nan")

    def tables(self) -> Dict[str, pd.DataFrame]:
        """``completeness_baseline``."""
        return {"completeness_baseline": self.differences}


def completeness_baseline(data: pd.DataFrame, *, complete: pd.Series, types: Optional[Mapping[str, str]] = None,
                          variables: Optional[Sequence[str]] = None) -> CompletenessBaseline:
    """Compare complete with incomplete rows on the fully observed variables, by standardised differences.

    Parameters
    ----------
    data : the analysis frame.
    complete : boolean Series marking the complete-case rows.
    types : optional {column: type}.
    variables : columns to compare (default: every column with no missing or not-applicable cell).

    Returns
    -------
    CompletenessBaseline. Large differences show that the complete cases are a selected
    subset; small ones do not show that missingness is ignorable (MAR cannot be verified
    from the data).

    References
    ----------
    Austin PC (2009). Stat Med 28:3083-3107 (standardised differences for means and proportions).
    """
    types = types or {}
    mask = complete.to_numpy(dtype=bool)
    chosen = list(variables) if variables is not None else [c for c in data.columns if data[c].notna().all()]
    rows: List[Dict[str, object]] = []
    for name in chosen:
        column = data[name]
        a, b = column[mask], column[~mask]
        if is_categorical(column, types.get(name)):
            for level in levels_of(column):
                hit_a = (a.dropna().astype(object) == level)
                hit_b = (b.dropna().astype(object) == level)
                pa = float(hit_a.mean()) if len(hit_a) else np.nan
                pb = float(hit_b.mean()) if len(hit_b) else np.nan
                sa, sb = np.sqrt(pa * (1 - pa)), np.sqrt(pb * (1 - pb))
                rows.append({"variable": name, "level": str(level), "statistic": "proportion", "complete": pa,
                             "complete_sd": sa, "incomplete": pb, "incomplete_sd": sb,
                             "smd": standardised_difference(pa, sa ** 2, pb, sb ** 2),
                             "n_complete": int(len(hit_a)), "n_incomplete": int(len(hit_b))})
        else:
            xa, xb = a.dropna().astype(float), b.dropna().astype(float)
            ma, mb = (xa.mean() if len(xa) else np.nan), (xb.mean() if len(xb) else np.nan)
            sa = xa.std(ddof=1) if len(xa) > 1 else np.nan
            sb = xb.std(ddof=1) if len(xb) > 1 else np.nan
            rows.append({"variable": name, "level": "", "statistic": "mean", "complete": ma, "complete_sd": sa,
                         "incomplete": mb, "incomplete_sd": sb,
                         "smd": standardised_difference(ma, sa ** 2, mb, sb ** 2),
                         "n_complete": int(len(xa)), "n_incomplete": int(len(xb))})
    table = pd.DataFrame(rows, columns=["variable", "level", "statistic", "complete", "complete_sd", "incomplete",
                                        "incomplete_sd", "smd", "n_complete", "n_incomplete"])
    smd = table["smd"].abs()
    largest = float(smd.max()) if smd.notna().any() else float("nan")
    sentence = (f"{int(mask.sum()):,} complete and {int((~mask).sum()):,} incomplete rows; largest absolute "
                f"standardised difference {largest:.2f}.")
    return CompletenessBaseline(differences=table, n_complete=int(mask.sum()), n_incomplete=int((~mask).sum()),
                                variables=tuple(chosen), sentences=(sentence,))


# ---------------------------------------------------------------------------
# every strategy side by side

@dataclass(frozen=True)
class StrategyComparison:
    """The exposure's estimate under every strategy in ``estimates.csv``.

    ``comparison``: strategy, label, term, estimate, std_error, ci_lower, ci_upper (the model's
    scale: log odds or log rate ratio for binomial and poisson models), exp_estimate,
    exp_ci_lower, exp_ci_upper (the odds or rate ratio; empty for gaussian),
    se_relative_to_complete_case (the precision each strategy gains or loses) and n_used.
    ``ratio_name`` is the family's ratio stem (``odds_ratio``), None for a difference.
    """

    comparison: pd.DataFrame
    family: str
    terms: Tuple[str, ...]
    ratio_name: Optional[str]
    alpha: float = 0.05
    sentences: Tuple[str, ...] = ()

    def tables(self) -> Dict[str, pd.DataFrame]:
        """``strategy_comparison``."""
        return {"strategy_comparison": self.comparison}


def compare_strategies(estimates: pd.DataFrame, *, exposure: Union[str, Sequence[str], None], family: str,
                       alpha: float = 0.05) -> StrategyComparison:
    """Gather the exposure term(s) of every strategy, on the ratio scale too for binomial and poisson models.

    Parameters
    ----------
    estimates : the ``estimates.csv`` table (strategy, term, estimate, std_error, ci_lower, ci_upper, n_used).
    exposure : the exposure term names, or the params' exposure (a variable or a term name).
    family : gaussian, binomial or poisson.
    alpha : the level of the intervals in ``estimates`` (for the plot's axis label only).

    Returns
    -------
    StrategyComparison.
    """
    if estimates is None or len(estimates) == 0:
        raise InputError("estimates.csv: no estimates yet; run the cases, indicator or impute stage first")
    all_terms = list(dict.fromkeys(estimates["term"]))
    if exposure is None or isinstance(exposure, str):
        terms = exposure_terms(all_terms, exposure)
    else:
        terms = [t for t in exposure if t in all_terms]
        if not terms:
            raise InputError(f"none of {', '.join(exposure)} is a term in estimates.csv", option="exposure")
    chosen = estimates[estimates["term"].isin(terms)].copy()
    chosen["_term_order"] = chosen["term"].map({t: i for i, t in enumerate(terms)})
    strategies = list(dict.fromkeys(estimates["strategy"]))
    chosen["_strategy_order"] = chosen["strategy"].map({s: i for i, s in enumerate(strategies)})
    chosen = chosen.sort_values(["_term_order", "_strategy_order"], kind="stable")
    table = chosen[["strategy", "term", "estimate", "std_error", "ci_lower", "ci_upper", "n_used"]].copy()
    table.insert(1, "label", table["strategy"].map(lambda s: STRATEGY_TITLES.get(s, s.replace("_", " "))))
    table = add_ratio_columns(table, family)
    reference = table[table["strategy"] == "complete_case"].set_index("term")["std_error"]
    table["se_relative_to_complete_case"] = table["std_error"] / table["term"].map(reference)
    ordered = [c for c in table.columns if c != "n_used"] + ["n_used"]
    table = table[ordered].reset_index(drop=True)
    return StrategyComparison(comparison=table, family=family, terms=tuple(terms), ratio_name=ratio_name(family),
                              alpha=alpha)
