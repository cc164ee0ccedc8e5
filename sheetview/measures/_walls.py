"""Nearest-wall machinery of the local thickness (:mod:`sheetview.measures.pores`).

* :func:`feature_transform`: for every voxel of a phase, the displacement to the nearest
  voxel centre not in the phase (its *feature*), exact Euclidean, any voxel spacing,
  periodic or with the grid border as wall (the separable lower-envelope algorithm of
  Felzenszwalb & Huttenlocher, Theory of Computing 8 (2012) 415, carrying the feature
  along, as in Maurer, Qi & Raghavan, IEEE TPAMI 25 (2003) 265).
* Exact distances from a point to the walls of a structure: to a triangle (closest point
  by region classification, Ericson, *Real-Time Collision Detection*, 2005, sec. 5.1.5),
  to a triangular prism (the closest point of a triangle times an interval factorises),
  to the wall of a sphere or box domain; a uniform grid of cells listing the primitives
  near each cell.

Everything here is a kernel for the local thickness; the definitions it serves are in
the docstring of :mod:`sheetview.measures.pores`.
"""
from __future__ import annotations

import math

import numba
import numpy as np

#: Marker of "no feature" in a displacement component.
NONE = -32768
# sources of the two virtual border seeds of a line (beyond any periodic image index)
_VLO = -(1 << 40)
_VHI = 1 << 40


# ============================================================ feature transform
@numba.njit(cache=True, inline="always")
def _envelope(pos, val, nq, v, z):
    """Lower envelope of the parabolas ``val[t] + (x - pos[t])^2`` (``pos`` increasing,
    scaled positions); returns the number of parabolas kept in ``v`` (indices into
    ``pos``) with boundaries ``z`` (Felzenszwalb & Huttenlocher 2012)."""
    k = 0
    v[0] = 0
    z[0] = -np.inf
    z[1] = np.inf
    for q in range(1, nq):
        fq = val[q] + pos[q] * pos[q]
        while True:
            p = v[k]
            s = (fq - (val[p] + pos[p] * pos[p])) / (2.0 * (pos[q] - pos[p]))
            if s > z[k]:
                break
            k -= 1
        k += 1
        v[k] = q
        z[k] = s
        z[k + 1] = np.inf
    return k + 1


@numba.njit(cache=True, parallel=True)
def _ft_rows(mask, F, periodic):
    """Pass along axis 2: nearest non-phase centre in each row (displacement in k)."""
    n0, n1, n2 = mask.shape
    for r in numba.prange(n0 * n1):
        i = r // n1
        j = r % n1
        # last seed at or before k (forward), first at or after k (backward)
        if periodic:
            last = NONE
            for k in range(n2 - 1, -1, -1):
                if not mask[i, j, k]:
                    last = k - n2
                    break
            if last == NONE:
                for k in range(n2):
                    F[i, j, k, 0] = NONE
                    F[i, j, k, 1] = NONE
                    F[i, j, k, 2] = NONE
                continue
            first = NONE
            for k in range(n2):
                if not mask[i, j, k]:
                    first = k + n2
                    break
        else:
            last = -1
            first = n2
        s = last
        for k in range(n2):
            if not mask[i, j, k]:
                s = k
            F[i, j, k, 2] = s - k  # provisional (forward)
        t = first
        for k in range(n2 - 1, -1, -1):
            if not mask[i, j, k]:
                t = k
            back = t - k
            if back < -F[i, j, k, 2]:
                F[i, j, k, 2] = back
            F[i, j, k, 0] = 0
            F[i, j, k, 1] = 0


