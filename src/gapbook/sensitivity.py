"""How far the conclusion moves if data are missing not at random: delta adjustment.

Pattern-mixture delta adjustment: the chained-equations imputation runs as under missing
at random, except that after each imputation step of a chosen variable (the outcome by
default) its imputed values are shifted by delta (added for a continuous variable, on the
log-odds scale for a binary one), optionally with a different delta per group (e.g. per
arm). The analysis model is re-fitted and re-pooled for every delta on the grid. Every
delta uses the same seed, so the curve shows the effect of delta rather than Monte Carlo
noise, and delta = 0 is exactly the missing-at-random imputation with those settings.

The tipping point is the delta at which the exposure's confidence interval first reaches
the null (equivalently, its p-value crosses alpha): located between two grid points and
refined by a root search that re-runs the imputation at intermediate deltas. A curve drawn
with m imputations wobbles by Monte Carlo error, so the tipping point carries one too:
its Monte Carlo SE is that of the interval's limit there (a jackknife over the imputations;
White, Royston & Wood 2011), divided by the limit's slope in delta (the delta method). The
root search stops at half that SE, and the wording shows the tipping point to the precision
it allows.

References
----------
Carpenter JR, Kenward MG (2013). Multiple Imputation and its Application. Wiley,
chapter 10 (sensitivity analysis via pattern-mixture delta adjustment).
Rubin DB (1987). Multiple Imputation for Nonresponse in Surveys. Wiley.
White IR, Royston P, Wood AM (2011). Multiple imputation using chained equations: issues and
guidance for practice. Stat Med 30:377-399.
"""
from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass, field
from typing import Callable, Dict, List, Mapping, Optional, Sequence, Tuple, Union

import numpy as np
import pandas as pd
from scipy import optimize

from .errors import InputError, did_you_mean
from .inference import wald_inference
from .impute import ImputationPlan
from .models import AnalysisModel, exposure_terms
from .pool import PooledResult, rubin_pool
from .text import counted, level_text, quantity
from .vocabulary import DELTA_METHODS, MAR_CAUTION

__all__ = ["ALL_GROUPS", "DeltaSeries", "DeltaSpec", "delta_series", "imputation_evaluator", "interval",
           "find_tipping_point", "tipping_statement", "DeltaResult", "delta_analysis", "StrategyAndDelta",
           "compare_with_deltas", "SensitivityResult", "sensitivity_analysis", "nothing_to_shift"]

ALL_GROUPS = "all"
DELTA_COLUMNS: Tuple[str, ...] = ("variable", "group", "delta", "term", "estimate", "ci_lower", "ci_upper", "p_value")
MONTE_CARLO_COLUMNS: Tuple[str, ...] = ("monte_carlo_se", "ci_lower_mc_se", "ci_upper_mc_se")  # see with_monte_carlo_se
COMPARISON_COLUMNS: Tuple[str, ...] = ("analysis", "variable", "group", "delta", "term", "estimate", "ci_lower",
                                       "ci_upper", "p_value", "conclusion")
TIPPING_COLUMNS: Tuple[str, ...] = ("variable", "group", "term", "side", "baseline_conclusion", "found",
                                    "tipping_delta", "monte_carlo_se", "bracket_lower", "bracket_upper", "grid_min",
                                    "grid_max", "evaluations", "m", "statement")


# ---------------------------------------------------------------------------
# the grid

@dataclass(frozen=True)
class DeltaSeries:
    """One curve of the sensitivity analysis: a variable, the group its delta applies to, and the deltas.

    ``by`` is the grouping column (None: the delta applies to every imputed value of the
    variable, shown as group ``"all"``); ``group`` is the level of ``by`` that is shifted
    (the other groups keep delta 0).
    """

    variable: str
    group: str
    by: Optional[str]
    deltas: Tuple[float, ...]

    def engine_arguments(self, delta: float) -> Tuple[Dict[str, object], Optional[Dict[str, str]]]:
        """The ``delta`` and ``delta_by`` arguments of the imputation engine for one delta."""
        if self.by is None:
            return {self.variable: float(delta)}, None
        return {self.variable: {self.group: float(delta)}}, {self.variable: self.by}


def default_deltas(values: pd.Series, variable_type: str) -> Tuple[float, ...]:
    """A grid when the params give none: 0 to 1 observed SD for continuous variables, 0 to 2 log-odds for binary.

    Common practice, no source: a shift of one SD (or an odds ratio of about 7) is large
    enough that most conclusions tip within it, so the tipping point lands on the grid.
    """
    if variable_type == "binary":
        return (0.0, 0.25, 0.5, 0.75, 1.0, 1.5, 2.0)
    with np.errstate(over="ignore", invalid="ignore"):  # values near 1e308: an inf SD, replaced below
        sd = float(pd.to_numeric(values, errors="coerce").std())
    if not math.isfinite(sd) or sd == 0:
        sd = 1.0
    step = float(f"{sd / 8:.1g}")  # a round step so the deltas read well
    return tuple(round(k * step, 10) for k in range(0, 9))


@dataclass(frozen=True)
class DeltaSpec:
    """Deltas for one variable by group: ``values`` shift every group alike, ``groups`` one level of ``by`` each."""

    values: Optional[Sequence[float]] = None
    by: Optional[str] = None
    groups: Mapping[str, Sequence[float]] = field(default_factory=dict)


