"""Logistic models whose likelihood has no maximum (complete or quasi-complete separation) are named
the way a Cox model's monotone likelihood is: on the page (the fit's sentences) and by check, up front.

Source for the definitions: Albert A, Anderson JA (1984), Biometrika 71:1-10 -- the maximum likelihood
estimate is infinite when a direction b has b'x >= 0 for every row with the outcome and <= 0 for every row
without it. Data: palmerpenguins (PyPI package palmerpenguins), where Gentoo penguins live only on Biscoe
island (pandas crosstab: Biscoe 124 Gentoo of 168, Dream 0 of 124, Torgersen 0 of 52), so the island levels
Dream and Torgersen have no Gentoo at all: quasi-complete separation.
"""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from gapbook.models import AnalysisModel
from gapbook.params import load_params
from gapbook.pipeline import preflight
from gapbook.separation import separated_logistic_terms


@pytest.fixture(scope="module")
def gentoo(penguins):
    frame = penguins[["species", "island", "body_mass_g", "sex"]].dropna().copy()
    frame["gentoo"] = (frame["species"] == "Gentoo").astype(float)
    return frame


def test_island_levels_without_gentoo_are_named_as_separation(gentoo):
    counts = pd.crosstab(gentoo["island"], gentoo["gentoo"])  # pandas on the shipped data: the reference counts
    assert counts.loc["Dream", 1.0] == 0 and counts.loc["Torgersen", 1.0] == 0
    fit = AnalysisModel("gentoo ~ C(island) + body_mass_g", family="binomial").fit(gentoo)
    assert not fit.converged
    named = dict(fit.unbounded)
    assert named["C(island)[T.Dream]"] == (f"none of the {counts.loc['Dream'].sum()} rows where it is 1 has the "
                                           "outcome, so its odds ratio runs to 0")
    assert named["C(island)[T.Torgersen]"].startswith(f"none of the {counts.loc['Torgersen'].sum()} rows")
    text = " ".join(fit.fit_sentences())
    assert "complete or quasi-complete separation; Albert & Anderson 1984" in text and "Firth" in text
    assert "Merge that level with another" in text


def test_a_reference_level_that_separates_is_named_by_its_factor(gentoo):
    # Biscoe as the only level with Gentoo, and as the reference: every row with the outcome is at the reference
    # level, so the other levels' odds ratios run to 0 (with an intercept; Albert & Anderson 1984).
    frame = gentoo.assign(place=gentoo["island"].map({"Biscoe": "A Biscoe", "Dream": "Dream",
                                                       "Torgersen": "Torgersen"}))
    fit = AnalysisModel("gentoo ~ C(place)", family="binomial").fit(frame)
    biscoe = int((frame["place"] == "A Biscoe").sum())  # pandas count of the reference level's rows
    assert ("C(place)", f"every row with the outcome is among the {biscoe} rows at its reference level, so the "
            "odds ratios of its other levels run to 0") in fit.unbounded


def test_no_separation_gives_no_names_and_statsmodels_estimates(gentoo):
    # Sex against body mass overlaps in both sexes: a finite maximum, nothing named, the fit converges.
    frame = gentoo.assign(male=(gentoo["sex"] == "male").astype(float))
    fit = AnalysisModel("male ~ body_mass_g + C(island)", family="binomial").fit(frame)
    assert fit.unbounded == () and fit.converged


def test_a_threshold_on_a_numeric_column_by_hand():
    # Albert & Anderson (1984) with a hand-made column: y = 1 exactly where x > 2.5 (complete separation), then
    # x = 3 on both sides of the outcome (quasi-complete: b'x = x - 3 is >= 0 with the outcome, <= 0 without).
    x = np.array([1.0, 2.0, 2.5, 3.0, 4.0, 5.0])
    y = np.array([0, 0, 0, 1, 1, 1])
    exog = np.column_stack([np.ones(6), x])
    (term, why), = separated_logistic_terms(y, exog, ["Intercept", "x"])
    assert term == "x" and "(completely separated)" in why and "runs to infinity" in why
    x2 = np.array([1.0, 2.0, 3.0, 3.0, 4.0, 5.0])
    (term, why), = separated_logistic_terms(y, np.column_stack([np.ones(6), x2]), ["Intercept", "x"])
    assert "(quasi-completely separated)" in why
    # overlap (a y = 0 row above a y = 1 row): a finite maximum, nothing named
    assert separated_logistic_terms(np.array([0, 1, 0, 1, 1, 0]), exog, ["Intercept", "x"]) == ()


def test_check_warns_before_any_stage_runs(gentoo, tmp_path):
    frame = gentoo.reset_index(drop=True)
    frame.insert(0, "pid", range(1, len(frame) + 1))
    frame[["pid", "gentoo", "island", "body_mass_g"]].to_csv(tmp_path / "penguins.csv", index=False)
    (tmp_path / "params.yaml").write_text("data: {path: penguins.csv, id: pid}\nanalysis: {formula: 'gentoo ~ "
                                          "C(island) + body_mass_g', family: binomial, exposure: island}\n")
    lines: list = []
    preflight(load_params(tmp_path / "params.yaml"), only=["cases"], log=lines.append)
    warned = [line for line in lines if line.startswith("warning: cases:")]
    assert len(warned) == 1, lines
    assert "the logistic model has no finite estimate (complete or quasi-complete separation)" in warned[0]
    dream = int((frame["island"] == "Dream").sum())  # pandas count on the shipped data (sex known)
    assert f"C(island)[T.Dream]: none of the {dream} rows where it is 1 has the outcome" in warned[0]
