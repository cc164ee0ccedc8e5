"""Proton NMR T2 relaxation spectra predicted from a phase grid (fast-exchange limit).

Each water-filled voxel relaxes at the rate of its pore in the fast-diffusion (fast
exchange) limit of Brownstein & Tarr,

.. math:: \\frac{1}{T_2} = \\frac{1}{T_{2,\\text{bulk}}} + \\rho_2 \\frac{S}{V}

(K. R. Brownstein, C. E. Tarr, Phys. Rev. A 19 (1979) 2446, doi:10.1103/PhysRevA.19.2446),
with the surface-to-volume ratio of the voxel's pore from a local size:

* interlayer voxels: slits of the gap width ``w``, ``S/V = 2/w``; ``w`` is given (for a
  prism structure, the repeat minus the sheet thickness) or measured as the local thickness
  of the interlayer phase;
* gel pore voxels: the local thickness ``d`` (Hildebrand & Rüegsegger 1997) read as a
  slit of width ``d`` (``2/d``, the default), a cylinder of diameter ``d`` (``4/d``) or a
  sphere of diameter ``d`` (``6/d``).

Every pore voxel contributes signal in proportion to its volume (uniform proton density in
interlayer and gel water: an assumption). Defaults: ``rho2 = 3.7e-3 nm/µs`` for white
cement paste (McDonald, Korb, Mitchell & Monteilhet, Phys. Rev. E 72 (2005) 011409; from
memory, low confidence: a default, not a validated value) and ``T2,bulk = 2.5 s`` (bulk
water about 2 to 3 s; from memory).
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from ..errors import OptionError
from ..grid import INTERLAYER, OUTSIDE, SOLID
from ._result import Result

#: Surface relaxivity (nm/µs), McDonald et al. 2005 (from memory, low confidence).
DEFAULT_RHO2_NM_PER_US = 3.7e-3
#: Bulk water T2 (s), from memory.
DEFAULT_T2_BULK_S = 2.5
#: S/V = SHAPE_FACTOR / d for a pore of local thickness (width or diameter) d.
SHAPE_FACTOR = {"slit": 2.0, "cylinder": 4.0, "sphere": 6.0}


@dataclass(repr=False)
class RelaxationResult(Result):
    """A predicted T2 distribution.

    Attributes
    ----------
    t2 : (n,) bin centres (geometric), seconds
    edges : (n + 1,) bin edges, seconds
    fraction : class name -> (n,) signal fraction per bin (fractions of all pore water;
        summed over classes and bins they give 1)
    class_fraction : class name -> signal fraction of the class
    class_t2_logmean : class name -> geometric mean T2 (s) of the class
    settings : rho2 (nm/µs), t2_bulk (s), shape, interlayer width source
    """

    t2: np.ndarray
    edges: np.ndarray
    fraction: dict
    class_fraction: dict
    class_t2_logmean: dict
    settings: dict
    notes: list = field(default_factory=list)

    @property
    def total(self) -> np.ndarray:
        return np.sum(list(self.fraction.values()), axis=0) if self.fraction else np.zeros_like(self.t2)

    def logmean(self) -> float:
        """Geometric mean T2 (s) of the whole distribution."""
        w = self.total
        return float(np.exp(np.sum(w * np.log(self.t2)) / w.sum())) if w.sum() > 0 else float("nan")

    def tables(self) -> dict:
        return {"t2_distribution": self.table()}

    def brief(self) -> str:
        fr = ", ".join(f"{k} {v:.3f}" for k, v in self.class_fraction.items())
        return f"fast exchange; log-mean T2 {self.logmean() * 1e3:.4g} ms; water: {fr}"

    def table(self) -> dict:
        d = {"t2_s": self.t2.tolist(), "t2_ms": (self.t2 * 1e3).tolist(),
             "fraction": self.total.tolist()}
        for k, v in self.fraction.items():
            d[f"fraction_{k}"] = v.tolist()
        return d

    def to_dict(self) -> dict:
        d = {"class_fraction": {k: float(v) for k, v in self.class_fraction.items()},
             "class_t2_logmean_ms": {k: (float(v) * 1e3 if math.isfinite(v) else None)
                                     for k, v in self.class_t2_logmean.items()},
             "t2_logmean_ms": self.logmean() * 1e3, "settings": dict(self.settings),
             "notes": list(self.notes)}
        d.update(self.table())
        return d


def t2_of_surface_ratio(s_over_v, rho2: float = DEFAULT_RHO2_NM_PER_US,
                        t2_bulk: float | None = DEFAULT_T2_BULK_S) -> np.ndarray:
    """T2 (s) of ``S/V`` (nm⁻¹): ``1/T2 = 1/T2,bulk + rho2 S/V`` with rho2 in nm/µs
    (``rho2 * 1e6`` nm/s); ``t2_bulk`` None or inf switches the bulk term off."""
    sv = np.asarray(s_over_v, dtype=float)
    rate = float(rho2) * 1e6 * sv
    if t2_bulk is not None and math.isfinite(t2_bulk):
        rate = rate + 1.0 / float(t2_bulk)
    with np.errstate(divide="ignore"):
        return 1.0 / rate


def relaxation_spectrum(grid, gel_thickness=None, *, interlayer_width: float | None = None,
                        rho2: float = DEFAULT_RHO2_NM_PER_US,
                        t2_bulk: float | None = DEFAULT_T2_BULK_S, shape: str = "slit",
                        bins=None, t2_range=(1e-6, 10.0), per_decade: int = 20
                        ) -> RelaxationResult:
    """Predicted T2 distribution of the water in the pores of ``grid``.

    Parameters
    ----------
    grid : PhaseGrid
    gel_thickness : (nx, ny, nz) array, optional
        Local thickness (nm) of the non-interlayer pore space (NaN elsewhere), e.g.
        ``Context.pore_thickness``; computed with
        :func:`sheetview.measures.pores.local_thickness` when None.
    interlayer_width : float, optional
        Gap width (nm) of the interlayer slits; None measures the local thickness of the
        interlayer phase.
    rho2 : float
        Surface relaxivity (nm/µs).
    t2_bulk : float or None
        Bulk T2 (s); None switches the bulk term off.
    shape : 'slit', 'cylinder' or 'sphere'
        Reading of the gel pores' local thickness d: S/V = 2/d, 4/d, 6/d.
    bins : array, optional
        T2 bin edges (s); default log-spaced over ``t2_range`` with ``per_decade`` bins.

    Returns
    -------
    RelaxationResult
    """
    key = str(shape).lower()
    if key not in SHAPE_FACTOR:
        raise OptionError(f"shape must be one of {sorted(SHAPE_FACTOR)}, got {shape!r}",
                          field="shape")
    rho2 = float(rho2)
    if not (rho2 > 0 and math.isfinite(rho2)):
        raise OptionError(f"rho2 must be a positive number (nm/us), got {rho2!r}", field="rho2")
    if t2_bulk is not None and not float(t2_bulk) > 0:
        raise OptionError(f"T2 bulk must be positive (s), got {t2_bulk!r}", field="t2_bulk")
    if bins is None:
        lo, hi = float(t2_range[0]), float(t2_range[1])
        if not 0 < lo < hi:
            raise OptionError(f"T2 range must satisfy 0 < min < max, got {t2_range!r}",
                              field="t2_range")
        edges = np.geomspace(lo, hi, int(round(per_decade * math.log10(hi / lo))) + 1)
    else:
        edges = np.asarray(bins, float)
        if edges.ndim != 1 or edges.size < 2 or np.any(np.diff(edges) <= 0) or edges[0] <= 0:
            raise OptionError("T2 bin edges must be positive and increasing", field="bins")
    labels = grid.labels
    names = grid.names
    vox = grid.voxel_volume
    pore_codes = [c for c in names if c not in (OUTSIDE, SOLID, INTERLAYER)]
    notes = []
    from .pores import local_thickness
    if gel_thickness is None:
        gmask = np.isin(labels, pore_codes)
        gel_thickness = local_thickness(gmask, grid.spacing, periodic=grid.periodic) \
            if gmask.any() else np.full(labels.shape, np.nan, np.float32)
    gel_thickness = np.asarray(gel_thickness)
    if gel_thickness.shape != labels.shape:
        raise OptionError(f"gel thickness map shape {gel_thickness.shape} differs from the "
                          f"grid {labels.shape}", field="gel_thickness")
    per_class = {}
    imask = labels == INTERLAYER
    if imask.any():
        if interlayer_width is not None:
            w = float(interlayer_width)
            if not (w > 0 and math.isfinite(w)):
                raise OptionError(f"interlayer width must be positive (nm), got "
                                  f"{interlayer_width!r}", field="interlayer_width")
            sv = np.full(int(imask.sum()), 2.0 / w)
            src = f"given: {w:g} nm"
        else:
            lt = local_thickness(imask, grid.spacing, periodic=grid.periodic)[imask]
            sv = 2.0 / lt.astype(float)
            src = "local thickness of the interlayer phase"
            notes.append("interlayer gap from the voxel local thickness: coarse where the "
                         "gap spans few voxels")
        per_class["interlayer"] = sv
    else:
        src = "no interlayer voxels"
    for c in pore_codes:
        m = labels == c
        if not m.any():
            continue
        d = gel_thickness[m].astype(float)
        bad = ~(d > 0)
        if bad.any():
            raise OptionError(f"{int(bad.sum())} {names.get(c, c)} voxels have no positive "
                              f"local thickness", field="gel_thickness")
        per_class[names.get(c, f"phase_{c}")] = SHAPE_FACTOR[key] / d
    total_n = sum(v.size for v in per_class.values())
    if total_n == 0:
        raise OptionError("the grid has no pore voxels (interlayer or gel): no water to relax",
                          path=grid.source)
    fraction, cfrac, clog = {}, {}, {}
    below = above = 0
    for name, sv in per_class.items():
        t2 = t2_of_surface_ratio(sv, rho2, t2_bulk)
        h, _ = np.histogram(t2, bins=edges)
        below += int((t2 < edges[0]).sum())
        above += int((t2 > edges[-1]).sum())
        fraction[name] = h / total_n
        cfrac[name] = sv.size / total_n
        clog[name] = float(np.exp(np.mean(np.log(t2))))
    if below or above:
        notes.append(f"{below} voxels below and {above} above the T2 bin range were left out "
                     f"of the histogram (class fractions count them)")
    settings = {"rho2_nm_per_us": rho2, "t2_bulk_s": None if t2_bulk is None else float(t2_bulk),
                "shape": key, "interlayer_width": src, "voxel_volume_nm3": vox}
    return RelaxationResult(np.sqrt(edges[:-1] * edges[1:]), edges, fraction, cfrac, clog,
                            settings, notes)


@dataclass
class T2Comparison:
    """A model T2 distribution against an experimental one, both normalised to unit area
    over ln T2."""

    t2: np.ndarray
    experiment: np.ndarray
    model: np.ndarray
    logmean_experiment_s: float
    logmean_model_s: float
    shift_decades: float
    overlap: float

    def table(self) -> dict:
        return {"t2_s": self.t2.tolist(), "experiment_density": self.experiment.tolist(),
                "model_density": self.model.tolist()}

    def to_dict(self) -> dict:
        return {"logmean_experiment_ms": self.logmean_experiment_s * 1e3,
                "logmean_model_ms": self.logmean_model_s * 1e3,
                "shift_decades": self.shift_decades, "overlap": self.overlap}


def compare_t2(res: RelaxationResult, t2_exp, amp_exp, *, source=None) -> T2Comparison:
    """Compare with an experimental T2 distribution (T2 in s, amplitudes per point).

    Both are read as densities over ln T2 normalised to unit area (trapezoid rule at the
    experimental points; the model's per-bin fractions divided by the bins' ln width and
    interpolated in ln T2). Reported: geometric mean T2 of each, the shift
    ``log10(model / experiment)`` in decades, and the overlap ``∫ min(p, q) d ln T2``
    (1 for identical distributions, 0 for disjoint ones).
    """
    t = np.asarray(t2_exp, float)
    a = np.asarray(amp_exp, float)
    x = np.log(t)
    za = np.trapezoid(a, x) if hasattr(np, "trapezoid") else np.trapz(a, x)
    if not za > 0:
        raise OptionError("the experimental T2 distribution has no positive area", path=source)
    p = a / za
    dens = res.total / np.diff(np.log(res.edges))
    m = np.interp(x, np.log(res.t2), dens, left=0.0, right=0.0)
    trap = np.trapezoid if hasattr(np, "trapezoid") else np.trapz
    zm = trap(m, x)
    notes_ok = zm > 0
    m = m / zm if notes_ok else m
    lm_e = float(np.exp(trap(p * x, x)))
    lm_m = res.logmean()
    ov = float(trap(np.minimum(p, m), x)) if notes_ok else 0.0
    return T2Comparison(t, p, m, lm_e, lm_m, float(np.log10(lm_m / lm_e)), ov)


def relaxation_measure(grid, *, thickness=None, interlayer_width=None) -> RelaxationResult:
    """The registry's ``relaxation`` measure: :func:`relaxation_spectrum` of the phase grid
    (each size class apart) with the default surface relaxivity and bulk T2, given the run's
    local thickness of the gel pores (``thickness``) and the interlayer gap of prisms
    (``interlayer_width``)."""
    return relaxation_spectrum(grid, thickness, interlayer_width=interlayer_width)
