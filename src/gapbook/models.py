"""The study's analysis model, fitted one way for every strategy.

Complete cases, the missing category and each imputed dataset all go through
:func:`fit_model`, so their terms, standard errors and intervals are computed alike and
their rows in ``estimates.csv`` line up. The term names are the ones statsmodels gives
for the params formula, so our tables join with a plain statsmodels fit.
"""
from __future__ import annotations

import re
import warnings
from dataclasses import dataclass
from typing import Any, Callable, Dict, List, Optional, Sequence, Tuple

import numpy as np
import pandas as pd
import statsmodels.api as sm
import statsmodels.formula.api as smf

from .errors import AnalysisError, InputError, did_you_mean
from .expressions import FORMULA_NAMESPACE, ExpressionError, formula_environment, parse_formula
from .inference import wald_inference
from .text import first_upper, one_line
from .separation import UNBOUNDED_ADVICE, separated_logistic_terms, unbounded_causes
from .survival import EventCoding, check_follow_up, cox_model, finite_fit, fit_cox_model, unbounded_cox_terms
from .vocabulary import FAMILY_NAMES, TIME_TO_EVENT_FAMILIES, effect_scale, has_ratio_scale

__all__ = ["ModelFit", "add_ratio_columns", "formula_columns", "check_formula", "fit_model", "exposure_terms",
           "exposure_rows", "AnalysisModel", "UnboundedWords", "unbounded_words"]


@dataclass(frozen=True)
class ModelFit:
    """Coefficients, covariance and inference of one fitted analysis model.

    ``df_resid`` is the residual degrees of freedom used for t-based inference (OLS), or
    None when inference is by the normal distribution (GLMs). ``dropped`` lists the design
    columns left out before fitting, each with why (constant among the analysed rows, or a
    linear combination of the columns before it), so no term is reported as estimate 0, SE 0.
    ``converged`` is False when the fit did not converge (iterative fits) or the data are
    perfectly separated; ``warnings`` holds the fitting library's warnings about this fit.
    ``unbounded`` lists the terms along which the likelihood has no maximum, each with why: for
    a Cox model a monotone partial likelihood, for a logistic model complete or quasi-complete
    separation (:mod:`gapbook.separation`); such a fit is never ``converged``.
    """

    formula: str
    family: str
    terms: Tuple[str, ...]
    coefficients: np.ndarray
    covariance: np.ndarray
    df_resid: Optional[float]
    nobs: int
    robust: bool
    alpha: float = 0.05
    converged: bool = True
    warnings: Tuple[str, ...] = ()
    dropped: Tuple[Tuple[str, str], ...] = ()
    unbounded: Tuple[Tuple[str, str], ...] = ()

    def std_errors(self) -> np.ndarray:
        """Standard errors: square roots of the covariance's diagonal."""
        return np.sqrt(np.diag(self.covariance))

    def complete_data_df(self) -> float:
        """The complete-data degrees of freedom n - p (rows used minus estimated coefficients).

        For OLS this is the residual df of the t reference. For a GLM there is no exact
        small-sample reference; n - p is used as its complete-data df in multiple-imputation
        pooling (common practice, no source).
        """
        return float(self.nobs - len(self.terms))

    def dropped_terms(self) -> Tuple[str, ...]:
        """The names of the design columns left out before fitting."""
        return tuple(term for term, _ in self.dropped)

    def estimates(self, strategy: str) -> pd.DataFrame:
        """Rows for ``estimates.csv``: one per term, with CI at level 1 - alpha and p-value."""
        se = self.std_errors()
        lower, upper, p = wald_inference(self.coefficients, se, self.df_resid, self.alpha)
        frame = pd.DataFrame({
            "strategy": strategy, "term": list(self.terms), "estimate": self.coefficients, "std_error": se,
            "ci_lower": lower, "ci_upper": upper, "p_value": p,
            "n_used": self.nobs,
        })
        return add_ratio_columns(frame, self.family).assign(converged=bool(self.converged))

    def fit_sentences(self) -> Tuple[str, ...]:
        """What a reader must know about this fit: terms left out and non-convergence (empty when neither)."""
        out: List[str] = []
        if self.dropped:
            out.append(dropped_sentence(self.dropped, self.nobs))
        if self.unbounded:
            words = unbounded_words(self.family)
            out.append(f"The model cannot be estimated as it stands: its {words.likelihood} keeps rising as a "
                       f"coefficient runs off ({words.cause}; {words.source}): "
                       f"{unbounded_causes(self.unbounded)}. Its estimates and standard errors are not reliable. "
                       f"{first_upper(UNBOUNDED_ADVICE)}; {words.penalised} is an alternative gapbook does not fit.")
        elif not self.converged:
            named = [w for w in self.warnings if w.split(":")[0] in NOT_CONVERGED_WARNINGS] or list(self.warnings)
            detail = f" ({'; '.join(named)})" if named else ""
            out.append(f"The model fit did not converge{detail}: its estimates and standard errors are not "
                       "reliable; simplify the model or check for a covariate that separates the outcome.")
        return tuple(out)


