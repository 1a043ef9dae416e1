"""The missing-category strategy: keep rows by giving missing covariate values a value of their own.

Categorical covariates with missing values get an explicit level, ``"(missing)"``, added
after the observed levels (so the reference level is unchanged and the term reads
``C(clinic)[T.(missing)]``). Continuous covariates can use the missing-indicator method:
missing values are replaced by a constant (the observed mean) and a 0/1 column
``<variable>_missing`` enters the model. With the indicator in the model the choice of
constant changes only the indicator's coefficient and the intercept, never the other
coefficients, so the observed mean is a convenience, not an assumption.

The indicator method is biased even when values are missing completely at random in
observational data, because the rows lacking a confounder are left unadjusted for it
(Knol et al. 2010; Groenwold et al. 2012). It is acceptable for baseline covariates in
randomised trials, where the covariates are independent of the randomised arm (White &
Thompson 2005). It is therefore off unless asked for.

Missing outcomes never get a category: those rows are dropped and counted. Neither does
the exposure: a contrast with "missing exposure" is not an effect of the exposure.
"Not applicable" cells are not missing and are left as they are (their rows are dropped
by the fit and counted in the flow table).
"""
from __future__ import annotations

import dataclasses
from dataclasses import dataclass
from typing import Dict, List, Mapping, Optional, Sequence, Tuple, Union

import numpy as np
import pandas as pd

from .cases import (CompleteCaseFlow, check_model_data, complete_case_flow, exposure_column, follow_up_sentences,
                    is_categorical, require_rows)
from .errors import InputError
from .expressions import ColumnAliases, parse_formula
from .intake import levels_of
from .models import AnalysisModel, ModelFit, exposure_rows, exposure_terms, scale_sentence
from .text import counted

__all__ = ["MISSING_LEVEL", "INDICATOR_WARNING", "prepare_missing_category", "MissingCategoryResult",
           "missing_category_analysis"]

MISSING_LEVEL = "(missing)"
INDICATOR_SUFFIX = "_missing"

INDICATOR_WARNING = (
    "The missing-indicator method for continuous covariates is biased, even when values are missing "
    "completely at random, whenever the covariate is a confounder in observational data: the rows lacking "
    "it are left unadjusted (Knol et al. 2010, J Clin Epidemiol 63:728-736; Groenwold et al. 2012, CMAJ "
    "184:1265-1269). It is acceptable for baseline covariates in a randomised trial, where they are "
    "independent of the randomised arm (White & Thompson 2005, Stat Med 24:993-1007). Use it for an "
    "observational study only as a comparison, not as the main analysis."
)

HANDLING_COLUMNS = ("variable", "role", "type", "n_missing", "n_not_applicable", "handling", "indicator", "constant")


@dataclass(frozen=True)
class MissingCategoryData:
    """The analysis frame with missing covariate values recoded, and the formula that goes with it.

    ``handling`` says, per model variable: role, type, n_missing, n_not_applicable, what was
    done (handling), the indicator column (if any) and the constant put in place of missing values.
    ``indicators`` are the indicators' names as tables show them (``bmi_missing``); in
    ``data`` and ``formula`` they go by internal aliases (``aliases``), so the formula gapbook
    adds to never contains text from the data file. :meth:`display_terms` maps fitted term
    names back.
    """

    data: pd.DataFrame
    formula: str
    handling: pd.DataFrame
    indicators: Tuple[str, ...]
    label: str
    aliases: ColumnAliases = ColumnAliases((), ())

    def indicator_columns(self) -> Tuple[str, ...]:
        """The indicators' columns in ``data`` (their aliases)."""
        return self.aliases.aliases

    def display_terms(self, terms: Sequence[str]) -> Tuple[str, ...]:
        return tuple(self.aliases.display(term) for term in terms)


def _indicator_name(variable: str, taken: List[str]) -> str:
    name = f"{variable}{INDICATOR_SUFFIX}"
    while name in taken:
        name += "_"
    return name


def _wrapped_in_c(formula: str, column: str) -> bool:
    """Whether the formula uses the column as ``C(column ...)`` (categorical coding of a numeric column)."""
    return column in parse_formula(formula).coded


def _with_level(column: pd.Series, missing: np.ndarray, label: str, name: str) -> pd.Series:
    """The column as a Categorical with ``label`` appended after the observed levels, at the missing cells."""
    levels = list(levels_of(column))
    ordered = False  # an ordered scale has no place for "missing"; the formula codes it as nominal anyway
    if label in [str(level) for level in levels]:
        raise InputError(f"column '{name}' already has a level '{label}'; rename that level so "
                         "the missing category can be told apart")
    values = pd.Series(pd.Categorical(column.astype(object).where(column.notna(), None),
                                      categories=levels + [label], ordered=ordered), index=column.index, name=name)
    values[missing] = label
    return values


