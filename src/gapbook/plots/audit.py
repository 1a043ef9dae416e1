"""Figures of the audit stage; each takes an :class:`gapbook.audit.AuditResult`.

1. :func:`missingness_map` - where are the gaps, and do they line up across rows?
2. :func:`missing_share` - which variables lack too much, and for what reasons?
3. :func:`missing_together` - when A is missing, how much more often is B missing?
4. :func:`common_patterns` - which combinations of gaps are common?
"""
from __future__ import annotations

import textwrap
from typing import Sequence

import numpy as np
from matplotlib.cm import ScalarMappable
from matplotlib.colors import Normalize
from matplotlib.patches import Patch

from . import EMPHASIS, GRID, MAX_VARIABLES_SHOWN, MISSING, NEUTRAL, OBSERVED, REFERENCE, new_figure, shown_of
from .palette import BACKGROUND, REASON_SHADES, reason_shades, scale
from ..audit import pattern_shape

__all__ = ["MAX_TOGETHER", "missingness_map", "missing_share", "missing_together", "common_patterns"]

MAX_TOGETHER = 20  # the most incomplete variables the co-missingness view shows; the rest are named as left out
PATTERN_RULES = 60          # at most this many patterns get a rule between their bands
PATTERN_LABEL_SHARE = 3.0   # patterns with at least this % of rows get their share written at the right
MAP_SLICES = 400  # vertical resolution of the map: beyond this many rows, rows are shown in slices


def _sorted_patterns(result):
    """Pattern bits (1 = missing) with columns in dropout order and rows sorted into a staircase.

    The listed patterns come first; the patterns folded into the table's remainder row follow
    as one last band whose entries are the share of its rows missing each variable (the
    variables' missing counts less those of the listed patterns), so every missing cell is drawn.
    """
    order = list(result.dropout_order)
    listed = result.listed_patterns()
    bits = 1.0 - listed[order].to_numpy(dtype=np.float64)
    counts = listed["n_rows"].to_numpy(dtype=np.int64)
    n_missing = bits.sum(axis=1)
    # Fewer gaps first; among equals, gaps in the later (more often missing) columns first.
    keys = [bits[:, j] for j in range(bits.shape[1] - 1, -1, -1)] + [n_missing]
    rank = np.lexsort(keys) if bits.shape[1] else np.argsort(n_missing, kind="stable")
    bits, counts = bits[rank], counts[rank]
    _, folded_rows = result.unlisted_patterns()
    if folded_rows:
        missing = result.variables.set_index("variable").loc[order, "n_missing"].to_numpy(dtype=np.float64)
        share = (missing - (bits * counts[:, None]).sum(axis=0)) / folded_rows
        bits = np.vstack([bits, np.clip(share, 0.0, 1.0)])
        counts = np.append(counts, folded_rows)
    return order, bits, counts


def _slice_shares(bits: np.ndarray, counts: np.ndarray, slices: int) -> np.ndarray:
    """Share of rows missing each variable within equal slices of the pattern-sorted rows.

    Each pattern occupies a run of rows; the missing rows up to any row position are a
    piecewise-linear function of that position, so a slice's share is the difference of
    that function at its two ends divided by the slice height.
    """
    total = int(counts.sum())
    edges = np.linspace(0, total, slices + 1)
    starts = np.concatenate([[0], np.cumsum(counts)])
    before = np.zeros((len(counts) + 1, bits.shape[1]))
    before[1:] = np.cumsum(bits * counts[:, None], axis=0)  # missing rows before each pattern's run
    idx = np.clip(np.searchsorted(starts, edges, side="right") - 1, 0, len(counts) - 1)
    filled = before[idx] + (edges - starts[idx])[:, None] * bits[idx]
    return np.diff(filled, axis=0) / np.diff(edges)[:, None]


