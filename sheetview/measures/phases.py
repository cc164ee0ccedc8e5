"""Phase classes of the voxel map: solid, interlayer space, gel pores, outside.

* **solid**: voxel centre inside a prism (:func:`sheetview.grid.rasterize`);
* **interlayer**: void inside the gap between the facing faces of a stacked pair of
  prisms, over the footprint where the two triangles overlap when projected on their
  common plane (exact geometry from the stacking graph, rasterized);
* **gel pore**: every other void voxel inside the domain;
* further pore classes split the gel pores by local thickness where the user sets
  thresholds (:func:`split_pores_by_size`);
* **outside**: voxel centre outside the domain.

The interlayer space of C-S-H is the water between the layers of one particle (about 1 nm
and less); gel pores are the spaces between particles (a few nm). The split here follows
that usage (common practice in the cement literature, e.g. Muller, Scrivener, Gajewicz &
McDonald, J. Phys. Chem. C 117 (2013) 403), applied to the geometry of the model.
"""
from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass

import numba
import numpy as np

from ..errors import OptionError
from ..grid import GEL, INTERLAYER, OUTSIDE, SOLID, PhaseGrid, rasterize
from ..threads import run_chunks
from ..material import Hydrate, MaterialSplit, interlayer_share
from ._result import Result
from .stacking import (StackingSettings, clip_polygon_buf, pair_frame, plane_basis,
                       stacking_graph)


#: Squared distance (nm^2) under which two vertices of a clipped polygon are one vertex.
_DUP2 = 1e-18


@numba.njit(cache=True)
def _dot(a0, a1, a2, b0, b1, b2):
    return a0 * b0 + a1 * b1 + a2 * b2


