"""Tests of the audit stage (gapbook.audit) and its figures.

Sources of the expected values are named beside each check: hand counts on small frames
built here, the palmerpenguins dataset (PyPI package palmerpenguins), numpy and pandas
as reference implementations, and the definition of a monotone pattern (Little & Rubin
2019, Statistical Analysis with Missing Data, 3rd ed., section 1.3).
"""
from __future__ import annotations

import itertools

import numpy as np
import pandas as pd
import pytest

from gapbook.audit import (AuditResult, audit_frame, audit_study, count_patterns, is_monotone, reason_slug,
                           rows_in_dropout_order)
from gapbook.errors import InputError
from gapbook.intake import load_study
from gapbook.params import Params
from gapbook.stage import write_csv

LEADING = ["variable", "type", "n", "n_missing", "pct_missing", "over_threshold", "n_not_applicable"]


def _hand_params():
    return Params.from_dict({
        "data": {"path": "hand.csv", "id": "pid"},
        "variables": {
            "g": {"type": "nominal"}, "a": {"type": "continuous"}, "b": {"type": "binary"},
            "c": {"type": "continuous"}, "d": {"type": "continuous", "applies_if": "a < 100"},
        },
        "missing": {"markers": [""], "reasons": {-9: "lost to follow-up", -7: "declined"}},
    })


def _hand_raw(extra_rows=()):
    """A dropout design of six rows; d does not apply to P5 (a >= 100), so its blank there is not missing."""
    rows = [
        ("P1", "x", "10", "1", "5", "2"),
        ("P2", "x", "20", "0", "6", ""),        # d blank
        ("P3", "y", "30", "1", "-9", "-9"),     # c, d lost to follow-up
        ("P4", "y", "40", "-7", "-9", "-9"),    # b declined; c, d lost to follow-up
        ("P5", "x", "150", "0", "7", ""),       # d not applicable
        ("P6", "y", "60", "1", "", ""),         # c, d blank
    ] + list(extra_rows)
    return pd.DataFrame(rows, columns=["pid", "g", "a", "b", "c", "d"])


@pytest.fixture(scope="module")
def hand():
    return audit_study(load_study(_hand_params(), raw=_hand_raw()), threshold=0.20, by=["g"])


@pytest.fixture(scope="module")
def demo_study():
    from gapbook.demo import demo_params
    return load_study(demo_params())


@pytest.fixture(scope="module")
def demo_audit(demo_study):
    return audit_study(demo_study, threshold=0.20, by=["arm", "clinic"], top_patterns=15)


# ---------------------------------------------------------------------------
# hand counts (expected values counted by hand from the six rows above)

def test_variable_counts_and_reasons_by_hand(hand):
    table = hand.variables.set_index("variable")
    assert list(hand.variables.columns[:7]) == LEADING
    # Hand-counted: 4 lost to follow-up, 3 blank, 1 declined -> most common reason first.
    assert list(hand.variables.columns[7:]) == ["reason_lost_to_follow_up", "reason_blank", "reason_declined"]
    assert table.loc["b", ["n", "n_missing", "reason_declined"]].tolist() == [6, 1, 1]
    assert table.loc["c", ["n", "n_missing", "reason_lost_to_follow_up", "reason_blank"]].tolist() == [6, 3, 2, 1]
    # d: P5 is not applicable -> n = 5, not missing, and not a reason column (hand count).
    assert table.loc["d", ["n", "n_missing", "n_not_applicable", "reason_lost_to_follow_up", "reason_blank"]
                     ].tolist() == [5, 4, 1, 2, 2]
    assert table.loc["d", "pct_missing"] == pytest.approx(80.0)       # 4 / 5 * 100
    assert table.loc["c", "pct_missing"] == pytest.approx(50.0)       # 3 / 6 * 100
    assert table.loc["b", "pct_missing"] == pytest.approx(100 / 6)    # 1 / 6 * 100
    # threshold 0.20 (common practice, no source): 1/6 is under, 3/6 and 4/5 are over.
    assert table["over_threshold"].tolist() == [False, False, False, True, True]
    assert table.loc["a", "n_missing"] == 0 and table.loc["g", "n_missing"] == 0
    assert "reason_not_applicable" not in hand.variables.columns
    assert hand.variables["over_threshold"].dtype == bool