def missingness_map(result, max_slices: int = MAP_SLICES):
    """Where the gaps are: every row, grouped by missingness pattern, as a map of variables.

    Rows are sorted into patterns (fewest gaps at the top) and variables run from least
    to most missing, so a dropout (monotone) design reads as a clean staircase and
    scattered gaps read as speckle. With more rows than ``max_slices`` the rows are drawn
    in equal slices whose shade is the share missing in that slice, so the figure stays
    readable for a file of any size. Not-applicable cells count as observed.

    Parameters
    ----------
    result : AuditResult.
    max_slices : the largest number of horizontal bands drawn.

    Returns
    -------
    matplotlib Figure.
    """
    order, bits, counts = _sorted_patterns(result)
    folded_patterns, _ = result.unlisted_patterns()
    total = int(counts.sum())
    n_variables = len(order)
    if n_variables > MAX_VARIABLES_SHOWN:  # the most missing variables (the right end of the order)
        order, bits = order[-MAX_VARIABLES_SHOWN:], bits[:, -MAX_VARIABLES_SHOWN:]
    width = min(11.0, max(5.0, 0.3 * len(order) + 3.0))
    figure, axes = new_figure(width, 5.0)
    if total == 0 or not order:
        axes.text(0.5, 0.5, "no rows to show", ha="center", va="center", transform=axes.transAxes)
        axes.set_axis_off()
        return figure
    slices = int(min(total, max_slices))
    shares = _slice_shares(bits.astype(np.float64), counts, slices)
    image = axes.imshow(shares, aspect="auto", interpolation="nearest", cmap=scale("observed_to_missing"),
                        vmin=0, vmax=1, extent=(-0.5, len(order) - 0.5, 100, 0))
    # Each pattern is a band of rows: thin rules between bands, and the larger bands' shares at the right,
    # so the reader sees which gaps line up in the same rows and how many rows each combination holds.
    edges = np.cumsum(counts)[:-1] / total * 100
    if len(counts) <= PATTERN_RULES:
        for edge in edges:
            axes.axhline(edge, color=BACKGROUND, linewidth=0.5)
    starts = np.concatenate([[0.0], edges])
    ends = np.concatenate([edges, [100.0]])
    labelled = [(0.5 * (a + b), f"{b - a:.0f} %") for a, b in zip(starts, ends) if b - a >= PATTERN_LABEL_SHARE]
    if folded_patterns and labelled and ends[-1] - starts[-1] >= PATTERN_LABEL_SHARE:
        labelled[-1] = (labelled[-1][0], f"{labelled[-1][1]}: {folded_patterns:,} rarer patterns")
    right = axes.twinx()
    right.set_ylim(100, 0)
    right.set_yticks([c for c, _ in labelled], [text for _, text in labelled], fontsize=7)
    right.tick_params(length=0)
    right.spines[["top", "right", "left", "bottom"]].set_visible(False)
    right.set_ylabel("share of rows with that pattern", fontsize=8)
    axes.set_xticks(range(len(order)))
    axes.set_xticklabels(order, rotation=60, ha="right")
    axes.set_ylabel("rows, sorted by missingness pattern (% of rows)")
    axes.set_xlabel("variables, from least to most missing")
    shape = pattern_shape(result, short=True)
    folded = (f"\nthe {folded_patterns:,} rarer patterns drawn as one band at the bottom, shaded by share missing"
              if folded_patterns else "")
    axes.set_title(f"Where are the gaps, and do they line up across rows?\n{total:,} rows in "
                   f"{result.n_patterns:,} patterns, {shape}{shown_of(len(order), n_variables)}{folded}", fontsize=10)
    if slices < total or folded_patterns:
        bar = figure.colorbar(image, ax=[axes, right], fraction=0.04, location="bottom", aspect=40)
        bar.set_label(f"share missing within each slice of {total / slices:,.0f} rows" if slices < total
                      else "share missing (the rarer patterns' band: share of its rows)", fontsize=8)
    else:
        axes.legend(handles=[Patch(color=scale("observed_to_missing")(0.0), label="observed or not applicable"),
                             Patch(color=MISSING, label="missing")],
                    loc="upper left", bbox_to_anchor=(0.0, -0.28), ncol=2, frameon=False, fontsize=8)
    return figure