@numba.njit(cache=True, nogil=True)
def _paint_gaps(lo, hi, pairs, V, C, Nrm, T, periodic, L, org, sp, shape, labels):
    """Mark GEL voxels inside the gap of each stacked pair as INTERLAYER.

    For the pair (i, j) with mean normal m (oriented from i to j), a voxel centre p is in
    the gap when it lies above the top face of i, below the bottom face of j, and its
    projection on the common plane lies in the intersection polygon of the two projected
    triangles. Positions are taken relative to the centroid of i (minimum image in
    periodic boxes). Serial over the pairs ``lo <= p < hi`` (threads run ranges of pairs
    at once: every write sets a voxel to INTERLAYER, so the result does not depend on
    their order).
    """
    nx, ny, nz = shape[0], shape[1], shape[2]
    buf = np.empty((4, 12))
    ax = np.empty(3)
    ay = np.empty(3)
    bx = np.empty(3)
    by = np.empty(3)
    for p in range(lo, hi):
        i = pairs[p, 0]
        j = pairs[p, 1]
        m0, m1, m2, d0, d1, d2 = pair_frame(i, j, C, Nrm, L, periodic)
        h = _dot(m0, m1, m2, d0, d1, d2)
        if h < 0.0:
            m0, m1, m2, h = -m0, -m1, -m2, -h
        # normals of i and j oriented along m
        si = 1.0 if _dot(Nrm[i, 0], Nrm[i, 1], Nrm[i, 2], m0, m1, m2) >= 0.0 else -1.0
        sjm = 1.0 if _dot(Nrm[j, 0], Nrm[j, 1], Nrm[j, 2], m0, m1, m2) >= 0.0 else -1.0
        ni0, ni1, ni2 = si * Nrm[i, 0], si * Nrm[i, 1], si * Nrm[i, 2]
        nj0, nj1, nj2 = sjm * Nrm[j, 0], sjm * Nrm[j, 1], sjm * Nrm[j, 2]
        u0, u1, u2, v0, v1, v2 = plane_basis(m0, m1, m2)
        for k in range(3):
            x0 = V[i, k, 0] - C[i, 0]
            x1 = V[i, k, 1] - C[i, 1]
            x2 = V[i, k, 2] - C[i, 2]
            ax[k] = _dot(x0, x1, x2, u0, u1, u2)
            ay[k] = _dot(x0, x1, x2, v0, v1, v2)
            y0 = V[j, k, 0] - C[j, 0] + d0
            y1 = V[j, k, 1] - C[j, 1] + d1
            y2 = V[j, k, 2] - C[j, 2] + d2
            bx[k] = _dot(y0, y1, y2, u0, u1, u2)
            by[k] = _dot(y0, y1, y2, v0, v1, v2)
        for tri_x, tri_y in ((ax, ay), (bx, by)):
            a = 0.5 * ((tri_x[1] - tri_x[0]) * (tri_y[2] - tri_y[0])
                       - (tri_x[2] - tri_x[0]) * (tri_y[1] - tri_y[0]))
            if a < 0.0:
                tx = tri_x[1]
                tri_x[1] = tri_x[2]
                tri_x[2] = tx
                ty = tri_y[1]
                tri_y[1] = tri_y[2]
                tri_y[2] = ty
        npoly = clip_polygon_buf(ax, ay, bx, by, buf)
        if npoly < 3:
            continue
        px = buf[0]
        py = buf[1]
        # drop vertices repeating their predecessor: where the two triangles share an
        # edge (layers that are exact copies) the clipping leaves near-duplicates, and
        # an edge ~1e-16 nm long has a direction set by rounding that would cut the
        # polygon along a random line in the inside test below
        m = 0
        for k in range(npoly):
            if m > 0 and (px[k] - px[m - 1]) ** 2 + (py[k] - py[m - 1]) ** 2 <= _DUP2:
                continue
            px[m] = px[k]
            py[m] = py[k]
            m += 1
        while m > 1 and (px[m - 1] - px[0]) ** 2 + (py[m - 1] - py[0]) ** 2 <= _DUP2:
            m -= 1
        npoly = m
        if npoly < 3:
            continue
        # faces: top of i  {r : r.ni >= t_i/2}; bottom of j {r : (r - d).nj <= -t_j/2}
        ci = 0.5 * T[i]
        cj = _dot(d0, d1, d2, nj0, nj1, nj2) - 0.5 * T[j]
        # bounding box of the gap: polygon corners lifted to both faces
        lo0 = lo1 = lo2 = np.inf
        hi0 = hi1 = hi2 = -np.inf
        mi = _dot(m0, m1, m2, ni0, ni1, ni2)
        mj = _dot(m0, m1, m2, nj0, nj1, nj2)
        for k in range(npoly):
            base0 = px[k] * u0 + py[k] * v0
            base1 = px[k] * u1 + py[k] * v1
            base2 = px[k] * u2 + py[k] * v2
            zi = (ci - _dot(base0, base1, base2, ni0, ni1, ni2)) / mi
            zj = (cj - _dot(base0, base1, base2, nj0, nj1, nj2)) / mj
            for z in (zi, zj):
                q0 = base0 + z * m0
                q1 = base1 + z * m1
                q2 = base2 + z * m2
                lo0 = min(lo0, q0)
                lo1 = min(lo1, q1)
                lo2 = min(lo2, q2)
                hi0 = max(hi0, q0)
                hi1 = max(hi1, q1)
                hi2 = max(hi2, q2)
        # voxel index ranges (centres inside the box)
        i0 = int(math.ceil((C[i, 0] + lo0 - org[0]) / sp[0] - 0.5))
        i1 = int(math.floor((C[i, 0] + hi0 - org[0]) / sp[0] - 0.5))
        j0 = int(math.ceil((C[i, 1] + lo1 - org[1]) / sp[1] - 0.5))
        j1 = int(math.floor((C[i, 1] + hi1 - org[1]) / sp[1] - 0.5))
        k0 = int(math.ceil((C[i, 2] + lo2 - org[2]) / sp[2] - 0.5))
        k1 = int(math.floor((C[i, 2] + hi2 - org[2]) / sp[2] - 0.5))
        if not periodic:
            i0 = max(i0, 0)
            j0 = max(j0, 0)
            k0 = max(k0, 0)
            i1 = min(i1, nx - 1)
            j1 = min(j1, ny - 1)
            k1 = min(k1, nz - 1)
        for ii in range(i0, i1 + 1):
            r0 = org[0] + (ii + 0.5) * sp[0] - C[i, 0]
            wi = ii % nx
            for jj in range(j0, j1 + 1):
                r1 = org[1] + (jj + 0.5) * sp[1] - C[i, 1]
                wj = jj % ny
                for kk in range(k0, k1 + 1):
                    wk = kk % nz
                    if labels[wi, wj, wk] != GEL_CODE:
                        continue
                    r2 = org[2] + (kk + 0.5) * sp[2] - C[i, 2]
                    if _dot(r0, r1, r2, ni0, ni1, ni2) < ci:
                        continue
                    if _dot(r0, r1, r2, nj0, nj1, nj2) > cj:
                        continue
                    x = _dot(r0, r1, r2, u0, u1, u2)
                    y = _dot(r0, r1, r2, v0, v1, v2)
                    inside = True
                    for e in range(npoly):
                        e1 = e + 1 if e + 1 < npoly else 0
                        if ((px[e1] - px[e]) * (y - py[e])
                                - (py[e1] - py[e]) * (x - px[e])) < 0.0:
                            inside = False
                            break
                    if inside:
                        labels[wi, wj, wk] = INTERLAYER_CODE