def prepare_missing_category(data: pd.DataFrame, *, model: AnalysisModel, types: Optional[Mapping[str, str]] = None,
                             missing: Optional[pd.DataFrame] = None,
                             indicator_for_continuous: bool = False, label: str = MISSING_LEVEL,
                             constant: Union[str, float] = "mean") -> MissingCategoryData:
    """Recode missing covariate values as a category (categorical) or constant plus indicator (continuous).

    Parameters
    ----------
    data : the analysis frame, NaN where missing or not applicable.
    model : the analysis model.
    types : optional {column: type}; undeclared columns go by dtype.
    missing : optional boolean frame of missing cells (``study.missing``); NaN cells not
        marked there (not applicable) are left alone. Default: every NaN is missing.
    indicator_for_continuous : use the missing-indicator method for continuous and count
        covariates (default False: their incomplete rows are dropped).
    label : the level given to missing categorical values.
    constant : "mean" (the observed mean) or a number put in place of missing continuous values.

    Returns
    -------
    MissingCategoryData.

    References
    ----------
    Knol MJ et al. (2010). Unpredictable bias when using the missing indicator method or
    complete case analysis for missing confounder values. J Clin Epidemiol 63:728-736.
    Groenwold RHH et al. (2012). Missing covariate data in clinical research: when and when
    not to use the missing-indicator method for analysis. CMAJ 184:1265-1269.
    White IR, Thompson SG (2005). Adjusting for partially missing baseline measurements in
    randomized trials. Stat Med 24:993-1007.
    """
    types = types or {}
    outcome, covariates = model.variables(list(data.columns))
    exposure = exposure_column(model, list(data.columns))
    is_missing = data.isna() if missing is None else missing.reindex(columns=data.columns, fill_value=False)
    frame = data.copy()
    formula = model.formula
    indicators: List[str] = []
    indicator_values: List[np.ndarray] = []
    rows: List[Dict[str, object]] = []
    for name in [outcome] + covariates:
        cells = is_missing[name].to_numpy(dtype=bool) & data[name].isna().to_numpy()
        n_na = int((data[name].isna().to_numpy() & ~cells).sum())
        role = ("outcome" if name == outcome else "offset" if name == model.offset
                else "event" if model.event is not None and name == model.event.column
                else "exposure" if name == exposure else "covariate")
        categorical = is_categorical(data[name], types.get(name))
        kind = types.get(name) or ("categorical" if categorical else "continuous")
        row: Dict[str, object] = {"variable": name, "role": role, "type": kind, "n_missing": int(cells.sum()),
                                  "n_not_applicable": n_na, "indicator": "", "constant": np.nan}
        if not cells.any():
            row["handling"] = "complete: nothing to do"
        elif role in ("outcome", "exposure", "offset", "event"):
            row["handling"] = f"rows dropped: a missing {role} is never given a category"
        elif categorical and (isinstance(data[name].dtype, pd.CategoricalDtype)
                              or not pd.api.types.is_numeric_dtype(data[name]) or _wrapped_in_c(formula, name)):
            frame[name] = _with_level(data[name], cells, label, name)
            row["handling"] = f"missing category '{label}'"
        elif categorical:
            # A 0/1 (or numeric-coded) column entered as a number: the reference value plus an
            # indicator gives the same fit as a separate "missing" level, and keeps the term name.
            reference = float(np.nanmin(data[name].to_numpy(dtype=float)))
            indicator = _indicator_name(name, list(frame.columns) + indicators)
            frame[name] = data[name].where(~cells, reference)
            indicators.append(indicator)
            indicator_values.append(cells.astype(float))
            row.update(handling=f"missing category (as reference value {reference:g} plus indicator)",
                       indicator=indicator, constant=reference)
        elif indicator_for_continuous:
            observed = data[name].to_numpy(dtype=float)
            value = float(np.nanmean(observed)) if constant == "mean" else float(constant)
            indicator = _indicator_name(name, list(frame.columns) + indicators)
            frame[name] = data[name].where(~cells, value)
            indicators.append(indicator)
            indicator_values.append(cells.astype(float))
            row.update(handling="missing indicator (constant in place of missing values)", indicator=indicator,
                       constant=value)
        else:
            row["handling"] = "rows dropped: missing-indicator method not requested for a continuous covariate"
        rows.append(row)
    handling = pd.DataFrame(rows, columns=list(HANDLING_COLUMNS))
    # The indicators enter the data and the formula under internal aliases, never under a name
    # made from a data file's column name.
    aliases = ColumnAliases.for_columns(indicators, taken=list(frame.columns), prefix="gapbook_indicator_")
    for alias, values in zip(aliases.aliases, indicator_values):
        frame[alias] = values
        formula += f" + {alias}"
    return MissingCategoryData(data=frame, formula=formula, handling=handling, indicators=tuple(indicators),
                               label=label, aliases=aliases)