@numba.njit(cache=True, inline="always")
def _line_pass(Fl, n, w, periodic, axis, pos, val, src, v, z, comp):
    """One 1D pass over a line of features ``Fl`` (n, 3) along ``axis`` (weights ``w``
    (3,), squared): new displacement of each point to the nearest of the features of the
    line's points (their displacement along ``axis`` is 0 on entry)."""
    # candidate parabolas: point q (image m) at position (q + m n) w_axis
    nq = 0
    wa = math.sqrt(w[axis])
    if not periodic:
        pos[nq] = -1.0 * wa
        val[nq] = 0.0
        src[nq] = _VLO
        nq += 1
    reps = 3 if periodic else 1
    for rep in range(reps):
        m = rep - 1 if periodic else 0
        for q in range(n):
            if Fl[q, 0] == NONE:
                continue
            f = 0.0
            for a in range(3):
                if a != axis:
                    f += w[a] * Fl[q, a] * Fl[q, a]
            pos[nq] = (q + m * n) * wa
            val[nq] = f
            src[nq] = q + m * n
            nq += 1
    if not periodic:
        pos[nq] = n * wa
        val[nq] = 0.0
        src[nq] = _VHI
        nq += 1
    if nq == 0:
        return
    nv = _envelope(pos, val, nq, v, z)
    for q in range(n):
        comp[q, 0] = Fl[q, 0]
        comp[q, 1] = Fl[q, 1]
        comp[q, 2] = Fl[q, 2]
    kk = 0
    for p in range(n):
        x = p * wa
        while kk + 1 < nv and z[kk + 1] < x:
            kk += 1
        t = v[kk]
        s = src[t]
        if s == _VLO or s == _VHI:
            target = -1 if s == _VLO else n
            for a in range(3):
                Fl[p, a] = 0
            Fl[p, axis] = target - p
        else:
            qq = s % n
            for a in range(3):
                Fl[p, a] = comp[qq, a]
            Fl[p, axis] = s - p


@numba.njit(cache=True, parallel=True)
def _ft_axis1(F, w, periodic):
    n0, n1, n2 = F.shape[0], F.shape[1], F.shape[2]
    nmax = 3 * n1 + 2
    for r in numba.prange(n0):
        i = r
        Fl = np.empty((n1, 3), np.int16)
        pos = np.empty(nmax)
        val = np.empty(nmax)
        src = np.empty(nmax, np.int64)
        v = np.empty(nmax, np.int64)
        z = np.empty(nmax + 1)
        comp = np.empty((n1, 3), np.int16)
        for k in range(n2):
            for j in range(n1):
                for a in range(3):
                    Fl[j, a] = F[i, j, k, a]
            _line_pass(Fl, n1, w, periodic, 1, pos, val, src, v, z, comp)
            for j in range(n1):
                for a in range(3):
                    F[i, j, k, a] = Fl[j, a]


@numba.njit(cache=True, parallel=True)
def _ft_axis0(F, w, periodic, d2, block):
    n0, n1, n2 = F.shape[0], F.shape[1], F.shape[2]
    nmax = 3 * n0 + 2
    nkb = (n2 + block - 1) // block
    for r in numba.prange(n1 * nkb):
        j = r // nkb
        k0 = (r % nkb) * block
        k1 = min(k0 + block, n2)
        Fb = np.empty((k1 - k0, n0, 3), np.int16)
        pos = np.empty(nmax)
        val = np.empty(nmax)
        src = np.empty(nmax, np.int64)
        v = np.empty(nmax, np.int64)
        z = np.empty(nmax + 1)
        comp = np.empty((n0, 3), np.int16)
        for i in range(n0):
            for k in range(k0, k1):
                for a in range(3):
                    Fb[k - k0, i, a] = F[i, j, k, a]
        for k in range(k0, k1):
            _line_pass(Fb[k - k0], n0, w, periodic, 0, pos, val, src, v, z, comp)
        for i in range(n0):
            for k in range(k0, k1):
                s = 0.0
                for a in range(3):
                    c = Fb[k - k0, i, a]
                    F[i, j, k, a] = c
                    s += w[a] * c * c
                if Fb[k - k0, i, 0] == NONE:
                    s = np.inf
                d2[i, j, k] = s


def feature_transform(mask, rel, *, periodic=False):
    """Nearest voxel centre outside a phase, for every voxel.

    Parameters
    ----------
    mask : (n0, n1, n2) bool array, the phase
    rel : three voxel edges (any unit; distances come out in the same unit)
    periodic : wrap around every face; else the grid border is wall (the centres of a
        ring of voxels just outside the grid are outside the phase)

    Returns
    -------
    F : (n0, n1, n2, 3) int16, displacement (in voxels, per axis) from each voxel to a
        nearest centre outside the phase (0 on voxels outside the phase; periodic: to
        the nearest image). ``NONE`` in every component where there is none (a periodic
        phase filling the grid).
    d2 : (n0, n1, n2) float32, the squared distance ``sum (rel_a F_a)^2``; 0 outside
        the phase, inf where there is no feature.

    Exact (ties broken by the envelope's order): the lower envelope of parabolas taken
    along each axis in turn, each parabola carrying the displacement of its source.
    """
    m = np.ascontiguousarray(mask, dtype=np.bool_)
    if max(m.shape) >= 16000:
        raise ValueError("feature_transform: grid axes must be below 16000 voxels")
    w = np.asarray(rel, dtype=np.float64) ** 2
    F = np.empty(m.shape + (3,), dtype=np.int16)
    _ft_rows(m, F, bool(periodic))
    _ft_axis1(F, w, bool(periodic))
    d2 = np.empty(m.shape, dtype=np.float32)
    _ft_axis0(F, w, bool(periodic), d2, 16)
    return F, d2