def missing_share(result):
    """Share of applicable rows missing, per variable, stacked by missing reason, with the threshold.

    Parameters
    ----------
    result : AuditResult.

    Returns
    -------
    matplotlib Figure.
    """
    table = result.variables.sort_values(["pct_missing", "variable"], ascending=[True, False], kind="stable")
    n_variables = len(table)
    table = table.tail(MAX_VARIABLES_SHOWN)  # sorted ascending: the most missing are last
    reason_columns = list(result.reasons["column"])
    reason_labels = list(result.reasons["reason"])
    colours = reason_shades(len(reason_columns))
    figure, axes = new_figure(7.5, max(2.5, 0.32 * len(table) + 1.4))
    positions = np.arange(len(table))
    left = np.zeros(len(table))
    n = table["n"].to_numpy(dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        for k, (column, label, colour) in enumerate(zip(reason_columns, reason_labels, colours)):
            share = np.where(n > 0, table[column].to_numpy(dtype=float) / n * 100, 0.0)
            hatch = "///" if k >= len(REASON_SHADES) else None  # shades repeat: a hatch tells them apart
            axes.barh(positions, share, left=left, color=colour, label=label, height=0.7, hatch=hatch,
                      edgecolor=BACKGROUND if hatch else None, linewidth=0)
            left += share
    limit = max(float(np.nanmax(left)) if len(left) else 0.0, result.threshold * 100) * 1.15 + 1
    for y, value, rows in zip(positions, table["pct_missing"], table["n"]):
        text = "all not applicable" if rows == 0 else f"{value:.1f} %"
        axes.text(min(value if value == value else 0, limit) + limit * 0.01, y, text, va="center", fontsize=7,
                  color=REFERENCE)
    axes.axvline(result.threshold * 100, color=EMPHASIS, linestyle="--", linewidth=1)
    axes.text(result.threshold * 100, len(table) - 0.3, f" threshold {result.threshold * 100:g} %",
              color=EMPHASIS, fontsize=8, va="bottom")
    labels = [f"{v} (n={r:,})" if r < result.n_rows else str(v) for v, r in zip(table["variable"], table["n"])]
    axes.set_yticks(positions)
    axes.set_yticklabels(labels, fontsize=8)
    axes.set_xlim(0, limit)
    axes.set_ylim(-0.6, len(table) + 0.2)
    axes.set_xlabel("% of rows to which the variable applies")
    axes.set_title(f"How much does each variable lack, and why?{shown_of(len(table), n_variables)}", fontsize=10)
    if reason_columns:
        axes.legend(title="missing reason", loc="lower right", frameon=False, fontsize=7, title_fontsize=8)
    return figure


def _together_order(names, single, both):
    """Variables ordered by average-linkage clustering on 1 - Jaccard of their missing rows."""
    k = len(names)
    if k < 3:
        return list(range(k))
    from scipy.cluster.hierarchy import leaves_list, linkage, optimal_leaf_ordering
    from scipy.spatial.distance import squareform
    union = single[:, None] + single[None, :] - both
    with np.errstate(divide="ignore", invalid="ignore"):
        distance = np.where(union > 0, 1.0 - both / union, 1.0)
    np.fill_diagonal(distance, 0.0)
    condensed = squareform(distance, checks=False)
    tree = optimal_leaf_ordering(linkage(condensed, method="average"), condensed)
    return [int(i) for i in leaves_list(tree)]


def missing_together(result, max_variables: int = MAX_TOGETHER):
    """When A is missing, how much more often is B missing? Lift and shared rows of every ordered pair.

    Row A, column B. Each cell holds a frame whose area is the number of rows missing A (the
    same across the row) and, inside it, a filled square whose area is the number of rows
    missing both, so the filled share of the frame is P(B missing | A missing) and differs
    between (A, B) and (B, A). The fill's colour is the lift P(B missing | A missing) /
    P(B missing): teal when B goes missing with A more often than in all rows, olive when
    less often, pale when about as often (log scale). The diagonal shows the rows missing
    each variable. Variables are ordered by average-linkage clustering on 1 - Jaccard
    similarity of their missing rows (variables missing in the same rows sit together);
    only the ``max_variables`` most incomplete variables are drawn and the figure says how
    many were left out.

    Parameters
    ----------
    result : AuditResult.
    max_variables : the most variables drawn (the most incomplete; ties in column order).

    Returns
    -------
    matplotlib Figure.

    References
    ----------
    Jaccard P (1912). The distribution of the flora in the alpine zone. New Phytologist
    11:37-50 (the similarity). Sokal RR, Michener CD (1958). A statistical method for
    evaluating systematic relationships. Univ Kansas Sci Bull 38:1409-1438 (average linkage).
    Bar-Joseph Z, Gifford DK, Jaakkola TS (2001). Fast optimal leaf ordering for
    hierarchical clustering. Bioinformatics 17(Suppl 1):S22-S29.
    """
    variables = result.variables
    counts = dict(zip(variables["variable"], variables["n_missing"].astype(np.int64)))
    incomplete = [v for v in variables["variable"] if counts[v] > 0]
    shown = sorted(incomplete, key=lambda v: -counts[v])[:max(int(max_variables), 2)]  # stable: ties in column order
    left_out = len(incomplete) - len(shown)
    k = len(shown)
    size = max(4.0, 0.36 * k + 2.6)
    figure, axes = new_figure(size + 1.4, size + 0.6)
    if k < 2:
        axes.text(0.5, 0.5, "fewer than two incomplete variables:\nnothing can go missing together",
                  ha="center", va="center", transform=axes.transAxes)
        axes.set_axis_off()
        figure.suptitle("When A is missing, how much more often is B missing?", fontsize=11, x=0.01, ha="left")
        return figure
    index = {v: i for i, v in enumerate(shown)}
    single = np.array([counts[v] for v in shown], dtype=np.float64)
    both = np.diag(single).copy()
    lift = np.full((k, k), np.nan)
    pairs = result.comissingness
    pairs = pairs[pairs["variable_a"].isin(index) & pairs["variable_b"].isin(index)]
    for a, b, n_both, value in zip(pairs["variable_a"], pairs["variable_b"], pairs["n_both_missing"], pairs["lift"]):
        both[index[a], index[b]] = n_both
        lift[index[a], index[b]] = value
    order = _together_order(shown, single, both)
    names = [shown[i] for i in order]
    single, both, lift = single[order], both[np.ix_(order, order)], lift[np.ix_(order, order)]

    with np.errstate(divide="ignore"):
        log_lift = np.log2(lift)
    finite = np.abs(log_lift[np.isfinite(log_lift)])
    reach = float(np.clip(np.ceil(finite.max()) if finite.size else 1.0, 1.0, 4.0))  # 2x to 16x either way
    norm = Normalize(vmin=-reach, vmax=reach)
    colours = scale("ratio")
    largest = float(single.max())
    for i in range(k):
        frame = 0.92 * np.sqrt(single[i] / largest)
        for j in range(k):
            if i == j:
                axes.add_patch(_square(j, i, frame, facecolor=NEUTRAL, edgecolor="none"))
                continue
            axes.add_patch(_square(j, i, frame, facecolor="none", edgecolor=GRID, linewidth=0.8))
            if both[i, j] > 0:
                side = 0.92 * np.sqrt(both[i, j] / largest)
                value = np.clip(log_lift[i, j], -reach, reach)
                axes.add_patch(_square(j, i, side, facecolor=colours(norm(value)), edgecolor=REFERENCE,
                                       linewidth=0.3))
    axes.set_xlim(-0.5, k - 0.5)
    axes.set_ylim(k - 0.5, -0.5)
    axes.set_aspect("equal")
    axes.set_xticks(range(k), names, rotation=60, ha="right", fontsize=8)
    axes.set_yticks(range(k), [f"{v} ({int(n):,})" for v, n in zip(names, single)], fontsize=8)
    axes.set_xlabel("B: is this variable missing too?")
    axes.set_ylabel("A: when this variable is missing (rows missing it)")
    axes.tick_params(length=0)
    for side in ("top", "right", "bottom", "left"):
        axes.spines[side].set_visible(False)
    mappable = ScalarMappable(norm=norm, cmap=colours)
    bar = figure.colorbar(mappable, ax=axes, fraction=0.04, pad=0.02)
    ticks = np.arange(-reach, reach + 1)
    bar.set_ticks(ticks, labels=[_times(t) for t in ticks])
    bar.set_label("lift: P(B missing | A missing) / P(B missing)", fontsize=8)
    shown_words = (f"the {k} most incomplete of {len(incomplete)} incomplete variables shown, {left_out} left out"
                   if left_out else f"all {k} incomplete variables shown")
    note = (f"Frame: rows missing A. Filled square: rows missing both, so its share of the frame is "
            f"P(B missing | A missing). Colour: lift. {shown_words[0].upper() + shown_words[1:]}; complete "
            f"variables are not drawn. Order: average-linkage clustering on 1 \u2212 Jaccard of the missing rows.")
    axes.set_title(textwrap.fill(note, width=int(12.5 * (size + 1.4))), fontsize=8, loc="left")
    figure.suptitle("When A is missing, how much more often is B missing?", fontsize=11, x=0.01, ha="left")
    return figure


def _square(x: float, y: float, side: float, **style):
    from matplotlib.patches import Rectangle
    return Rectangle((x - side / 2, y - side / 2), side, side, **style)


def _times(log2_value: float) -> str:
    value = 2.0 ** log2_value
    return f"{value:g}\u00d7" if value >= 1 else f"1/{1 / value:g}\u00d7"


def _pattern_label(missing: Sequence[str], limit: int = 3) -> str:
    if not missing:
        return "nothing missing"
    if len(missing) <= limit:
        return "lacks " + " + ".join(missing)
    return "lacks " + " + ".join(missing[:limit]) + f" + {len(missing) - limit} more"


def common_patterns(result, top: int = None):
    """The most common missingness patterns, each named by the variables it lacks.

    Parameters
    ----------
    result : AuditResult.
    top : how many patterns to show (default ``result.top_patterns``).

    Returns
    -------
    matplotlib Figure.
    """
    top = min(int(top or result.top_patterns), MAX_VARIABLES_SHOWN)  # the table lists them all
    table = result.listed_patterns().head(top)
    # Name the gaps in dropout order so the same variables always appear in the same order.
    order = list(result.dropout_order)
    labels = [_pattern_label([v for v in order if row[v] == 0]) for _, row in table.iterrows()]
    figure, axes = new_figure(7.5, max(2.5, 0.32 * len(table) + 1.4))
    positions = np.arange(len(table))[::-1]
    colours = [OBSERVED if m == 0 else MISSING for m in table["n_missing_variables"]]
    axes.barh(positions, table["pct_rows"], color=colours, height=0.7)
    for y, pct, rows in zip(positions, table["pct_rows"], table["n_rows"]):
        axes.text(pct, y, f" {rows:,} ({pct:.1f} %)", va="center", fontsize=7, color=REFERENCE)
    axes.set_yticks(positions)
    axes.set_yticklabels(labels, fontsize=8)
    axes.set_xlim(0, float(table["pct_rows"].max()) * 1.3 if len(table) else 1)
    axes.set_xlabel("% of rows")
    covered = float(table["pct_rows"].sum())
    axes.set_title(f"Which combinations of gaps are common?\nthe {len(table)} most common of {result.n_patterns:,} "
                   f"patterns ({covered:.1f} % of rows)",
                   fontsize=10)
    return figure
