"""numba kernels of the random-walk engine (private to :mod:`sheetview.measures.diffusion`).

Walkers move off-lattice in the pore space of a voxel grid. A walker's position is its
voxel ``(i, j, k)`` and its fractional place ``(fx, fy, fz)`` in [0, 1) inside that voxel.
One time step ``dt`` moves it along x, then y, then z by ``±step[c, axis]`` voxels (the
sign of each from one random bit), with ``step = sqrt(2 D_c dt) / spacing``: per axis a
±δ walk of variance ``2 D_c dt``, whose normal motion at any (axis-aligned) voxel face is
exactly the one-dimensional ±δ walk. Steps are shorter than a voxel, so an axis move
crosses at most one face. At a face:

* into a wall (a code with class -1, or the grid border of a closed grid, read as
  OUTSIDE): the walker is reflected specularly and its weight multiplied by ``1 - p`` with
  ``p = x / (1 + x/2)``, ``x = rho delta / D * a`` (``a`` the surface-area factor of the
  voxel, 1 on flat axis-aligned walls);
* into water of another class: transmitted with probability ``trans[c, c2]`` (the
  remainder of the step scaled by ``scale[c, c2] = delta_c2 / delta_c``), else reflected;
* otherwise it moves on.

Random numbers: one xorshift64* state per walker, seeded from the user's seed and the
walker's index by splitmix64, so a walker's path does not depend on the number of threads.
"""
from __future__ import annotations

import numba
import numpy as np
from numba import prange

_MASK64 = np.uint64(0xFFFFFFFFFFFFFFFF)


@numba.njit(cache=True, inline="always")
def _splitmix64(x):
    z = x + np.uint64(0x9E3779B97F4A7C15)
    z = (z ^ (z >> np.uint64(30))) * np.uint64(0xBF58476D1CE4E5B9)
    z = (z ^ (z >> np.uint64(27))) * np.uint64(0x94D049BB133111EB)
    return z ^ (z >> np.uint64(31))


@numba.njit(cache=True, inline="always")
def _next(s):
    """xorshift64* (Vigna 2016): returns (new state, 64 random bits)."""
    s ^= s >> np.uint64(12)
    s ^= s << np.uint64(25)
    s ^= s >> np.uint64(27)
    return s, s * np.uint64(0x2545F4914F6CDD1D)


@numba.njit(cache=True, inline="always")
def _uniform(s):
    s, r = _next(s)
    return s, (r >> np.uint64(11)) * (1.0 / 9007199254740992.0)


@numba.njit(cache=True)
def seed_states(seed, n):
    """Per-walker generator states from the user's seed (splitmix64 of seed and index)."""
    out = np.empty(n, np.uint64)
    base = _splitmix64(np.uint64(seed))
    for w in range(n):
        s = _splitmix64(base ^ _splitmix64(np.uint64(w) + np.uint64(0x632BE59BD9B4E019)))
        if s == np.uint64(0):
            s = np.uint64(0x9E3779B97F4A7C15)
        out[w] = s
    return out


