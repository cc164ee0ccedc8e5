"""The main job: run the named measures on one input, sharing what they have in common.

A :class:`Context` holds the input (a Structure, a SurfaceBody or a PhaseGrid), the
settings, and the intermediate results every grid measure shares: the stacking graph (for
the interlayer class) and the phase grid. Each measure of the registry
(:mod:`sheetview.measures`) is a function of the context that returns a result object with
``to_dict()``. :func:`summary` flattens the results into the documented summary keys.
"""
from __future__ import annotations

import math
import time
from dataclasses import dataclass, field
from functools import cached_property

import numpy as np

from .errors import OptionError
from .grid import GEL, INTERLAYER, OUTSIDE, SOLID, PhaseGrid
from .structure import Structure, SurfaceBody

#: Settings of a measure run and their defaults (lengths nm, angles degrees).
DEFAULTS = {
    # stacking graph
    "angle_tol": 5.0, "gap_tol": 0.35, "overlap": 0.1, "tilt_limit": 25.0, "edge_tol": 0.05,
    # orientation
    "local_radius": 5.0, "frame": "z",
    # phase grid
    "voxel": None, "max_memory": None,
    # surfaces: C-S-H solid density, Muller, Scrivener, Gajewicz & McDonald,
    # J. Phys. Chem. C 117 (2013) 403
    "density": 2.73,
    # pore sizes: thresholds (nm) splitting the gel pores by local thickness
    "pore_split": (), "intrusion": False,
    # chords
    "lines": 20000, "seed": 0,
    # two-point correlation: largest block (voxels per side) it is computed on
    "s2_block": 160, "s2_rmax": None,
}

#: Names of the pore classes made by ``pore_split`` (smallest first). After Muller et al.
#: (2013) and the review of Valori, McDonald & Scrivener, Cem. Concr. Res. 49 (2013) 65
#: (from memory): gel pores a few nm, interhydrate pores up to some tens of nm, capillary
#: pores beyond.
SPLIT_NAMES = ("gel", "interhydrate", "capillary", "coarse")


def _progress_noop(stage: str, done: bool, seconds: float | None = None) -> None:
    pass


class Context:
    """One measure run: the input, the settings, and shared intermediate results."""

    def __init__(self, obj, settings: dict | None = None, progress=None):
        self.obj = obj
        s = dict(DEFAULTS)
        s.update({k: v for k, v in (settings or {}).items() if v is not None})
        self.settings = s
        self.results: dict = {}
        self.timings: dict = {}
        self.progress = progress or _progress_noop

    # -------------------------------------------------------------- helpers
    def stage(self, name, fn, /, *args, **kw):
        """Run ``fn`` as a named stage, timing it and telling the progress callback."""
        self.progress(name, False)
        t0 = time.perf_counter()
        out = fn(*args, **kw)
        dt = time.perf_counter() - t0
        self.timings[name] = self.timings.get(name, 0.0) + dt
        self.progress(name, True, dt)
        return out

    @property
    def structure(self) -> Structure | None:
        return self.obj if isinstance(self.obj, Structure) else None

    @property
    def domain(self):
        return getattr(self.obj, "domain", None)

    def result(self, name: str):
        """The result of measure ``name``, computed once."""
        if name not in self.results:
            from .measures import REGISTRY
            m = REGISTRY[name]
            self.results[name] = m.function(self)
        return self.results[name]

    def stacking_kwargs(self) -> dict:
        return {k: self.settings[k] for k in ("angle_tol", "gap_tol", "overlap", "tilt_limit",
                                              "edge_tol")}

    @cached_property
    def base_grid(self) -> PhaseGrid:
        """The phase grid before any split of the gel pores by size: the input itself, or
        the classified rasterization of prisms (solid, interlayer from the stacking graph,
        gel) or of a closed body."""
        from .grid import rasterize_body
        from .measures.phases import classify
        s = self.settings
        if isinstance(self.obj, PhaseGrid):
            return self.obj
        if isinstance(self.obj, Structure):
            graph = self.result("stacking").graph
            return self.stage("phase grid", classify, self.obj, s["voxel"], graph=graph,
                              max_memory=s["max_memory"])
        if isinstance(self.obj, SurfaceBody):
            return self.stage("phase grid", rasterize_body, self.obj, s["voxel"],
                              max_memory=s["max_memory"])
        raise OptionError(f"cannot measure a {type(self.obj).__name__}")

    @cached_property
    def grid(self) -> PhaseGrid:
        """The phase grid the measures use; refused (OptionError) when it holds no solid
        or no pore voxel, since there is then nothing to measure."""
        g = self._split_grid()
        counts = np.bincount(g.labels.ravel(), minlength=256)
        inside = int(counts.sum() - counts[OUTSIDE])
        if counts[SOLID] == 0:
            raise OptionError("the phase grid has no solid voxel: the structure is all void at "
                              "this voxel size (nothing to measure; try a smaller --voxel)",
                              path=getattr(self.obj, "source", None))
        if counts[SOLID] == inside:
            raise OptionError("the phase grid is all solid: no pore space to measure",
                              path=getattr(self.obj, "source", None))
        return g

    def _split_grid(self) -> PhaseGrid:
        """The phase grid the measures use: :attr:`base_grid`, its gel pores split into
        size classes by local thickness where ``pore_split`` thresholds are set."""
        from .measures.phases import split_pores_by_size
        if not self.settings["pore_split"]:
            return self.base_grid
        return self.stage("pore classes", split_pores_by_size, self.base_grid,
                          self.settings["pore_split"], self.pore_thickness, names=SPLIT_NAMES)

    @cached_property
    def pore_codes(self) -> tuple:
        """Codes of the non-interlayer pore space: gel and any size classes split from it."""
        return tuple(sorted(c for c in self.grid.names if c not in (OUTSIDE, SOLID, INTERLAYER)))

    @cached_property
    def pore_thickness(self) -> np.ndarray:
        """Local thickness (nm; NaN off the pores) of the gel pore space of the base grid:
        from exact distances to the prisms or mesh and the domain wall when the input is
        a Structure or SurfaceBody (:func:`~sheetview.measures.pores.exact_local_thickness`),
        else from the voxels (:func:`~sheetview.measures.pores.local_thickness`)."""
        from .measures.pores import exact_local_thickness, local_thickness
        g = self.base_grid
        codes = [c for c in g.names if c not in (OUTSIDE, SOLID, INTERLAYER)]
        if isinstance(self.obj, (Structure, SurfaceBody)):
            return self.stage("local thickness", exact_local_thickness, g, self.obj, codes)
        mask = np.isin(g.labels, codes)
        return self.stage("local thickness", local_thickness, mask, g.spacing,
                          periodic=g.periodic)