def delta_series(data: pd.DataFrame, *, outcome: str, variable: Optional[str] = None,
                 grids: Optional[Mapping[str, Union[Sequence[float], DeltaSpec]]] = None,
                 types: Optional[Mapping[str, str]] = None) -> Tuple[DeltaSeries, ...]:
    """Turn the delta grids into the curves to compute.

    Parameters
    ----------
    data : the study data (for the default grid and to check names).
    outcome : the analysis model's outcome (the variable shifted when nothing else is named).
    variable : the variable to shift with the default grid when ``grids`` is empty.
    grids : {variable: [deltas] or DeltaSpec}; empty for one default grid (:func:`default_deltas`).
    types : {column: type}; binary variables are shifted on the log-odds scale.

    Returns
    -------
    Tuple of DeltaSeries; a plain list of values gives one series for every imputed value,
    ``DeltaSpec(by=col, groups={level: [...]})`` one series per level, ``values`` with ``by``
    a series that shifts every group alike.
    """
    types = dict(types or {})
    grids = dict(grids or {})
    if not grids:
        variable = variable or outcome
        _check_column(variable, data, "variable")
        return (DeltaSeries(variable, ALL_GROUPS, None, default_deltas(data[variable], types.get(variable, ""))),)
    series: List[DeltaSeries] = []
    for variable, grid in grids.items():
        _check_column(variable, data, f"delta.{variable}")
        if not isinstance(grid, DeltaSpec):
            series.append(DeltaSeries(variable, ALL_GROUPS, None, _with_zero(grid, variable)))
            continue
        by = grid.by
        if grid.groups and by is None:
            raise InputError("needs 'by': the column whose levels the groups name (e.g. by: arm)",
                             option=f"delta.{variable}.groups")
        if by is not None:
            _check_column(by, data, f"delta.{variable}.by")
        if grid.values:
            series.append(DeltaSeries(variable, ALL_GROUPS, None, _with_zero(grid.values, variable)))
        levels = [str(level) for level in pd.unique(data[by].dropna().astype(str))] if by is not None else []
        for level, values in grid.groups.items():
            if str(level) not in levels:
                raise InputError(f"'{level}' is not a level of '{by}' ({', '.join(levels)})"
                                 f"{did_you_mean(str(level), levels)}", option=f"delta.{variable}.groups")
            series.append(DeltaSeries(variable, str(level), by, _with_zero(values, variable)))
        if not grid.values and not grid.groups:
            series.append(DeltaSeries(variable, ALL_GROUPS, None,
                                      default_deltas(data[variable], types.get(variable, ""))))
    return tuple(series)


def _with_zero(values: Sequence[float], variable: str) -> Tuple[float, ...]:
    """The grid sorted with 0 (missing at random) included, since every curve starts from it."""
    numbers = sorted({float(v) for v in values} | {0.0})
    if any(not math.isfinite(v) for v in numbers):
        raise InputError("every delta must be a finite number", option=f"delta.{variable}")
    return tuple(numbers)


def _check_column(name: str, data: pd.DataFrame, option: str) -> None:
    if name not in data.columns:
        raise InputError(f"'{name}' is not a column of the data{did_you_mean(name, data.columns)}", option=option)


# ---------------------------------------------------------------------------
# running the imputations

Evaluate = Callable[[DeltaSeries, float], pd.DataFrame]


def imputation_evaluator(data: pd.DataFrame, *, model: AnalysisModel,
                         impute_options: Mapping[str, object]) -> Evaluate:
    """A function (series, delta) -> pooled estimates of the analysis model after delta-adjusted imputation.

    Parameters
    ----------
    data : the study data (NaN where missing).
    model : the analysis model.
    impute_options : keyword arguments of ``gapbook.impute.impute_chained`` (m, iterations,
        seed, methods, predictors, passive, types, impute_mask, ...); the same seed for every delta.

    Returns
    -------
    callable
        ``evaluate(series, delta)`` giving the pooled ``estimates.csv`` rows.
    """
    from .impute import impute_chained

    def evaluate(series: DeltaSeries, delta: float) -> pd.DataFrame:
        delta_arg, delta_by = series.engine_arguments(delta)
        imputed = impute_chained(data, delta=delta_arg, delta_by=delta_by, **dict(impute_options))
        return with_monte_carlo_se(imputed.analyse(model))

    return evaluate


def with_monte_carlo_se(pooled: "PooledResult") -> pd.DataFrame:
    """The pooled ``estimates()`` rows with the Monte Carlo SEs of the estimate and of the interval's limits.

    ``monte_carlo_se`` is sqrt(B/m), the Monte Carlo SE of the estimate; ``ci_lower_mc_se``
    and ``ci_upper_mc_se`` are jackknife SEs over the imputations (each left out in turn, the
    rest re-pooled with Rubin's rules and Barnard-Rubin df): a limit moves with the estimate
    and with the between-imputation variance and df in its half-width, which at small m
    matter as much. The jackknife SE of the estimate itself is exactly sqrt(B/m). NaN when
    m < 3.

    References
    ----------
    White IR, Royston P, Wood AM (2011). Stat Med 30:377-399 (Monte Carlo error of multiple
    imputation results, sqrt(B/m) and the jackknife over imputations; recalled from memory).
    Efron B, Stein C (1981). The jackknife estimate of variance. Ann Stat 9:586-596.
    """
    rubin = pooled.rubin
    m = rubin.m
    table = pooled.estimates()
    p = len(pooled.terms)
    lower_se = upper_se = np.full(p, np.nan)
    if m >= 3:
        variances = np.diagonal(pooled.covariances, axis1=1, axis2=2)
        lowers, uppers = np.empty((m, p)), np.empty((m, p))
        for i in range(m):
            keep = np.arange(m) != i
            part = rubin_pool(pooled.coefficients[keep], variances[keep], df_complete=pooled.df_complete)
            lowers[i], uppers[i], _ = wald_inference(part.estimate, np.sqrt(part.total), part.df, pooled.alpha)
        lower_se, upper_se = _jackknife_se(lowers), _jackknife_se(uppers)
    return table.assign(monte_carlo_se=np.sqrt(rubin.between / m), ci_lower_mc_se=lower_se, ci_upper_mc_se=upper_se)


def _jackknife_se(leave_one_out: np.ndarray) -> np.ndarray:
    """sqrt((m - 1) / m * sum_i (t_(i) - mean)^2) per column (Efron & Stein 1981)."""
    m = leave_one_out.shape[0]
    centred = leave_one_out - leave_one_out.mean(axis=0)
    return np.sqrt((m - 1) / m * np.sum(centred ** 2, axis=0))


