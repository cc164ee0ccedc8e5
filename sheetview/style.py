"""The look of sheetview's figures and pictures: one place for the palettes and colours.

Phase colours of sections were chosen for sheetview (no other program's scheme): solid a
dark umber, interlayer a lavender, gel pore a pale sky blue, outside the domain a light
neutral grey, and deeper blues for the larger pore-size classes. They differ in lightness
as well as hue, so they stay apart for colour-blind readers and in greyscale print.
"""
from __future__ import annotations

import numpy as np

from .grid import GEL, INTERLAYER, OUTSIDE, SOLID

#: Phase colours of sections (see the module docstring).
PHASE_COLOURS = {
    SOLID: "#7a4e2d",
    INTERLAYER: "#a58fd0",  # lavender: apart from the orange of the stack palette
    GEL: "#9fd3f0",
    OUTSIDE: "#d9d9d9",
    # pore size classes split from the gel pores (codes 4, 5, 6: larger pores, deeper blue)
    GEL + 1: "#5aa9d6",
    GEL + 2: "#2c72b0",
    GEL + 3: "#1d4677",
}
PHASE_LABELS = {SOLID: "solid", INTERLAYER: "interlayer", GEL: "gel pore",
                OUTSIDE: "outside the domain"}
#: Drawing order of phases in legends and their toggle keys.
PHASE_ORDER = (SOLID, INTERLAYER, GEL, OUTSIDE)
#: Drawing order of every phase a section can show (size classes after the gel pores).
SECTION_ORDER = (SOLID, INTERLAYER, GEL, GEL + 1, GEL + 2, GEL + 3, OUTSIDE)


def phase_label(code: int, names: dict | None = None) -> str:
    """Legend text of a phase code: the fixed labels, else the grid's name of a size class
    ("interhydrate pore")."""
    if code in PHASE_LABELS and (names is None or code != GEL or names.get(GEL) == "gel"):
        return PHASE_LABELS[code]
    name = (names or {}).get(code, f"phase {code}")
    return f"{name} pore"


#: Qualitative palette for stacks and tags: the colour-blind-safe set of Okabe & Ito
#: (Color Universal Design, 2008) without its black, cycled when there are more groups.
GROUP_PALETTE = ("#e69f00", "#56b4e9", "#009e73", "#f0e442", "#0072b2", "#d55e00", "#cc79a7")

#: Opacity of each phase on the cut plane of the 3D scene: the pore phases are see-through
#: so that the prisms behind the cut stay visible.
PHASE_OPACITY = {SOLID: 1.0, INTERLAYER: 1.0, GEL: 0.45, OUTSIDE: 0.25}

BACKGROUND = "#ffffff"
OUTLINE_COLOUR = "#404040"
NAN_COLOUR = "#b0b0b0"
TEXT_COLOUR = "#202020"

#: Colours of the HTML report pages (sheetview.report): headings ruled in the solid's umber,
#: links in the deepest pore blue, errors in a dark red, rules and muted text in greys.
PAGE_COLOURS = {"accent": PHASE_COLOURS[SOLID], "link": PHASE_COLOURS[GEL + 3],
                "error": "#a00000", "rule": "#cccccc", "muted": "#555555",
                "frame": "#dddddd"}


def rgb(colour) -> np.ndarray:
    """A colour (name or hex) as floats in [0, 1]."""
    from matplotlib.colors import to_rgb
    return np.asarray(to_rgb(colour))


def rgb8(colour) -> np.ndarray:
    """A colour as uint8 RGB."""
    return np.round(rgb(colour) * 255).astype(np.uint8)


def section_rgb(labels: np.ndarray, visible=SECTION_ORDER, background=BACKGROUND) -> np.ndarray:
    """RGB uint8 image of a label array (hidden phases and off-grid in ``background``)."""
    lut = np.tile(rgb8(background), (256, 1))
    for code in visible:
        lut[code] = rgb8(PHASE_COLOURS[code])
    return lut[labels]
