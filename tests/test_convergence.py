"""R-hat across imputation chains: by hand, against a reference implementation, and on chains
known to mix or not."""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from gapbook.convergence import (FIRST_ITERATION, RHAT_LIMIT, chain_convergence, rank_normalise, rhat,
                                 rhat_by_iteration, split_chains)


def _classic(chains):
    """Gelman & Rubin (1992): W the mean within-chain variance, B/n the variance of the chain means."""
    chains = [np.asarray(c, dtype=float) for c in chains]
    n = len(chains[0])
    within = np.mean([np.var(c, ddof=1) for c in chains])
    between = n * np.var([c.mean() for c in chains], ddof=1)
    return np.sqrt(((n - 1) / n * within + between / n) / within)


def test_rhat_by_hand_on_a_small_array():
    """Rank-normalised split R-hat, step by step as Vehtari et al. (2021, Bayesian Analysis 16:667, section 4) write it.

    1. Split: two chains of 5 draws, [1, 5, 3, 9, 7] and [12, 10, 16, 14, 20], become four
       chains of 2: the first two and the last two draws of each; the middle draw of an odd
       length (3 and 16) is dropped. Split chains: [1, 5], [9, 7], [12, 10], [14, 20].
    2. Rank-normalise (bulk): rank the S = 8 draws together (1->1, 5->2, 7->3, 9->4, 10->5,
       12->6, 14->7, 20->8) and replace rank r by Phi^-1((r - 3/8) / (S + 1/4)).
    3. Classic R-hat on the normal scores (Gelman & Rubin 1992): W = mean within-chain
       variance, B = n x variance of chain means, R = sqrt(((n - 1)/n W + B/n) / W), n = 2.
    4. Fold: |x - median| with the median of the 8 draws, (9 + 10)/2 = 9.5, gives
       [8.5, 4.5], [0.5, 2.5], [2.5, 0.5], [4.5, 10.5]; ties take the average rank:
       0.5 -> 1.5, 2.5 -> 3.5, 4.5 -> 5.5, 8.5 -> 7, 10.5 -> 8. Rank-normalise and take R-hat.
    5. Report the larger of bulk and folded R-hat.
    """
    draws = np.array([[1, 5, 3, 9, 7], [12, 10, 16, 14, 20]], dtype=float)

    assert split_chains(draws).tolist() == [[1, 5], [12, 10], [9, 7], [14, 20]]

    def z(rank):
        return stats.norm.ppf((rank - 3 / 8) / (8 + 1 / 4))

    bulk = _classic([[z(1), z(2)], [z(4), z(3)], [z(6), z(5)], [z(7), z(8)]])
    folded = _classic([[z(7), z(5.5)], [z(1.5), z(3.5)], [z(3.5), z(1.5)], [z(5.5), z(8)]])
    result = rhat(draws)
    assert result.bulk == pytest.approx(bulk, rel=1e-12)
    assert result.folded == pytest.approx(folded, rel=1e-12)
    assert result.value == pytest.approx(max(bulk, folded), rel=1e-12)
    assert rank_normalise(np.array([[1.0, 5.0], [9.0, 7.0]])).ravel() == pytest.approx(
        stats.norm.ppf((np.array([1, 2, 4, 3]) - 0.375) / 4.25))


def test_rhat_matches_a_reference_implementation():
    # Reference: arviz-stats' rank-normalised split R-hat (method="rank"), an implementation of
    # the same paper by its authors' group; even and odd lengths, trending and stationary chains.
    from arviz_stats.base import array_stats
    rng = np.random.default_rng(8)
    for chains, draws in ((2, 4), (3, 7), (5, 10), (20, 11)):
        for values in (rng.normal(size=(chains, draws)), rng.normal(size=(chains, draws)).cumsum(axis=1)):
            expected = array_stats.rhat(values, chain_axis=0, draw_axis=1, method="rank")
            assert rhat(values).value == pytest.approx(float(expected), rel=1e-10)


def _ar1(starts, iterations, rho, rng):
    values = np.empty((len(starts), iterations))
    current = np.asarray(starts, dtype=float)
    for t in range(iterations):
        current = rho * current + np.sqrt(1 - rho ** 2) * rng.standard_normal(len(starts))
        values[:, t] = current
    return values


def test_chains_that_do_not_mix_are_flagged():
    # Chains started far apart (+-10 and +-5 stationary SDs) drifting back slowly (AR(1), rho 0.97)
    # have not forgotten their start after 40 iterations: R-hat must stay well above 1.05.
    rng = np.random.default_rng(1)
    values = _ar1([-10, -5, 5, 10], 40, 0.97, rng)
    assert rhat(values).value > 1.5
    by_iteration = rhat_by_iteration(values)
    assert np.all(np.isnan(by_iteration[:FIRST_ITERATION - 1]))
    assert np.nanmin(np.maximum(by_iteration[:, 0], by_iteration[:, 1])) > RHAT_LIMIT


def test_well_mixed_chains_are_close_to_one():
    # Independent draws from one distribution: R-hat tends to 1 (Gelman & Rubin 1992); with 20
    # chains of 200 draws it is within 0.02 (common practice, no source, for the tolerance).
    rng = np.random.default_rng(2)
    values = rng.standard_normal((20, 200))
    assert abs(rhat(values).value - 1) < 0.02
    # the folded R-hat catches chains with equal means but different spreads (Vehtari et al. 2021, section 4.2)
    spread = rng.standard_normal((4, 200)) * np.array([[1.0], [1.0], [3.0], [3.0]])
    result = rhat(spread)
    assert result.bulk < RHAT_LIMIT < result.folded