@dataclass(frozen=True)
class UnboundedWords:
    """How a page and check name a likelihood without a maximum for one family."""

    model: str
    likelihood: str
    cause: str
    source: str
    penalised: str


def unbounded_words(family: str) -> UnboundedWords:
    """The words for a coefficient that runs off: Cox (monotone likelihood) or logistic (separation).

    Parameters
    ----------
    family : str
        ``cox`` or ``binomial``.

    Returns
    -------
    UnboundedWords
    """
    if family == "binomial":
        return UnboundedWords(model="logistic", likelihood="likelihood",
                              cause="complete or quasi-complete separation", source="Albert & Anderson 1984",
                              penalised="a penalised (Firth) logistic model (Firth 1993; Heinze & Schemper 2002)")
    return UnboundedWords(model="Cox", likelihood="partial likelihood", cause="monotone likelihood",
                          source="Bryson & Johnson 1981",
                          penalised="a penalised (Firth) Cox model (Heinze & Schemper 2001)")


def dropped_sentence(dropped: Sequence[Tuple[str, str]], nobs: int) -> str:
    """'Left out before fitting: C(site)[T.(missing)] (constant among the 412 analysed rows).'"""
    parts = [f"{term} ({reason.replace('{n}', f'{nobs:,}')})" for term, reason in dropped]
    return ("Left out before fitting, because the data cannot estimate them (they are not reported as "
            "estimate 0): " + "; ".join(parts) + ".")


def scale_sentence(family: str) -> str:
    """Which scale the estimates are on, for the sentences under a table of estimates."""
    if has_ratio_scale(family):
        return (f"Estimates and intervals are on the model's scale ({effect_scale(family, exponentiated=False)}); "
                f"exp_estimate, exp_ci_lower and exp_ci_upper give the {effect_scale(family, exponentiated=True)}.")
    return "Estimates and intervals are differences in the outcome's own units (the model's coefficients)."


EXP_COLUMNS = ("exp_estimate", "exp_ci_lower", "exp_ci_upper")


def add_ratio_columns(frame: pd.DataFrame, family: str) -> pd.DataFrame:
    """``exp_estimate``, ``exp_ci_lower``, ``exp_ci_upper``: the estimate and CI on the ratio scale (odds,
    rate or hazard ratio) for a family with one (:func:`gapbook.vocabulary.has_ratio_scale`), empty otherwise.

    The log-scale columns stay as they are (they join with statsmodels); the ratio is the
    exponential of the estimate and of each interval end, never an average of ratios.

    Parameters
    ----------
    frame : DataFrame
        ``estimates.csv`` rows (estimate, ci_lower, ci_upper).
    family : str
        The model family.

    Returns
    -------
    DataFrame
        ``frame`` with ``<ratio>``, ``<ratio>_ci_lower``, ``<ratio>_ci_upper`` added for
        binomial and poisson models, unchanged otherwise.
    """
    if has_ratio_scale(family):
        with np.errstate(over="ignore"):  # a diverged fit's ratio is inf, and says so in ``converged``
            values = {name: np.exp(frame[source].to_numpy(dtype=float))
                      for name, source in zip(EXP_COLUMNS, ("estimate", "ci_lower", "ci_upper"))}
    else:
        values = {name: np.full(len(frame), np.nan) for name in EXP_COLUMNS}
    return frame.assign(**values)