def test_participants_and_patterns_by_hand(hand):
    # Hand count of missing variables per row: P1 0, P2 1, P3 2, P4 3, P5 0 (n/a is not missing), P6 2.
    assert hand.participants["n_missing_variables"].tolist() == [0, 1, 2, 3]
    assert hand.participants["n_rows"].tolist() == [2, 1, 2, 1]
    assert hand.participants["pct_rows"].tolist() == pytest.approx([200 / 6, 100 / 6, 200 / 6, 100 / 6])
    assert list(hand.participants.columns) == ["n_missing_variables", "n_rows", "pct_rows"]
    # Hand-listed patterns (1 = observed; P5's not-applicable d counts as observed), most common first,
    # ties broken by fewer missing variables.
    expected = pd.DataFrame(
        [[2, 0, 1, 1, 1, 1, 1], [2, 2, 1, 1, 1, 0, 0], [1, 1, 1, 1, 1, 1, 0], [1, 3, 1, 1, 0, 0, 0]],
        columns=["n_rows", "n_missing_variables", "g", "a", "b", "c", "d"])
    got = hand.patterns.drop(columns="pct_rows")
    assert list(hand.patterns.columns[:3]) == ["n_rows", "pct_rows", "n_missing_variables"]
    assert got.astype(int).values.tolist() == expected[got.columns].values.tolist()
    assert hand.n_patterns == 4 and hand.n_complete_rows == 2
    summary = hand.summary.iloc[0]
    assert (summary["rows"], summary["complete_rows"], summary["incomplete_variables"]) == (6, 2, 3)


def test_monotone_detection_by_hand():
    # The six-row frame is a dropout design (d, then c, then b): monotone by construction.
    dropout = audit_study(load_study(_hand_params(), raw=_hand_raw()))
    assert dropout.monotone == 1
    assert dropout.pct_rows_in_dropout_order == pytest.approx(100.0)
    assert dropout.dropout_order[-3:] == ("b", "c", "d")
    # Adding a row that lacks only b (while others lack only d) breaks every ordering: not monotone.
    broken = audit_study(load_study(_hand_params(), raw=_hand_raw([("P7", "x", "70", "", "8", "9")])))
    assert broken.monotone == 0
    assert broken.summary.loc[0, "monotone"] == 0
    # Hand count: 6 of 7 rows keep the order a, g, b, c, d -> only P7 breaks it.
    assert broken.pct_rows_in_dropout_order == pytest.approx(600 / 7)


def test_one_incomplete_variable_is_not_called_a_dropout_design():
    # Little & Rubin (2019, section 1.3): with one incomplete variable any pattern set is monotone by
    # definition, so the audit must not read it as dropout; it names the variable instead.
    raw = _hand_raw().assign(b="1", c="5", d="2")
    raw.loc[1, "c"] = ""
    one = audit_study(load_study(_hand_params(), raw=raw))
    assert one.monotone == 1 and one.n_patterns == 2
    sentence = one.sentences[3]
    assert "monotone only trivially" in sentence and "'c'" in sentence and "dropout design" not in sentence
    # With two or more incomplete variables in nested patterns, the dropout reading is the real one.
    dropout = audit_study(load_study(_hand_params(), raw=_hand_raw()))
    assert "as when participants drop out" in dropout.sentences[3]
    # Two variables always missing together (one pattern of gaps): monotone only trivially, too.
    together = raw.copy()
    together.loc[1, "d"] = ""
    both = audit_study(load_study(_hand_params(), raw=together))
    assert both.n_patterns == 2 and "one pattern of gaps" in both.sentences[3] and "'c', 'd'" in both.sentences[3]
    complete = audit_study(load_study(_hand_params(), raw=_hand_raw().assign(b="1", c="5", d="2")))
    assert "no variable has a missing value" in complete.sentences[3]


def _monotone_by_definition(bits: np.ndarray) -> bool:
    """Definition (Little & Rubin 2019, 1.3): some ordering makes every row's gaps a tail of it."""
    p = bits.shape[1]
    for order in itertools.permutations(range(p)):
        ordered = bits[:, list(order)].astype(np.int8)   # signed: np.diff of unsigned bits would wrap
        if np.all(np.diff(ordered, axis=1) >= 0):
            return True
    return False


