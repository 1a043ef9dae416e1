"""Evidence on the missingness mechanism: group comparisons, Little's test, missingness models.

What the data can and cannot say: a test can give evidence *against* "missing completely
at random" (MCAR) by showing that missingness is related to observed values. No test on
the observed data can tell "missing at random" (MAR) from "missing not at random" (MNAR),
because that would need the values that are missing. Every sentence this module writes
(:func:`summary_sentences`) keeps to that wording and points to the sensitivity stage.

Three pieces of evidence:

1. :func:`compare_groups` compares each variable between the rows where an incomplete
   variable is missing and the rows where it is observed (Welch t-test, chi-square or
   Fisher's exact test, standardised differences, Holm-adjusted p-values).
2. Little's (1988) test (:func:`gapbook.little.little_mcar_test`) on maximum-likelihood
   estimates from the EM algorithm for the multivariate normal; this module chooses its
   variables (:func:`mcar_test_data`).
3. :func:`missingness_models` fits a logistic regression of each missingness indicator
   on the fully observed variables, with odds ratios and the area under the ROC curve.

"Not applicable" cells (outside a variable's ``applies_if`` condition) are neither
missing nor observed: they are left out of every comparison.
"""
from __future__ import annotations

import dataclasses
import warnings
from dataclasses import dataclass
from typing import Any, Dict, List, Mapping, Optional, Sequence, Tuple

import numpy as np
import pandas as pd
from scipy import stats

from .errors import InputError, did_you_mean
from .expressions import FORMULA_NAMESPACE, ColumnAliases
from .intake import Study, levels_of
from .inference import format_p, standardised_difference, standardised_difference_of_shares, wald_inference
from .little import LittleTest, little_mcar_test
from .text import level_text
from .vocabulary import MAR_CAUTION, NUMBER_CODED_TYPES, NUMERIC_TYPES, PLAN_CAUTION, SENSITIVITY_POINTER, infer_type

__all__ = ["GroupComparison", "compare_groups", "mcar_test_data", "MissingnessModels", "fit_missingness_model",
           "missingness_models", "mcar_sentence", "model_sentences", "MechanismResult", "assess_mechanism",
           "assess_study"]

QUANTILE_GRID = np.linspace(0.0, 1.0, 101)
MIN_EXPECTED_COUNT = 5.0  # Cochran (1954): chi-square is unreliable below 5 expected per cell

GROUP_COLUMNS = ("incomplete_variable", "compared_variable", "test", "statistic", "df", "p_value", "p_adjusted",
                 "smd", "n_missing_group", "n_observed_group", "mean_missing_group", "mean_observed_group",
                 "distribution_missing_group", "distribution_observed_group", "evidence", "note")
MODEL_COLUMNS = ("incomplete_variable", "term", "coefficient", "std_error", "odds_ratio", "ci_lower", "ci_upper",
                 "p_value", "auc", "lr_p_value", "n_used", "n_missing", "note")


# ---------------------------------------------------------------------------
# small helpers

def _missing_frame(data: pd.DataFrame, missing: Optional[pd.DataFrame]) -> pd.DataFrame:
    return data.isna() if missing is None else missing.reindex(columns=data.columns, fill_value=False)


def _not_applicable_frame(data: pd.DataFrame, not_applicable: Optional[pd.DataFrame]) -> pd.DataFrame:
    if not_applicable is None:
        return pd.DataFrame(False, index=data.index, columns=data.columns)
    return not_applicable.reindex(columns=data.columns, fill_value=False)


def _type_of(types: Mapping[str, str], column: str, values: pd.Series) -> str:
    """The declared type, else the one rule of :func:`gapbook.vocabulary.infer_type`."""
    return types.get(column) or infer_type(values)[0]


def _listing(items: Sequence[str]) -> str:
    """'a', 'a and b', 'a, b and c'."""
    items = list(items)
    return items[0] if len(items) == 1 else ", ".join(items[:-1]) + " and " + items[-1]


def binary_codes(values: pd.Series) -> pd.Series:
    """A binary variable as 0/1 floats (second level = 1); numbers already 0/1 stay as they are."""
    if isinstance(values.dtype, pd.CategoricalDtype):
        codes = values.cat.codes.to_numpy().astype(float)
        codes[codes < 0] = np.nan
        return pd.Series(codes, index=values.index, name=values.name)
    numbers = values.astype(float)
    levels = sorted(numbers.dropna().unique())
    if levels and set(levels) <= {0.0, 1.0}:
        return numbers
    # Other two-valued codings (e.g. 1/2): the larger value becomes 1.
    return numbers.map({v: float(i) for i, v in enumerate(levels)}).astype(float)


# ---------------------------------------------------------------------------
# 1. group comparisons

