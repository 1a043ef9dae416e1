"""The public API: every module declares ``__all__``, what it lists is documented (numpydoc),
and the README's notebook example runs and gives what pandas and statsmodels give."""
from __future__ import annotations

import importlib
import inspect
import pkgutil
import re
from pathlib import Path

import pandas as pd
import pytest
import statsmodels.formula.api as smf

import gapbook

ROOT = Path(__file__).resolve().parents[1]
MODULES = sorted(m.name for m in pkgutil.walk_packages(gapbook.__path__, "gapbook."))

# numpydoc section headers: a title line underlined with dashes (numpydoc docstring guide).
PARAMETERS = re.compile(r"^\s*Parameters\s*\n\s*-{3,}\s*$", re.M)
RETURNS = re.compile(r"^\s*(Returns|Yields)\s*\n\s*-{3,}\s*$", re.M)


def exported(module_name: str):
    module = importlib.import_module(module_name)
    for name in module.__all__:
        value = getattr(module, name)
        if (inspect.isfunction(value) or inspect.isclass(value)) and value.__module__ == module_name:
            yield f"{module_name}.{name}", value


def documentation_gaps(value) -> list:
    """What a public function's or class's docstring lacks, by the numpydoc layout."""
    doc = inspect.getdoc(value) or ""
    if not doc.strip():
        return ["a docstring"]
    if inspect.isclass(value):
        return []
    gaps = []
    signature = inspect.signature(value)
    takes = [p for p in signature.parameters.values() if p.name not in ("self", "cls")]
    if takes and not PARAMETERS.search(doc):
        gaps.append("a Parameters section")
    returns_nothing = signature.return_annotation in (None, "None", "NoReturn")
    if not returns_nothing and not RETURNS.search(doc):
        gaps.append("a Returns section")
    return gaps


@pytest.mark.parametrize("module_name", MODULES)
def test_every_module_declares_what_it_exports(module_name):
    module = importlib.import_module(module_name)
    assert isinstance(getattr(module, "__all__", None), (list, tuple)), f"{module_name} has no __all__"
    missing = [name for name in module.__all__ if not hasattr(module, name)]
    assert not missing, f"{module_name}.__all__ names what it does not define: {missing}"
    assert len(set(module.__all__)) == len(module.__all__), f"{module_name}.__all__ repeats a name"


def test_every_exported_function_is_documented_with_parameters_and_returns():
    # A function another module, a notebook or a user imports (it is in __all__) says what it takes
    # and what it gives; the check cannot judge the words, only that the sections are there.
    gaps = {}
    for module_name in MODULES:
        for qualified, value in exported(module_name):
            missing = documentation_gaps(value)
            if missing:
                gaps[qualified] = missing
    assert not gaps, "numpydoc sections missing: " + "; ".join(f"{k}: {', '.join(v)}" for k, v in gaps.items())


def test_the_docstring_check_catches_missing_sections():
    def one_line_only(data, *, alpha=0.05) -> float:
        """A summary line and nothing else."""

    def sections_but_no_returns(data) -> float:
        """A summary line.

        Parameters
        ----------
        data : DataFrame
        """

    def nothing_to_say() -> None:
        """Takes nothing, returns nothing: one line is enough."""

    assert documentation_gaps(one_line_only) == ["a Parameters section", "a Returns section"]
    assert documentation_gaps(sections_but_no_returns) == ["a Returns section"]
    assert documentation_gaps(nothing_to_say) == []
    assert documentation_gaps(lambda x: x) == ["a docstring"]


def test_the_package_api_is_complete_and_fully_documented():
    for name in gapbook.__all__:
        value = getattr(gapbook, name)
        if callable(value):
            assert not documentation_gaps(value), (name, documentation_gaps(value))
    assert "read_study" in dir(gapbook) and "audit_study" in dir(gapbook)
    with pytest.raises(AttributeError):
        gapbook.no_such_name


def readme_example() -> str:
    """The first python block under the README's notebook heading."""
    text = (ROOT / "README.md").read_text()
    section = text.split("## One question in a notebook", 1)[1]
    return re.search(r"```python\n(.*?)```", section, re.S).group(1)


def test_the_readme_notebook_example_runs_and_agrees_with_pandas_and_statsmodels():
    code = readme_example()
    assert len([line for line in code.splitlines() if line.strip()]) <= 7
    namespace: dict = {}
    exec(compile(code, "README.md", "exec"), namespace)  # our own documentation, not user input
    study, audit, model, cases = (namespace[name] for name in ("study", "audit", "model", "cases"))
    # Reference: pandas counting the markers and codes the example declares in the shipped file's text.
    raw = pd.read_csv(gapbook.demo_csv_path(), dtype=str, keep_default_na=False)
    table = audit.tables()["audit_variables"].set_index("variable")
    outcome = raw["hba1c_12m"].str.strip().str.casefold().isin(["", "na", "?", "-7", "-9"])
    assert table.loc["hba1c_12m", "n_missing"] == int(outcome.sum())
    # Reference: statsmodels OLS drops incomplete rows itself; same coefficients and rows.
    fitted = smf.ols(model.formula, data=study.data).fit()
    estimates = cases.estimates().set_index("term")
    assert (estimates["n_used"] == fitted.nobs).all()
    assert estimates["estimate"].to_numpy() == pytest.approx(fitted.params[estimates.index].to_numpy(), rel=1e-10)
