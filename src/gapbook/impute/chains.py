"""One chain of chained-equations imputation: its state, its visits, and :func:`run_chain`.

This module is what a worker imports to run a chain (locally or on a Dask cluster), so it
needs only numpy and scipy (and the expression language where a passive formula is used),
not pandas or the analysis models.

A chain starts from random draws of each variable's observed values, then visits the
incomplete variables in a fixed order, ``iterations`` times. A visit fits the variable's
conditional model to the rows where it is observed, draws the model's parameters from
their (approximate) posterior and draws new values for the cells to impute. What the
chain holds of its own (and so what it costs per worker thread): the design matrix it
builds from the problem (float64, rows x design columns) and copies of the codes or
values of the variables it imputes; everything else it reads from the shared problem.
"""
from __future__ import annotations

from typing import Any, Dict, List, Optional

import numpy as np
from scipy import linalg
from scipy.special import expit

from ..errors import AnalysisError
from .numerics import (augmentation, cholesky, gram_rows, linear_draw, multinomial_terms, newton, ordinal_terms,
                       pmm_match, predict_rows)
from .problem import Problem, Variable, initial_design

__all__ = ["Chain", "run_chain"]


class Chain:
    """The state of one chain: its own copy of the design, current category codes and warm starts."""

    def __init__(self, problem: Problem, rng: np.random.Generator):
        self.problem = problem
        self.rng = rng
        self.design = initial_design(problem)
        # only the variables the chain writes get copies; the others are read from the problem
        imputed = set(problem.visit_order + problem.passive_order)
        self.codes = {name: np.array(code, copy=True) if name in imputed else code
                      for name, code in problem.codes.items()}
        self.originals = {name: np.array(values, copy=True) if name in imputed else values
                          for name, values in problem.originals.items()}
        self.warm: Dict[str, np.ndarray] = {}
        self.gram = np.zeros((0, 0))
        self.dependents: Dict[str, List[str]] = {name: [] for name in problem.variables}
        for name in problem.passive_order:
            for source in problem.variables[name].passive_inputs:
                self.dependents[source].append(name)

    # -- writing values into the design
    def _set_numeric(self, variable: Variable, standardised: np.ndarray,
                     original: Optional[np.ndarray] = None) -> None:
        """Write imputed numbers; ``original`` (own scale) is given where exact values exist, so a pmm donor's
        value is copied as observed rather than recovered from the standardised design with round-off."""
        self.design[variable.impute_rows, variable.columns[0]] = standardised
        self.originals[variable.name][variable.impute_rows] = (
            standardised * variable.scale + variable.center if original is None else original)

    def _set_codes(self, variable: Variable, local: np.ndarray) -> None:
        rows = variable.impute_rows
        self.codes[variable.name][rows] = local
        for j, col in enumerate(variable.columns):
            self.design[rows, col] = (local == j + 1)

    def _refresh_gram(self, variable: Variable) -> None:
        cols = variable.columns
        if len(cols) == 0:
            return
        block = self.design.T @ self.design[:, cols]
        self.gram[:, cols] = block
        self.gram[cols, :] = block.T

    def original_values(self, name: str, rows: np.ndarray) -> np.ndarray:
        variable = self.problem.variables[name]
        if variable.categorical:
            return self.codes[name][rows].astype(float)
        return self.originals[name][rows]

    # -- start
    def start(self) -> None:
        for name in self.problem.visit_order:
            variable = self.problem.variables[name]
            pick = self.rng.integers(0, len(variable.fit_rows), size=len(variable.impute_rows))
            donor_rows = variable.fit_rows[pick]
            if variable.categorical:
                self._set_codes(variable, self.codes[name][donor_rows])
            else:
                self._set_numeric(variable, self.design[donor_rows, variable.columns[0]],
                                  self.originals[name][donor_rows])
        for name in self.problem.passive_order:
            self._update_passive(self.problem.variables[name], refresh=False)
        self.gram = self.design.T @ self.design

    # -- passive
    def _update_passive(self, variable: Variable, refresh: bool = True) -> None:
        rows = variable.impute_rows
        from .preparation import evaluate_passive  # the expression language, imported only where a formula is used

        inputs = {source: self.original_values(source, rows) for source in variable.passive_inputs}
        values = evaluate_passive(variable.passive_formula, inputs)
        if not np.all(np.isfinite(values)):
            raise AnalysisError(f"imputation.passive.{variable.name}: the formula gave non-finite values for some "
                                "imputed rows; check its inputs' imputed values (e.g. division by zero)")
        self._set_numeric(variable, (values - variable.center) / variable.scale, values)
        if refresh:
            self._refresh_gram(variable)

    # -- delta
    def _shift(self, name: str) -> Any:
        spec = self.problem.delta_rows.get(name)
        if spec is None:
            return 0.0
        if not isinstance(spec, tuple):
            return spec
        kind, by, lookup = spec
        rows = self.problem.variables[name].impute_rows
        group = self.problem.variables[by]
        if kind == "categorical":
            local = self.codes[by][rows]
            positions = np.where(local >= 0, group.used_levels[np.maximum(local, 0)], len(group.levels))
            return lookup[positions]
        values = self.original_values(by, rows)
        shift = np.zeros(len(rows))
        for key, value in lookup.items():
            shift[np.isclose(values, key)] = value
        return shift

    # -- one visit
    def visit(self, name: str) -> None:
        variable = self.problem.variables[name]
        if variable.method in ("pmm", "normal"):
            gram_observed = self.gram - gram_rows(self.design, variable.other_rows)
            self._visit_linear(variable, gram_observed)
        elif variable.method in ("logistic", "multinomial"):
            self._visit_multinomial(variable)
        else:
            self._visit_ordinal(variable)
        self._refresh_gram(variable)
        for dependent in self.dependents[name]:
            self._update_passive(self.problem.variables[dependent])

    def _visit_linear(self, variable: Variable, gram_observed: np.ndarray) -> None:
        cols = variable.predictor_columns
        y_col = variable.columns[0]
        # The outcome's cross-products come from its observed rows alone (zeros elsewhere), so the fit
        # cannot depend, even by round-off in the subtraction above, on the values last imputed for it:
        # a delta-shifted chain then draws exactly the same models as the unshifted one.
        y_observed = np.zeros(self.design.shape[0])
        y_observed[variable.fit_rows] = self.design[variable.fit_rows, y_col]
        gram_observed[:, y_col] = gram_observed[y_col, :] = self.design.T @ y_observed
        gram_observed[y_col, y_col] = float(y_observed @ y_observed)
        beta_hat, beta_draw, sigma = linear_draw(gram_observed, y_col, cols, len(variable.fit_rows), self.rng)
        if variable.method == "normal":
            predicted_missing = predict_rows(self.design, variable.impute_rows, cols, beta_draw)
            values = predicted_missing + sigma * self.rng.standard_normal(len(predicted_missing))
        else:
            # products with the whole design (no row gathering), one coefficient vector at a
            # time: two matrix-vector products take about a third of the time of one product
            # with a two-column matrix (the BLAS handles a matrix that narrow poorly)
            coef_hat, coef_draw = np.zeros(self.design.shape[1]), np.zeros(self.design.shape[1])
            coef_hat[cols], coef_draw[cols] = beta_hat, beta_draw
            predicted_observed = np.take(self.design @ coef_hat, variable.fit_rows, mode="clip")
            predicted_missing = np.take(self.design @ coef_draw, variable.impute_rows, mode="clip")
            donor = pmm_match(predicted_observed, predicted_missing, self.problem.donors, self.rng)
            donor_rows = np.take(variable.fit_rows, donor, mode="clip")
            shift = self._shift(variable.name)
            self._set_numeric(variable, np.take(self.design[:, y_col], donor_rows, mode="clip") + shift,
                              np.take(self.originals[variable.name], donor_rows, mode="clip") + shift * variable.scale)
            return
        self._set_numeric(variable, values + self._shift(variable.name))

    def _posterior_draw(self, variable: Variable, ordered: bool) -> Optional[np.ndarray]:
        """Fit the variable's categorical model (warm-started Newton) and draw its parameters from the
        normal approximation to their posterior; None when only one category was observed."""
        cols = variable.predictor_columns
        n_classes = len(variable.used_levels)
        if n_classes < 2:
            self._set_codes(variable, np.zeros(len(variable.impute_rows), dtype=np.int64))
            return None
        y = self.codes[variable.name][variable.fit_rows]
        augment = augmentation(self.gram, cols, self.design.shape[0], n_classes)
        start = self.warm.get(variable.name)
        terms = ordinal_terms if ordered else multinomial_terms
        estimate, info = newton(terms, self.design, variable.fit_rows, y, cols[1:] if ordered else cols, augment,
                                start, n_classes, ordered=ordered)
        self.warm[variable.name] = estimate
        lower = cholesky(info)
        return estimate + linalg.solve_triangular(lower.T, self.rng.standard_normal(len(estimate)), lower=False)

    def _visit_multinomial(self, variable: Variable) -> None:
        draw = self._posterior_draw(variable, ordered=False)
        if draw is None:
            return
        cols = variable.predictor_columns
        n_classes = len(variable.used_levels)
        eta = predict_rows(self.design, variable.impute_rows, cols, draw.reshape(n_classes - 1, len(cols)).T)
        if n_classes == 2:
            # delta on the log-odds scale of the second (observed) level
            eta[:, 0] = eta[:, 0] + self._shift(variable.name)
        eta_all = np.concatenate([np.zeros((len(eta), 1)), eta], axis=1)
        eta_all -= eta_all.max(axis=1, keepdims=True)
        prob = np.exp(eta_all)
        prob /= prob.sum(axis=1, keepdims=True)
        cumulative = np.cumsum(prob, axis=1)[:, :-1]
        u = self.rng.random(len(eta))
        self._set_codes(variable, (u[:, None] > cumulative).sum(axis=1))

    def _visit_ordinal(self, variable: Variable) -> None:
        draw = self._posterior_draw(variable, ordered=True)
        if draw is None:
            return
        cols = variable.predictor_columns
        n_classes = len(variable.used_levels)
        theta = np.sort(draw[:n_classes - 1])
        eta = predict_rows(self.design, variable.impute_rows, cols[1:], draw[n_classes - 1:])
        cumulative = expit(theta[None, :] - eta[:, None])
        u = self.rng.random(len(eta))
        self._set_codes(variable, (u[:, None] > cumulative).sum(axis=1))

    # -- the imputed values in the data's own coding
    def imputed(self, name: str) -> np.ndarray:
        variable = self.problem.variables[name]
        rows = variable.impute_rows
        if variable.categorical:
            return variable.used_levels[self.codes[name][rows]].astype(np.int32)
        return self.original_values(name, rows)

    def summary_rows(self, chain: int, iteration: int) -> List[Dict[str, Any]]:
        """The convergence trace at this iteration: mean and SD of each variable's imputed values, and for an
        unordered variable of three or more levels the share of each level (rows with a ``share``)."""
        rows = []
        for name in self.problem.visit_order + self.problem.passive_order:
            positions = self.imputed(name)
            values = positions.astype(float)
            rows.append({"chain": chain, "iteration": iteration, "variable": name, "mean": float(values.mean()),
                         "sd": float(values.std(ddof=1)) if len(values) > 1 else float("nan")})
            variable = self.problem.variables[name]
            if variable.categorical and variable.type == "nominal" and len(variable.levels) >= 3 and len(positions):
                shares = np.bincount(positions, minlength=len(variable.levels)) / len(positions)
                rows.extend({"chain": chain, "iteration": iteration, "variable": name, "level": str(level),
                             "share": float(share)} for level, share in zip(variable.levels, shares))
        return rows


def run_chain(problem: Problem, chain: int, seed: np.random.SeedSequence):
    """Run one chain to the end; returns its imputed values per variable and its convergence rows.

    Parameters
    ----------
    problem : Problem
        The prepared imputation problem.
    chain : int
        The chain's number (recorded in its convergence rows).
    seed : numpy.random.SeedSequence
        The chain's own seed.

    Returns
    -------
    (dict, list)
        Imputed values per variable, and one convergence row per variable and iteration.

    References
    ----------
    van Buuren S, Brand JPL, Groothuis-Oudshoorn CGM, Rubin DB (2006). Fully conditional
    specification in multivariate imputation. J Stat Comput Simul 76:1049-1064.
    """
    state = Chain(problem, np.random.Generator(np.random.PCG64(seed)))
    state.start()
    trace: List[Dict[str, Any]] = []
    for iteration in range(1, problem.iterations + 1):
        for name in problem.visit_order:
            state.visit(name)
        trace.extend(state.summary_rows(chain, iteration))
    imputed = {name: state.imputed(name) for name in problem.visit_order + problem.passive_order}
    return imputed, trace