def test_monotone_matches_definition_on_random_patterns():
    # Brute force over all 24 orderings of 4 variables, on seeded random pattern sets.
    rng = np.random.default_rng(11)
    seen = set()
    for _ in range(300):
        n_patterns = rng.integers(1, 5)
        if rng.random() < 0.5:   # half of the draws are nested chains (dropout), half arbitrary
            order = rng.permutation(4)
            tails = rng.choice(5, size=n_patterns)
            rows = np.zeros((n_patterns, 4), dtype=np.uint8)
            for r, t in enumerate(tails):
                rows[r, order[4 - t:]] = 1
        else:
            rows = (rng.random((n_patterns, 4)) < 0.4).astype(np.uint8)
        patterns = count_patterns(rows.astype(bool))
        expected = _monotone_by_definition(patterns.missing_bits)
        assert is_monotone(patterns.missing_bits) == expected
        seen.add(expected)
    assert seen == {True, False}


def test_comissingness_phi_against_numpy_corrcoef(hand, demo_study, demo_audit):
    for result, missing in ((hand, None), (demo_audit, demo_study.missing)):
        matrix = result.comissingness_matrix
        if missing is None:
            missing = pd.DataFrame({"b": [0, 0, 0, 1, 0, 0], "c": [0, 0, 1, 1, 0, 1], "d": [0, 1, 1, 1, 0, 1]})
        indicators = missing[list(matrix.columns)].to_numpy(dtype=float)
        # Reference: numpy.corrcoef of the 0/1 indicator columns (phi is their Pearson correlation).
        assert np.allclose(matrix.to_numpy(), np.corrcoef(indicators, rowvar=False), atol=1e-12)
        long = result.comissingness.set_index(["variable_a", "variable_b"])
        for (a, b), row in long.iterrows():
            i, j = list(matrix.columns).index(a), list(matrix.columns).index(b)
            assert row["phi"] == pytest.approx(np.corrcoef(indicators[:, i], indicators[:, j])[0, 1])
            assert row["n_both_missing"] == int((indicators[:, i] * indicators[:, j]).sum())
        k = len(matrix)
        assert len(long) == k * (k - 1)  # every ordered pair: the conditional probabilities are asymmetric
    assert list(hand.comissingness_matrix.columns) == ["b", "c", "d"]  # only incomplete variables


def test_comissingness_lift_and_conditional_probabilities_by_hand(hand):
    # Hand count on the six rows: b is missing in row 4; c in rows 3, 4, 6; d in rows 2, 3, 4, 6.
    table = hand.comissingness.set_index(["variable_a", "variable_b"])
    expected = {  # (A, B): rows missing both, P(B missing), P(B missing | A missing), lift = P(B | A) / P(B)
        ("b", "c"): (1, 3 / 6, 1 / 1, 2.0), ("c", "b"): (1, 1 / 6, 1 / 3, 2.0),
        ("c", "d"): (3, 4 / 6, 3 / 3, 1.5), ("d", "c"): (3, 3 / 6, 3 / 4, 1.5),
        ("b", "d"): (1, 4 / 6, 1 / 1, 1.5), ("d", "b"): (1, 1 / 6, 1 / 4, 1.5),
    }
    assert set(table.index) == set(expected)
    for pair, (both, p_b, p_b_given_a, lift) in expected.items():
        row = table.loc[pair]
        assert row["n_both_missing"] == both
        assert row[["p_missing_b", "p_missing_b_given_a", "lift"]].tolist() == pytest.approx([p_b, p_b_given_a, lift])
    # P(B | A) P(A) = P(A and B) = P(A | B) P(B) (Bayes' rule)
    assert table.loc[("b", "c"), "p_missing_b_given_a"] * 1 / 6 == pytest.approx(
        table.loc[("c", "b"), "p_missing_b_given_a"] * 3 / 6)


