"""Running measures on one input, sharing what they have in common.

A :class:`Run` holds the input (a Structure, a SurfaceBody or a PhaseGrid), the
:class:`~sheetview.app.settings.Settings`, and the intermediate results several measures
share, each computed once: the stacking graph (for the interlayer class), the phase grid
(one builder: :func:`phase_grid`), the local thickness of the pore space, the material
model. A measure of the registry is called with its subject and, by parameter name, the
settings and these shared inputs (:data:`SHARED`); the run only orders and caches, the
science is in the measure's own function.
"""
from __future__ import annotations

import inspect
import os
import sys
import time
from functools import cached_property

import numpy as np

from ..errors import OptionError
from ..grid import INTERLAYER, OUTSIDE, SOLID, PhaseGrid, rasterize_body
from ..particles import ParticleSet, rasterize_particles
from ..structure import Structure, SurfaceBody
from .registry import REGISTRY, check_inputs
from .settings import SPLIT_NAMES, Settings
from ..measures.phases import classify, split_pores_by_size
from ..measures.pores import exact_local_thickness, local_thickness
from ..measures.stacking import StackingSettings, stacking_graph

#: Inputs a measure function may ask for by parameter name, besides the settings.
SHARED = {
    "geometry": "the exact geometry: the Structure, SurfaceBody or ParticleSet (None for a voxel "
                "volume)",
    "structure": "the Structure (None for other inputs)",
    "grid": "the phase grid the grid measures use (size classes split when pore_split is set)",
    "base_grid": "the phase grid before any split of the gel pores",
    "graph": "the stacking graph (prisms only)",
    "thickness": "local thickness (nm) of the non-interlayer pore space of the base grid",
    "hydrate": "the material model (sheetview.material.Hydrate) of the settings",
    "domain_volume": "the domain's exact volume (nm^3; None when inferred or unknown)",
    "interlayer_width": "the interlayer gap of prisms: repeat - median thickness (None else)",
}


def _noop(stage: str, done: bool, seconds: float | None = None) -> None:
    pass


def _takes_fraction(callback) -> bool:
    if callback is None:
        return False
    try:
        params = inspect.signature(callback).parameters.values()
    except (TypeError, ValueError):
        return False
    return any(p.name == "fraction" or p.kind == p.VAR_KEYWORD for p in params)


#: The stage told (not timed) before a run whose kernels are not compiled yet.
COMPILING = "compiling kernels (first run only)"


def kernels_cold() -> bool:
    """True when numba's on-disk cache holds none of sheetview's compiled kernels (a first
    run after installing or after a change of the code): the run then spends most of its
    first minute compiling. Unknown (a numba without these internals): False."""
    try:
        from numba.core.registry import CPUDispatcher
    except ImportError:  # pragma: no cover
        return False
    seen = False
    for name, mod in list(sys.modules.items()):
        if not name.startswith("sheetview.") or mod is None:
            continue
        for v in list(vars(mod).values()):
            if isinstance(v, CPUDispatcher):
                try:
                    index = v._cache._cache_file._index_path
                except AttributeError:
                    continue
                seen = True
                if os.path.exists(index):
                    return False
    return seen


def phase_grid(obj, settings: Settings | None = None, *, graph=None,
               progress=None) -> PhaseGrid:
    """The classified phase grid of ``obj``: the input itself for a PhaseGrid, prisms
    rasterized (solid, interlayer from the stacking graph, gel pore, outside), a closed
    body rasterized by parity casting. The one builder used by ``measure``, the viewer,
    sections and comparisons."""
    s = settings if settings is not None else Settings()
    if isinstance(obj, PhaseGrid):
        return obj
    if isinstance(obj, Structure):
        if graph is None:
            graph = stacking_graph(obj, StackingSettings(**s.stacking_kwargs(),
                                                         spacing=obj.spacing))
        return classify(obj, s.voxel, graph=graph, max_memory=s.max_memory)
    if isinstance(obj, SurfaceBody):
        return rasterize_body(obj, s.voxel, max_memory=s.max_memory)
    if isinstance(obj, ParticleSet):
        return rasterize_particles(obj, s.voxel, max_memory=s.max_memory)
    raise OptionError(f"cannot build a phase grid of a {type(obj).__name__}")