@dataclass
class Bundle:
    """Several results of one measure, with a few headline figures.

    ``to_dict()`` gives the headline figures and each part's ``to_dict()`` under its name.
    """

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


# ------------------------------------------------------------------ measure adapters
def run_stacking(ctx: Context):
    from .measures.stacking import stacking
    return ctx.stage("stacking", stacking, ctx.structure, **ctx.stacking_kwargs())


def run_order(ctx: Context):
    from .measures.orientation import orientation
    return ctx.stage("orientation", orientation, ctx.structure,
                     local_radius=ctx.settings["local_radius"], frame=ctx.settings["frame"])


def run_phases(ctx: Context):
    from .measures.phases import volume_fractions
    dom = ctx.domain
    exact = float(dom.volume) if dom is not None and not getattr(dom, "inferred", False) else None
    return ctx.stage("volume fractions", volume_fractions, ctx.grid, exact)


def run_surface(ctx: Context):
    from .measures.surface import interface_area, minkowski_functionals, surfaces
    g = ctx.grid
    base = ctx.stage("surfaces", surfaces, g, ctx.settings["density"])
    extra = [c for c in ctx.pore_codes if c != GEL]
    figures = {}
    if extra:
        # size classes split from the gel pores: their own interfaces and S/V
        counts = np.bincount(g.labels.ravel(), minlength=256)
        for c in extra:
            name = g.names[c]
            a = interface_area(g, SOLID, c)
            base.areas[f"solid-{name}"] = a
            base.volumes[name] = float(counts[c] * g.voxel_volume)
            base.s_over_v[name] = a / base.volumes[name] if base.volumes[name] > 0 else float("nan")
        base.areas["solid-gel"] = sum(base.areas[f"solid-{g.names[c]}"] for c in ctx.pore_codes)
    pore_area = base.areas.get("solid-interlayer", 0.0) + base.areas.get("solid-gel", 0.0)
    inside = float(np.count_nonzero(g.labels != OUTSIDE) * g.voxel_volume)
    figures["solid_void_area_nm2"] = pore_area
    figures["specific_surface_per_domain_volume_nm-1"] = pore_area / inside if inside else None
    solid = ctx.stage("Minkowski functionals", minkowski_functionals, g.labels == SOLID,
                      g.spacing, g.periodic)
    pores = ctx.stage("Minkowski functionals", minkowski_functionals,
                      np.isin(g.labels, ctx.pore_codes), g.spacing, g.periodic)
    return Bundle({"interfaces": base, "minkowski_solid": solid, "minkowski_gel": pores},
                  figures)


