"""Column names of the CSV tables sheetview writes: every quantity with a unit carries it in
its name (``volume_nm3``, ``wall_angle_deg``), angles are in degrees, counts are integers.

The measures' tables keep the names of their Python API; :func:`with_units` gives the names
and values a file gets (one table for every report folder, docs/formats.md lists them).

Examples
--------
>>> with_units("stacks", {"stack": [0], "thickness": [7.0], "wall_angle": [90.0]})
{'stack': [0], 'thickness_nm': [7.0], 'wall_angle_deg': [90.0]}
"""
from __future__ import annotations

import re

import numpy as np

_NM = "_nm"
#: table -> {column: file column} for columns without a unit in their name.
RENAME = {
    "prisms": {"volume": "volume_nm3"},
    "stacks": {"lateral_diameter": "lateral_diameter_nm", "disc_diameter": "disc_diameter_nm",
               "thickness": "thickness_nm", "centroid_x": "centroid_x_nm",
               "centroid_y": "centroid_y_nm", "centroid_z": "centroid_z_nm",
               "wall_distance": "wall_distance_nm", "wall_angle": "wall_angle_deg"},
}
#: Columns of a table holding counts, written as integers.
COUNTS = {"s2_solid": ("pairs",), "s2": ("pairs",), "minkowski": ("euler", "euler_6"),
          "stacks": ("prisms", "layers", "column")}
#: Minkowski densities per reference volume: their units.
_DENSITY_UNITS = {"V_V": "", "S_V": "_nm-1", "M_V": "_nm-2", "chi_V": "_nm-3"}
_DENSITY = re.compile(r"^(V_V|S_V|M_V|chi_V)_per_([a-z]+)$")


def file_name(table: str, column: str) -> str:
    """The name ``column`` of ``table`` gets in a file."""
    new = RENAME.get(table, {}).get(column)
    if new is not None:
        return new
    m = _DENSITY.match(column)
    if m:
        return f"{m.group(1)}_per_{m.group(2)}_volume{_DENSITY_UNITS[m.group(1)]}"
    return column


def with_units(table: str, columns: dict) -> dict:
    """``columns`` of ``table`` as a file holds them: unit-carrying names
    (:func:`file_name`), counts as integers (:data:`COUNTS`)."""
    out = {}
    counts = COUNTS.get(table, ())
    if table.startswith("pore_sizes") and "density" in columns and "d_lower_nm" in columns:
        new = _pore_density_name(columns)
        columns = {(new if k == "density" else k): v for k, v in columns.items()}
    for k, v in columns.items():
        if k in counts:
            a = np.asarray(v, dtype=float)
            if a.size and np.all(np.isfinite(a)) and np.all(a == np.round(a)):
                v = a.astype(np.int64)
        out[file_name(table, k)] = v
    return out


def _pore_density_name(columns) -> str:
    """The pore-size density is the volume fraction per nm of size on linear bins, per unit
    ln(size in nm) on logarithmic ones (sheetview.measures.pores.PoreSizeDistribution): the
    name says which, read from the bin edges."""
    lo = np.asarray(columns["d_lower_nm"], float)
    hi = np.asarray(columns["d_upper_nm"], float)
    w = hi - lo
    if lo.size > 1 and np.all(lo > 0) and not np.allclose(w, w[0], rtol=1e-6):
        return "density_per_ln_nm"
    return "density_per_nm"


#: Unit suffixes of column and key names, longest first: ``d50_nm`` -> nm.
SUFFIX_UNITS = (("_m2_per_g", "m^2/g"), ("_g_cm3", "g/cm^3"), ("_cm-1", "cm^-1"),
                ("_nm-1", "nm^-1"), ("_nm-2", "nm^-2"), ("_nm-3", "nm^-3"), ("_nm2", "nm^2"),
                ("_nm3", "nm^3"), ("_nm", "nm"), ("_deg", "deg"), ("_ms", "ms"), ("_us", "us"),
                ("_s", "s"), ("_1e-6_A-2", "1e-6 A^-2"), ("_bytes", "bytes"))


#: Summary keys whose unit their name does not state.
KEY_UNITS = {"spacing": "nm", "stacking.stacks.mean_lateral_diameter": "nm",
             "stacking.stacks.mean_disc_diameter": "nm", "stacking.stacks.mean_thickness": "nm",
             "stacking.tilted_contacts.mean_angle": "deg", "stacking.links.search_radius": "nm",
             "stacking.settings.spacing": "nm"}


def unit_of(name: str) -> str | None:
    """The unit a column name states by its suffix: of its last dotted part, past list
    indices (``scattering.q_valid_nm-1.0`` -> nm^-1), else of its parent
    (``timings_s.stacking`` -> s); None for a count, a fraction, a ratio, text."""
    if name in KEY_UNITS:
        return KEY_UNITS[name]
    parts = name.split(".")
    while len(parts) > 1 and parts[-1].isdigit():
        parts.pop()
    for part in (parts[-1], parts[-2] if len(parts) > 1 else ""):
        for suffix, unit in SUFFIX_UNITS:
            if part.endswith(suffix):
                return unit
    return None
