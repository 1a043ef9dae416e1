"""Design columns along which a model's likelihood has no maximum, each named with why.

Two of gapbook's models lose their maximum for the same kind of reason: a two-valued design
column (a level of a category, a missing-value indicator, a 0/1 covariate) whose rows of one
value lie on one side of the outcome. For a Cox model that is a monotone partial likelihood
(Bryson & Johnson 1981); for a logistic model, complete or quasi-complete separation (Albert &
Anderson 1984). Either way the coefficient runs off to plus or minus infinity, the fit cannot
converge and its standard error explodes. The search over the columns (every two-valued
column, and the reference level of every treatment-coded category) is :func:`unbounded_columns`;
each model says what "one side" means for a set of rows. Looking at one column at a time names
the usual causes; a separation along a combination of columns is left to the fit's own
convergence check.

This module imports only the text helpers; :mod:`gapbook.survival` and :mod:`gapbook.models`
use it.
"""
from __future__ import annotations

import re
from typing import Callable, Dict, List, Optional, Sequence, Tuple

import numpy as np

from .text import counted

__all__ = ["LEVEL_COLUMN", "UNBOUNDED_ADVICE", "unbounded_columns", "unbounded_causes", "runs_off",
           "separated_logistic_terms"]

# A treatment-coded level column, 'C(site)[T.B]' or 'sex[T.male]': the factor and the level.
LEVEL_COLUMN = re.compile(r"^(?P<factor>[^:]+)\[T\.(?P<level>[^:]*)\]$")

# What to do about a coefficient that runs off: the page's sentence and check's warning say it alike.
UNBOUNDED_ADVICE = ("merge that level with another, or leave the covariate out; for a missing-value indicator or "
                    "category, prefer complete cases or multiple imputation")

# why(inside, rows, reference) -> why the coefficient of the 0/1 split 'inside' runs off, or None when it does not;
# 'rows' names the rows inside ("where it is 1", "at its reference level"), 'reference' says they are a reference level.
Why = Callable[[np.ndarray, str, bool], Optional[str]]


def unbounded_columns(exog: np.ndarray, names: Sequence[str], why: Why) -> Tuple[Tuple[str, str], ...]:
    """Each two-valued design column, and each treatment-coded category's reference level, whose ``why`` is not None.

    Parameters
    ----------
    exog : 2-D array
        The design matrix fitted.
    names : sequence of str
        The design columns' names (statsmodels' term names).
    why : callable
        ``why(inside, rows, reference)``: for the rows ``inside`` (a boolean array), why the
        coefficient runs off, or None.

    Returns
    -------
    tuple of (term, why)
        A category's reference level is named by the factor.

    References
    ----------
    Albert A, Anderson JA (1984). On the existence of maximum likelihood estimates in logistic
    regression models. Biometrika 71:1-10.
    Bryson MC, Johnson ME (1981). The incidence of monotone likelihood in the Cox model.
    Technometrics 23:381-383.
    """
    exog = np.asarray(exog, dtype=float)
    found: List[Tuple[str, str]] = []
    groups: Dict[str, List[int]] = {}
    for j, name in enumerate(names):
        values = np.unique(exog[:, j])
        if len(values) != 2:
            continue
        reason = why(exog[:, j] == values[1], f"where it is {values[1]:g}", False)
        if reason is not None:
            found.append((str(name), reason))
        level = LEVEL_COLUMN.match(str(name))
        if level is not None and set(values) == {0.0, 1.0}:
            groups.setdefault(level.group("factor"), []).append(j)
    for factor, columns in groups.items():
        inside = ~np.any(exog[:, columns] != 0, axis=1)
        if inside.all() or not inside.any():
            continue
        reason = why(inside, "at its reference level", True)
        if reason is not None:
            found.append((factor, reason))
    return tuple(found)


def unbounded_causes(unbounded: Sequence[Tuple[str, str]]) -> str:
    """The terms found, each with why, in one phrase ('term: why; term: why').

    Parameters
    ----------
    unbounded : sequence of (term, why)
        From :func:`unbounded_columns` (through the model's own search).

    Returns
    -------
    str
    """
    return "; ".join(f"{term}: {why}" for term, why in unbounded)


