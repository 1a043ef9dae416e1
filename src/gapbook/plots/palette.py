"""gapbook's one palette: every colour a figure uses, by the role it plays.

The palette is our own. Observed values are a neutral dark tone; missing and imputed
values share one accent hue (a teal, never red or orange), missing the lighter and
imputed the deeper shade, so "where data were absent" reads the same in every figure.
Strategies get colours by family: the missing-at-random analyses in blue-violet and the
imputation teal, reference-based imputations in one brown-to-sand series, comparison
analyses that are not recommended in greys.

Colour-blind safety: the test suite simulates protanopia, deuteranopia and tritanopia
(Machado, Oliveira & Fernandes 2009, IEEE Trans Vis Comput Graph 15:1291) and checks that
the roles drawn together in one figure (:data:`DISTINGUISHABLE`) stay apart by a CIEDE2000
colour difference (Sharma, Wu & Dalal 2005, Color Res Appl 30:21) of at least
:data:`MIN_DIFFERENCE` under each. Differences run along lightness and the blue-yellow
axis, which those deficiencies keep.

Plot modules import colours from here and never write one themselves; a test reads every
plot module and fails on a hex string, a colour name, an RGB tuple or a colormap name.
"""
from __future__ import annotations

from typing import Dict, Mapping, Sequence, Tuple

from matplotlib.colors import Colormap, LinearSegmentedColormap, to_rgb

from ..vocabulary import FOLLOWUP_STRATEGY_NAMES, PARTICIPANT_ROW_STRATEGY_NAMES

__all__ = ["OBSERVED", "MISSING", "IMPUTED", "NOT_APPLICABLE", "REFERENCE", "EMPHASIS", "NEUTRAL", "UNTESTED",
           "GRID", "BACKGROUND", "STRATEGY_COLOURS", "STRATEGY_MARKERS", "GROUPS", "REASON_SHADES",
           "MIN_DIFFERENCE", "DISTINGUISHABLE", "roles", "strategy_colour", "strategy_marker", "reason_shades",
           "blend", "scale", "text_on"]

# ---------------------------------------------------------------------------
# the data's roles

OBSERVED = "#34373C"          # a value that was recorded: neutral dark
MISSING = "#3A9A92"           # a value that is absent: the accent hue (teal), lighter shade
IMPUTED = "#087A73"           # a value filled in by imputation: the accent hue, deeper shade
NOT_APPLICABLE = "#D3D1C4"    # a cell outside the variable's applies_if condition: not missing

# ---------------------------------------------------------------------------
# marks that are not data

REFERENCE = "#2B2D2F"         # reference lines (null, limits) and annotation text
EMPHASIS = "#9843BE"          # what the reader should look at: a threshold crossed, a changed conclusion
NEUTRAL = "#A4B2C2"           # context drawn behind the data: totals, untested cells, settled lines
UNTESTED = "#E6E9ED"          # a cell that was not computed
GRID = "#D5D8DC"              # cell edges and light rules
BACKGROUND = "#FFFFFF"        # the figure's ground; also text on dark cells

# ---------------------------------------------------------------------------
# strategies (the ``strategy`` column of estimates.csv)

STRATEGY_COLOURS: Dict[str, str] = {
    "complete_case": "#364669",               # navy slate
    "missing_category": "#ADA945",            # olive
    "multiple_imputation": IMPUTED,           # the imputation accent
    "delta_adjusted": "#7C9BDB",              # cornflower: imputation shifted away from MAR
    "mixed_model": "#5A4EBB",                 # indigo
    "jump_to_reference": "#793E11",           # reference-based family: brown,
    "copy_reference": "#9B7D22",              # ochre,
    "copy_increments_reference": "#D1C651",   # sand
    "completers": "#8E989B",                  # not recommended: grey,
    "last_observation": "#CACDC6",            # light grey
}
STRATEGY_MARKERS: Dict[str, str] = {
    "complete_case": "s", "missing_category": "^", "multiple_imputation": "D", "delta_adjusted": "d",
    "mixed_model": "o", "jump_to_reference": "v", "copy_reference": "<", "copy_increments_reference": ">",
    "completers": "X", "last_observation": "P",
}
# Groups of a study (arms, exposure levels) in level order: the first (reference) level dark.
GROUPS: Tuple[str, ...] = (REFERENCE, "#5A4EBB", "#ADA945", "#793E11", "#B77DF1", NEUTRAL)

# Missing reasons: three shades of the accent hue, three of the olive, two of navy; a plot
# that needs more cycles them with a hatch.
REASON_SHADES: Tuple[str, ...] = ("#005C56", "#3A9A92", "#A2D6D0", "#565200", "#968D3A", "#D7CD94",
                                  "#1F2A44", "#9AA8C7")

# ---------------------------------------------------------------------------
# colour-blind check: which roles are drawn together and must stay apart

