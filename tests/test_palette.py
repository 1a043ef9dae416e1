"""The one palette: colour-blind safe, complete for every strategy, and the only place colours live."""
from __future__ import annotations

import ast
import itertools
import re
import warnings
from pathlib import Path

import matplotlib
import numpy as np
import pytest

from gapbook.plots import palette

PLOTS = Path(palette.__file__).parent

colour = pytest.importorskip("colour")  # colour-science: CIE colorimetry and the Machado 2009 matrices


def _lab(rgb: np.ndarray) -> np.ndarray:
    return colour.XYZ_to_Lab(colour.sRGB_to_XYZ(rgb))


def _as_seen(hex_colour: str, deficiency) -> np.ndarray:
    """CIELAB of a colour as seen with full dichromacy (severity 1) of one kind, or unchanged for None.

    Machado, Oliveira & Fernandes (2009), IEEE Trans Vis Comput Graph 15:1291: the
    simulation matrix acts on linear RGB, so the sRGB transfer function is undone first
    and applied again after (IEC 61966-2-1).
    """
    rgb = np.array(matplotlib.colors.to_rgb(hex_colour))
    if deficiency is None:
        return _lab(rgb)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # colour-science notes the tritanomaly matrices' domain
        matrix = colour.matrix_cvd_Machado2009(deficiency, 1.0)
    linear = colour.cctf_decoding(rgb, function="sRGB")
    seen = np.clip(matrix @ linear, 0, 1)
    return _lab(colour.cctf_encoding(seen, function="sRGB"))


DEFICIENCIES = (None, "Protanomaly", "Deuteranomaly", "Tritanomaly")


def test_roles_drawn_together_stay_apart_for_colour_blind_readers():
    # CIEDE2000 (Sharma, Wu & Dalal 2005) as colour-science computes it; the threshold of 12 is
    # common practice, no source (about 10 reads as clearly different).
    named = palette.roles()
    worst = []
    for group in palette.DISTINGUISHABLE:
        for a, b in itertools.combinations(group, 2):
            for deficiency in DEFICIENCIES:
                difference = float(colour.delta_E(_as_seen(named[a], deficiency), _as_seen(named[b], deficiency),
                                                  method="CIE 2000"))
                worst.append((difference, a, b, deficiency))
    worst.sort()
    assert worst[0][0] >= palette.MIN_DIFFERENCE, worst[:3]


def test_the_checker_catches_a_red_green_pair():
    # Pure red and pure green differ hugely to normal vision and collapse under deuteranopia
    # (Machado et al. 2009): the same check must reject them, or it could not fail.
    normal = float(colour.delta_E(_as_seen("#D62728", None), _as_seen("#2CA02C", None), method="CIE 2000"))
    deutan = float(colour.delta_E(_as_seen("#D62728", "Deuteranomaly"), _as_seen("#2CA02C", "Deuteranomaly"),
                                  method="CIE 2000"))
    assert normal > 40 and deutan < palette.MIN_DIFFERENCE


def test_data_roles_follow_the_design():
    lab = {role: _as_seen(value, None) for role, value in palette.roles().items()}
    # observed: a neutral dark tone (low lightness, little chroma)
    lightness, a, b = lab["observed"]
    assert lightness < 35 and np.hypot(a, b) < 10
    # missing and imputed: one hue (within 10 degrees), neither red nor orange (hue outside 0-80 degrees)
    hues = {r: np.degrees(np.arctan2(lab[r][2], lab[r][1])) % 360 for r in ("missing", "imputed")}
    assert abs(hues["missing"] - hues["imputed"]) < 10
    assert all(not (h < 80 or h > 340) for h in hues.values()), hues
    assert lab["missing"][0] > lab["imputed"][0]  # missing the lighter shade
    for role in ("observed", "missing", "imputed", "not_applicable"):  # every data role shows on white
        assert colour.delta_E(lab[role], _lab(np.ones(3)), method="CIE 2000") >= 10


def test_every_strategy_of_the_vocabulary_has_a_colour_and_a_marker():
    from gapbook.vocabulary import STRATEGY_NAMES
    required = set(STRATEGY_NAMES) | {"complete_case", "missing_category", "multiple_imputation", "mixed_model",
                                      "completers", "last_observation", "jump_to_reference", "copy_reference",
                                      "copy_increments_reference"}
    assert required <= set(palette.STRATEGY_COLOURS)
    assert required <= set(palette.STRATEGY_MARKERS)
    assert len(set(palette.STRATEGY_MARKERS.values())) == len(palette.STRATEGY_MARKERS)
    assert palette.strategy_colour("delta_adjusted_+0.5") == palette.STRATEGY_COLOURS["delta_adjusted"]
    assert palette.strategy_colour("no_such_strategy") == palette.NEUTRAL


# ---------------------------------------------------------------------------
# no plot module writes a colour of its own

_COLOUR_ARGUMENTS = {"color", "colour", "colors", "c", "facecolor", "facecolors", "edgecolor", "edgecolors", "fc",
                     "ec", "mfc", "mec", "markerfacecolor", "markeredgecolor", "cmap", "bad", "over", "under",
                     "labelcolor", "textcolor", "hatchcolor", "ecolor"}
