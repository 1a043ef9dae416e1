"""Tests of the shared analysis-model fit: input checks a user can trip over."""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from gapbook.errors import InputError
from gapbook.models import fit_model


def test_an_offset_column_with_values_at_or_below_zero_is_an_input_error():
    # The offset column holds person-time and the model uses its log (McCullagh & Nelder 1989, sec. 6.2);
    # a column of log person-time (negative for under a year) would otherwise turn rows into NaN silently.
    rng = np.random.default_rng(4)
    years = rng.uniform(0.5, 3.0, 200)
    frame = pd.DataFrame({"events": rng.poisson(years).astype(float), "x": rng.normal(0, 1, 200),
                          "years": years, "log_years": np.log(years)})
    fit = fit_model(frame, formula="events ~ x", family="poisson", offset="years")
    assert fit.nobs == 200
    with pytest.raises(InputError, match=r"^offset: 'log_years' has values <= 0"):
        fit_model(frame, formula="events ~ x", family="poisson", offset="log_years")


@pytest.mark.parametrize("formula", ["y ~ x + (arm", "y ~ x +", "y ~ x ** "])
def test_a_formula_that_does_not_parse_is_an_input_error_naming_the_option(formula):
    # Formula grammar of patsy (the library statsmodels formulas use): these do not parse there either.
    import patsy
    with pytest.raises(patsy.PatsyError):
        patsy.ModelDesc.from_formula(formula)
    from gapbook.models import check_formula
    with pytest.raises(InputError, match=r"^formula: .* is not a valid formula"):
        check_formula(formula, ["y", "x", "arm"])