@dataclass(frozen=True)
class GroupComparison:
    """Each variable compared between rows with an incomplete variable missing and observed.

    ``comparisons`` is ``mechanism_groups.csv``. ``quantiles`` (continuous compared variables:
    incomplete_variable, compared_variable, group, probability, value) and ``level_shares``
    (categorical: incomplete_variable, compared_variable, group, level, count, share) hold
    the two distributions for figures; ``group`` is "missing" or "observed".
    """

    comparisons: pd.DataFrame
    quantiles: pd.DataFrame
    level_shares: pd.DataFrame
    alpha: float
    sentences: Tuple[str, ...] = ()
    min_missing: int = 10

    def tables(self) -> Dict[str, pd.DataFrame]:
        """``mechanism_groups``."""
        return {"mechanism_groups": self.comparisons}

    def strongest(self, top: int = 6) -> pd.DataFrame:
        """The rows with the smallest p-values (ranked on the unadjusted p, whose order Holm keeps but
        whose ties at 1 it does not make; further ties broken by the larger |SMD|)."""
        tested = self.comparisons[self.comparisons["p_adjusted"].notna()]
        order = tested.assign(_abs=tested["smd"].abs().fillna(0.0)).sort_values(
            ["p_value", "_abs"], ascending=[True, False], kind="stable")
        return order.drop(columns="_abs").head(top).reset_index(drop=True)


def _empty_row(v: str, w: str, n1: int, n0: int, note: str) -> Dict[str, Any]:
    return {"incomplete_variable": v, "compared_variable": w, "test": "not tested", "statistic": np.nan,
            "df": np.nan, "p_value": np.nan, "smd": np.nan, "n_missing_group": n1, "n_observed_group": n0,
            "mean_missing_group": np.nan, "mean_observed_group": np.nan, "distribution_missing_group": "",
            "distribution_observed_group": "", "note": note}


def _too_few(n1: int, n0: int, min_missing: int) -> bool:
    """Both groups hold values, but one has fewer than ``min_missing``: a difference there is mostly noise."""
    return 0 < min(n1, n0) < min_missing


def _too_few_note(v: str, w: str, n1: int, n0: int, min_missing: int) -> str:
    return (f"too few to compare: {n1} rows where {v} is missing and {n0} where it is observed have a value of "
            f"{w}; at least {min_missing} of each are needed (mechanism.min_missing)")


def _compare_continuous(v: str, w: str, x1: np.ndarray, x0: np.ndarray, min_missing: int) -> Dict[str, Any]:
    n1, n0 = len(x1), len(x0)
    if _too_few(n1, n0, min_missing):
        row = _empty_row(v, w, n1, n0, _too_few_note(v, w, n1, n0, min_missing))
    elif n1 < 2 or n0 < 2:
        row = _empty_row(v, w, n1, n0, f"fewer than 2 values of {w} in a group")
    elif np.var(x1) == 0 and np.var(x0) == 0:
        row = _empty_row(v, w, n1, n0, f"{w} does not vary within either group")
    else:
        # Welch's t-test: the two groups need not share a variance (Welch 1947, Biometrika 34:28).
        result = stats.ttest_ind(x1, x0, equal_var=False)
        row = _empty_row(v, w, n1, n0, "")
        row.update(test="Welch t-test", statistic=float(result.statistic), df=float(result.df),
                   p_value=float(result.pvalue),
                   smd=standardised_difference(np.mean(x1), np.var(x1, ddof=1), np.mean(x0), np.var(x0, ddof=1)))
    row.update(mean_missing_group=float(np.mean(x1)) if n1 else np.nan,
               mean_observed_group=float(np.mean(x0)) if n0 else np.nan,
               distribution_missing_group=_mean_sd_text(x1), distribution_observed_group=_mean_sd_text(x0))
    return row


def _mean_sd_text(x: np.ndarray) -> str:
    if len(x) == 0:
        return ""
    if len(x) == 1:
        return f"mean {x[0]:.4g}"
    return f"mean {np.mean(x):.4g} (SD {np.std(x, ddof=1):.3g})"


def _shares_text(levels: Sequence[Any], counts: np.ndarray) -> str:
    total = counts.sum()
    if total == 0:
        return ""
    return ", ".join(f"{level_text(level)} {100 * c / total:.1f}%" for level, c in zip(levels, counts))


def _compare_categorical(v: str, w: str, g1: pd.Series, g0: pd.Series, levels: Sequence[Any],
                         min_missing: int) -> Dict[str, Any]:
    c1 = np.array([(g1 == level).sum() for level in levels], dtype=float)
    c0 = np.array([(g0 == level).sum() for level in levels], dtype=float)
    n1, n0 = int(c1.sum()), int(c0.sum())
    keep = (c1 + c0) > 0
    kept_levels = [lv for lv, k in zip(levels, keep) if k]
    table = np.vstack([c1[keep], c0[keep]])
    if _too_few(n1, n0, min_missing):
        row = _empty_row(v, w, n1, n0, _too_few_note(v, w, n1, n0, min_missing))
    elif n1 == 0 or n0 == 0:
        row = _empty_row(v, w, n1, n0, f"no observed value of {w} in a group")
    elif table.shape[1] < 2:
        row = _empty_row(v, w, n1, n0, f"{w} takes one value in these rows")
    else:
        expected = stats.contingency.expected_freq(table)
        row = _empty_row(v, w, n1, n0, "")
        if table.shape == (2, 2) and expected.min() < MIN_EXPECTED_COUNT:
            # Small expected counts in a 2x2 table: the exact conditional test (Fisher 1922).
            result = stats.fisher_exact(table)
            row.update(test="Fisher's exact test", statistic=float(result.statistic), p_value=float(result.pvalue),
                       note="statistic is the sample odds ratio")
        else:
            # Pearson's statistic without continuity correction; small 2x2 tables went to Fisher above.
            result = stats.chi2_contingency(table, correction=False)
            row.update(test="chi-square test", statistic=float(result.statistic), df=float(result.dof),
                       p_value=float(result.pvalue))
            small = int((expected < MIN_EXPECTED_COUNT).sum())
            if small:
                row["note"] = f"{small} cells with expected count below 5; interpret with care"
        row["smd"] = standardised_difference_of_shares(table[0], table[1])
    row.update(distribution_missing_group=_shares_text(kept_levels, c1[keep]),
               distribution_observed_group=_shares_text(kept_levels, c0[keep]))
    return row