GEL_CODE = np.uint8(GEL)
INTERLAYER_CODE = np.uint8(INTERLAYER)


def paint_interlayer(grid: PhaseGrid, structure, stacked_pairs: np.ndarray) -> None:
    """Relabel, in place, the GEL voxels of ``grid`` that lie in the gap of a stacked pair.

    ``stacked_pairs`` is the (E, 2) array of stacked neighbours of
    :func:`sheetview.measures.stacking.stacking_graph`. Positions in a periodic grid wrap.
    """
    pairs = np.ascontiguousarray(stacked_pairs, dtype=np.int64).reshape(-1, 2)
    if len(pairs) == 0:
        return
    dom = structure.domain
    periodic = bool(getattr(dom, "periodic", False))
    L = np.asarray(dom.lengths, dtype=np.float64) if periodic else np.ones(3)
    f64 = np.float64
    run_chunks(_paint_gaps, len(pairs), pairs,
               np.ascontiguousarray(structure.vertices, dtype=f64),
               np.ascontiguousarray(structure.centroids, dtype=f64),
               np.ascontiguousarray(structure.normals, dtype=f64),
               np.ascontiguousarray(structure.thickness, dtype=f64), periodic, L,
               np.asarray(grid.origin, dtype=f64), np.asarray(grid.spacing, dtype=f64),
               np.asarray(grid.shape, dtype=np.int64), grid.labels)


def classify(structure, voxel_size=None, *, graph=None, settings: StackingSettings | None = None,
             max_memory=None, out=None) -> PhaseGrid:
    """The phase map of a structure: solid, interlayer, gel pore and outside voxels.

    Parameters
    ----------
    structure : Structure
    voxel_size : float, optional
        Voxel edge in nm (default :func:`sheetview.grid.default_voxel_size`).
    graph : StackingGraph, optional
        A stacking graph already computed (else computed with ``settings``).
    settings : StackingSettings, optional
        Tolerances of the stacking graph (defaults as in :func:`stacking`).
    max_memory, out
        As in :func:`sheetview.grid.rasterize`.
    """
    grid = rasterize(structure, voxel_size, max_memory=max_memory, out=out)
    if graph is None:
        graph = stacking_graph(structure, settings)
    paint_interlayer(grid, structure, graph.stacked)
    return grid


@dataclass(repr=False)
class PhaseFractions(Result):
    """Volume fractions of the phase classes, and the water they hold.

    Attributes
    ----------
    fractions : dict name -> fraction of the domain volume (voxels inside the domain)
    volumes_nm3 : dict name -> volume in nm^3
    domain_volume_nm3 : volume of the domain voxels (nm^3): the reference volume
    domain_volume_exact_nm3 : the domain's exact volume, for comparison (None if unknown)
    void_fraction : fraction of the domain that is not solid
    interlayer_share_of_void : interlayer volume / void volume
    material : the layer / interlayer-water split of the material model
        (:class:`sheetview.material.MaterialSplit`)
    water : class -> {"mass_g", "fraction_of_water"}: structural water of the layers,
        interlayer water and the water of each gel-pore class (saturated)
    """

    fractions: dict
    volumes_nm3: dict
    domain_volume_nm3: float
    domain_volume_exact_nm3: float | None
    void_fraction: float
    interlayer_share_of_void: float | None
    material: MaterialSplit | None = None
    water: dict | None = None

    def to_dict(self) -> dict:
        d = {"reference": "domain", "fractions": dict(self.fractions),
             "volumes_nm3": dict(self.volumes_nm3),
             "domain_volume_nm3": self.domain_volume_nm3,
             "domain_volume_exact_nm3": self.domain_volume_exact_nm3,
             "void_fraction": self.void_fraction,
             "interlayer_share_of_void": self.interlayer_share_of_void}
        if self.material is not None:
            d["interlayer_share_of_csh_volume"] = self.material.interlayer_share
            d["water"] = self.water
            d["material"] = self.material.to_dict()
        return d

    def table(self) -> dict:
        names = list(self.fractions)
        return {"phase": names, "fraction_of_domain": [self.fractions[n] for n in names],
                "volume_nm3": [self.volumes_nm3[n] for n in names]}

    def headline(self) -> dict:
        """The summary's headline: fractions of the domain volume."""
        return {"volume_fractions": dict(self.fractions)}

    def tables(self) -> dict:
        return {"phase_fractions": self.table()}

    def basis(self) -> dict:
        return {"volume_fractions": "fractions of the domain volume (voxels inside the domain)"}

    def brief(self) -> str:
        fr = ", ".join(f"{k} {v:.4g}" for k, v in self.fractions.items())
        return f"of the domain: {fr}"