class Run:
    """One measure run: the input, the settings, shared intermediate results.

    ``progress(stage, done, seconds=None)`` is told when each stage starts and ends; a
    callback that also takes ``fraction`` (``progress(stage, done, seconds=None,
    fraction=None)``) is told the progress within long stages as well (``done`` False,
    ``fraction`` in [0, 1]), by the measures that report it (a ``progress`` parameter).
    ``options``: measure name -> keyword arguments of its function beyond the settings
    (``{"water_walk": {"rho2_nm_per_us": 5e-3}}``), given after the settings and shared
    inputs (a command with parameters of its own, such as ``waterwalk``).
    """

    def __init__(self, obj, settings: Settings | None = None, progress=None, options=None):
        self.obj = obj
        self.settings = settings if settings is not None else Settings()
        self.results: dict = {}
        self.timings: dict = {}
        self.progress = progress or _noop
        self._fractions = _takes_fraction(progress)
        self.options = {k: dict(v) for k, v in (options or {}).items()}

    def within(self, stage: str):
        """``tell(fraction, message="")`` reporting progress within ``stage`` to the
        callback, or None when the callback does not take fractions."""
        if not self._fractions:
            return None

        def tell(fraction, message=""):
            self.progress(stage, False, None, fraction=float(min(1.0, max(0.0, fraction))))
        return tell

    def stage(self, name, fn, /, *args, **kw):
        """Run ``fn`` as a named stage, timing it and telling the progress callback."""
        self.progress(name, False)
        t0 = time.perf_counter()
        out = fn(*args, **kw)
        dt = time.perf_counter() - t0
        self.timings[name] = self.timings.get(name, 0.0) + dt
        self.progress(name, True, dt)
        return out

    # ------------------------------------------------------------------ inputs
    @property
    def structure(self) -> Structure | None:
        return self.obj if isinstance(self.obj, Structure) else None

    @property
    def geometry(self):
        return self.obj if isinstance(self.obj, (Structure, SurfaceBody, ParticleSet)) else None

    @property
    def domain(self):
        return getattr(self.obj, "domain", None)

    @property
    def domain_volume(self) -> float | None:
        dom = self.domain
        if dom is None or getattr(dom, "inferred", False):
            return None
        return float(dom.volume)

    @property
    def hydrate(self):
        return self.settings.hydrate

    @property
    def interlayer_width(self) -> float | None:
        s = self.structure
        if s is None or not len(s):
            return None
        gap = float(s.spacing) - float(np.median(s.thickness))
        return gap if gap > 0 else None

    @property
    def graph(self):
        if self.structure is None:
            return None
        return self.result("stacking").graph

    @cached_property
    def base_grid(self) -> PhaseGrid:
        """The phase grid before any split of the gel pores by size."""
        if isinstance(self.obj, PhaseGrid):
            return self.obj
        return self.stage("phase grid", phase_grid, self.obj, self.settings, graph=self.graph)

    @cached_property
    def grid(self) -> PhaseGrid:
        """The phase grid the measures use; refused (OptionError) when it holds no solid
        or no pore voxel, since there is then nothing to measure."""
        g = self._split_grid()
        counts = np.bincount(g.labels.ravel(), minlength=256)
        inside = int(counts.sum() - counts[OUTSIDE])
        src = getattr(self.obj, "source", None)
        if counts[SOLID] == 0:
            raise OptionError("the phase grid has no solid voxel: the structure is all void at "
                              "this voxel size (nothing to measure; try a smaller voxel)",
                              path=src, param="voxel")
        if counts[SOLID] == inside:
            raise OptionError("the phase grid is all solid: no pore space to measure", path=src)
        return g

    def _split_grid(self) -> PhaseGrid:
        if not self.settings.pore_split:
            return self.base_grid
        return self.stage("pore classes", split_pores_by_size, self.base_grid,
                          self.settings.pore_split, self.thickness, names=SPLIT_NAMES)

    @cached_property
    def thickness(self) -> np.ndarray:
        """Local thickness (nm; NaN off the pores) of the non-interlayer pore space of the
        base grid, by the ``pore_method`` setting: from the voxels
        (:func:`~sheetview.measures.pores.local_thickness`, ``centres`` or ``subvoxel``),
        or, with ``exact`` for prisms and meshes, from exact distances to the geometry and
        the domain wall (:func:`~sheetview.measures.pores.exact_local_thickness`; walls that
        are not geometry, such as the interlayer class, from the voxels)."""
        g = self.base_grid
        codes = [c for c in g.names if c not in (OUTSIDE, SOLID, INTERLAYER)]
        tell = self.within("local thickness")
        kw = {} if tell is None else {"progress": tell}
        method = self.settings.pore_method
        if method == "exact":
            if not isinstance(self.geometry, (Structure, SurfaceBody)):
                raise OptionError("pore_method 'exact' needs prisms or a mesh (exact geometry); "
                                  "use centres or subvoxel", param="pore_method",
                                  path=getattr(self.obj, "source", None))
            return self.stage("local thickness", exact_local_thickness, g, self.geometry,
                              codes, **kw)
        mask = np.isin(g.labels, codes)
        return self.stage("local thickness", local_thickness, mask, g.spacing,
                          periodic=g.periodic, method=method, **kw)

    def provides(self, name: str) -> bool:
        return name in SHARED or name in Settings.__dataclass_fields__

    def input(self, name: str):
        """A shared input or a setting, by name."""
        if name in SHARED:
            return getattr(self, name)
        return getattr(self.settings, name)

    # ----------------------------------------------------------------- measures
    def result(self, name: str):
        """The result of measure ``name``, computed once."""
        if name not in self.results:
            spec = REGISTRY[name]
            fn = spec.function
            subject = self.structure if spec.needs == "structure" else self.grid
            kw = {p: self.input(p) for p in spec.parameters() if self.provides(p)}
            kw = {k: v for k, v in kw.items() if v is not None}  # None: the function's default
            kw.update(self.options.get(name, {}))
            if "progress" in spec.parameters() and kw.get("progress") is None:
                tell = self.within(name)
                if tell is not None:
                    kw["progress"] = tell
            if spec.needs == "structure" and "spacing" in inspect.signature(fn).parameters:
                kw.setdefault("spacing", subject.spacing)
            self.results[name] = self.stage(name, fn, subject, **kw)
        return self.results[name]

    def run(self, selected) -> "Run":
        check_inputs(selected, self.obj, getattr(self.obj, "source", None))
        if self.progress is not _noop and kernels_cold():
            self.progress(COMPILING, False)
        for name in selected:
            self.result(name)
        return self