# ============================================================ exact distances
@numba.njit(cache=True, inline="always")
def closest_on_triangle(px, py, pz, a, b, c):
    """Closest point of the triangle ``a, b, c`` (each (3,)) to the point ``p``, by
    region classification (Ericson, *Real-Time Collision Detection*, 2005, 5.1.5)."""
    abx, aby, abz = b[0] - a[0], b[1] - a[1], b[2] - a[2]
    acx, acy, acz = c[0] - a[0], c[1] - a[1], c[2] - a[2]
    apx, apy, apz = px - a[0], py - a[1], pz - a[2]
    d1 = abx * apx + aby * apy + abz * apz
    d2 = acx * apx + acy * apy + acz * apz
    if d1 <= 0.0 and d2 <= 0.0:
        return a[0], a[1], a[2]
    bpx, bpy, bpz = px - b[0], py - b[1], pz - b[2]
    d3 = abx * bpx + aby * bpy + abz * bpz
    d4 = acx * bpx + acy * bpy + acz * bpz
    if d3 >= 0.0 and d4 <= d3:
        return b[0], b[1], b[2]
    vc = d1 * d4 - d3 * d2
    if vc <= 0.0 and d1 >= 0.0 and d3 <= 0.0:
        v = d1 / (d1 - d3)
        return a[0] + v * abx, a[1] + v * aby, a[2] + v * abz
    cpx, cpy, cpz = px - c[0], py - c[1], pz - c[2]
    d5 = abx * cpx + aby * cpy + abz * cpz
    d6 = acx * cpx + acy * cpy + acz * cpz
    if d6 >= 0.0 and d5 <= d6:
        return c[0], c[1], c[2]
    vb = d5 * d2 - d1 * d6
    if vb <= 0.0 and d2 >= 0.0 and d6 <= 0.0:
        w = d2 / (d2 - d6)
        return a[0] + w * acx, a[1] + w * acy, a[2] + w * acz
    va = d3 * d6 - d5 * d4
    if va <= 0.0 and (d4 - d3) >= 0.0 and (d5 - d6) >= 0.0:
        w = (d4 - d3) / ((d4 - d3) + (d5 - d6))
        return (b[0] + w * (c[0] - b[0]), b[1] + w * (c[1] - b[1]),
                b[2] + w * (c[2] - b[2]))
    denom = 1.0 / (va + vb + vc)
    v = vb * denom
    w = vc * denom
    return (a[0] + abx * v + acx * w, a[1] + aby * v + acy * w,
            a[2] + abz * v + acz * w)


@numba.njit(cache=True, inline="always")
def closest_on_prism(px, py, pz, tri, nrm, half):
    """Closest point of the triangular prism ``tri`` (3, 3) (mid-plane triangle) times
    ``[-half, half]`` along the unit normal ``nrm`` to ``p``: the prism is the product of
    the triangle and an interval along a direction normal to it, so the closest point is
    the closest point of the triangle to the projection of ``p`` on its plane, shifted
    along the normal by the offset of ``p`` clamped to the interval."""
    s = (nrm[0] * (px - tri[0, 0]) + nrm[1] * (py - tri[0, 1])
         + nrm[2] * (pz - tri[0, 2]))
    qx = px - s * nrm[0]
    qy = py - s * nrm[1]
    qz = pz - s * nrm[2]
    fx, fy, fz = closest_on_triangle(qx, qy, qz, tri[0], tri[1], tri[2])
    if s > half:
        s = half
    elif s < -half:
        s = -half
    return fx + s * nrm[0], fy + s * nrm[1], fz + s * nrm[2]


@numba.njit(cache=True)
def _fill_cells(lo_c, hi_c, dims, start, items):
    fill = start[:-1].copy()
    for p in range(lo_c.shape[0]):
        for i in range(lo_c[p, 0], hi_c[p, 0] + 1):
            for j in range(lo_c[p, 1], hi_c[p, 1] + 1):
                for k in range(lo_c[p, 2], hi_c[p, 2] + 1):
                    c = (i * dims[1] + j) * dims[2] + k
                    items[fill[c]] = p
                    fill[c] += 1


