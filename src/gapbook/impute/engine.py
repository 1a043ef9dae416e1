"""The chain engine: m chains of chained-equations imputation, run in parallel, and their result.

Each of the m chains (:mod:`.chains`) starts from random draws of each variable's observed
values, then visits the incomplete variables in a fixed order, ``iterations`` times. A
visit fits the variable's conditional model to the rows where it is observed, draws the
model's parameters from their (approximate) posterior and draws new values for the cells
to impute. The final state of chain i is completed dataset i.

How it stays fast (the design goals of the engine):
- every variable is coded into one float design matrix per chain (numbers standardised,
  categories dummy-coded); a visit changes that matrix in place, on the imputed rows of
  one variable's columns only;
- the cross-product matrix of the whole design is kept up to date column by column, so a
  linear model's normal equations over the observed rows are that matrix minus the
  cross-products of the (few) rows where the variable is not observed;
- predictive mean matching finds donors by binary search in the sorted predictions;
- logistic, multinomial and ordinal models are fitted by Newton steps warm-started from
  the previous visit, over row blocks of bounded size;
- chains run in parallel (:func:`gapbook.compute.iterate_tasks`: local processes or a Dask
  cluster), each with its own child of one ``SeedSequence``, so the completed data do not
  depend on the number of workers or where they run.

How it stays small: the problem sent to the workers carries each variable's values and
codes once and no design matrix (each chain builds its own); a chain copies only the
variables it imputes; the chains' imputed values are copied into the result as each chain
arrives, so at most one chain's output waits beside the result.

Cells that are missing but not to be imputed (``impute_mask`` False, e.g. "not
applicable") stay missing in the completed data. Where such a variable is a predictor,
its value counts as 0 in those rows (numbers) or as the reference category (categories);
include the variable that defines applicability (e.g. on_insulin for insulin dose) among
the predictors so the model can tell those rows apart. A row whose value is not
applicable is never used to fit that variable's own model.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Dict, Iterator, List, Mapping, Optional, Sequence, Tuple

import numpy as np
import pandas as pd

from ..compute import iterate_tasks
from ..convergence import ChainConvergence, chain_convergence
from ..errors import InputError, did_you_mean
from ..models import AnalysisModel
from ..pool import PooledResult, pool_fits
from ..vocabulary import CATEGORICAL_TYPES, IMPUTATION_METHODS, NUMERIC_TYPES, VARIABLE_TYPES, infer_type
from ..intake import levels_of
from .chains import Chain, run_chain
from .preparation import check_names, prepare
from .problem import Problem

__all__ = ["ChainedImputation", "impute_chained", "Chain", "run_chain", "run_chains"]


# ---------------------------------------------------------------------------
# the result

@dataclass(frozen=True)
class ChainedImputation:
    """m completed datasets, kept as the original data plus the imputed cells.

    ``convergence``: chain (0-based, chain i gives ``completed(i)``), iteration (1..iterations),
    variable, mean and sd of its imputed values (categories: the level position 0..K-1, so
    for a binary variable the share in its second level).
    ``level_shares``: for unordered variables of three or more levels, chain, iteration,
    variable, level and the share of the imputed values in that level.
    ``variables``: variable, type, method, n_observed, n_imputed, n_left_missing, predictors.
    """

    m: int
    iterations: int
    seed: int
    data: pd.DataFrame
    impute_mask: pd.DataFrame
    imputed: Dict[str, np.ndarray]          # variable -> (m, n_imputed) values (categories: level positions)
    impute_rows: Dict[str, np.ndarray]
    types: Dict[str, str]
    methods: Dict[str, str]
    convergence: pd.DataFrame
    variables: pd.DataFrame
    donors: int = 5
    delta: Dict[str, Any] = field(default_factory=dict)
    sentences: Tuple[str, ...] = ()
    level_shares: pd.DataFrame = field(default_factory=lambda: pd.DataFrame(
        columns=["chain", "iteration", "variable", "level", "share"]))

    def tables(self) -> Dict[str, pd.DataFrame]:
        """``imputation_convergence`` (the trace with R-hat), ``imputation_rhat`` and ``imputation_chain_spread``
        (:meth:`chain_convergence`), and ``imputation_summary`` (:meth:`observed_and_imputed`)."""
        return {**self.chain_convergence().tables(), "imputation_summary": self.observed_and_imputed()}

    def chain_convergence(self) -> ChainConvergence:
        """Have the chains forgotten their starting values? R-hat across chains at every iteration.

        References
        ----------
        Vehtari A, Gelman A, Simpson D, Carpenter B, Bürkner P-C (2021). Rank-normalization,
        folding, and localization: an improved R-hat for assessing convergence of MCMC.
        Bayesian Analysis 16:667-718.
        """
        return chain_convergence(self.convergence, self.level_shares)

    def completed(self, i: int) -> pd.DataFrame:
        """The i-th completed dataset (i = 0..m-1), with the data's own dtypes and categories."""
        if not 0 <= int(i) < self.m:
            raise InputError(f"completed({i}): there are {self.m} imputed datasets, numbered 0 to {self.m - 1}")
        frame = self.data.copy()
        for name, values in self.imputed.items():
            rows = self.impute_rows[name]
            column = frame[name]
            if isinstance(column.dtype, pd.CategoricalDtype):
                codes = column.cat.codes.to_numpy().copy()
                codes[rows] = values[i]
                frame[name] = pd.Categorical.from_codes(codes, dtype=column.dtype)
            elif self.types[name] in CATEGORICAL_TYPES:
                levels = np.array(levels_of(column), dtype=object)
                filled = column.to_numpy(dtype=object, copy=True)
                filled[rows] = levels[values[i]]
                frame[name] = pd.Series(filled, index=frame.index).astype(column.dtype)
            else:
                filled = column.to_numpy(dtype=float, na_value=np.nan, copy=True)
                filled[rows] = values[i]
                frame[name] = pd.Series(filled, index=frame.index).astype(column.dtype)
        return frame

    def completed_all(self) -> Iterator[pd.DataFrame]:
        """The completed datasets one after another (one in memory at a time)."""
        for i in range(self.m):
            yield self.completed(i)

    def analyse(self, model: AnalysisModel) -> PooledResult:
        """Fit the analysis model to every completed dataset and pool the fits with Rubin's rules.

        References
        ----------
        Rubin DB (1987). Multiple Imputation for Nonresponse in Surveys. Wiley.
        """
        return pool_fits([model.fit(frame) for frame in self.completed_all()])

    def imputed_long(self, name: str) -> pd.DataFrame:
        """Imputed values of one variable: imputation, row, value (categories as their labels)."""
        if name not in self.imputed:
            raise InputError(f"'{name}' was not imputed (imputed: {', '.join(self.imputed)})")
        values = self.imputed[name]
        rows = self.impute_rows[name]
        frame = pd.DataFrame({"imputation": np.repeat(np.arange(self.m), len(rows)),
                              "row": np.tile(rows, self.m)})
        if self.types[name] in CATEGORICAL_TYPES:
            levels = np.array(levels_of(self.data[name]), dtype=object)
            frame["value"] = levels[values.ravel()]
        else:
            frame["value"] = values.ravel()
        return frame

    def observed_and_imputed(self) -> pd.DataFrame:
        """Per imputed variable: method, n_imputed, observed and imputed mean and SD, and what 'mean' measures."""
        rows = []
        for name, values in self.imputed.items():
            column = self.data[name]
            observed_mask = column.notna().to_numpy() & ~self.impute_mask[name].to_numpy(dtype=bool)
            if self.types[name] in CATEGORICAL_TYPES:
                levels = levels_of(column)
                position = {v: i for i, v in enumerate(levels)}
                observed = column[observed_mask].map(position).to_numpy(dtype=float)
                scale = (f"share '{levels[1]}'" if self.types[name] == "binary" and len(levels) == 2
                         else f"level position (0 = {levels[0]})")
            else:
                observed = column.to_numpy(dtype=float, na_value=np.nan)[observed_mask]
                scale = "value"
            flat = values.astype(float).ravel()
            rows.append({"variable": name, "type": self.types[name], "method": self.methods[name],
                         "n_imputed": int(values.shape[1]), "n_observed": int(observed_mask.sum()),
                         "observed_mean": float(np.mean(observed)) if len(observed) else np.nan,
                         "observed_sd": float(np.std(observed, ddof=1)) if len(observed) > 1 else np.nan,
                         "imputed_mean": float(flat.mean()) if len(flat) else np.nan,
                         "imputed_sd": float(flat.std(ddof=1)) if len(flat) > 1 else np.nan,
                         "scale": scale})
        return pd.DataFrame(rows, columns=["variable", "type", "method", "n_imputed", "n_observed", "observed_mean",
                                           "observed_sd", "imputed_mean", "imputed_sd", "scale"])