def formula_columns(formula: str, columns: Sequence[str]) -> List[str]:
    """The columns named in a piece of formula text (e.g. a term name ``arm[T.sms]``), in order of appearance.

    A text search only (nothing is parsed or evaluated); the analysis formula itself is
    checked by :func:`check_formula`.

    Parameters
    ----------
    formula : str
        Formula text or a term name.
    columns : sequence of str
        The data's columns.

    Returns
    -------
    list of str
    """
    found: List[Tuple[int, str]] = []
    for column in columns:
        quoted = re.search(r"Q\(\s*['\"]" + re.escape(column) + r"['\"]\s*\)", formula)
        plain = re.search(rf"(?<![\w.'\"]){re.escape(column)}(?![\w'\"])", formula)
        hits = [m.start() for m in (quoted, plain) if m is not None]
        if hits:
            found.append((min(hits), column))
    return [c for _, c in sorted(found)]


def check_formula(formula: str, columns: Sequence[str], *, option: str = "formula") -> Tuple[str, List[str]]:
    """The outcome and the right-hand-side columns of a formula, checked against the data's columns.

    The check is :func:`gapbook.expressions.parse_formula`: the formula is split by patsy's
    parser and every term checked against the expression language's allow-list before any
    of it is evaluated.

    Parameters
    ----------
    formula : a statsmodels formula, e.g. ``"y ~ arm + age + C(site)"``.
    columns : the data's column names.
    option : the option name errors give (exit 2), e.g. ``formula``.

    Returns
    -------
    (outcome, used) : the outcome column and the right-hand-side columns in formula order.
    """
    try:
        parsed = parse_formula(formula, where="", columns=list(columns))
    except ExpressionError as exc:
        raise InputError(exc.detail, option=option) from None
    return parsed.outcome, list(parsed.columns)


def _outcome_as_number(data: pd.DataFrame, outcome: str, family: str) -> pd.DataFrame:
    """A binary text outcome becomes 0/1 with the second declared level as the event."""
    column = data[outcome]
    if family == "binomial" and not pd.api.types.is_numeric_dtype(column):
        levels = list(column.cat.categories) if isinstance(column.dtype, pd.CategoricalDtype) \
            else sorted(column.dropna().unique())
        if len(levels) != 2:
            raise InputError(f"the binomial outcome '{outcome}' has {len(levels)} levels; "
                             "it needs exactly two", option="formula")
        data = data.copy()
        data[outcome] = column.map({levels[0]: 0.0, levels[1]: 1.0}).astype(float)
        return data
    values = column.dropna().to_numpy(dtype=float) if pd.api.types.is_numeric_dtype(column) else None
    if family == "binomial" and values is not None and not np.isin(values, (0.0, 1.0)).all():
        raise InputError(f"binomial needs a 0/1 or two-level outcome, but '{outcome}' holds "
                         f"other values (e.g. {values[~np.isin(values, (0.0, 1.0))][0]:g}); choose gaussian or "
                         "recode the outcome", option="family")
    if family == "poisson" and values is not None and (values < 0).any():
        raise InputError(f"poisson needs counts, but '{outcome}' holds negative values; "
                         "choose gaussian or check the outcome", option="family")
    return data


def check_family(family: str) -> None:
    """Exit 2 (option ``family``) unless ``family`` is one of the vocabulary's families."""
    if family not in FAMILY_NAMES:
        raise InputError(f"'{family}' is not one of {', '.join(FAMILY_NAMES)}{did_you_mean(family, FAMILY_NAMES)}",
                         option="family")


