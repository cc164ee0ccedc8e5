"""Measures whose entry functions still live here while their modules change.

Each function is a measure of the registry: its subject is the phase grid, its other
parameters come by name from the run (settings and shared inputs).
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from ..grid import INTERLAYER, OUTSIDE, SOLID, PhaseGrid
from ..measures.pores import default_reservoir, intrusion_diameter, local_thickness, size_distribution


@dataclass
class Bundle:
    """Several results of one measure, with a few headline figures."""

    parts: dict
    figures: dict = field(default_factory=dict)
    notes: list = field(default_factory=list)

    def to_dict(self) -> dict:
        d = dict(self.figures)
        for k, v in self.parts.items():
            d[k] = None if v is None else v.to_dict()
        if self.notes:
            d["notes"] = list(self.notes)
        return d


def _finite(x):
    return float(x) if x is not None and math.isfinite(x) else None


def _pore_codes(g):
    return tuple(sorted(c for c in g.names if c not in (OUTSIDE, SOLID, INTERLAYER)))


class PoreSizes(Bundle):
    def tables(self) -> dict:
        return {f"pore_sizes_{k}": v.table() for k, v in self.parts.items() if v is not None}

    def basis(self) -> dict:
        return {"pore_size": "volume-weighted quantiles of the local thickness (diameter of the "
                             "largest ball inside the pore space that holds the point) of the "
                             "non-interlayer pore space"}

    def __repr__(self) -> str:
        h = self.headline()["pore_size"]
        return "PoreSizes(" + ", ".join(f"{k}={v:.4g}" if v is not None else f"{k}=None"
                                       for k, v in h.items()) + ")"

    def headline(self) -> dict:
        lt = self.parts["local_thickness"]
        it = self.parts["intrusion"]
        return {"pore_size": {
            "d10_nm": _finite(lt.d10) if lt else None, "d50_nm": _finite(lt.d50) if lt else None,
            "d90_nm": _finite(lt.d90) if lt else None,
            "intrusion_d50_nm": _finite(it.d50) if it else None}}


def pores(grid: PhaseGrid, *, thickness=None, intrusion: bool = False):
    g = grid
    codes = _pore_codes(g)
    names = tuple(g.names[c] for c in codes)
    mask = np.isin(g.labels, codes)
    if not mask.any():
        return PoreSizes({"local_thickness": None, "intrusion": None},
                         notes=["no gel pore space: pore sizes undefined"])
    lt = thickness if thickness is not None else local_thickness(mask, g.spacing,
                                                                 periodic=g.periodic)
    parts = {"local_thickness": size_distribution(lt, voxel_size=g.spacing,
                                                  method="local_thickness", phases=names),
             "intrusion": None}
    notes = []
    if intrusion:
        if g.periodic:
            notes.append("periodic box: no reservoir at the boundary, so no intrusion distribution")
        else:
            m = ~np.isnan(lt)
            res = default_reservoir(m, outside=g.labels == OUTSIDE)
            d = intrusion_diameter(m, g.spacing, res)
            parts["intrusion"] = size_distribution(d, voxel_size=g.spacing, method="intrusion",
                                                   phases=names)
    return PoreSizes(parts, notes=notes)