def compare_groups(data: pd.DataFrame, *, types: Mapping[str, str], missing: Optional[pd.DataFrame] = None,
                   not_applicable: Optional[pd.DataFrame] = None, alpha: float = 0.05,
                   min_missing: int = 10) -> GroupComparison:
    """Compare every variable between rows where each incomplete variable is missing and observed.

    Parameters
    ----------
    data : one column per variable; NaN where missing or not applicable.
    types : variable type per column (continuous, count, binary, nominal, ordinal).
    missing : True where a value is missing (default: ``data.isna()``).
    not_applicable : True where a value does not apply; those rows belong to neither group.
    alpha : level at which a Holm-adjusted p-value counts as evidence.
    min_missing : a pair is tested only when both groups hold at least this many values of
        the compared variable; otherwise its row says "too few to compare" (no test, no
        p-value, not counted in the Holm adjustment). The same threshold as the
        missingness models; a difference over a handful of rows is mostly noise.

    Returns
    -------
    GroupComparison whose table has one row per (incomplete, compared) pair: the test
    (Welch t-test for continuous and count variables; chi-square, or Fisher's exact test
    for a 2x2 table with an expected count below 5), statistic, df, p-value, Holm-adjusted
    p-value over the whole table, standardised difference (missing minus observed) and
    the two groups' sizes, means and distributions.

    References
    ----------
    Welch BL (1947). The generalization of 'Student's' problem when several different
    population variances are involved. Biometrika 34:28-35.
    Fisher RA (1922). On the interpretation of chi-square from contingency tables. JRSS 85:87-94.
    Holm S (1979). A simple sequentially rejective multiple test procedure. Scand J Stat 6:65-70.
    Austin PC (2009). Stat Med 28:3083-3107.
    """
    missing = _missing_frame(data, missing)
    not_applicable = _not_applicable_frame(data, not_applicable)
    rows: List[Dict[str, Any]] = []
    quantile_parts: List[pd.DataFrame] = []
    share_parts: List[pd.DataFrame] = []
    incomplete = [c for c in data.columns if bool(missing[c].any())]
    for v in incomplete:
        applies = ~not_applicable[v].to_numpy(dtype=bool)
        is_missing = missing[v].to_numpy(dtype=bool) & applies
        is_observed = ~missing[v].to_numpy(dtype=bool) & applies & data[v].notna().to_numpy()
        for w in data.columns:
            if w == v:
                continue
            values = data[w]
            present = values.notna().to_numpy()
            kind = _type_of(types, w, values)
            if kind in NUMERIC_TYPES:
                numbers = values.to_numpy(dtype=float)
                x1, x0 = numbers[is_missing & present], numbers[is_observed & present]
                rows.append(_compare_continuous(v, w, x1, x0, min_missing))
                quantile_parts.append(_quantile_frame(v, w, x1, x0))
            else:
                levels = levels_of(values)
                g1, g0 = values[is_missing & present], values[is_observed & present]
                rows.append(_compare_categorical(v, w, g1, g0, levels, min_missing))
                share_parts.append(_share_frame(v, w, g1, g0, levels))
    table = pd.DataFrame(rows, columns=[c for c in GROUP_COLUMNS if c not in ("p_adjusted", "evidence")])
    table.insert(table.columns.get_loc("p_value") + 1, "p_adjusted", holm_adjust(table["p_value"].to_numpy()))
    table["evidence"] = table["p_adjusted"] < alpha
    table = table[list(GROUP_COLUMNS)]
    for column in ("n_missing_group", "n_observed_group"):
        table[column] = table[column].astype(int)
    quantiles = pd.concat(quantile_parts, ignore_index=True) if quantile_parts else pd.DataFrame(
        columns=["incomplete_variable", "compared_variable", "group", "probability", "value"])
    shares = pd.concat(share_parts, ignore_index=True) if share_parts else pd.DataFrame(
        columns=["incomplete_variable", "compared_variable", "group", "level", "count", "share"])
    groups = GroupComparison(comparisons=table, quantiles=quantiles, level_shares=shares, alpha=alpha,
                             min_missing=min_missing)
    return dataclasses.replace(groups, sentences=tuple(group_sentences(groups)))