def _dropped_words(steps: pd.DataFrame) -> str:
    """' (4 rows dropped: 4 without the exposure age).' from the flow table; '.' when none was dropped.

    It said '(0 rows without the outcome were dropped)' when the rows lost lacked the exposure.
    """
    lost = steps[steps["step"] == "excluded"]
    lost = lost[pd.to_numeric(lost["n_excluded"], errors="coerce").fillna(0) > 0]
    if lost.empty:
        return " (no row dropped)."
    parts = [f"{int(row.n_excluded):,} without the {row.role} {row.variable}" for row in lost.itertuples()]
    total = int(lost["n_excluded"].astype(float).sum())
    return f" ({counted(total, 'row')} dropped: {', '.join(parts)})."


@dataclass(frozen=True)
class MissingCategoryResult:
    """The model fitted with missing categories/indicators: the recoded data, flow, fit and exposure terms."""

    prepared: MissingCategoryData
    flow: CompleteCaseFlow
    model_fit: ModelFit
    exposure_terms: Tuple[str, ...]
    sentences: Tuple[str, ...] = ()
    strategy: str = "missing_category"

    def n_outcome_missing(self) -> int:
        """Rows dropped because the outcome is missing (it never gets a category)."""
        row = self.prepared.handling[self.prepared.handling["role"] == "outcome"]
        return int(row["n_missing"].iloc[0]) if len(row) else 0

    def estimates(self) -> pd.DataFrame:
        """Rows for ``estimates.csv`` (strategy ``missing_category``), the extra terms included."""
        return self.model_fit.estimates(self.strategy)

    def exposure_estimates(self) -> pd.DataFrame:
        """The rows of :meth:`estimates` for the exposure terms."""
        return exposure_rows(self.estimates(), self.exposure_terms)

    def tables(self) -> Dict[str, pd.DataFrame]:
        """``missing_category_handling``, ``flow_missing_category`` and this strategy's ``estimates`` rows."""
        return {"missing_category_handling": self.prepared.handling, "flow_missing_category": self.flow.steps,
                "estimates": self.estimates()}


def missing_category_analysis(data: pd.DataFrame, *, model: AnalysisModel, types: Optional[Mapping[str, str]] = None,
                              missing: Optional[pd.DataFrame] = None, reasons: Optional[pd.DataFrame] = None,
                              not_applicable: Optional[pd.DataFrame] = None,
                              indicator_for_continuous: bool = False, label: str = MISSING_LEVEL,
                              constant: Union[str, float] = "mean") -> MissingCategoryResult:
    """Fit the analysis model after :func:`prepare_missing_category`; rows for ``estimates.csv``.

    Parameters
    ----------
    data, model, types, missing, indicator_for_continuous, label, constant :
        as for :func:`prepare_missing_category`.
    reasons : optional frame of reason labels (``study.reasons``) for the flow table of the
        rows still dropped (missing outcome or exposure, continuous covariates without the
        indicator).
    not_applicable : optional boolean frame (``study.not_applicable``); those cells are not
        missing and are left alone.

    Returns
    -------
    MissingCategoryResult with strategy ``missing_category``; the extra terms (e.g.
    ``C(clinic)[T.(missing)]``, ``bmi_missing``) are reported with the others.

    References
    ----------
    Knol MJ et al. (2010). J Clin Epidemiol 63:728-736. Groenwold RHH et al. (2012). CMAJ
    184:1265-1269. White IR, Thompson SG (2005). Stat Med 24:993-1007.
    """
    check_model_data(data, model)
    if missing is None and not_applicable is not None:
        missing = data.isna() & ~not_applicable.reindex(columns=data.columns, fill_value=False)
    prepared = prepare_missing_category(data, model=model, types=types, missing=missing,
                                        indicator_for_continuous=indicator_for_continuous, label=label,
                                        constant=constant)
    recoded = dataclasses.replace(model, formula=prepared.formula)
    flow = complete_case_flow(prepared.data, model=recoded, reasons=reasons, not_applicable=not_applicable)
    # The indicator columns are never missing; listing them in the flow would only add noise.
    flow = dataclasses.replace(flow, steps=flow.steps[~flow.steps["variable"].isin(prepared.indicator_columns())]
                               .reset_index(drop=True))
    require_rows(flow)
    fit = recoded.fit(prepared.data.loc[flow.complete.to_numpy()])
    fit = dataclasses.replace(fit, terms=prepared.display_terms(fit.terms),
                              dropped=tuple((prepared.aliases.display(term), why) for term, why in fit.dropped),
                              unbounded=tuple((prepared.aliases.display(term), why) for term, why in fit.unbounded))
    terms = tuple(exposure_terms(fit.terms, model.exposure))
    written = model.formula + "".join(f" + {name}" for name in prepared.indicators)  # as a reader writes it
    follow_up = follow_up_sentences(data, model, reasons)  # a time-to-event model: time or status missing, and why
    sentences = (f"Model fitted: {written}.",
                 f"{fit.nobs:,} of {flow.n_rows:,} rows used" + ("." if follow_up else _dropped_words(flow.steps)),
                 *follow_up, scale_sentence(fit.family), *fit.fit_sentences())
    return MissingCategoryResult(prepared=prepared, flow=flow, model_fit=fit, exposure_terms=terms,
                                 sentences=sentences)