def _as_written(value: Any) -> Any:
    """A whole float (2.0) as the integer it was written as (2); anything else unchanged."""
    if isinstance(value, (float, np.floating)) and np.isfinite(value) and float(value).is_integer():
        return int(value)
    return value


def values_as_written(data: pd.DataFrame, formula: str) -> pd.DataFrame:
    """Integer-valued category codes back as integers, so terms read ``C(stage)[T.2]`` as statsmodels
    names them on the raw file, not ``C(stage)[T.2.0]``.

    Intake keeps every number as float64 (NaN for missing). A column the formula codes with
    ``C()`` whose values are whole numbers, and a categorical column whose categories are
    whole numbers, get integer values again (missing cells stay missing).
    """
    coded = set(parse_formula(formula, where="", columns=list(data.columns)).coded)
    changed: Dict[str, pd.Series] = {}
    for name in data.columns:
        column = data[name]
        if isinstance(column.dtype, pd.CategoricalDtype):
            categories = list(column.cat.categories)
            written = [_as_written(c) for c in categories]
            if any(type(a) is not type(b) for a, b in zip(categories, written)) and len(set(written)) == len(written):
                changed[name] = column.cat.rename_categories(written)
        elif name in coded and pd.api.types.is_float_dtype(column.dtype):
            values = column.to_numpy(dtype=float)
            present = ~np.isnan(values)
            if present.any() and np.all(np.mod(values[present], 1) == 0):
                as_int = np.empty(len(values), dtype=object)
                as_int[present] = values[present].astype(np.int64).tolist()
                as_int[~present] = None
                changed[name] = pd.Series(as_int, index=column.index, name=name)
    return data.assign(**changed) if changed else data


def identifiable_columns(design: np.ndarray, names: Sequence[str], *, tolerance: float = 1e-9
                         ) -> Tuple[List[int], List[Tuple[str, str]]]:
    """The design columns the data can estimate, and the others with why they cannot be.

    Columns are taken in order; one is left out when it adds nothing to the span of those
    kept before it (relative singular-value tolerance ``tolerance``): a constant column after
    the intercept ("constant among the {n} analysed rows"), or a linear combination of earlier
    columns ("aliased: a linear combination of the terms before it"). Statsmodels would
    otherwise report such a column with a pseudo-inverse's arbitrary estimate 0 and SE 0.

    Returns
    -------
    (kept, dropped) : positions of the kept columns; (name, reason) of each left out, where
    ``{n}`` in the reason stands for the number of analysed rows.
    """
    design = np.asarray(design, dtype=float)
    if design.shape[1] == 0:
        return [], []
    scale = np.sqrt((design ** 2).sum(axis=0))
    scaled = design / np.where(scale > 0, scale, 1.0)
    if np.linalg.matrix_rank(scaled, tol=tolerance * max(scaled.shape)) == design.shape[1] and np.all(scale > 0):
        return list(range(design.shape[1])), []
    kept: List[int] = []
    dropped: List[Tuple[str, str]] = []
    for j in range(design.shape[1]):
        trial = scaled[:, kept + [j]]
        if scale[j] > 0 and np.linalg.matrix_rank(trial, tol=tolerance * max(trial.shape)) == len(kept) + 1:
            kept.append(j)
            continue
        column = design[:, j]
        constant = bool(np.all(column == column[0])) if len(column) else True
        dropped.append((str(names[j]), "constant among the {n} analysed rows" if constant
                        else "aliased: a linear combination of the terms before it"))
    return kept, dropped


# The most a design column's squares may sum to. A fit's sums of squares and cross-products overflow a
# double above about 1.8e308 (IEEE 754); a column past this (np.exp(age) with an age of 800, age ** 60)
# was left out as "aliased" or stopped the stage with "exog contains inf or nans" after check passed.
# The margin of 1e8 leaves room for the fit's own products (derived bound, no source).
MAX_DESIGN_SQUARES = 1e300


