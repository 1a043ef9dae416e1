"""How each strategy behaves for a study like the user's: a bias simulation.

A model fitted to the study's complete cases generates R replicate datasets of the same
size (covariates resampled from the study's rows, the outcome drawn from the fitted
model, so the true coefficients are known). Missing values are then imposed on every
model variable that is missing in the study, at the study's missing fractions, under
three mechanisms:

- MCAR: every cell of a variable has the same chance of being missing;
- MAR: the chance depends on chosen variables that are always observed (``mar_on``);
- MNAR: the chance depends on the variable's own value (for the outcome: higher
  outcomes are more often missing).

For a time-to-event (Cox) model the outcome is a follow-up time with an event status: the
event times are drawn from a Weibull proportional-hazards model fitted to the complete cases
(its log hazard ratios are the truth) and the censoring times from the study's own censoring
distribution (reverse Kaplan–Meier); missing values are imposed on the covariates only, and
the MAR driver defaults to the event status.

Every strategy is applied to the same incomplete datasets, and bias, empirical SE, model
SE and coverage are reported with their Monte Carlo standard errors. Replicates run in
parallel; each has its own seed spawned from the params seed, so the results do not
depend on the number of workers.

References
----------
Morris TP, White IR, Crowther MJ (2019). Using simulation studies to evaluate statistical
methods. Statistics in Medicine 38:2074-2102.
"""
from __future__ import annotations

import dataclasses
import math
import sys
import warnings
from dataclasses import dataclass, field
from typing import Callable, Dict, List, Mapping, Optional, Sequence, Tuple

import numpy as np
import pandas as pd
from scipy import optimize, special

from .compute import cluster_workers, iterate_tasks, workers_phrase
from .errors import AnalysisError, InputError, did_you_mean
from .expressions import FORMULA_NAMESPACE, formula_environment
from .models import AnalysisModel, exposure_terms
from .survival import (CensoringDistribution, EventCoding, WeibullFit, censoring_distribution, cox_model,
                       fit_weibull_ph, weibull_times)
from .vocabulary import MECHANISMS, PARTICIPANT_ROW_STRATEGY_NAMES, effect_scale

__all__ = ["MECHANISMS", "SIMULATION_ITERATIONS", "performance", "design_from_data", "simulate_complete",
           "impose_missing", "Replicate", "least_squares_for", "CompleteCaseStrategy", "default_strategies",
           "SimulationResult", "run_simulation", "simulate_study", "follow_up_sentence"]

PERFORMANCE_COLUMNS: Tuple[str, ...] = ("mechanism", "strategy", "term", "n_rep", "true_value", "bias", "bias_mcse",
                                        "emp_se", "emp_se_mcse", "model_se", "coverage", "coverage_mcse")
# Log-odds change in the chance of being missing per SD of the driving variable: a strong
# but not extreme dependence (an odds ratio of e = 2.7 per SD). Common practice, no source.
DEFAULT_STRENGTH = 1.0
# Chained-equation sweeps per imputation inside the simulation: few variables have missing
# values there, and the chains start from draws of the observed values (common practice, no source).
SIMULATION_ITERATIONS = 5


# ---------------------------------------------------------------------------
# performance measures

def performance(estimates: np.ndarray, std_errors: np.ndarray, ci_lower: np.ndarray, ci_upper: np.ndarray,
                true_value: float) -> Dict[str, float]:
    """Bias, empirical SE, model SE and coverage, each with its Monte Carlo SE.

    Parameters
    ----------
    estimates, std_errors, ci_lower, ci_upper : one value per replicate (NaN replicates are dropped).
    true_value : the estimand's true value.

    Returns
    -------
    dict with n_rep, true_value, bias, bias_mcse, emp_se, emp_se_mcse, model_se,
    model_se_mcse, coverage, coverage_mcse.

    References
    ----------
    Morris TP, White IR, Crowther MJ (2019). Statistics in Medicine 38:2074-2102, Table 6:
    bias MCSE = EmpSE / sqrt(n); EmpSE MCSE = EmpSE / sqrt(2(n - 1));
    ModSE = sqrt(mean(SE^2)), MCSE = sqrt(var(SE^2) / (4 n ModSE^2));
    coverage MCSE = sqrt(coverage (1 - coverage) / n).
    """
    est = np.asarray(estimates, dtype=float)
    se = np.asarray(std_errors, dtype=float)
    lo = np.asarray(ci_lower, dtype=float)
    hi = np.asarray(ci_upper, dtype=float)
    keep = np.isfinite(est) & np.isfinite(se) & np.isfinite(lo) & np.isfinite(hi)
    est, se, lo, hi = est[keep], se[keep], lo[keep], hi[keep]
    n = int(len(est))
    out = {"n_rep": n, "true_value": float(true_value)}
    if n < 2:
        nan = float("nan")
        out.update(bias=nan, bias_mcse=nan, emp_se=nan, emp_se_mcse=nan, model_se=nan, model_se_mcse=nan,
                   coverage=nan, coverage_mcse=nan)
        return out
    emp_se = float(np.std(est, ddof=1))
    model_se = float(np.sqrt(np.mean(se ** 2)))
    covered = (lo <= true_value) & (true_value <= hi)
    coverage = float(np.mean(covered))
    out.update(
        bias=float(np.mean(est) - true_value),
        bias_mcse=emp_se / np.sqrt(n),
        emp_se=emp_se,
        emp_se_mcse=emp_se / np.sqrt(2.0 * (n - 1)),
        model_se=model_se,
        model_se_mcse=float(np.sqrt(np.var(se ** 2, ddof=1) / (4.0 * n * model_se ** 2))) if model_se > 0 else 0.0,
        coverage=coverage,
        coverage_mcse=float(np.sqrt(coverage * (1 - coverage) / n)),
    )
    return out