def plan_evaluator(plan: ImputationPlan, *, m: Optional[int] = None, iterations: Optional[int] = None,
                   n_jobs: Optional[int] = None) -> Evaluate:
    """Like :func:`imputation_evaluator`, for a ``gapbook.impute.ImputationPlan`` (the params' imputation).

    Parameters
    ----------
    plan : from :func:`gapbook.impute.plan_imputation`.
    m : imputations per delta (default the plan's m: with its seed, delta = 0 is then the
        imputation stage's own result).
    iterations, n_jobs : override the plan's settings (None keeps them); the seed is the plan's.
    """
    m = plan.settings.m if m is None else m

    def evaluate(series: DeltaSeries, delta: float) -> pd.DataFrame:
        delta_arg, delta_by = series.engine_arguments(delta)
        imputed = plan.run(m=m, iterations=iterations, delta=delta_arg, delta_by=delta_by, n_jobs=n_jobs)
        return with_monte_carlo_se(imputed.analyse(plan.model))

    return evaluate


def interval(table: pd.DataFrame, alpha: float) -> pd.DataFrame:
    """CI at level 1 - alpha and p-value from estimate, std_error and df (normal when df is missing or infinite).

    Parameters
    ----------
    table : DataFrame
        Rows with estimate, std_error and (optionally) df.
    alpha : float
        One minus the confidence level.

    Returns
    -------
    DataFrame
        ``table`` with ci_lower, ci_upper and p_value.
    """
    df = table["df"].to_numpy(dtype=float) if "df" in table.columns else None
    lower, upper, p = wald_inference(table["estimate"].to_numpy(dtype=float), table["std_error"].to_numpy(dtype=float),
                                     df, alpha)
    return table.assign(ci_lower=lower, ci_upper=upper, p_value=p)


# ---------------------------------------------------------------------------
# the tipping point

def conclusion_margin(ci_lower: float, ci_upper: float, baseline: str, null: float = 0.0) -> float:
    """Positive while the conclusion of the baseline holds, zero where it tips, negative after.

    ``baseline`` is "above" (CI above the null), "below" (CI below it) or "includes"
    (CI includes it; the conclusion changes when the interval leaves the null).
    """
    if baseline == "above":
        return ci_lower - null
    if baseline == "below":
        return null - ci_upper
    return min(ci_upper - null, null - ci_lower)


def conclusion_of(ci_lower: float, ci_upper: float, null: float = 0.0) -> str:
    if ci_lower > null:
        return "above"
    if ci_upper < null:
        return "below"
    return "includes"


@dataclass(frozen=True)
class TippingPoint:
    """Where the conclusion tips on one side of delta = 0 (``found`` False when it holds over the grid).

    ``monte_carlo_se`` is the Monte Carlo SE of ``delta`` (NaN when the grid carries no
    ``monte_carlo_se`` column or the point was not found).
    """

    term: str
    side: str
    baseline: str
    found: bool
    delta: float
    bracket: Tuple[float, float]
    grid_range: Tuple[float, float]
    evaluations: int
    extra: pd.DataFrame = field(repr=False, default_factory=pd.DataFrame)
    monte_carlo_se: float = float("nan")


def tipping_monte_carlo_se(limit_se: float, slope: float) -> float:
    """Monte Carlo SE of a tipping point: that of the interval's limit there over the limit's slope in delta.

    The estimated tipping point solves limit(delta) = null on a curve that carries Monte Carlo
    error e with SD ``limit_se``; to first order it is off by -e / slope (the delta method).

    References
    ----------
    White IR, Royston P, Wood AM (2011). Stat Med 30:377-399.
    """
    if not (math.isfinite(limit_se) and math.isfinite(slope)) or slope == 0:
        return float("nan")
    return abs(limit_se / slope)


def rounded_delta(delta: float, monte_carlo_se: float) -> str:
    """The delta to the precision its Monte Carlo SE allows: rounded to the smallest power of ten >= 2 SE.

    E.g. 2.6934 with SE 0.05 reads 2.7, with SE 0.004 reads 2.69, with SE 0.3 reads 3.
    Common practice, no source: a digit finer than the Monte Carlo error (about +-2 SE) is
    noise, so none is shown. Without an SE, 3 significant digits.
    """
    if not math.isfinite(delta):
        return "n/a"
    if not math.isfinite(monte_carlo_se) or monte_carlo_se <= 0:
        return f"{delta:.3g}"
    exponent = math.ceil(math.log10(2 * monte_carlo_se))
    unit = 10.0 ** exponent
    value = round(delta / unit) * unit
    return f"{value:.{max(0, -exponent)}f}"


def _limit_column(baseline: str, upper_crossed: bool) -> str:
    """The Monte Carlo SE column of the interval limit that reaches the null."""
    if baseline == "above":
        return "ci_lower_mc_se"
    if baseline == "below":
        return "ci_upper_mc_se"
    return "ci_upper_mc_se" if upper_crossed else "ci_lower_mc_se"


def _monte_carlo_se_at(rows: pd.DataFrame, delta: float, column: str) -> float:
    """The limit's Monte Carlo SE at the evaluated delta nearest ``delta`` (NaN without the column)."""
    if column not in rows.columns or rows.empty:
        return float("nan")
    nearest = (rows["delta"] - delta).abs().to_numpy().argmin()
    return float(rows[column].iloc[nearest])