_HEX = re.compile(r"^#(?:[0-9a-fA-F]{3}|[0-9a-fA-F]{4}|[0-9a-fA-F]{6}|[0-9a-fA-F]{8})$")
_FORMAT = re.compile(r"^[-.:]*[bgrcmykw][-.:ov^<>sp*hH+xXDd|_1-4]*$")  # plot("k--"): a colour in a format string


def _colour_names():
    import matplotlib.colors as mcolors
    names = set(mcolors.CSS4_COLORS) | set(mcolors.XKCD_COLORS) | set(mcolors.TABLEAU_COLORS)
    names |= {n.lower() for n in names}
    return names


def _colormap_names():
    names = set(matplotlib.colormaps)
    return names | {n.lower() for n in names}


def hard_coded_colours(source: str):
    """Every colour a module writes itself, as (line, text); empty for a module that uses the palette only.

    Caught: hex strings, matplotlib's colour names (CSS4, xkcd:, tab:, the C0-C9 cycle), a
    colour letter in a format string ("k--"), grey levels and RGB(A) tuples given to a colour
    argument, and colormap names (as a ``cmap`` value, through ``get_cmap``/``colormaps`` or
    as ``plt.cm.<name>``).
    """
    names, maps = _colour_names(), _colormap_names()
    tree = ast.parse(source)
    colour_values = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.keyword) and node.arg in _COLOUR_ARGUMENTS:
            colour_values.update(id(inner) for inner in ast.walk(node.value))
        elif isinstance(node, ast.Call) and _called(node) in {"get_cmap", "color_palette", "ListedColormap"}:
            colour_values.update(id(inner) for arg in node.args for inner in ast.walk(arg))
        elif isinstance(node, ast.Subscript) and getattr(node.value, "attr", getattr(node.value, "id", "")) \
                == "colormaps":
            colour_values.update(id(inner) for inner in ast.walk(node.slice))
    found = []
    for node in ast.walk(tree):
        if isinstance(node, ast.Constant) and isinstance(node.value, str):
            text = node.value.strip()
            lowered = text.lower()
            in_colour_argument = id(node) in colour_values
            if (_HEX.match(text) or lowered.startswith(("tab:", "xkcd:")) or re.fullmatch(r"c\d", lowered)
                    or (lowered in names and lowered != "none")):
                found.append((node.lineno, text))
            elif _FORMAT.match(text) and (in_colour_argument or any(ch in "-.:" for ch in text)):
                found.append((node.lineno, text))  # "k--" in plot(), or a colour letter such as c="r"
            elif in_colour_argument and (re.fullmatch(r"[01]?\.\d+|[01]", text) or lowered in maps
                                         or lowered.removesuffix("_r") in maps):
                found.append((node.lineno, text))  # a grey level "0.5" or a colormap name
        elif isinstance(node, ast.Tuple) and id(node) in colour_values:
            values = [e.value for e in node.elts if isinstance(e, ast.Constant)]
            if len(values) == len(node.elts) and 3 <= len(values) <= 4 and all(
                    isinstance(v, (int, float)) and not isinstance(v, bool) for v in values):
                found.append((node.lineno, str(tuple(values))))
        elif isinstance(node, ast.Attribute) and getattr(node.value, "attr", getattr(node.value, "id", "")) == "cm":
            found.append((node.lineno, f"cm.{node.attr}"))  # plt.cm.viridis, matplotlib.cm.magma
    return sorted(set(found))


def _called(node: ast.Call) -> str:
    return node.func.attr if isinstance(node.func, ast.Attribute) else getattr(node.func, "id", "")


def test_no_plot_module_hard_codes_a_colour():
    modules = sorted(p for p in PLOTS.glob("*.py") if p.name != "palette.py")
    assert len(modules) >= 6
    offenders = {p.name: hard_coded_colours(p.read_text()) for p in modules}
    assert not {name: found for name, found in offenders.items() if found}


@pytest.mark.parametrize("line", [
    'ax.plot(x, y, color="#4C6A92")', "ax.bar(x, y, color='white')", 'ax.plot(x, y, color="tab:blue")',
    'ax.plot(x, y, "k--")', "ax.plot(x, y, color=(0.2, 0.3, 0.4))", 'image = ax.imshow(v, cmap="viridis")',
    'colours = plt.get_cmap("magma")(t)', "colours = plt.cm.viridis(t)", 'ax.text(0, 0, "a", color="0.5")',
    'edge = "C3"', 'ax.bar(x, y, color="xkcd:sky blue")', 'ax.plot(x, y, mec="darkred")', 'ax.plot(x, y, c="r")',
])
def test_the_detector_catches_each_kind_of_hard_coded_colour(line):
    assert hard_coded_colours(line)


@pytest.mark.parametrize("line", [
    "ax.plot(x, y, color=OBSERVED)", 'ax.plot(x, y, "o", color=palette.MISSING, ls="--")',
    'ax.set_title("Where are the gaps?", loc="left")', 'figure.legend(loc="outside lower center")',
    'ax.bar(x, y, edgecolor="none")', 'axes.set_xscale("log")', "layout = (0, 0, 1, 0.95)",
])
def test_the_detector_leaves_palette_use_alone(line):
    assert not hard_coded_colours(line)