def holm_adjust(p_values: np.ndarray) -> np.ndarray:
    """Holm's step-down adjusted p-values; NaN entries (tests not run) stay NaN and do not count.

    References
    ----------
    Holm S (1979). A simple sequentially rejective multiple test procedure. Scand J Stat 6:65-70.
    """
    p = np.asarray(p_values, dtype=float)
    out = np.full(p.shape, np.nan)
    tested = np.flatnonzero(np.isfinite(p))
    m = len(tested)
    if m == 0:
        return out
    order = tested[np.argsort(p[tested], kind="stable")]
    scaled = (m - np.arange(m)) * p[order]
    out[order] = np.minimum(np.maximum.accumulate(scaled), 1.0)
    return out


def _quantile_frame(v: str, w: str, x1: np.ndarray, x0: np.ndarray) -> pd.DataFrame:
    parts = []
    for group, x in (("missing", x1), ("observed", x0)):
        if len(x):
            parts.append(pd.DataFrame({"incomplete_variable": v, "compared_variable": w, "group": group,
                                       "probability": QUANTILE_GRID, "value": np.quantile(x, QUANTILE_GRID)}))
    return pd.concat(parts, ignore_index=True) if parts else pd.DataFrame()


def _share_frame(v: str, w: str, g1: pd.Series, g0: pd.Series, levels: Sequence[Any]) -> pd.DataFrame:
    rows = []
    for group, g in (("missing", g1), ("observed", g0)):
        total = len(g)
        for level in levels:
            count = int((g == level).sum())
            rows.append({"incomplete_variable": v, "compared_variable": w, "group": group,
                         "level": level_text(level), "count": count, "share": count / total if total else np.nan})
    return pd.DataFrame(rows)


# ---------------------------------------------------------------------------
# 2. the variables of Little's test (the test itself is in gapbook.little)

def mcar_test_data(data: pd.DataFrame, *, types: Mapping[str, str], not_applicable: Optional[pd.DataFrame] = None,
                   variables: Optional[Sequence[str]] = None) -> Tuple[pd.DataFrame, Tuple[str, ...]]:
    """The numeric frame Little's test runs on, and notes on what was left out and why.

    By default every continuous, count and binary variable with at least one observed
    value, except those with "not applicable" cells (their absence is structural, not
    missing) and those constant where observed. Binary text variables enter as 0/1 codes
    (second level = 1). Nominal and ordinal variables are never in the test (it rests on
    a multivariate normal model). Every variable left out by default gets a note saying
    why. With ``variables`` given, those exactly; rows where any of them does not apply
    are left out (with a note).

    Raises InputError for unknown or unsuitable names in ``variables``.

    Parameters
    ----------
    data : DataFrame
        The study's values.
    types : mapping of str to str
        Each column's type.
    not_applicable : DataFrame of bool, optional
        The not-applicable cells.
    variables : sequence of str, optional
        The variables to test.

    Returns
    -------
    (frame, notes) : DataFrame and tuple of str
    """
    not_applicable = _not_applicable_frame(data, not_applicable)
    notes: List[str] = []
    if variables is not None:
        chosen = list(dict.fromkeys(variables))
        for name in chosen:
            if name not in data.columns:
                raise InputError(f"'{name}' is not a column of the data"
                                 f"{did_you_mean(name, data.columns)}", option="variables")
            kind = _type_of(types, name, data[name])
            if kind not in NUMBER_CODED_TYPES:
                raise InputError(f"'{name}' is {kind}; Little's test takes continuous, count "
                                 "and binary variables, so leave it out of mechanism.variables", option="variables")
            if data[name].notna().sum() == 0:
                raise InputError(f"'{name}' has no observed values; leave it out", option="variables")
        if len(chosen) < len(data.columns):
            notes.append("The test uses the variables chosen in mechanism.variables; the others were not chosen.")
        rows = ~not_applicable[chosen].any(axis=1).to_numpy() if chosen else np.ones(len(data), dtype=bool)
        if not rows.all():
            notes.append(f"{int((~rows).sum())} rows where a test variable does not apply were left out.")
    else:
        chosen = []
        rows = np.ones(len(data), dtype=bool)
        categories: List[str] = []
        for name in data.columns:
            kind = _type_of(types, name, data[name])
            if kind not in NUMBER_CODED_TYPES:
                categories.append(f"{name} ({kind})")
                continue
            if data[name].notna().sum() == 0:
                notes.append(f"{name} was left out because it has no observed values.")
                continue
            if bool(not_applicable[name].any()):
                notes.append(f"{name} was left out because it does not apply to every row.")
                continue
            chosen.append(name)
        if categories:
            notes.insert(0, f"{_listing(categories)} {'was' if len(categories) == 1 else 'were'} left out: "
                         "the test rests on a multivariate normal model, which takes numbers and 0/1 codes but not "
                         "categories with more than two levels (the spacing of ordinal codes is arbitrary); the "
                         "group comparisons cover them.")
    columns = {}
    for name in chosen:
        kind = _type_of(types, name, data[name])
        values = binary_codes(data[name]) if kind == "binary" else data[name].astype(float)
        values = values[rows]
        if values.nunique() < 2:
            notes.append(f"{name} was left out because it takes one value where observed.")
            continue
        columns[name] = values.to_numpy(dtype=float)
    return pd.DataFrame(columns, index=data.index[rows]), tuple(notes)