def performance_table(replicates: pd.DataFrame, true_values: Mapping[str, float]) -> pd.DataFrame:
    """One row per mechanism, strategy and term with the performance measures.

    Parameters
    ----------
    replicates : long table with mechanism, strategy, term, estimate, std_error, ci_lower, ci_upper.
    true_values : {term: true value}.

    Returns
    -------
    DataFrame with the columns of ``simulation_performance.csv`` (plus model_se_mcse).
    """
    rows = []
    for (mechanism, strategy, term), part in replicates.groupby(["mechanism", "strategy", "term"], sort=False):
        if term not in true_values:
            continue
        measures = performance(part["estimate"], part["std_error"], part["ci_lower"], part["ci_upper"],
                               true_values[term])
        rows.append({"mechanism": mechanism, "strategy": strategy, "term": term, **measures})
    columns = list(PERFORMANCE_COLUMNS[:10]) + ["model_se_mcse", "coverage", "coverage_mcse"]
    table = pd.DataFrame(rows)
    if table.empty:
        return pd.DataFrame(columns=columns)
    return table[columns]


# ---------------------------------------------------------------------------
# the data-generating model

@dataclass(frozen=True)
class SimulationDesign:
    """A study like the user's: covariate rows to resample, a fitted outcome model and missing fractions.

    ``linear_predictor`` holds the fitted model's linear predictor for every row of
    ``pool``; ``scale`` is the residual SD (gaussian) or None. ``true_values`` are the
    fitted coefficients of the exposure terms: the estimands. A time-to-event model has
    ``weibull`` (the event-time model, whose log hazard ratios are the truth),
    ``censoring`` (the censoring times' distribution) and ``left_out`` (rows without a
    follow-up time or event status, outside the simulated population).
    """

    model: AnalysisModel
    outcome: str
    covariates: Tuple[str, ...]
    pool: pd.DataFrame
    linear_predictor: np.ndarray
    scale: Optional[float]
    true_values: Dict[str, float]
    missing_fractions: Dict[str, float]
    mar_on: Tuple[str, ...]
    n: int
    types: Dict[str, str] = field(default_factory=dict)
    outcome_levels: Optional[Tuple[object, ...]] = None
    terms: Tuple[str, ...] = ()
    weibull: Optional[WeibullFit] = None
    censoring: Optional[CensoringDistribution] = None
    left_out: int = 0

    def missing_fraction_table(self) -> pd.DataFrame:
        """The missing fraction imposed on each model variable (the study's own), as a table."""
        return pd.DataFrame({"variable": list(self.missing_fractions),
                             "missing_fraction": list(self.missing_fractions.values())})


def default_mar_on(model: AnalysisModel, data: pd.DataFrame, covariates: Sequence[str]) -> List[str]:
    """The MAR driver when params give none: the first numeric covariate that is not the exposure; for a
    time-to-event model the event status (missingness that depends on the outcome, as White & Royston 2009 study)."""
    if model.is_time_to_event() and model.event is not None:
        return [model.event.column]
    exposure = model.exposure
    for column in covariates:
        if column != exposure and pd.api.types.is_numeric_dtype(data[column]) and data[column].nunique() > 2:
            return [column]
    for column in covariates:
        if column != exposure:
            return [column]
    return list(covariates[:1])


