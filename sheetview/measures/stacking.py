"""Stacking of sheets: layers, stacks, stacking numbers and tilted contacts.

Definitions (lengths in nm, angles in degrees; normals are sign-less, ``n`` and ``-n``
are the same orientation):

* Two prisms are **in-plane neighbours** (same layer) when their normals are parallel
  within ``angle_tol``, their centroids lie within ``gap_tol`` of their common mid-plane,
  and their triangles, projected on that plane, either overlap by at least ``overlap``
  of the smaller projected area or share an edge (collinear edges within ``edge_tol``
  over at least half the shorter edge).
* Two prisms are **stacked neighbours** when their normals are parallel within
  ``angle_tol``, their centroids are one repeat apart along the mean normal,
  ``|gap - spacing| <= gap_tol``, and their projected triangles overlap by at least
  ``overlap`` of the smaller projected area (exact convex clipping, Sutherland & Hodgman,
  Commun. ACM 17 (1974) 32, doi:10.1145/360767.360802).
* A **tilted contact** is a pair that passes the stacked test except for its angle, which
  lies in ``(angle_tol, tilt_limit]``: a defect site (a tilted layer opens a wedge pore).
* A **layer** is a connected patch of in-plane neighbours; a **stack** is a connected
  set of layers joined by stacked links. The **stacking number** of a prism is the
  number of prisms (one per layer) on the longest chain of stacked links through it,
  each link stepping one repeat up (or down) along the stack normal.

Periodic boxes are handled by the minimum image throughout (neighbour search, gaps,
unwrapped stack positions), so stacks that cross the box boundary stay whole.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field

import numba
import numpy as np

from ..errors import InputError, OptionError
from ._result import Result
from .cells import cell_list
from ..threads import run_chunks
from ..structure import Structure

#: Default tolerances. See docs/measures.md for the reasoning behind each.
DEFAULTS = {
    "angle_tol": 5.0,    # deg: a 10 deg tilt is well outside (defect, not stacked)
    "gap_tol": 0.35,     # nm: a quarter of the 1.4 nm repeat
    "overlap": 0.1,      # fraction of the smaller projected triangle area
    "tilt_limit": 25.0,  # deg: upper angle for a "tilted contact"
    "edge_tol": 0.05,    # nm: collinearity tolerance for shared in-plane edges
}

#: Number of caliper directions used for the largest in-plane diameter of a stack
#: (relative error at most 1 - cos(90 deg / N_CALIPER) = 0.1 % for 36).
N_CALIPER = 36

CODE_NONE, CODE_INPLANE, CODE_STACKED, CODE_TILTED = 0, 1, 2, 3


# ----------------------------------------------------------------------------- settings
@dataclass(frozen=True)
class StackingSettings:
    """Tolerances of the stacking graph (validated; see :data:`DEFAULTS`)."""

    angle_tol: float = DEFAULTS["angle_tol"]
    gap_tol: float = DEFAULTS["gap_tol"]
    overlap: float = DEFAULTS["overlap"]
    tilt_limit: float = DEFAULTS["tilt_limit"]
    edge_tol: float = DEFAULTS["edge_tol"]
    spacing: float = 1.4

    def __post_init__(self):
        def bad(opt, msg):
            raise OptionError(msg, param=opt)

        for name in ("angle_tol", "gap_tol", "overlap", "tilt_limit", "edge_tol", "spacing"):
            v = getattr(self, name)
            try:
                v = float(v)
            except (TypeError, ValueError):
                bad(name, f"must be a number, got {v!r}")
            if not math.isfinite(v):
                bad(name, f"must be finite, got {v!r}")
            object.__setattr__(self, name, v)
        if not 0 < self.angle_tol < 90:
            bad("angle_tol", f"angle tolerance must be in (0, 90) degrees, got {self.angle_tol}")
        if not self.angle_tol <= self.tilt_limit <= 90:
            bad("tilt_limit", f"tilt limit must be between the angle tolerance "
                              f"({self.angle_tol}) and 90 degrees, got {self.tilt_limit}")
        if not self.spacing > 0:
            bad("spacing", f"the interlayer repeat must be positive, got {self.spacing} nm")
        if not 0 < self.gap_tol < 0.5 * self.spacing:
            bad("gap_tol", f"gap tolerance must be in (0, spacing/2 = {0.5 * self.spacing:g}) nm "
                           f"so that in-plane and stacked neighbours stay apart, got {self.gap_tol}")
        if not 0 < self.overlap <= 1:
            bad("overlap", f"overlap fraction must be in (0, 1], got {self.overlap}")
        if not self.edge_tol > 0:
            bad("edge_tol", f"edge tolerance must be positive, got {self.edge_tol} nm")

    def to_dict(self) -> dict:
        return {k: getattr(self, k) for k in
                ("angle_tol", "gap_tol", "overlap", "tilt_limit", "edge_tol", "spacing")}


# ------------------------------------------------------------------- numba kernels
@numba.njit(cache=True)
def _shoelace(x, y, n):
    a = 0.0
    for k in range(n):
        k1 = k + 1 if k + 1 < n else 0
        a += x[k] * y[k1] - x[k1] * y[k]
    return 0.5 * a


@numba.njit(cache=True)
def _clip_area(ax, ay, bx, by):
    """Intersection area of two counter-clockwise 2D triangles (allocating wrapper)."""
    return _clip_area_buf(ax, ay, bx, by, np.empty((4, 12)))


@numba.njit(cache=True)
def _clip_area_buf(ax, ay, bx, by, buf):
    """Area of the intersection of two 2D triangles A and B, both counter-clockwise."""
    n = clip_polygon_buf(ax, ay, bx, by, buf)
    if n < 3:
        return 0.0
    return abs(_shoelace(buf[0], buf[1], n))


@numba.njit(cache=True)
def clip_polygon_buf(ax, ay, bx, by, buf):
    """Intersection polygon of two 2D triangles A and B, both counter-clockwise.

    Sutherland-Hodgman: B is clipped successively by the three edge half-planes of A
    (Sutherland & Hodgman, Commun. ACM 17 (1974) 32). The clipped polygon (at most six
    vertices, counter-clockwise) is left in ``buf[0, :n]``, ``buf[1, :n]``; returns ``n``
    (0 when the triangles do not overlap). ``buf`` is a (4, 12) scratch array.
    """
    px = buf[0]
    py = buf[1]
    qx = buf[2]
    qy = buf[3]
    for k in range(3):
        px[k] = bx[k]
        py[k] = by[k]
    n = 3
    for e in range(3):
        e1 = e + 1 if e < 2 else 0
        x1 = ax[e]
        y1 = ay[e]
        ex = ax[e1] - x1
        ey = ay[e1] - y1
        m = 0
        for k in range(n):
            k1 = k + 1 if k + 1 < n else 0
            cx = px[k]
            cy = py[k]
            nx = px[k1]
            ny = py[k1]
            sc = ex * (cy - y1) - ey * (cx - x1)
            sn = ex * (ny - y1) - ey * (nx - x1)
            if sc >= 0.0:
                qx[m] = cx
                qy[m] = cy
                m += 1
                if sn < 0.0:
                    t = sc / (sc - sn)
                    qx[m] = cx + t * (nx - cx)
                    qy[m] = cy + t * (ny - cy)
                    m += 1
            elif sn >= 0.0:
                t = sc / (sc - sn)
                qx[m] = cx + t * (nx - cx)
                qy[m] = cy + t * (ny - cy)
                m += 1
        if m < 3:
            return 0
        for k in range(m):
            px[k] = qx[k]
            py[k] = qy[k]
        n = m
    return n


@numba.njit(cache=True)
def _ccw(x, y):
    """Make a 2D triangle counter-clockwise in place; return its (positive) area."""
    a = _shoelace(x, y, np.int64(3))  # not a literal 3: one specialisation
    if a < 0.0:
        tx = x[1]
        ty = y[1]
        x[1] = x[2]
        y[1] = y[2]
        x[2] = tx
        y[2] = ty
        a = -a
    return a


@numba.njit(cache=True)
def triangle_intersection_area(a, b):
    """Intersection area of two 2D triangles ``a``, ``b`` (3, 2), any orientation."""
    ax = a[:, 0].copy()
    ay = a[:, 1].copy()
    bx = b[:, 0].copy()
    by = b[:, 1].copy()
    _ccw(ax, ay)
    _ccw(bx, by)
    return _clip_area(ax, ay, bx, by)


@numba.njit(cache=True)
def _shares_edge(ax, ay, bx, by, tol):
    """True when an edge of A and an edge of B are collinear within ``tol`` and overlap
    over at least half the shorter of the two."""
    for e in range(3):
        e1 = e + 1 if e < 2 else 0
        dx = ax[e1] - ax[e]
        dy = ay[e1] - ay[e]
        la = math.sqrt(dx * dx + dy * dy)
        if la == 0.0:
            continue
        dx /= la
        dy /= la
        for f in range(3):
            f1 = f + 1 if f < 2 else 0
            rx0 = bx[f] - ax[e]
            ry0 = by[f] - ay[e]
            rx1 = bx[f1] - ax[e]
            ry1 = by[f1] - ay[e]
            if abs(dx * ry0 - dy * rx0) > tol or abs(dx * ry1 - dy * rx1) > tol:
                continue
            t0 = dx * rx0 + dy * ry0
            t1 = dx * rx1 + dy * ry1
            lb = abs(t1 - t0)
            ov = min(la, max(t0, t1)) - max(0.0, min(t0, t1))
            if ov >= 0.5 * min(la, lb) and ov > 0.0:
                return True
    return False


@numba.njit(cache=True, nogil=True)
def _classify_pairs(lo, hi, pi, pj, V, C, Nrm, L, periodic, cos_tol, cos_tilt, gap_tol,
                    spacing, overlap, edge_tol, code, angle):
    """Classify the candidate pairs ``lo <= p < hi``: 0 none, 1 in-plane, 2 stacked,
    3 tilted contact (run over all pairs by :func:`sheetview.threads.run_chunks`).

    One set of scratch buffers per call (no allocation per pair).
    """
    buf = np.empty((4, 12))
    tri = np.empty((4, 3))
    for p in range(lo, hi):
        _classify_one(p, pi, pj, V, C, Nrm, L, periodic, cos_tol, cos_tilt, gap_tol,
                      spacing, overlap, edge_tol, code, angle, buf, tri)


@numba.njit(cache=True)
def _classify_one(p, pi, pj, V, C, Nrm, L, periodic, cos_tol, cos_tilt, gap_tol, spacing,
                  overlap, edge_tol, code, angle, buf, tri):
    i = pi[p]
    j = pj[p]
    kind, c, m0, m1, m2, d0, d1, d2 = _pair_kind(i, j, C, Nrm, L, periodic, cos_tol, cos_tilt,
                                                 gap_tol, spacing)
    code[p] = 0
    angle[p] = np.nan
    if kind == 0:
        return
    angle[p] = math.degrees(math.acos(min(c, 1.0)))
    code[p] = _pair_overlap(kind, i, j, V, C, m0, m1, m2, d0, d1, d2, overlap, edge_tol,
                            buf, tri)


@numba.njit(cache=True, inline="always")
def pair_frame(i, j, C, Nrm, L, periodic):
    """Frame of a pair of prisms: the mean unit normal ``m`` (``n_i + sign(n_i . n_j) n_j``,
    normalised) and the centroid offset ``d = C_j - C_i`` (minimum image when periodic)."""
    dn = Nrm[i, 0] * Nrm[j, 0] + Nrm[i, 1] * Nrm[j, 1] + Nrm[i, 2] * Nrm[j, 2]
    s = 1.0 if dn >= 0.0 else -1.0
    m0 = Nrm[i, 0] + s * Nrm[j, 0]
    m1 = Nrm[i, 1] + s * Nrm[j, 1]
    m2 = Nrm[i, 2] + s * Nrm[j, 2]
    mn = math.sqrt(m0 * m0 + m1 * m1 + m2 * m2)
    m0 /= mn
    m1 /= mn
    m2 /= mn
    d0 = C[j, 0] - C[i, 0]
    d1 = C[j, 1] - C[i, 1]
    d2 = C[j, 2] - C[i, 2]
    if periodic:
        d0 -= L[0] * np.round(d0 / L[0])
        d1 -= L[1] * np.round(d1 / L[1])
        d2 -= L[2] * np.round(d2 / L[2])
    return m0, m1, m2, d0, d1, d2


@numba.njit(cache=True, inline="always")
def _pair_kind(i, j, C, Nrm, L, periodic, cos_tol, cos_tilt, gap_tol, spacing):
    """Cheap tests of a pair (angle between normals, gap along the mean normal).

    Returns ``(kind, |cos|, m, d)``: kind 0 rejected, 1 in-plane, 2 stacked, 3 tilted
    candidate (the overlap test still to come), the mean unit normal ``m`` and the
    minimum-image centroid offset ``d = C_j - C_i``."""
    c = abs(Nrm[i, 0] * Nrm[j, 0] + Nrm[i, 1] * Nrm[j, 1] + Nrm[i, 2] * Nrm[j, 2])
    if c < cos_tilt:
        return 0, c, 0.0, 0.0, 0.0, 0.0, 0.0, 0.0
    m0, m1, m2, d0, d1, d2 = pair_frame(i, j, C, Nrm, L, periodic)
    gap = abs(m0 * d0 + m1 * d1 + m2 * d2)
    parallel = c >= cos_tol
    if parallel and gap <= gap_tol:
        kind = 1
    elif abs(gap - spacing) <= gap_tol:
        kind = 2 if parallel else 3
    else:
        kind = 0
    return kind, c, m0, m1, m2, d0, d1, d2


@numba.njit(cache=True)
def _pair_overlap(kind, i, j, V, C, m0, m1, m2, d0, d1, d2, overlap, edge_tol, buf, tri):
    """Overlap test of a pair that passed :func:`_pair_kind`: returns ``kind`` when the
    projected triangles overlap by at least ``overlap`` of the smaller one (or, in-plane,
    share an edge), else 0."""
    # in-plane basis (u, v) of the common plane
    u0, u1, u2, v0, v1, v2 = plane_basis(m0, m1, m2)
    ax = tri[0]
    ay = tri[1]
    bx = tri[2]
    by = tri[3]
    for k in range(3):
        x0 = V[i, k, 0] - C[i, 0]
        x1 = V[i, k, 1] - C[i, 1]
        x2 = V[i, k, 2] - C[i, 2]
        ax[k] = x0 * u0 + x1 * u1 + x2 * u2
        ay[k] = x0 * v0 + x1 * v1 + x2 * v2
        y0 = V[j, k, 0] - C[j, 0] + d0
        y1 = V[j, k, 1] - C[j, 1] + d1
        y2 = V[j, k, 2] - C[j, 2] + d2
        bx[k] = y0 * u0 + y1 * u1 + y2 * u2
        by[k] = y0 * v0 + y1 * v1 + y2 * v2
    area_a = _ccw(ax, ay)
    area_b = _ccw(bx, by)
    inter = _clip_area_buf(ax, ay, bx, by, buf)
    if inter >= overlap * min(area_a, area_b) and inter > 0.0:
        return kind
    if kind == 1 and _shares_edge(ax, ay, bx, by, edge_tol):
        return 1
    return 0


# ------------------------------------------------------------------ cell list
#: The 13 "forward" neighbour offsets of the half shell (the cell itself is the 14th):
#: every unordered pair of adjacent cells is visited once, from its lower cell.
_HALF_SHELL = np.array([(dx, dy, dz) for dx in (-1, 0, 1) for dy in (-1, 0, 1)
                        for dz in (-1, 0, 1) if (dx, dy, dz) > (0, 0, 0)], dtype=np.int64)


@numba.njit(cache=True, inline="always")
def _neighbour_cell(cx, cy, cz, off, ncell, periodic, L, shift):
    """Index of the cell at offset ``off`` from (cx, cy, cz), or -1 outside a closed box;
    ``shift`` receives the image shift to add to that cell's points (periodic)."""
    g = 0
    for a in range(3):
        c = (cx, cy, cz)[a] + off[a]
        shift[a] = 0.0
        if c < 0:
            if not periodic:
                return -1
            c += ncell[a]
            shift[a] = -L[a]
        elif c >= ncell[a]:
            if not periodic:
                return -1
            c -= ncell[a]
            shift[a] = L[a]
        g = g * ncell[a] + c
    return g