# ---------------------------------------------------------------------------
# 3. missingness models

@dataclass(frozen=True)
class MissingnessModels:
    """Logistic regressions of missingness indicators on the fully observed variables.

    ``terms`` (``mechanism_models.csv``) has one row per model term; ``model_fit``
    (``mechanism_model_fit.csv``) one row per incomplete variable: n_used, n_missing,
    predictors, auc, lr_p_value and a note (why a model was not fitted, or that it
    separated perfectly).
    """

    terms: pd.DataFrame
    model_fit: pd.DataFrame
    alpha: float
    sentences: Tuple[str, ...] = ()

    def fitted_terms(self) -> pd.DataFrame:
        """The term rows of the models that were fitted (rows without a term are notes)."""
        return self.terms[self.terms["term"] != ""]

    def tables(self) -> Dict[str, pd.DataFrame]:
        """``mechanism_models`` and ``mechanism_model_fit``."""
        return {"mechanism_models": self.terms, "mechanism_model_fit": self.model_fit}


def roc_auc(indicator: np.ndarray, score: np.ndarray) -> float:
    """Area under the ROC curve: the probability a random positive scores above a random negative (ties 1/2).

    References
    ----------
    Hanley JA, McNeil BJ (1982). The meaning and use of the area under a receiver operating
    characteristic (ROC) curve. Radiology 143:29-36.
    """
    indicator = np.asarray(indicator, dtype=bool)
    n1, n0 = int(indicator.sum()), int((~indicator).sum())
    if n1 == 0 or n0 == 0:
        return float("nan")
    ranks = stats.rankdata(score)
    return float((ranks[indicator].sum() - n1 * (n1 + 1) / 2) / (n1 * n0))


def _separated_terms(indicator: np.ndarray, design: pd.DataFrame) -> List[str]:
    """Design columns that alone predict the indicator exactly somewhere (a level always or never missing)."""
    found = []
    for name in design.columns:
        if name == "Intercept":
            continue
        x = design[name].to_numpy()
        distinct = np.unique(x)
        if len(distinct) == 2:
            for value in distinct:
                inside = indicator[x == value]
                if len(inside) and (inside.all() or not inside.any()):
                    found.append(name)
                    break
        elif len(distinct) > 2:
            x1, x0 = x[indicator], x[~indicator]
            if x1.max() < x0.min() or x1.min() > x0.max():
                found.append(name)
    return found


def fit_missingness_model(data: pd.DataFrame, *, variable: str, predictors: Sequence[str],
                          indicator: np.ndarray, alpha: float = 0.05) -> Tuple[pd.DataFrame, Dict[str, Any]]:
    """One logistic regression of a missingness indicator; term rows and a one-row summary.

    Parameters
    ----------
    data : the rows to model (those where ``variable`` applies) with the predictor columns.
    variable : the incomplete variable (for labels).
    predictors : the columns to use (Categorical columns enter as dummies, first level reference).
    indicator : True where ``variable`` is missing, aligned with ``data``.
    alpha : one minus the confidence level of the odds ratios' intervals.

    Returns
    -------
    (terms, summary) : DataFrame and dict
        One row per term (odds ratio, interval, p-value); the rows used and missing, and
        the likelihood-ratio test and AUC when the model could be fitted.

    References
    ----------
    Hosmer DW, Lemeshow S (2000). Applied Logistic Regression, 2nd ed., Wiley.
    """
    import statsmodels.formula.api as smf
    from statsmodels.tools.sm_exceptions import PerfectSeparationError, PerfectSeparationWarning

    # The formula names columns only through internal aliases (never the columns' own names,
    # which come from the data file); term names are mapped back for the table.
    aliases = ColumnAliases.for_columns(list(predictors), taken=["gapbook_is_missing"])
    frame = aliases.frame(data)
    target = "gapbook_is_missing"
    frame[target] = indicator.astype(float)
    formula = f"{target} ~ " + " + ".join(aliases.aliases)
    n_missing = int(indicator.sum())
    summary = {"incomplete_variable": variable, "n_used": len(frame), "n_missing": n_missing,
               "predictors": ",".join(predictors), "auc": np.nan, "lr_statistic": np.nan, "lr_df": np.nan,
               "lr_p_value": np.nan, "separation": False, "note": ""}
    model = smf.logit(formula, data=frame, eval_env=FORMULA_NAMESPACE)
    design = pd.DataFrame(model.exog, columns=[aliases.display(name) for name in model.exog_names])
    separated = _separated_terms(indicator, design)
    perfect = False
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            result = model.fit(disp=0, maxiter=200)
        except (PerfectSeparationError, np.linalg.LinAlgError):
            result = None
            perfect = True
    perfect = perfect or any(issubclass(w.category, PerfectSeparationWarning) for w in caught)
    converged = result is not None and bool(result.mle_retvals.get("converged", False))
    if perfect or separated or not converged:
        if separated or perfect:
            named = ", ".join(separated) if separated else "a combination of the predictors"
            note = (f"perfect separation: {named} predicts exactly whether {variable} is missing in some rows, so "
                    "the odds ratios are not estimable (see the group comparisons for these variables)")
            summary["separation"] = True
        else:
            note = "the logistic regression did not converge; odds ratios not reported"
        summary["note"] = note
        terms = pd.DataFrame([{"incomplete_variable": variable, "term": "", "n_used": len(frame),
                               "n_missing": n_missing, "note": note}], columns=list(MODEL_COLUMNS))
        return terms, summary
    names = [aliases.display(name) for name in result.params.index]
    coef, se = result.params.set_axis(names), result.bse.set_axis(names)
    auc = roc_auc(indicator, np.asarray(result.predict()))
    note = ""
    per_term = min(n_missing, len(frame) - n_missing) / max(len(coef) - 1, 1)
    if per_term < 10:
        # Peduzzi et al. (1996, J Clin Epidemiol 49:1373): fewer than 10 events per term makes estimates unstable.
        note = f"fewer than 10 rows of the rarer outcome per model term ({per_term:.1f}); odds ratios may be unstable"
    # An intercept far from the data (e.g. calendar years as a predictor) can overflow exp(): inf is honest.
    with np.errstate(over="ignore"):
        terms = _term_rows(variable, coef, se, result, alpha, auc, n_missing, note)
    summary.update(auc=auc, lr_statistic=float(result.llr), lr_df=float(result.df_model),
                   lr_p_value=float(result.llr_pvalue), note=note)
    return terms, summary