def design_from_data(data: pd.DataFrame, *, model: AnalysisModel, mar_on: Optional[Sequence[str]] = None,
                     missing: Optional[pd.DataFrame] = None, types: Optional[Mapping[str, str]] = None,
                     n: Optional[int] = None) -> SimulationDesign:
    """Fit the analysis model to the complete cases and keep what is needed to simulate from it.

    Parameters
    ----------
    data : the study data (NaN where missing).
    model : the analysis model (formula, family, exposure).
    mar_on : always-observed variables that drive MAR missingness; default: the first
        numeric covariate that is not the exposure (a time-to-event model: the event column;
        its follow-up time may be named too, since the simulation never makes it missing).
    missing : boolean frame of missing cells (``study.missing``); default ``data.isna()``.
    types : {column: type} for the imputation within the simulation.
    n : size of each simulated study (default: the study's number of rows).

    Returns
    -------
    SimulationDesign.

    References
    ----------
    Collett D (2015). Modelling Survival Data in Medical Research, 3rd ed. (the Weibull
    proportional-hazards model that generates a time-to-event study's event times).
    """
    outcome, covariates = model.variables(list(data.columns))
    time_to_event = model.is_time_to_event()
    mar_on = list(mar_on) if mar_on else default_mar_on(model, data, covariates)
    for column in mar_on:
        if column not in data.columns:
            raise InputError(f"'{column}' is not a column of the data"
                             f"{did_you_mean(column, data.columns)}", option="mar_on")
        if column == outcome and not time_to_event:  # a follow-up time is never made missing in the simulation
            raise InputError(f"'{column}' is the outcome; MAR must depend on observed "
                             "variables, so name covariates or auxiliary variables", option="mar_on")
    missing = data.isna() if missing is None else missing
    if time_to_event:
        return _time_to_event_design(data, model=model, outcome=outcome, covariates=covariates, mar_on=mar_on,
                                     missing=missing, types=types, n=n)
    keep_columns = list(dict.fromkeys([*covariates, *mar_on]))
    # a not-applicable cell is not missing but has no value either: such rows are outside the model's population
    absent = missing[keep_columns].to_numpy(dtype=bool) | data[keep_columns].isna().to_numpy()
    pool_rows = ~absent.any(axis=1)
    fitted_rows = pool_rows & data[outcome].notna().to_numpy()
    needed = max(20, 2 * len(keep_columns) + 5)  # common practice, no source
    if fitted_rows.sum() < needed:
        # the study's size, not a failure of the method: say what to do instead of failing the record with exit 1
        raise InputError(f"simulation: only {int(fitted_rows.sum())} rows have every model variable observed, "
                         f"fewer than the {needed} needed to fit the model the simulation generates data from; "
                         "leave the simulate stage out (--only with the other stages)")
    fitted = _fit_generating_model(data.loc[fitted_rows, [outcome, *keep_columns]], model, outcome)
    pool = data.loc[pool_rows, keep_columns].reset_index(drop=True)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        if model.family == "gaussian":
            linear = np.asarray(fitted.predict(pool), dtype=float)
            scale: Optional[float] = float(np.sqrt(fitted.scale))
        else:
            # the offset (log person-time) is part of each row's linear predictor, as in the analysis model
            offset = np.log(pool[model.offset].to_numpy(dtype=float)) if model.offset is not None else None
            linear = np.asarray(fitted.predict(pool, which="linear", offset=offset), dtype=float)
            scale = None
    terms = list(fitted.params.index)
    true_values = {t: float(fitted.params[t]) for t in exposure_terms(terms, model.exposure)}
    counted = [outcome, *covariates]
    fractions = {c: float(missing[c].mean()) for c in counted if missing[c].any() and c not in mar_on}
    outcome_levels = None
    if model.family == "binomial" and isinstance(data[outcome].dtype, pd.CategoricalDtype):
        outcome_levels = tuple(data[outcome].cat.categories)
    return SimulationDesign(model=model, outcome=outcome, covariates=tuple(covariates), pool=pool,
                            linear_predictor=linear, scale=scale, true_values=true_values,
                            missing_fractions=fractions, mar_on=tuple(mar_on), n=int(n or len(data)),
                            types={c: t for c, t in (types or {}).items() if c in (outcome, *keep_columns)},
                            outcome_levels=outcome_levels, terms=tuple(terms))


def _time_to_event_design(data: pd.DataFrame, *, model: AnalysisModel, outcome: str, covariates: Sequence[str],
                          mar_on: Sequence[str], missing: pd.DataFrame, types: Optional[Mapping[str, str]],
                          n: Optional[int]) -> SimulationDesign:
    """The design of a Cox study: a Weibull event-time model, the censoring distribution, covariate rows.

    Rows without a follow-up time or event status are outside the simulated population (every
    strategy leaves them out of the analysis); the covariates' missing fractions are those
    among the rows with follow-up, and the censoring distribution is estimated from all of them
    (censoring is taken to be independent of the covariates). The simulated event column is
    coded 1 = event, 0 = censored.
    """
    event = model.event
    status = event.indicator(data)
    with_follow_up = data[outcome].notna().to_numpy() & ~np.isnan(status)
    keep_columns = [c for c in dict.fromkeys([*covariates, *mar_on]) if c not in (outcome, event.column)]
    absent = missing[keep_columns].to_numpy(dtype=bool) | data[keep_columns].isna().to_numpy()
    pool_rows = with_follow_up & ~absent.any(axis=1)
    needed = max(20, 2 * len(keep_columns) + 5)  # common practice, no source
    if pool_rows.sum() < needed or status[pool_rows].sum() < 2:
        raise InputError(f"simulation: only {int(pool_rows.sum())} rows have every model variable observed "
                         f"({int(np.nansum(status[pool_rows]))} events), fewer than the {needed} rows and 2 events "
                         "needed to fit the model the simulation generates data from; leave the simulate stage out "
                         "(--only with the other stages)")
    frame = data.loc[pool_rows, [outcome, event.column, *keep_columns]].reset_index(drop=True)
    coded = dataclasses.replace(model, event=EventCoding(column=event.column))
    # Simulated event times are continuous, so no two events share a time and Efron's and Breslow's partial
    # likelihoods are the same function (Efron 1977, JASA 72:557); Breslow's is the faster to fit.
    simulated_model = dataclasses.replace(coded, ties="breslow")
    frame[event.column] = status[pool_rows]
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            cox = coded.fit(frame)   # the analysis model on these rows: its kept terms and their order
            phreg = cox_model(frame, formula=coded.formula, event=coded.event, ties=coded.ties,
                              eval_env=FORMULA_NAMESPACE)
            columns = [list(phreg.exog_names).index(t) for t in cox.terms]
            exog = np.asarray(phreg.exog, dtype=float)[:, columns]
            weibull = fit_weibull_ph(weibull_times(phreg.endog), phreg.status, exog)
            weibull = dataclasses.replace(weibull, zero_times=int((np.asarray(phreg.endog) == 0).sum()))
    except AnalysisError as exc:
        raise AnalysisError(f"the simulation's generating model could not be fitted: {exc}") from None
    beta = np.asarray(weibull.coefficients)
    true_values = {t: float(b) for t, b in zip(cox.terms, beta) if t in exposure_terms(list(cox.terms), model.exposure)}
    known = data.loc[with_follow_up]
    fractions = {c: float(missing.loc[with_follow_up, c].mean()) for c in covariates
                 if c != event.column and c not in mar_on and missing.loc[with_follow_up, c].any()}
    kept_types = {c: t for c, t in (types or {}).items() if c in (outcome, *keep_columns)}
    kept_types[event.column] = "binary"
    return SimulationDesign(model=simulated_model, outcome=outcome, covariates=tuple(covariates),
                            pool=frame.drop(columns=[outcome]), linear_predictor=exog @ beta, scale=None,
                            true_values=true_values, missing_fractions=fractions, mar_on=tuple(mar_on),
                            n=int(n or len(known)), types=kept_types, terms=tuple(cox.terms), weibull=weibull,
                            censoring=censoring_distribution(known[outcome].to_numpy(dtype=float),
                                                             status[with_follow_up]),
                            left_out=int((~with_follow_up).sum()))


