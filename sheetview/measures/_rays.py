"""Ray kernels shared by the chord measure and the projections: where a line enters and
leaves a convex domain, the face planes of prisms, the periodic images of prisms crossing a
box, and growable interval outputs (line, start, end) regrouped by line.

A private kernel module: its names are public to the measures that import it
(:mod:`sheetview.measures.chords`, :mod:`sheetview.measures.sections`).
"""
from __future__ import annotations

import numba
import numpy as np

from ..domain import Box, Sphere
from ..structure import Structure


def domain_interval(domain, o, u, tmax):
    """Entry/exit parameters of lines in a convex domain (NaN-free; empty -> lo > hi)."""
    if isinstance(domain, Sphere):
        c = np.asarray(domain.center)
        p = o - c
        b = np.einsum("ij,ij->i", p, u)
        cc = np.einsum("ij,ij->i", p, p) - domain.radius ** 2
        disc = b * b - cc
        s = np.sqrt(np.maximum(disc, 0.0))
        lo, hi = -b - s, -b + s
        lo[disc <= 0] = 1.0
        hi[disc <= 0] = 0.0
    else:
        bmin, bmax = domain.bounds
        with np.errstate(divide="ignore", invalid="ignore"):
            t1 = (bmin - o) / u
            t2 = (bmax - o) / u
        tn = np.where(np.isnan(t1), -np.inf, np.minimum(t1, t2))
        tf = np.where(np.isnan(t2), np.inf, np.maximum(t1, t2))
        lo, hi = tn.max(axis=1), tf.min(axis=1)
    lo = np.maximum(lo, 0.0)
    hi = np.minimum(hi, tmax)
    return lo, hi


def prism_planes(vertices, normals, thickness) -> np.ndarray:
    """Face planes (N, 5, 4) ``[nx, ny, nz, d]`` of prisms, inside where ``n . x <= d``.

    Top and bottom faces at ``+-t/2`` along the unit normal; three side faces through
    the triangle edges, outward normals in the triangle plane.
    """
    v = np.asarray(vertices, float)
    n = np.asarray(normals, float)
    t = np.asarray(thickness, float)
    N = len(v)
    P = np.empty((N, 5, 4))
    cd = np.einsum("ij,ij->i", n, v[:, 0])
    P[:, 0, :3] = n
    P[:, 0, 3] = cd + 0.5 * t
    P[:, 1, :3] = -n
    P[:, 1, 3] = -cd + 0.5 * t
    for k in range(3):
        a, b, c = v[:, k], v[:, (k + 1) % 3], v[:, (k + 2) % 3]
        m = np.cross(b - a, n)
        m /= np.linalg.norm(m, axis=1, keepdims=True)
        flip = np.einsum("ij,ij->i", m, c - a) > 0
        m[flip] *= -1
        P[:, 2 + k, :3] = m
        P[:, 2 + k, 3] = np.einsum("ij,ij->i", m, a)
    return P


@numba.njit(cache=True, inline="always")
def grow(a, n):
    if n < a.shape[0]:
        return a
    b = np.empty(max(2 * a.shape[0], 16), a.dtype)
    # a loop, not b[:n] = a: numba's slice assignment compiles its shape-mismatch error
    # message (str() of tuples, about 3 s of a first run) into every caller
    for q in range(a.shape[0]):
        b[q] = a[q]
    return b


@numba.njit(cache=True)
def push(out_l, out_s, out_e, no, line, cs, ce):
    """Append one interval (line, start, end) to the growable outputs."""
    out_l = grow(out_l, no)
    out_s = grow(out_s, no)
    out_e = grow(out_e, no)
    out_l[no] = line
    out_s[no] = cs
    out_e[no] = ce
    return out_l, out_s, out_e, no + 1


def periodic_images(struct: Structure, box: Box):
    """Prism vertices/normals/thickness plus periodic images of prisms crossing the cell."""
    lo, hi = box.bounds
    L = hi - lo
    v = np.asarray(struct.vertices)
    corners = struct.prism_corners()
    bmin, bmax = corners.min(axis=1), corners.max(axis=1)
    Vs, Ns, Ts = [v], [struct.normals], [struct.thickness]
    for sx in (-1, 0, 1):
        for sy in (-1, 0, 1):
            for sz in (-1, 0, 1):
                if sx == sy == sz == 0:
                    continue
                s = np.array([sx, sy, sz]) * L
                sel = np.all((bmax + s > lo) & (bmin + s < hi), axis=1)
                if sel.any():
                    Vs.append(v[sel] + s)
                    Ns.append(struct.normals[sel])
                    Ts.append(struct.thickness[sel])
    return np.concatenate(Vs), np.concatenate(Ns), np.concatenate(Ts)


@numba.njit(cache=True)
def regroup(il, is_, ie, n):
    """Reorder interval runs (each line's intervals contiguous, sorted by start) by line."""
    cnt = np.zeros(n + 1, np.int64)
    for k in range(il.shape[0]):
        cnt[il[k] + 1] += 1
    for k in range(n):
        cnt[k + 1] += cnt[k]
    ol = np.empty_like(il)
    os_ = np.empty_like(is_)
    oe = np.empty_like(ie)
    for k in range(il.shape[0]):
        q = cnt[il[k]]
        cnt[il[k]] += 1
        ol[q] = il[k]
        os_[q] = is_[k]
        oe[q] = ie[k]
    return ol, os_, oe


@numba.njit(cache=True)
def argsort_stable(x, n, idx, tmp):
    """Write into ``idx[:n]`` the indices of ``x[:n]`` in ascending order, equal values in
    their original order (the result of ``np.argsort(x[:n], kind="stable")``); ``tmp``
    is scratch of at least ``n`` int64.

    Insertion sort of runs of 16, then bottom-up merges. Written out because numba's own
    ``np.argsort``/``np.sort`` (quicksort, mergesort) cost seconds of compile time per
    specialisation on a first run, for lists that here hold tens of values."""
    run = 16
    for i in range(n):
        idx[i] = i
    for s0 in range(0, n, run):
        e0 = min(s0 + run, n)
        for i in range(s0 + 1, e0):
            v = idx[i]
            xv = x[v]
            j = i - 1
            while j >= s0 and x[idx[j]] > xv:
                idx[j + 1] = idx[j]
                j -= 1
            idx[j + 1] = v
    width = run
    in_tmp = False
    while width < n:
        src = tmp if in_tmp else idx
        dst = idx if in_tmp else tmp
        for lo in range(0, n, 2 * width):
            mid = min(lo + width, n)
            hi = min(lo + 2 * width, n)
            i = lo
            j = mid
            k = lo
            while i < mid and j < hi:
                if x[src[j]] < x[src[i]]:
                    dst[k] = src[j]
                    j += 1
                else:
                    dst[k] = src[i]
                    i += 1
                k += 1
            while i < mid:
                dst[k] = src[i]
                i += 1
                k += 1
            while j < hi:
                dst[k] = src[j]
                j += 1
                k += 1
        in_tmp = not in_tmp
        width *= 2
    if in_tmp:
        for i in range(n):
            idx[i] = tmp[i]