def test_comissingness_lift_against_pandas_crosstab(demo_study, demo_audit):
    # Reference: pandas.crosstab of two missingness indicators gives the joint and marginal counts.
    table = demo_audit.comissingness.set_index(["variable_a", "variable_b"])
    for (a, b), row in table.iloc[::7].iterrows():
        cross = pd.crosstab(demo_study.missing[a], demo_study.missing[b])
        n = cross.to_numpy().sum()
        p_b_given_a = cross.loc[True, True] / cross.loc[True].sum()  # both variables are incomplete
        assert row["p_missing_b_given_a"] == pytest.approx(p_b_given_a)
        assert row["lift"] == pytest.approx(p_b_given_a / (cross[True].sum() / n))


def test_by_group_by_hand_and_against_pandas(hand, demo_study, demo_audit):
    table = hand.by_group.set_index(["group", "variable"])
    # Hand counts: group x = P1, P2, P5; group y = P3, P4, P6.
    assert table.loc[("x", "d"), ["n", "n_missing"]].tolist() == [2, 1]
    assert table.loc[("y", "c"), ["n", "n_missing"]].tolist() == [3, 3]
    assert table.loc[("y", "b"), ["n", "n_missing"]].tolist() == [3, 1]
    assert "g" not in set(hand.by_group["variable"])
    assert list(hand.by_group.columns) == ["group_variable", "group", "variable", "n", "n_missing", "pct_missing"]
    # Reference: pandas groupby of the missing / applicable indicator frames.
    for group in ("arm", "clinic"):
        key = demo_study.data[group]
        n_missing = demo_study.missing.groupby(key, observed=True).sum()
        n = (~demo_study.not_applicable).groupby(key, observed=True).sum()
        ours = demo_audit.by_group[demo_audit.by_group["group_variable"] == group]
        for _, row in ours.iterrows():
            assert row["n_missing"] == n_missing.loc[row["group"], row["variable"]]
            assert row["n"] == n.loc[row["group"], row["variable"]]
            assert row["pct_missing"] == pytest.approx(row["n_missing"] / row["n"] * 100)
        assert len(ours) == key.nunique() * (demo_study.data.shape[1] - 1)


def test_rows_missing_the_group_form_their_own_group():
    raw = _hand_raw()
    raw.loc[5, "g"] = ""   # P6's group is blank
    result = audit_study(load_study(_hand_params(), raw=raw), by="g")
    table = result.by_group.set_index(["group", "variable"])
    assert list(result.by_group["group"].unique()) == ["x", "y", "(missing)"]
    # Hand count: the (missing) group is P6 alone, which lacks c and d.
    assert table.loc[("(missing)", "c"), ["n", "n_missing"]].tolist() == [1, 1]
    assert table.loc[("y", "c"), ["n", "n_missing"]].tolist() == [2, 2]


# ---------------------------------------------------------------------------
# palmerpenguins (PyPI package palmerpenguins; its documentation gives 344 rows, 11 missing
# sex and 2 rows missing every body measurement)

MEASUREMENTS = ["bill_length_mm", "bill_depth_mm", "flipper_length_mm", "body_mass_g"]


def test_penguins_audit(penguins):
    study = load_study(Params.from_dict({"data": {"path": "penguins.csv"},
                                         "variables": {"year": {"type": "count"}}}), raw=penguins)
    result = audit_study(study)
    table = result.variables.set_index("variable")
    assert result.n_rows == 344
    assert table["n"].eq(344).all()
    assert table.loc["sex", "n_missing"] == 11
    assert table.loc["sex", "reason_blank"] == 11
    assert table.loc[MEASUREMENTS, "n_missing"].tolist() == [2, 2, 2, 2]
    assert table.loc[["species", "island", "year"], "n_missing"].tolist() == [0, 0, 0]
    assert table.loc["sex", "pct_missing"] == pytest.approx(11 / 344 * 100)
    # Patterns: 2 rows lack every measurement.
    patterns = result.patterns
    no_measurements = patterns[(patterns[MEASUREMENTS] == 0).all(axis=1)]
    assert no_measurements["n_rows"].sum() == 2
    # Reference: pandas groupby on the isna() frame of the raw data gives the same patterns and counts.
    reference = penguins.isna().value_counts().rename("n_rows").reset_index()
    reference[penguins.columns] = (~reference[penguins.columns]).astype(int)
    merged = patterns.merge(reference, on=list(penguins.columns), suffixes=("", "_pandas"))
    assert len(merged) == len(reference) == result.n_patterns
    assert (merged["n_rows"] == merged["n_rows_pandas"]).all()
    assert patterns["n_rows"].is_monotonic_decreasing
    assert patterns["pct_rows"].sum() == pytest.approx(100.0)