def _fit_generating_model(frame: pd.DataFrame, model: AnalysisModel, outcome: str):
    """The statsmodels fit whose coefficients are the simulation's truth."""
    import statsmodels.api as sm
    import statsmodels.formula.api as smf

    frame = frame.copy()
    if model.family == "binomial" and not pd.api.types.is_numeric_dtype(frame[outcome]):
        levels = list(frame[outcome].cat.categories)
        frame[outcome] = frame[outcome].map({levels[0]: 0.0, levels[1]: 1.0}).astype(float)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            if model.family == "gaussian":
                return smf.ols(model.formula, data=frame, eval_env=FORMULA_NAMESPACE).fit()
            family = sm.families.Binomial() if model.family == "binomial" else sm.families.Poisson()
            offset = np.log(frame[model.offset].to_numpy(dtype=float)) if model.offset is not None else None
            return smf.glm(model.formula, data=frame, family=family, offset=offset, eval_env=FORMULA_NAMESPACE).fit()
    except Exception as exc:  # the analysis model itself fails on the complete cases
        raise AnalysisError(f"the simulation's generating model could not be fitted: {exc}") from None


def simulate_complete(design: SimulationDesign, rng: np.random.Generator) -> pd.DataFrame:
    """One complete replicate dataset: resampled covariate rows and an outcome drawn from the model.

    Parameters
    ----------
    design : SimulationDesign
        The simulation design.
    rng : numpy.random.Generator
        The replicate's generator.

    Returns
    -------
    DataFrame
    """
    rows = rng.integers(0, len(design.pool), size=design.n)
    frame = design.pool.iloc[rows].reset_index(drop=True)
    linear = design.linear_predictor[rows]
    family = design.model.family
    if design.weibull is not None:
        event_time = design.weibull.draw_times(linear, rng)
        censoring_time = design.censoring.draw(rng, design.n)
        frame[design.model.event.column] = (event_time <= censoring_time).astype(float)
        outcome = np.minimum(event_time, censoring_time)
    elif family == "gaussian":
        outcome = linear + rng.normal(0.0, design.scale, size=design.n)
    elif family == "binomial":
        outcome = (rng.random(design.n) < special.expit(linear)).astype(float)
    else:
        outcome = rng.poisson(np.exp(np.clip(linear, -30, 30))).astype(float)
    frame.insert(0, design.outcome, outcome)
    return frame


# ---------------------------------------------------------------------------
# missingness mechanisms

def standardised_score(values: pd.Series) -> np.ndarray:
    """A variable as a standardised number (category codes for categories); 0 where constant."""
    if isinstance(values.dtype, pd.CategoricalDtype):
        numbers = values.cat.codes.to_numpy(dtype=float)
        numbers[numbers < 0] = np.nan
    else:
        numbers = values.to_numpy(dtype=float)
    sd = np.nanstd(numbers)
    if not np.isfinite(sd) or sd == 0:
        return np.zeros(len(numbers))
    return np.nan_to_num((numbers - np.nanmean(numbers)) / sd)


def calibrated_intercept(score: np.ndarray, fraction: float, strength: float) -> float:
    """The logistic intercept that makes the mean chance of missingness equal ``fraction``."""
    if fraction <= 0:
        return -np.inf
    if fraction >= 1:
        return np.inf

    def gap(a: float) -> float:
        return float(np.mean(special.expit(a + strength * score)) - fraction)

    return float(optimize.brentq(gap, -40.0, 40.0, xtol=1e-10))


def impose_missing(complete: pd.DataFrame, design: SimulationDesign, mechanism: str, rng: np.random.Generator,
                   strength: float = DEFAULT_STRENGTH) -> pd.DataFrame:
    """Impose missing values on a complete replicate under MCAR, MAR or MNAR at the study's fractions.

    Parameters
    ----------
    complete : a complete replicate from :func:`simulate_complete`.
    design : the simulation design (missing fractions, MAR drivers).
    mechanism : "MCAR", "MAR" or "MNAR".
    rng : the replicate's generator.
    strength : log-odds change per SD of the driving variable (MAR, MNAR).

    Returns
    -------
    The replicate with NaN in the imposed cells.

    References
    ----------
    Rubin DB (1976). Inference and missing data. Biometrika 63:581-592 (the three mechanisms).
    """
    _check_mechanisms([mechanism])
    data = complete.copy()
    if mechanism == "MAR":
        driver = np.mean([standardised_score(complete[c]) for c in design.mar_on], axis=0)
    for column, fraction in design.missing_fractions.items():
        if mechanism == "MCAR":
            chance = np.full(len(data), fraction)
        else:
            score = driver if mechanism == "MAR" else standardised_score(complete[column])
            chance = special.expit(calibrated_intercept(score, fraction, strength) + strength * score)
        hit = rng.random(len(data)) < chance
        data.loc[hit, column] = np.nan
    return data


