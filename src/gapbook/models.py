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
from typing import Any, List, Optional, Sequence, Tuple

import numpy as np
import pandas as pd
import statsmodels.api as sm
import statsmodels.formula.api as smf

from .errors import AnalysisError, InputError, did_you_mean
from .expressions import FORMULA_NAMESPACE, ExpressionError, parse_formula
from .inference import wald_inference
from .vocabulary import FAMILY_NAMES, ratio_name


@dataclass(frozen=True)
class ModelFit:
    """Coefficients, covariance and inference of one fitted analysis model.

    ``df_resid`` is the residual degrees of freedom used for t-based inference (OLS), or
    None when inference is by the normal distribution (GLMs).
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

    def std_errors(self) -> np.ndarray:
        """Standard errors: square roots of the covariance's diagonal."""
        return np.sqrt(np.diag(self.covariance))

    def estimates(self, strategy: str) -> pd.DataFrame:
        """Rows for ``estimates.csv``: one per term, with CI at level 1 - alpha and p-value."""
        se = self.std_errors()
        lower, upper, p = wald_inference(self.coefficients, se, self.df_resid, self.alpha)
        frame = pd.DataFrame({
            "strategy": strategy, "term": list(self.terms), "estimate": self.coefficients, "std_error": se,
            "ci_lower": lower, "ci_upper": upper, "p_value": p,
            "n_used": self.nobs,
        })
        return add_ratio_columns(frame, self.family)


def add_ratio_columns(frame: pd.DataFrame, family: str) -> pd.DataFrame:
    """For log-link models, the estimate and CI on the ratio scale (odds or rate ratio)."""
    name = ratio_name(family)
    if name is None:
        return frame
    return frame.assign(**{name: np.exp(frame["estimate"]), f"{name}_ci_lower": np.exp(frame["ci_lower"]),
                           f"{name}_ci_upper": np.exp(frame["ci_upper"])})


def formula_columns(formula: str, columns: Sequence[str]) -> List[str]:
    """The columns named in a piece of formula text (e.g. a term name ``arm[T.sms]``), in order of appearance.

    A text search only (nothing is parsed or evaluated); the analysis formula itself is
    checked by :func:`check_formula`.
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


def fit_model(data: pd.DataFrame, *, formula: str, family: str = "gaussian", robust: bool = False,
              offset: Optional[str] = None, alpha: float = 0.05) -> ModelFit:
    """Fit the analysis model to the rows where every model variable is present.

    Parameters
    ----------
    data : the analysis frame (NaN where missing).
    formula : statsmodels formula, e.g. ``"y ~ arm + C(clinic) + Q('dose.mg')"``.
    family : gaussian (OLS), binomial (logistic) or poisson (log-linear).
    robust : sandwich (heteroskedasticity-consistent, HC1) standard errors.
    offset : column whose log is the offset of a poisson model (person-time), or None.

    References
    ----------
    White H (1980). A heteroskedasticity-consistent covariance matrix estimator and a
    direct test for heteroskedasticity. Econometrica 48:817-838.
    """
    check_family(family)
    outcome, _ = check_formula(formula, list(data.columns))
    if data[outcome].notna().sum() == 0:
        raise InputError(f"the outcome '{outcome}' has no observed values", option="formula")
    data = _outcome_as_number(data, outcome, family)
    cov_type = "HC1" if robust else "nonrobust"
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            if family == "gaussian":
                result = smf.ols(formula, data=data, eval_env=FORMULA_NAMESPACE).fit(cov_type=cov_type)
                df_resid: Optional[float] = float(result.df_resid)
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
                result = smf.glm(formula, data=data, family=fam, eval_env=FORMULA_NAMESPACE,
                                 **kwargs).fit(cov_type=cov_type)
                df_resid = None
    except InputError:
        raise
    except Exception as exc:
        message = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        if int(data.dropna(subset=[outcome]).shape[0]) == 0 or "zero-size" in message or "0 rows" in message:
            raise InputError(f"no row has every variable of '{formula}' observed", option="formula") from None
        raise AnalysisError(f"the model '{formula}' could not be fitted: {message}") from None
    if int(result.nobs) == 0:
        raise InputError(f"no row has every variable of '{formula}' observed", option="formula")
    return ModelFit(formula=formula, family=family, terms=tuple(result.params.index),
                    coefficients=result.params.to_numpy(), covariance=np.asarray(result.cov_params()),
                    df_resid=df_resid, nobs=int(result.nobs), robust=robust, alpha=alpha)


def exposure_terms(terms: Sequence[str], exposure: Optional[str]) -> List[str]:
    """The model terms that belong to the exposure (a variable name or an exact term name)."""
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


@dataclass(frozen=True)
class AnalysisModel:
    """The params' analysis model as plain options: what every strategy fits."""

    formula: str
    family: str = "gaussian"
    exposure: Optional[str] = None
    robust: bool = False
    offset: Optional[str] = None
    alpha: float = 0.05

    def fit(self, data: pd.DataFrame, formula: Optional[str] = None) -> ModelFit:
        """``fit_model`` with these options (``formula`` overrides the model's, e.g. with indicators added)."""
        return fit_model(data, formula=formula or self.formula, family=self.family, robust=self.robust,
                         offset=self.offset, alpha=self.alpha)

    def variables(self, columns: Sequence[str]) -> Tuple[str, List[str]]:
        """The outcome and the other model columns (formula order, then the offset); exits 2 on unknown names."""
        check_family(self.family)
        outcome, used = check_formula(self.formula, list(columns))
        used = [c for c in used if c != outcome]
        if self.offset is not None:
            if self.offset not in columns:
                raise InputError(f"'{self.offset}' is not a column{did_you_mean(self.offset, columns)}",
                                 option="offset")
            if self.offset not in used:
                used.append(self.offset)
        return outcome, used