def run_pores(ctx: Context):
    from .measures.pores import default_reservoir, intrusion_diameter, size_distribution
    g = ctx.grid
    codes = ctx.pore_codes
    names = tuple(g.names[c] for c in codes)
    if not np.isin(g.labels, codes).any():
        return Bundle({"local_thickness": None, "intrusion": None},
                      notes=["no gel pore space: pore sizes undefined"])
    lt = ctx.pore_thickness
    lt_res = ctx.stage("pore size distribution", size_distribution, lt, voxel_size=g.spacing,
                       method="local_thickness", phases=names)
    parts = {"local_thickness": lt_res, "intrusion": None}
    notes = []
    if ctx.settings["intrusion"]:
        if g.periodic:
            notes.append("periodic box: no reservoir at the boundary, so no intrusion distribution")
        else:
            mask = ~np.isnan(lt)
            res = default_reservoir(mask, outside=g.labels == OUTSIDE)
            d = ctx.stage("intrusion", intrusion_diameter, mask, g.spacing, res)
            parts["intrusion"] = ctx.stage("pore size distribution", size_distribution, d,
                                           voxel_size=g.spacing, method="intrusion",
                                           phases=names)
    return Bundle(parts, notes=notes)


def run_chords(ctx: Context):
    from .measures.chords import exact_chords, voxel_chords
    s = ctx.settings
    g = ctx.grid
    exact = None
    notes = []
    if isinstance(ctx.obj, (Structure, SurfaceBody)):
        body = ctx.obj
        if isinstance(body, SurfaceBody) and getattr(body.domain, "periodic", False):
            notes.append("closed body in a periodic box: exact chords not available")
        else:
            exact = ctx.stage("exact chords", exact_chords, body, int(s["lines"]), s["seed"])
    solid = pore = None
    if exact is None:  # voxel rows only where no exact geometry is given (volumes)
        solid = ctx.stage("voxel chords", voxel_chords, g, (SOLID,), name="solid")
        pore = ctx.stage("voxel chords", voxel_chords, g, (INTERLAYER,) + ctx.pore_codes,
                         name="pore")
    figures = {}
    for ph, vox in (("solid", solid), ("pore", pore)):
        src = exact if exact is not None else vox
        figures[f"{ph}_mean_nm"] = _finite(src.mean(ph))
        figures[f"{ph}_mean_all_nm"] = _finite(src.mean(ph, include_cut=True))
    figures["source"] = ("exact isotropic random lines" if exact is not None
                         else "voxel rows (x, y, z)")
    # Cauchy: mean of all chords of a phase = 4 V / S, S its whole boundary (Santaló 1976)
    sur = ctx.results.get("surface")
    if sur is not None:
        a = sur.parts["interfaces"].areas
        vols = sur.parts["interfaces"].volumes
        vs = vols.get("solid", 0.0)
        vp = sum(v for k, v in vols.items() if k != "solid")
        a_sp = sur.figures["solid_void_area_nm2"]
        a_so = a.get("solid-outside", 0.0)
        from .measures.surface import interface_areas_with
        a_po = 0.0
        if not g.periodic:
            with_outside = ctx.stage("Cauchy figures", interface_areas_with, g, OUTSIDE)
            a_po = float(sum(with_outside[c] for c in (INTERLAYER,) + ctx.pore_codes))
        figures["cauchy_solid_4v_over_s_nm"] = _finite(4 * vs / (a_sp + a_so)) if a_sp + a_so else None
        figures["cauchy_pore_4v_over_s_nm"] = _finite(4 * vp / (a_sp + a_po)) if a_sp + a_po else None
    parts = {"exact": exact, "voxel_solid": solid, "voxel_pore": pore}
    return Bundle(parts, figures, notes)


def run_correlation(ctx: Context):
    from .measures.correlation import two_point_correlation
    g = ctx.grid
    n = int(ctx.settings["s2_block"])
    sub, note = central_block(g, n)
    rmax = ctx.settings["s2_rmax"]
    if rmax is None:
        rmax = 0.5 * float(min(np.asarray(sub.shape) * np.asarray(sub.spacing)))
    res = ctx.stage("two-point correlation", two_point_correlation, sub, (SOLID,), r_max=rmax)
    return Bundle({"s2_solid": res}, {"block_voxels": list(sub.shape)},
                  [note] if note else [])