# ---------------------------------------------------------------------------
# strategies (module-level classes so parallel workers can pickle them)

ESTIMATE_FIELDS = ("term", "estimate", "std_error", "ci_lower", "ci_upper")


@dataclass(frozen=True)
class Replicate:
    """One incomplete replicate, with the design matrix of its complete version.

    ``complete_design`` lets the least-squares strategies rebuild a design matrix only on
    the rows whose covariates were imputed, instead of parsing the formula again.
    """

    data: pd.DataFrame
    complete_design: Optional[np.ndarray]


@dataclass(frozen=True)
class LeastSquares:
    """Ordinary least squares on a design matrix, giving the same ModelFit as ``fit_model`` (gaussian, nonrobust).

    Used only inside the simulation, where the formula is parsed once per worker instead of
    once per fit; checked against statsmodels in the tests. ``template`` is the data the
    formula's coding is learnt from (patsy's design description cannot be pickled, so
    each worker rebuilds it from the template).
    """

    formula: str
    outcome: str
    terms: Tuple[str, ...]
    template: Optional[pd.DataFrame] = None
    alpha: float = 0.05

    def __getstate__(self):
        state = dict(self.__dict__)
        state.pop("_design_info", None)
        return state

    def __setstate__(self, state):
        self.__dict__.update(state)

    def design(self, frame: pd.DataFrame) -> np.ndarray:
        import patsy
        info = self.__dict__.get("_design_info")
        if info is None:
            _, x = patsy.dmatrices(self.formula, self.template, return_type="dataframe",
                                   eval_env=formula_environment())
            info = x.design_info
            self.__dict__["_design_info"] = info  # a per-process cache, not part of the value
        return np.asarray(patsy.build_design_matrices([info], frame, NA_action="raise")[0], dtype=float)

    def fit(self, x: np.ndarray, y: np.ndarray):
        from .models import ModelFit
        n, p = x.shape
        if n <= p:
            raise AnalysisError(f"{n} rows for {p} coefficients")
        xtx = x.T @ x
        xtx_inv = np.linalg.pinv(xtx)
        beta = xtx_inv @ (x.T @ y)
        resid = y - x @ beta
        df_resid = float(n - np.linalg.matrix_rank(xtx))  # rank of X'X equals rank of X, at p x p cost
        cov = xtx_inv * float(resid @ resid) / df_resid
        return ModelFit(formula=self.formula, family="gaussian", terms=self.terms, coefficients=beta, covariance=cov,
                        df_resid=df_resid, nobs=n, robust=False, alpha=self.alpha)


def least_squares_for(design: "SimulationDesign") -> Optional[LeastSquares]:
    """The fast path when the model is gaussian without robust SEs and patsy names the terms as statsmodels does.

    Parameters
    ----------
    design : SimulationDesign
        The simulation design.

    Returns
    -------
    LeastSquares or None
        None when the general fit (statsmodels) is needed.
    """
    model = design.model
    if model.family != "gaussian" or model.robust:
        return None
    template = design.pool.assign(**{design.outcome: 0.0})
    try:
        import patsy
        _, x = patsy.dmatrices(model.formula, template, return_type="dataframe", eval_env=formula_environment())
    except Exception:
        return None
    terms = tuple(x.columns)
    if terms != design.terms:  # patsy must name and order the terms exactly as the fitted model does
        return None
    return LeastSquares(model.formula, design.outcome, terms, template, model.alpha)


@dataclass(frozen=True)
class CompleteCaseStrategy:
    """The analysis model on the rows with every model variable observed."""

    model: AnalysisModel
    columns: Tuple[str, ...] = ()
    fast: Optional[LeastSquares] = None
    name: str = "complete_case"

    def __call__(self, replicate: Replicate, rng: np.random.Generator) -> pd.DataFrame:
        data = replicate.data
        if self.fast is None or replicate.complete_design is None:
            return self.model.fit(data).estimates(self.name)[list(ESTIMATE_FIELDS)]
        keep = data[list(self.columns)].notna().all(axis=1).to_numpy()
        y = data[self.fast.outcome].to_numpy(dtype=float)[keep]
        return self.fast.fit(replicate.complete_design[keep], y).estimates(self.name)[list(ESTIMATE_FIELDS)]


@dataclass(frozen=True)
class MissingCategoryStrategy:
    """The missing-category analysis of :mod:`gapbook.indicator`, as its stage runs it.

    ``indicator_for_continuous`` mirrors the indicator stage (which uses the
    missing-indicator method for continuous covariates).
    """

    model: AnalysisModel
    types: Tuple[Tuple[str, str], ...] = ()
    indicator_for_continuous: bool = True
    fast: Optional[LeastSquares] = None
    name: str = "missing_category"

    def __call__(self, replicate: Replicate, rng: np.random.Generator) -> pd.DataFrame:
        from . import indicator
        types = dict(self.types) or None
        if self.fast is None:
            result = indicator.missing_category_analysis(replicate.data, model=self.model, types=types,
                                                         indicator_for_continuous=self.indicator_for_continuous)
            return result.estimates()[list(ESTIMATE_FIELDS)]
        import patsy
        prepared = indicator.prepare_missing_category(replicate.data, model=self.model, types=types,
                                                      indicator_for_continuous=self.indicator_for_continuous)
        y, x = patsy.dmatrices(prepared.formula, prepared.data, return_type="dataframe",
                               eval_env=formula_environment())
        solver = LeastSquares(prepared.formula, self.fast.outcome, prepared.display_terms(x.columns), None,
                              self.fast.alpha)
        fit = solver.fit(x.to_numpy(dtype=float), y.to_numpy(dtype=float).ravel())
        return fit.estimates(self.name)[list(ESTIMATE_FIELDS)]