def refuse_overflowing_design(matrix: Any, names: Sequence[str], where: Callable[[int], str]) -> None:
    """Stop (option ``formula``) on a design or outcome column whose values a fit cannot square and sum.

    The variables themselves are bounded at intake (:data:`gapbook.intake.MAX_MAGNITUDE`); a
    formula's terms (``np.exp(x)``, ``I(x ** 9)``) can still reach infinity or values whose squares
    overflow. The error names the term, the value and the row that holds it. The follow-up
    stage's mixed model checks its design on the visit grid with it too.

    Parameters
    ----------
    matrix : array-like
        The design (or outcome) matrix, one row per analysed row.
    names : sequence of str
        The column names (statsmodels' term names).
    where : callable
        Gives the words for the row at a 0-based position of ``matrix`` (``data row 4``,
        ``subject P3, visit 2``).

    Returns
    -------
    None
    """
    values = np.asarray(matrix, dtype=float)
    values = values.reshape(values.shape[0], -1)
    if values.size == 0:
        return
    limit = np.sqrt(MAX_DESIGN_SQUARES / values.shape[0])
    with np.errstate(invalid="ignore"):
        beyond = ~(np.abs(values) <= limit)
    if not beyond.any():
        return
    row, j = min(zip(*np.nonzero(beyond)))
    raise InputError(f"the term {names[j]} is {values[row, j]:g} at {where(int(row))}, too large to square and sum "
                     f"over the "
                     f"{values.shape[0]:,} analysed rows in double precision; rescale the variable (e.g. other "
                     "units) or write the term differently", option="formula")


def _data_rows(labels: Optional[Sequence[Any]]) -> Callable[[int], str]:
    """Words for a fitted row: 'data row 4' (intake's rows are numbered from 0, shown from 1)."""
    def where(row: int) -> str:
        label = row if labels is None else labels[row]
        return f"data row {int(label) + 1}" if isinstance(label, (int, np.integer)) else f"row {one_line(label, 40)}"
    return where


def _refuse_overflowing_model(model: Any) -> None:
    """:func:`refuse_overflowing_design` on a statsmodels model's outcome and design."""
    where = _data_rows(None if model.data.row_labels is None else list(model.data.row_labels))
    refuse_overflowing_design(model.endog, [model.endog_names], where)
    refuse_overflowing_design(model.exog, model.exog_names, where)


def _refuse_infinite_terms(data: pd.DataFrame, formula: str) -> None:
    """After statsmodels refused a design with infinite values: the term and row that hold one."""
    import patsy

    with warnings.catch_warnings(), np.errstate(all="ignore"):  # numpy's overflow warning is what is explained
        warnings.simplefilter("ignore", RuntimeWarning)
        outcome, design = patsy.dmatrices(formula, data, eval_env=formula_environment(), return_type="dataframe")
    refuse_overflowing_design(outcome.to_numpy(), list(outcome.columns), _data_rows(list(outcome.index)))
    refuse_overflowing_design(design.to_numpy(), list(design.columns), _data_rows(list(design.index)))


# statsmodels' warnings that say a fit did not converge or its estimates do not exist
NOT_CONVERGED_WARNINGS = ("ConvergenceWarning", "PerfectSeparationWarning", "IterationLimitWarning")


def _fit_warnings(caught: Sequence[warnings.WarningMessage]) -> Tuple[Tuple[str, ...], bool]:
    """The fitting library's warnings about this fit (distinct, in order) and whether any says 'not converged'.

    Warnings about library versions (FutureWarning, DeprecationWarning) are not about the fit
    and are left out.
    """
    from statsmodels.tools.sm_exceptions import ModelWarning

    kept: List[str] = []
    failed = False
    for item in caught:
        if not issubclass(item.category, (ModelWarning, RuntimeWarning)):
            continue
        text = f"{item.category.__name__}: {str(item.message).strip().splitlines()[0] if str(item.message) else ''}"
        failed = failed or item.category.__name__ in NOT_CONVERGED_WARNINGS
        if text not in kept:
            kept.append(text)
    return tuple(kept), failed