def volume_fractions(grid: PhaseGrid, domain_volume: float | None = None, *,
                     hydrate: Hydrate | None = None) -> PhaseFractions:
    """Volume fraction of each phase class relative to the domain (non-OUTSIDE voxels),
    and the water of each class from the material model.

    Every phase code present other than OUTSIDE is reported, plus zero entries for
    solid, interlayer and gel when absent. ``hydrate`` (default
    :class:`sheetview.material.Hydrate`, Allen, Thomas & Jennings 2007) splits the C-S-H
    into layers and interlayer water (:mod:`sheetview.material`); the gel-pore classes are
    taken as saturated with water of the same density.
    """
    counts = np.bincount(grid.labels.ravel(), minlength=256).astype(np.int64)
    inside = int(counts.sum() - counts[OUTSIDE])
    if inside == 0:
        raise OptionError("no voxel lies inside the domain: the domain is empty at this voxel size",
                          path=grid.source, param="voxel_size")
    vv = grid.voxel_volume
    codes = sorted({SOLID, INTERLAYER, GEL} | {int(c) for c in np.flatnonzero(counts)} - {OUTSIDE})
    fr, vol = {}, {}
    for c in codes:
        name = grid.names.get(c, f"phase_{c}")
        fr[name] = float(counts[c] / inside)
        vol[name] = float(counts[c] * vv)
    void = 1.0 - fr.get("solid", 0.0)
    inter = fr.get("interlayer", 0.0)
    split = (Hydrate() if hydrate is None else hydrate).split(interlayer_share(vol))
    return PhaseFractions(fr, vol, inside * vv, domain_volume, void,
                          inter / void if void > 0 else None, split, split.water(vol))


def split_pores_by_size(grid: PhaseGrid, thresholds, thickness: np.ndarray,
                        names=("gel", "interhydrate", "capillary", "coarse")) -> PhaseGrid:
    """Split the gel pore voxels into size classes by their local thickness.

    Parameters
    ----------
    grid : PhaseGrid
    thresholds : increasing diameters (nm); ``k`` thresholds make ``k + 1`` classes
    thickness : per-voxel local thickness (nm) of the gel pores (NaN elsewhere), e.g.
        :func:`sheetview.measures.pores.local_thickness`
    names : names of the classes, smallest first; the first keeps the GEL code, the others
        get codes 4, 5, ...

    Returns
    -------
    PhaseGrid
        A new grid (the input is unchanged) with the extra codes named in ``names``.
    """
    t = [float(x) for x in thresholds]
    if not t:
        return grid
    if any(not (math.isfinite(x) and x > 0) for x in t) or any(b <= a for a, b in zip(t, t[1:])):
        raise OptionError(f"pore size thresholds must be increasing positive numbers of nm, "
                          f"got {list(thresholds)}", param="pore_split")
    if len(t) >= len(names):
        raise OptionError(f"at most {len(names) - 1} pore size thresholds, got {len(t)}",
                          param="pore_split")
    labels = grid.labels.copy()
    gel = labels == GEL
    cls = np.searchsorted(np.asarray(t), np.where(gel, thickness, 0.0), side="right")
    for k in range(1, len(t) + 1):
        labels[gel & (cls == k)] = GEL + k
    new_names = dict(grid.names)
    new_names[GEL] = names[0]
    for k in range(1, len(t) + 1):
        new_names[GEL + k] = names[k]
    meta = dict(grid.metadata, pore_split_nm=t)
    return dataclasses.replace(grid, labels=labels, names=new_names, metadata=meta)