@dataclass(frozen=True)
class ImputationStrategy:
    """Multiple imputation by chained equations (:mod:`gapbook.impute`), pooled with Rubin's rules.

    For a time-to-event model the covariates are imputed as the impute stage does it: with the
    event indicator and the Nelson–Aalen cumulative hazard as predictors, not the raw time
    (White & Royston 2009, Stat Med 28:1982-1998).
    """

    model: AnalysisModel
    m: int = 5
    iterations: int = 5
    types: Tuple[Tuple[str, str], ...] = ()
    covariates: Tuple[str, ...] = ()
    fast: Optional[LeastSquares] = None
    name: str = "multiple_imputation"

    def __call__(self, replicate: Replicate, rng: np.random.Generator) -> pd.DataFrame:
        from .impute import impute_chained
        from .pool import pool_fits
        data = replicate.data
        seed = int(rng.integers(0, 2 ** 31 - 1))
        if self.model.is_time_to_event():
            return self._time_to_event(data, seed)
        imputed = impute_chained(data, m=self.m, iterations=self.iterations, seed=seed,
                                 types=dict(self.types) or None)
        if self.fast is None or replicate.complete_design is None:
            return imputed.analyse(self.model).estimates()[list(ESTIMATE_FIELDS)]
        changed = np.flatnonzero(data[list(self.covariates)].isna().any(axis=1).to_numpy())
        completed = [imputed.completed(i) for i in range(imputed.m)]
        # One design-matrix build for the imputed rows of all m datasets (formula evaluation has a fixed cost).
        stacked = self.fast.design(pd.concat([c.iloc[changed] for c in completed], ignore_index=True)) \
            if len(changed) else None
        fits = []
        for i, frame in enumerate(completed):
            x = replicate.complete_design.copy()
            if stacked is not None:
                x[changed] = stacked[i * len(changed):(i + 1) * len(changed)]
            fits.append(self.fast.fit(x, frame[self.fast.outcome].to_numpy(dtype=float)))
        return pool_fits(fits).estimates()[list(ESTIMATE_FIELDS)]

    def _time_to_event(self, data: pd.DataFrame, seed: int) -> pd.DataFrame:
        from .impute import impute_chained
        from .impute.plan import ImputationSettings, survival_predictors

        outcome = self.model.variables(list(data.columns))[0]
        follow_up = survival_predictors(data, time=outcome, event=self.model.event)
        settings = ImputationSettings(m=self.m, iterations=self.iterations, seed=seed)
        data, mask, settings = follow_up.apply(data, data.isna(), settings)
        types = {**dict(self.types), **follow_up.types()}
        imputed = impute_chained(data, m=self.m, iterations=self.iterations, seed=seed, types=types,
                                 impute_mask=mask,
                                 exclude_predictors={k: list(v) for k, v in settings.exclude_predictors.items()})
        return imputed.analyse(self.model).estimates()[list(ESTIMATE_FIELDS)]


Strategy = Callable[[Replicate, np.random.Generator], pd.DataFrame]


def default_strategies(design: SimulationDesign, *, m: int = 5, iterations: int = 5,
                       include: Sequence[str] = PARTICIPANT_ROW_STRATEGY_NAMES,
                       ) -> Dict[str, Strategy]:
    """Every strategy gapbook offers, set up for the design (cheap imputation settings: m, iterations).

    Parameters
    ----------
    design : from :func:`design_from_data`.
    m, iterations : imputations and chained-equation sweeps inside each replicate.
    include : the strategies to set up, by their names in ``gapbook.vocabulary.STRATEGIES``.

    Returns
    -------
    {strategy name: callable(Replicate, rng) -> estimates rows}.
    """
    types = tuple(sorted(design.types.items()))
    fast = least_squares_for(design)
    columns = (design.outcome, *design.covariates)
    available: Dict[str, Strategy] = {"complete_case": CompleteCaseStrategy(design.model, columns, fast)}
    if "missing_category" in include and _has_module("indicator"):
        available["missing_category"] = MissingCategoryStrategy(design.model, types, True, fast)
    if "multiple_imputation" in include and _has_module("impute"):
        available["multiple_imputation"] = ImputationStrategy(design.model, m, iterations, types, design.covariates,
                                                              fast)
    return {name: s for name, s in available.items() if name in include}


def _has_module(name: str) -> bool:
    import importlib.util
    return importlib.util.find_spec(f"gapbook.{name}") is not None


# ---------------------------------------------------------------------------
# running the simulation

