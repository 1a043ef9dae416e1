"""Figures of the audit stage; each takes an :class:`gapbook.audit.AuditResult`.

1. :func:`missingness_map` - where are the gaps, and do they line up across rows?
2. :func:`missing_share` - which variables lack too much, and for what reasons?
3. :func:`comissingness_matrix` - which variables go missing together?
4. :func:`common_patterns` - which combinations of gaps are common?
"""
from __future__ import annotations

from typing import Sequence

import numpy as np
from matplotlib.patches import Patch

from . import EMPHASIS, MAX_VARIABLES_SHOWN, MISSING, OBSERVED, REFERENCE, new_figure, shown_of
from .palette import reason_shades, scale, text_on

MAP_SLICES = 400  # vertical resolution of the map: beyond this many rows, rows are shown in slices


def _sorted_patterns(result):
    """Pattern bits (1 = missing) with columns in dropout order and rows sorted into a staircase."""
    order = list(result.dropout_order)
    observed = result.patterns[order].to_numpy(dtype=np.int8)
    bits = 1 - observed
    counts = result.patterns["n_rows"].to_numpy(dtype=np.int64)
    n_missing = bits.sum(axis=1)
    # Fewer gaps first; among equals, gaps in the later (more often missing) columns first.
    keys = [bits[:, j] for j in range(bits.shape[1] - 1, -1, -1)] + [n_missing]
    rank = np.lexsort(keys) if bits.shape[1] else np.argsort(n_missing, kind="stable")
    return order, bits[rank], counts[rank]


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
                        vmin=0, vmax=1,
                        extent=(-0.5, len(order) - 0.5, 100, 0))
    axes.set_xticks(range(len(order)))
    axes.set_xticklabels(order, rotation=60, ha="right")
    axes.set_ylabel("rows, sorted by missingness pattern (% of rows)")
    axes.set_xlabel("variables, from least to most missing")
    shape = "monotone (dropout)" if result.monotone else "not monotone"
    axes.set_title(f"Where the gaps are: {total:,} rows in {result.n_patterns:,} patterns, {shape}"
                   f"{shown_of(len(order), n_variables)}", fontsize=10)
    if slices < total:
        bar = figure.colorbar(image, ax=axes, fraction=0.04)
        bar.set_label(f"share missing within each slice of {total / slices:,.0f} rows")
    else:
        axes.legend(handles=[Patch(color=OBSERVED, label="observed or not applicable"),
                             Patch(color=MISSING, label="missing")],
                    loc="upper left", bbox_to_anchor=(1.01, 1.0), frameon=False, fontsize=8)
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
        for column, label, colour in zip(reason_columns, reason_labels, colours):
            share = np.where(n > 0, table[column].to_numpy(dtype=float) / n * 100, 0.0)
            axes.barh(positions, share, left=left, color=colour, label=label, height=0.7)
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
    axes.set_title(f"How much each variable lacks, and why{shown_of(len(table), n_variables)}", fontsize=10)
    if reason_columns:
        axes.legend(title="missing reason", loc="lower right", frameon=False, fontsize=7, title_fontsize=8)
    return figure


def comissingness_matrix(result, annotate_up_to: int = 15):
    """Correlation of missingness indicators between incomplete variables (lower triangle).

    Parameters
    ----------
    result : AuditResult.
    annotate_up_to : write the values in the cells when there are at most this many variables.

    Returns
    -------
    matplotlib Figure.
    """
    matrix = result.comissingness_matrix
    n_variables = len(matrix)
    if n_variables > MAX_VARIABLES_SHOWN:
        share = result.variables.set_index("variable")["pct_missing"].reindex(matrix.index).fillna(0)
        keep = [v for v in matrix.index if v in set(share.sort_values(ascending=False, kind="stable")
                                                      .index[:MAX_VARIABLES_SHOWN])]
        matrix = matrix.loc[keep, keep]
    k = len(matrix)
    size = max(3.5, 0.45 * k + 2.5)
    figure, axes = new_figure(size + 1.0, size)
    if k < 2:
        axes.text(0.5, 0.5, "fewer than two incomplete variables:\nnothing can go missing together",
                  ha="center", va="center", transform=axes.transAxes)
        axes.set_axis_off()
        return figure
    values = matrix.to_numpy(dtype=float).copy()
    values[np.triu_indices(k)] = np.nan  # each pair once; the diagonal is 1 by definition
    # Lower triangle without the diagonal: rows from the second variable, columns up to the last but one.
    values = values[1:, :-1]
    image = axes.imshow(np.ma.masked_invalid(values), cmap=scale("ratio"), vmin=-1, vmax=1, interpolation="nearest")
    axes.set_xticks(range(k - 1))
    axes.set_xticklabels(matrix.columns[:-1], rotation=60, ha="right", fontsize=8)
    axes.set_yticks(range(k - 1))
    axes.set_yticklabels(matrix.index[1:], fontsize=8)
    if k <= annotate_up_to:
        for i in range(k - 1):
            for j in range(i + 1):
                if np.isfinite(values[i, j]):
                    axes.text(j, i, f"{values[i, j]:.2f}", ha="center", va="center", fontsize=7,
                              color=text_on(abs(values[i, j])))
    for side in ("top", "right"):
        axes.spines[side].set_visible(False)
    bar = figure.colorbar(image, ax=axes, fraction=0.045)
    bar.set_label("correlation of missingness (phi)")
    axes.set_title(f"Which variables go missing together{shown_of(k, n_variables, 'incomplete variables')}",
                   fontsize=10)
    return figure


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
    table = result.patterns.head(top)
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
    axes.set_title(f"The {len(table)} most common of {result.n_patterns:,} patterns ({covered:.1f} % of rows)",
                   fontsize=10)
    return figure
