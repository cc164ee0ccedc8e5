"""Measures: plain functions of a Structure or a PhaseGrid returning small result objects.

The registry below names the measures the command line can run (``sheetview measure
--only NAME,...``). Each entry says what the measure needs (``"structure"`` for prisms,
``"grid"`` for a PhaseGrid) and which keyword settings it accepts; further measures are
added with :func:`register` (the target is imported only when the measure runs).
"""
from __future__ import annotations

import importlib
from dataclasses import dataclass

from ..errors import OptionError


@dataclass(frozen=True)
class Measure:
    """A named measure: ``target`` is ``"module:function"`` relative to this package."""

    name: str
    target: str
    needs: str
    params: tuple
    description: str

    @property
    def function(self):
        mod, func = self.target.split(":")
        return getattr(importlib.import_module(mod, __name__), func)


REGISTRY: dict[str, Measure] = {}

NEEDS = {"structure": "prisms (a Structure: a prism table or a sheet mesh)",
         "grid": "a voxel volume (a PhaseGrid)"}


def register(name: str, target: str, needs: str, params=(), description: str = "") -> Measure:
    """Add (or replace) a named measure in the registry."""
    if needs not in NEEDS:
        raise ValueError(f"needs must be one of {sorted(NEEDS)}, not {needs!r}")
    m = Measure(name, target, needs, tuple(params), description)
    REGISTRY[name] = m
    return m


def names() -> list[str]:
    """Registered measure names, in registration order."""
    return list(REGISTRY)


def parse_only(value: str | None) -> list[str]:
    """Parse ``--only a,b`` into registered names (all of them when ``value`` is None).

    Raises :class:`OptionError` listing the valid names when one is unknown.
    """
    if value is None:
        return names()
    picked = [v.strip().lower() for v in str(value).split(",") if v.strip()]
    if not picked:
        raise OptionError(f"--only: no measure named; valid names: {', '.join(names())}")
    unknown = [v for v in picked if v not in REGISTRY]
    if unknown:
        raise OptionError(f"--only: unknown measure(s) {', '.join(repr(u) for u in unknown)}; "
                          f"valid names: {', '.join(names())}")
    return list(dict.fromkeys(picked))


def kind_of(obj) -> str:
    from ..grid import PhaseGrid
    from ..structure import Structure
    if isinstance(obj, Structure):
        return "structure"
    if isinstance(obj, PhaseGrid):
        return "grid"
    return type(obj).__name__


def check_inputs(selected, obj, source=None) -> None:
    """Raise :class:`OptionError` when a selected measure cannot use ``obj``."""
    kind = kind_of(obj)
    bad = [n for n in selected if REGISTRY[n].needs != kind]
    if bad:
        need = sorted({REGISTRY[n].needs for n in bad})
        what = " and ".join(NEEDS[k] for k in need)
        raise OptionError(f"measure(s) {', '.join(bad)} need {what}, but the input is a "
                          f"{type(obj).__name__}", path=source)


def run(selected, obj, settings: dict | None = None) -> dict:
    """Run the selected measures on ``obj``; each gets the settings it declares."""
    settings = settings or {}
    check_inputs(selected, obj, getattr(obj, "source", None))
    out = {}
    for name in selected:
        m = REGISTRY[name]
        kw = {k: settings[k] for k in m.params if k in settings and settings[k] is not None}
        out[name] = m.function(obj, **kw)
    return out


register("stacking", ".stacking:stacking", "structure",
         ("angle_tol", "gap_tol", "overlap", "tilt_limit", "edge_tol"),
         "layers, stacks, stacking numbers, per-stack table, tilted contacts")
register("order", ".orientation:orientation", "structure",
         ("local_radius", "frame"),
         "Q tensor, order parameter S, director, local and wall order, pole figure")