def test_plain_frame_audit_matches_isna(penguins):
    # audit_frame on a plain DataFrame: every NaN is missing with reason "unspecified".
    result = audit_frame(penguins, by=["species"])
    table = result.variables.set_index("variable")
    assert (table["n_missing"] == penguins.isna().sum()).all()           # reference: pandas isna().sum()
    assert (table["reason_unspecified"] == penguins.isna().sum()).all()
    reference = penguins.isna().groupby(penguins["species"]).sum()       # reference: pandas groupby
    for _, row in result.by_group.iterrows():
        assert row["n_missing"] == reference.loc[row["group"], row["variable"]]


# ---------------------------------------------------------------------------
# the demo study

def test_demo_reason_counts_equal_study_reasons(demo_study, demo_audit):
    table = demo_audit.variables.set_index("variable")
    mapping = dict(zip(demo_audit.reasons["reason"], demo_audit.reasons["column"]))
    for name in demo_study.reasons.columns:
        counts = demo_study.reasons[name].value_counts()   # reference: pandas value_counts on the reasons frame
        for reason, count in counts.items():
            if reason == "not applicable":
                assert table.loc[name, "n_not_applicable"] == count
            elif count:
                assert table.loc[name, mapping[reason]] == count
        assert table.loc[name, "n_missing"] == demo_study.missing[name].sum()
    reason_columns = list(demo_audit.reasons["column"])
    assert (table[reason_columns].sum(axis=1) == table["n_missing"]).all()
    # Reasons the demo's params and data produce (see gapbook.demo): each appears as a column.
    for column in ("reason_lost_to_follow_up", "reason_declined", "reason_not_measured", "reason_blank",
                   "reason_marker_na", "reason_implausible"):
        assert column in demo_audit.variables.columns
    assert table.loc["insulin_dose", "n"] == demo_study.data["on_insulin"].eq("yes").sum()
    assert len(demo_audit.range_issues) == len(demo_study.range_issues)
    assert list(demo_audit.types.columns) == ["variable", "type", "source", "levels", "why"]


def test_audit_is_deterministic(demo_study, demo_audit, tmp_path):
    again = audit_study(demo_study, threshold=0.20, by=["arm", "clinic"], top_patterns=15)
    for name, frame in demo_audit.tables().items():
        pd.testing.assert_frame_equal(frame, again.tables()[name])
        first, second = tmp_path / f"{name}_1.csv", tmp_path / f"{name}_2.csv"
        write_csv(frame, first)
        write_csv(again.tables()[name], second)
        assert first.read_bytes() == second.read_bytes()


def test_no_ids_in_participant_and_pattern_tables(demo_study, demo_audit):
    ids = set(demo_study.ids.astype(str))
    for frame in (demo_audit.participants, demo_audit.patterns, demo_audit.summary, demo_audit.variables):
        assert not ids & set(frame.astype(str).to_numpy().ravel())
    assert len(demo_audit.patterns) < demo_audit.n_rows


# ---------------------------------------------------------------------------
# pieces and errors

def test_reason_slug():
    # The slug rule of the audit_variables contract: lower case, non-alphanumerics as '_'.
    assert reason_slug("lost to follow-up") == "lost_to_follow_up"
    assert reason_slug("marker NA") == "marker_na"
    assert reason_slug("implausible") == "implausible"


def test_slug_collisions_get_distinct_columns():
    data = pd.DataFrame({"x": [1.0, np.nan, np.nan]})
    reasons = pd.DataFrame({"x": pd.Categorical([np.nan, "marker ?", "marker !"])})
    result = audit_frame(data, reasons=reasons)
    assert list(result.reasons["column"]) == ["reason_marker__", "reason_marker___2"]
    assert result.variables.loc[0, ["reason_marker__", "reason_marker___2"]].tolist() == [1, 1]