def run_replicate(design: SimulationDesign, strategies: Mapping[str, Strategy], mechanisms: Sequence[str],
                  seed: np.random.SeedSequence, replicate: int, strength: float = DEFAULT_STRENGTH,
                  fast: Optional[LeastSquares] = None) -> List[dict]:
    """One replicate: a complete dataset, each mechanism's incomplete copy, each strategy's estimates.

    A strategy that fails on a replicate gives NaN rows (counted as failures, not hidden).
    """
    data_seed, *mechanism_seeds = seed.spawn(1 + len(mechanisms))
    complete = simulate_complete(design, np.random.default_rng(data_seed))
    complete_design = fast.design(complete) if fast is not None else None
    rows: List[dict] = []
    for mechanism, mseed in zip(mechanisms, mechanism_seeds):
        missing_seed, strategy_seed = mseed.spawn(2)
        incomplete = impose_missing(complete, design, mechanism, np.random.default_rng(missing_seed), strength)
        for (name, strategy), sseed in zip(strategies.items(), strategy_seed.spawn(len(strategies))):
            try:
                with warnings.catch_warnings():
                    warnings.simplefilter("ignore")
                    table = strategy(Replicate(incomplete, complete_design), np.random.default_rng(sseed))
                table = table[table["term"].isin(list(design.true_values))]
                for record in table.to_dict("records"):
                    rows.append({"replicate": replicate, "mechanism": mechanism, "strategy": name, **record,
                                 "failed": False})
            except (AnalysisError, InputError, ValueError, np.linalg.LinAlgError):
                for term in design.true_values:
                    rows.append({"replicate": replicate, "mechanism": mechanism, "strategy": name, "term": term,
                                 "estimate": np.nan, "std_error": np.nan, "ci_lower": np.nan, "ci_upper": np.nan,
                                 "failed": True})
    return rows


@dataclass(frozen=True)
class SimulationResult:
    """Per-replicate estimates and the performance of every strategy under every mechanism.

    ``sentences`` name the strategies with clear bias or poor coverage under each mechanism.
    """

    replicates: pd.DataFrame
    performance: pd.DataFrame
    design: SimulationDesign
    n_replicates: int
    seed: int
    strength: float
    n_failed: int
    sentences: Tuple[str, ...] = ()

    def tables(self) -> Dict[str, pd.DataFrame]:
        """``simulation_performance``."""
        return {"simulation_performance": self.performance}