def _term_rows(variable: str, coef: pd.Series, se: pd.Series, result: Any, alpha: float, auc: float,
               n_missing: int, note: str) -> pd.DataFrame:
    lower, upper, _ = wald_inference(coef.to_numpy(), se.to_numpy(), None, alpha)
    return pd.DataFrame({
        "incomplete_variable": variable, "term": list(coef.index), "coefficient": coef.to_numpy(),
        "std_error": se.to_numpy(), "odds_ratio": np.exp(coef.to_numpy()),
        "ci_lower": np.exp(lower), "ci_upper": np.exp(upper), "p_value": result.pvalues.to_numpy(),
        "auc": auc, "lr_p_value": float(result.llr_pvalue), "n_used": int(result.nobs), "n_missing": n_missing,
        "note": note,
    }, columns=list(MODEL_COLUMNS))


def missingness_models(data: pd.DataFrame, *, types: Mapping[str, str], missing: Optional[pd.DataFrame] = None,
                       not_applicable: Optional[pd.DataFrame] = None, min_missing: int = 10, alpha: float = 0.05,
                       predictors: Optional[Sequence[str]] = None) -> MissingnessModels:
    """For each incomplete variable with enough missing values, a logistic model of its missingness.

    Parameters
    ----------
    data, types, missing, not_applicable : as for :func:`compare_groups`.
    min_missing : fit only when at least this many rows are missing and this many observed.
    alpha : for the odds-ratio confidence intervals (level 1 - alpha).
    predictors : the predictor columns; default the variables fully observed (and not
        constant) in the rows where the incomplete variable applies. With a list, rows
        with a missing predictor are left out.

    Returns
    -------
    MissingnessModels (term table, one summary row per incomplete variable).

    References
    ----------
    Hosmer DW, Lemeshow S (2000). Applied Logistic Regression, 2nd ed., Wiley.
    Hanley JA, McNeil BJ (1982). Radiology 143:29-36.
    """
    missing = _missing_frame(data, missing)
    not_applicable = _not_applicable_frame(data, not_applicable)
    if predictors is not None:
        for name in predictors:
            if name not in data.columns:
                raise InputError(f"'{name}' is not a column of the data{did_you_mean(name, data.columns)}",
                                 option="predictors")
    term_parts: List[pd.DataFrame] = []
    summaries: List[Dict[str, Any]] = []
    for v in data.columns:
        is_missing = missing[v].to_numpy(dtype=bool)
        if not is_missing.any():
            continue
        applies = ~not_applicable[v].to_numpy(dtype=bool)
        candidates = [c for c in (predictors if predictors is not None else data.columns) if c != v]
        if predictors is None:
            chosen = [c for c in candidates if data.loc[applies, c].notna().all() and data.loc[applies, c].nunique() > 1]
            rows = applies
        else:
            chosen = [c for c in candidates]
            rows = applies & data[chosen].notna().all(axis=1).to_numpy()
            chosen = [c for c in chosen if data.loc[rows, c].nunique() > 1]
        n_missing = int((is_missing & rows).sum())
        n_observed = int((~is_missing & rows).sum())
        base = {"incomplete_variable": v, "n_used": int(rows.sum()), "n_missing": n_missing,
                "predictors": ",".join(chosen), "auc": np.nan, "lr_statistic": np.nan, "lr_df": np.nan,
                "lr_p_value": np.nan, "separation": False}
        if min(n_missing, n_observed) < min_missing:
            note = (f"not modelled: {n_missing} missing and {n_observed} observed rows; "
                    f"a model needs at least {min_missing} of each (mechanism.min_missing)")
        elif not chosen:
            note = "not modelled: no fully observed variable to model on"
        else:
            subset = data.loc[rows]
            terms, summary = fit_missingness_model(subset, variable=v, predictors=chosen, indicator=is_missing[rows],
                                                   alpha=alpha)
            term_parts.append(terms)
            summaries.append(summary)
            continue
        summaries.append({**base, "note": note})
        term_parts.append(pd.DataFrame([{"incomplete_variable": v, "term": "", "n_used": int(rows.sum()),
                                         "n_missing": n_missing, "note": note}], columns=list(MODEL_COLUMNS)))
    table = (pd.concat([t.astype(object) for t in term_parts], ignore_index=True).infer_objects()
             if term_parts else pd.DataFrame(columns=list(MODEL_COLUMNS)))
    fits = pd.DataFrame(summaries, columns=["incomplete_variable", "n_used", "n_missing", "predictors", "auc",
                                            "lr_statistic", "lr_df", "lr_p_value", "separation", "note"])
    models = MissingnessModels(terms=table, model_fit=fits, alpha=alpha)
    return dataclasses.replace(models, sentences=tuple(model_sentences(models)))