def test_many_variables_use_several_code_words():
    # More than 64 variables: patterns span two 64-bit words; compare with pandas value_counts.
    rng = np.random.default_rng(5)
    missing = rng.random((400, 70)) < 0.02
    patterns = count_patterns(missing)
    reference = pd.DataFrame(missing).value_counts()
    assert len(patterns.n_rows) == len(reference)
    assert sorted(patterns.n_rows.tolist()) == sorted(reference.tolist())
    assert patterns.n_rows.sum() == 400


def test_user_errors_name_the_option(demo_study):
    with pytest.raises(InputError, match=r"^by: 'armm'.*did you mean 'arm'"):
        audit_study(demo_study, by=["armm"])
    with pytest.raises(InputError, match=r"^threshold: "):
        audit_study(demo_study, threshold=1.5)
    with pytest.raises(InputError, match=r"^top_patterns: "):
        audit_study(demo_study, top_patterns=0)
    for cap in (0, 100_001, 2.5, True):
        with pytest.raises(InputError, match=r"^max_patterns: "):
            audit_study(demo_study, max_patterns=cap)
    with pytest.raises(InputError, match=r"audit\.max_patterns"):
        Params.from_dict({"data": {"path": "d.csv"}, "audit": {"max_patterns": 100_001}})
    with pytest.raises(InputError, match=r"^by: 'age' has .* distinct values"):
        audit_study(demo_study, by=["age"])


def test_figures_draw_from_the_result(demo_audit, hand):
    import matplotlib.pyplot as plt
    from gapbook.plots import audit as plots
    for result in (demo_audit, hand):
        assert isinstance(result, AuditResult)
        for draw in (plots.missingness_map, plots.missing_share, plots.missing_together, plots.common_patterns):
            figure = draw(result)
            assert figure.axes and (figure.axes[0].get_title() or figure.get_suptitle())
            plt.close(figure)


def test_missing_together_draws_the_table():
    # Three blocks of variables missing in the same rows, plus scattered gaps: the view must draw
    # each ordered pair's shared rows inside a frame of the row variable's missing rows (so the
    # filled share of the frame is P(B missing | A missing), hand-checked against the table),
    # keep blocks next to each other, and say how many variables were left out.
    import matplotlib.pyplot as plt
    from matplotlib.patches import Rectangle
    from gapbook.plots.audit import missing_together
    rng = np.random.default_rng(5)
    n = 600
    data = pd.DataFrame(rng.normal(size=(n, 9)), columns=[f"x{i}" for i in range(9)])
    for block, share in (([0, 4, 7], 0.3), ([1, 5], 0.2)):
        rows = rng.random(n) < share
        for j in block:
            data.loc[rows & (rng.random(n) < 0.95), f"x{j}"] = np.nan
    for j in (2, 3, 6, 8):
        data.loc[rng.random(n) < 0.02 * (j + 1), f"x{j}"] = np.nan
    result = audit_frame(data)
    figure = missing_together(result, max_variables=7)
    axes = figure.axes[0]
    names = [t.get_text() for t in axes.get_xticklabels()]
    assert len(names) == 7 and "2 left out" in axes.get_title(loc="left").replace("\n", " ")
    assert set(names) == set(result.variables.sort_values("n_missing", ascending=False, kind="stable")
                             ["variable"].head(7))
    positions = {v: i for i, v in enumerate(names)}
    assert max(positions[v] for v in ("x0", "x4", "x7")) - min(positions[v] for v in ("x0", "x4", "x7")) == 2
    assert abs(positions["x1"] - positions["x5"]) == 1
    squares = {}
    for patch in axes.patches:
        if isinstance(patch, Rectangle):
            x, y = patch.get_x() + patch.get_width() / 2, patch.get_y() + patch.get_height() / 2
            squares.setdefault((round(y), round(x)), []).append(patch.get_width() ** 2)
    table = result.comissingness.set_index(["variable_a", "variable_b"])
    for (a, b), row in table.iterrows():
        if a in positions and b in positions and row["n_both_missing"] > 0:
            frame, filled = sorted(squares[(positions[a], positions[b])], reverse=True)
            assert filled / frame == pytest.approx(row["p_missing_b_given_a"], rel=1e-9)
    plt.close(figure)