def find_tipping_point(grid: pd.DataFrame, term: str, evaluate: Optional[Callable[[float], Tuple[float, float]]],
                       *, null: float = 0.0, tolerance: Optional[float] = None, max_evaluations: int = 8,
                       side: str = "positive",
                       monte_carlo_se: Optional[Callable[[float, str], float]] = None) -> TippingPoint:
    """Locate the delta at which the term's CI first reaches the null, moving away from delta = 0.

    Parameters
    ----------
    grid : rows for this term with delta, ci_lower, ci_upper (one per grid delta; must include 0),
        and optionally ci_lower_mc_se and ci_upper_mc_se (see :func:`with_monte_carlo_se`).
    term : the exposure term (for the result).
    evaluate : delta -> (ci_lower, ci_upper) at a new delta, for the root search; None keeps
        the grid answer, refined by linear interpolation of the margin between the two grid points.
    null : the null value on the model's scale (0 for differences and log ratios).
    tolerance : the root search stops when the bracket is this narrow (default: a tenth of
        the bracketing grid step, or half the tipping point's Monte Carlo SE when that is
        larger: a finer search would only chase noise).
    max_evaluations : cap on extra imputation runs.
    side : "positive" (deltas above 0) or "negative" (below 0).
    monte_carlo_se : (delta, column) -> that Monte Carlo SE column at a searched delta (for
        the tipping point's own SE); None uses the grid's values only.

    Returns
    -------
    TippingPoint, with the Monte Carlo SE of the tipping point (:func:`tipping_monte_carlo_se`:
    the SE of the limit that reaches the null, at the evaluated delta nearest the tipping
    point, over the limit's slope between the bracketing grid points).

    References
    ----------
    Brent RP (1973). Algorithms for Minimization without Derivatives. Prentice-Hall (root search).
    White IR, Royston P, Wood AM (2011). Stat Med 30:377-399.
    """
    rows = grid.sort_values("delta")
    zero = rows[np.isclose(rows["delta"], 0.0)]
    if zero.empty:
        raise InputError("the grid must include 0 (missing at random) to find a tipping point", option="delta")
    baseline = conclusion_of(float(zero["ci_lower"].iloc[0]), float(zero["ci_upper"].iloc[0]), null)
    chosen = rows[rows["delta"] >= 0] if side == "positive" else rows[rows["delta"] <= 0].iloc[::-1]
    deltas = chosen["delta"].to_numpy(dtype=float)
    margins = np.array([conclusion_margin(lo, hi, baseline, null)
                        for lo, hi in zip(chosen["ci_lower"], chosen["ci_upper"])])
    span = (float(rows["delta"].min()), float(rows["delta"].max()))
    crossed = np.flatnonzero(margins <= 0)
    crossed = crossed[crossed > 0]
    if len(crossed) == 0:
        return TippingPoint(term, side, baseline, False, float("nan"), (float("nan"), float("nan")), span, 0)
    k = int(crossed[0])
    a, b = float(deltas[k - 1]), float(deltas[k])
    ma, mb = float(margins[k - 1]), float(margins[k])
    slope = (mb - ma) / (b - a)
    upper_k, lower_k = float(chosen["ci_upper"].iloc[k]), float(chosen["ci_lower"].iloc[k])
    column = _limit_column(baseline, upper_crossed=upper_k - null <= null - lower_k)
    bracket_rows = chosen.iloc[[k - 1, k]]
    grid_se = (tipping_monte_carlo_se(float(bracket_rows[column].max()), slope) if column in bracket_rows.columns
               else float("nan"))
    if evaluate is None or mb == 0:
        root = a + (b - a) * ma / (ma - mb) if ma != mb else b
        se = tipping_monte_carlo_se(_monte_carlo_se_at(chosen, root, column), slope)
        return TippingPoint(term, side, baseline, True, float(root), (min(a, b), max(a, b)), span, 0,
                            monte_carlo_se=se)
    if tolerance is None:
        tolerance = max(abs(b - a) / 10, grid_se / 2 if math.isfinite(grid_se) else 0.0)
    extra: List[dict] = []

    def margin(delta: float) -> float:
        lo, hi = evaluate(delta)
        row = {"delta": delta, "ci_lower": lo, "ci_upper": hi}
        if monte_carlo_se is not None:
            row[column] = monte_carlo_se(delta, column)
        extra.append(row)
        return conclusion_margin(lo, hi, baseline, null)

    # Common random numbers make the margin a smooth-enough function of delta for Brent's method;
    # if it is not monotone between the grid points the search still ends inside the bracket.
    root, info = optimize.brentq(margin, a, b, xtol=tolerance, maxiter=max_evaluations, full_output=True, disp=False)
    lo_b, hi_b = sorted((a, b))
    evaluated = pd.concat([chosen, pd.DataFrame(extra)], ignore_index=True) if extra else chosen
    se = tipping_monte_carlo_se(_monte_carlo_se_at(evaluated, float(root), column), slope)
    # brentq first re-evaluates both grid ends (answered from the caller's cache, not new runs).
    return TippingPoint(term, side, baseline, True, float(root), (lo_b, hi_b), span, max(0, len(extra) - 2),
                        extra=pd.DataFrame(extra), monte_carlo_se=se)


def _amount(delta: float, monte_carlo_se: float, variable: str, unit: Optional[str], variable_type: str) -> str:
    """'2.7 %', '2.7 units of hba1c' or '1.2 on the log-odds scale (odds ratio 3.3)', from |delta|."""
    size = abs(delta)
    shown = rounded_delta(size, monte_carlo_se)
    if variable_type == "binary":
        return f"{shown} on the log-odds scale (odds ratio {math.exp(float(shown)):.3g})"
    if unit:
        return quantity(shown, unit)
    return f"{shown} (in the units of {variable}; variables.{variable}.unit names them)"


def _shifted_values(variable: str, group: str, by: Optional[str]) -> str:
    if by is None:
        return f"all missing values of {variable}"
    return f"the missing values of {variable} in the {by} = {group} group only (other groups as imputed under MAR)"


