"""A binary-outcome study the kit has never seen, built from the open palmerpenguins data: its
record answers "what is the effect (odds ratio), under which assumption, how sure" on the landing
page's first screen, on the odds-ratio scale, with numbers that join a plain statsmodels fit, and
nothing in it comes from the demo study."""
from __future__ import annotations

import json
import re
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
import statsmodels.formula.api as smf
from palmerpenguins import load_penguins

from gapbook.inference import format_estimate, format_p

from conftest import record_path, run_gapbook

FORMULA = "sex ~ bill_depth_mm + body_mass_kg + C(year) + species"
PARAMS = """\
study:
  name: "Penguin sex from bill depth (palmerpenguins)"
data:
  path: data/penguins.csv
  id: penguin
variables:
  sex: {type: binary, levels: [female, male]}
  species: {type: nominal, levels: [Adelie, Chinstrap, Gentoo]}
  island: {type: nominal}
  year: {type: nominal}
analysis:
  formula: "sex ~ bill_depth_mm + body_mass_kg + C(year) + species"
  family: binomial
  exposure: bill_depth_mm
imputation:
  m: 5
  iterations: 5
  seed: 7
"""


@pytest.fixture(scope="module")
def penguin_study(tmp_path_factory):
    """palmerpenguins (PyPI package palmerpenguins): 344 penguins, sex missing for 11, the body
    measures for 2 (Horst, Hill & Gorman 2020). Body mass is given in kg so the odds ratio per unit
    reads; the year (2007-2009) is an integer-coded category."""
    folder = tmp_path_factory.mktemp("penguin-study")
    (folder / "data").mkdir()
    frame = load_penguins()
    frame.insert(0, "penguin", [f"P{i:03d}" for i in range(1, len(frame) + 1)])
    frame["body_mass_kg"] = frame["body_mass_g"] / 1000
    frame.to_csv(folder / "data" / "penguins.csv", index=False)
    (folder / "params.yaml").write_text(PARAMS)
    result = run_gapbook("run", "params.yaml", "--only", "cases,indicator,impute,report", "--out", "records",
                         cwd=folder)
    return folder, record_path(result)


def _first_screen(index: str) -> str:
    """The landing page up to the participant flow: what a reader sees before scrolling."""
    return index[:index.index("<h2>Participant flow")]


def test_the_landing_page_answers_effect_assumption_and_certainty_first(penguin_study):
    folder, record = penguin_study
    index = (record / "report" / "index.html").read_text()
    screen = _first_screen(index)
    estimates = pd.read_csv(record / "tables" / "estimates.csv")
    mi = estimates[(estimates["strategy"] == "multiple_imputation") & (estimates["term"] == "bill_depth_mm")].iloc[0]
    # what: the odds ratio (exp of the pooled log odds ratio), under which assumption, how sure (CI and p)
    lead = re.search(r'<p class="answer"><b>(.*?)</b></p>', screen, re.S).group(1)
    assert "odds ratio for bill_depth_mm is " + format_estimate(np.exp(mi["estimate"])) in lead
    assert "which assumes missing at random" in lead
    assert (f"95% confidence interval {format_estimate(np.exp(mi['ci_lower']))} to "
            f"{format_estimate(np.exp(mi['ci_upper']))}") in lead
    assert format_p(mi["p_value"]).replace("<", "&lt;") in lead
    table = re.search(r'<table id="estimates">.*?</table>', screen, re.S).group(0)
    assert "<th class=\"\">odds ratio</th>" in table
    for label in ("Complete cases", "Missing category / indicator", "Multiple imputation"):
        assert label in table
    assert "missing at random" in table and 'id="effect-figure"' in screen


def test_the_odds_ratios_join_a_plain_statsmodels_fit_on_the_raw_file(penguin_study):
    # Source: statsmodels GLM (binomial, logit) on the raw CSV read by pandas, rows with every model
    # variable present; sex coded 1 for the second declared level (male). Terms join by name, including
    # the integer-coded year (C(year)[T.2008], as statsmodels names it).
    folder, record = penguin_study
    raw = pd.read_csv(folder / "data" / "penguins.csv")
    used = raw.dropna(subset=["sex", "bill_depth_mm", "body_mass_kg", "year", "species"]).assign(
        sex=lambda d: (d["sex"] == "male").astype(float))
    reference = smf.glm(FORMULA, data=used, family=sm.families.Binomial()).fit()
    estimates = pd.read_csv(record / "tables" / "estimates.csv")
    complete = estimates[estimates["strategy"] == "complete_case"].set_index("term")
    assert list(complete.index) == list(reference.params.index)
    assert "C(year)[T.2008]" in complete.index
    assert np.allclose(complete["estimate"], reference.params, rtol=1e-6)
    assert np.allclose(complete["exp_estimate"], np.exp(reference.params), rtol=1e-6)
    assert np.allclose(complete["exp_ci_lower"], np.exp(reference.conf_int()[0]), rtol=1e-6)
    assert (complete["n_used"] == len(used)).all() and len(used) == 333
    assert estimates["converged"].astype(str).eq("True").all()
    # multiple imputation: Barnard-Rubin df never above the complete-data df n - p
    mi = estimates[estimates["strategy"] == "multiple_imputation"]
    assert (mi["df"] < mi["n_used"] - len(reference.params)).all()


def test_nothing_from_the_demo_study_and_no_machine_output_on_its_pages(penguin_study):
    _, record = penguin_study
    demo_words = re.compile(r"hba1c|HbA1c|text-message|known true value|TRUE_ARM_EFFECT|arm\[T\.sms\]")
    for path in sorted(record.rglob("*")):
        if path.is_file() and path.suffix in (".html", ".ipynb", ".csv", ".md", ".json", ".yaml"):
            assert not demo_words.search(path.read_text(errors="replace")), path
    for page in sorted((record / "report").glob("*.html")):
        text = page.read_text()
        shown = re.sub(r"<(style|script)[^>]*>.*?</\1>", "", text, flags=re.S)
        cells = re.findall(r"<td[^>]*>([^<]*)</td>", shown)
        assert not [c for c in cells if c.strip() in ("NaN", "&lt;NA&gt;", "nan", "None")], page.name
        assert not [c for c in cells if re.fullmatch(r"-?\d+\.0+", c.strip())], page.name  # counts as 1200.0
        assert not [c for c in cells if c.rstrip().endswith("...")], page.name  # no cell cut short