@numba.njit(cache=True, parallel=True)
def place_uniform(labels, lut, rng, ix, iy, iz, fx, fy, fz, cls, index_pool):
    """Start every walker uniformly in the water (``lut[label] >= 0``): a voxel by
    rejection (or from ``index_pool`` when it is not empty) and a uniform place inside."""
    nx, ny, nz = labels.shape
    ntot = nx * ny * nz
    npool = index_pool.size
    for w in prange(rng.size):
        s = rng[w]
        while True:
            s, u = _uniform(s)
            if npool > 0:
                flat = index_pool[min(int(u * npool), npool - 1)]
            else:
                flat = min(int(u * ntot), ntot - 1)
            i = flat // (ny * nz)
            j = (flat // nz) % ny
            k = flat % nz
            c = lut[labels[i, j, k]]
            if c >= 0:
                break
        ix[w] = i
        iy[w] = j
        iz[w] = k
        s, fx[w] = _uniform(s)
        s, fy[w] = _uniform(s)
        s, fz[w] = _uniform(s)
        cls[w] = c
        rng[w] = s


@numba.njit(cache=True, inline="always")
def _axis_move(f, i, flat, c, w, s, sgn, n, stride, periodic, lab, lut, step, xtab,
               area, use_area, trans, scale):
    """One move along one axis; returns (f, i, flat, c, w, image change, rng state)."""
    g = f + sgn * step
    if g >= 0.0 and g < 1.0:
        return g, i, flat, c, w, 0, s
    if sgn > 0:
        j = i + 1
        r = g - 1.0
    else:
        j = i - 1
        r = -g
    wrap = 0
    inside = True
    if j < 0 or j >= n:
        if periodic:
            if j < 0:
                j += n
                wrap = -1
            else:
                j -= n
                wrap = 1
        else:
            inside = False
    if inside:
        nflat = flat + (j - i) * stride
        code = lab[nflat]
        c2 = lut[code]
    else:
        nflat = flat
        code = 0  # the border of a closed grid is a wall, read as OUTSIDE
        c2 = -1
    if c2 < 0:
        x = xtab[c, code]
        if x > 0.0:
            if use_area:
                x *= area[flat] * (1.0 / 255.0)
            p = x / (1.0 + 0.5 * x)
            if p > 1.0:
                p = 1.0
            w *= 1.0 - p
        g = 1.0 - r if sgn > 0 else r
        if g >= 1.0:
            g = 0.9999999999999999
        return g, i, flat, c, w, 0, s
    if c2 != c:
        tp = trans[c, c2]
        if tp < 1.0:
            s, u = _uniform(s)
            if u >= tp:
                g = 1.0 - r if sgn > 0 else r
                if g >= 1.0:
                    g = 0.9999999999999999
                return g, i, flat, c, w, 0, s
        r *= scale[c, c2]
        c = c2
    g = r if sgn > 0 else 1.0 - r
    if g >= 1.0:
        g = 0.9999999999999999
    return g, j, nflat, c, w, wrap, s


def _advance(lab, shape, periodic, lut, step, xtab, area, use_area, trans, scale,
            ix, iy, iz, fx, fy, fz, cls, wt, img, rng, nsteps):
    """Advance every walker by ``nsteps`` time steps (in place).

    ``lab`` is the flattened label grid (C order), ``step[c, a]`` the step of class ``c``
    along axis ``a`` in voxels (< 1), ``xtab[c, code] = rho delta / D`` for a wall code,
    ``area`` the flattened uint8 surface-area factor (255 = 1) used when ``use_area``,
    ``img`` (N, 3) the periodic image counts (for unwrapped displacements).
    """
    nx, ny, nz = shape[0], shape[1], shape[2]
    sx = ny * nz
    sy = nz
    for w in prange(ix.size):
        i0 = ix[w]
        i1 = iy[w]
        i2 = iz[w]
        f0 = fx[w]
        f1 = fy[w]
        f2 = fz[w]
        c = cls[w]
        ww = wt[w]
        s = rng[w]
        m0 = img[w, 0]
        m1 = img[w, 1]
        m2 = img[w, 2]
        flat = i0 * sx + i1 * sy + i2
        bits = np.uint64(0)
        nb = 0
        for _ in range(nsteps):
            if nb < 3:
                s, bits = _next(s)
                bits = bits >> np.uint64(16)
                nb = 48
            b = bits & np.uint64(7)
            bits = bits >> np.uint64(3)
            nb -= 3
            sg = 1.0 if (b & np.uint64(1)) else -1.0
            f0, i0, flat, c, ww, dm, s = _axis_move(
                f0, i0, flat, c, ww, s, sg, nx, sx, periodic, lab, lut, step[c, 0],
                xtab, area, use_area, trans, scale)
            m0 += dm
            sg = 1.0 if (b & np.uint64(2)) else -1.0
            f1, i1, flat, c, ww, dm, s = _axis_move(
                f1, i1, flat, c, ww, s, sg, ny, sy, periodic, lab, lut, step[c, 1],
                xtab, area, use_area, trans, scale)
            m1 += dm
            sg = 1.0 if (b & np.uint64(4)) else -1.0
            f2, i2, flat, c, ww, dm, s = _axis_move(
                f2, i2, flat, c, ww, s, sg, nz, 1, periodic, lab, lut, step[c, 2],
                xtab, area, use_area, trans, scale)
            m2 += dm
        ix[w] = i0
        iy[w] = i1
        iz[w] = i2
        fx[w] = f0
        fy[w] = f1
        fz[w] = f2
        cls[w] = c
        wt[w] = ww
        rng[w] = s
        img[w, 0] = m0
        img[w, 1] = m1
        img[w, 2] = m2


#: The kernel over threads (long chunks) and on one thread (short chunks, where waking the
#: threads of a loaded machine costs more than the work).
advance = numba.njit(cache=True, parallel=True)(_advance)
advance_serial = numba.njit(cache=True)(_advance)


@numba.njit(cache=True)
def tally(cls, start, wt, nclass, counts, wsum):
    """Add walker counts and weights by (start class, current class)."""
    for w in range(cls.size):
        a = start[w]
        b = cls[w]
        counts[a, b] += 1
        wsum[a, b] += wt[w]


@numba.njit(cache=True)
def moments(ix, iy, iz, fx, fy, fz, img, x0, shape, spacing, out):
    """Sum of the displacement products (nm²) ``out[a, b] += d_a d_b`` and ``out[3, a] +=
    d_a`` over walkers, from the unwrapped positions and the start positions ``x0``."""
    nx, ny, nz = shape[0], shape[1], shape[2]
    for w in range(ix.size):
        d0 = ((ix[w] + fx[w] + img[w, 0] * nx) - x0[w, 0]) * spacing[0]
        d1 = ((iy[w] + fy[w] + img[w, 1] * ny) - x0[w, 1]) * spacing[1]
        d2 = ((iz[w] + fz[w] + img[w, 2] * nz) - x0[w, 2]) * spacing[2]
        out[0, 0] += d0 * d0
        out[0, 1] += d0 * d1
        out[0, 2] += d0 * d2
        out[1, 1] += d1 * d1
        out[1, 2] += d1 * d2
        out[2, 2] += d2 * d2
        out[3, 0] += d0
        out[3, 1] += d1
        out[3, 2] += d2


@numba.njit(cache=True)
def _wall_at(lab, lut, periodic, i, j, k):
    nx, ny, nz = lab.shape
    if i < 0 or j < 0 or k < 0 or i >= nx or j >= ny or k >= nz:
        if not periodic:
            return True
        i = i % nx
        j = j % ny
        k = k % nz
    return lut[lab[i, j, k]] < 0


@numba.njit(cache=True)
def _voxel_factor(lab, lut, periodic, spacing, wall_weight, i, j, k, g, dg):
    nx, ny, nz = lab.shape
    near = (_wall_at(lab, lut, periodic, i - 1, j, k) or _wall_at(lab, lut, periodic, i + 1, j, k)
            or _wall_at(lab, lut, periodic, i, j - 1, k)
            or _wall_at(lab, lut, periodic, i, j + 1, k)
            or _wall_at(lab, lut, periodic, i, j, k - 1)
            or _wall_at(lab, lut, periodic, i, j, k + 1))
    if not near:
        return 255
    gx = 0.0
    gy = 0.0
    gz = 0.0
    for a in range(5):
        ii = i + a - 2
        for b in range(5):
            jj = j + b - 2
            for cc in range(5):
                kk = k + cc - 2
                if ii < 0 or jj < 0 or kk < 0 or ii >= nx or jj >= ny or kk >= nz:
                    if periodic:
                        v = wall_weight[lab[ii % nx, jj % ny, kk % nz]]
                    else:
                        v = 1.0
                else:
                    v = wall_weight[lab[ii, jj, kk]]
                if v == 0.0:
                    continue
                gx += v * dg[a] * g[b] * g[cc]
                gy += v * g[a] * dg[b] * g[cc]
                gz += v * g[a] * g[b] * dg[cc]
    gx /= spacing[0]
    gy /= spacing[1]
    gz /= spacing[2]
    norm = np.sqrt(gx * gx + gy * gy + gz * gz)
    if norm == 0.0:
        return 255
    l1 = (abs(gx) + abs(gy) + abs(gz)) / norm
    return min(255, max(1, int(round(255.0 / l1))))


@numba.njit(cache=True, parallel=True)
def area_factor(lab, lut, periodic, spacing, wall_weight, out):
    """Surface-area factor of the water voxels next to a wall: ``1 / |n|_1`` with ``n`` the
    unit normal from the gradient of the Gaussian-smoothed (σ = 1 voxel, 5³ stencil) wall
    indicator ``wall_weight[code]`` (1 for walls, 0 for water; the border of a closed grid
    counts as a wall). Voxel faces perpendicular to axis a cover ``∫|n_a| dA`` of a smooth
    surface, so weighting each face hit by ``1/|n|_1`` recovers its true area. Stored as
    uint8, 255 = 1; 255 where the voxel has no wall neighbour."""
    nx, ny, nz = lab.shape
    g = np.empty(5)
    dg = np.empty(5)
    for t in range(5):
        d = t - 2.0
        g[t] = np.exp(-0.5 * d * d)
        dg[t] = -d * g[t]
    for pi in prange(nx):
        i = np.int64(pi)
        for j in range(ny):
            for k in range(nz):
                if lut[lab[i, j, k]] < 0:
                    out[i, j, k] = 255
                else:
                    out[i, j, k] = _voxel_factor(lab, lut, periodic, spacing, wall_weight,
                                                 i, j, k, g, dg)


@numba.njit(cache=True)
def face_sums(lab, lut, periodic, rtab, area, use_area, spacing, nclass):
    """Per class: the relaxivity-weighted wall-face area ``sum rho * a * face area`` (nm³/µs
    with rho in nm/µs) and the water voxel count (the fast-diffusion rate is their ratio
    over the voxel volume)."""
    nx, ny, nz = lab.shape
    out = np.zeros(nclass)
    cnt = np.zeros(nclass)
    fa = np.empty(3)
    fa[0] = spacing[1] * spacing[2]
    fa[1] = spacing[0] * spacing[2]
    fa[2] = spacing[0] * spacing[1]
    for i in range(nx):
        for j in range(ny):
            for k in range(nz):
                c = lut[lab[i, j, k]]
                if c < 0:
                    continue
                cnt[c] += 1
                af = area[(i * ny + j) * nz + k] / 255.0 if use_area else 1.0
                for a in range(3):
                    for sgn in (-1, 1):
                        ii, jj, kk = i, j, k
                        if a == 0:
                            ii += sgn
                        elif a == 1:
                            jj += sgn
                        else:
                            kk += sgn
                        code = 0
                        if ii < 0 or jj < 0 or kk < 0 or ii >= nx or jj >= ny or kk >= nz:
                            if periodic:
                                code = lab[ii % nx, jj % ny, kk % nz]
                        else:
                            code = lab[ii, jj, kk]
                        if lut[code] < 0:
                            out[c] += rtab[c, code] * af * fa[a]
    return out, cnt