# ---------------------------------------------------------------------------
# 4. wording

def discrimination_words(auc: float) -> str:
    """How well a missingness model separates missing from observed rows, in words.

    0.7-0.8 acceptable, 0.8-0.9 excellent, 0.9 and above outstanding (Hosmer & Lemeshow
    2000, section 5.2.4); the words below 0.7 are common practice, no source.
    """
    if not np.isfinite(auc):
        return "not available"
    if auc >= 0.9:
        return "outstanding"
    if auc >= 0.8:
        return "excellent"
    if auc >= 0.7:
        return "acceptable"
    if auc >= 0.6:
        return "weak"
    return "little or none"


def mcar_sentence(test: LittleTest, alpha: float = 0.05) -> str:
    """Little's test in words: evidence against MCAR, or no evidence against it (never 'the data are MCAR').

    Parameters
    ----------
    test : LittleTest
        Little's test.
    alpha : float
        The evidence level.

    Returns
    -------
    str
    """
    if not np.isfinite(test.p_value):
        reason = " ".join(test.notes) if test.notes else "it could not be computed."
        return f"Little's test gives no p-value. {reason}"
    numbers = f"d\u00b2 = {test.statistic:.2f}, df = {test.df}, {format_p(test.p_value)}; {test.n_patterns} patterns"
    left_out = f" Not in the test: {', '.join(test.left_out)}; the notes to Little's test say why." if test.left_out else ""
    if test.p_value < alpha:
        return (f"Little's test gives evidence against missing completely at random (MCAR) for "
                f"{', '.join(test.variables)} ({numbers}).{left_out}")
    return (f"Little's test gives no evidence against MCAR ({numbers}). Absence of evidence is not proof: "
            "the test has limited power, and it only looks at the variables "
            f"{', '.join(test.variables)}.{left_out}")


def _relation_text(row: pd.Series, variable: str) -> str:
    w = row["compared_variable"]
    p = format_p(row["p_adjusted"]).replace("p ", "Holm-adjusted p ", 1)
    if np.isfinite(row["mean_missing_group"]):
        detail = (f"mean {row['mean_missing_group']:.3g} where {variable} is missing vs "
                  f"{row['mean_observed_group']:.3g} where observed, SMD {row['smd']:.2f}")
    else:
        detail = (f"{row['distribution_missing_group']} where {variable} is missing vs "
                  f"{row['distribution_observed_group']} where observed")
    return f"{w} ({detail}; {p})"


def group_sentences(groups: GroupComparison) -> List[str]:
    """One sentence per incomplete variable: the observed variables its missingness relates to, if any."""
    sentences = []
    table = groups.comparisons
    for v, rows in table.groupby("incomplete_variable", sort=False):
        tested = rows[rows["p_adjusted"].notna()]
        if tested.empty:
            most = int(rows["n_missing_group"].max())
            if 0 < most < groups.min_missing:
                sentences.append(f"Missingness of {v} was not compared with the other variables: too few to compare "
                                 f"({most} rows missing; at least {groups.min_missing} needed, mechanism.min_missing).")
            else:
                sentences.append(f"Missingness of {v} could not be compared with other variables (too few rows).")
            continue
        hits = tested[tested["evidence"]].sort_values("p_adjusted", kind="stable")
        if hits.empty:
            sentences.append(f"No evidence that missingness of {v} depends on the other variables compared "
                             f"(smallest Holm-adjusted {format_p(tested['p_adjusted'].min())}).")
        else:
            listed = "; ".join(_relation_text(r, v) for _, r in hits.head(3).iterrows())
            more = f" and {len(hits) - 3} more" if len(hits) > 3 else ""
            sentences.append(f"Evidence that missingness of {v} depends on {listed}{more}.")
    return sentences