def run_scattering(ctx: Context):
    """Predicted SANS curve of the base phase grid with the default contrast: neutrons,
    the C-S-H preset solid (Allen, Thomas & Jennings 2007) in H2O, interlayer water as
    pore fluid, outside as pore fluid (``sheetview scatter`` sets other contrasts)."""
    from .measures.scattering import (ScatteringMeasure, curve_features, phase_slds,
                                      scattering_curve)
    from .sld import PRESETS, preset_sld, sld
    g = ctx.base_grid
    solid = sld(*PRESETS["csh"], probe="neutron")
    slds = phase_slds(solid, preset_sld("h2o", "neutron"))
    res = ctx.stage("scattering curve", scattering_curve, g, slds,
                    max_memory=ctx.settings["max_memory"])
    phi = float(np.count_nonzero(g.labels == SOLID) / g.labels.size)
    feats = ctx.stage("scattering features", curve_features, res, phi)
    return ScatteringMeasure(res, feats, "neutron",
                             f"C-S-H {PRESETS['csh'][0]} at {PRESETS['csh'][1]} g/cm3", "h2o")


def run_relaxation(ctx: Context):
    """Predicted T2 distribution (fast exchange, Brownstein & Tarr 1979) of the base grid
    with the default surface relaxivity and bulk T2; gel pores as slits of their local
    thickness; the interlayer gap from the structure's repeat minus its median thickness
    (``sheetview relax`` sets other parameters)."""
    from .measures.relaxation import relaxation_spectrum
    width = None
    s = ctx.structure
    if s is not None and len(s):
        gap = float(s.spacing) - float(np.median(s.thickness))
        width = gap if gap > 0 else None
    return ctx.stage("T2 distribution", relaxation_spectrum, ctx.base_grid, ctx.pore_thickness,
                     interlayer_width=width)


def central_block(g: PhaseGrid, n: int):
    """The central block of at most ``n`` voxels per side (the grid itself if smaller)."""
    shape = np.asarray(g.shape)
    if np.all(shape <= n):
        return g, None
    m = np.minimum(shape, n)
    lo = (shape - m) // 2
    sl = tuple(slice(int(a), int(a + b)) for a, b in zip(lo, m))
    origin = np.asarray(g.origin) + lo * np.asarray(g.spacing)
    sub = PhaseGrid(np.ascontiguousarray(g.labels[sl]), g.spacing, tuple(origin), g.names,
                    periodic=False, metadata={}, source=g.source)
    return sub, (f"computed on the central {m[0]} x {m[1]} x {m[2]} voxel block "
                 f"({m[0] * g.spacing[0]:.3g} nm across) of the {shape[0]} x {shape[1]} x "
                 f"{shape[2]} grid")


def _finite(x):
    return float(x) if x is not None and math.isfinite(x) else None


# ---------------------------------------------------------------------- summary
def summary(ctx: Context) -> dict:
    """The documented headline keys of a measure run (see docs/cli.md, `measure`)."""
    r = ctx.results
    out = {}
    obj = ctx.obj
    out["n_prisms"] = len(obj) if isinstance(obj, Structure) else None
    if "grid" in ctx.__dict__:
        out["voxel_size_nm"] = float(np.prod(ctx.grid.spacing) ** (1 / 3))
        out["grid_shape"] = list(ctx.grid.shape)
    if "phases" in r:
        out["volume_fractions"] = dict(r["phases"].fractions)
    if "surface" in r:
        out["specific_surface_nm-1"] = r["surface"].figures["specific_surface_per_domain_volume_nm-1"]
        out["specific_surface_m2_per_g"] = _finite(
            r["surface"].parts["interfaces"].specific_surface_m2_per_g)
    if "chords" in r:
        f = r["chords"].figures
        out["chords"] = {k: f.get(k) for k in ("solid_mean_nm", "pore_mean_nm", "source")}
    if "pores" in r:
        lt = r["pores"].parts["local_thickness"]
        it = r["pores"].parts["intrusion"]
        out["pore_size"] = {
            "d10_nm": _finite(lt.d10) if lt else None, "d50_nm": _finite(lt.d50) if lt else None,
            "d90_nm": _finite(lt.d90) if lt else None,
            "intrusion_d50_nm": _finite(it.d50) if it else None}
    return out