def test_map_slices_preserve_missing_counts(demo_audit):
    # The sliced map must keep every missing cell: shares x slice height sum to the variable's count.
    from gapbook.plots.audit import _slice_shares, _sorted_patterns
    order, bits, counts = _sorted_patterns(demo_audit)
    shares = _slice_shares(bits.astype(float), counts, 100)
    recovered = shares.sum(axis=0) * counts.sum() / 100
    expected = demo_audit.variables.set_index("variable").loc[order, "n_missing"].to_numpy()
    assert np.allclose(recovered, expected)
    assert rows_in_dropout_order(count_patterns(np.zeros((3, 2), dtype=bool)), [0, 1]) == 100.0


def test_pattern_order_breaks_ties_as_documented():
    # Hand-built: four patterns with one row each; the documented order is fewer missing variables
    # first, then left to right with observed (1) before missing (0).
    from gapbook.audit import pattern_table
    missing = np.array([[0, 0, 1, 1],    # lacks c, d
                        [0, 1, 0, 0],    # lacks b
                        [0, 0, 0, 1],    # lacks d
                        [1, 0, 0, 0],    # lacks a
                        [0, 0, 0, 1]],   # lacks d again -> the most common pattern
                       dtype=bool)
    table = pattern_table(count_patterns(missing), ["a", "b", "c", "d"])
    assert table[["a", "b", "c", "d"]].values.tolist() == [[1, 1, 1, 0], [1, 0, 1, 1], [0, 1, 1, 1], [1, 1, 0, 0]]
    assert table["n_rows"].tolist() == [2, 1, 1, 1]


@pytest.mark.parametrize("cap", [1, 3, 17, 200, None])
def test_capped_pattern_table_is_the_head_of_the_whole_order(cap):
    # The documented order (most rows first, then fewer missing variables, then pattern order) written out with
    # a plain sort; the capped table, which sorts only the patterns that can be listed, is its head, and the
    # remainder row holds the rows of every other pattern. Many ties in the counts (most patterns have 1-3 rows).
    from gapbook.audit import PatternCounts, pattern_table
    rng = np.random.default_rng(4)
    patterns = count_patterns(rng.random((600, 9)) < 0.3)
    bits, counts = patterns.missing_bits, patterns.n_rows
    whole = sorted(range(len(counts)), key=lambda i: (-counts[i], int(bits[i].sum()), i))
    table = pattern_table(PatternCounts(bits, counts), list("abcdefghi"), max_patterns=cap)
    listed = whole if cap is None else whole[:cap]
    assert table["n_rows"].tolist()[:len(listed)] == [int(counts[i]) for i in listed]
    assert table[list("abcdefghi")].iloc[:len(listed)].to_numpy().tolist() == (1 - bits[listed]).tolist()
    if cap is not None and cap < len(counts):
        assert len(table) == cap + 1 and table["n_rows"].iloc[-1] == counts.sum() - counts[listed].sum()


@pytest.mark.parametrize("rows", [1000, 2 ** 24 + 4])
def test_comissingness_counts_exact_in_either_precision(rows):
    # Counts of rows as large as 2**24 are added in double precision (single precision would round them);
    # checked against integer arithmetic.
    from gapbook.audit import PatternCounts, comissingness
    bits = np.array([[1, 1, 0], [1, 0, 1], [0, 1, 1], [1, 1, 1]], dtype=np.uint8)
    counts = np.array([rows - 7, 3, 1, 3], dtype=np.int64)
    long, _ = comissingness(PatternCounts(bits, counts), ["a", "b", "c"])
    both = (bits.astype(np.int64).T * counts) @ bits.astype(np.int64)
    pair = long.set_index(["variable_a", "variable_b"])["n_both_missing"]
    assert int(pair[("a", "b")]) == both[0, 1] and int(pair[("b", "c")]) == both[1, 2]
    assert int(long.set_index(["variable_a", "variable_b"])["n_missing_a"][("a", "b")]) == both[0, 0]


# ---------------------------------------------------------------------------
# the pattern cap (audit.max_patterns)