@numba.njit(cache=True)
def _count_cells(lo_c, hi_c, dims, cnt):
    for p in range(lo_c.shape[0]):
        for i in range(lo_c[p, 0], hi_c[p, 0] + 1):
            for j in range(lo_c[p, 1], hi_c[p, 1] + 1):
                for k in range(lo_c[p, 2], hi_c[p, 2] + 1):
                    cnt[(i * dims[1] + j) * dims[2] + k] += 1


def cell_lists(bmin, bmax, lo, size, dims):
    """Primitives listed per cell of a uniform grid (origin ``lo``, edges ``size``,
    ``dims`` cells per axis): every primitive whose box ``[bmin, bmax]`` meets the cell
    (boxes are clipped to the grid). Returns CSR arrays ``start`` (ncells + 1) and
    ``items``."""
    dims = np.asarray(dims, np.int64)
    lo_c = np.clip(np.floor((bmin - lo) / size).astype(np.int64), 0, dims - 1)
    hi_c = np.clip(np.floor((bmax - lo) / size).astype(np.int64), 0, dims - 1)
    cnt = np.zeros(int(np.prod(dims)), np.int64)
    _count_cells(lo_c, hi_c, dims, cnt)
    start = np.zeros(cnt.size + 1, np.int64)
    np.cumsum(cnt, out=start[1:])
    items = np.empty(int(start[-1]), np.int64)
    _fill_cells(lo_c, hi_c, dims, start, items)
    return start, items


# ============================================================ voxel wall estimate
#: Window half-width (voxels) and Gaussian width (voxel edges) of the wall normals.
NORMAL_RADIUS = 4
NORMAL_SIGMA = 1.5
_NQ = 32767.0


@numba.njit(cache=True, inline="always")
def _in_phase(mask, i, j, k, periodic):
    n0, n1, n2 = mask.shape
    if periodic:
        return mask[i % n0, j % n1, k % n2]
    if i < 0 or j < 0 or k < 0 or i >= n0 or j >= n1 or k >= n2:
        return False
    return mask[i, j, k]


@numba.njit(cache=True, inline="always")
def gap_along(mask, bi, bj, bk, nx, ny, nz, rel, periodic):
    """Gap along the unit normal ``n`` (pointing from the phase to the wall) between the
    non-phase centre ``b`` and the phase centre among its 26 neighbours that lies
    furthest along ``n``: ``min n . (b - a)`` (units of ``rel``), at least 0; 0 when
    ``b`` has no phase neighbour."""
    g = np.inf
    for a in range(-1, 2):
        for b in range(-1, 2):
            for e in range(-1, 2):
                if a == 0 and b == 0 and e == 0:
                    continue
                if _in_phase(mask, bi + a, bj + b, bk + e, periodic):
                    v = -(nx * a * rel[0] + ny * b * rel[1] + nz * e * rel[2])
                    if v < g:
                        g = v
    if g == np.inf or g < 0.0:
        return 0.0
    return g