# ---------------------------------------------------------------------------
# the engine's entry point

def impute_chained(data: pd.DataFrame, *, m: int = 20, iterations: int = 10, seed: Optional[int] = None,
                   methods: Optional[Mapping[str, str]] = None,
                   predictors: Optional[Mapping[str, Sequence[str]]] = None,
                   passive: Optional[Mapping[str, str]] = None, n_jobs: int = 1,
                   types: Optional[Mapping[str, str]] = None, delta: Optional[Mapping[str, Any]] = None,
                   delta_by: Optional[Mapping[str, str]] = None, impute_mask: Optional[pd.DataFrame] = None,
                   donors: int = 5, exclude_predictors: Optional[Mapping[str, Sequence[str]]] = None,
                   progress: bool = False) -> ChainedImputation:
    """Multiple imputation by chained equations (fully conditional specification).

    Parameters
    ----------
    data : one column per variable (numbers float, categories pandas Categorical or text).
    m : number of imputed datasets (chains).
    iterations : sweeps over the incomplete variables per chain.
    seed : integer seed; one ``SeedSequence`` is spawned into one child per chain, so the
        result is the same for any ``n_jobs``. None draws fresh entropy (kept in ``.seed``).
    methods : {column: pmm|normal|logistic|multinomial|ordinal|passive}; default from the type
        (pmm for continuous and count, logistic binary, multinomial nominal, ordinal ordinal).
    predictors : {column: [predictor columns]}; default every other column, the outcome
        included (leaving the outcome out biases its associations towards zero). A passive
        variable does not predict its own inputs.
    passive : {column: formula}, recomputed from its inputs after each of their updates,
        e.g. ``{"bmi": "weight_kg / (height_cm / 100) ** 2"}``; never imputed directly.
    n_jobs : chains run in parallel with joblib.
    types : {column: continuous|binary|nominal|ordinal|count}; default inferred (``infer_type``).
    delta : {column: shift or {group level: shift}}, added to each imputed value after every
        draw (pmm/normal: on the variable's scale; logistic: on the log-odds of the second level
        before drawing). A shift of 0 reproduces the unshifted run exactly.
    delta_by : {column: grouping column} for group-specific shifts.
    impute_mask : bool frame of the cells to impute (default ``data.isna()``); missing cells
        outside it stay missing (see the module docstring for how they act as predictors).
    donors : k, the number of nearest observed predictions a pmm donor is drawn from.
        A limitation of predictive mean matching, not of this engine: it only ever imputes
        observed values, so where many missing values sit in a tail of the predictors that
        has few observed donors it pulls them towards the middle. In our simulation (normal
        outcome, 40 % missing, missingness odds x4.5 per SD of a complete covariate, 1,000
        replicates) pmm attenuated the regression slope by 7 % (coverage 81 %), exactly as
        the published algorithm written independently in the tests did; 'normal' was
        unbiased with 95 % coverage. More donors made it worse (10 donors: 9 %), one donor
        halved the bias but not the undercoverage (79 %). With a roughly normal variable and
        many missing values concentrated in a tail, prefer ``methods={col: "normal"}``.
    exclude_predictors : {column: [columns not to use as its predictors]}.
    progress : show a progress bar over chains (on standard error; off by default, so pages stay clean).

    Returns
    -------
    ChainedImputation with ``.m``, ``.completed(i)``, ``.convergence``, ``.analyse(model)``.

    References
    ----------
    van Buuren S, Brand JPL, Groothuis-Oudshoorn CGM, Rubin DB (2006). Fully conditional
    specification in multivariate imputation. J Stat Comput Simul 76:1049-1064.
    White IR, Royston P, Wood AM (2011). Multiple imputation using chained equations: issues
    and guidance for practice. Stat Med 30:377-399.
    Moons KGM et al. (2006). Using the outcome for imputation of missing predictor values was
    preferred. J Clin Epidemiol 59:1092-1101.
    """
    if not isinstance(data, pd.DataFrame) or data.shape[1] == 0:
        raise InputError("give a DataFrame with at least one column", option="data")
    if not isinstance(m, (int, np.integer)) or m < 1:
        raise InputError(f"{m!r} is not allowed; give a whole number of imputed datasets, 1 or more", option="m")
    if not isinstance(iterations, (int, np.integer)) or iterations < 1:
        raise InputError(f"{iterations!r} is not allowed; give a whole number, 1 or more", option="iterations")
    if not isinstance(donors, (int, np.integer)) or donors < 1:
        raise InputError(f"{donors!r} is not allowed; give a whole number, 1 or more", option="donors")
    if not isinstance(n_jobs, (int, np.integer)) or n_jobs < 1:
        raise InputError(f"{n_jobs!r} is not allowed; give a whole number, 1 or more", option="n_jobs")
    data = data.reset_index(drop=True)
    columns = [str(c) for c in data.columns]
    if len(set(columns)) != len(columns):
        raise InputError("the data have duplicate column names", option="data")
    # a wider mapping (e.g. every study column's type) is fine: only the data's columns are used
    type_map = {k: v for k, v in dict(types or {}).items() if k in columns}
    for name, kind in type_map.items():
        if kind not in VARIABLE_TYPES:
            raise InputError(f"'{kind}' is not one of {', '.join(VARIABLE_TYPES)}"
                             f"{did_you_mean(str(kind), VARIABLE_TYPES)}", option=f"types.{name}")
    full_types = {c: type_map.get(c) or infer_type(data[c])[0] for c in columns}
    for name, kind in full_types.items():
        if kind in NUMERIC_TYPES and not pd.api.types.is_numeric_dtype(data[name].dtype):
            raise InputError(f"'{name}' holds text, so it cannot be {kind}; "
                             "declare it binary, nominal or ordinal", option=f"types.{name}")
    method_map = check_names(methods, columns, "methods")
    for name, method in method_map.items():
        if method not in IMPUTATION_METHODS:
            raise InputError(f"'{method}' is not one of {', '.join(IMPUTATION_METHODS)}"
                             f"{did_you_mean(str(method), IMPUTATION_METHODS)}", option=f"methods.{name}")
    predictor_map = {k: list(v) for k, v in check_names(predictors, columns, "predictors").items()}
    exclude_map = {k: list(v) for k, v in check_names(exclude_predictors, columns,
                                                      "exclude_predictors").items()}
    passive_map = {k: str(v) for k, v in check_names(passive, columns, "passive").items()}
    delta_map = check_names(delta, columns, "delta")
    delta_by_map = {k: str(v) for k, v in check_names(delta_by, columns, "delta_by").items()}
    if impute_mask is None:
        mask = data.isna()
    else:
        if not isinstance(impute_mask, pd.DataFrame):
            raise InputError("give a DataFrame of True/False with the data's columns", option="impute_mask")
        extra = [c for c in impute_mask.columns if c not in columns]
        if extra:
            raise InputError(f"column '{extra[0]}' is not a column of the data", option="impute_mask")
        if len(impute_mask) != len(data):
            raise InputError(f"{len(impute_mask)} rows, but the data have {len(data)}", option="impute_mask")
        mask = pd.DataFrame({c: (impute_mask[c].to_numpy(dtype=bool) if c in impute_mask.columns
                                 else np.zeros(len(data), dtype=bool)) for c in columns})
    mask.columns = columns
    data.columns = columns

    problem = prepare(data, full_types, method_map, predictor_map, exclude_map, passive_map, mask, int(iterations),
                      int(donors), delta_map, delta_by_map)
    sequence = np.random.SeedSequence(seed)
    children = sequence.spawn(int(m))
    names = list(problem.visit_order + problem.passive_order)
    imputed: Dict[str, np.ndarray] = {}
    trace: List[Dict[str, Any]] = []
    for chain, (values, rows) in enumerate(run_chains(problem, children, int(n_jobs), progress)):
        for name in names:
            if name not in imputed:
                imputed[name] = np.empty((len(children),) + values[name].shape, dtype=values[name].dtype)
            imputed[name][chain] = values[name]
        trace.extend(rows)
    convergence = pd.DataFrame([row for row in trace if "share" not in row],
                               columns=["chain", "iteration", "variable", "mean", "sd"])
    level_shares = pd.DataFrame([row for row in trace if "share" in row],
                                columns=["chain", "iteration", "variable", "level", "share"])
    methods_used = {name: problem.variables[name].method for name in names}
    table = pd.DataFrame([{
        "variable": v.name, "type": v.type, "method": v.method or "(complete: predictor only)",
        "n_observed": len(v.fit_rows), "n_imputed": len(v.impute_rows),
        "n_left_missing": len(v.other_rows) - len(v.impute_rows),
        "predictors": "" if v.method in ("", "passive") else ", ".join(v.predictors),
    } for v in problem.variables.values()])
    keep_mask = pd.DataFrame({c: mask[c].to_numpy(dtype=bool) for c in columns})
    return ChainedImputation(m=int(m), iterations=int(iterations), seed=int(sequence.entropy), data=data,
                             impute_mask=keep_mask, imputed=imputed,
                             impute_rows={n: problem.variables[n].impute_rows.astype(np.int64) for n in names},
                             types=full_types,
                             methods=methods_used, convergence=convergence, variables=table, donors=int(donors),
                             delta=dict(delta_map), level_shares=level_shares,
                             sentences=(f"{int(m)} chains of {int(iterations)} iterations; seed "
                                        f"{int(sequence.entropy)}.",))


def run_chains(problem: Problem, children: List[np.random.SeedSequence], n_jobs: int,
               progress: bool) -> Iterator[Tuple[Dict[str, np.ndarray], List[Dict[str, Any]]]]:
    """Each chain's imputed values and trace, in chain order, as they arrive, run where :mod:`gapbook.compute` says
    (this process, local processes or a Dask cluster).

    Parameters
    ----------
    problem : Problem
        The prepared imputation problem.
    children : list of numpy.random.SeedSequence
        One seed per chain; the results do not depend on ``n_jobs`` or where the chains run.
    n_jobs : int
        Local worker processes (1: in this process); ignored on a cluster.
    progress : bool
        Show a progress bar.

    Returns
    -------
    iterator of (dict, list)
        :func:`run_chain`'s result for each chain, in chain order.
    """
    from tqdm import tqdm

    bar = tqdm(total=len(children), desc="imputation chains", disable=not progress, leave=False)
    try:
        jobs = 1 if len(children) == 1 else n_jobs
        for result in iterate_tasks(run_chain, ((problem, chain, child) for chain, child in enumerate(children)),
                                    n_jobs=jobs):
            bar.update(1)
            yield result
    finally:
        bar.close()
