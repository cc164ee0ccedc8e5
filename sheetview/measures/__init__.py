"""Measures: plain functions of a Structure or a PhaseGrid returning small result objects.

The registry below names the measures the command line can run (``sheetview measure
--only NAME,...``). Each entry says what the measure needs (``"structure"`` for prisms,
``"grid"`` for a phase grid, which prisms and closed bodies get by rasterization) and
which settings it reads; its target is a function of a :class:`sheetview.pipeline.Context`
(the glue that shares the stacking graph and the phase grid between measures); further
measures are
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
    default: bool = True

    @property
    def function(self):
        mod, func = self.target.split(":")
        return getattr(importlib.import_module(mod, __name__), func)


REGISTRY: dict[str, Measure] = {}

NEEDS = {"structure": "prisms (a Structure: a prism table or a sheet mesh)",
         "grid": "a voxel volume (a PhaseGrid)"}


def register(name: str, target: str, needs: str, params=(), description: str = "",
             default: bool = True) -> Measure:
    """Add (or replace) a named measure in the registry. ``default``: run when no
    ``--only`` is given (costly or assumption-laden measures are opt-in)."""
    if needs not in NEEDS:
        raise ValueError(f"needs must be one of {sorted(NEEDS)}, not {needs!r}")
    m = Measure(name, target, needs, tuple(params), description, bool(default))
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
    unknown = [v for v in picked if v not in REGISTRY and v != DEFAULT_WORD]
    if unknown:
        raise OptionError(f"--only: unknown measure(s) {', '.join(repr(u) for u in unknown)}; "
                          f"valid names: {', '.join(names())} (and '{DEFAULT_WORD}' for the "
                          f"measures run by default)")
    return list(dict.fromkeys(picked))


def kind_of(obj) -> str:
    from ..grid import PhaseGrid
    from ..structure import Structure, SurfaceBody
    if isinstance(obj, Structure):
        return "structure"
    if isinstance(obj, (PhaseGrid, SurfaceBody)):
        return "grid"
    return type(obj).__name__


def applicable(obj, *, optional: bool = False) -> list[str]:
    """The registered measures that can run on ``obj``: the default selection, or with
    ``optional`` also the opt-in ones."""
    kind = kind_of(obj)
    ok = [n for n in names() if optional or REGISTRY[n].default]
    if kind == "structure":
        return ok
    return [n for n in ok if REGISTRY[n].needs == "grid"]


#: The word in ``--only`` that stands for the default selection (``--only default,scattering``).
DEFAULT_WORD = "default"


def select(only, obj) -> list[str]:
    """The measures to run on ``obj``: the default selection when ``only`` is None, else
    the names of ``only`` (a comma-separated text or a list) with ``default`` standing for
    the default selection that applies to ``obj``."""
    if only is None:
        return applicable(obj)
    text = only if isinstance(only, str) else ",".join(only)
    out = []
    for n in parse_only(text):
        out.extend(applicable(obj) if n == DEFAULT_WORD else [n])
    return list(dict.fromkeys(out))


def check_inputs(selected, obj, source=None) -> None:
    """Raise :class:`OptionError` when a selected measure cannot use ``obj``.

    Measures that need prisms run on a Structure only; grid measures run on a PhaseGrid
    directly, or on prisms or a closed body through their rasterized phase grid.
    """
    ok = set(applicable(obj, optional=True))
    bad = [n for n in selected if n not in ok]
    if bad:
        need = sorted({REGISTRY[n].needs for n in bad})
        what = " and ".join(NEEDS[k] for k in need)
        raise OptionError(f"measure(s) {', '.join(bad)} need {what}, but the input is a "
                          f"{type(obj).__name__}", path=source)


def run(selected, obj, settings: dict | None = None, progress=None):
    """Run the selected measures on ``obj`` and return the :class:`~sheetview.pipeline.Context`
    holding their results (``ctx.results``), the shared phase grid and stage timings."""
    from ..pipeline import Context
    check_inputs(selected, obj, getattr(obj, "source", None))
    ctx = Context(obj, settings, progress)
    for name in selected:
        ctx.result(name)
    return ctx


_P = "..pipeline"
register("stacking", f"{_P}:run_stacking", "structure",
         ("angle_tol", "gap_tol", "overlap", "tilt_limit", "edge_tol"),
         "layers, stacks, stacking numbers, per-stack table, tilted contacts")
register("order", f"{_P}:run_order", "structure", ("local_radius", "frame"),
         "Q tensor, order parameter S, director, local and wall order, pole figure")
register("phases", f"{_P}:run_phases", "grid", ("voxel", "max_memory", "pore_split"),
         "volume fractions of solid, interlayer, gel pores (and size classes), outside")
register("surface", f"{_P}:run_surface", "grid", ("density",),
         "interface areas, S/V per pore class, specific surface, Minkowski functionals")
register("pores", f"{_P}:run_pores", "grid", ("intrusion",),
         "pore sizes: local thickness and simulated intrusion, d10/d50/d90")
register("chords", f"{_P}:run_chords", "grid", ("lines", "seed"),
         "chord lengths of solid and pore along isotropic random lines (exact geometry, or "
         "through the voxel grid for volumes), Cauchy 4V/S")
register("correlation", f"{_P}:run_correlation", "grid", ("s2_block", "s2_rmax"),
         "two-point correlation S2(r) of the solid and its slope at the origin")
register("scattering", f"{_P}:run_scattering", "grid", ("max_memory",),
         "predicted SANS curve I(q) (neutrons, C-S-H in H2O): slopes, Porod, Guinier, "
         "invariant, Bragg peaks (opt-in; `sheetview scatter` for other contrasts)",
         default=False)
register("relaxation", f"{_P}:run_relaxation", "grid", (),
         "predicted NMR T2 distribution per pore class, fast exchange (opt-in; "
         "`sheetview relax` for other parameters)", default=False)
