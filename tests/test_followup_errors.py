"""The follow-up modules name the options they were given; stage.py alone turns them into params keys.

DEVELOPERS.md ("Writing a stage", steps 1 and 3): a stage module raises
``InputError(message, option=...)`` and never writes a params key; ``stage.params_errors``
renames the option to its key and names the params file (or the data file, for an error
about the data rows themselves).
"""
from __future__ import annotations

import ast
import re
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

import gapbook.followup
from gapbook.errors import InputError, OptionName
from gapbook.followup.analysis import analyse_followup
from gapbook.followup.imputation import draw_posteriors
from gapbook.followup.intake import repeated_study
from gapbook.followup.mixed_model import fit_mixed_model
from gapbook.followup.repeated import repeated_outcome
from gapbook.params import Params
from gapbook.stage import params_errors

FOLLOWUP_MODULES = sorted(Path(gapbook.followup.__file__).parent.glob("*.py"))
SECTIONS = sorted(name for name in Params.model_fields if name != "source")
# a params key: a section, a dot and a key (``design.visits``, ``analysis.repeated.method``, ``data.id``);
# file names such as ``estimand.csv`` are not keys
PARAMS_KEY = re.compile(rf"\b(?:{'|'.join(SECTIONS)})\.(?!(?:csv|md|png|svg|html|json|yaml|ipynb|py)\b)[a-z_]+")
# a message that starts with a section and a colon (``data: subject B has 2 rows``) names the section
SECTION_PREFIX = re.compile(rf"^(?:{'|'.join(SECTIONS)})(?:\.[a-z_]+)*:")
ERRORS = {"InputError", "AnalysisError"}


def _strings(node: ast.AST):
    """Every string constant under ``node`` (the literal parts of f-strings included)."""
    for child in ast.walk(node):
        if isinstance(child, ast.Constant) and isinstance(child.value, str):
            yield child


def _docstrings(tree: ast.AST):
    for node in ast.walk(tree):
        if isinstance(node, (ast.Module, ast.ClassDef, ast.FunctionDef, ast.AsyncFunctionDef)) and node.body:
            first = node.body[0]
            if isinstance(first, ast.Expr) and isinstance(first.value, ast.Constant):
                yield first.value


def _error_calls(tree: ast.AST):
    for node in ast.walk(tree):
        if isinstance(node, ast.Call):
            name = node.func.id if isinstance(node.func, ast.Name) else getattr(node.func, "attr", "")
            if name in ERRORS:
                yield node


def params_keys_written(source: str):
    """Lines where ``source`` writes a params key: in an error's text, or as a bare key handed to a caller
    (``return "design.visits", why``; ``for key, column in (("design.subject", subject), ...)``)."""
    tree = ast.parse(source)
    found = set()
    for call in _error_calls(tree):
        if any(PARAMS_KEY.search(s.value) or SECTION_PREFIX.match(s.value) for arg in call.args for s in _strings(arg)):
            found.add(call.lineno)
    docstrings = {id(node) for node in _docstrings(tree)}
    for string in _strings(tree):
        text = string.value.strip()
        if id(string) not in docstrings and PARAMS_KEY.fullmatch(text):
            found.add(string.lineno)
    return sorted(found)


@pytest.mark.parametrize("path", FOLLOWUP_MODULES, ids=lambda p: p.name)
def test_no_followup_module_writes_a_params_key_in_an_error(path):
    assert params_keys_written(path.read_text(encoding="utf-8")) == []


def test_the_key_check_catches_what_it_is_for():
    # The ways the follow-up modules wrote keys before stage.py named them (each line an old message),
    # so the check above cannot pass by missing them.
    written = '''
raise InputError(f"design.visits: subject {s} has visit {v}; add it to design.visits")
raise InputError("analysis.repeated.method: 'x' is not one of reml, ml")
raise InputError(f"data: subject {s} has 2 rows for visit {v}")
raise AnalysisError(f"no participant has the outcome at visit {v}; drop it from design.visits")
raise InputError("the wide layout needs the subject identifier column as data.id")
def unestimable():
    return "design.visits", "no participant has the outcome"
'''
    assert len(params_keys_written(written)) == 6
    fine = '''
raise InputError(f"subject {s} has visit {v}; add it to the planned visits", option="visits")
raise InputError(f"is not one of ", OptionName("visits"), option="baseline")
raise InputError("see tables/estimand.csv")
'''
    assert params_keys_written(fine) == []


# ---------------------------------------------------------------------------- module level: the option

def long_trial():
    return pd.DataFrame({"id": list("AABBCC"), "week": [1, 2, 1, 2, 1, 2], "arm": pd.Categorical(list("aabbaa")),
                         "y": [1.0, 2.0, 1.5, np.nan, 0.5, 1.0]})


def raised(call, *args, **kwargs) -> InputError:
    with pytest.raises(InputError) as error:
        call(*args, **kwargs)
    return error.value