def fit_model(data: pd.DataFrame, *, formula: str, family: str = "gaussian", robust: bool = False,
              offset: Optional[str] = None, alpha: float = 0.05, event: Optional[EventCoding] = None,
              ties: str = "efron") -> ModelFit:
    """Fit the analysis model to the rows where every model variable is present.

    Design columns the analysed rows cannot estimate (constant, e.g. a missing-category
    indicator that is 0 in every analysed row, or aliased with other columns) are left out
    before fitting and listed in ``dropped``; whether the fit converged and the fitting
    library's warnings are kept on the result (nothing is silenced).

    Parameters
    ----------
    data : the analysis frame (NaN where missing).
    formula : statsmodels formula, e.g. ``"y ~ arm + C(clinic) + Q('dose.mg')"``; for cox the
        left side is the follow-up time.
    family : gaussian (OLS), binomial (logistic), poisson (log-linear) or cox (proportional
        hazards, statsmodels' ``PHReg``; no intercept).
    robust : sandwich standard errors (HC1; for cox the robust covariance of Lin & Wei 1989).
    offset : column whose log is the offset of a poisson model (person-time), or None.
    event : cox only: the event column and its coding.
    ties : cox only: ``efron`` or ``breslow``.
    alpha : one minus the confidence level of the Wald intervals.

    Returns
    -------
    ModelFit whose term names are statsmodels' for ``formula`` on the data file (integer
    category codes as written, see :func:`values_as_written`).

    References
    ----------
    White H (1980). A heteroskedasticity-consistent covariance matrix estimator and a
    direct test for heteroskedasticity. Econometrica 48:817-838.
    McCullagh P, Nelder JA (1989). Generalized Linear Models, 2nd ed. Chapman & Hall.
    Cox DR (1972). Regression models and life-tables. JRSS B 34:187-220.
    """
    check_family(family)
    outcome, _ = check_formula(formula, list(data.columns))
    if data[outcome].notna().sum() == 0:
        raise InputError(f"the outcome '{outcome}' has no observed values", option="formula")
    if family in TIME_TO_EVENT_FAMILIES:
        return _fit_cox(values_as_written(data, formula), formula=formula, family=family, robust=robust,
                        alpha=alpha, event=event, ties=ties)
    data = values_as_written(_outcome_as_number(data, outcome, family), formula)
    cov_type = "HC1" if robust else "nonrobust"
    try:
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            if family == "gaussian":
                model = smf.ols(formula, data=data, eval_env=FORMULA_NAMESPACE)
            else:
                fam = sm.families.Binomial() if family == "binomial" else sm.families.Poisson()
                kwargs: dict[str, Any] = {}
                if offset is not None:
                    if offset not in data.columns:
                        raise InputError(f"'{offset}' is not a column{did_you_mean(offset, data.columns)}",
                                         option="offset")
                    if (pd.to_numeric(data[offset], errors="coerce") <= 0).any():
                        raise InputError(f"'{offset}' has values <= 0; give the person-time "
                                         "itself (gapbook takes its log), not its log", option="offset")
                    kwargs["offset"] = np.log(data[offset])
                    kwargs["missing"] = "drop"
                model = smf.glm(formula, data=data, family=fam, eval_env=FORMULA_NAMESPACE, **kwargs)
            if int(model.nobs) == 0:
                raise InputError(f"no row has every variable of '{formula}' observed", option="formula")
            _refuse_overflowing_model(model)
            kept, dropped = identifiable_columns(model.exog, model.exog_names)
            if dropped:
                design = pd.DataFrame(model.exog[:, kept], columns=[model.exog_names[j] for j in kept])
                if family == "gaussian":
                    model = sm.OLS(model.endog, design)
                else:
                    model = sm.GLM(model.endog, design, family=model.family,
                                   offset=getattr(model, "offset", None))
            result = model.fit(cov_type=cov_type)
            df_resid: Optional[float] = float(result.df_resid) if family == "gaussian" else None
            # statsmodels computes the scale lazily: with no residual degrees of freedom its warning came
            # here, outside the record, and reached check's and run's output as a raw RuntimeWarning
            covariance = np.asarray(result.cov_params(), dtype=float)
    except InputError:
        raise
    except Exception as exc:
        message = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        if int(data.dropna(subset=[outcome]).shape[0]) == 0 or "zero-size" in message or "0 rows" in message:
            raise InputError(f"no row has every variable of '{formula}' observed", option="formula") from None
        if "inf" in message:  # statsmodels: "exog contains inf or nans"
            _refuse_infinite_terms(data, formula)
        raise AnalysisError(f"the model '{formula}' could not be fitted: {message}") from None
    notes, failed = _fit_warnings(caught)
    terms = tuple(str(t) for t in result.params.index)
    unbounded = (separated_logistic_terms(np.asarray(model.endog, dtype=float), np.asarray(model.exog, dtype=float),
                                          terms) if family == "binomial" else ())
    converged = bool(getattr(result, "converged", True)) and not failed and not unbounded
    coefficients = result.params.to_numpy(dtype=float)
    return ModelFit(formula=formula, family=family, terms=terms,
                    coefficients=coefficients, covariance=covariance,
                    df_resid=df_resid, nobs=int(result.nobs), robust=robust, alpha=alpha, converged=converged,
                    warnings=notes, dropped=tuple(dropped), unbounded=unbounded)