def tipping_statement(point: TippingPoint, *, variable: str, group: str, by: Optional[str], variable_type: str,
                      exposure_label: str, unit: Optional[str] = None, m: Optional[int] = None) -> str:
    """The tipping point in words: which values are shifted, which way, by how much in the variable's unit.

    E.g. 'The conclusion (arm[T.sms] below the null) holds unless the missing values of
    hba1c_12m in the arm = sms group only (...) are on average 0.8 % higher than imputed under
    missing at random (Monte Carlo SE 0.03 with m = 30).'

    Parameters
    ----------
    point : TippingPoint
        The tipping point found (or not), with its Monte Carlo SE.
    variable : str
        The variable shifted.
    group : str
        The group whose missing values are shifted (or all).
    by : str, optional
        The grouping column.
    variable_type : str
        The shifted variable's type (units or log-odds).
    exposure_label : str
        The exposure as a reader names it.
    unit : str, optional
        The variable's unit (``variables.<name>.unit``).
    m : int, optional
        The imputations per grid point, named with the Monte Carlo SE.

    Returns
    -------
    str
    """
    where = _shifted_values(variable, group, by)
    direction = "higher" if point.side == "positive" else "lower"
    held = {"above": f"{exposure_label} above the null", "below": f"{exposure_label} below the null",
            "includes": f"no clear effect of {exposure_label}"}[point.baseline]
    if not point.found:
        edge = point.grid_range[1] if point.side == "positive" else point.grid_range[0]
        return (f"The conclusion ({held}) holds over the whole grid: {where} would have to be on average more than "
                f"{_amount(edge, float('nan'), variable, unit, variable_type)} {direction} than imputed under "
                "missing at random to change it.")
    precision = ""
    with_m = f" with m = {m}" if m else ""
    if math.isfinite(point.monte_carlo_se):
        precision = f" (Monte Carlo SE {point.monte_carlo_se:.1g}{with_m})"
    if point.delta != 0 and float(rounded_delta(abs(point.delta), point.monte_carlo_se)) == 0:
        # Rounded to its Monte Carlo error the tipping point reads 0 ('on average 0 higher'), which says the
        # opposite of what was found: a shift tips it, but the imputations cannot tell how small a shift does.
        return (f"The conclusion ({held}) changes when {where} are on average about "
                f"{_amount(point.delta, float('nan'), variable, unit, variable_type)} {direction} than imputed "
                f"under missing at random, but that tipping point has a Monte Carlo SE of "
                f"{point.monte_carlo_se:.1g}{with_m}, larger than itself: it cannot be told from no shift at all, "
                "so the conclusion is fragile; more imputations per delta (sensitivity.m) would locate it.")
    return (f"The conclusion ({held}) holds unless {where} are on average "
            f"{_amount(point.delta, point.monte_carlo_se, variable, unit, variable_type)} {direction} than imputed "
            f"under missing at random{precision}.")


def alike_shift_sentence(data: pd.DataFrame, impute_mask: pd.DataFrame, *, variable: str, exposure: str) -> str:
    """Why shifting every group's missing values alike barely moves a between-group contrast.

    Adding delta to every imputed value of the outcome, whatever the exposure group, moves
    the groups' means by delta times their shares of imputed values; their difference moves
    by delta times the difference in shares (exactly for a linear model without other
    covariates, approximately otherwise), so not at all when the shares are equal.
    Returns '' when the exposure is not a grouping column of ``data``.
    """
    if exposure not in data.columns or variable not in impute_mask.columns:
        return ""
    groups = data[exposure]
    levels = list(groups.cat.categories) if isinstance(groups.dtype, pd.CategoricalDtype) else \
        sorted(groups.dropna().unique())
    if not 2 <= len(levels) <= 20:
        return ""
    missing = impute_mask[variable].to_numpy(dtype=bool)
    if not missing.any():
        return ""
    unknown = int((groups.isna().to_numpy() & missing).sum())
    shares, any_share = [], False
    for level in levels:
        inside = (groups == level).to_numpy()
        any_share = any_share or bool(missing[inside].any())
        shares.append(f"{level_text(level)} {100 * missing[inside].mean():.1f}%" if inside.any()
                      else f"{level_text(level)} none")
    if not any_share and unknown:
        # Every shifted value sits in a row whose exposure is missing too: 'shares (A 0.0%, B 0.0%)' read as
        # if nothing were shifted, while each imputed dataset places those rows in the groups it imputes.
        return (f"The missing values of {variable} are all in rows whose {exposure} is missing too "
                f"({counted(unknown, 'row')}), so no {exposure} group has missing values of its own: shifting them "
                f"alike moves the {exposure} comparison only through the {exposure} each imputed dataset gives those "
                f"rows (by about delta times the difference between the groups' shares of them). So that curve shows "
                f"how the overall level depends on the missing-at-random assumption, not the comparison.")
    also = f"; and {counted(unknown, 'row')} whose {exposure} is missing too" if unknown else ""
    return (f"Shifting the missing values of {variable} in every {exposure} group alike moves the {exposure} "
            f"comparison only through the groups' different shares of missing values ({', '.join(shares)}{also}): "
            "by about delta times the difference in shares, and not at all when the shares are equal. So that curve "
            "shows how the overall level depends on the missing-at-random assumption, not the comparison; the curves "
            f"that shift one {exposure} group test the comparison.")


# ---------------------------------------------------------------------------
# the whole analysis

@dataclass(frozen=True)
class DeltaResult:
    """The delta-adjusted estimates and the tipping points.

    ``curves`` has the ``sensitivity_delta.csv`` columns plus std_error, df and
    ``evaluated_by`` (grid or root_search); ``tipping_points`` has the ``tipping_point.csv``
    columns, and ``sentences`` their statements.
    """

    curves: pd.DataFrame
    tipping_points: pd.DataFrame
    series: Tuple[DeltaSeries, ...]
    terms: Tuple[str, ...]
    alpha: float
    null: float = 0.0
    sentences: Tuple[str, ...] = ()

    def tables(self) -> Dict[str, pd.DataFrame]:
        """``sensitivity_delta`` and ``tipping_point``."""
        return {"sensitivity_delta": self.curves, "tipping_point": self.tipping_points}


