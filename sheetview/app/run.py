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
import time
from functools import cached_property

import numpy as np

from ..errors import OptionError
from ..grid import INTERLAYER, OUTSIDE, SOLID, PhaseGrid, rasterize_body
from ..structure import Structure, SurfaceBody
from .registry import REGISTRY, check_inputs
from .settings import SPLIT_NAMES, Settings
from ..measures.phases import classify, split_pores_by_size
from ..measures.pores import local_thickness
from ..measures.stacking import StackingSettings, stacking_graph

#: Inputs a measure function may ask for by parameter name, besides the settings.
SHARED = {
    "geometry": "the exact geometry: the Structure or SurfaceBody (None for a voxel volume)",
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
    raise OptionError(f"cannot build a phase grid of a {type(obj).__name__}")


class Run:
    """One measure run: the input, the settings, shared intermediate results.

    ``progress(stage, done, seconds=None)`` is told when each stage starts and ends.
    """

    def __init__(self, obj, settings: Settings | None = None, progress=None):
        self.obj = obj
        self.settings = settings if settings is not None else Settings()
        self.results: dict = {}
        self.timings: dict = {}
        self.progress = progress or _noop

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
        return self.obj if isinstance(self.obj, (Structure, SurfaceBody)) else None

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
        base grid."""
        g = self.base_grid
        mask = np.isin(g.labels, [c for c in g.names if c not in (OUTSIDE, SOLID, INTERLAYER)])
        return self.stage("local thickness", local_thickness, mask, g.spacing,
                          periodic=g.periodic)

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
            if spec.needs == "structure" and "spacing" in inspect.signature(fn).parameters:
                kw.setdefault("spacing", subject.spacing)
            self.results[name] = self.stage(name, fn, subject, **kw)
        return self.results[name]

    def run(self, selected) -> "Run":
        check_inputs(selected, self.obj, getattr(self.obj, "source", None))
        for name in selected:
            self.result(name)
        return self
