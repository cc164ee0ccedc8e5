"""Pore sizes of a voxel phase: local thickness and simulated intrusion.

Both measures describe a phase (by default the gel pore space of a :class:`PhaseGrid`)
by the diameters of balls that fit inside it.

*Local thickness* (Hildebrand & Rüegsegger, J. Microsc. 185 (1997) 67,
doi:10.1046/j.1365-2818.1997.1340694.x): the local thickness at a point ``p`` of a phase
``X`` is the diameter of the largest ball inside ``X`` that contains ``p``,

.. math:: \\tau(p) = 2 \\max\\{ r : p \\in B(x, r) \\subseteq X \\}.

A slab of width ``w`` gives ``w`` everywhere, a ball or a cylinder of radius ``R`` gives
``2R``. It is the "continuous pore size distribution" of Münch & Holzer (2008): a pore
is seen at its own size whatever the openings leading to it.

*Simulated intrusion* (Münch & Holzer, J. Am. Ceram. Soc. 91 (2008) 4059,
doi:10.1111/j.1551-2916.2008.02736.x), the geometric analogue of mercury intrusion
porosimetry: for decreasing diameter ``D``, the phase voxels a ball of diameter ``D`` can
reach when it enters from a reservoir and moves through the phase without leaving it;
each voxel's intrusion diameter is the largest ``D`` at which it is reached. A big
cavity behind a narrow throat (an "ink bottle") takes the throat's diameter.

Local thickness has two methods; intrusion uses the first one's lattice conventions.

**method="centres"** (the default, :data:`DEFAULT_LT_METHOD`; this program's first
discretisation; the one intrusion uses):

* ``d(x)`` is the Euclidean distance from the centre of phase voxel ``x`` to the centre of
  the nearest voxel not in the phase (computed by the ``edt`` package with the voxel
  spacing as anisotropy; for a non-periodic grid the grid border counts as wall; a
  periodic grid is padded with its own wrapped content until every distance is exact).
* The candidate balls are centred on voxel centres: ball ``x`` holds the voxels ``q``
  with ``|q - x| < d(x)`` (exact radii, not rounded to whole voxels), so it holds phase
  voxels only.
* Its diameter is reported as ``2 d(x) - h`` with ``h = (h_x h_y h_z)^{1/3}`` the voxel
  edge: the wall lies half a voxel before the centre of the first wall voxel. A slab
  ``m`` voxels wide then measures exactly ``m h`` when ``m`` is odd and ``(m - 1) h`` when
  ``m`` is even (ball centres sit on voxel centres). Balls and cylinders whose centre is
  not on a voxel centre read 1.5 to 2.3 voxels low (the largest lattice-centred ball is
  smaller, and ``- h`` is too much for curved and oblique walls).

Ball painting: every voxel takes the largest diameter of the balls holding it. A ball
contained in a neighbour's ball (``d(y) >= d(x) + |x - y|`` for one of its 26
neighbours; on unit voxels the exact lattice-ball test) changes nothing and is skipped
(the "distance ridge" speed-up, common practice). The rest are painted in order of
decreasing diameter, first cover wins: a bit set of the voxels still unpainted (one bit
per voxel along the contiguous axis, with a per-plane summary of rows) lets a ball skip
what larger balls already painted, 64 voxels at a time, and every voxel is written once;
on unit voxels a plane of a ball is also skipped when it lies in the same plane's disc of
a face or in-plane neighbour with a larger radius (exact integer test). The x axis is cut
into slabs painted in parallel, one thread per slab. The result is, bit for bit, the
plain maximum over all balls.

**method="subvoxel"** (an option, 4 to 8 times slower than "centres"; this program's own
method, built on the definition
of Hildebrand & Rüegsegger): ball centres off the lattice and a wall between the voxel
centres. Lengths below are in voxel edges.

1. *Features.* For every phase voxel ``y``, its feature ``b(y)`` is a nearest voxel centre
   not in the phase, and ``d(y) = |y - b(y)|`` (exact Euclidean feature transform,
   :func:`sheetview.measures._walls.feature_transform`; the grid border counts as wall
   unless periodic).
2. *Wall at a feature.* At each non-phase centre ``b`` with a phase face neighbour, the
   wall normal ``N_b`` (from the phase towards the wall) is minus the Gaussian-weighted
   mean offset of the phase centres within 4 voxels (width 1.5 voxels): the gradient of
   the smoothed phase indicator. Seen from ``y``, the normal used is ``N_b`` if it lies
   within ``atan(2 / d(y))`` of the viewing direction ``(b - y)/d(y)`` (two voxels of
   lateral slack between a nearest centre and the foot of the wall), else the direction
   at that angle from the viewing direction towards ``N_b`` (near convex corners, seen
   from afar, the viewing direction is the better normal). The *gap* ``g`` along that
   normal ``n`` is ``min n . (b - a)`` over the phase centres ``a`` among the 26
   neighbours of ``b``: the wall lies between ``b`` and that centre.
3. *Candidates.* As for "centres": the phase voxels whose lattice ball ``{q : |q - x| <
   d(x)}`` lies in no 26-neighbour's.
4. *Refined centre.* For candidate ``x``, the planes through the features of the 27
   voxels around it (normals as in 2) bound the pore; the centre ``y* = x + z`` with
   ``|z_i| <= 1`` voxel that maximises the least distance to those planes is found by a
   small linear programme (the Chebyshev centre of the planes within the box). The
   candidates whose ball lies within 0.3 voxel of a 26-neighbour's
   (``d(y) - |x - y| >= d(x) - 0.3``) keep ``z = 0`` and no refined ball (a speed-up).
5. *Radius (the bracket).* At a centre, each plane ``i`` gives ``o_i``, its distance
   along its normal, and ``o_i - g_i``, that of the phase centre next to it: the wall
   along that normal lies in ``[o_i - g_i, o_i]``. For the planes within 1 voxel of the
   nearest, grouped by wall direction (normals within 85 degrees of each plane's), the
   wall lies at least as far as the furthest ``o - g`` and at most as far as the least
   ``o`` of its group; the radius is the least over the groups of the midpoint of that
   bracket (the furthest ``o - g`` is first cut to the least ``o``). On a wall parallel to
   a lattice plane this is the wall half way between the last phase and the first
   non-phase layer (exact for a slab of a whole number of voxels, odd or even); on
   curved and oblique walls, whose centres are spread in depth, the bracket narrows.
6. *Painting.* Each candidate paints two balls: its refined ball (centre ``y*``, radius
   ``A`` from 5, holding the voxels closer to ``y*`` than its nearest feature) with the
   diameter ``2 A``, and its lattice ball ``|q - x| < d(x)`` with twice the radius from 5
   at ``x``. Balls are painted from the largest diameter down, first cover wins (as for
   "centres", with float centres and without the plane masks), so every phase voxel
   takes the largest diameter of the balls holding it. The refined ball also holds the
   phase voxels within :data:`PAINT_SLACK` (a quarter voxel) beyond ``A``: the outermost
   voxels of a ball at a sub-voxel offset lie within a hair of its sphere (0.001 voxel is
   common), so a centre or radius off by that much left them to smaller balls.

Measured on balls of radius 4 to 10 voxels, cylinders of random axis (radius 4 to 8) and
oblique slabs at random sub-voxel offsets, every voxel reads the diameter or width within
0.3 voxel (see docs/validation.md); a slab of a whole number of voxels along a grid axis
reads its width exactly. Walls made of thin sheets (convex edges and corners)
read up to about half a voxel far per side for pores of 20 voxels and more (the nearest
non-phase centre of a corner lies deep behind the tip).

**Exact geometry** (:func:`exact_local_thickness`, a grid rasterized from prisms or a
closed mesh): steps 1 and 3 as above; for step 4 the walls near the features of the 27
voxels around a candidate are gathered (the prisms or mesh triangles listed in the cell of
a uniform grid holding each non-pore feature, the domain wall, and for non-pore voxels that
are neither solid nor outside, such as the interlayer class, the voxel plane of step 2
placed at mid-gap), the exact distances to them are linearised at the current centre and
the linear programme is solved again (4 rounds); the radius is the exact distance at the
final centre (closest point on a triangle: Ericson, *Real-Time Collision Detection*, 2005,
5.1.5; on a prism, the closest point of its mid-plane triangle to the projection, shifted
along the normal by the clamped offset). Every gathered wall enters the programme (a fine
mesh's nearest few triangles all lie on one side of the centre). The refined ball holds the
voxels closer than that distance plus :data:`PAINT_SLACK` to its centre (next to an oblique
wall the ball centres, one per candidate, are up to a voxel apart along the wall, and the
pore voxels nearest the wall lie in none of the exact balls); the lattice ball takes twice
the exact distance at ``x``.
A wall missed by the gathering (one that lies more than a voxel nearer than the centres
it covers suggest) leaves a ball too large; on the sample structure this happened for
0.8 % of the candidates, by at most 0.15 nm at 0.2 nm voxels (measured when the gathering
was capped at 192 primitives; not measured again). A candidate whose exact distance is not
positive (a voxel plane seen obliquely passing behind it) takes half its distance to the
nearest wall voxel for its lattice ball.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field

import numba
import numpy as np
from numba.cpython.unsafe.numbers import trailing_zeros as _tz

from ..errors import OptionError
from ..grid import GEL, INTERLAYER, OUTSIDE, SOLID, PhaseGrid, phase_code
from ..structure import Structure, SurfaceBody
from ..threads import budget
from ._result import Result
from ._walls import (NONE, cell_lists, closest_on_prism, closest_on_triangle, feature_transform,
                     gap_along, gap_scale, wall_at, wall_normals)

# 26-neighbour offsets
_OFFS = np.array([(a, b, c) for a in (-1, 0, 1) for b in (-1, 0, 1) for c in (-1, 0, 1)
                  if (a, b, c) != (0, 0, 0)], dtype=np.int64)


# ================================================================ helpers
def _check_mask(mask, spacing):
    m = np.asarray(mask)
    if m.ndim != 3:
        raise OptionError(f"the phase mask must be a 3D array, not {m.ndim}D", field="mask")
    if m.dtype != bool:
        m = m != 0
    sp = np.broadcast_to(np.asarray(spacing, dtype=float), (3,)).copy()
    if not np.all(np.isfinite(sp)) or np.any(sp <= 0):
        raise OptionError(f"voxel spacing must be three positive numbers (nm), not {spacing!r}",
                          field="spacing")
    return np.ascontiguousarray(m), sp


def _units(sp):
    """Internal length unit (the smallest spacing), relative anisotropy and the half-voxel
    wall correction ``h`` in internal units."""
    unit = float(sp.min())
    rel = sp / unit
    hc = float(np.prod(rel) ** (1.0 / 3.0))
    return unit, rel, hc


def squared_distance(fg, rel, *, periodic=False, black_border=True):
    """Squared distance (internal units, float32) from each foreground voxel to the
    nearest background voxel centre; 0 on the background.

    Non-periodic: ``edt.edtsq`` with the grid border as background when
    ``black_border``. Periodic: the volume is padded on every side with its own wrapped
    content, the pad doubled until the largest distance found is within the pad (so the
    nearest background over the periodic images lies in the padded volume, and every
    distance is exact). Raises :class:`OptionError` when a periodic phase has no
    background at all.
    """
    import edt

    fg = np.ascontiguousarray(fg, dtype=np.uint8)
    anis = tuple(float(a) for a in rel)
    if not periodic:
        return edt.edtsq(fg, anisotropy=anis, black_border=black_border,
                         parallel=budget()).astype(np.float32, copy=False)
    if fg.all():
        raise OptionError("the phase fills the whole periodic grid: it has no wall, so its "
                          "pore sizes are undefined", field="phases")
    shape = np.asarray(fg.shape)
    pad = np.minimum(shape, 16)
    while True:
        padded = np.pad(fg, [(int(p), int(p)) for p in pad], mode="wrap")
        d2 = edt.edtsq(padded, anisotropy=anis, black_border=False, parallel=budget())
        sl = tuple(slice(int(p), int(p) + int(n)) for p, n in zip(pad, shape))
        core = np.ascontiguousarray(d2[sl], dtype=np.float32)
        reach = float(np.min(pad * np.asarray(rel)))
        full = bool(np.all(pad >= 2 * shape))
        if float(core.max()) <= reach * reach or full:
            return core
        pad = np.minimum(2 * shape, 2 * pad)


@numba.njit(cache=True, parallel=True)
def _ridge(idx, r, rel, shape, periodic):
    """Mask (over ``idx``) of the balls not contained in a 26-neighbour's ball.

    ``idx`` are flat voxel indices of candidate centres and ``r`` (flat, full grid) the
    ball radii, 0 where there is no ball. Ball x lies in ball y when
    ``r[y] >= r[x] + |x - y|``; the tolerance of 1e-5 internal units is far below the
    gap between distinct distances on a grid of moderate size, and a kept ball is never
    wrong (it is only painted for nothing).
    """
    n0, n1, n2 = shape[0], shape[1], shape[2]
    keep = np.ones(idx.size, dtype=np.bool_)
    dist = np.empty(27)
    for a in range(3):
        for b in range(3):
            for e in range(3):
                dist[a * 9 + b * 3 + e] = math.sqrt(((a - 1) * rel[0]) ** 2
                                                    + ((b - 1) * rel[1]) ** 2
                                                    + ((e - 1) * rel[2]) ** 2)
    nchunk = 64
    for ch in numba.prange(nchunk):
        t0 = (ch * idx.size) // nchunk
        t1 = ((ch + 1) * idx.size) // nchunk
        for t in range(t0, t1):
            f = idx[t]
            i = f // (n1 * n2)
            j = (f // n2) % n1
            k = f % n2
            rx = np.float64(r[f])
            done = False
            for a in range(3):
                if done:
                    break
                ii = i + a - 1
                if periodic:
                    ii %= n0
                elif ii < 0 or ii >= n0:
                    continue
                for b in range(3):
                    if done:
                        break
                    jj = j + b - 1
                    if periodic:
                        jj %= n1
                    elif jj < 0 or jj >= n1:
                        continue
                    base = (ii * n1 + jj) * n2
                    for e in range(3):
                        if a == 1 and b == 1 and e == 1:
                            continue
                        kk = k + e - 1
                        if periodic:
                            kk %= n2
                        elif kk < 0 or kk >= n2:
                            continue
                        if np.float64(r[base + kk]) >= rx + dist[a * 9 + b * 3 + e] - 1e-5:
                            keep[t] = False
                            done = True
                            break
    return keep


_ONES = np.uint64(0xFFFFFFFFFFFFFFFF)
_ONE = np.uint64(1)


@numba.njit(cache=True, parallel=True)
def _unpainted_bits(mask):
    """Bit sets of the voxels still to paint, initially the phase (``mask``).

    ``U[i, j, w]``: bit ``b`` set when voxel ``(i, j, 64 w + b)`` is unpainted (one bit
    per voxel along the last, contiguous axis). ``S[i, c, w]``: bit ``b`` set when row
    ``j = 64 w + b`` of plane ``i`` has an unpainted voxel among ``8 c <= k < 8 c + 8``
    (a summary over ``j`` of the bytes of ``U``, to skip painted rows by the 64)."""
    n0, n1, n2 = mask.shape
    nw = (n2 + 63) >> 6
    U = np.zeros((n0, n1, nw), dtype=np.uint64)
    S = np.zeros((n0, 8 * nw, (n1 + 63) >> 6), dtype=np.uint64)
    for i in numba.prange(n0):
        for j in range(n1):
            for k in range(n2):
                if mask[i, j, k]:
                    U[i, j, k >> 6] |= _ONE << np.uint64(k & 63)
            jb = _ONE << np.uint64(j & 63)
            for w in range(nw):
                word = U[i, j, w]
                if word == 0:
                    continue
                for c in range(8):
                    if (word >> np.uint64(8 * c)) & np.uint64(255):
                        S[i, 8 * w + c, j >> 6] |= jb
    return U, S


@numba.njit(cache=True, inline="always")
def _word_mask(k0, k1, w):
    """Bits of word ``w`` covering indices ``k0 <= k <= k1`` (the range meets the word)."""
    lo = max(k0 - (w << 6), 0)
    hi = min(k1 - (w << 6), 63)
    return (_ONES >> np.uint64(63 - hi)) & (_ONES << np.uint64(lo))


@numba.njit(cache=True, inline="always")
def _take_span(U, S, out, i, j, k0, k1, v):
    """Write ``v`` on the still unpainted voxels ``k0 <= k <= k1`` of row ``(i, j)`` and
    mark them painted (nothing if ``k0 > k1``)."""
    for w in range(k0 >> 6, (k1 >> 6) + 1):
        word = U[i, j, w]
        if word == 0:
            continue
        msk = _word_mask(k0, k1, w)
        bits = word & msk
        if bits == 0:
            continue
        rest = word & ~msk
        U[i, j, w] = rest
        base = w << 6
        while bits != 0:
            out[i, j, base + _tz(bits)] = v
            bits &= bits - _ONE
        jb = ~(_ONE << np.uint64(j & 63))
        for c in range(8):
            if (rest >> np.uint64(8 * c)) & np.uint64(255) == 0:
                S[i, 8 * w + c, j >> 6] &= jb


@numba.njit(cache=True, inline="always")
def _fold(c, h, n, periodic):
    """The index range ``[c - h, c + h]`` (``h >= 0``) on an axis of ``n`` voxels: clipped
    (non-periodic) or folded onto ``[0, n)`` (periodic) as at most two ranges
    ``(a0, b0, a1, b1)``; an empty range has ``a > b``."""
    if not periodic:
        return max(c - h, 0), min(c + h, n - 1), 0, -1
    if 2 * h + 1 >= n:
        return 0, n - 1, 0, -1
    a = (c - h) % n
    b = a + 2 * h
    if b < n:
        return a, b, 0, -1
    return a, n - 1, 0, b - n


@numba.njit(cache=True, inline="always")
def _half(base, step, rr, isq, integer):
    """Largest ``h >= 0`` with ``base + (h step)^2 < rr``, -1 if none (``base < rr``).
    ``integer`` (unit voxels, integer ``base`` and ``rr``): ``isqrt(rr - base - 1)`` read
    from the table ``isq``, the same number."""
    if integer:
        return isq[int(rr - base) - 1]
    h = int(math.sqrt(rr - base) / step)
    while h >= 0 and base + (h * step) ** 2 >= rr:
        h -= 1
    return h


@numba.njit(cache=True, inline="always")
def _paint_row(U, S, out, i, j, dj, dx2, rr, c2, v, rel, periodic, isq, integer):
    rk = _half(dx2 + (dj * rel[1]) ** 2, rel[2], rr, isq, integer)
    if rk >= 0:
        a0, b0, a1, b1 = _fold(c2, rk, out.shape[2], periodic)
        _take_span(U, S, out, i, j, a0, b0, v)
        _take_span(U, S, out, i, j, a1, b1, v)


@numba.njit(cache=True, inline="always")
def _rows_touched(S, i, j0, j1, jw, ka, kb, kc, kd):
    """Rows ``j0 <= j <= j1`` of word ``jw`` with an unpainted voxel in a byte meeting
    ``[ka, kb]`` or ``[kc, kd]`` (bit mask over ``j``)."""
    acc = np.uint64(0)
    if ka <= kb:
        for c in range(ka >> 3, (kb >> 3) + 1):
            acc |= S[i, c, jw]
    if kc <= kd:
        for c in range(kc >> 3, (kd >> 3) + 1):
            acc |= S[i, c, jw]
    return acc & _word_mask(j0, j1, jw)


@numba.njit(cache=True, inline="always")
def _paint_plane(U, S, out, i, dx2, rr, c1, c2, v, rel, periodic, isq, integer):
    """First-cover painting of the disc ``dx2 + |(j, k) - (c1, c2)|^2 < rr`` of plane
    ``i``: only the rows with an unpainted voxel in the disc's bounding box (from the
    summary ``S``) are visited."""
    n1 = out.shape[1]
    n2 = out.shape[2]
    rj = _half(dx2, rel[1], rr, isq, integer)
    if rj < 0:
        return
    if periodic and 2 * rj + 1 >= n1:  # the disc wraps onto itself: every offset
        for dj in range(-rj, rj + 1):
            _paint_row(U, S, out, i, (c1 + dj) % n1, dj, dx2, rr, c2, v, rel, periodic,
                       isq, integer)
        return
    rk0 = _half(dx2, rel[2], rr, isq, integer)  # widest row (dj = 0)
    ka, kb, kc, kd = _fold(c2, rk0, n2, periodic)
    ja, jb, jc, jd = _fold(c1, rj, n1, periodic)
    for part in range(2):
        j0 = ja if part == 0 else jc
        j1 = jb if part == 0 else jd
        if j0 > j1:
            continue
        for jw in range(j0 >> 6, (j1 >> 6) + 1):
            bits = _rows_touched(S, i, j0, j1, jw, ka, kb, kc, kd)
            while bits != 0:
                j = (jw << 6) + _tz(bits)
                bits &= bits - _ONE
                dj = j - c1
                if periodic:
                    dj = (dj + rj) % n1 - rj
                _paint_row(U, S, out, i, j, dj, dx2, rr, c2, v, rel, periodic, isq,
                           integer)


@numba.njit(cache=True, parallel=True)
def _half_axis0(r2, rel0, isq, integer):
    """Per ball, the largest ``|di|`` of a plane it meets (-1: an empty ball)."""
    out = np.empty(r2.size, dtype=np.int64)
    for b in numba.prange(r2.size):
        out[b] = _half(0.0, rel0, r2[b], isq, integer)
    return out


@numba.njit(cache=True, parallel=True)
def _paint_first(ci, cj, ck, ri, r2, val, pmask, rel, out, U, S, periodic, nslabs, isq,
                 integer):
    """First-cover ball painting: the balls, given in order of decreasing ``val``, write
    ``val[b]`` on the voxels ``q`` with ``|q - centre_b|^2 < r2[b]`` (internal units) not
    yet painted; ``U, S`` (:func:`_unpainted_bits`) mark the voxels that may still be
    painted and are consumed. Since every voxel keeps the first (largest) value offered,
    the result is ``max`` over the balls holding it, as in plain max-painting, but each
    voxel is written once and painted rows are skipped 64 at a time. ``ri`` is
    :func:`_half_axis0` of ``r2``; plane ``di`` of ball ``b`` is skipped when bit
    ``di + ri[b]`` of ``pmask[b]`` is clear (``ri[b] <= 31``). The x axis is split into ``nslabs`` slabs, each painted
    by one thread (no two threads write one voxel)."""
    n0 = out.shape[0]
    nb = ci.size
    for s in numba.prange(nslabs):
        x0 = (s * n0) // nslabs
        x1 = ((s + 1) * n0) // nslabs
        for b in range(nb):
            h = ri[b]
            c = ci[b]
            pm = pmask[b]
            if periodic:
                qa = -((x1 - 1 - (c - h)) // n0)  # ceil((c - h - x1 + 1) / n0)
                qb = (c + h - x0) // n0
            else:
                if h < 0 or c + h < x0 or c - h >= x1:
                    continue
                qa = 0
                qb = 0
            for q in range(qa, qb + 1):
                lo = max(c - h, x0 + q * n0)
                hi = min(c + h, x1 - 1 + q * n0)
                for ii in range(lo, hi + 1):
                    di = ii - c
                    if h <= 31 and (pm >> np.uint64(di + h)) & _ONE == 0:
                        continue
                    _paint_plane(U, S, out, ii - q * n0, (di * rel[0]) ** 2, r2[b], cj[b],
                                 ck[b], val[b], rel, periodic, isq, integer)


@numba.njit(cache=True)
def _argsort_desc(bits):
    """Indices sorting ``bits`` (the uint32 bit patterns of positive float32 values, which
    order like the values) in decreasing order: LSD radix sort, 11-bit digits, passes on
    which every key has the same digit skipped."""
    n = bits.size
    key = np.empty(n, dtype=np.uint32)
    idx = np.empty(n, dtype=np.int64)
    for t in range(n):
        key[t] = ~bits[t]
        idx[t] = t
    key2 = np.empty_like(key)
    idx2 = np.empty_like(idx)
    count = np.empty(2049, dtype=np.int64)
    for p in range(3):
        sh = np.uint32(11 * p)
        count[:] = 0
        for t in range(n):
            count[((key[t] >> sh) & np.uint32(2047)) + 1] += 1
        if count.max() == n:
            continue
        for d in range(2048):
            count[d + 1] += count[d]
        for t in range(n):
            d = (key[t] >> sh) & np.uint32(2047)
            pos = count[d]
            count[d] = pos + 1
            key2[pos] = key[t]
            idx2[pos] = idx[t]
        key, key2 = key2, key
        idx, idx2 = idx2, idx
    return idx


#: Neighbourhood (voxels per axis) searched for a containing ball on isotropic grids.
RIDGE_REACH = 1
#: Largest squared radius (voxel units) covered by the discrete containment table; larger
#: balls fall back to the continuous test.
DISCRETE_TABLE_MAX_K = 160_000


#: Neighbour offset types (sorted absolute components) of the discrete containment test.
_TYPES = np.array([(0, 0, 1), (0, 1, 1), (1, 1, 1), (0, 0, 2), (0, 1, 2), (1, 1, 2),
                   (0, 2, 2), (1, 2, 2), (2, 2, 2)], dtype=np.int64)


@numba.njit(cache=True)
def _containment_table(kmax, types):
    """``M[t, K] = max |p - e_t|^2`` over lattice points ``p`` with ``|p|^2 < K``, for the
    offset types ``e_t`` (by the lattice ball's symmetry under signed axis permutations one
    offset per type covers them all). The lattice ball of squared radius ``K`` about ``x``
    lies in that of ``K'`` about ``x + e`` iff ``M[type(e), K] < K'``."""
    r = int(math.sqrt(kmax)) + 1
    nt = types.shape[0]
    A = np.full((nt, kmax + 2), -1, dtype=np.int64)
    for a in range(-r, r + 1):
        for b in range(-r, r + 1):
            for c in range(-r, r + 1):
                q = a * a + b * b + c * c
                if q > kmax:
                    continue
                for t in range(nt):
                    v = (a - types[t, 0]) ** 2 + (b - types[t, 1]) ** 2 + (c - types[t, 2]) ** 2
                    if v > A[t, q]:
                        A[t, q] = v
    M = np.full((nt, kmax + 2), -1, dtype=np.int64)
    prefix_max(A, M)
    return M


@numba.njit(cache=True)
def prefix_max(A, M):
    """``M[t, K] = max(A[t, :K])`` for ``K >= 1`` (``M[t, 0]`` left as it is): the table
    of :func:`_containment_table` from the per-radius maxima ``A``."""
    for t in range(A.shape[0]):
        run = -1
        for K in range(1, A.shape[1]):
            if A[t, K - 1] > run:
                run = A[t, K - 1]
            M[t, K] = run


@numba.njit(cache=True)
def _type_index(a, b, c):
    x = abs(a)
    y = abs(b)
    z = abs(c)
    # sort ascending
    if x > y:
        x, y = y, x
    if y > z:
        y, z = z, y
    if x > y:
        x, y = y, x
    if z == 1:
        return x + y  # (0,0,1)->0, (0,1,1)->1, (1,1,1)->2
    # z == 2
    if y == 0:
        return 3
    if y == 1:
        return 4 + x  # (0,1,2)->4, (1,1,2)->5
    return 6 + x  # (0,2,2)->6, (1,2,2)->7, (2,2,2)->8


@numba.njit(cache=True, parallel=True)
def _ridge_discrete(idx, K, M, shape, periodic, reach):
    """Mask (over ``idx``) of the lattice balls ``{q : |q - x|^2 < K[x]}`` (isotropic
    voxel units, integer ``K``) not contained in the lattice ball of a neighbour within
    ``reach`` voxels per axis (1: 26 neighbours, 2: 124), by the exact table of
    :func:`_containment_table`; balls too large for the table use the continuous test
    ``sqrt(K_y) >= sqrt(K_x) + |e|``."""
    n0, n1, n2 = shape[0], shape[1], shape[2]
    kmax = M.shape[1] - 2
    keep = np.ones(idx.size, dtype=np.bool_)
    nchunk = 64
    for ch in numba.prange(nchunk):
        t0 = (ch * idx.size) // nchunk
        t1 = ((ch + 1) * idx.size) // nchunk
        for t in range(t0, t1):
            f = idx[t]
            i = f // (n1 * n2)
            j = (f // n2) % n1
            k = f % n2
            kx = int(K[f])
            done = False
            for a in range(-reach, reach + 1):
                if done:
                    break
                ii = i + a
                if periodic:
                    ii %= n0
                elif ii < 0 or ii >= n0:
                    continue
                for b in range(-reach, reach + 1):
                    if done:
                        break
                    jj = j + b
                    if periodic:
                        jj %= n1
                    elif jj < 0 or jj >= n1:
                        continue
                    base = (ii * n1 + jj) * n2
                    for c in range(-reach, reach + 1):
                        if a == 0 and b == 0 and c == 0:
                            continue
                        kk = k + c
                        if periodic:
                            kk %= n2
                        elif kk < 0 or kk >= n2:
                            continue
                        ky = int(K[base + kk])
                        if ky <= kx:
                            continue
                        if kx <= kmax:
                            inside = M[_type_index(a, b, c), kx] < ky
                        else:
                            inside = math.sqrt(ky) >= math.sqrt(kx) + math.sqrt(
                                a * a + b * b + c * c) - 1e-9
                        if inside:
                            keep[t] = False
                            done = True
                            break
    return keep


@numba.njit(cache=True)
def _offset_types():
    """``tix[a + 1, b + 1, c + 1]``: row of :data:`_TYPES` for the neighbour offset
    ``(a, b, c)``."""
    tix = np.zeros((3, 3, 3), dtype=np.int64)
    for a in range(-1, 2):
        for b in range(-1, 2):
            for c in range(-1, 2):
                if a != 0 or b != 0 or c != 0:
                    tix[a + 1, b + 1, c + 1] = _type_index(a, b, c)
    return tix


@numba.njit(cache=True, parallel=True)
def _int_max(K, nchunks):
    """``K.max()`` as an int when every value of ``K`` is a whole number below 2**24
    (exact in float32), else -1."""
    n0, n1, n2 = K.shape
    tops = np.zeros(nchunks, dtype=np.int64)
    for ch in numba.prange(nchunks):
        t = 0
        for i in range((ch * n0) // nchunks, ((ch + 1) * n0) // nchunks):
            for j in range(n1):
                for k in range(n2):
                    x = K[i, j, k]
                    if x != math.floor(x) or x >= 16777216.0:
                        t = -(1 << 40)
                    elif x > t:
                        t = int(x)
        tops[ch] = t
    return max(tops.min(), -1) if tops.min() < 0 else tops.max()


@numba.njit(cache=True, parallel=True)
def _ridge_grid(K, MT, tix, periodic, nchunks):
    """Distance-ridge flags on the grid for isotropic voxels (integer squared distances
    ``K``, 0 off the phase): ``flag[q] = 1`` when the lattice ball ``{p : |p - q|^2 < K[q]}``
    lies in no 26-neighbour's lattice ball (exact test by the table ``MT[K, type]``
    (:func:`_containment_table`, transposed); balls beyond the table use the continuous
    test). Also returns, per chunk of x-planes, the count of flagged voxels per ``K``
    (``hist[chunk, K]``, K up to ``K.max()``)."""
    n0, n1, n2 = K.shape
    kmax = MT.shape[0] - 2
    flag = np.zeros((n0, n1, n2), dtype=np.uint8)
    top = _int_max(K, nchunks)
    hist = np.zeros((nchunks, max(top, 0) + 1), dtype=np.int64)
    if top < 0:
        return flag, hist
    for ch in numba.prange(nchunks):
        for i in range((ch * n0) // nchunks, ((ch + 1) * n0) // nchunks):
            for j in range(n1):
                for k in range(n2):
                    kx = int(K[i, j, k])
                    if kx == 0:
                        continue
                    inside = False
                    for a in range(-1, 2):
                        ii = i + a
                        if periodic:
                            ii %= n0
                        elif ii < 0 or ii >= n0:
                            continue
                        for b in range(-1, 2):
                            jj = j + b
                            if periodic:
                                jj %= n1
                            elif jj < 0 or jj >= n1:
                                continue
                            for c in range(-1, 2):
                                kk = k + c
                                if periodic:
                                    kk %= n2
                                elif kk < 0 or kk >= n2:
                                    continue
                                ky = int(K[ii, jj, kk])
                                if ky <= kx:
                                    continue
                                t = tix[a + 1, b + 1, c + 1]
                                if kx <= kmax:
                                    inside = MT[kx, t] < ky
                                else:
                                    inside = math.sqrt(ky) >= math.sqrt(kx) + math.sqrt(
                                        a * a + b * b + c * c) - 1e-9
                                if inside:
                                    break
                            if inside:
                                break
                        if inside:
                            break
                    if not inside:
                        flag[i, j, k] = 1
                        hist[ch, kx] += 1
    return flag, hist


@numba.njit(cache=True, inline="always")
def _bit_range(lo, hi):
    """Bits ``lo..hi`` of a uint64 (``0 <= lo``, ``hi <= 63``; none if ``lo > hi``)."""
    if lo > hi:
        return np.uint64(0)
    return (_ONES >> np.uint64(63 - hi)) & (_ONES << np.uint64(lo))


@numba.njit(cache=True)
def _plane_mask(K, i, j, k, kx, periodic, isq):
    """Planes ``i + di`` of the lattice ball ``|p - (i, j, k)|^2 < kx`` that no face or
    in-plane neighbour's ball already covers: bit ``di + ri`` set (``ri = isqrt(kx - 1)
    <= 31``; all bits when ``ri > 31``).

    The disc of plane ``di`` (squared radius ``t = kx - di^2``) lies in the disc of the
    neighbour ``y = x + (a, b, c)`` with ``K[y] > kx`` in that plane (squared radius
    ``s = K[y] - (di - a)^2``, centre offset ``d^2 = b^2 + c^2``) when
    ``sqrt(s) >= sqrt(t) + d``, i.e. ``u = s - t - d^2 >= 0`` and ``u^2 >= 4 d^2 t``
    (whole numbers: exact). That plane of ball x then offers only voxels that a ball of
    larger ``K`` holds (y, or by the ridge a larger ball holding y), so skipping it leaves
    every voxel's maximum unchanged. Tested neighbours: ``(+-1, 0, 0)`` (``d = 0``: the
    covered planes are ``a di >= -(K[y] - kx - 1) / 2``) and the eight with ``a = 0``
    (``u`` constant: covered where ``4 d^2 di^2 >= 4 d^2 kx - u^2``)."""
    n0, n1, n2 = K.shape
    ri = isq[kx - 1]
    if ri > 31:
        return _ONES
    pm = _bit_range(0, 2 * ri)
    for a in (-1, 1):
        ii = i + a
        if periodic:
            ii %= n0
        elif ii < 0 or ii >= n0:
            continue
        g = int(K[ii, j, k]) - kx - 1
        if g < 0:
            continue
        # covered: a * di >= -g / 2, i.e. a * di >= -(g // 2)
        m0 = g // 2
        if a == 1:
            pm &= ~_bit_range(max(-m0, -ri) + ri, 2 * ri)
        else:
            pm &= ~_bit_range(0, min(m0, ri) + ri)
    for b in range(-1, 2):
        jj = j + b
        if periodic:
            jj %= n1
        elif jj < 0 or jj >= n1:
            continue
        for c in range(-1, 2):
            if b == 0 and c == 0:
                continue
            kk = k + c
            if periodic:
                kk %= n2
            elif kk < 0 or kk >= n2:
                continue
            d2 = b * b + c * c
            u = int(K[i, jj, kk]) - kx - d2
            if u < 0:
                continue
            T = 4 * d2 * kx - u * u  # covered where 4 d2 di^2 >= T
            if T <= 0:
                return np.uint64(0)
            m0 = int(math.sqrt(T / (4.0 * d2)))
            while m0 > 0 and 4 * d2 * m0 * m0 >= T:
                m0 -= 1
            while 4 * d2 * m0 * m0 < T:
                m0 += 1
            if m0 <= ri:
                pm &= ~(_bit_range(0, ri - m0) | _bit_range(ri + m0, 2 * ri))
    return pm


@numba.njit(cache=True, parallel=True)
def _gather_ridge(K, flag, hist, vk, nchunks, periodic, isq):
    """The flagged balls in order of decreasing ``K`` (counting sort; within one ``K`` in
    grid order): centres, squared radii, values ``vk[K]`` and plane masks
    (:func:`_plane_mask`); balls with ``vk <= 0`` or no plane left are left out (their
    slots get a zero mask)."""
    nch, nk = hist.shape
    start = np.zeros((nch, nk), dtype=np.int64)
    pos = 0
    for kx in range(nk - 1, 0, -1):
        if vk[kx] <= 0:
            continue
        for ch in range(nch):
            start[ch, kx] = pos
            pos += hist[ch, kx]
    ci = np.empty(pos, dtype=np.int64)
    cj = np.empty(pos, dtype=np.int64)
    ck = np.empty(pos, dtype=np.int64)
    rr = np.empty(pos, dtype=np.float64)
    val = np.empty(pos, dtype=np.float32)
    pmask = np.empty(pos, dtype=np.uint64)
    n0, n1, n2 = K.shape
    for ch in numba.prange(nchunks):
        for i in range((ch * n0) // nchunks, ((ch + 1) * n0) // nchunks):
            for j in range(n1):
                for k in range(n2):
                    if flag[i, j, k] == 0:
                        continue
                    kx = int(K[i, j, k])
                    if vk[kx] <= 0:
                        continue
                    p = start[ch, kx]
                    start[ch, kx] = p + 1
                    ci[p] = i
                    cj[p] = j
                    ck[p] = k
                    rr[p] = kx
                    val[p] = vk[kx]
                    pmask[p] = _plane_mask(K, i, j, k, kx, periodic, isq)
    return ci, cj, ck, rr, val, pmask


def _isotropic_integer(rel, r2):
    return bool(np.all(rel == 1.0)) and bool(np.all(np.floor(r2) == r2))


def _isqrt_table(n):
    """``isq[s] = isqrt(s)`` for ``0 <= s < n``, and ``isq[-1] = -1`` (integer spans)."""
    isq = np.floor(np.sqrt(np.arange(n, dtype=np.float64))).astype(np.int64)
    return np.append(isq, -1)


def _paint_sorted(ci, cj, ck, rr, vals, rel, periodic, mask, out, exact, pmask=None):
    """Zero ``out`` and paint the balls (int64 centres, float64 squared radii in internal
    units, float32 values), given in order of decreasing value, first cover wins
    (:func:`_paint_first`). ``exact``: unit voxels and whole squared radii. ``pmask``:
    planes to paint per ball (:func:`_plane_mask`), default all."""
    if pmask is None:
        pmask = np.full(ci.size, _ONES, dtype=np.uint64)
    if exact:
        isq = _isqrt_table(int(rr.max()) + 1 if rr.size else 2)
    else:
        isq = np.full(1, -1, dtype=np.int64)
    rel64 = np.asarray(rel, dtype=np.float64)
    ri = _half_axis0(rr, float(rel64[0]), isq, exact)
    U, S = _unpainted_bits(np.ascontiguousarray(mask, dtype=np.bool_))
    out.fill(0)
    n0 = out.shape[0]
    nslabs = max(1, min(n0, 16 * numba.get_num_threads()))
    with numba.parallel_chunksize(1):
        _paint_first(ci, cj, ck, ri, rr, vals, pmask, rel64, out, U, S, bool(periodic),
                     nslabs, isq, exact)


def _paint_balls(shape, flat_idx, r2, values, rel, periodic, r_map, out, mask):
    """Paint the balls (centres ``flat_idx``, squared radii ``r2``, ``values``) into
    ``out`` (float32, zeroed here; each voxel gets the largest value of the balls holding
    it, 0 if none) after dropping balls contained in a neighbour's ball. ``r_map`` is a
    flat float32 scratch array of the grid size (overwritten); ``out`` may share its
    memory. ``mask`` (bool, the grid's shape) holds every voxel a ball can hold."""
    r_map[:] = 0
    exact = _isotropic_integer(np.asarray(rel), r2)
    if exact:
        # exact lattice-ball containment (isotropic voxels, integer squared distances)
        r_map[flat_idx] = r2
        kmax = int(min(float(r2.max()) if r2.size else 1.0, DISCRETE_TABLE_MAX_K))
        M = _containment_table(max(kmax, 1), _TYPES)
        keep = _ridge_discrete(flat_idx, r_map, M, np.asarray(shape, dtype=np.int64),
                               bool(periodic), RIDGE_REACH)
    else:
        r_map[flat_idx] = np.sqrt(r2)
        keep = _ridge(flat_idx, r_map, np.asarray(rel, dtype=np.float64),
                      np.asarray(shape, dtype=np.int64), bool(periodic))
    vals = np.asarray(values, dtype=np.float32)
    keep &= vals > 0  # max(0, v) = 0: a ball of non-positive value changes nothing
    sel = flat_idx[keep]
    vals = vals[keep]
    order = _argsort_desc(vals.view(np.uint32))
    sel = sel[order]
    vals = vals[order]
    rr = np.asarray(r2, dtype=np.float64)[keep][order]
    if not exact:
        # squared radii rounded to float32: a voxel at exactly the wall distance (a tie,
        # common on anisotropic grids) must stay outside the open ball
        rr *= 1.0 - 1e-6
    i, j, k = np.unravel_index(sel, shape)
    _paint_sorted(i.astype(np.int64), j.astype(np.int64), k.astype(np.int64), rr, vals,
                  rel, periodic, mask, out, exact)
    return out, int(sel.size)


# ====================================================== sub-voxel balls (kernels)
#: Weight of ``|z|_1`` in the objective of :func:`_lp_maxmin` (makes the centre unique
#: among those with the largest least distance: the one nearest the candidate).
LP_TIE = 1e-6


@numba.njit(cache=True)
def _lp_maxmin(Nn, c, k, r, T, rhs, obj, basis, nonb, out):
    """Largest ``t`` with ``Nn[i] . z + t <= c[i]`` for the ``k`` planes and ``|z_j| <=
    r[j]``: the centre of the largest ball about which every half-space holds (a linear
    programme in ``(z, t)``), and among such centres the one of least ``|z|_1`` (the
    objective is ``t - LP_TIE |z|_1``, ``z = p - q`` with ``0 <= p, q <= r``). Primal
    simplex on a Tucker tableau from ``z = 0`` (``t`` shifted by the least ``c``, so every
    right-hand side is non-negative and the slack basis is feasible), Bland's rule (no
    cycling). Writes ``z`` to ``out[:3]`` and returns ``t``. Scratch arrays: ``T`` (k + 6,
    7), ``rhs`` (k + 6), ``obj`` (7), ``basis`` (k + 6), ``nonb`` (7). Variables: 0-2
    ``p``, 3-5 ``q``, 6 ``s = t - t0``; slacks from 7."""
    m = k + 6
    t0 = np.inf
    for i in range(k):
        if c[i] < t0:
            t0 = c[i]
    for i in range(k):
        for j in range(3):
            T[i, j] = Nn[i, j]
            T[i, 3 + j] = -Nn[i, j]
        T[i, 6] = 1.0
        rhs[i] = c[i] - t0
        basis[i] = 7 + i
    for j in range(6):
        row = k + j
        for q in range(7):
            T[row, q] = 0.0
        T[row, j] = 1.0
        rhs[row] = r[j % 3]
        basis[row] = 7 + row
    for j in range(6):
        obj[j] = -LP_TIE
        nonb[j] = j
    obj[6] = 1.0
    nonb[6] = 6
    for _ in range(1000):
        col = -1
        cid = 1 << 30
        for j in range(7):
            if obj[j] > 1e-13 and nonb[j] < cid:
                col = j
                cid = nonb[j]
        if col < 0:
            break
        row = -1
        best = np.inf
        bid = 1 << 30
        for i in range(m):
            a = T[i, col]
            if a > 1e-12:
                q = rhs[i] / a
                if q < best - 1e-13 or (q <= best + 1e-13 and basis[i] < bid):
                    best = q
                    row = i
                    bid = basis[i]
        if row < 0:
            break
        p = T[row, col]
        for j in range(7):
            if j != col:
                T[row, j] /= p
        T[row, col] = 1.0 / p
        rhs[row] /= p
        for i in range(m):
            if i == row:
                continue
            f = T[i, col]
            if f == 0.0:
                continue
            for j in range(7):
                if j != col:
                    T[i, j] -= f * T[row, j]
            T[i, col] = -f / p
            rhs[i] -= f * rhs[row]
            if rhs[i] < 0.0:
                rhs[i] = 0.0
        f = obj[col]
        for j in range(7):
            if j != col:
                obj[j] -= f * T[row, j]
        obj[col] = -f / p
        tmp = basis[row]
        basis[row] = nonb[col]
        nonb[col] = tmp
    val = np.zeros(7)
    for i in range(m):
        if basis[i] < 7:
            val[basis[i]] = rhs[i]
    for j in range(3):
        out[j] = val[j] - val[3 + j]
    out[3] = val[6]
    return val[6] + t0


@numba.njit(cache=True, parallel=True)
def _refine_voxel(mask, F, d2, cand, rel, periodic, box, tau, gscale, thin, hview, cone, zc,
                  rho2, A, Dx, nchunk):
    """Sub-voxel ball of each candidate centre (the voxel path of :func:`local_thickness`,
    definitions in the module docstring). Per candidate ``x`` (flat index): the wall
    planes at the features of its 27-neighbourhood (:func:`wall_at`), the linear
    programme for the largest ball about which all of them hold within ``box`` voxels
    of ``x``, then the bracket estimate of the wall distance at that centre and at
    ``x``. Writes the centre offset ``zc`` (internal units), the squared coverage
    radius ``rho2`` (0: no refined ball, for candidates thinned out by ``thin``), and the
    estimated radii ``A`` (refined ball) and ``Dx`` (ball at ``x``)."""
    n0, n1, n2 = mask.shape
    nc = cand.size
    r = np.empty(3)
    for a in range(3):
        r[a] = box * rel[a]
    for ch in numba.prange(nchunk):
        Nn = np.empty((27, 3))
        Bp = np.empty((27, 3))
        Bi = np.empty((27, 3), np.int64)
        c = np.empty(27)
        gap = np.empty(27)
        ov = np.empty(27)
        cm = np.empty(27, np.uint32)
        seen = np.empty(27, np.uint32)
        T = np.empty((33, 7))
        rhs = np.empty(33)
        obj = np.empty(7)
        basis = np.empty(33, np.int64)
        nonb = np.empty(7, np.int64)
        sol = np.empty(4)
        for t in range(ch * nc // nchunk, (ch + 1) * nc // nchunk):
            f = cand[t]
            i = f // (n1 * n2)
            j = (f // n2) % n1
            k = f % n2
            dx_ = math.sqrt(d2[i, j, k])
            refine = True
            npl = 0
            for a in range(-1, 2):
                for b in range(-1, 2):
                    for e in range(-1, 2):
                        ii = i + a
                        jj = j + b
                        kk = k + e
                        if periodic:
                            ii %= n0
                            jj %= n1
                            kk %= n2
                        elif ii < 0 or jj < 0 or kk < 0 or ii >= n0 or jj >= n1 or kk >= n2:
                            continue
                        if not mask[ii, jj, kk]:
                            continue
                        f0 = F[ii, jj, kk, 0]
                        if f0 == NONE:
                            continue
                        if thin >= 0.0 and (a != 0 or b != 0 or e != 0):
                            if math.sqrt(d2[ii, jj, kk]) - math.sqrt(
                                    (a * rel[0]) ** 2 + (b * rel[1]) ** 2 + (e * rel[2]) ** 2) \
                                    >= dx_ - thin:
                                refine = False
                        f1 = F[ii, jj, kk, 1]
                        f2 = F[ii, jj, kk, 2]
                        bi = i + a + f0
                        bj = j + b + f1
                        bk = k + e + f2
                        nx, ny, nz, g = wall_at(F, bi, bj, bk, rel, periodic, gscale)
                        # the viewing direction (y to its feature) and the wall normal at
                        # the feature: the normal if within the angle one voxel edge of
                        # lateral offset of the feature allows, else the direction that
                        # far from the viewing direction towards the normal
                        v0 = f0 * rel[0]
                        v1 = f1 * rel[1]
                        v2 = f2 * rel[2]
                        Lv = math.sqrt(v0 * v0 + v1 * v1 + v2 * v2)
                        v0 /= Lv
                        v1 /= Lv
                        v2 /= Lv
                        cth = min(1.0, max(-1.0, v0 * nx + v1 * ny + v2 * nz))
                        hyp = math.sqrt(Lv * Lv + hview * hview)
                        cmax = Lv / hyp  # cos and sin of the largest angle, atan(hview/Lv)
                        if cth < cmax:
                            # the unit vector at that angle from v towards n:
                            # cos(thmax) v + sin(thmax) (n - cth v) / |n - cth v|
                            ux = nx - cth * v0
                            uy = ny - cth * v1
                            uz = nz - cth * v2
                            st = math.sqrt(ux * ux + uy * uy + uz * uz)
                            if st > 1e-12:
                                smax = hview / hyp
                                nx = cmax * v0 + smax * ux / st
                                ny = cmax * v1 + smax * uy / st
                                nz = cmax * v2 + smax * uz / st
                            else:
                                nx, ny, nz = v0, v1, v2
                            g = -1.0  # measured along this direction when needed
                        dup = False
                        for q in range(npl):
                            if Bi[q, 0] == bi and Bi[q, 1] == bj and Bi[q, 2] == bk \
                                    and Nn[q, 0] == nx and Nn[q, 1] == ny and Nn[q, 2] == nz:
                                dup = True
                                break
                        if dup:
                            continue
                        Nn[npl, 0] = nx
                        Nn[npl, 1] = ny
                        Nn[npl, 2] = nz
                        gap[npl] = g
                        Bi[npl, 0] = bi
                        Bi[npl, 1] = bj
                        Bi[npl, 2] = bk
                        Bp[npl, 0] = (bi - i) * rel[0]
                        Bp[npl, 1] = (bj - j) * rel[1]
                        Bp[npl, 2] = (bk - k) * rel[2]
                        c[npl] = nx * Bp[npl, 0] + ny * Bp[npl, 1] + nz * Bp[npl, 2]
                        npl += 1
            z0 = 0.0
            z1 = 0.0
            z2 = 0.0
            if refine:
                # only planes that can bind somewhere in the box go to the programme
                # (moved to the front; the bracket below uses them all)
                thi = np.inf
                for q in range(npl):
                    ext = abs(Nn[q, 0]) * r[0] + abs(Nn[q, 1]) * r[1] + abs(Nn[q, 2]) * r[2]
                    ov[q] = ext
                    if c[q] + ext < thi:
                        thi = c[q] + ext
                nk = 0
                for q in range(npl):
                    if c[q] - ov[q] <= thi:
                        if q != nk:
                            for a in range(3):
                                Nn[nk, a], Nn[q, a] = Nn[q, a], Nn[nk, a]
                                Bp[nk, a], Bp[q, a] = Bp[q, a], Bp[nk, a]
                                Bi[nk, a], Bi[q, a] = Bi[q, a], Bi[nk, a]
                            c[nk], c[q] = c[q], c[nk]
                            gap[nk], gap[q] = gap[q], gap[nk]
                        nk += 1
                _lp_maxmin(Nn, c, nk, r, T, rhs, obj, basis, nonb, sol)
                z0, z1, z2 = sol[0], sol[1], sol[2]
                best = np.inf
                for q in range(npl):
                    d0 = Bp[q, 0] - z0
                    d1 = Bp[q, 1] - z1
                    d2_ = Bp[q, 2] - z2
                    dd = d0 * d0 + d1 * d1 + d2_ * d2_
                    if dd < best:
                        best = dd
                rho2[t] = best
            else:
                rho2[t] = 0.0
            zc[t, 0] = z0
            zc[t, 1] = z1
            zc[t, 2] = z2
            # bracket at the refined centre (pass 0) and at x (pass 1): for each wall
            # direction (the planes whose normals lie within ``cone`` of one plane's), the
            # wall lies between the nearest plane through a non-phase centre and the
            # furthest phase centre next to those planes, both measured along each
            # plane's normal; the estimate is the least of the brackets' midpoints
            # the groups: bit u of cm[q] set when plane u's normal lies within the cone
            # of plane q's (the same for both passes)
            for q in range(npl):
                cm[q] = np.uint32(1) << np.uint32(q)
            for q in range(npl):
                for u in range(q + 1, npl):
                    if (Nn[q, 0] * Nn[u, 0] + Nn[q, 1] * Nn[u, 1]
                            + Nn[q, 2] * Nn[u, 2]) >= cone:
                        cm[q] |= np.uint32(1) << np.uint32(u)
                        cm[u] |= np.uint32(1) << np.uint32(q)
            for pass_ in range(2):
                if pass_ == 0 and not refine:
                    A[t] = 0.0
                    continue
                lo = np.inf
                for q in range(npl):
                    o = c[q] if pass_ == 1 else c[q] - (Nn[q, 0] * z0 + Nn[q, 1] * z1
                                                        + Nn[q, 2] * z2)
                    ov[q] = o
                    if o < lo:
                        lo = o
                est = np.inf
                nseen = 0
                for q in range(npl):
                    if ov[q] > lo + tau:
                        continue
                    grp = cm[q]
                    dup = False
                    for u in range(nseen):
                        if seen[u] == grp:
                            dup = True
                            break
                    if dup:  # same group, same bracket
                        continue
                    seen[nseen] = grp
                    nseen += 1
                    lq = np.inf
                    bits = grp
                    while bits != 0:
                        u = int(_tz(bits))
                        bits &= bits - np.uint32(1)
                        if ov[u] < lq:
                            lq = ov[u]
                    hq = -np.inf
                    bits = grp
                    while bits != 0:
                        u = int(_tz(bits))
                        bits &= bits - np.uint32(1)
                        if ov[u] > lq + tau or ov[u] <= hq:
                            continue
                        if gap[u] < 0.0:
                            gap[u] = gap_along(mask, Bi[u, 0], Bi[u, 1], Bi[u, 2], Nn[u, 0],
                                               Nn[u, 1], Nn[u, 2], rel, periodic)
                        if ov[u] - gap[u] > hq:
                            hq = ov[u] - gap[u]
                    if hq > lq:
                        hq = lq
                    mid = 0.5 * (lq + hq)
                    if mid < est:
                        est = mid
                if pass_ == 0:
                    A[t] = est
                else:
                    # the wall crosses the segment from x to its nearest non-phase
                    # centre: no nearer than half way along it when the planes (some
                    # seen from a neighbour, behind x) say less
                    Dx[t] = min(max(est, 0.5 * dx_), dx_)




@numba.njit(cache=True, inline="always")
def _prim_foot(kind, tri, nrm, half, p, px, py, pz):
    if kind == 0:
        return closest_on_prism(px, py, pz, tri[p], nrm[p], half[p])
    return closest_on_triangle(px, py, pz, tri[p, 0], tri[p, 1], tri[p, 2])


@numba.njit(cache=True)
def _exact_walls(kind, tri, nrm, half, prim, shf, npr, dom, dpar, vpl, nvp, xc, z0, z1, z2,
                 Nn, c, dist, cap):
    """Wall distance at ``xc + z`` (nm) over the gathered walls (primitives ``prim`` with
    image shifts ``shf``, the domain, the voxel planes ``vpl``), and, when ``cap > 0``,
    the linearised walls as half-spaces ``Nn . z' + t <= c`` (at most ``cap``, nearest
    first). Returns (distance, number of half-spaces)."""
    px = xc[0] + z0
    py = xc[1] + z1
    pz = xc[2] + z2
    nw = 0
    best = np.inf
    for q in range(npr):
        p = prim[q]
        sx = px - shf[q, 0]
        sy = py - shf[q, 1]
        sz = pz - shf[q, 2]
        fx, fy, fz = _prim_foot(kind, tri, nrm, half, p, sx, sy, sz)
        ux, uy, uz = sx - fx, sy - fy, sz - fz
        d = math.sqrt(ux * ux + uy * uy + uz * uz)
        if d < best:
            best = d
        if cap > 0 and d > 0.0:
            dist[nw] = d
            Nn[nw, 0] = -ux / d
            Nn[nw, 1] = -uy / d
            Nn[nw, 2] = -uz / d
            # D(z') ~ u . (xc + z' - f - shift) = d + u . (z' - z)
            c[nw] = d - (ux * z0 + uy * z1 + uz * z2) / d
            nw += 1
    if dom == 1:  # sphere: D = R - |p - C|
        ux, uy, uz = px - dpar[0], py - dpar[1], pz - dpar[2]
        L = math.sqrt(ux * ux + uy * uy + uz * uz)
        d = dpar[3] - L
        if d < best:
            best = d
        if cap > 0 and L > 0.0:
            dist[nw] = d
            Nn[nw, 0] = ux / L
            Nn[nw, 1] = uy / L
            Nn[nw, 2] = uz / L
            c[nw] = d + (ux * z0 + uy * z1 + uz * z2) / L
            nw += 1
    elif dom == 2:  # box faces
        for a in range(3):
            pa = px if a == 0 else (py if a == 1 else pz)
            za = z0 if a == 0 else (z1 if a == 1 else z2)
            for side in range(2):
                d = pa - dpar[a] if side == 0 else dpar[3 + a] - pa
                if d < best:
                    best = d
                if cap > 0:
                    dist[nw] = d
                    for b in range(3):
                        Nn[nw, b] = 0.0
                    Nn[nw, a] = -1.0 if side == 0 else 1.0
                    c[nw] = d - za if side == 0 else d + za
                    nw += 1
    for q in range(nvp):  # voxel planes: D = n . (w - z')
        d = vpl[q, 3] - (vpl[q, 0] * z0 + vpl[q, 1] * z1 + vpl[q, 2] * z2)
        if d < best:
            best = d
        if cap > 0:
            dist[nw] = d
            Nn[nw, 0] = vpl[q, 0]
            Nn[nw, 1] = vpl[q, 1]
            Nn[nw, 2] = vpl[q, 2]
            c[nw] = vpl[q, 3]
            nw += 1
    if cap > 0 and nw > cap:  # keep the nearest ``cap`` (partial selection)
        for a in range(cap):
            mi = a
            for b in range(a + 1, nw):
                if dist[b] < dist[mi]:
                    mi = b
            if mi != a:
                dist[a], dist[mi] = dist[mi], dist[a]
                c[a], c[mi] = c[mi], c[a]
                for e in range(3):
                    Nn[a, e], Nn[mi, e] = Nn[mi, e], Nn[a, e]
        nw = cap
    return best, nw


@numba.njit(cache=True, parallel=True)
def _refine_exact(mask, labels, solid, F, cand, sp, org, periodic, box, kind, tri, nrm, half,
                  cstart, citems, clo, csize, cdims, dom, dpar, zc, A, Dx, nchunk, niter,
                  maxprim, rel, unit, gscale):
    """Exact path of :func:`exact_local_thickness`: per candidate centre ``x``, the
    walls near the features of its 27-neighbourhood (prisms or triangles from the cell
    lists, the domain wall, voxel planes for non-pore voxels that are neither solid nor
    outside), the refined centre by linear programmes on the walls linearised at the
    current centre (``niter`` rounds within ``box`` voxels of ``x``), the exact wall
    distance there (``A``) and at ``x`` (``Dx``), nm. ``zc`` gets the centre offset
    (nm)."""
    n0, n1, n2 = mask.shape
    nc = cand.size
    r = np.empty(3)
    for a in range(3):
        r[a] = box * sp[a]
    for ch in numba.prange(nchunk):
        prim = np.empty(maxprim, np.int64)
        shf = np.empty((maxprim, 3))
        vpl = np.empty((27, 4))
        Nn = np.empty((maxprim + 34, 3))
        c = np.empty(maxprim + 34)
        dist = np.empty(maxprim + 34)
        T = np.empty((maxprim + 40, 7))
        rhs = np.empty(maxprim + 40)
        obj = np.empty(7)
        basis = np.empty(maxprim + 40, np.int64)
        nonb = np.empty(7, np.int64)
        sol = np.empty(4)
        xc = np.empty(3)
        for t in range(ch * nc // nchunk, (ch + 1) * nc // nchunk):
            f = cand[t]
            i = f // (n1 * n2)
            j = (f // n2) % n1
            k = f % n2
            xc[0] = org[0] + (i + 0.5) * sp[0]
            xc[1] = org[1] + (j + 0.5) * sp[1]
            xc[2] = org[2] + (k + 0.5) * sp[2]
            npr = 0
            nvp = 0
            for a in range(-1, 2):
                for b in range(-1, 2):
                    for e in range(-1, 2):
                        ii = i + a
                        jj = j + b
                        kk = k + e
                        if periodic:
                            ii %= n0
                            jj %= n1
                            kk %= n2
                        elif ii < 0 or jj < 0 or kk < 0 or ii >= n0 or jj >= n1 or kk >= n2:
                            continue
                        if not mask[ii, jj, kk]:
                            continue
                        f0 = F[ii, jj, kk, 0]
                        if f0 == NONE:
                            continue
                        f1 = F[ii, jj, kk, 1]
                        f2 = F[ii, jj, kk, 2]
                        bi = i + a + f0
                        bj = j + b + f1
                        bk = k + e + f2
                        inside = True
                        if periodic:
                            wi, wj, wk = bi % n0, bj % n1, bk % n2
                        else:
                            wi, wj, wk = bi, bj, bk
                            inside = 0 <= bi < n0 and 0 <= bj < n1 and 0 <= bk < n2
                        if inside:
                            # primitives listed in the cell of the feature's centre (also
                            # next to other walls: a prism may be nearer than they are)
                            bx = org[0] + (wi + 0.5) * sp[0]
                            by = org[1] + (wj + 0.5) * sp[1]
                            bz = org[2] + (wk + 0.5) * sp[2]
                            ci_ = min(max(int((bx - clo[0]) / csize), 0), cdims[0] - 1)
                            cj_ = min(max(int((by - clo[1]) / csize), 0), cdims[1] - 1)
                            ck_ = min(max(int((bz - clo[2]) / csize), 0), cdims[2] - 1)
                            cell = (ci_ * cdims[1] + cj_) * cdims[2] + ck_
                            s0 = (bi - wi) * sp[0]
                            s1 = (bj - wj) * sp[1]
                            s2 = (bk - wk) * sp[2]
                            for u in range(cstart[cell], cstart[cell + 1]):
                                p = citems[u]
                                seen = False
                                for q in range(npr):
                                    if prim[q] == p and shf[q, 0] == s0 and shf[q, 1] == s1 \
                                            and shf[q, 2] == s2:
                                        seen = True
                                        break
                                if seen:
                                    continue
                                prim[npr] = p
                                shf[npr, 0] = s0
                                shf[npr, 1] = s1
                                shf[npr, 2] = s2
                                npr += 1
                        if inside and labels[wi, wj, wk] != solid and labels[wi, wj, wk] != 0:
                            # a wall the geometry does not give (e.g. interlayer): the
                            # voxel estimate, a plane midway between the feature and the
                            # phase centre nearest the wall along the normal
                            nx, ny, nz, g = wall_at(F, bi, bj, bk, rel, periodic, gscale)
                            g *= unit
                            wx = (a + f0) * sp[0] - 0.5 * g * nx
                            wy = (b + f1) * sp[1] - 0.5 * g * ny
                            wz = (e + f2) * sp[2] - 0.5 * g * nz
                            vpl[nvp, 0] = nx
                            vpl[nvp, 1] = ny
                            vpl[nvp, 2] = nz
                            vpl[nvp, 3] = nx * wx + ny * wy + nz * wz
                            nvp += 1
            z0 = 0.0
            z1 = 0.0
            z2 = 0.0
            d0, _ = _exact_walls(kind, tri, nrm, half, prim, shf, npr, dom, dpar, vpl, nvp,
                                 xc, 0.0, 0.0, 0.0, Nn, c, dist, 0)
            for _ in range(niter):
                _, nw = _exact_walls(kind, tri, nrm, half, prim, shf, npr, dom, dpar, vpl,
                                     nvp, xc, z0, z1, z2, Nn, c, dist, maxprim + 34)
                if nw == 0:
                    break
                _lp_maxmin(Nn, c, nw, r, T, rhs, obj, basis, nonb, sol)
                step = abs(sol[0] - z0) + abs(sol[1] - z1) + abs(sol[2] - z2)
                z0, z1, z2 = sol[0], sol[1], sol[2]
                if step < 1e-7 * (sp[0] + sp[1] + sp[2]):
                    break
            da, _ = _exact_walls(kind, tri, nrm, half, prim, shf, npr, dom, dpar, vpl, nvp,
                                 xc, z0, z1, z2, Nn, c, dist, 0)
            if not da > d0:
                da = d0
                z0 = 0.0
                z1 = 0.0
                z2 = 0.0
            zc[t, 0] = z0
            zc[t, 1] = z1
            zc[t, 2] = z2
            A[t] = da
            Dx[t] = d0


@numba.njit(cache=True, inline="always")
def _span(c, rem, step):
    """Integers ``q`` with ``(step (q - c))^2 < rem`` (``rem > 0``): ``(lo, hi)``, empty
    when ``lo > hi``."""
    s = math.sqrt(rem) / step
    lo = int(math.ceil(c - s))
    hi = int(math.floor(c + s))
    # one rounding step either way at most
    if (step * (lo - c)) ** 2 >= rem:
        lo += 1
    elif (step * (lo - 1 - c)) ** 2 < rem:
        lo -= 1
    if (step * (hi - c)) ** 2 >= rem:
        hi -= 1
    elif (step * (hi + 1 - c)) ** 2 < rem:
        hi += 1
    return lo, hi


@numba.njit(cache=True, inline="always")
def _fold_span(lo, hi, n, periodic):
    """The index range ``[lo, hi]`` on an axis of ``n`` voxels, clipped (non-periodic) or
    folded onto ``[0, n)`` (periodic) as at most two ranges ``(a0, b0, a1, b1)``."""
    if not periodic:
        return max(lo, 0), min(hi, n - 1), 0, -1
    if hi < lo:
        return 0, -1, 0, -1
    if hi - lo + 1 >= n:
        return 0, n - 1, 0, -1
    a = lo % n
    b = a + (hi - lo)
    if b < n:
        return a, b, 0, -1
    return a, n - 1, 0, b - n


@numba.njit(cache=True, inline="always")
def _paint_row_f(U, S, out, i, j, rem, cz, v, rel2, periodic):
    if rem <= 0.0:
        return
    klo, khi = _span(cz, rem, rel2)
    if klo > khi:
        return
    a0, b0, a1, b1 = _fold_span(klo, khi, out.shape[2], periodic)
    _take_span(U, S, out, i, j, a0, b0, v)
    _take_span(U, S, out, i, j, a1, b1, v)


@numba.njit(cache=True, inline="always")
def _paint_plane_f(U, S, out, i, dx2, rr, cy, cz, v, rel, periodic):
    """First-cover painting of the disc ``dx2 + rel1^2 (j - cy)^2 + rel2^2 (k - cz)^2 <
    rr`` of plane ``i`` (a float centre); rows without an unpainted voxel in the disc's
    bounding box are skipped by the summary ``S``."""
    n1 = out.shape[1]
    n2 = out.shape[2]
    rem = rr - dx2
    if rem <= 0.0:
        return
    # bounding rows and columns (a superset: rows outside the disc paint nothing)
    s1 = math.sqrt(rem) / rel[1]
    jlo = int(math.floor(cy - s1))
    jhi = int(math.ceil(cy + s1))
    if periodic and jhi - jlo + 1 >= n1:
        for ju in range(jlo, jhi + 1):
            _paint_row_f(U, S, out, i, ju % n1, rem - (rel[1] * (ju - cy)) ** 2, cz, v,
                         rel[2], periodic)
        return
    s2 = math.sqrt(rem) / rel[2]
    ka, kb, kc, kd = _fold_span(int(math.floor(cz - s2)), int(math.ceil(cz + s2)), n2,
                                periodic)
    ja, jb, jc, jd = _fold_span(jlo, jhi, n1, periodic)
    for part in range(2):
        j0 = ja if part == 0 else jc
        j1 = jb if part == 0 else jd
        if j0 > j1:
            continue
        for jw in range(j0 >> 6, (j1 >> 6) + 1):
            bits = _rows_touched(S, i, j0, j1, jw, ka, kb, kc, kd)
            while bits != 0:
                j = (jw << 6) + _tz(bits)
                bits &= bits - _ONE
                ju = j
                if periodic:
                    ju = jlo + (j - jlo) % n1
                _paint_row_f(U, S, out, i, j, rem - (rel[1] * (ju - cy)) ** 2, cz, v,
                             rel[2], periodic)


@numba.njit(cache=True, inline="always")
def _ball_of(b, nc, cand, zc, rr_ref, rr_lat, vals, rel, shape):
    """Ball ``b`` of the sorted list: ``b < nc`` the refined ball of candidate ``b``,
    else the lattice ball of candidate ``b - nc``: centre (index units), squared radius
    (internal units), value."""
    n1 = shape[1]
    n2 = shape[2]
    q = b if b < nc else b - nc
    f = cand[q]
    ci = np.float64(f // (n1 * n2))
    cj = np.float64((f // n2) % n1)
    ck = np.float64(f % n2)
    if b < nc:
        return (ci + zc[q, 0] / rel[0], cj + zc[q, 1] / rel[1], ck + zc[q, 2] / rel[2],
                np.float64(rr_ref[q]), vals[b])
    return ci, cj, ck, np.float64(rr_lat[q]), vals[b]


@numba.njit(cache=True, parallel=True)
def _sorted_balls(order, cand, zc, rr_ref, rr_lat, vals, rel, shape):
    """The balls ``order`` (ids as in :func:`_ball_of`) as contiguous arrays in that
    order: centres (index units), squared radii, values and the range of x planes."""
    nb = order.size
    nc = cand.size
    cx = np.empty(nb)
    cy = np.empty(nb)
    cz = np.empty(nb)
    r2 = np.empty(nb)
    v = np.empty(nb, np.float32)
    lo = np.empty(nb, np.int64)
    hi = np.empty(nb, np.int64)
    for t in numba.prange(nb):
        a, b, c, rr, vv = _ball_of(order[t], nc, cand, zc, rr_ref, rr_lat, vals, rel, shape)
        cx[t] = a
        cy[t] = b
        cz[t] = c
        r2[t] = rr
        v[t] = vv
        if rr > 0.0:
            lo[t], hi[t] = _span(a, rr, rel[0])
        else:
            lo[t] = 1
            hi[t] = 0
    return cx, cy, cz, r2, v, lo, hi


@numba.njit(cache=True, parallel=True)
def _paint_first_f(cx, cy, cz, rr, val, ilo, ihi, rel, out, U, S, periodic, nslabs):
    """First-cover painting of balls with float centres (:func:`_sorted_balls`, in order
    of decreasing value): each phase voxel (unpainted bit in ``U``) takes the value of
    the first ball holding it, i.e. the largest. The x axis is split into ``nslabs``
    slabs, one thread each (no two threads write one voxel)."""
    n0 = out.shape[0]
    nb = cx.size
    for s in numba.prange(nslabs):
        x0 = (s * n0) // nslabs
        x1 = ((s + 1) * n0) // nslabs
        for t in range(nb):
            a = ilo[t]
            b = ihi[t]
            if a > b:
                continue
            if periodic:
                qa = -((x1 - 1 - a) // n0)
                qb = (b - x0) // n0
            else:
                if b < x0 or a >= x1:
                    continue
                qa = 0
                qb = 0
            for q in range(qa, qb + 1):
                lo = max(a, x0 + q * n0)
                hi = min(b, x1 - 1 + q * n0)
                for iu in range(lo, hi + 1):
                    _paint_plane_f(U, S, out, iu - q * n0, (rel[0] * (iu - cx[t])) ** 2,
                                   rr[t], cy[t], cz[t], val[t], rel, periodic)


# ============================================================ local thickness
#: Methods of :func:`local_thickness`.
LT_METHODS = ("subvoxel", "centres")
#: The method :func:`local_thickness` uses when none is given (and so every caller:
#: ``measure``, ``--pore-split``, ``relax`` on volumes). "subvoxel" is the accurate one
#: (within half a voxel on balls, cylinders and slabs at any offset) but 4 to 8 times
#: slower than "centres", 23 to 38 times one ``edt.edt`` call at 400^3 where the floor is
#: 5 (docs/performance.md): an option. Prisms and meshes take the exact path whatever
#: this is (:func:`exact_local_thickness`).
DEFAULT_LT_METHOD = "centres"
#: Half-width (voxels, per axis) of the box about a candidate centre in which its
#: refined centre is sought.
REFINE_BOX = 1.0
#: Candidates whose ball lies within this distance (voxel edges) of a neighbour's ball
#: keep their lattice ball only (no refined ball); negative: refine every candidate.
REFINE_THIN = 0.3
#: Lateral offset (voxel edges) allowed between a non-phase centre and the foot of the wall
#: seen through it: bounds the angle between the viewing direction and the wall normal.
VIEW_SLACK = 2.0
#: Half-angle (degrees) of the cone of normals taken as one wall in the bracket.
WALL_CONE = 85.0
#: A refined ball also holds the phase voxels whose centre lies within this distance (voxel
#: edges) beyond its radius (module docstring, step 6).
PAINT_SLACK = 0.25


def _centres_local_thickness(m, sp, periodic, out, tell):
    """``method="centres"``: balls centred on voxel centres, radius ``d(x)`` to the
    nearest non-phase centre, diameter ``2 d(x) - h`` (module docstring). ``tell(fraction,
    message)`` hears the end of each step (fractions: rough shares of the time)."""
    unit, rel, hc = _units(sp)
    d2 = squared_distance(m, rel, periodic=periodic)
    tell(0.15, "local thickness: distance transform")
    nch = max(1, min(m.shape[0], 16 * numba.get_num_threads()))
    top = _int_max(d2, nch) if np.all(rel == 1.0) else -1
    if top >= 0:
        # unit voxels, whole squared distances: ridge and counting sort on the grid
        kmax = int(min(max(top, 1), DISCRETE_TABLE_MAX_K))
        MT = np.ascontiguousarray(_containment_table(kmax, _TYPES).T)
        flag, hist = _ridge_grid(d2, MT, _offset_types(), bool(periodic), nch)
        kk = np.arange(hist.shape[1], dtype=np.float64)
        vk = ((2.0 * np.sqrt(kk) - hc) * unit).astype(np.float32)
        isq = _isqrt_table(hist.shape[1])
        tell(0.3, "local thickness: ridge of the distance map")
        ci, cj, ck, rr, vals, pmask = _gather_ridge(d2, flag, hist, vk, nch, bool(periodic),
                                                    isq)
        del flag
        tell(0.4, f"local thickness: painting {ci.size:,} balls")
        if out is None:
            out = d2  # reuse the distance buffer (already touched memory)
        _paint_sorted(ci, cj, ck, rr, vals, rel, periodic, m, out, True, pmask)
        res = out
    else:
        flat = d2.reshape(-1)
        idx = np.flatnonzero(flat)
        r2 = flat[idx]
        vals = ((2.0 * np.sqrt(r2.astype(np.float64)) - hc) * unit).astype(np.float32)
        if out is None:
            out = d2
        res, _ = _paint_balls(m.shape, idx, r2, vals, rel, periodic, flat, out, m)
    res[~m] = np.nan
    return res




def _candidates(d2, rel, periodic):
    """Flat indices of the candidate centres: phase voxels whose ball ``{q : |q - x| <
    d(x)}`` lies in no 26-neighbour's ball (exact lattice test on unit voxels with whole
    squared distances, else ``d(y) >= d(x) + |x - y|``)."""
    n0 = d2.shape[0]
    nch = max(1, min(n0, 16 * numba.get_num_threads()))
    top = _int_max(d2, nch) if np.all(rel == 1.0) else -1
    if top >= 0:
        kmax = int(min(max(top, 1), DISCRETE_TABLE_MAX_K))
        MT = np.ascontiguousarray(_containment_table(kmax, _TYPES).T)
        flag, _ = _ridge_grid(d2, MT, _offset_types(), bool(periodic), nch)
        return np.flatnonzero(flag)
    flat = d2.reshape(-1)
    idx = np.flatnonzero(flat > 0)
    r = np.sqrt(flat, dtype=np.float32)
    keep = _ridge(idx, r, np.asarray(rel, dtype=np.float64), np.asarray(d2.shape, np.int64),
                  bool(periodic))
    return idx[keep]


def _paint_refined(m, cand, zc, rr_ref, rr_lat, v_ref, v_lat, rel, periodic, out):
    """Zero ``out`` and paint, in order of decreasing value, each candidate's refined
    ball (centre ``cand + zc``, squared radius ``rr_ref``, value ``v_ref``) and lattice
    ball (centre ``cand``, ``rr_lat``, ``v_lat``); first cover wins, so every phase
    voxel gets the largest value of the balls holding it (0 if none)."""
    vals = np.concatenate([v_ref, v_lat]).astype(np.float32)
    ok = np.flatnonzero(vals > 0)
    order = ok[_argsort_desc(vals[ok].view(np.uint32))]
    rel = np.asarray(rel, np.float64)
    balls = _sorted_balls(order, cand, zc, rr_ref, rr_lat, vals, rel, out.shape)
    del order, vals
    U, S = _unpainted_bits(m)
    out.fill(0)
    n0 = out.shape[0]
    nslabs = max(1, min(n0, 16 * numba.get_num_threads()))
    with numba.parallel_chunksize(1):
        _paint_first_f(*balls, rel, out, U, S, bool(periodic), nslabs)


def _subvoxel_local_thickness(m, sp, periodic, out, tell):
    """``method="subvoxel"`` (definitions in :func:`local_thickness`); ``tell(fraction,
    message)`` hears the end of each step."""
    unit, rel, _ = _units(sp)
    if periodic and m.all():
        raise OptionError("the phase fills the whole periodic grid: it has no wall, so its "
                          "pore sizes are undefined", field="phases")
    F, d2 = feature_transform(m, rel, periodic=periodic)
    cand = _candidates(d2, rel, periodic)
    nc = cand.size
    tell(0.1, "local thickness: feature transform")
    zc = np.empty((nc, 3), np.float32)
    rho2 = np.empty(nc, np.float32)
    A = np.empty(nc, np.float32)
    Dx = np.empty(nc, np.float32)
    wall_normals(m, F, rel, periodic=periodic)
    _refine_voxel(m, F, d2, cand, np.asarray(rel, np.float64), bool(periodic), REFINE_BOX,
                  float(np.max(rel)), gap_scale(rel), REFINE_THIN, VIEW_SLACK * float(np.max(rel)),
                  math.cos(math.radians(WALL_CONE)), zc,
                  rho2, A, Dx,
                  max(1, min(nc, 64 * numba.get_num_threads())))
    del F
    tell(0.7, "local thickness: painting")
    rr_lat = d2.reshape(-1)[cand]
    if not np.all(rel == 1.0):
        # squared radii rounded to float32: a voxel at exactly a ball's radius (a tie,
        # common on anisotropic grids) must stay outside the open ball
        rr_lat *= np.float32(1.0 - 1e-6)
    rho2 *= np.float32(1.0 - 1e-6)
    if PAINT_SLACK > 0:
        rho2 = np.maximum(rho2, (A + np.float32(PAINT_SLACK * float(np.min(rel)))) ** 2)
    if out is None:
        out = d2
    _paint_refined(m, cand, zc, rho2, rr_lat, 2.0 * unit * A, 2.0 * unit * Dx, rel,
                   periodic, out)
    out[~m] = np.nan
    return out


def local_thickness(mask, spacing, *, periodic: bool = False, out=None,
                    method: str | None = None, progress=None) -> np.ndarray:
    """Local thickness (nm) of a phase (Hildebrand & Rüegsegger 1997).

    .. math:: \\tau(p) = 2 \\max\\{ r : p \\in B(x, r) \\subseteq X \\}

    Parameters
    ----------
    mask : (nx, ny, nz) bool array
        The phase (True). Voxels outside it (other phases, outside the domain) are walls;
        on a non-periodic grid so is the grid border.
    spacing : float or three floats
        Voxel edges (nm).
    periodic : bool
        Wrap around the grid faces (a periodic box).
    out : (nx, ny, nz) float32 array, optional
        Buffer to write into.
    method : "subvoxel" or "centres", optional
        See the module docstring; default :data:`DEFAULT_LT_METHOD` ("centres", fast;
        "subvoxel" reads balls and cylinders at any offset within half a voxel).
    progress : callable ``progress(done_fraction, message)``, optional
        Told as the steps end (distance transform, ridge, ball list, painting).

    Returns
    -------
    (nx, ny, nz) float32 array
        Local thickness in nm; NaN outside the phase.

    References
    ----------
    T. Hildebrand, P. Rüegsegger, "A new method for the model-independent assessment of
    thickness in three-dimensional images", J. Microsc. 185 (1997) 67-75.
    """
    m, sp = _check_mask(mask, spacing)
    if method is None:
        method = DEFAULT_LT_METHOD
    if method not in LT_METHODS:
        raise OptionError(f"method must be one of {LT_METHODS}, not {method!r}", field="method")
    if out is not None and (not isinstance(out, np.ndarray) or out.shape != m.shape
                            or out.dtype != np.float32 or not out.flags.c_contiguous):
        raise OptionError(f"out must be a C-contiguous float32 array of shape {m.shape}",
                          field="out")
    tell = progress if progress is not None else (lambda f, msg="": None)
    tell(0.0, "local thickness")
    if method == "centres":
        res = _centres_local_thickness(m, sp, periodic, out, tell)
    else:
        res = _subvoxel_local_thickness(m, sp, periodic, out, tell)
    tell(1.0, "local thickness: done")
    return res


#: Rounds of linearised programmes per candidate on the exact path.
EXACT_ROUNDS = 4


def _wall_primitives(body, periodic_box, margin):
    """Primitive arrays of a body (prisms of a Structure, triangles of a SurfaceBody),
    with periodic images of those whose box, grown by ``margin``, crosses a face of a
    periodic box. Returns ``kind`` (0 prisms, 1 triangles), ``tri`` (N, 3, 3), ``nrm``
    (N, 3), ``half`` (N,), and the boxes ``bmin``, ``bmax`` (N, 3)."""
    if isinstance(body, Structure):
        tri = np.asarray(body.vertices, np.float64)
        nrm = np.asarray(body.normals, np.float64)
        half = 0.5 * np.asarray(body.thickness, np.float64)
        ok = np.all(np.isfinite(nrm), axis=1) & np.isfinite(half) & (half > 0)
        tri, nrm, half = tri[ok], nrm[ok], half[ok]
        corners = np.concatenate([tri - half[:, None, None] * nrm[:, None, :],
                                  tri + half[:, None, None] * nrm[:, None, :]], axis=1)
        kind = 0
    else:
        tri = np.asarray(body.vertices, np.float64)[np.asarray(body.faces)]
        nrm = np.zeros((len(tri), 3))
        half = np.zeros(len(tri))
        corners = tri
        kind = 1
    bmin = corners.min(axis=1) - margin
    bmax = corners.max(axis=1) + margin
    if periodic_box is not None:
        lo, hi = (np.asarray(b, float) for b in periodic_box.bounds)
        Lb = hi - lo
        T, Nm, H, B0, B1 = [tri], [nrm], [half], [bmin], [bmax]
        for sx in (-1, 0, 1):
            for sy in (-1, 0, 1):
                for sz in (-1, 0, 1):
                    if sx == sy == sz == 0:
                        continue
                    sh = np.array([sx, sy, sz]) * Lb
                    sel = np.all((bmax + sh > lo) & (bmin + sh < hi), axis=1)
                    if sel.any():
                        T.append(tri[sel] + sh)
                        Nm.append(nrm[sel])
                        H.append(half[sel])
                        B0.append(bmin[sel] + sh)
                        B1.append(bmax[sel] + sh)
        tri, nrm, half = np.concatenate(T), np.concatenate(Nm), np.concatenate(H)
        bmin, bmax = np.concatenate(B0), np.concatenate(B1)
    return (kind, np.ascontiguousarray(tri), np.ascontiguousarray(nrm),
            np.ascontiguousarray(half), bmin, bmax)


def _lattice_cap(d2, cand, zc, unit, rel, periodic, hmax):
    """Largest radius (nm) a ball centred at ``cand + zc`` (zc in nm) can have with the
    walls the voxels show: the distance from the voxel nearest that centre to its nearest
    wall voxel centre, plus the centre's distance to that voxel (at most half a voxel
    diagonal), plus half a voxel of rasterization (wall voxels lie inside the geometry or
    outside the domain up to that). A wall the primitive gathering missed (primitives are
    gathered about the candidate, a moved ball reaches farther) cannot leave a ball larger
    than this."""
    shape = np.asarray(d2.shape)
    idx = np.stack(np.unravel_index(cand, d2.shape), axis=1).astype(np.float64)
    pos = idx + zc / (unit * np.asarray(rel, np.float64))
    v = np.rint(pos).astype(np.int64)
    if periodic:
        v %= shape
    else:
        v = np.clip(v, 0, shape - 1)
    near = d2[v[:, 0], v[:, 1], v[:, 2]].astype(np.float64)
    off = np.linalg.norm((pos - v) * np.asarray(rel, np.float64), axis=1) * unit
    return unit * np.sqrt(near) + off + 0.5 * hmax


def exact_local_thickness(grid: PhaseGrid, body, phases=None, *, out=None,
                          progress=None) -> np.ndarray:
    """Local thickness (nm) of the pore space of a grid rasterized from prisms or a closed
    mesh, from exact distances to the geometry.

    Parameters
    ----------
    grid : PhaseGrid
        Made from ``body`` (:func:`sheetview.measures.phases.classify`,
        :func:`sheetview.grid.rasterize` or :func:`sheetview.grid.rasterize_body`):
        SOLID voxels are inside the body, OUTSIDE voxels outside its domain.
    body : Structure or SurfaceBody
    phases : phase codes or names, optional
        The pore space; default every phase but outside, solid and interlayer (the gel
        pores and any size classes).
    out : float32 array of the grid's shape, optional
    progress : callable ``progress(done_fraction, message)``, optional
        Told as the steps end (feature transform, wall normals, refinement, painting).

    Returns
    -------
    float32 array, NaN off the phases.

    The method is that of :func:`local_thickness` (``method="subvoxel"``) with the wall
    distances taken from the geometry (module docstring, "Exact geometry").
    """
    if not isinstance(grid, PhaseGrid):
        raise OptionError(f"exact local thickness needs a PhaseGrid, not {type(grid).__name__}",
                          field="grid")
    if not isinstance(body, (Structure, SurfaceBody)):
        raise OptionError(f"exact local thickness needs a Structure or a SurfaceBody, not "
                          f"{type(body).__name__}", field="body")
    if phases is None:
        codes = [c for c in grid.names if c not in (OUTSIDE, SOLID, INTERLAYER)]
    else:
        if isinstance(phases, (str, int, np.integer)):
            phases = (phases,)
        codes = [phase_code(p, grid.names) for p in phases]
    if SOLID in codes or OUTSIDE in codes:
        raise OptionError("the pore phases cannot include solid or outside voxels",
                          field="phases")
    labels = np.ascontiguousarray(grid.labels)
    m = np.isin(labels, np.asarray(codes, dtype=np.uint8))
    m, sp = _check_mask(m, grid.spacing)
    if out is not None and (not isinstance(out, np.ndarray) or out.shape != m.shape
                            or out.dtype != np.float32 or not out.flags.c_contiguous):
        raise OptionError(f"out must be a C-contiguous float32 array of shape {m.shape}",
                          field="out")
    periodic = bool(grid.periodic)
    unit, rel, _ = _units(sp)
    if periodic and m.all():
        raise OptionError("the phase fills the whole periodic grid: it has no wall, so its "
                          "pore sizes are undefined", field="phases")
    dom = body.domain
    org = np.asarray(grid.origin, np.float64)
    hmax = float(sp.max())
    kind, tri, nrm, half, bmin, bmax = _wall_primitives(
        body, dom if periodic else None, 2.0 * hmax)
    ext = np.asarray(m.shape) * sp
    csize = max(2.5 * hmax, float(np.prod(ext) / 4e6) ** (1 / 3))
    cdims = np.maximum(np.ceil(ext / csize).astype(np.int64), 1)
    cstart, citems = cell_lists(bmin, bmax, org, csize, cdims)
    if periodic or dom is None:
        dkind, dpar = 0, np.zeros(6)
    elif getattr(dom, "shape", None) == "sphere":
        dkind, dpar = 1, np.array([*dom.center, dom.radius, 0.0, 0.0])
    else:
        dkind, dpar = 2, np.array([*dom.min, *dom.max], dtype=np.float64)
    tell = progress if progress is not None else (lambda f, msg="": None)
    tell(0.0, "local thickness (exact geometry)")
    F, d2 = feature_transform(m, rel, periodic=periodic)
    tell(0.1, "local thickness: feature transform")
    wall_normals(m, F, rel, periodic=periodic)
    cand = _candidates(d2, rel, periodic)
    nc = cand.size
    tell(0.25, f"local thickness: refining {nc:,} ball centres against the geometry")
    zc = np.empty((nc, 3), np.float64)
    A = np.empty(nc, np.float64)
    Dx = np.empty(nc, np.float64)
    nchunk = max(1, min(nc, 64 * numba.get_num_threads()))
    # every primitive gathered for a candidate is listed in one of at most 27 cells
    maxprim = max(1, 27 * int(np.diff(cstart).max(initial=0)))
    _refine_exact(m, labels, np.uint8(SOLID), F, cand, sp, org, periodic, REFINE_BOX, kind,
                  tri, nrm, half, cstart, citems, org, csize, cdims, dkind, dpar, zc, A,
                  Dx, nchunk, EXACT_ROUNDS, maxprim, np.asarray(rel, np.float64), unit,
                  gap_scale(rel))
    del F
    tell(0.7, "local thickness: painting")
    rr_lat = d2.reshape(-1)[cand]
    # a voxel plane (a wall that is not geometry, e.g. interlayer) seen obliquely can pass
    # behind a pore centre next to it: its lattice ball would get no positive value and
    # its voxels none; such a centre takes half its distance to the nearest wall voxel
    bad = ~(Dx > 0)
    if bad.any():
        Dx[bad] = 0.5 * unit * np.sqrt(rr_lat[bad].astype(np.float64))
    np.minimum(A, _lattice_cap(d2, cand, zc, unit, rel, periodic, hmax), out=A)
    if out is None:
        out = d2
    _paint_refined(m, cand, (zc / unit).astype(np.float32),
                   ((A / unit + PAINT_SLACK * float(np.min(rel))) ** 2).astype(np.float32),
                   rr_lat, 2.0 * A, 2.0 * Dx, rel, periodic, out)
    out[~m] = np.nan
    tell(1.0, "local thickness: done")
    return out


# ================================================================== intrusion
@numba.njit(cache=True, inline="always")
def _find(parent, x):
    """Root of ``x``, halving the path on the way (each node visited is pointed at its
    grandparent)."""
    while True:
        p = parent[x]
        if p == x:
            return x
        gp = parent[p]
        parent[x] = gp
        x = gp


@numba.njit(cache=True, inline="always")
def _claim(nxt, lk, c, kv):
    """Give level ``kv`` to every node of the circular member list through ``c``."""
    t = c
    while True:
        lk[t] = kv
        t = nxt[t]
        if t == c:
            break


@numba.njit(cache=True)
def _invade(order, d2, door, shape, periodic, parent, nxt, rank, inv, lk):
    """Invasion level of every centre, as the squared radius ``d2`` of its bottleneck
    centre (0: never invaded), by a union-find over the grid.

    ``order``: flat indices of the phase voxels by decreasing ``d2`` (float32 squared
    distances, internal units; 0 off the phase). ``door`` (flat bool): centres whose own
    largest ball holds a reservoir voxel (``d_R^2 < d^2``). Adding the centres in that
    order maintains the 26-connected clusters of the centres with ``d2 >= K`` (union by
    rank, path halving). A cluster is invaded when it gets a door or merges with an
    invaded cluster; at that moment each of its members not yet invaded takes the current
    level ``K``, by a walk along a circular member list kept for the clusters not yet
    invaded, so every node is written once. Flat scratch arrays of the grid size:
    ``parent`` (-1 everywhere on entry), ``nxt`` (any), ``rank`` and ``inv`` (zeros);
    ``lk`` (float32, zeros) receives the levels."""
    n0, n1, n2 = shape[0], shape[1], shape[2]
    s0 = n1 * n2
    offs = np.empty(26, dtype=np.int64)
    oa = np.empty(26, dtype=np.int64)
    ob = np.empty(26, dtype=np.int64)
    oc = np.empty(26, dtype=np.int64)
    u = 0
    for a in range(-1, 2):
        for b in range(-1, 2):
            for c in range(-1, 2):
                if a == 0 and b == 0 and c == 0:
                    continue
                offs[u] = a * s0 + b * n2 + c
                oa[u] = a
                ob[u] = b
                oc[u] = c
                u += 1
    for t in range(order.size):
        f = order[t]
        kv = d2[f]
        parent[f] = f
        nxt[f] = f
        r = f
        ir = door[f]
        if ir:
            lk[f] = kv
        i = f // s0
        j = (f // n2) % n1
        k = f % n2
        interior = 0 < i < n0 - 1 and 0 < j < n1 - 1 and 0 < k < n2 - 1
        for u in range(26):
            if interior:
                y = f + offs[u]
            else:
                ii = i + oa[u]
                jj = j + ob[u]
                kk = k + oc[u]
                if periodic:
                    ii %= n0
                    jj %= n1
                    kk %= n2
                elif ii < 0 or jj < 0 or kk < 0 or ii >= n0 or jj >= n1 or kk >= n2:
                    continue
                y = ii * s0 + jj * n2 + kk
            py = parent[y]
            if py < 0 or py == r:
                continue
            ry = _find(parent, py)
            if ry == r:
                continue
            iy = inv[ry] != 0
            if ir and not iy:
                _claim(nxt, lk, ry, kv)
            elif iy and not ir:
                _claim(nxt, lk, r, kv)
            elif not ir:
                tmp = nxt[r]  # splice the two circular lists
                nxt[r] = nxt[ry]
                nxt[ry] = tmp
            if rank[r] < rank[ry]:
                r, ry = ry, r
            parent[ry] = r
            if rank[r] == rank[ry]:
                rank[r] += 1
            ir = ir or iy
        inv[r] = ir


def default_reservoir(mask, *, outside=None, periodic=False) -> np.ndarray:
    """Phase voxels on the sample boundary: with a face neighbour off the grid
    (non-periodic grids) or in ``outside`` (a boolean mask, e.g. OUTSIDE voxels)."""
    m = np.asarray(mask, dtype=bool)
    touch = np.zeros_like(m)
    if not periodic:
        for ax in range(3):
            sl = [slice(None)] * 3
            sl[ax] = 0
            touch[tuple(sl)] = True
            sl[ax] = -1
            touch[tuple(sl)] = True
    if outside is not None:
        o = np.asarray(outside, dtype=bool)
        for ax in range(3):
            for sh in (1, -1):
                rolled = np.roll(o, sh, axis=ax)
                if not periodic:
                    sl = [slice(None)] * 3
                    sl[ax] = 0 if sh == 1 else -1
                    rolled[tuple(sl)] = False
                touch |= rolled
    return touch & m


def intrusion_diameter(mask, spacing, reservoir=None, *, diameters=None,
                       periodic: bool = False, out=None) -> np.ndarray:
    """Simulated intrusion diameter (nm) of each phase voxel (Münch & Holzer 2008).

    Definition (module conventions: ``d(x)`` the distance from phase voxel ``x`` to the
    nearest non-phase voxel centre, ``h`` the geometric-mean voxel edge, ``R`` the
    reservoir voxels, all of them phase voxels, ``d_R(x)`` the distance to the nearest
    reservoir voxel centre):

    * ``v(x) = 2 d(x) - h``: the largest ball diameter centred at ``x``;
    * ball of diameter ``D`` about ``x``: ``B_D(x) = {q : |q - x| < (D + h) / 2}`` (open;
      at ``D = v(x)`` it is ``B(x, d(x))``, inside the phase);
    * centres at level ``D``: ``C_D = {x : v(x) >= D}``;
    * entries at level ``D``: ``x`` in ``C_D`` whose ball ``B_D(x)`` holds a reservoir
      voxel, i.e. ``2 d_R(x) - h < D`` (a reservoir voxel in ``C_D`` is one);
    * invaded centres ``I_D``: the 26-connected components of ``C_D`` holding an entry at
      level ``D`` or a centre of ``I_D'`` for some ``D' > D`` (drainage: an invaded
      region stays invaded, even once the smaller balls no longer reach the reservoir);
    * invaded voxels at level ``D``: the union of ``B_D(x)`` over ``x`` in ``I_D``;
    * intrusion diameter of voxel ``q``: the largest ``D`` at which ``q`` is invaded, 0 if
      none.

    Equivalently, with a *door* a centre with ``2 d_R(x) - h < v(x)`` (an entry at its
    own full size), ``x`` is invaded at ``D`` iff its component of ``C_D`` holds a door,
    so the invasion level of a centre is the bottleneck ``L(x) = max`` over 26-paths from
    ``x`` to a door of the smallest ``v`` on the path, and the diameter of ``q`` is
    ``max{L(x) : |q - x| < (L(x) + h) / 2}``. Where every pore is open to the reservoir
    this equals the local thickness; a cavity behind a narrow throat takes the throat
    diameter. On unit voxels everything is decided in exact integer squared distances (a
    voxel at exactly a ball's radius is outside the open ball).

    Parameters
    ----------
    mask : (nx, ny, nz) bool array
        The phase.
    spacing : float or three floats
        Voxel edges (nm).
    reservoir : (nx, ny, nz) bool array, optional
        Voxels in contact with the intruding fluid. Default: the phase voxels on the grid
        border (:func:`default_reservoir`); required on a periodic grid.
    diameters : array of float, optional
        Pressure steps (nm): each voxel's diameter is rounded down to the largest step at
        or below it (voxels below the smallest step count as not invaded). Default: the
        exact continuous result.
    periodic : bool
        Wrap around the grid faces.

    Returns
    -------
    (nx, ny, nz) float32 array
        Intrusion diameter in nm; 0 for phase voxels never reached; NaN outside the phase.

    References
    ----------
    B. Münch, L. Holzer, "Contradicting geometrical concepts in pore size analysis
    attained with electron microscopy and mercury intrusion", J. Am. Ceram. Soc. 91 (2008)
    4059-4067.
    """
    import edt

    m, sp = _check_mask(mask, spacing)
    unit, rel, hc = _units(sp)
    if reservoir is None:
        if periodic:
            raise OptionError("a periodic grid has no boundary: give the reservoir voxels "
                              "explicitly", field="reservoir")
        res = default_reservoir(m)
    else:
        res = np.asarray(reservoir, dtype=bool)
        if res.shape != m.shape:
            raise OptionError(f"the reservoir mask has shape {res.shape}, expected {m.shape}",
                              field="reservoir")
        res = res & m
    if not res.any():
        raise OptionError("the reservoir touches no voxel of the phase: nothing can be "
                          "intruded", field="reservoir")
    steps = None
    if diameters is not None:
        steps = np.unique(np.asarray(diameters, dtype=float).ravel())
        if steps.size == 0 or not np.all(np.isfinite(steps)) or steps[0] <= 0:
            raise OptionError("diameters must be positive finite numbers (nm)",
                              field="diameters")
    d2 = squared_distance(m, rel, periodic=periodic)
    flat = d2.reshape(-1)
    # distance to the reservoir (voxel centres), internal units; a door is a centre whose
    # own largest ball holds a reservoir voxel: d_R^2 < d^2
    if periodic:
        dr2 = squared_distance(~res, rel, periodic=True)
    else:
        dr2 = edt.edtsq(np.ascontiguousarray(~res, dtype=np.uint8),
                        anisotropy=tuple(float(a) for a in rel), black_border=False,
                        parallel=budget())
    door = dr2.reshape(-1) < flat
    del dr2
    idx = np.flatnonzero(m.reshape(-1))
    order = idx[_argsort_desc(flat[idx].view(np.uint32))]  # stable: grid order in ties
    del idx
    n = m.size
    itype = np.int32 if n < 2 ** 31 - 1 else np.int64
    lk = np.zeros(n, dtype=np.float32)
    parent = np.full(n, -1, dtype=itype)
    nxt = np.empty(n, dtype=itype)
    rank = np.zeros(n, dtype=np.int8)
    inv = np.zeros(n, dtype=np.bool_)
    _invade(order, flat, door, np.asarray(m.shape, dtype=np.int64), bool(periodic), parent,
            nxt, rank, inv, lk)
    del parent, nxt, rank, inv, order, door
    if out is not None and (out.shape != m.shape or out.dtype != np.float32
                            or not out.flags.c_contiguous):
        raise OptionError(f"out must be a C-contiguous float32 array of shape {m.shape}",
                          field="out")
    kmap = lk.reshape(m.shape)
    nch = max(1, min(m.shape[0], 16 * numba.get_num_threads()))
    top = _int_max(kmap, nch) if (steps is None and np.all(rel == 1.0)) else -1
    if top >= 0:
        # unit voxels, whole squared radii: ridge, plane masks and counting sort on the
        # grid, as for the local thickness (the value 2 sqrt(K) - h grows with K)
        del d2, flat
        kmax = int(min(max(top, 1), DISCRETE_TABLE_MAX_K))
        MT = np.ascontiguousarray(_containment_table(kmax, _TYPES).T)
        flag, hist = _ridge_grid(kmap, MT, _offset_types(), bool(periodic), nch)
        kk = np.arange(hist.shape[1], dtype=np.float64)
        vk = ((2.0 * np.sqrt(kk) - hc) * unit).astype(np.float32)
        isq = _isqrt_table(hist.shape[1])
        ci, cj, ck, rr, vals, pmask = _gather_ridge(kmap, flag, hist, vk, nch,
                                                    bool(periodic), isq)
        del flag
        if out is None:
            out = kmap  # the level map is no longer needed
        _paint_sorted(ci, cj, ck, rr, vals, rel, periodic, m, out, True, pmask)
        res_map = out
    else:
        sel = np.flatnonzero(lk)
        rho2 = lk[sel].astype(np.float64)
        lev = 2.0 * np.sqrt(rho2) - hc
        del lk, kmap
        if steps is not None:
            s_int = steps / unit
            pos = np.searchsorted(s_int, lev * (1 + 1e-12), side="right") - 1
            ok = pos >= 0
            st = s_int[np.maximum(pos, 0)]
            # a ball of the step's diameter; the exact bottleneck radius at full size
            rho2 = np.where(st >= lev - 1e-12, rho2, np.minimum(((st + hc) / 2.0) ** 2, rho2))
            sel, rho2, lev = sel[ok], rho2[ok], st[ok]
        if out is None:
            out = d2
        res_map, _ = _paint_balls(m.shape, sel, rho2.astype(np.float32),
                                  (lev * unit).astype(np.float32), rel, periodic, flat,
                                  out, m)
    res_map[~m] = np.nan
    return res_map


# ================================================================== results
@dataclass
class PoreSizeResult:
    """Volume-weighted pore size distribution of a phase.

    Attributes
    ----------
    method : "local_thickness" or "intrusion"
    phases : names of the phases measured
    diameter : (nx, ny, nz) float32, per-voxel diameter in nm (NaN off the phase, 0 for
        voxels never intruded)
    bin_edges : (nb + 1,) nm
    volume_fraction : (nb,) fraction of the (sized) phase volume with a diameter in each bin
    density : (nb,) ``volume_fraction / bin width`` (per nm), or per unit ``ln D`` for log bins
    cumulative_finer : (nb,) fraction with diameter below each bin's upper edge
    cumulative_coarser : (nb,) fraction with diameter at or above each bin's lower edge
        (the intrusion curve: volume intruded once the diameter reaches the lower edge)
    d10, d50, d90 : volume-weighted quantiles (nm): that fraction of the sized volume has a
        smaller diameter
    mean : volume-weighted mean diameter (nm)
    phase_volume : phase volume (nm^3)
    sized_fraction : fraction of the phase volume that was given a size (1 for local
        thickness; the intruded fraction for intrusion)
    voxel_size : voxel edges (nm)
    log_bins : whether the bins are logarithmic
    """

    method: str
    phases: tuple
    diameter: np.ndarray = field(repr=False)
    bin_edges: np.ndarray
    volume_fraction: np.ndarray
    density: np.ndarray
    cumulative_finer: np.ndarray
    cumulative_coarser: np.ndarray
    d10: float
    d50: float
    d90: float
    mean: float
    phase_volume: float
    sized_fraction: float
    voxel_size: tuple
    log_bins: bool

    @property
    def bin_centers(self) -> np.ndarray:
        e = self.bin_edges
        return np.sqrt(e[:-1] * e[1:]) if self.log_bins else 0.5 * (e[:-1] + e[1:])

    def table(self) -> dict:
        """Columns of the histogram (equal lengths)."""
        return {"d_lower_nm": self.bin_edges[:-1].tolist(),
                "d_upper_nm": self.bin_edges[1:].tolist(),
                "d_center_nm": self.bin_centers.tolist(),
                "volume_fraction": self.volume_fraction.tolist(),
                "density": self.density.tolist(),
                "cumulative_finer": self.cumulative_finer.tolist(),
                "cumulative_coarser": self.cumulative_coarser.tolist()}

    def to_dict(self) -> dict:
        def f(x):
            return None if not np.isfinite(x) else float(x)
        return {"method": self.method, "phases": list(self.phases),
                "d10_nm": f(self.d10), "d50_nm": f(self.d50), "d90_nm": f(self.d90),
                "mean_nm": f(self.mean), "phase_volume_nm3": float(self.phase_volume),
                "sized_fraction": float(self.sized_fraction),
                "voxel_size_nm": [float(v) for v in self.voxel_size],
                "log_bins": bool(self.log_bins),
                "density_per": "ln(nm)" if self.log_bins else "nm",
                "histogram": self.table()}


#: Fine bins of the quantile search in :func:`size_distribution`.
QUANTILE_FINE_BINS = 1 << 12


@numba.njit(parallel=True, cache=True)
def _diameter_stats(d, nch):
    """One pass over a diameter map (flat): the number of finite values, of positive
    finite values, their sum, least and largest."""
    n = d.size
    cnt = np.zeros((nch, 2), np.int64)
    tot = np.zeros(nch)
    lo_ = np.full(nch, np.inf)
    hi_ = np.full(nch, -np.inf)
    for c in numba.prange(nch):
        a = c * n // nch
        b = (c + 1) * n // nch
        nf = 0
        npos = 0
        sm = 0.0
        mn = np.inf
        mx = -np.inf
        for i in range(a, b):
            v = np.float64(d[i])
            if np.isfinite(v):
                nf += 1
                if v > 0:
                    npos += 1
                    sm += v
                    if v < mn:
                        mn = v
                    if v > mx:
                        mx = v
        cnt[c, 0] = nf
        cnt[c, 1] = npos
        tot[c] = sm
        lo_[c] = mn
        hi_[c] = mx
    return cnt[:, 0].sum(), cnt[:, 1].sum(), tot.sum(), lo_.min(), hi_.max()


@numba.njit(cache=True, inline="always")
def _fine_index(v, vmin, scale, nfine):
    """Fine bin of value ``v``: ``floor((v - vmin) * scale)`` clamped to ``[0, nfine)``,
    monotone in ``v``. Every pass over the map places values with this one function."""
    x = (v - vmin) * scale
    f = int(x) if x < nfine else nfine - 1
    return f if f > 0 else 0


def _fine_to_coarse(edges, vmin, scale, nfine):
    """For each fine bin (``floor((v - vmin) * scale)``), the histogram bin of ``edges``
    that holds all of it, or -1 below the first edge, -2 above the last, -3 when it may
    straddle an edge (with a margin far above float64 rounding: those values are placed
    one by one)."""
    f = np.arange(nfine, dtype=np.float64)
    lo = vmin + f / scale
    hi = vmin + (f + 1) / scale
    tol = 1e-9 * max(abs(float(edges[-1])), abs(vmin), 1.0)
    k_lo = np.searchsorted(edges, lo - tol, side="right") - 1
    k_hi = np.searchsorted(edges, hi + tol, side="right") - 1
    nb = edges.size - 1
    out = np.where(k_lo == k_hi, k_lo, -3).astype(np.int64)
    out[(k_lo == k_hi) & (k_lo < 0)] = -1
    out[(k_lo == k_hi) & (k_lo >= nb)] = -2
    return out


@numba.njit(parallel=True, cache=True)
def _diameter_hist(d, edges, vmin, scale, nfine, coarse, nch):
    """One pass over the positive finite values of a diameter map (flat): counts per bin of
    ``edges`` (``[e_k, e_k+1)``, the last bin closed, as numpy.histogram), the number
    below the first edge and equal to the last, and counts on ``nfine`` equal fine bins
    from ``vmin`` (``floor((v - vmin) * scale)``, monotone in ``v``). ``coarse``: the
    bin of each fine bin (:func:`_fine_to_coarse`); only values of straddling fine bins
    are compared with the edges."""
    n = d.size
    nb = edges.size - 1
    counts = np.zeros((nch, nb), np.int64)
    fine = np.zeros((nch, nfine), np.int64)
    below = np.zeros(nch, np.int64)
    atlast = np.zeros(nch, np.int64)
    e0 = edges[0]
    e1 = edges[nb]
    for c in numba.prange(nch):
        a = c * n // nch
        b = (c + 1) * n // nch
        for i in range(a, b):
            v = np.float64(d[i])
            if not (np.isfinite(v) and v > 0):
                continue
            f = _fine_index(v, vmin, scale, nfine)
            fine[c, f] += 1
            k = coarse[f]
            if k >= 0:
                counts[c, k] += 1
            elif k == -1:
                below[c] += 1
            elif k == -3:
                if v < e0:
                    below[c] += 1
                elif v == e1:
                    atlast[c] += 1
                    counts[c, nb - 1] += 1
                elif v < e1:
                    lo = 0
                    hi = nb
                    while hi - lo > 1:  # largest k with edges[k] <= v
                        mid = (lo + hi) // 2
                        if edges[mid] <= v:
                            lo = mid
                        else:
                            hi = mid
                    counts[c, lo] += 1
    cs = np.zeros(nb, np.int64)
    fs = np.zeros(nfine, np.int64)
    for c in range(nch):
        cs += counts[c]
        fs += fine[c]
    return cs, fs, below.sum(), atlast.sum()


@numba.njit(cache=True)
def _fine_bin_values(d, vmin, scale, nfine, targets, sizes):
    """The positive finite values of a diameter map (flat) that fall in the fine bins
    ``targets`` (distinct; ``sizes[t]`` values each, counted before), one after the
    other in the order of ``targets``."""
    slot = np.full(nfine, -1, np.int64)
    start = np.zeros(targets.size + 1, np.int64)
    for t in range(targets.size):
        slot[targets[t]] = t
        start[t + 1] = start[t] + sizes[t]
    out = np.empty(start[targets.size], np.float64)
    pos = start[:-1].copy()
    for i in range(d.size):
        v = np.float64(d[i])
        if np.isfinite(v) and v > 0:
            t = slot[_fine_index(v, vmin, scale, nfine)]
            if t >= 0:
                out[pos[t]] = v
                pos[t] += 1
    return out, start


def _order_statistics(d, ranks, vmin, scale, fine):
    """The values of 0-based ``ranks`` among the positive finite values of ``d``, exactly:
    the fine bin holding each rank (the fine bins are in value order), then a selection
    among that bin's values (one more pass over ``d`` for all ranks)."""
    cum = np.cumsum(fine)
    bins = [int(np.searchsorted(cum, r, side="right")) for r in ranks]
    targets = np.unique(np.asarray(bins, dtype=np.int64))
    vals, start = _fine_bin_values(d, vmin, scale, fine.size, targets, fine[targets])
    out = []
    for r, b in zip(ranks, bins):
        t = int(np.searchsorted(targets, b))
        k = int(r - (cum[b - 1] if b else 0))
        seg = vals[start[t]:start[t + 1]]
        out.append(float(np.partition(seg, k)[k]))
    return np.asarray(out)


def _ratio(a, b):
    with np.errstate(over="ignore"):  # bins of subnormal width: an infinite density
        return a / b


def _bin_edges(vmin, vmax, bins, h):
    """Bin edges for values in [vmin, vmax] (voxel edge ``h``) and whether they are log."""
    if isinstance(bins, str):
        if bins == "log":
            lo = math.floor(10 * math.log10(max(min(vmin, h), 1e-6))) / 10
            hi = math.ceil(10 * math.log10(max(vmax, h)) + 1e-9) / 10
            if hi <= lo:
                hi = lo + 0.1
            n = int(round((hi - lo) * 10))
            return 10.0 ** np.linspace(lo, hi, n + 1), True
        if bins == "linear":
            n = max(1, int(math.ceil(vmax / h + 1e-9)))
            return np.arange(n + 1) * h, False
        raise OptionError(f'bins must be "log", "linear", a number of bins or an array of '
                          f'edges, not {bins!r}', field="bins")
    arr = np.asarray(bins, dtype=float)
    if arr.ndim == 0:
        n = int(arr)
        if n < 1 or n != arr:
            raise OptionError(f"number of bins must be a positive integer, not {bins!r}",
                              field="bins")
        return np.linspace(0.0, vmax * (1 + 1e-9) if vmax > 0 else h, n + 1), False
    if arr.ndim != 1 or arr.size < 2 or np.any(np.diff(arr) <= 0) or not np.all(np.isfinite(arr)):
        raise OptionError("bin edges must be an increasing 1D array of at least 2 numbers",
                          field="bins")
    return arr, bool(arr[0] > 0 and np.allclose(np.diff(np.log(arr)), np.log(arr[1] / arr[0])))


def size_distribution(diameter, *, bins="log", voxel_size=(1.0, 1.0, 1.0),
                      method="local_thickness", phases=("gel",)) -> PoreSizeResult:
    """Histogram, cumulative curves, quantiles and mean of a per-voxel diameter map
    (NaN: not in the phase; 0: in the phase but not sized). Equal voxels, so voxel counts
    are volume weights.

    Two parallel passes over the map (no copy of its values): the counts of numpy's
    ``histogram`` on the same edges, the quantiles of ``numpy.quantile(...,
    method="inverted_cdf")`` exactly (the fine bin that holds each rank, then a selection
    among its values), and the mean (summed in float64 by chunks: it may differ from
    numpy's pairwise sum in the last digits)."""
    d = np.asarray(diameter)
    if d.dtype not in (np.float32, np.float64):
        d = d.astype(np.float64)
    flat = d.reshape(-1)  # a view of a contiguous map
    nch = max(1, min(flat.size // 65536 + 1, 16 * numba.get_num_threads()))
    n_phase, n_pos, vsum, vmin, vmax = _diameter_stats(flat, nch)
    n_phase, n_pos = int(n_phase), int(n_pos)
    sp = np.broadcast_to(np.asarray(voxel_size, dtype=float), (3,))
    h = float(np.prod(sp) ** (1 / 3))
    edges, log_bins = _bin_edges(float(vmin) if n_pos else h, float(vmax) if n_pos else h,
                                 bins, h)
    edges = np.ascontiguousarray(edges, dtype=np.float64)
    nfine = QUANTILE_FINE_BINS
    scale = (nfine / (vmax - vmin)) if n_pos and vmax > vmin else 0.0
    if not np.isfinite(scale):  # a spread of subnormal size: one fine bin, placed one by one
        scale = 0.0
    v0 = float(vmin) if n_pos else 0.0
    coarse = (_fine_to_coarse(edges, v0, scale, nfine) if scale > 0
              else np.full(nfine, -3, np.int64))
    # per-chunk tables of many bins: fewer chunks
    nch_h = nch if edges.size <= 4097 else max(1, min(nch, numba.get_num_threads()))
    counts, fine, n_below, n_last = _diameter_hist(flat, edges, v0, scale, nfine, coarse, nch_h)
    total = max(n_pos, 1)
    frac = counts / total
    width = np.diff(np.log(edges)) if log_bins else np.diff(edges)
    if n_pos:
        # numpy.quantile(method="inverted_cdf"): 0-based index n q - 1, rounded up unless
        # whole (Hyndman & Fan 1996, definition 1), computed as numpy computes it
        idx = np.float64(n_pos) * np.array([0.1, 0.5, 0.9]) - 1
        prev = np.floor(idx)
        ranks = np.where(idx - prev == 0, prev, prev + 1).astype(np.int64).clip(0, n_pos - 1)
        if vmax > vmin and scale > 0:
            q = _order_statistics(flat, ranks, float(vmin), scale, fine)
        elif vmax > vmin:  # all in one fine bin: select among the sized values
            vals = flat[np.isfinite(flat) & (flat > 0)].astype(np.float64)
            q = np.array([float(np.partition(vals, r)[r]) for r in ranks])
        else:  # one value
            q = np.full(3, float(vmin))
        mean = float(vsum / n_pos)
    else:
        q = np.full(3, np.nan)
        mean = float("nan")
    # below[k] = #(vals < edges[k]) from the histogram counts (bins are [e_k, e_k+1), the
    # last one closed), without sorting the values
    below = np.concatenate([[0], np.cumsum(counts)]).astype(np.float64)
    below += n_below
    below[-1] -= n_last
    below /= total
    return PoreSizeResult(
        method=method, phases=tuple(phases), diameter=d, bin_edges=edges,
        volume_fraction=frac, density=_ratio(frac, width),
        cumulative_finer=below[1:], cumulative_coarser=1.0 - below[:-1],
        d10=float(q[0]), d50=float(q[1]), d90=float(q[2]), mean=mean,
        phase_volume=float(n_phase * np.prod(sp)),
        sized_fraction=float(n_pos / n_phase) if n_phase else 0.0,
        voxel_size=tuple(float(x) for x in sp), log_bins=log_bins)


def pore_size_distribution(grid: PhaseGrid, phases=(GEL,), *, bins="log",
                           method: str = "local_thickness", reservoir=None,
                           diameters=None) -> PoreSizeResult:
    """Pore size distribution of the given phases of a PhaseGrid.

    Parameters
    ----------
    grid : PhaseGrid
    phases : phase codes or names making up the pore space (default: gel)
    bins : "log" (10 per decade, aligned to decades), "linear" (one voxel wide), a
        number of equal bins from 0, or an array of edges (nm)
    method : "local_thickness" (:func:`local_thickness`) or "intrusion"
        (:func:`intrusion_diameter`; the reservoir defaults to the phase voxels touching
        OUTSIDE voxels or the grid border)
    reservoir : bool array, optional (intrusion only)
    diameters : pressure steps (nm), optional (intrusion only)

    Returns
    -------
    PoreSizeResult
    """
    if not isinstance(grid, PhaseGrid):
        raise OptionError(f"pore sizes need a PhaseGrid, not {type(grid).__name__}")
    if isinstance(phases, (str, int, np.integer)):
        phases = (phases,)
    codes = [phase_code(p, grid.names) for p in phases]
    names = tuple(grid.names.get(c, f"phase_{c}") for c in codes)
    mask = np.isin(grid.labels, np.asarray(codes, dtype=np.uint8))
    if not mask.any():
        raise OptionError(f"the grid has no voxel of phase(s) {', '.join(names)}",
                          path=grid.source, field="phases")
    if method == "local_thickness":
        d = local_thickness(mask, grid.spacing, periodic=grid.periodic)
    elif method == "intrusion":
        if reservoir is None:
            if grid.periodic:
                raise OptionError("intrusion on a periodic grid needs an explicit reservoir",
                                  field="reservoir")
            reservoir = default_reservoir(mask, outside=grid.labels == OUTSIDE)
        d = intrusion_diameter(mask, grid.spacing, reservoir, diameters=diameters,
                               periodic=grid.periodic)
    else:
        raise OptionError(f'method must be "local_thickness" or "intrusion", not {method!r}',
                          field="method")
    return size_distribution(d, bins=bins, voxel_size=grid.spacing, method=method,
                             phases=names)


# ================================================================== the measure
def _finite(x):
    return float(x) if x is not None and math.isfinite(x) else None


@dataclass(repr=False)
class PoreSizes(Result):
    """The ``pores`` measure: the local-thickness size distribution of the non-interlayer
    pore space (``parts["local_thickness"]``) and, when asked, the intrusion distribution
    (``parts["intrusion"]``), each a :class:`PoreSizeResult` or None."""

    parts: dict
    notes: list = field(default_factory=list)

    def to_dict(self) -> dict:
        d = {k: None if v is None else v.to_dict() for k, v in self.parts.items()}
        if self.notes:
            d["notes"] = list(self.notes)
        return d

    def tables(self) -> dict:
        return {f"pore_sizes_{k}": v.table() for k, v in self.parts.items() if v is not None}

    def basis(self) -> dict:
        return {"pore_size": "volume-weighted quantiles of the local thickness (diameter of the "
                             "largest ball inside the pore space that holds the point) of the "
                             "non-interlayer pore space"}

    def __repr__(self) -> str:
        h = self.headline()["pore_size"]
        return "PoreSizes(" + ", ".join(f"{k}={v:.4g}" if v is not None else f"{k}=None"
                                       for k, v in h.items()) + ")"

    def headline(self) -> dict:
        lt = self.parts["local_thickness"]
        it = self.parts["intrusion"]
        return {"pore_size": {
            "d10_nm": _finite(lt.d10) if lt else None, "d50_nm": _finite(lt.d50) if lt else None,
            "d90_nm": _finite(lt.d90) if lt else None,
            "intrusion_d50_nm": _finite(it.d50) if it else None}}


def pores_measure(grid: PhaseGrid, *, thickness=None, intrusion: bool = False) -> PoreSizes:
    """The ``pores`` measure of ``sheetview measure``: size distributions of the
    non-interlayer pore space (every phase but outside, solid and interlayer) of ``grid``.

    ``thickness`` is the run's local-thickness map (nm, NaN off those phases; exact
    geometry for prisms and meshes, :func:`exact_local_thickness`); None computes
    :func:`local_thickness` at its defaults. ``intrusion`` adds the simulated intrusion
    from the default reservoir (none in a periodic box: a note says so)."""
    g = grid
    codes = tuple(sorted(c for c in g.names if c not in (OUTSIDE, SOLID, INTERLAYER)))
    names = tuple(g.names[c] for c in codes)
    mask = np.isin(g.labels, codes)
    if not mask.any():
        return PoreSizes({"local_thickness": None, "intrusion": None},
                         notes=["no gel pore space: pore sizes undefined"])
    lt = thickness if thickness is not None else local_thickness(mask, g.spacing,
                                                                 periodic=g.periodic)
    parts = {"local_thickness": size_distribution(lt, voxel_size=g.spacing,
                                                  method="local_thickness", phases=names),
             "intrusion": None}
    notes = []
    if intrusion:
        if g.periodic:
            notes.append("periodic box: no reservoir at the boundary, so no intrusion "
                         "distribution")
        else:
            m = ~np.isnan(lt)
            res = default_reservoir(m, outside=g.labels == OUTSIDE)
            d = intrusion_diameter(m, g.spacing, res)
            parts["intrusion"] = size_distribution(d, voxel_size=g.spacing, method="intrusion",
                                                   phases=names)
    return PoreSizes(parts, notes=notes)