def delta_analysis(evaluate: Evaluate, *, series: Sequence[DeltaSeries], terms: Sequence[str], alpha: float = 0.05,
                   refine: bool = True, tolerance: Optional[float] = None, max_evaluations: int = 6,
                   types: Optional[Mapping[str, str]] = None, both_sides: bool = False,
                   units: Optional[Mapping[str, str]] = None, m: Optional[int] = None) -> DeltaResult:
    """Run every delta of every series, pool, and find each exposure term's tipping point.

    Parameters
    ----------
    evaluate : (series, delta) -> pooled estimates table (see :func:`imputation_evaluator`).
    series : from :func:`delta_series`.
    terms : the exposure's model terms.
    alpha : 1 - confidence level; the CI is recomputed at this level.
    refine : root search between the bracketing grid points (extra imputation runs).
    tolerance : width at which the root search stops (default: see :func:`find_tipping_point`).
    max_evaluations : cap on extra imputation runs per tipping point.
    types : {column: type}, for the wording (log-odds scale for binary variables).
    both_sides : also search below delta = 0 (always done when the grid has negative deltas).
    units : {column: unit} for the wording (e.g. {"hba1c_12m": "%"}).
    m : imputations per delta, for the wording and the ``m`` column.

    Returns
    -------
    DeltaResult.

    References
    ----------
    Carpenter JR, Kenward MG (2013). Multiple Imputation and its Application. Wiley, chapter 10.
    """
    types = dict(types or {})
    units = dict(units or {})
    terms = list(terms)
    if not terms:
        raise InputError("no exposure term to follow across deltas", option="exposure")
    frames: List[pd.DataFrame] = []
    tipping_rows: List[dict] = []
    unshifted: Dict[str, pd.DataFrame] = {}  # delta = 0 is the same imputation for every series of a variable
    for s in series:
        cache: Dict[float, pd.DataFrame] = {}

        def run(delta: float, how: str, s: DeltaSeries = s, cache: Dict[float, pd.DataFrame] = cache) -> pd.DataFrame:
            if delta not in cache:
                if delta == 0 and s.variable in unshifted:
                    table = unshifted[s.variable]
                else:
                    table = interval(evaluate(s, delta), alpha)
                    if delta == 0:
                        unshifted[s.variable] = table
                missing = [t for t in terms if t not in set(table["term"])]
                if missing:
                    raise InputError(f"{', '.join(missing)} is not a term of the pooled model", option="exposure")
                cache[delta] = table[table["term"].isin(terms)].assign(
                    variable=s.variable, group=s.group, delta=float(delta), evaluated_by=how)
            return cache[delta]

        for delta in s.deltas:
            run(delta, "grid")
        grid = pd.concat([cache[d] for d in s.deltas], ignore_index=True)
        sides = ["positive"] + (["negative"] if both_sides or min(s.deltas) < 0 else [])
        if max(s.deltas) <= 0:
            sides = ["negative"]
        for term in terms:
            term_grid = grid[grid["term"] == term]
            for side in sides:
                def searched(delta: float, term: str = term) -> pd.Series:
                    row = run(float(delta), "root_search")
                    return row[row["term"] == term].iloc[0]

                def bounds(delta: float) -> Tuple[float, float]:
                    row = searched(delta)
                    return float(row["ci_lower"]), float(row["ci_upper"])

                def spread(delta: float, column: str) -> float:
                    row = searched(delta)
                    return float(row[column]) if column in row.index else float("nan")

                point = find_tipping_point(term_grid, term, bounds if refine else None, null=0.0, tolerance=tolerance,
                                           max_evaluations=max_evaluations, side=side, monte_carlo_se=spread)
                statement = tipping_statement(point, variable=s.variable, group=s.group, by=s.by,
                                              variable_type=types.get(s.variable, ""), exposure_label=term,
                                              unit=units.get(s.variable), m=m)
                tipping_rows.append({
                    "variable": s.variable, "group": s.group, "term": term, "side": side,
                    "baseline_conclusion": point.baseline, "found": point.found, "tipping_delta": point.delta,
                    "monte_carlo_se": point.monte_carlo_se,
                    "bracket_lower": point.bracket[0], "bracket_upper": point.bracket[1],
                    "grid_min": point.grid_range[0], "grid_max": point.grid_range[1],
                    "evaluations": point.evaluations, "m": m if m is not None else 0, "statement": statement})
        frames.append(pd.concat(list(cache.values()), ignore_index=True))
    table = pd.concat(frames, ignore_index=True).sort_values(["variable", "group", "term", "delta"], kind="stable")
    extra = [c for c in ("std_error", "df", "monte_carlo_se", "ci_lower_mc_se", "ci_upper_mc_se", "evaluated_by")
             if c in table.columns]
    table = table[list(DELTA_COLUMNS) + extra].reset_index(drop=True)
    tipping = pd.DataFrame(tipping_rows, columns=list(TIPPING_COLUMNS))
    return DeltaResult(curves=table, tipping_points=tipping, series=tuple(series), terms=tuple(terms), alpha=alpha,
                       sentences=tuple(tipping["statement"]))


# ---------------------------------------------------------------------------
# every strategy side by side

@dataclass(frozen=True)
class StrategyAndDelta:
    """The exposure effect under each strategy and each delta-adjusted imputation, in a table and in words."""

    comparison: pd.DataFrame
    sentences: Tuple[str, ...]
    changes: bool

    def tables(self) -> Dict[str, pd.DataFrame]:
        """``sensitivity_comparison``."""
        return {"sensitivity_comparison": self.comparison}