def _trace(values: np.ndarray, name: str) -> pd.DataFrame:
    m, iterations = values.shape
    return pd.DataFrame({"chain": np.repeat(np.arange(m), iterations),
                         "iteration": np.tile(np.arange(1, iterations + 1), m),
                         "variable": name, "mean": values.ravel(), "sd": 1.0})


def test_chain_convergence_names_the_iteration_or_asks_for_more():
    rng = np.random.default_rng(3)
    # chains that start far apart and forget quickly (rho 0.3): settled well before the end
    mixing = _ar1(np.linspace(-6, 6, 10), 30, 0.3, rng)
    stuck = _ar1(np.linspace(-10, 10, 10), 30, 0.99, rng)
    result = chain_convergence(pd.concat([_trace(mixing, "a"), _trace(mixing[::-1] * 2 + 1, "b")]))
    assert result.above == () and result.settled_from is not None
    assert FIRST_ITERATION <= result.settled_from < 30
    wide = result.rhat.pivot(index="iteration", columns="variable", values="rhat")
    assert (wide.loc[result.settled_from:] < RHAT_LIMIT).all().all()
    assert (wide.loc[result.settled_from - 1] >= RHAT_LIMIT).any() or result.settled_from == FIRST_ITERATION
    assert f"From iteration {result.settled_from} of 30" in result.sentences[0]
    # the R-hat column equals rhat() on iterations 1..t
    assert wide.loc[12, "a"] == pytest.approx(rhat(mixing[:, :12]).value)

    flagged = chain_convergence(pd.concat([_trace(mixing, "a"), _trace(stuck, "stuck")]))
    assert flagged.above == ("stuck",) and flagged.settled_from is None
    assert "imputation.iterations" in flagged.sentences[0] and "stuck" in flagged.sentences[0]
    spread = flagged.spread[flagged.spread["variable"] == "stuck"]
    # where the chains are: wide at the start, in settled SDs
    assert spread["highest"].iloc[0] - spread["lowest"].iloc[0] > 2.0

    short = chain_convergence(_trace(mixing[:, :3], "a"))
    assert short.settled_from is None and "at least 4 iterations" in short.sentences[0]


def test_unordered_variables_use_the_share_of_each_level():
    # A nominal variable with three levels: two chains swap level shares between 'b' and 'c' while
    # 'a' is steady, so its mean code would hide nothing here but the shares must be judged.
    rng = np.random.default_rng(4)
    m, iterations = 6, 12
    rows = []
    for chain in range(m):
        offset = 0.3 if chain < 3 else -0.3
        for t in range(1, iterations + 1):
            b = 0.35 + offset + 0.01 * rng.standard_normal()
            rows += [{"chain": chain, "iteration": t, "variable": "colour", "level": "a", "share": 0.3},
                     {"chain": chain, "iteration": t, "variable": "colour", "level": "b", "share": b},
                     {"chain": chain, "iteration": t, "variable": "colour", "level": "c", "share": 0.7 - b}]
    shares = pd.DataFrame(rows)
    trace = pd.DataFrame({"chain": np.repeat(np.arange(m), iterations), "iteration": np.tile(np.arange(1, 13), m),
                          "variable": "colour", "mean": 1.0, "sd": 0.5})
    result = chain_convergence(trace, shares)
    assert result.above == ("colour",)
    assert result.rhat["summary"].iloc[0].startswith("share of each level")
    assert "colour" not in result.constant  # level 'a' is constant, but the variable is judged on b and c


def test_figure_draws_the_table_and_asks_its_question():
    import matplotlib.pyplot as plt
    from matplotlib.colors import to_hex
    from gapbook.plots import palette
    from gapbook.plots.impute import plot_chain_convergence
    rng = np.random.default_rng(6)
    result = chain_convergence(pd.concat([_trace(_ar1(np.linspace(-3, 3, 8), 12, 0.2, rng), "settles"),
                                          _trace(_ar1(np.linspace(-9, 9, 8), 12, 0.95, rng), "stuck")]))
    figure = plot_chain_convergence(result)
    assert figure.get_suptitle() == "Have the chains forgotten their starting values, and from which iteration?"
    top = figure.axes[0]
    lines = [line for line in top.get_lines() if line.get_marker() == "o"]
    wide = result.rhat.pivot(index="iteration", columns="variable", values="rhat")
    drawn = {to_hex(line.get_color()): line.get_ydata() for line in lines}
    limit_top = top.get_ylim()[1]
    stuck = drawn[to_hex(palette.EMPHASIS)]  # the variable above the line is drawn in the emphasis colour
    assert np.allclose(stuck, np.minimum(wide["stuck"].to_numpy(), limit_top), equal_nan=True)
    assert any(np.allclose(line.get_ydata(), wide["settles"].to_numpy(), equal_nan=True) for line in lines)
    assert any(np.allclose(line.get_ydata(), [RHAT_LIMIT, RHAT_LIMIT]) for line in top.get_lines())
    plt.close(figure)