MIN_DIFFERENCE = 12.0  # CIEDE2000; about 10 and above reads as clearly different (common practice, no source)
DISTINGUISHABLE: Tuple[Tuple[str, ...], ...] = (
    ("observed", "missing", "not_applicable", "emphasis", "neutral"),
    ("observed", "imputed", "not_applicable", "emphasis", "neutral"),
    (*PARTICIPANT_ROW_STRATEGY_NAMES, "delta_adjusted", "reference", "emphasis"),
    (*FOLLOWUP_STRATEGY_NAMES, "reference"),
    ("group_1", "group_2", "group_3", "group_4", "group_5"),
    tuple(f"reason_{i + 1}" for i in range(8)),
)


def roles() -> Dict[str, str]:
    """Every named colour of the palette, role -> hex (strategies, groups and reason shades included).

    Returns
    -------
    dict of str to str
    """
    named = {"observed": OBSERVED, "missing": MISSING, "imputed": IMPUTED, "not_applicable": NOT_APPLICABLE,
             "reference": REFERENCE, "emphasis": EMPHASIS, "neutral": NEUTRAL, "untested": UNTESTED,
             "grid": GRID, "background": BACKGROUND}
    named.update(STRATEGY_COLOURS)
    named.update({f"group_{i + 1}": c for i, c in enumerate(GROUPS)})
    named.update({f"reason_{i + 1}": c for i, c in enumerate(REASON_SHADES)})
    return named


def strategy_colour(strategy: str) -> str:
    """The colour of a strategy (delta-adjusted rows such as ``delta_adjusted_...`` share one); NEUTRAL if unknown.

    Parameters
    ----------
    strategy : str
        A strategy name.

    Returns
    -------
    str
        A hex colour.
    """
    return STRATEGY_COLOURS.get(_drawn_as(strategy), NEUTRAL)


def strategy_marker(strategy: str) -> str:
    """The marker of a strategy, so strategies differ by shape as well as colour ('o' if unknown).

    Parameters
    ----------
    strategy : str
        A strategy name.

    Returns
    -------
    str
        A matplotlib marker.
    """
    return STRATEGY_MARKERS.get(_drawn_as(strategy), "o")


def _drawn_as(strategy: str) -> str:
    """The strategy whose colour and marker a row takes: delta-adjusted rows (``delta_adjusted_...``) share one."""
    return "delta_adjusted" if str(strategy).startswith("delta_adjusted") else strategy


def group_colours(levels: Sequence) -> Dict:
    """One colour per group level, in level order (cycling after :data:`GROUPS` runs out)."""
    return {level: GROUPS[i % len(GROUPS)] for i, level in enumerate(levels)}


def reason_shades(k: int) -> Tuple[str, ...]:
    """k shades for k missing reasons, on the missing side of the palette (cycling after eight).

    Parameters
    ----------
    k : int
        The number of reasons.

    Returns
    -------
    tuple of str
        Hex colours.
    """
    return tuple(REASON_SHADES[i % len(REASON_SHADES)] for i in range(int(k)))


def blend(colour: str, toward: str = BACKGROUND, weight: float = 0.5) -> Tuple[float, float, float]:
    """A colour moved ``weight`` of the way toward another (a lighter tint toward the background).

    Parameters
    ----------
    colour : str
        A hex colour.
    toward : str
        The hex colour to move toward.
    weight : float
        0 keeps ``colour``, 1 gives ``toward``.

    Returns
    -------
    (r, g, b) : floats in 0..1
    """
    a, b = to_rgb(colour), to_rgb(toward)
    return tuple((1 - weight) * x + weight * y for x, y in zip(a, b))


# ---------------------------------------------------------------------------
# colour scales

_SCALES: Mapping[str, Tuple[str, ...]] = {
    # share missing: from observed to missing (the map of gaps). Observed cells are the map's
    # ground, so they take a light tint of the observed tone rather than the full dark tone.
    "observed_to_missing": ("#D5D6D8", MISSING),
    # a magnitude on the missing side (|standardised difference|): white to the deep accent
    "magnitude": (BACKGROUND, "#C6E3DF", MISSING, IMPUTED, "#00443F"),
    # a ratio around 1 on a log scale (lift): less often than by chance olive, more often teal
    "ratio": ("#565200", "#968D3A", "#E2DDC6", BACKGROUND, "#C6E3DF", MISSING, "#00443F"),
}


def scale(name: str) -> Colormap:
    """A named colour scale of the palette: ``observed_to_missing``, ``magnitude`` or ``ratio``.

    Parameters
    ----------
    name : str
        The scale's name.

    Returns
    -------
    matplotlib.colors.Colormap
    """
    colours = _SCALES[name]
    return LinearSegmentedColormap.from_list(f"gapbook_{name}", list(colours)).with_extremes(bad=BACKGROUND)


def text_on(value: float, dark_above: float = 0.6) -> str:
    """Text colour over a cell whose scale position (0..1) is ``value``: background on dark cells.

    Parameters
    ----------
    value : float
        The cell's position on its colour scale, 0..1.
    dark_above : float
        From which position a cell counts as dark.

    Returns
    -------
    str
        A hex colour.
    """
    return BACKGROUND if value > dark_above else REFERENCE