def compare_with_deltas(estimates: Optional[pd.DataFrame], result: DeltaResult, *,
                        null: float = 0.0) -> StrategyAndDelta:
    """Put complete case, missing category, multiple imputation and the delta-adjusted runs in one table.

    Parameters
    ----------
    estimates : ``estimates.csv`` (None when no other strategy has run).
    result : the delta analysis.
    null : the null value on the model's scale.

    Returns
    -------
    StrategyAndDelta whose comparison has analysis, variable, group, delta, term, estimate,
    ci_lower, ci_upper, p_value, conclusion; the sentence says whether the conclusion changes.
    """
    rows: List[pd.DataFrame] = []
    if estimates is not None and len(estimates):
        base = estimates[estimates["term"].isin(result.terms)]
        rows.append(pd.DataFrame({
            "analysis": base["strategy"].to_numpy(), "variable": "", "group": "", "delta": np.nan,
            "term": base["term"].to_numpy(), "estimate": base["estimate"].to_numpy(),
            "ci_lower": base["ci_lower"].to_numpy(), "ci_upper": base["ci_upper"].to_numpy(),
            "p_value": base["p_value"].to_numpy()}))
    grid = result.curves[result.curves["evaluated_by"] == "grid"] if "evaluated_by" in result.curves.columns \
        else result.curves
    rows.append(pd.DataFrame({
        "analysis": [f"delta_adjusted ({v}{'' if g == ALL_GROUPS else ', ' + g} {d:+g})"
                     for v, g, d in zip(grid["variable"], grid["group"], grid["delta"])],
        "variable": grid["variable"].to_numpy(), "group": grid["group"].to_numpy(),
        "delta": grid["delta"].to_numpy(), "term": grid["term"].to_numpy(), "estimate": grid["estimate"].to_numpy(),
        "ci_lower": grid["ci_lower"].to_numpy(), "ci_upper": grid["ci_upper"].to_numpy(),
        "p_value": grid["p_value"].to_numpy()}))
    table = pd.concat(rows, ignore_index=True)
    table["conclusion"] = [conclusion_of(lo, hi, null) for lo, hi in zip(table["ci_lower"], table["ci_upper"])]
    words = {"above": "above the null", "below": "below the null", "includes": "including the null"}
    sentences = []
    changes = False
    for term, part in table.groupby("term", sort=False):
        found = list(dict.fromkeys(part["conclusion"]))
        if len(found) == 1:
            sentences.append(f"For {term} the conclusion is the same under every analysis ({len(part)} analyses, "
                             f"every interval {words[found[0]]}).")
        else:
            changes = True
            counts = part["conclusion"].value_counts()
            differing = part[part["conclusion"] != part["conclusion"].iloc[0]]["analysis"].tolist()
            shown = ", ".join(differing[:4]) + (f" and {len(differing) - 4} more" if len(differing) > 4 else "")
            sentences.append(f"For {term} the conclusion changes across analyses: "
                             + ", ".join(f"{n} with the interval {words[c]}" for c, n in counts.items())
                             + f" (differing from {part['analysis'].iloc[0]}: {shown}).")
    sentences.append(f"{MAR_CAUTION} The delta-adjusted rows show how the answer depends on that assumption.")
    return StrategyAndDelta(comparison=table, sentences=tuple(sentences), changes=changes)


# ---------------------------------------------------------------------------
# the stage in one call

@dataclass(frozen=True)
class SensitivityResult:
    """The sensitivity stage: the delta curves with their tipping points, and every analysis side by side.

    ``sentences`` describe the set-up (model, exposure terms, imputation per delta, grids),
    or why the stage had nothing to shift (its tables are then empty).
    """

    deltas: DeltaResult
    comparison: StrategyAndDelta
    m: int
    sentences: Tuple[str, ...] = ()

    def tables(self) -> Dict[str, pd.DataFrame]:
        """``sensitivity_delta``, ``tipping_point`` and ``sensitivity_comparison``."""
        return {**self.deltas.tables(), **self.comparison.tables()}

    def skipped(self) -> bool:
        """True when no variable of the analysis model had a missing value to shift."""
        return not self.deltas.series


def default_variable(plan: ImputationPlan) -> Optional[str]:
    """The variable to shift when the params name none.

    The outcome when it has values to impute; otherwise the analysis-model variable with
    the most values to impute (the first in the formula on a tie); None when every
    analysis-model variable is complete (nothing rests on missing at random).
    """
    if getattr(plan, "survival", None) is not None:
        # A time-to-event model: its follow-up time is never imputed, so only covariates can be shifted; None when
        # none can be (every covariate complete, or imputed by a method a delta cannot shift): the stage says why.
        return plan.delta_default()
    counts = {name: int(plan.impute_mask[name].sum()) for name in plan.model_columns if name in plan.impute_mask}
    if counts.get(plan.outcome, 0) > 0:
        return plan.outcome
    incomplete = [(n, name) for name, n in counts.items() if n > 0]
    if not incomplete:
        return None
    most = max(n for n, _ in incomplete)
    return next(name for n, name in incomplete if n == most)


def nothing_to_shift(plan: ImputationPlan) -> str:
    """Why the delta adjustment has nothing to shift when no variable is named, in one sentence.

    Parameters
    ----------
    plan : ImputationPlan
        The imputation plan the stage would shift.

    Returns
    -------
    str
        The sentence the stage shows (and ``check`` prints) when it skips the delta adjustment.
    """
    skipped = "the delta-adjustment analysis was skipped."
    if getattr(plan, "survival", None) is None:
        return ("Nothing to shift: every variable of the analysis model is complete, so no result rests on an "
                f"assumption about why values are missing; {skipped}")
    survival = plan.survival
    left_out = survival.n_left_out()
    follow_up = (f"the {plan.model.family} model's follow-up time ({survival.time}) and event status "
                 f"({survival.event.column}) are never imputed"
                 + (f" (the {left_out:,} rows lacking one of them are left out of every analysis, which no delta "
                    "here can change)" if left_out else ""))
    incomplete = plan.incomplete_covariates()
    if not incomplete:
        return (f"Nothing to shift: no covariate of the {plan.model.family} model has a missing value, and "
                f"{follow_up}; so no covariate value rests on an assumption about why it is missing; {skipped}")
    methods = ", ".join(f"{c} ({plan.methods.get(c, '')})" for c in incomplete)
    return (f"Nothing to shift: {follow_up}, and the incomplete covariates are imputed by methods a delta cannot "
            f"shift ({methods}; a delta shifts values imputed by {', '.join(DELTA_METHODS)}); {skipped}")