def runs_off(side: str, reference: bool, ratio: str) -> str:
    """'so its odds ratio runs to 0' ('high': to infinity); for a reference level the other levels' ratios, reversed.

    Parameters
    ----------
    side : str
        ``low`` (the column's coefficient runs to minus infinity) or ``high``.
    reference : bool
        The rows are a category's reference level (the other levels' ratios run the other way).
    ratio : str
        ``hazard ratio`` or ``odds ratio``.

    Returns
    -------
    str
    """
    runs = "infinity" if (side == "high") != reference else "0"
    return f"so {f'the {ratio}s of its other levels run' if reference else f'its {ratio} runs'} to {runs}"


def separated_logistic_terms(outcome: np.ndarray, exog: np.ndarray,
                             names: Sequence[str]) -> Tuple[Tuple[str, str], ...]:
    """Design columns that separate a binary outcome, completely or quasi-completely, with why.

    A logistic model's maximum likelihood estimate is infinite when some direction b of the
    coefficients has b'x >= 0 for every row with the outcome and b'x <= 0 for every row without
    it (Albert & Anderson 1984). One column at a time this happens when a 0/1 column's rows of
    one value all have, or all lack, the outcome; or, with an intercept, when the rows of the
    other value do; and, with an intercept, when a numeric column's values with the outcome all
    lie at or above (or at or below) its values without it (a threshold separates them).

    Parameters
    ----------
    outcome : array
        The fitted rows' outcome, 1 (has the outcome) or 0.
    exog : 2-D array
        The design matrix fitted.
    names : sequence of str
        The design columns' names.

    Returns
    -------
    tuple of (term, why)

    References
    ----------
    Albert A, Anderson JA (1984). On the existence of maximum likelihood estimates in logistic
    regression models. Biometrika 71:1-10.
    Heinze G, Schemper M (2002). A solution to the problem of separation in logistic
    regression. Stat Med 21:2409-2419.
    """
    y = np.asarray(outcome, dtype=float) > 0
    exog = np.asarray(exog, dtype=float)
    intercept = bool(exog.shape[1]) and bool(np.any(np.all(exog == exog[:1], axis=0) & (exog[0] != 0)))

    def why(inside: np.ndarray, rows: str, reference: bool) -> Optional[str]:
        n = counted(int(inside.sum()), "row")
        if not (inside & y).any():
            return f"none of the {n} {rows} has the outcome, {runs_off('low', reference, 'odds ratio')}"
        if not (inside & ~y).any():
            return f"all {n} {rows} have the outcome, {runs_off('high', reference, 'odds ratio')}"
        if intercept and not (~inside & y).any():
            return f"every row with the outcome is among the {n} {rows}, {runs_off('high', reference, 'odds ratio')}"
        if intercept and not (~inside & ~y).any():
            return (f"every row without the outcome is among the {n} {rows}, "
                    f"{runs_off('low', reference, 'odds ratio')}")
        return None

    found = list(unbounded_columns(exog, names, why))
    if intercept and y.any() and (~y).any():
        for j, name in enumerate(names):
            column = exog[:, j]
            if len(np.unique(column)) <= 2:
                continue
            with_outcome, without = column[y], column[~y]
            if with_outcome.min() >= without.max():
                kind = "completely" if with_outcome.min() > without.max() else "quasi-completely"
                found.append((str(name), f"every row with the outcome has a value at or above {without.max():g} and "
                                         f"every row without it a value at or below it ({kind} separated), so its "
                                         "odds ratio per unit runs to infinity"))
            elif with_outcome.max() <= without.min():
                kind = "completely" if with_outcome.max() < without.min() else "quasi-completely"
                found.append((str(name), f"every row with the outcome has a value at or below {without.min():g} and "
                                         f"every row without it a value at or above it ({kind} separated), so its "
                                         "odds ratio per unit runs to 0"))
    return tuple(found)