def model_sentences(models: MissingnessModels) -> List[str]:
    """One sentence per missingness model: evidence from the likelihood-ratio test and discrimination (AUC).

    Parameters
    ----------
    models : MissingnessModels
        The fitted missingness models.

    Returns
    -------
    list of str
    """
    sentences = []
    alpha = models.alpha
    for _, row in models.model_fit.iterrows():
        v = row["incomplete_variable"]
        if not np.isfinite(row["lr_p_value"]):
            sentences.append(f"Missingness model of {v}: {row['note']}.")
            continue
        predictors = row["predictors"].replace(",", ", ")
        lead = ("Evidence that missingness of" if row["lr_p_value"] < alpha else "No evidence that missingness of")
        sentences.append(f"{lead} {v} depends on the fully observed variables {predictors} "
                         f"(likelihood-ratio {format_p(row['lr_p_value'])}); the model's discrimination is "
                         f"{discrimination_words(row['auc'])} (AUC {row['auc']:.2f}).")
    return sentences


def summary_sentences(groups: Optional[GroupComparison], mcar: Optional[LittleTest],
                      models: Optional[MissingnessModels], alpha: float = 0.05) -> Tuple[str, ...]:
    """The stage's conclusions in words the data support, ending with the MAR/MNAR and plan cautions.

    Says "evidence against MCAR" or "no evidence against MCAR (p = ...)" and "evidence that
    missingness of V depends on W"; never that the data are MCAR or MAR.
    """
    sentences: List[str] = []
    for part in (mcar, groups, models):
        if part is not None:
            sentences.extend(part.sentences)
    sentences.append(f"{MAR_CAUTION} {SENSITIVITY_POINTER}")
    sentences.append(PLAN_CAUTION)
    return tuple(sentences)


# ---------------------------------------------------------------------------
# the stage in one call

@dataclass(frozen=True)
class MechanismResult:
    """Everything the mechanism stage reports: group comparisons, Little's test, models, sentences."""

    groups: GroupComparison
    mcar: LittleTest
    models: MissingnessModels
    sentences: Tuple[str, ...]
    alpha: float

    def tables(self) -> Dict[str, pd.DataFrame]:
        """``mechanism_groups``, ``mcar_test``, ``mcar_patterns``, ``mechanism_models``, ``mechanism_model_fit``."""
        return {**self.groups.tables(), **self.mcar.tables(), **self.models.tables()}


def assess_mechanism(data: pd.DataFrame, *, types: Mapping[str, str], missing: Optional[pd.DataFrame] = None,
                     not_applicable: Optional[pd.DataFrame] = None, variables: Optional[Sequence[str]] = None,
                     alpha: float = 0.05, min_missing: int = 10, em_tolerance: float = 1e-8,
                     em_max_iterations: int = 1000) -> MechanismResult:
    """Group comparisons, Little's MCAR test and missingness models for one dataset, with the summary sentences.

    Parameters
    ----------
    data, types, missing, not_applicable : as for :func:`compare_groups`.
    variables : Little's test variables (default: see :func:`mcar_test_data`).
    alpha : evidence level for adjusted p-values, Little's test and model CIs.
    min_missing : the least number of missing (and observed) rows for a group comparison and
        for a missingness model.
    em_tolerance, em_max_iterations : EM convergence settings for Little's test.

    Returns
    -------
    MechanismResult.

    References
    ----------
    Little RJA (1988). JASA 83:1198-1202.
    """
    groups = compare_groups(data, types=types, missing=missing, not_applicable=not_applicable, alpha=alpha,
                            min_missing=min_missing)
    frame, notes = mcar_test_data(data, types=types, not_applicable=not_applicable, variables=variables)
    left_out = tuple(name for name in data.columns if name not in frame.columns)
    mcar = little_mcar_test(frame, tolerance=em_tolerance, max_iterations=em_max_iterations, notes=notes,
                            left_out=left_out)
    mcar = dataclasses.replace(mcar, sentences=(mcar_sentence(mcar, alpha),))
    models = missingness_models(data, types=types, missing=missing, not_applicable=not_applicable,
                                min_missing=min_missing, alpha=alpha)
    return MechanismResult(groups=groups, mcar=mcar, models=models,
                           sentences=summary_sentences(groups, mcar, models, alpha), alpha=alpha)


def assess_study(study: Study, *, variables: Optional[Sequence[str]] = None, alpha: float = 0.05,
                 min_missing: int = 10, em_tolerance: float = 1e-8, em_max_iterations: int = 1000) -> MechanismResult:
    """:func:`assess_mechanism` on a study after intake (its values, types, missing and not-applicable cells).

    Parameters
    ----------
    study : from :func:`gapbook.intake.load_study`.
    variables, alpha, min_missing, em_tolerance, em_max_iterations : as for :func:`assess_mechanism`.

    Returns
    -------
    MechanismResult.

    References
    ----------
    Little RJA (1988). JASA 83:1198-1202.
    """
    return assess_mechanism(study.data, types=study.types, missing=study.missing, not_applicable=study.not_applicable,
                            variables=variables, alpha=alpha, min_missing=min_missing, em_tolerance=em_tolerance,
                            em_max_iterations=em_max_iterations)