def test_pattern_cap_by_hand(hand, tmp_path):
    # Hand count (see test_participants_and_patterns_by_hand): patterns of 2, 2, 1 and 1 rows. A cap of 2
    # lists the first two and folds the last two (1 + 1 = 2 rows of 6) into one remainder row.
    capped = audit_study(load_study(_hand_params(), raw=_hand_raw()), threshold=0.20, by=["g"], max_patterns=2)
    assert capped.patterns["n_rows"].tolist() == [2, 2, 2]
    assert capped.patterns["pct_rows"].tolist() == pytest.approx([200 / 6] * 3)
    assert capped.listed_patterns().equals(hand.patterns.head(2))
    assert capped.unlisted_patterns() == (2, 2)
    assert capped.patterns.iloc[2, 2:].isna().all()  # n_missing_variables and every variable column blank
    text = write_csv(capped.patterns, tmp_path / "audit_patterns.csv").read_text()
    assert text.splitlines()[-1] == "2,33.33333333,,,,,,"  # 2/6*100 in the fixed format %.10g
    # Everything built from all the patterns is unchanged by the cap.
    for name in ("audit_participants", "audit_comissingness", "audit_variables", "audit_by_group"):
        assert capped.tables()[name].equals(hand.tables()[name]), name
    assert capped.n_patterns == 4 and capped.summary.loc[0, "patterns_listed"] == 2
    assert hand.summary.loc[0, "patterns_listed"] == 4 and hand.unlisted_patterns() == (0, 0)
    assert "the other 2 patterns together (2 rows, 33.3 %)" in capped.sentences[-1]
    assert not any("max_patterns" in sentence for sentence in hand.sentences)


def test_a_million_rows_with_scattered_gaps_give_a_small_pattern_table(tmp_path):
    # 1,000,000 rows x 20 variables, each cell missing with probability 0.3 independently: about 300,000
    # distinct patterns, nearly one per three rows. The table must stay at max_patterns + 1 rows.
    rng = np.random.default_rng(20261202)
    gaps = rng.random((1_000_000, 20)) < 0.3
    data = pd.DataFrame(np.where(gaps, np.nan, 1.0), columns=[f"v{j}" for j in range(20)])
    result = audit_frame(data, types={c: "continuous" for c in data.columns}, max_patterns=1000)
    # Reference: pandas' DataFrame.value_counts of the missingness frame counts the same patterns.
    reference = pd.DataFrame(gaps, columns=data.columns).value_counts()
    assert result.n_patterns == len(reference) > 250_000
    assert len(result.patterns) == 1001
    listed = result.listed_patterns()
    # The listed patterns are the 1,000 most common (ties may be broken differently, counts may not).
    assert listed["n_rows"].tolist() == sorted(reference.to_numpy(), reverse=True)[:1000]
    keys = [tuple(1 - listed[c].to_numpy(dtype=int)) for c in data.columns]
    assert [reference[tuple(bool(k) for k in key)] for key in zip(*keys)] == listed["n_rows"].tolist()
    folded_patterns, folded_rows = result.unlisted_patterns()
    assert folded_patterns == len(reference) - 1000
    assert folded_rows == 1_000_000 - int(listed["n_rows"].sum()) == int(result.patterns["n_rows"].iloc[-1])
    size = write_csv(result.patterns, tmp_path / "audit_patterns.csv").stat().st_size
    assert size < 100_000  # about 50 bytes a row; the uncapped table was tens of MB
    # The participants table still counts every row (binomial(20, 0.3) shape, summing to all rows).
    assert int(result.participants["n_rows"].sum()) == 1_000_000


def test_map_keeps_every_missing_cell_when_patterns_are_folded(demo_study):
    # The remainder band is drawn with each variable's share missing among its rows, so the sliced map
    # still holds every missing cell of the variables table.
    from gapbook.plots.audit import _slice_shares, _sorted_patterns
    capped = audit_study(demo_study, max_patterns=3)
    assert capped.unlisted_patterns()[0] > 0
    order, bits, counts = _sorted_patterns(capped)
    assert len(counts) == 4 and counts.sum() == capped.n_rows
    shares = _slice_shares(bits, counts, 100)
    recovered = shares.sum(axis=0) * counts.sum() / 100
    expected = capped.variables.set_index("variable").loc[order, "n_missing"].to_numpy()
    assert np.allclose(recovered, expected)
    import matplotlib.pyplot as plt
    from gapbook.plots import audit as plots
    for draw in (plots.missingness_map, plots.common_patterns):
        plt.close(draw(capped))