@numba.njit(cache=True, inline="always")
def _axis_may_overlap(kind, i, j, V, C, Rad, Area, c, m0, m1, m2, d0, d1, d2, gd, lat2,
                      overlap, edge_tol):
    """Exact reject test on one separating axis: ``e``, the direction from centroid i
    to centroid j within the common plane.

    The projected intersection lies in the overlap (length ``w``) of the two triangles'
    extents along ``e`` and is at most ``2 min(R_i, R_j)`` across, so its area is at most
    ``2 w min(R)``; the projected triangle areas are ``A cos(theta/2)`` with
    ``cos(theta/2) = sqrt((1 + |n_i . n_j|) / 2)``. A stacked or tilted pair is rejected
    when that bound is below the required overlap; an in-plane pair when the extents are
    more than ``edge_tol`` apart (it could then share no edge either). Returns False
    only when :func:`_pair_overlap` would reject the pair; margins cover rounding.
    """
    e0 = d0 - gd * m0
    e1 = d1 - gd * m1
    e2 = d2 - gd * m2
    em = e0 * m0 + e1 * m1 + e2 * m2  # re-orthogonalise against rounding
    e0 -= em * m0
    e1 -= em * m1
    e2 -= em * m2
    lat = math.sqrt(e0 * e0 + e1 * e1 + e2 * e2)
    if lat < 1e-9:  # centroids (nearly) on one normal: no usable axis
        return True
    e0 /= lat
    e1 /= lat
    e2 /= lat
    de = d0 * e0 + d1 * e1 + d2 * e2
    amin = np.inf
    amax = -np.inf
    bmin = np.inf
    bmax = -np.inf
    for k in range(3):
        ta = ((V[i, k, 0] - C[i, 0]) * e0 + (V[i, k, 1] - C[i, 1]) * e1
              + (V[i, k, 2] - C[i, 2]) * e2)
        tb = ((V[j, k, 0] - C[j, 0]) * e0 + (V[j, k, 1] - C[j, 1]) * e1
              + (V[j, k, 2] - C[j, 2]) * e2) + de
        amin = min(amin, ta)
        amax = max(amax, ta)
        bmin = min(bmin, tb)
        bmax = max(bmax, tb)
    w = min(amax, bmax) - max(amin, bmin)
    if kind == 1:
        return w >= -(edge_tol * (1.0 + 1e-9) + 1e-12)
    need = overlap * min(Area[i], Area[j]) * math.sqrt(0.5 * (1.0 + min(c, 1.0)))
    return 2.0 * w * min(Rad[i], Rad[j]) >= need * (1.0 - 1e-9) - 1e-300