def check_series(plan: ImputationPlan, series: Sequence[DeltaSeries], *, option: Optional[str] = None) -> None:
    """Refuse a series the imputation cannot shift, before any imputation runs.

    Raises InputError (option ``delta.<variable>``, or ``option`` when given) when the
    variable is not in the imputation, has no value to impute, is imputed by a method delta
    adjustment does not apply to, or its grouping column is not in the imputation data.
    """
    named = option
    for s in series:
        option = named or f"delta.{s.variable}"
        if s.variable not in plan.data.columns:
            raise InputError(f"'{s.variable}' is not imputed (the imputation holds the analysis-model variables and "
                             f"the auxiliary ones: {', '.join(plan.data.columns)})", option=option)
        to_impute = int(plan.impute_mask[s.variable].sum())
        if to_impute == 0:
            raise InputError(f"'{s.variable}' has no missing value to shift; name an incomplete variable "
                             "(or leave the sensitivity section out to shift the default one)", option=option)
        method = plan.methods.get(s.variable, "")
        if method not in DELTA_METHODS:
            raise InputError(f"delta adjustment applies to variables imputed by {', '.join(DELTA_METHODS)}; "
                             f"'{s.variable}' is imputed by '{method}'", option=option)
        if s.by is not None and s.by not in plan.data.columns:
            raise InputError(f"grouping column '{s.by}' is not in the imputation; add it to imputation.auxiliary",
                             option=f"delta.{s.variable}.by")


def plan_series(plan: ImputationPlan, data: pd.DataFrame, *, variable: Optional[str] = None,
                grids: Optional[Mapping[str, Union[Sequence[float], DeltaSpec]]] = None,
                types: Optional[Mapping[str, str]] = None) -> Tuple[DeltaSeries, ...]:
    """:func:`delta_series` for an imputation plan, checked by :func:`check_series`; () when nothing can be shifted.

    With neither ``variable`` nor ``grids`` the variable is :func:`default_variable`.
    """
    named = "variable" if not grids and variable is not None else None
    if not grids and variable is None:
        variable = default_variable(plan)
        if variable is None:
            return ()
    series = delta_series(data, outcome=plan.outcome, variable=variable, grids=grids, types=types)
    check_series(plan, series, option=named)
    return series


def sensitivity_analysis(plan: ImputationPlan, *, series: Sequence[DeltaSeries], m: Optional[int] = None,
                         estimates: Optional[pd.DataFrame] = None, refine: bool = True,
                         units: Optional[Mapping[str, str]] = None) -> SensitivityResult:
    """Delta-adjusted imputation over every grid, tipping points, and every analysis side by side.

    Parameters
    ----------
    plan : the study's imputation plan (:func:`gapbook.impute.plan_imputation`); its seed is
        used for every delta, so the curves show the effect of delta, not Monte Carlo noise.
    series : from :func:`plan_series`; empty when nothing can be shifted (the result then
        says why and holds no tables).
    m : imputations per delta (default the plan's m: with the plan's seed, delta = 0 is then
        exactly the imputation stage's estimate; a smaller m is cheaper and the sentences say
        that delta = 0 then differs from it by Monte Carlo error).
    estimates : the record's ``estimates.csv`` for the side-by-side comparison (None when no
        other strategy has run).
    refine : root search for the tipping point between grid points.
    units : {variable: unit} for the wording of the tipping points.

    Returns
    -------
    SensitivityResult.

    References
    ----------
    Carpenter JR, Kenward MG (2013). Multiple Imputation and its Application. Wiley, chapter 10.
    White IR, Royston P, Wood AM (2011). Stat Med 30:377-399.
    """
    model = plan.model
    main_m = plan.settings.m
    m = main_m if m is None else m
    if not series:
        empty = DeltaResult(curves=pd.DataFrame(columns=list(DELTA_COLUMNS)),
                            tipping_points=pd.DataFrame(columns=list(TIPPING_COLUMNS)), series=(), terms=(),
                            alpha=model.alpha)
        comparison = StrategyAndDelta(comparison=pd.DataFrame(columns=list(COMPARISON_COLUMNS)), sentences=(),
                                      changes=False)
        return SensitivityResult(deltas=empty, comparison=comparison, m=m, sentences=(nothing_to_shift(plan),))
    terms = exposure_terms(model.fit(plan.data).terms, model.exposure)
    deltas = delta_analysis(plan_evaluator(plan, m=m), series=series, terms=terms, alpha=model.alpha,
                            refine=refine, types=plan.types, units=units, m=m)
    deltas = _with_alike_explanation(deltas, plan)
    grids = "; ".join(f"{s.variable}" + ("" if s.by is None else f" in {s.by} = {s.group}")
                      + f": {', '.join(f'{d:g}' for d in s.deltas)}" for s in series)
    runs = f"m = {m}, {plan.settings.iterations} iterations, seed {plan.settings.seed}"
    if m == main_m:
        per_delta = (f"Imputation per delta: {runs}, as in the imputation stage, so the delta = 0 rows are the main "
                     "multiple-imputation estimate exactly.")
    else:
        per_delta = (f"Imputation per delta: {runs} (sensitivity.m), {'fewer' if m < main_m else 'more'} than the "
                     f"imputation stage's m = {main_m}: the delta = 0 rows differ from the main multiple-imputation "
                     "estimate by Monte Carlo error, and the tipping points carry that error (their Monte Carlo SE).")
    sentences = (f"Analysis model: {model.formula}; exposure term(s): {', '.join(terms)}.", per_delta,
                 f"Grids: {grids}.")
    return SensitivityResult(deltas=deltas, comparison=compare_with_deltas(estimates, deltas), m=m,
                             sentences=sentences)


def _with_alike_explanation(deltas: DeltaResult, plan: ImputationPlan) -> DeltaResult:
    """Add :func:`alike_shift_sentence` to the statements of curves that shift every group of the outcome alike."""
    exposure = plan.model.exposure
    if exposure is None:
        return deltas
    tipping = deltas.tipping_points.copy()
    alike = (tipping["group"] == ALL_GROUPS) & (tipping["variable"] == plan.outcome)
    if not alike.any():
        return deltas
    extra = alike_shift_sentence(plan.data, plan.impute_mask, variable=plan.outcome, exposure=exposure)
    if not extra:
        return deltas
    tipping.loc[alike, "statement"] = tipping.loc[alike, "statement"] + " " + extra
    return dataclasses.replace(deltas, tipping_points=tipping, sentences=tuple(tipping["statement"]))