@numba.njit(cache=True, parallel=True)
def _wall_normals(mask, F, rel, periodic, R, sigma, gscale):
    n0, n1, n2 = mask.shape
    inv = 1.0 / (2.0 * sigma * sigma)
    W = np.empty((2 * R + 1, 2 * R + 1, 2 * R + 1, 3))  # weight times offset
    for a in range(-R, R + 1):
        for b in range(-R, R + 1):
            for e in range(-R, R + 1):
                oa = a * rel[0]
                ob = b * rel[1]
                oe = e * rel[2]
                w = math.exp(-(oa * oa + ob * ob + oe * oe) * inv)
                W[a + R, b + R, e + R, 0] = w * oa
                W[a + R, b + R, e + R, 1] = w * ob
                W[a + R, b + R, e + R, 2] = w * oe
    for i in numba.prange(n0):
        for j in range(n1):
            for k in range(n2):
                if mask[i, j, k]:
                    continue
                if not (_in_phase(mask, i - 1, j, k, periodic)
                        or _in_phase(mask, i + 1, j, k, periodic)
                        or _in_phase(mask, i, j - 1, k, periodic)
                        or _in_phase(mask, i, j + 1, k, periodic)
                        or _in_phase(mask, i, j, k - 1, periodic)
                        or _in_phase(mask, i, j, k + 1, periodic)):
                    F[i, j, k, 0] = 0
                    F[i, j, k, 1] = 0
                    F[i, j, k, 2] = 0
                    continue
                sx = 0.0
                sy = 0.0
                sz = 0.0
                inner = R <= i < n0 - R and R <= j < n1 - R and R <= k < n2 - R
                for a in range(-R, R + 1):
                    for b in range(-R, R + 1):
                        for e in range(-R, R + 1):
                            if inner:
                                if not mask[i + a, j + b, k + e]:
                                    continue
                            elif not _in_phase(mask, i + a, j + b, k + e, periodic):
                                continue
                            sx -= W[a + R, b + R, e + R, 0]
                            sy -= W[a + R, b + R, e + R, 1]
                            sz -= W[a + R, b + R, e + R, 2]
                L = math.sqrt(sx * sx + sy * sy + sz * sz)
                if L == 0.0:  # symmetric surroundings: any phase face neighbour
                    sx, sy, sz = 0.0, 0.0, 0.0
                    if _in_phase(mask, i - 1, j, k, periodic):
                        sx = 1.0
                    elif _in_phase(mask, i + 1, j, k, periodic):
                        sx = -1.0
                    elif _in_phase(mask, i, j - 1, k, periodic):
                        sy = 1.0
                    elif _in_phase(mask, i, j + 1, k, periodic):
                        sy = -1.0
                    elif _in_phase(mask, i, j, k - 1, periodic):
                        sz = 1.0
                    else:
                        sz = -1.0
                    L = 1.0
                nx = sx / L
                ny = sy / L
                nz = sz / L
                g = gap_along(mask, i, j, k, nx, ny, nz, rel, periodic)
                F[i, j, k, 0] = np.int16(round(nx * _NQ))
                F[i, j, k, 1] = np.int16(round(ny * _NQ))
                q = min(int(round(g / gscale)), 32000) + 1
                F[i, j, k, 2] = np.int16(q if nz >= 0.0 else -q)


def wall_normals(mask, F, rel, *, periodic=False):
    """Write the voxel estimate of the wall into ``F`` (from :func:`feature_transform`) at
    every non-phase voxel with a phase face neighbour: the unit normal (from the phase
    towards the wall) is minus the Gaussian-weighted mean offset of the phase centres in
    the ``(2 R + 1)^3`` window (``R`` = :data:`NORMAL_RADIUS`, width
    :data:`NORMAL_SIGMA` voxel edges; the gradient of the smoothed phase indicator), and
    the gap is :func:`gap_along` that normal. Read back with :func:`wall_at`."""
    rel = np.asarray(rel, np.float64)
    hc = float(np.prod(rel) ** (1.0 / 3.0))
    _wall_normals(np.ascontiguousarray(mask, dtype=np.bool_), F, rel, bool(periodic),
                  NORMAL_RADIUS, NORMAL_SIGMA * hc, gap_scale(rel))


def gap_scale(rel):
    return float(np.sqrt(np.sum(np.asarray(rel, float) ** 2))) / 32000.0


@numba.njit(cache=True, inline="always")
def wall_at(F, bi, bj, bk, rel, periodic, gscale):
    """The wall estimate at the non-phase centre ``b`` (unwrapped indices): unit normal
    and gap (:func:`wall_normals`); a centre beyond a face of a non-periodic grid (the
    border wall) has the face's normal and a gap of one voxel edge."""
    n0, n1, n2 = F.shape[0], F.shape[1], F.shape[2]
    if periodic:
        bi %= n0
        bj %= n1
        bk %= n2
    else:
        if bi < 0:
            return -1.0, 0.0, 0.0, rel[0]
        if bi >= n0:
            return 1.0, 0.0, 0.0, rel[0]
        if bj < 0:
            return 0.0, -1.0, 0.0, rel[1]
        if bj >= n1:
            return 0.0, 1.0, 0.0, rel[1]
        if bk < 0:
            return 0.0, 0.0, -1.0, rel[2]
        if bk >= n2:
            return 0.0, 0.0, 1.0, rel[2]
    nx = F[bi, bj, bk, 0] / _NQ
    ny = F[bi, bj, bk, 1] / _NQ
    q = np.int64(F[bi, bj, bk, 2])
    nz = math.sqrt(max(0.0, 1.0 - nx * nx - ny * ny))
    if q < 0:
        nz = -nz
        q = -q
    return nx, ny, nz, (q - 1) * gscale