@numba.njit(cache=True, nogil=True)
def _cell_pairs(c0, c1, P, start, cells, ncell, radius, periodic, L, chunk_bounds, offsets, mode,
                classify, order, V, C, Nrm, Rad, Area, cos_tol, cos_tilt, gap_tol, spacing, overlap, edge_tol,
                n_cand, n_kept, out_i, out_j, out_code, out_angle):
    """Cell-list pair search over points ``P`` sorted by cell (cells at least ``radius``
    wide, at least 3 per periodic axis), half-shell enumeration, minimum image.

    ``mode`` 0: count, per chunk of cells, the pairs within ``radius`` (``n_cand``) and
    those passing the cheap tests of :func:`_pair_kind` (``n_kept``). ``mode`` 1: redo
    the search and fill, from ``offsets[chunk]`` on, the kept pairs (original indices
    ``i < j``), their code after the overlap test (0 when it fails) and angle (deg).
    Pairs are classified with the lower original index first, exactly as
    :func:`_classify_pairs` does. ``V, C, Nrm`` are in sorted order. With ``classify``
    False every pair within ``radius`` is kept (plain neighbour search). ``Rad`` is
    each prism's largest centroid-to-corner distance of its mid-plane triangle and
    ``Area`` its area (exact pretests before the overlap test, see
    :func:`_axis_may_overlap`). Serial over the chunks ``c0 <= ch < c1`` (run over all
    chunks by :func:`sheetview.threads.run_chunks`; each chunk writes its own outputs).
    """
    r2 = radius * radius
    for ch in range(c0, c1):
        shift = np.zeros(3)
        buf = np.empty((4, 12))
        tri = np.empty((4, 3))
        nc = 0
        nk = 0
        w = offsets[ch] if mode == 1 else 0
        for q in range(chunk_bounds[ch], chunk_bounds[ch + 1]):
            c = cells[q]
            cz = c % ncell[2]
            cy = (c // ncell[2]) % ncell[1]
            cx = c // (ncell[1] * ncell[2])
            for o in range(14):
                if o == 0:
                    g = c
                    shift[0] = 0.0
                    shift[1] = 0.0
                    shift[2] = 0.0
                else:
                    g = _neighbour_cell(cx, cy, cz, _HALF_SHELL[o - 1], ncell, periodic, L,
                                        shift)
                    if g < 0:
                        continue
                j0 = start[g]
                j1 = start[g + 1]
                if j0 == j1:
                    continue
                for a in range(start[c], start[c + 1]):
                    px = P[a, 0] - shift[0]
                    py = P[a, 1] - shift[1]
                    pz = P[a, 2] - shift[2]
                    for b in range(a + 1 if o == 0 else j0, j1):
                        e0 = P[b, 0] - px
                        e1 = P[b, 1] - py
                        e2 = P[b, 2] - pz
                        if e0 * e0 + e1 * e1 + e2 * e2 > r2:
                            continue
                        nc += 1
                        if order[a] < order[b]:
                            i = a
                            j = b
                        else:
                            i = b
                            j = a
                        if not classify:
                            if mode == 1:
                                out_i[w] = order[i]
                                out_j[w] = order[j]
                                w += 1
                            nk += 1
                            continue
                        kind, cs, m0, m1, m2, d0, d1, d2 = _pair_kind(
                            i, j, C, Nrm, L, periodic, cos_tol, cos_tilt, gap_tol, spacing)
                        if kind == 0:
                            continue
                        # lateral pretest: the projected triangles lie in discs of radius
                        # R about their projected centroids, so they can neither overlap
                        # nor share an edge (within edge_tol) when farther apart laterally
                        gd = m0 * d0 + m1 * d1 + m2 * d2
                        lat2 = d0 * d0 + d1 * d1 + d2 * d2 - gd * gd
                        reach = Rad[i] + Rad[j] + edge_tol
                        if lat2 > reach * reach * (1.0 + 1e-6) + 1e-12:
                            continue
                        if not _axis_may_overlap(
                                kind, i, j, V, C, Rad, Area, cs, m0, m1, m2, d0, d1, d2, gd,
                                lat2, overlap, edge_tol):
                            continue
                        if mode == 1:
                            out_i[w] = order[i]
                            out_j[w] = order[j]
                            out_angle[w] = math.degrees(math.acos(min(cs, 1.0)))
                            out_code[w] = _pair_overlap(kind, i, j, V, C, m0, m1, m2, d0, d1,
                                                        d2, overlap, edge_tol, buf, tri)
                            w += 1
                        nk += 1
        n_cand[ch] = nc
        n_kept[ch] = nk


def _cell_list(centroids, radius, domain):
    """Points in cells at least ``radius`` wide (:func:`sheetview.measures.cells.cell_list`).

    Returns ``(P, order, start, cells, ncell, periodic, L)``; ``None`` when a periodic axis
    would have fewer than 3 cells (the half shell would then meet a cell twice).
    """
    cl = cell_list(centroids, radius, domain, sparse=2.0, min_periodic=3)
    if cl is None:
        return None
    return cl.P, cl.order, cl.start, cl.cells, cl.ncell, cl.periodic, cl.L


def _chunks(n_items, per=64, most=1 << 14):
    """Chunk bounds over ``n_items`` (independent of the thread count, so that outputs
    come in the same order whatever the number of threads)."""
    k = max(1, min(most, n_items // per))
    return np.linspace(0, n_items, k + 1).astype(np.int64)


def _fused_graph(structure, settings, radius):
    """Candidate search and classification in one cell-list pass (see
    :func:`_cell_pairs`); returns ``(pi, pj, code, angle, n_candidates)`` for the pairs
    that passed the cheap tests, or None when the cell list does not apply."""
    cl = _cell_list(structure.centroids, radius, structure.domain)
    if cl is None:
        return None
    P, order, start, cells, ncell, periodic, L = cl
    C = np.ascontiguousarray(np.asarray(structure.centroids, dtype=np.float64)[order])
    V = np.ascontiguousarray(np.asarray(structure.vertices, dtype=np.float64)[order])
    Nrm = np.ascontiguousarray(np.asarray(structure.normals, dtype=np.float64)[order])
    Rad = np.sqrt(((V - C[:, None, :]) ** 2).sum(axis=2).max(axis=1))
    Area = 0.5 * np.linalg.norm(np.cross(V[:, 1] - V[:, 0], V[:, 2] - V[:, 0]), axis=1)
    bounds = _chunks(len(cells))
    k = len(bounds) - 1
    n_cand = np.zeros(k, np.int64)
    n_kept = np.zeros(k, np.int64)
    args = (math.cos(math.radians(settings.angle_tol)), math.cos(math.radians(settings.tilt_limit)),
            settings.gap_tol, settings.spacing, settings.overlap, settings.edge_tol)
    zi = np.zeros(0, np.int64)
    run_chunks(_cell_pairs, k, P, start, cells, ncell, float(radius), periodic, L, bounds, zi, 0, True, order,
               V, C, Nrm, Rad, Area, *args, n_cand, n_kept, zi, zi, np.zeros(0, np.int8), np.zeros(0))
    offsets = np.zeros(k + 1, np.int64)
    np.cumsum(n_kept, out=offsets[1:])
    m = int(offsets[-1])
    pi = np.empty(m, np.int64)
    pj = np.empty(m, np.int64)
    code = np.empty(m, np.int8)
    angle = np.empty(m, np.float64)
    run_chunks(_cell_pairs, k, P, start, cells, ncell, float(radius), periodic, L, bounds, offsets, 1, True,
               order, V, C, Nrm, Rad, Area, *args, n_cand, n_kept, pi, pj, code, angle)
    return pi, pj, code, angle, int(n_cand.sum())


@numba.njit(cache=True)
def plane_basis(m0, m1, m2):
    """Orthonormal in-plane basis (u, v) of the plane with unit normal m, u x v = m."""
    a0 = abs(m0)
    a1 = abs(m1)
    a2 = abs(m2)
    if a0 <= a1 and a0 <= a2:
        u0, u1, u2 = 0.0, m2, -m1
    elif a1 <= a2:
        u0, u1, u2 = -m2, 0.0, m0
    else:
        u0, u1, u2 = m1, -m0, 0.0
    un = math.sqrt(u0 * u0 + u1 * u1 + u2 * u2)
    u0 /= un
    u1 /= un
    u2 /= un
    v0 = m1 * u2 - m2 * u1
    v1 = m2 * u0 - m0 * u2
    v2 = m0 * u1 - m1 * u0
    return u0, u1, u2, v0, v1, v2


@numba.njit(cache=True)
def _csr(n, a, b):
    """Undirected CSR adjacency from edge lists a, b."""
    deg = np.zeros(n + 1, np.int64)
    for k in range(a.shape[0]):
        deg[a[k] + 1] += 1
        deg[b[k] + 1] += 1
    for k in range(n):
        deg[k + 1] += deg[k]
    fill = deg[:-1].copy()
    idx = np.empty(2 * a.shape[0], np.int64)
    for k in range(a.shape[0]):
        idx[fill[a[k]]] = b[k]
        fill[a[k]] += 1
        idx[fill[b[k]]] = a[k]
        fill[b[k]] += 1
    return deg, idx


@numba.njit(cache=True)
def _orient_unwrap(n, indptr, indices, Nrm, C, L, periodic):
    """Breadth-first pass over the stack graph: component labels, a consistent sign for
    every normal (sigma_j = sigma_i sign(n_i . n_j)) and unwrapped centroids
    (U_j = U_i + minimum_image(C_j - C_i))."""
    lab = -np.ones(n, np.int64)
    sig = np.ones(n)
    U = C.copy()
    queue = np.empty(n, np.int64)
    k = 0
    for r in range(n):
        if lab[r] >= 0:
            continue
        lab[r] = k
        head = 0
        tail = 1
        queue[0] = r
        while head < tail:
            i = queue[head]
            head += 1
            for q in range(indptr[i], indptr[i + 1]):
                j = indices[q]
                if lab[j] >= 0:
                    continue
                lab[j] = k
                dn = Nrm[i, 0] * Nrm[j, 0] + Nrm[i, 1] * Nrm[j, 1] + Nrm[i, 2] * Nrm[j, 2]
                sig[j] = sig[i] if dn >= 0.0 else -sig[i]
                for a in range(3):
                    d = C[j, a] - C[i, a]
                    if periodic:
                        d -= L[a] * np.round(d / L[a])
                    U[j, a] = U[i, a] + d
                queue[tail] = j
                tail += 1
        k += 1
    return lab, k, sig, U


@numba.njit(cache=True)
def _longest_chains(n, src, dst):
    """Longest path (in nodes) through each node of a directed graph src -> dst.

    Kahn's topological order (Kahn, Commun. ACM 5 (1962) 558) with the usual dynamic
    programme: down[j] = max(down[i] + 1) over edges i -> j, then up[i] likewise in
    reverse order; the chain through i has down[i] + up[i] - 1 nodes. Nodes on a cycle
    (only possible for a column wrapping all the way round a periodic box) get -1.
    """
    outp = np.zeros(n + 1, np.int64)
    indeg = np.zeros(n, np.int64)
    for k in range(src.shape[0]):
        outp[src[k] + 1] += 1
        indeg[dst[k]] += 1
    for k in range(n):
        outp[k + 1] += outp[k]
    fill = outp[:-1].copy()
    out = np.empty(src.shape[0], np.int64)
    for k in range(src.shape[0]):
        out[fill[src[k]]] = dst[k]
        fill[src[k]] += 1
    order = np.empty(n, np.int64)
    tail = 0
    for i in range(n):
        if indeg[i] == 0:
            order[tail] = i
            tail += 1
    head = 0
    down = np.ones(n, np.int64)
    while head < tail:
        i = order[head]
        head += 1
        for q in range(outp[i], outp[i + 1]):
            j = out[q]
            if down[i] + 1 > down[j]:
                down[j] = down[i] + 1
            indeg[j] -= 1
            if indeg[j] == 0:
                order[tail] = j
                tail += 1
    up = np.ones(n, np.int64)
    for t in range(tail - 1, -1, -1):
        i = order[t]
        for q in range(outp[i], outp[i + 1]):
            j = out[q]
            if up[j] + 1 > up[i]:
                up[i] = up[j] + 1
    res = down + up - 1
    done = np.zeros(n, np.bool_)
    for t in range(tail):
        done[order[t]] = True
    for i in range(n):
        if not done[i]:
            res[i] = -1
    return res


@numba.njit(cache=True)
def _calipers(starts, ends, X, Y, ndir):
    """Largest width over ``ndir`` directions of the 2D points of each group."""
    K = starts.shape[0]
    out = np.zeros(K)
    cs = np.empty(ndir)
    sn = np.empty(ndir)
    for a in range(ndir):
        cs[a] = math.cos(math.pi * a / ndir)
        sn[a] = math.sin(math.pi * a / ndir)
    lo = np.empty(ndir)
    hi = np.empty(ndir)
    for g in range(K):
        for a in range(ndir):
            lo[a] = np.inf
            hi[a] = -np.inf
        for q in range(starts[g], ends[g]):
            for a in range(ndir):
                t = X[q] * cs[a] + Y[q] * sn[a]
                if t < lo[a]:
                    lo[a] = t
                if t > hi[a]:
                    hi[a] = t
        best = 0.0
        for a in range(ndir):
            if hi[a] - lo[a] > best:
                best = hi[a] - lo[a]
        out[g] = best
    return out


# ------------------------------------------------------------------------- helpers
def _box_lengths(domain):
    periodic = bool(getattr(domain, "periodic", False))
    L = np.asarray(domain.lengths, dtype=np.float64) if periodic else np.ones(3)
    return periodic, L


def candidate_radius(structure, settings: StackingSettings) -> float:
    """Search radius for candidate pairs.

    Two triangles with longest edges ``l_i, l_j`` can only touch in projection when their
    centroids are within ``2/3 (l_i + l_j)`` in the plane (a centroid is at most 2/3 of a
    median, and a median is shorter than the longest edge, from a vertex). Stacked pairs
    are in addition at most ``spacing + gap_tol`` apart along the normal.
    """
    lmax = float(structure.edge_lengths.max())
    lat = 4.0 / 3.0 * lmax
    return 1.001 * math.hypot(lat, settings.spacing + settings.gap_tol)


def candidate_pairs(centroids, radius, domain):
    """All centroid pairs closer than ``radius`` (minimum image in periodic boxes), as two
    int64 arrays ``i < j``.

    A numba cell list (cells at least ``radius`` wide, half-shell enumeration so that
    each pair is met once, parallel over cells with a count-then-fill pass); a periodic
    box with fewer than 3 cells along an axis falls back to :class:`scipy.spatial.cKDTree`.
    Pairs come in a fixed order (by cell), whatever the number of threads.
    """
    c = np.asarray(centroids, dtype=np.float64).reshape(-1, 3)
    if len(c) < 2:
        e = np.zeros(0, np.int64)
        return e, e
    cl = _cell_list(c, radius, domain)
    if cl is None:
        return _candidate_pairs_kdtree(c, radius, domain)
    P, order, start, cells, ncell, periodic, L = cl
    bounds = _chunks(len(cells))
    k = len(bounds) - 1
    n_cand = np.zeros(k, np.int64)
    n_kept = np.zeros(k, np.int64)
    z = np.zeros((0, 3))
    zi = np.zeros(0, np.int64)
    rest = (z, z, np.zeros(0), np.zeros(0), 1.0, 0.0, 0.0, 1.0, 1.0, 1.0)
    run_chunks(_cell_pairs, k, P, start, cells, ncell, float(radius), periodic, L, bounds, zi, 0, False, order,
               np.zeros((0, 3, 3)), *rest, n_cand, n_kept, zi, zi, np.zeros(0, np.int8),
               np.zeros(0))
    offsets = np.zeros(k + 1, np.int64)
    np.cumsum(n_kept, out=offsets[1:])
    pi = np.empty(int(offsets[-1]), np.int64)
    pj = np.empty(int(offsets[-1]), np.int64)
    run_chunks(_cell_pairs, k, P, start, cells, ncell, float(radius), periodic, L, bounds, offsets, 1, False,
               order, np.zeros((0, 3, 3)), *rest, n_cand, n_kept, pi, pj, np.zeros(0, np.int8),
               np.zeros(0))
    return pi, pj


def _candidate_pairs_kdtree(centroids, radius, domain):
    """Reference search: :meth:`scipy.spatial.cKDTree.query_pairs` (ndarray output)."""
    from scipy.spatial import cKDTree  # heavy library, imported when used (the fallback)
    c = np.asarray(centroids, dtype=np.float64)
    if len(c) < 2:
        e = np.zeros(0, np.int64)
        return e, e
    periodic, L = _box_lengths(domain)
    if periodic:
        lo = np.asarray(domain.min)
        w = np.mod(c - lo, L)
        w[w >= L] = 0.0
        tree = cKDTree(w, boxsize=L, balanced_tree=False, compact_nodes=False)
    else:
        tree = cKDTree(np.array(c), balanced_tree=False, compact_nodes=False)
    pairs = tree.query_pairs(radius, output_type="ndarray").astype(np.int64, copy=False)
    return np.ascontiguousarray(pairs[:, 0]), np.ascontiguousarray(pairs[:, 1])


@dataclass
class StackingGraph:
    """Classified neighbour pairs of a structure.

    Attributes
    ----------
    inplane, stacked, tilted : (E, 2) int64 arrays of prism index pairs
    tilted_angle : (E_t,) float array, the angle (deg) of each tilted contact
    n_candidates : number of candidate pairs examined
    radius : candidate search radius (nm)
    """

    inplane: np.ndarray
    stacked: np.ndarray
    tilted: np.ndarray
    tilted_angle: np.ndarray
    n_candidates: int
    radius: float


def check_structure(structure):
    if not isinstance(structure, Structure):
        kind = type(structure).__name__
        raise OptionError(f"stacking and orientation measures need prisms (a Structure), "
                          f"got a {kind}; convert or read a prism table or sheet mesh instead",
                          path=getattr(structure, "source", None))
    if len(structure):
        bad = ~np.all(np.isfinite(structure.normals), axis=1)
        if bad.any():
            i = int(np.flatnonzero(bad)[0])
            raise InputError(f"prism row {i + 1}: degenerate triangle (no normal; "
                             f"{int(bad.sum())} row(s) affected)", path=structure.source)


def stacking_graph(structure, settings: StackingSettings | None = None) -> StackingGraph:
    """Find and classify neighbour pairs (in-plane, stacked, tilted contact).

    Candidates are the centroid pairs within :func:`candidate_radius`, found by a cell
    list; each is classified in the same parallel numba pass (no candidate list is
    stored) from the angle between normals, the gap along the mean normal and the exact
    overlap of the triangles projected on the common plane (Sutherland-Hodgman
    clipping). Links come in a fixed order whatever the number of threads.
    """
    check_structure(structure)
    if settings is None:
        settings = StackingSettings(spacing=structure.spacing)
    empty = np.zeros((0, 2), np.int64)
    if len(structure) < 2:
        return StackingGraph(empty, empty, empty, np.zeros(0), 0, 0.0)
    radius = candidate_radius(structure, settings)
    fused = _fused_graph(structure, settings, radius)
    if fused is not None:
        pi, pj, code, angle, n_cand = fused
    else:
        C = np.ascontiguousarray(structure.centroids, dtype=np.float64)
        pi, pj = _candidate_pairs_kdtree(C, radius, structure.domain)
        n_cand = int(pi.shape[0])
        periodic, L = _box_lengths(structure.domain)
        code = np.empty(pi.shape[0], np.int8)
        angle = np.empty(pi.shape[0], np.float64)
        run_chunks(_classify_pairs, len(pi), pi, pj,
                   np.ascontiguousarray(structure.vertices, dtype=np.float64), C,
                   np.ascontiguousarray(structure.normals, dtype=np.float64), L, periodic,
                   math.cos(math.radians(settings.angle_tol)),
                   math.cos(math.radians(settings.tilt_limit)),
                   float(settings.gap_tol), float(settings.spacing), float(settings.overlap),
                   float(settings.edge_tol), code, angle)

    def pick(c):
        k = np.flatnonzero(code == c)
        return np.stack([pi[k], pj[k]], axis=1), k

    inplane, _ = pick(CODE_INPLANE)
    stacked, _ = pick(CODE_STACKED)
    tilted, kt = pick(CODE_TILTED)
    return StackingGraph(inplane, stacked, tilted, angle[kt], n_cand, radius)


# -------------------------------------------------------------------------- results
def _hist_dict(values, weights=None, normalise=False):
    if len(values) == 0:
        return {}
    values = np.asarray(values, dtype=np.int64)
    kmax = int(values.max())
    h = np.bincount(values, weights=weights, minlength=kmax + 1)
    if normalise:
        tot = h.sum()
        h = h / tot if tot > 0 else h
    out = {}
    for k in range(1, kmax + 1):
        if h[k] != 0:
            out[str(k)] = float(h[k]) if (weights is not None or normalise) else int(h[k])
    return out


@dataclass(repr=False)
class StackingResult(Result):
    """Layers, stacks and stacking numbers of a structure.

    Per-prism arrays (length ``n_prisms``): ``layer``, ``stack``, ``stacking_number``
    (layers in the longest column through the prism). Per-stack arrays (length
    ``n_stacks``): see :meth:`stack_table`. Histograms map the stacking number (as a
    string) to prism counts (``histogram``), volume fractions (``histogram_volume``)
    and stack counts by largest column (``histogram_stacks``).
    """

    settings: dict
    n_prisms: int
    layer: np.ndarray
    stack: np.ndarray
    stacking_number: np.ndarray
    volumes: np.ndarray
    n_layers: int
    n_stacks: int
    graph: StackingGraph
    stacks: dict
    notes: list = field(default_factory=list)

    # -- summaries
    @property
    def mean(self) -> float:
        """Number-weighted mean stacking number over prisms."""
        return float(self.stacking_number.mean()) if self.n_prisms else float("nan")

    @property
    def mean_volume(self) -> float:
        """Volume-weighted mean stacking number."""
        w = self.volumes
        return float((w * self.stacking_number).sum() / w.sum()) if self.n_prisms else float("nan")

    @property
    def mean_stack(self) -> float:
        """Mean over stacks of each stack's largest column."""
        col = self.stacks["column"]
        return float(col.mean()) if len(col) else float("nan")

    @property
    def histogram(self) -> dict:
        return _hist_dict(self.stacking_number)

    @property
    def histogram_volume(self) -> dict:
        return _hist_dict(self.stacking_number, self.volumes, normalise=True)

    @property
    def histogram_stacks(self) -> dict:
        return _hist_dict(self.stacks["column"])

    def tilted_summary(self, bin_deg: float = 1.0) -> dict:
        """Tilted contacts: prism-pair count, distinct layer pairs and angle histogram."""
        g = self.graph
        s = self.settings
        lo = s["angle_tol"]
        hi = s["tilt_limit"]
        nb = max(1, int(math.ceil((hi - lo) / bin_deg)))
        edges = lo + bin_deg * np.arange(nb + 1)
        counts, _ = np.histogram(g.tilted_angle, bins=edges)
        layer_pairs = []
        if len(g.tilted):
            la = self.layer[g.tilted[:, 0]]
            lb = self.layer[g.tilted[:, 1]]
            key = np.stack([np.minimum(la, lb), np.maximum(la, lb)], axis=1)
            uniq, inv, cnt = np.unique(key, axis=0, return_inverse=True, return_counts=True)
            inv = inv.reshape(-1)
            mean_angle = np.bincount(inv, weights=g.tilted_angle) / cnt
            for (a, b), c, m in zip(uniq, cnt, mean_angle):
                layer_pairs.append({"layers": [int(a), int(b)], "pairs": int(c),
                                    "mean_angle": float(m)})
        return {"pairs": int(len(g.tilted)), "layer_pairs": len(layer_pairs),
                "mean_angle": float(g.tilted_angle.mean()) if len(g.tilted) else None,
                "angle_bins": edges.tolist(), "angle_counts": counts.tolist(),
                "contacts": layer_pairs}

    def to_dict(self) -> dict:
        st = self.stacks
        return {
            "n_prisms": self.n_prisms,
            "n_layers": self.n_layers,
            "n_stacks": self.n_stacks,
            "mean": self.mean,
            "mean_volume": self.mean_volume,
            "mean_stack": self.mean_stack,
            "max": int(self.stacking_number.max()) if self.n_prisms else None,
            "histogram": self.histogram,
            "histogram_volume": self.histogram_volume,
            "histogram_stacks": self.histogram_stacks,
            "links": {"in_plane": int(len(self.graph.inplane)),
                      "stacked": int(len(self.graph.stacked)),
                      "candidates": self.graph.n_candidates,
                      "search_radius": self.graph.radius},
            "tilted_contacts": self.tilted_summary(),
            "stacks": {"mean_lateral_diameter": _mean(st["lateral_diameter"]),
                       "mean_disc_diameter": _mean(st["disc_diameter"]),
                       "mean_thickness": _mean(st["thickness"]),
                       "mean_aspect_ratio": _mean(st["aspect_ratio"])},
            "settings": dict(self.settings),
            "notes": list(self.notes),
        }

    def table(self) -> dict:
        """Per-prism columns: prism (0-based row), layer, stack, stacking_number, volume."""
        return {"prism": np.arange(self.n_prisms), "layer": self.layer, "stack": self.stack,
                "stacking_number": self.stacking_number, "volume": self.volumes}

    def tables(self) -> dict:
        """CSV tables: per prism (``prisms``), per stack (``stacks``), per tilted prism pair
        (``tilted_contacts``)."""
        g = self.graph
        t = g.tilted
        empty = np.zeros(0, np.int64)
        return {"prisms": self.table(), "stacks": self.stack_table(),
                "tilted_contacts": {"prism_a": t[:, 0], "prism_b": t[:, 1],
                                    "angle_deg": g.tilted_angle,
                                    "layer_a": self.layer[t[:, 0]] if len(t) else empty,
                                    "layer_b": self.layer[t[:, 1]] if len(t) else empty}}

    def basis(self) -> dict:
        return {"stacking.mean": "mean stacking number (layers in the prism's stack column) "
                                 "over prisms; mean_volume weights by prism volume, mean_stack "
                                 "over stacks"}

    def brief(self) -> str:
        if not self.n_prisms:
            return "no prisms"
        return (f"{self.n_layers} layers in {self.n_stacks} stacks, mean stacking number "
                f"{self.mean:.3f} (prisms), {self.mean_volume:.3f} (volume)")

    def stack_table(self) -> dict:
        """Per-stack columns (see :func:`stacking`)."""
        st = self.stacks
        cols = {"stack": np.arange(self.n_stacks), "prisms": st["prisms"], "layers": st["layers"],
                "column": st["column"]}
        for a, ax in enumerate("xyz"):
            cols[f"normal_{ax}"] = st["normal"][:, a]
        for k in ("lateral_diameter", "disc_diameter", "thickness", "aspect_ratio"):
            cols[k] = st[k]
        for a, ax in enumerate("xyz"):
            cols[f"centroid_{ax}"] = st["centroid"][:, a]
        cols["wall_distance"] = st["wall_distance"]
        cols["wall_angle"] = st["wall_angle"]
        return cols


def _mean(a):
    a = np.asarray(a, dtype=float)
    a = a[np.isfinite(a)]
    return float(a.mean()) if len(a) else None


def _group_bounds(labels, k):
    order = np.argsort(labels, kind="stable")
    counts = np.bincount(labels, minlength=k)
    ends = np.cumsum(counts)
    starts = ends - counts
    return order, starts, ends


def _canonical_sign(v):
    """Flip each row so that its largest-magnitude component is positive."""
    idx = np.argmax(np.abs(v), axis=1)
    s = np.sign(v[np.arange(len(v)), idx])
    s[s == 0] = 1.0
    return v * s[:, None]


def stacking(structure, *, angle_tol: float = DEFAULTS["angle_tol"],
             gap_tol: float = DEFAULTS["gap_tol"], overlap: float = DEFAULTS["overlap"],
             tilt_limit: float = DEFAULTS["tilt_limit"], edge_tol: float = DEFAULTS["edge_tol"],
             spacing: float | None = None) -> StackingResult:
    """Layers, stacks and stacking numbers of the prisms of ``structure``.

    Parameters
    ----------
    structure : Structure
    angle_tol : float
        Largest angle (deg) between sign-less normals of stacked or in-plane neighbours.
    gap_tol : float
        Tolerance (nm) on the gap along the mean normal: ``|gap - spacing| <= gap_tol``
        for stacked pairs, ``gap <= gap_tol`` for in-plane pairs.
    overlap : float
        Least overlap of the projected triangles, as a fraction of the smaller one.
    tilt_limit : float
        Pairs stacked but for an angle in ``(angle_tol, tilt_limit]`` are tilted contacts.
    edge_tol : float
        Collinearity tolerance (nm) for in-plane neighbours sharing an edge.
    spacing : float, optional
        Interlayer repeat (nm); default the structure's ``spacing``.

    Returns
    -------
    StackingResult
        Per-prism ``layer``, ``stack``, ``stacking_number``; per stack (``stacks``):
        ``prisms``, ``layers``, ``column`` (largest stacking number), ``normal``
        (principal axis of the volume-weighted Q tensor), ``lateral_diameter`` (largest
        in-plane caliper width of the projected corners), ``disc_diameter``
        (``sqrt(4 A / pi)`` with ``A`` the projected prism area per layer), ``thickness``
        (``column * spacing``), ``aspect_ratio`` (``disc_diameter / thickness``),
        ``centroid`` (volume-weighted, wrapped into a periodic box), ``wall_distance``
        and ``wall_angle`` (deg between the stack normal and the inward wall normal at
        the centroid; NaN in a periodic box).

    Notes
    -----
    The stacking number of prism i is the number of nodes on the longest directed path
    through i in the graph of stacked links, each link oriented "up" along the
    consistently signed mean normal; it is computed exactly by dynamic programming on a
    topological order.
    """
    check_structure(structure)
    settings = StackingSettings(angle_tol, gap_tol, overlap, tilt_limit, edge_tol,
                                structure.spacing if spacing is None else spacing)
    n = len(structure)
    notes = []
    dom = structure.domain
    if getattr(dom, "inferred", False):
        notes.append("no domain in the input: the padded bounding box is used for wall "
                     "distances and angles")
    if getattr(dom, "periodic", False):
        notes.append("periodic box: neighbours use the minimum image; the box has no walls, "
                     "so wall distances are infinite and wall angles undefined (NaN)")
    graph = stacking_graph(structure, settings)
    vol = np.asarray(structure.volumes, dtype=float)
    if n == 0:
        notes.append("no prisms: nothing to stack")
        z = np.zeros(0, np.int64)
        return StackingResult(settings.to_dict(), 0, z, z, z, vol, 0, 0, graph,
                              _empty_stacks(), notes)
    if n == 1:
        notes.append("a single prism: one layer, one stack, stacking number 1")
    C = np.ascontiguousarray(structure.centroids)
    Nrm = np.ascontiguousarray(structure.normals)
    periodic, L = _box_lengths(dom)
    ia = graph.inplane[:, 0].astype(np.int64)
    ib = graph.inplane[:, 1].astype(np.int64)
    p, q = _csr(n, ia, ib)
    layer, n_layers, _, _ = _orient_unwrap(n, p, q, Nrm, C, L, periodic)
    allA = np.concatenate([ia, graph.stacked[:, 0]]).astype(np.int64)
    allB = np.concatenate([ib, graph.stacked[:, 1]]).astype(np.int64)
    p, q = _csr(n, allA, allB)
    stack, n_stacks, sig, U = _orient_unwrap(n, p, q, Nrm, C, L, periodic)
    del p, q
    # orient each stacked link upwards along the consistently signed mean normal
    sa = graph.stacked[:, 0].astype(np.int64)
    sb = graph.stacked[:, 1].astype(np.int64)
    if len(sa):
        m = Nrm[sa] * sig[sa, None] + Nrm[sb] * sig[sb, None]
        d = C[sb] - C[sa]
        if periodic:
            d = d - L * np.round(d / L)
        up = np.einsum("ij,ij->i", d, m) > 0
        src = np.where(up, sa, sb)
        dst = np.where(up, sb, sa)
    else:
        src = dst = np.zeros(0, np.int64)
    sn = _longest_chains(n, src, dst)
    # per-stack geometry
    stacks = _stack_geometry(structure, stack, n_stacks, layer, n_layers, sn, U, settings)
    if np.any(sn < 0):
        cyc = sn < 0
        sn[cyc] = stacks["layers"][stack[cyc]]
        stacks["column"] = np.maximum.reduceat(sn[np.argsort(stack, kind="stable")],
                                               _group_bounds(stack, n_stacks)[1])
        stacks["thickness"] = stacks["column"] * settings.spacing
        notes.append(f"{int(cyc.sum())} prism(s) lie on columns that wrap all the way round "
                     "the periodic box; their stacking number is set to the number of layers "
                     "of their stack")
    if n >= 2 and n_layers == 1:
        notes.append("all prisms form one layer (coplanar): every stacking number is 1")
    return StackingResult(settings.to_dict(), n, layer, stack, sn, vol, int(n_layers),
                          int(n_stacks), graph, stacks, notes)


def _empty_stacks():
    z = np.zeros(0)
    zi = np.zeros(0, np.int64)
    return {"prisms": zi, "layers": zi, "column": zi, "normal": np.zeros((0, 3)),
            "lateral_diameter": z, "disc_diameter": z, "thickness": z, "aspect_ratio": z,
            "centroid": np.zeros((0, 3)), "wall_distance": z, "wall_angle": z}


def _stack_geometry(structure, stack, K, layer, n_layers, sn, U, settings):
    vol = np.asarray(structure.volumes, dtype=float)
    Nrm = structure.normals
    prisms = np.bincount(stack, minlength=K)
    first = np.full(n_layers, -1, np.int64)
    first[layer[::-1]] = np.arange(len(layer))[::-1]
    layers = np.bincount(stack[first], minlength=K)
    order, starts, ends = _group_bounds(stack, K)
    column = np.maximum.reduceat(sn[order], starts)
    # volume-weighted second moment of normals per stack -> principal axis
    M = np.empty((K, 3, 3))
    for a in range(3):
        for b in range(a, 3):
            s = np.bincount(stack, weights=vol * Nrm[:, a] * Nrm[:, b], minlength=K)
            M[:, a, b] = s
            M[:, b, a] = s
    _, vec = np.linalg.eigh(M)
    normal = _canonical_sign(vec[:, :, 2])
    # volume-weighted centroid of unwrapped positions
    wsum = np.bincount(stack, weights=vol, minlength=K)
    cen = np.stack([np.bincount(stack, weights=vol * U[:, a], minlength=K) for a in range(3)],
                   axis=1) / wsum[:, None]
    dom = structure.domain
    if getattr(dom, "periodic", False):
        cen = dom.wrap(cen)
    # lateral extent: corners of unwrapped prisms projected on the stack plane
    mk = normal[stack]
    e = np.zeros_like(mk)
    e[np.arange(len(mk)), np.argmin(np.abs(mk), axis=1)] = 1.0
    u = np.cross(mk, e)
    u /= np.linalg.norm(u, axis=1, keepdims=True)
    v = np.cross(mk, u)
    corners = structure.vertices - structure.centroids[:, None, :] + U[:, None, :]  # (N,3,3)
    X = np.einsum("nkj,nj->nk", corners, u)[order].reshape(-1)
    Y = np.einsum("nkj,nj->nk", corners, v)[order].reshape(-1)
    diam = _calipers(3 * starts, 3 * ends, X, Y, N_CALIPER)
    proj_area = np.bincount(stack, weights=structure.areas * np.abs(np.einsum("ij,ij->i", Nrm, mk)),
                            minlength=K)
    disc = np.sqrt(4.0 * proj_area / np.maximum(layers, 1) / math.pi)
    thickness = column * settings.spacing
    aspect = disc / thickness
    wd = np.asarray(dom.wall_distance(cen), dtype=float)
    w = np.asarray(dom.inward_normal(cen), dtype=float)
    with np.errstate(invalid="ignore"):
        wall_angle = np.degrees(np.arccos(np.clip(np.abs(np.einsum("ij,ij->i", normal, w)), 0, 1)))
    return {"prisms": prisms, "layers": layers, "column": column, "normal": normal,
            "lateral_diameter": diam, "disc_diameter": disc, "thickness": thickness,
            "aspect_ratio": aspect, "centroid": cen, "wall_distance": wd, "wall_angle": wall_angle}
