"""The registry of named measures: what ``sheetview measure --only NAME`` can run.

Each entry names a public function of a measure module. The function's first argument is
its subject (a Structure for ``needs="structure"``, the phase grid for ``needs="grid"``);
every other parameter is given by name by the run (:class:`sheetview.app.run.Run`) from
the settings (:class:`sheetview.app.settings.Settings`, same names) or from the shared
inputs of the run (:data:`sheetview.app.run.SHARED`: the phase grid, the stacking graph,
the pore local thickness, the material model...), or keeps its default. So a new measure is
its module's function plus one :func:`register` line here.
"""
from __future__ import annotations

import importlib
import inspect
from dataclasses import dataclass

from ..errors import OptionError
from ..grid import PhaseGrid
from ..particles import ParticleSet
from ..structure import Structure, SurfaceBody


@dataclass(frozen=True)
class MeasureSpec:
    """A named measure: ``target`` is ``"module:function"`` (absolute module path)."""

    name: str
    target: str
    needs: str
    description: str
    default: bool = True

    @property
    def function(self):
        mod, func = self.target.split(":")
        return getattr(importlib.import_module(mod), func)

    def parameters(self) -> list[str]:
        """Names of the function's parameters after its subject."""
        params = list(inspect.signature(self.function).parameters.values())
        return [p.name for p in params[1:]
                if p.kind in (p.POSITIONAL_OR_KEYWORD, p.KEYWORD_ONLY)]


REGISTRY: dict[str, MeasureSpec] = {}

NEEDS = {"structure": "prisms (a prism table or a mesh read as sheets)",
         "grid": "a phase grid (a voxel volume, or prisms or a solid body rasterized)"}

#: The word in ``only`` that stands for the default selection (``"default,scattering"``).
DEFAULT_WORD = "default"


def register(name: str, target: str, needs: str, description: str = "",
             default: bool = True) -> MeasureSpec:
    """Add (or replace) a named measure. ``default``: run when no selection is given
    (costly or assumption-laden measures are opt-in)."""
    if needs not in NEEDS:
        raise ValueError(f"needs must be one of {sorted(NEEDS)}, not {needs!r}")
    m = MeasureSpec(name, target, needs, description, bool(default))
    REGISTRY[name] = m
    return m


def names(*, optional: bool = True) -> list[str]:
    """Registered measure names in registration order (only the default selection when
    ``optional`` is False)."""
    return [n for n, m in REGISTRY.items() if optional or m.default]


def kind_of(obj) -> str:
    if isinstance(obj, Structure):
        return "structure"
    if isinstance(obj, (PhaseGrid, SurfaceBody, ParticleSet)):
        return "grid"
    return type(obj).__name__


def applicable(obj, *, optional: bool = False) -> list[str]:
    """The registered measures that can run on ``obj``: the default selection, or with
    ``optional`` also the opt-in ones."""
    kind = kind_of(obj)
    ok = names(optional=optional)
    if kind == "structure":
        return ok
    return [n for n in ok if REGISTRY[n].needs == "grid"]


def parse_only(value) -> list[str]:
    """Measure names from ``"a,b"`` or a list (all registered ones for None); raises
    :class:`OptionError` (parameter ``only``) listing the valid names."""
    if value is None:
        return names()
    text = value if isinstance(value, str) else ",".join(str(v) for v in value)
    picked = [v.strip().lower() for v in text.split(",") if v.strip()]
    valid = (f"valid names: {', '.join(names())} (and '{DEFAULT_WORD}' for the measures run "
             f"by default)")
    if not picked:
        raise OptionError(f"no measure named; {valid}", param="only")
    unknown = [v for v in picked if v not in REGISTRY and v != DEFAULT_WORD]
    if unknown:
        raise OptionError(f"unknown measure(s) {', '.join(repr(u) for u in unknown)}; {valid}",
                          param="only")
    return list(dict.fromkeys(picked))


def select(only, obj) -> list[str]:
    """The measures to run on ``obj``: the default selection when ``only`` is None, else
    the names of ``only`` with ``default`` standing for the default selection."""
    if only is None:
        return applicable(obj)
    out = []
    for n in parse_only(only):
        out.extend(applicable(obj) if n == DEFAULT_WORD else [n])
    return list(dict.fromkeys(out))


def check_inputs(selected, obj, source=None) -> None:
    """Raise :class:`OptionError` when a selected measure cannot use ``obj``: prism
    measures need a Structure; grid measures run on a PhaseGrid, or on prisms or a closed
    body through their phase grid."""
    ok = set(applicable(obj, optional=True))
    bad = [n for n in selected if n not in ok]
    if bad:
        need = sorted({REGISTRY[n].needs for n in bad})
        what = " and ".join(NEEDS[k] for k in need)
        kind = {"Structure": "prism structure", "SurfaceBody": "closed surface (solid body)",
                "PhaseGrid": "voxel volume",
                "ParticleSet": "packing of solid particles (no sheets to stack or orient)"}.get(type(obj).__name__, type(obj).__name__)
        raise OptionError(f"measure(s) {', '.join(bad)} need {what}, but the input is a {kind}",
                          path=source, param="only")


_M = "sheetview.measures"
register("stacking", f"{_M}.stacking:stacking", "structure",
         "layers, stacks, stacking numbers, per-stack table, tilted contacts")
register("order", f"{_M}.orientation:orientation", "structure",
         "Q tensor, order parameter S, director, local and wall order, pole figure")
register("phases", f"{_M}.phases:volume_fractions", "grid",
         "volume fractions of solid, interlayer, gel pores (and size classes), water of each class")
register("surface", f"{_M}.surface:surface_measure", "grid",
         "interface areas, S/V per pore class, specific surface, Minkowski functionals")
register("pores", f"{_M}.pores:pores_measure", "grid",
         "pore sizes: local thickness and simulated intrusion, d10/d50/d90")
register("chords", f"{_M}.chords:chord_measure", "grid",
         "chord lengths of solid and pore on isotropic random lines, Cauchy 4V/S")
register("correlation", f"{_M}.correlation:correlation_measure", "grid",
         "two-point correlation S2(r) of the solid and its slope at the origin")
register("scattering", f"{_M}.scattering:scattering_measure", "grid",
         "predicted SANS curve I(q) (neutrons, C-S-H in H2O): slopes, Porod, Guinier, "
         "invariant, Bragg peaks (opt-in; `sheetview scatter` for other contrasts)",
         default=False)
register("relaxation", f"{_M}.relaxation:relaxation_measure", "grid",
         "predicted NMR T2 distribution per pore class, fast exchange (opt-in; "
         "`sheetview relax` for other parameters)", default=False)
register("water_walk", f"{_M}.diffusion:relaxation_walk", "grid",
         "random-walk NMR relaxation beyond fast exchange: M(t), T2 spectrum by start class, "
         "class-to-class exchange, beside the fast-diffusion spectrum (opt-in; costly; "
         "`sheetview waterwalk` for other parameters)", default=False)
register("transport", f"{_M}.diffusion:transport_walk", "grid",
         "effective diffusivity, tortuosity and formation factor of the water from random "
         "walkers (opt-in; costly)", default=False)