def _fit_cox(data: pd.DataFrame, *, formula: str, family: str, robust: bool, alpha: float,
             event: Optional[EventCoding], ties: str) -> ModelFit:
    """The proportional hazards branch of :func:`fit_model` (statsmodels' ``PHReg``, same term names).

    As for the other families, design columns the analysed rows cannot estimate are left out
    before fitting; a Cox model has no intercept, and the baseline hazard absorbs a constant
    column, so the check is made with a column of ones in front.
    """
    if event is None:
        raise InputError(f"family {family} needs the event column", option="event")
    outcome, _ = check_formula(formula, list(data.columns))
    check_follow_up(data, time=outcome, event=event)
    try:
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            model = cox_model(data, formula=formula, event=event, ties=ties, eval_env=FORMULA_NAMESPACE)
            _refuse_overflowing_model(model)
            names = list(model.exog_names)
            kept, dropped = identifiable_columns(np.column_stack([np.ones(model.exog.shape[0]), model.exog]),
                                                 ["(baseline hazard)"] + names)
            columns = [j - 1 for j in kept if j > 0]
            if not columns:
                raise InputError(f"no term of '{formula}' can be estimated from the rows used (each is constant "
                                 "among them)", option="formula")
            if dropped:
                model = cox_model(data, formula=formula, event=event, ties=ties, eval_env=FORMULA_NAMESPACE,
                                  columns=columns)
            result = fit_cox_model(model, robust=robust)
    except InputError:
        raise
    except Exception as exc:
        message = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        if "inf" in message:  # statsmodels: "exog contains inf or nans"
            _refuse_infinite_terms(data, formula)
        raise AnalysisError(f"the Cox model '{formula}' could not be fitted: {message}") from None
    notes, failed = _fit_warnings(caught)
    terms = tuple(names[j] for j in columns)
    unbounded = unbounded_cox_terms(model.endog, model.status, model.exog, terms)
    converged = finite_fit(result) and not failed and not unbounded
    return ModelFit(formula=formula, family=family, terms=terms, coefficients=np.asarray(result.params, dtype=float),
                    covariance=np.asarray(result.cov_params(), dtype=float), df_resid=None,
                    nobs=int(model.exog.shape[0]), robust=robust, alpha=alpha, converged=converged, warnings=notes,
                    dropped=tuple(dropped), unbounded=unbounded)


