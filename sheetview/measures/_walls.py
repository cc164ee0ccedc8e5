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
