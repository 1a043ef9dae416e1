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
from .expressions import FORMULA_NAMESPACE, parse_formula
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
    params: np.ndarray
    cov: np.ndarray
    df_resid: Optional[float]
    nobs: int
    robust: bool
    alpha: float = 0.05

    @property
    def std_errors(self) -> np.ndarray:
        return np.sqrt(np.diag(self.cov))

    def table(self, strategy: str) -> pd.DataFrame:
        """Rows for ``estimates.csv``: one per term, with CI at level 1 - alpha and p-value."""
        se = self.std_errors
        lower, upper, p = wald_inference(self.params, se, self.df_resid, self.alpha)
        frame = pd.DataFrame({
            "strategy": strategy, "term": list(self.terms), "estimate": self.params, "std_error": se,
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


def check_formula(formula: str, columns: Sequence[str], where: str = "analysis.formula") -> Tuple[str, List[str]]:
    """The outcome and the right-hand-side columns; exits 2 when a term is not allowed or a name is not a column.

    The check is :func:`gapbook.expressions.parse_formula`: the formula is split by patsy's
    parser and every term checked against the expression language's allow-list before any
    of it is evaluated.
    """
    parsed = parse_formula(formula, where=where, columns=list(columns))
    return parsed.outcome, list(parsed.columns)


def _outcome_as_number(data: pd.DataFrame, outcome: str, family: str) -> pd.DataFrame:
    """A binary text outcome becomes 0/1 with the second declared level as the event."""
    column = data[outcome]
    if family == "binomial" and not pd.api.types.is_numeric_dtype(column):
        levels = list(column.cat.categories) if isinstance(column.dtype, pd.CategoricalDtype) \
            else sorted(column.dropna().unique())
        if len(levels) != 2:
            raise InputError(f"analysis.formula: the binomial outcome '{outcome}' has {len(levels)} levels; "
                             "it needs exactly two")
        data = data.copy()
        data[outcome] = column.map({levels[0]: 0.0, levels[1]: 1.0}).astype(float)
        return data
    values = column.dropna().to_numpy(dtype=float) if pd.api.types.is_numeric_dtype(column) else None
    if family == "binomial" and values is not None and not np.isin(values, (0.0, 1.0)).all():
        raise InputError(f"analysis.family: binomial needs a 0/1 or two-level outcome, but '{outcome}' holds "
                         f"other values (e.g. {values[~np.isin(values, (0.0, 1.0))][0]:g}); choose gaussian or "
                         "recode the outcome")
    if family == "poisson" and values is not None and (values < 0).any():
        raise InputError(f"analysis.family: poisson needs counts, but '{outcome}' holds negative values; "
                         "choose gaussian or check the outcome")
    return data


def fit_model(data: pd.DataFrame, formula: str, family: str = "gaussian", robust: bool = False,
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
    if family not in FAMILY_NAMES:
        raise InputError(f"analysis.family: '{family}' is not one of {', '.join(FAMILY_NAMES)}"
                         f"{did_you_mean(family, FAMILY_NAMES)}")
    outcome, _ = check_formula(formula, list(data.columns))
    if data[outcome].notna().sum() == 0:
        raise InputError(f"analysis.formula: the outcome '{outcome}' has no observed values")
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
                        raise InputError(f"analysis.offset: '{offset}' is not a column{did_you_mean(offset, data.columns)}")
                    if (pd.to_numeric(data[offset], errors="coerce") <= 0).any():
                        raise InputError(f"analysis.offset: '{offset}' has values <= 0; give the person-time "
                                         "itself (gapbook takes its log), not its log")
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
            raise InputError(f"analysis.formula: no row has every variable of '{formula}' observed") from None
        raise AnalysisError(f"the model '{formula}' could not be fitted: {message}") from None
    if int(result.nobs) == 0:
        raise InputError(f"analysis.formula: no row has every variable of '{formula}' observed")
    return ModelFit(formula=formula, family=family, terms=tuple(result.params.index), params=result.params.to_numpy(),
                    cov=np.asarray(result.cov_params()), df_resid=df_resid, nobs=int(result.nobs), robust=robust,
                    alpha=alpha)


def exposure_terms(terms: Sequence[str], exposure: Optional[str]) -> List[str]:
    """The model terms that belong to the exposure (a variable name or an exact term name)."""
    if exposure is None:
        return [t for t in terms if t != "Intercept"][:1]
    if exposure in terms:
        return [exposure]
    pattern = re.compile(rf"(^|\(|['\"]){re.escape(exposure)}(['\"]|\)|\[|$)")
    matched = [t for t in terms if pattern.search(t)]
    if not matched:
        raise InputError(f"analysis.exposure: '{exposure}' matches no term of the model "
                         f"({', '.join(terms)}){did_you_mean(exposure, terms)}")
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
        return fit_model(data, formula or self.formula, self.family, self.robust, self.offset, self.alpha)

    def variables(self, columns: Sequence[str]) -> Tuple[str, List[str]]:
        """The outcome and the other model columns (formula order, then the offset); exits 2 on unknown names."""
        if self.family not in FAMILY_NAMES:
            raise InputError(f"analysis.family: '{self.family}' is not one of {', '.join(FAMILY_NAMES)}"
                             f"{did_you_mean(self.family, FAMILY_NAMES)}")
        outcome, used = check_formula(self.formula, list(columns))
        used = [c for c in used if c != outcome]
        if self.offset is not None:
            if self.offset not in columns:
                raise InputError(f"analysis.offset: '{self.offset}' is not a column{did_you_mean(self.offset, columns)}")
            if self.offset not in used:
                used.append(self.offset)
        return outcome, used


def analysis_model(params: Any) -> AnalysisModel:
    """The ``analysis`` section of validated params as an :class:`AnalysisModel`; exits 2 without a formula."""
    section = params.analysis
    if not section.formula:
        raise InputError(f"{params.label}: analysis.formula is required for this stage; "
                         "write it as 'outcome ~ exposure + covariates'")
    return AnalysisModel(formula=section.formula, family=section.family, exposure=section.exposure,
                         robust=section.robust, offset=section.offset, alpha=section.alpha)
