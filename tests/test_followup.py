"""The follow-up stage's analyses side by side, and its figures drawing exactly what the tables hold."""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from gapbook.errors import InputError
from gapbook.followup.analysis import FOLLOWUP_STRATEGIES, analyse_followup
from gapbook.followup.audit import audit_followup
from gapbook.followup.comparisons import carry_last_observation_forward, completers
from gapbook.followup.demo import simulate_followup_trial
from gapbook.followup.imputation import impute_repeated
from gapbook.followup.mixed_model import fit_mixed_model
from gapbook.followup.repeated import repeated_outcome
from gapbook.plots import followup as plots
from gapbook.vocabulary import REFERENCE_BASED_CAUTIONS

SETTINGS = dict(m=4, seed=12, burn_in=10, thin=2)


@pytest.fixture(scope="module")
def trial():
    data = simulate_followup_trial(n_per_arm=80, seed=21)
    outcome = repeated_outcome(data.data, formula="chg ~ arm * C(week) + base * C(week)", subject="subject",
                               visit="week", visits=data.weeks, exposure="arm")
    analysis = analyse_followup(outcome, strategies=FOLLOWUP_STRATEGIES, delta=1.5, **SETTINGS)
    return data, outcome, analysis


def test_every_strategy_reported_at_every_visit_and_headline_at_the_last(trial):
    _, outcome, analysis = trial
    effects = analysis.effects
    assert list(dict.fromkeys(effects["strategy"])) == list(FOLLOWUP_STRATEGIES)
    assert len(effects) == len(FOLLOWUP_STRATEGIES) * outcome.n_visits
    headline = analysis.headline()
    assert set(headline["visit"]) == {16} and list(headline["strategy"]) == list(FOLLOWUP_STRATEGIES)
    assert set(analysis.tables()) == {"visit_effects", "visit_means", "visit_covariance", "estimates"}
    pd.testing.assert_frame_equal(analysis.tables()["estimates"], headline)


def test_each_row_is_the_analysis_it_names(trial):
    # Each strategy's rows are what its own function gives on the same data and seed: the
    # stage only puts them side by side (one set of posterior draws serves every rule).
    _, outcome, analysis = trial
    effects = analysis.effects.set_index(["strategy", "visit"])
    expected = {"mixed_model": fit_mixed_model(outcome).visit_effects(),
                "completers": fit_mixed_model(completers(outcome)).visit_effects("completers"),
                "last_observation": fit_mixed_model(carry_last_observation_forward(outcome)).visit_effects(
                    "last_observation"),
                "copy_reference": impute_repeated(outcome, rule="copy_reference", **SETTINGS).analyse().visit_effects(),
                "delta_adjusted": impute_repeated(outcome, rule="mar", delta=1.5, **SETTINGS).analyse().visit_effects()}
    for strategy, table in expected.items():
        for row in table.itertuples():
            ours = effects.loc[(strategy, row.visit)]
            assert ours["estimate"] == pytest.approx(row.estimate, rel=1e-12)
            assert ours["std_error"] == pytest.approx(row.std_error, rel=1e-12)


def test_sentences_carry_the_cautions(trial):
    _, _, analysis = trial
    text = " ".join(analysis.sentences)
    assert "not recommended" in text and "information anchoring" in text and "valid if missing at random" in text


def test_the_reference_based_cautions_come_once_and_only_with_a_reference_based_strategy(trial):
    # One wording (vocabulary.REFERENCE_BASED_CAUTIONS) read by the stage's sentences and the summary page alike
    _, outcome, analysis = trial
    assert [analysis.sentences.count(caution) for caution in REFERENCE_BASED_CAUTIONS] == [1, 1]
    under_mar = analyse_followup(outcome, strategies=["mixed_model", "multiple_imputation"], **SETTINGS)
    assert not set(REFERENCE_BASED_CAUTIONS) & set(under_mar.sentences)


def test_delta_strategy_needs_a_delta_and_names_are_checked(trial):
    _, outcome, _ = trial
    with pytest.raises(InputError, match="needs a delta"):
        analyse_followup(outcome, strategies=["delta_adjusted"], **SETTINGS)
    with pytest.raises(InputError, match="did you mean 'jump_to_reference'"):
        analyse_followup(outcome, strategies=["jump_to_referenc"], **SETTINGS)


def test_figures_draw_the_tables(trial):
    data, outcome, analysis = trial
    audit = audit_followup(outcome, reasons=data.reasons)
    figure = plots.plot_means(audit, analysis)
    lines = figure.axes[0].get_lines()
    for group, line in zip(outcome.levels, lines):
        rows = analysis.means[analysis.means["group"] == group]
        np.testing.assert_allclose(line.get_ydata(), rows["estimate"])
    figure = plots.plot_last_visit_effects(analysis)
    points = [line.get_xdata()[0] for line in figure.axes[0].get_lines() if len(line.get_xdata()) == 1]
    np.testing.assert_allclose(points, analysis.headline()["estimate"])
    figure = plots.plot_retention(audit)
    for group, line in zip(outcome.levels, figure.axes[0].get_lines()):
        rows = audit.retention[audit.retention["group"] == group]
        np.testing.assert_allclose(line.get_ydata()[1:], rows["retained"])
    assert "log-rank" in figure.axes[0].get_title()
    figure = plots.plot_completeness(audit)
    heights = [patch.get_height() for patch in figure.axes[0].patches]
    np.testing.assert_allclose(heights, audit.completeness["pct_observed"])
    figure = plots.plot_profiles(audit)
    assert len(figure.axes) == len(outcome.levels)