def exposure_terms(terms: Sequence[str], exposure: Optional[str]) -> List[str]:
    """The model terms that belong to the exposure (a variable name or an exact term name).

    Parameters
    ----------
    terms : sequence of str
        The model's term names.
    exposure : str, optional
        The exposure.

    Returns
    -------
    list of str
    """
    if exposure is None:
        return [t for t in terms if t != "Intercept"][:1]
    if exposure in terms:
        return [exposure]
    pattern = re.compile(rf"(^|\(|['\"]){re.escape(exposure)}(['\"]|\)|\[|$)")
    matched = [t for t in terms if pattern.search(t)]
    if not matched:
        raise InputError(f"'{exposure}' matches no term of the model "
                         f"({', '.join(terms)}){did_you_mean(exposure, terms)}", option="exposure")
    return matched


def exposure_rows(estimates: Optional[pd.DataFrame], terms: Sequence[str]) -> pd.DataFrame:
    """The rows of ``estimates.csv`` (any strategies) for the exposure terms, numbered from 0.

    Parameters
    ----------
    estimates : DataFrame or None
        Rows with the ``estimates.csv`` columns; None or empty when no analysis ran.
    terms : sequence of str
        The exposure terms (:func:`exposure_terms`).

    Returns
    -------
    DataFrame
        The matching rows; without estimates, an empty frame with the columns a report reads.
    """
    if estimates is None or estimates.empty:
        return pd.DataFrame(columns=["strategy", "term", "estimate", "ci_lower", "ci_upper", "p_value", "n_used"])
    return estimates[estimates["term"].isin(list(terms))].reset_index(drop=True)


@dataclass(frozen=True)
class AnalysisModel:
    """The params' analysis model as plain options: what every strategy fits."""

    formula: str
    family: str = "gaussian"
    exposure: Optional[str] = None
    robust: bool = False
    offset: Optional[str] = None
    alpha: float = 0.05
    event: Optional[EventCoding] = None   # time-to-event families: the event column and its coding
    ties: str = "efron"

    def __post_init__(self) -> None:
        # In a notebook 'event="status"' is the natural spelling: the column, coded 1 = event, 0 = censored
        # (as in the params); it stopped on an AttributeError deep inside the fit.
        if isinstance(self.event, str):
            object.__setattr__(self, "event", EventCoding(column=self.event))

    def fit(self, data: pd.DataFrame, formula: Optional[str] = None) -> ModelFit:
        """``fit_model`` with these options (``formula`` overrides the model's, e.g. with indicators added)."""
        return fit_model(data, formula=formula or self.formula, family=self.family, robust=self.robust,
                         offset=self.offset, alpha=self.alpha, event=self.event, ties=self.ties)

    def is_time_to_event(self) -> bool:
        """Whether the outcome is a follow-up time with an event column (family cox)."""
        return self.family in TIME_TO_EVENT_FAMILIES

    def variables(self, columns: Sequence[str]) -> Tuple[str, List[str]]:
        """The outcome and the other model columns (formula order, then the offset or the event column).

        Exits 2 on unknown names.
        """
        check_family(self.family)
        outcome, used = check_formula(self.formula, list(columns))
        used = [c for c in used if c != outcome]
        for extra, option in ((self.offset, "offset"), (self.event.column if self.event else None, "event")):
            if extra is None:
                continue
            if extra not in columns:
                raise InputError(f"'{extra}' is not a column{did_you_mean(extra, columns)}", option=option)
            if extra == outcome:
                raise InputError(f"'{extra}' is the formula's outcome as well", option=option)
            if option == "event" and extra in used:
                # the event indicator as its own covariate explains the outcome by itself (a coefficient
                # that runs off to infinity), never an adjustment a plan asks for
                raise InputError(f"'{extra}' is the event column and a covariate of the formula as well; drop it "
                                 "from the formula's right-hand side", option=option)
            if extra not in used:
                used.append(extra)
        if self.is_time_to_event() and self.event is None:
            raise InputError(f"family {self.family} needs the event column", option="event")
        return outcome, used

