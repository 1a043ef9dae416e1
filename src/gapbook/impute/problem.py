"""The prepared imputation problem as the chains receive it: variables, values, codes, options.

Built by :func:`gapbook.impute.preparation.prepare` and sent to every worker that runs a
chain, so this module needs numpy only: a worker that unpickles a problem imports nothing
of pandas or the analysis models.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Dict, Tuple

import numpy as np

__all__ = ["Variable", "Problem", "initial_design", "row_indices"]


# ---------------------------------------------------------------------------
# the prepared problem (built once, shared read-only by every chain)

@dataclass(frozen=True)
class Variable:
    """One column as the engine sees it."""

    name: str
    type: str
    method: str                      # "" for a complete variable that is only a predictor
    columns: np.ndarray              # its columns in the design matrix
    center: float                    # numbers: observed mean (design holds (x - center) / scale)
    scale: float
    levels: Tuple[Any, ...]          # categories as stored in the data (categorical types)
    used_levels: np.ndarray          # positions (in levels) of the observed levels; the first is the reference
    fit_rows: np.ndarray             # rows where observed (its own model is fitted here)
    impute_rows: np.ndarray          # rows to impute
    other_rows: np.ndarray           # rows not observed: impute_rows and not-to-impute missing rows, sorted
    predictor_columns: np.ndarray    # design columns of its predictors, intercept first
    predictors: Tuple[str, ...]
    categorical: bool                # binary, nominal or ordinal: coded by level, not by value
    passive_formula: str = ""
    passive_inputs: Tuple[str, ...] = ()


@dataclass(frozen=True)
class Problem:
    """Everything a chain needs: the variables, their values and codes, the visit order and options.

    It holds no design matrix: each chain builds its own from the values and codes
    (:func:`initial_design`), so neither the process that prepares the problem nor a worker
    that receives it holds a starting design beside the chains' own. Row indices are 32-bit
    below 2**31 rows, every complete variable shares one array of all rows, and category
    codes take one byte below 100 levels.
    """

    n_rows: int
    width: int                       # columns of the design matrix; column 0 is the intercept
    codes: Dict[str, np.ndarray]     # categorical: index into used_levels per row (-1 where not observed);
                                     # int8 below 100 levels (int16 below 30,000)
    variables: Dict[str, Variable]
    visit_order: Tuple[str, ...]     # incomplete, non-passive variables
    passive_order: Tuple[str, ...]
    iterations: int
    donors: int
    delta_rows: Dict[str, Any]       # variable -> shift per imputed row (array), scalar, or (group, lookup)
    originals: Dict[str, np.ndarray]  # numbers on their own scale (donor values are copied from here, exactly)


def initial_design(problem: Problem) -> np.ndarray:
    """The design matrix a chain starts from: (n, P), Fortran order, column 0 the intercept.

    Numbers are standardised ((value - center) / scale; cells not to impute count as 0 on
    the original scale), categories dummy-coded against their first observed level (a
    missing code is the reference). Cells to impute hold these starting values until the
    chain's first draw replaces them.

    Parameters
    ----------
    problem : Problem
        The prepared imputation problem.

    Returns
    -------
    numpy.ndarray
    """
    design = np.zeros((problem.n_rows, problem.width), order="F")
    design[:, 0] = 1.0
    for variable in problem.variables.values():
        if variable.categorical:
            local = problem.codes[variable.name]
            for j, col in enumerate(variable.columns):
                design[:, col] = (local == j + 1)
        else:
            design[:, variable.columns[0]] = (problem.originals[variable.name] - variable.center) / variable.scale
    return design


def row_indices(n: int) -> np.dtype:
    """The integer type of row indices for n rows: 32-bit where it suffices (half the memory of 64-bit).

    Parameters
    ----------
    n : int
        The number of rows.

    Returns
    -------
    numpy.dtype
    """
    return np.dtype(np.int32) if n < 2 ** 31 else np.dtype(np.int64)