def run_simulation(design: SimulationDesign, strategies: Mapping[str, Strategy], *, replicates: int = 200,
                   seed: int = 0, n_jobs: int = 1, mechanisms: Sequence[str] = MECHANISMS,
                   strength: float = DEFAULT_STRENGTH, alpha: float = 0.05,
                   progress: bool = False) -> SimulationResult:
    """Run the bias simulation in parallel and summarise it.

    Parameters
    ----------
    design : from :func:`design_from_data`.
    strategies : {name: callable(Replicate, rng) -> estimates rows}; see :func:`default_strategies`.
    replicates : number of replicate datasets R.
    seed : the params seed; replicate r uses the r-th child of ``SeedSequence(seed)``.
    n_jobs : parallel workers (joblib); results do not depend on it.
    mechanisms : which of MCAR, MAR, MNAR to impose.
    strength : log-odds change in the chance of missingness per SD of the driver.
    alpha : 1 - the nominal coverage, for the sentences.
    progress : show a progress bar (on standard error; off by default, so pages stay clean).

    Returns
    -------
    SimulationResult.

    References
    ----------
    Morris TP, White IR, Crowther MJ (2019). Statistics in Medicine 38:2074-2102.
    """
    if replicates < 2:
        raise InputError("at least 2 replicates are needed for an empirical SE", option="replicates")
    _check_mechanisms(mechanisms)
    if not strategies:
        raise InputError("no strategy to simulate; give at least complete_case")
    seeds = np.random.SeedSequence(seed).spawn(replicates)
    fast = next((s.fast for s in strategies.values() if getattr(s, "fast", None) is not None), None)
    tasks = ((design, strategies, tuple(mechanisms), s, r, strength, fast) for r, s in enumerate(seeds))
    from tqdm import tqdm

    bar = tqdm(total=replicates, desc="replicates", file=sys.stderr, mininterval=1.0, disable=not progress)
    rows: List[dict] = []
    workers = cluster_workers() or n_jobs
    for chunk in iterate_tasks(run_replicate, tasks, n_jobs=n_jobs, batch_size=max(1, replicates // (8 * workers))):
        rows.extend(chunk)
        bar.update(1)
    bar.close()
    table = pd.DataFrame(rows)
    order = {name: i for i, name in enumerate(strategies)}
    table = table.sort_values(["replicate", "mechanism", "strategy"],
                              key=lambda s: s.map(order) if s.name == "strategy" else s,
                              kind="stable").reset_index(drop=True)
    perf = performance_table(table, design.true_values)
    mech_order = {m: i for i, m in enumerate(mechanisms)}
    perf = perf.sort_values(["mechanism", "strategy"], key=lambda s: s.map(mech_order if s.name == "mechanism"
                                                                            else order),
                            kind="stable").reset_index(drop=True)
    result = SimulationResult(replicates=table, performance=perf, design=design, n_replicates=replicates, seed=seed,
                              strength=strength, n_failed=int(table["failed"].sum()))
    return dataclasses.replace(result, sentences=tuple(summary_sentences(result, alpha)))


def _check_mechanisms(mechanisms: Sequence[str]) -> None:
    for mechanism in mechanisms:
        if mechanism not in MECHANISMS:
            raise InputError(f"'{mechanism}' is not one of {', '.join(MECHANISMS)}"
                             f"{did_you_mean(mechanism, MECHANISMS)}", option="mechanisms")


# ---------------------------------------------------------------------------
# words

def summary_sentences(result: SimulationResult, alpha: float = 0.05) -> List[str]:
    """One sentence per mechanism naming the strategies with clear bias or poor coverage.

    Bias counts as clear when it is more than two Monte Carlo SEs from zero and coverage
    as poor when it is more than two Monte Carlo SEs below the nominal level (common
    practice, no source).
    """
    nominal = 1 - alpha
    out = []
    perf = result.performance
    for mechanism, part in perf.groupby("mechanism", sort=False):
        notes = []
        for row in part.itertuples():
            flags = []
            if abs(row.bias) > 2 * row.bias_mcse:
                flags.append(f"bias {row.bias:+.3f} (MCSE {row.bias_mcse:.3f})")
            if row.coverage < nominal - 2 * max(row.coverage_mcse, 1e-12):
                flags.append(f"coverage {100 * row.coverage:.1f}%")
            if flags:
                notes.append(f"{row.strategy.replace('_', ' ')} ({row.term}): {', '.join(flags)}")
        if notes:
            out.append(f"Under {mechanism}: " + "; ".join(notes) + ".")
        else:
            out.append(f"Under {mechanism}: no strategy showed bias or under-coverage beyond Monte Carlo error.")
    out.append(f"Based on {result.n_replicates} replicates of {result.design.n} rows; the mechanisms imposed here "
               "are illustrations, and the study's own mechanism cannot be verified from the data.")
    out.append(precision_sentence(result.n_replicates, perf, alpha))
    return out


def precision_sentence(replicates: int, perf: pd.DataFrame, alpha: float = 0.05) -> str:
    """How precise the simulation is with this many replicates: the Monte Carlo SEs of coverage and bias.

    At nominal coverage 1 - alpha the Monte Carlo SE of coverage is sqrt(c (1 - c) / R)
    (Morris, White & Crowther 2019, Table 6); the bias MCSEs are the table's largest.
    """
    nominal = 1 - alpha
    coverage_se = math.sqrt(nominal * (1 - nominal) / replicates)
    bias_se = perf["bias_mcse"].max() if "bias_mcse" in perf.columns and len(perf) else float("nan")
    bias = f" and bias to within about \u00b1{2 * bias_se:.2g} (twice the largest bias MCSE)" \
        if math.isfinite(bias_se) else ""
    return (f"Monte Carlo precision: with {replicates} replicates a coverage of {100 * nominal:g}% is estimated "
            f"with a Monte Carlo SE of {100 * coverage_se:.1f} percentage points{bias}; more replicates "
            "(simulation.replicates) narrow both, at a proportional cost in time.")


# ---------------------------------------------------------------------------
# the stage in one call

def simulate_study(data: pd.DataFrame, *, model: AnalysisModel, missing: Optional[pd.DataFrame] = None,
                   types: Optional[Mapping[str, str]] = None, mar_on: Optional[Sequence[str]] = None,
                   replicates: int = 100, seed: int = 0, n_jobs: int = 1, m: int = 5,
                   progress: bool = False) -> SimulationResult:
    """The bias simulation for a study like this one: design, every strategy, performance and sentences.

    Parameters
    ----------
    data, missing, types : the study's values, missing cells and variable types.
    model : the analysis model; its complete-case fit is the simulation's truth.
    mar_on : always-observed variables that drive MAR missingness (default: see :func:`default_mar_on`).
    replicates, seed, n_jobs : as for :func:`run_simulation`.
    m : imputations per replicate (with :data:`SIMULATION_ITERATIONS` sweeps each).
    progress : show a progress bar on standard error.

    Returns
    -------
    SimulationResult whose first sentences describe the simulated study.

    References
    ----------
    Morris TP, White IR, Crowther MJ (2019). Statistics in Medicine 38:2074-2102.
    """
    design = design_from_data(data, model=model, mar_on=mar_on or None, missing=missing, types=types)
    strategies = default_strategies(design, m=m, iterations=SIMULATION_ITERATIONS)
    result = run_simulation(design, strategies, replicates=replicates, seed=seed, n_jobs=n_jobs, alpha=model.alpha,
                            progress=progress)
    setup = (f"{replicates} replicates of {design.n:,} rows (covariates resampled from {len(design.pool):,} complete "
             f"covariate rows); MAR driven by {', '.join(design.mar_on)}; imputation inside the simulation: m = {m}, "
             f"{SIMULATION_ITERATIONS} iterations; seed {seed}; replicates run in {workers_phrase(n_jobs)}.",
             f"True value(s) ({effect_scale(model.family, exponentiated=False)}): "
             + ", ".join(f"{t} = {v:.4f}" for t, v in design.true_values.items())
             + f". Strategy fits that failed: {result.n_failed}."
             + (f" {follow_up_sentence(design)}" if design.weibull is not None else ""))
    return dataclasses.replace(result, sentences=setup + result.sentences)


def follow_up_sentence(design: SimulationDesign) -> str:
    """How a time-to-event study's follow-up is simulated, in one sentence.

    Parameters
    ----------
    design : SimulationDesign
        A design with a Weibull event-time model and a censoring distribution.

    Returns
    -------
    str
    """
    weibull, outcome = design.weibull, design.outcome
    left_out = (f" {design.left_out:,} rows of the study without a follow-up time or event status are outside the "
                "simulated population, as they are outside every analysis." if design.left_out else "")
    return (f"Follow-up: event times drawn from a Weibull proportional-hazards model fitted to the {weibull.n:,} "
            f"complete cases ({weibull.events:,} events; shape {weibull.shape:.3g}), whose log hazard ratios are the "
            f"true values; censoring times drawn from the study's censoring distribution (reverse Kaplan-Meier of "
            f"{outcome}), and at the largest follow-up time ({design.censoring.end:g}) beyond its last censoring; "
            "missing values are imposed on the covariates only." + left_out
            + (f" {weibull.zero_times:,} follow-up times of 0 were placed at half the smallest positive time for the "
               "Weibull fit only (its hazard at 0 has no finite value; common practice, no source)."
               if weibull.zero_times else ""))

