"""The runner stops before any stage when the model cannot be fitted for a reason the user can fix."""
from __future__ import annotations

import pandas as pd
import pytest

from gapbook.errors import InputError
from gapbook.intake import load_study
from gapbook.params import Params
from gapbook.pipeline import check_model_up_front, resolve_stages


def study_with(tmp_path, formula, **analysis):
    path = tmp_path / "s.csv"
    pd.DataFrame({"y": [1.0, 2.0, 3.5, 4.0, 2.2, 3.1], "x": [0.5, 1.0, 1.5, 2.5, 1.1, 0.9],
                  "empty": [""] * 6, "count": [0, 1, 2, 1, 0, 3]}).to_csv(path, index=False)
    params = Params.from_dict({"data": {"path": str(path)},
                               "variables": {"empty": {"type": "continuous"}},
                               "analysis": {"formula": formula, **analysis}})
    return params, load_study(params)


@pytest.mark.parametrize("formula,analysis,needle", [
    ("y ~ x + empty", {}, "uses 'empty', which has no observed values"),
    ("empty ~ x", {}, "the outcome 'empty' has no observed values"),
    ("y ~ x + (count", {}, "analysis.formula"),
    ("y ~ x", {"family": "binomial"}, "binomial"),
])
def test_model_problems_stop_before_any_stage(tmp_path, formula, analysis, needle):
    # a formula patsy cannot parse stops already when the params are read; the rest up front
    with pytest.raises(InputError, match=needle):
        params, study = study_with(tmp_path, formula, **analysis)
        check_model_up_front(params, study)


def test_a_fittable_model_passes_and_names_its_columns(tmp_path):
    params, study = study_with(tmp_path, "y ~ x + count")
    # the outcome and the right-hand-side columns as the formula writes them
    assert check_model_up_front(params, study) == ("y", ["x", "count"])


def test_stage_order_is_the_pipeline_order_whatever_the_order_asked(tmp_path):
    params, _ = study_with(tmp_path, "y ~ x")
    assert resolve_stages(["impute", "audit"], params) == ["audit", "impute"]