def test_intake_errors_name_the_option_they_were_given():
    data = long_trial()
    error = raised(repeated_study, data, data.isna(), layout="long", subject="id", visit="week", visits=[1, 2],
                   baseline=0)
    assert error.option == "baseline" and str(error) == "baseline: 0 is not one of visits (1, 2)"
    error = raised(repeated_study, data.assign(week=[1, 2, 1, 3, 1, 2]), data.isna(), layout="long", subject="id",
                   visit="week", visits=[1, 2])
    assert error.option == "visits" and str(error).startswith("visits: subject B has visit 3 (data row 4)")
    assert "add it to the planned visits, correct the 'week' column" in str(error)
    doubled = pd.concat([data, data.iloc[[0]]], ignore_index=True)
    error = raised(repeated_study, doubled, doubled.isna(), layout="long", subject="id", visit="week", visits=[1, 2])
    assert error.option == "data" and str(error).startswith("data: subject A has 2 rows for visit 1")
    wide = pd.DataFrame({"y1": [1.0], "y2": [2.0]})
    error = raised(repeated_study, wide, wide.isna(), layout="wide", subject="id", visit="week", visits=[1, 2],
                   ids=pd.Series(["A"]), outcome_columns=["y1"], outcome="y")
    assert error.option == "outcome_columns" and str(error).endswith("in the order of visits")


def test_model_errors_name_the_option_they_were_given():
    data = long_trial()
    error = raised(repeated_outcome, data, formula="y ~ arm + C(week)", subject="id", visit="week", visits=[1, 2],
                   exposure="armm")
    assert error.option == "exposure" and str(error).startswith("exposure: 'armm' is not a column")
    outcome = repeated_outcome(data, formula="y ~ arm + C(week)", subject="id", visit="week", visits=[1, 2],
                               exposure="arm")
    assert raised(fit_mixed_model, outcome, method="remel").option == "method"
    assert raised(draw_posteriors, outcome, m=1).option == "m"
    assert raised(analyse_followup, outcome, strategies=["mixed_modle"]).option == "strategies"
    assert raised(analyse_followup, outcome, strategies=["delta_adjusted"]).option == "delta"
    problem = outcome.with_values(np.where(np.arange(2) == 1, np.nan, outcome.values)).unestimable()
    assert isinstance(problem, InputError) and problem.option == "visits"
    assert str(problem) == ("visits: no participant has the outcome at visit 2; drop it from the planned visits "
                            "(or check the visit column and the outcome's missing markers)")


# ---------------------------------------------------------------------------- stage.py: the params key

def followup_params(**design):
    return Params.from_dict({"data": {"path": "trial.csv", "id": "id"},
                             "design": {"subject": "id", "visit": "week", "visits": [1, 2], **design},
                             "analysis": {"formula": "y ~ arm * C(week)", "exposure": "arm",
                                          "repeated": {"method": "reml"}}},
                            source="params.yaml")


@pytest.mark.parametrize("option, key", [
    ("visits", "design.visits"), ("baseline", "design.baseline"), ("layout", "design.layout"),
    ("outcome_columns", "design.outcome_columns"), ("method", "analysis.repeated.method"),
    ("strategies", "analysis.repeated.strategies"), ("delta", "analysis.repeated.delta"),
    ("exposure", "analysis.exposure"), ("formula", "analysis.formula"), ("m", "imputation.m"),
])
def test_an_option_of_the_design_or_analysis_repeated_is_named_by_its_key(option, key):
    # design is Optional[DesignSection] and analysis.repeated a section inside a section: both are looked up
    params = followup_params()
    with pytest.raises(InputError) as error, params_errors(params, "design", "analysis.repeated", "imputation",
                                                            "analysis"):
        raise InputError("what to do", option=option)
    assert str(error.value) == f"params.yaml: {key}: what to do"


def test_a_second_option_in_the_text_is_named_by_its_key_too():
    params = followup_params()
    with pytest.raises(InputError) as error, params_errors(params, "design"):
        raise InputError("0 is not one of ", OptionName("visits"), " (1, 2)", option="baseline")
    assert str(error.value) == "params.yaml: design.baseline: 0 is not one of design.visits (1, 2)"
    # user text that looks like an option is left as written: only OptionName parts are renamed
    with pytest.raises(InputError) as error, params_errors(params, "design"):
        raise InputError("'visits' {visits} is not a column", option="visit")
    assert str(error.value) == "params.yaml: design.visit: 'visits' {visits} is not a column"


def test_an_error_about_the_data_rows_names_the_data_file_and_options_may_be_renamed():
    params = followup_params()
    with pytest.raises(InputError) as error, params_errors(params, "design", data_file="trial.csv"):
        raise InputError("subject A has 2 rows for visit 1", option="data")
    assert str(error.value) == "trial.csv: subject A has 2 rows for visit 1"
    with pytest.raises(InputError) as error, params_errors(params, "design", keys={"ids": "data.id"}):
        raise InputError("name the subject identifier column", option="ids")
    assert str(error.value) == "params.yaml: data.id: name the subject identifier column"
