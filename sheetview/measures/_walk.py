"""numba kernels of the random-walk engine (private to :mod:`sheetview.measures.diffusion`).

Walkers move off-lattice in the pore space of a voxel grid. A walker's position is its
voxel ``(i, j, k)`` and its fractional place ``(fx, fy, fz)`` in [0, 1) inside that voxel;
each walker carries its own clock ``tw`` (µs), so walkers advance asynchronously.

Two kinds of move:

* **Fixed steps** (near walls and class boundaries, and everywhere when the acceleration
  is off): one time step ``dt`` moves the walker along x, then y, then z by
  ``±step[c, axis]`` voxels (the sign of each from one random bit), with
  ``step = sqrt(2 D_c dt) / spacing``: per axis a ±δ walk of variance ``2 D_c dt``, whose
  normal motion at any (axis-aligned) voxel face is exactly the one-dimensional ±δ walk.
  Steps are shorter than a voxel, so an axis move crosses at most one face. At a face:

  - into a wall (a code with class -1, or the grid border of a closed grid, read as
    OUTSIDE): the walker is reflected specularly and its weight multiplied by ``1 - p``
    with ``p = x / (1 + x/2)``, ``x = rho delta / D * a`` (``a`` the surface-area factor
    of the voxel, 1 on flat axis-aligned walls);
  - into water of another class: transmitted with probability ``trans[c, c2]`` (the
    remainder of the step scaled by ``scale[c, c2] = delta_c2 / delta_c``), else reflected;
  - otherwise it moves on.

  A per-voxel byte ``mask`` says which of the six neighbours hold water of the same class
  (bit ``2 axis + (direction > 0)``): the common move (no face, or a face into the same
  class) is one load and no unpredictable branch; walls and class boundaries take the slow
  path above.

* **First-passage jumps** (walk on spheres) where the walker is at least ``rmin`` from any
  voxel of another code class (walls and water of another class): it jumps to a uniform
  point on the sphere of radius ``r`` around it, ``r`` a lower bound of that distance from
  the Euclidean distance map ``jmap``, and its clock advances by the exit time of Brownian
  motion from the ball, drawn exactly from its distribution
  ``P(T <= t) = 1 - 2 sum_{n>=1} (-1)^(n+1) exp(-n² π² D t / r²)`` (mean ``r² / (6 D)``) by
  inversion of a tabulated CDF. No wall is touched inside the ball, so the weight does
  not change. A jump that would end after the target time ``T`` of the call is cut at
  ``T``: the walker is put at its position at ``T`` drawn from the law of Brownian motion
  in the ball conditioned on not having left it (a tabulated radial CDF, isotropic
  direction), so the state at every recording time is exact.

Random numbers: one xorshift64* state per walker, seeded from the user's seed and the
walker's index by splitmix64, so a walker's path does not depend on the number of threads.
"""
from __future__ import annotations

import math

import numba
import numpy as np
from numba import prange

_MASK64 = np.uint64(0xFFFFFFFFFFFFFFFF)
_ONE_MINUS = 0.9999999999999999


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


# ============================================================== first-passage tables
def sphere_exit_cdf(s):
    """P(T <= s r²/D) for Brownian motion (generator D∇²) started at the centre of a ball
    of radius r: ``1 - 2 sum (-1)^(n+1) exp(-n² π² s)`` (the Dirichlet eigenmode series of
    the ball), and for s < 0.05 its Poisson-summed form
    ``(2 / sqrt(π s)) sum_{k>=0} exp(-(2k+1)² / (4 s))`` (Jacobi's theta transformation;
    the two agree to 1e-15 where both converge). Mean exit time r²/(6D)."""
    s = np.atleast_1d(np.asarray(s, float))
    out = np.empty_like(s)
    small = s < 0.05
    k = np.arange(12)[:, None]
    ss = np.maximum(s[small], 1e-300)
    out[small] = 2.0 / np.sqrt(np.pi * ss) * np.sum(np.exp(-(2 * k + 1) ** 2 / (4 * ss)), 0)
    n = np.arange(1, 60)[:, None]
    sb = s[~small]
    out[~small] = 1.0 - 2.0 * np.sum((-1.0) ** (n + 1) * np.exp(-(n * n) * np.pi ** 2 * sb), 0)
    return out


#: The upper tail of the exit time is sampled from ``S(s) ~ 2 exp(-π² s)`` above this
#: quantile (the next term is below 1e-7 of it there).
FPT_U_TAIL = 0.999
#: Below this quantile the exit time is found from the first term of the small-time form,
#: ``u = (2 / sqrt(π s)) exp(-1/(4 s))``, by Newton's method (the next term is below
#: exp(-2/s) ~ 1e-27 of it there); a linear table would put far too much mass at tiny s.
FPT_U_HEAD = 1e-3


def fpt_table(n: int = 1 << 14) -> np.ndarray:
    """Inverse CDF of the dimensionless exit time ``s = D T / r²`` on ``n`` quantiles
    evenly spaced in [FPT_U_HEAD, FPT_U_TAIL]."""
    s = np.concatenate([np.linspace(1e-3, 0.05, 20001)[:-1], np.linspace(0.05, 2.0, 40001)])
    F = sphere_exit_cdf(s)
    u = np.linspace(FPT_U_HEAD, FPT_U_TAIL, n)
    return np.interp(u, F, s)


#: Range of s = D t / r² of the tabulated conditioned position (below: free Gaussian
#: spread, the ball unfelt to exp(-1/(4 s)) ~ 1e-109; above: the ground mode, converged
#: to exp(-3 π² s) ~ 1e-8).
TRUNC_S_LO = 1e-3
TRUNC_S_HI = 0.6
#: The quantiles are tabulated on an even grid of ``v = sqrt(-2 ln(1 - u))`` up to this
#: value (u = 1 - 1e-12), so the tail of the spread is interpolated as finely as its body.
TRUNC_V_MAX = math.sqrt(2.0 * math.log(1e12))


def trunc_table(ns: int = 64, nu: int = 513) -> np.ndarray:
    """Quantiles of ``|Y| / (r sqrt(2 s))``, ``Y`` the displacement at time ``t = s r²/D`` of
    Brownian motion started at the centre of a ball of radius r and conditioned on not
    having left it by then, for ``s`` log-spaced in [TRUNC_S_LO, TRUNC_S_HI] (rows) and
    ``nu`` quantiles ``u = 1 - exp(-v²/2)``, ``v`` evenly spaced in [0, TRUNC_V_MAX]
    (columns; the tail of a Gaussian spread is then about linear in v). The radial
    density at ``x = |Y|/r`` is
    ``∝ x sum_n n sin(n π x) exp(-n² π² s)`` (the Dirichlet heat kernel of the ball from
    its centre), whose CDF is ``∝ sum_n exp(-n² π² s) (sin nπx - nπx cos nπx) / n``."""
    x = np.linspace(0.0, 1.0, 4001)
    u = -np.expm1(-0.5 * np.linspace(0.0, TRUNC_V_MAX, nu) ** 2)
    out = np.empty((ns, nu))
    nall = int(math.ceil(math.sqrt(45.0 / (math.pi ** 2 * TRUNC_S_LO)))) + 2
    m = np.arange(1, nall + 1)[:, None]
    a = m * math.pi * x[None, :]
    basis = (np.sin(a) - a * np.cos(a)) / m
    for row, s in enumerate(np.geomspace(TRUNC_S_LO, TRUNC_S_HI, ns)):
        nmax = int(math.ceil(math.sqrt(45.0 / (math.pi ** 2 * s)))) + 2
        F = np.exp(-(m[:nmax, 0] ** 2) * math.pi ** 2 * s) @ basis[:nmax]
        F = np.maximum.accumulate(np.maximum(F, 0.0))
        F /= F[-1]
        keep = np.concatenate([[True], np.diff(F) > 0])
        q = np.interp(u, F[keep], x[keep])
        q[0] = 0.0
        out[row] = q / math.sqrt(2.0 * s)
    return out


@numba.njit(cache=True, inline="always")
def _sample_fpt(u, tab):
    if u >= FPT_U_TAIL:
        return math.log(2.0 / (1.0 - u)) / (math.pi * math.pi)
    if u < FPT_U_HEAD:
        if u <= 0.0:
            return 0.0
        lu = math.log(u)
        x = 1.0 / (4.0 * (math.log(2.0 / math.sqrt(math.pi)) - lu))
        for _ in range(8):
            g = math.log(2.0) - 0.5 * math.log(math.pi * x) - 0.25 / x - lu
            x -= g / (0.25 / (x * x) - 0.5 / x)
            if x <= 0.0:
                x = 1e-6
        return x
    pos = (u - FPT_U_HEAD) * ((tab.size - 1) / (FPT_U_TAIL - FPT_U_HEAD))
    k = int(pos)
    if k >= tab.size - 1:
        return tab[tab.size - 1]
    a = pos - k
    return tab[k] + a * (tab[k + 1] - tab[k])


@numba.njit(cache=True)
def _sample_trunc(s, u, tab):
    """x = |Y| / r at dimensionless time s, conditioned on no exit (see trunc_table)."""
    ns, nu = tab.shape
    sc = min(max(s, TRUNC_S_LO), TRUNC_S_HI)
    pos = math.log(sc / TRUNC_S_LO) / math.log(TRUNC_S_HI / TRUNC_S_LO) * (ns - 1)
    j = min(int(pos), ns - 2)
    a = pos - j
    pu = math.sqrt(-2.0 * math.log1p(-u)) * ((nu - 1) / TRUNC_V_MAX) if u < 1.0 else nu
    k = min(int(pu), nu - 2)
    b = min(pu - k, 1.0)
    y0 = tab[j, k] + b * (tab[j, k + 1] - tab[j, k])
    y1 = tab[j + 1, k] + b * (tab[j + 1, k + 1] - tab[j + 1, k])
    x = (y0 + a * (y1 - y0)) * math.sqrt(2.0 * sc)
    if s < TRUNC_S_LO:      # free spread: the quantiles scale with sqrt(s)
        x *= math.sqrt(s / TRUNC_S_LO)
    return min(x, 1.0 - 1e-12)


# ============================================================== maps
@numba.njit(cache=True, parallel=True)
def neighbour_mask(lab, lut, periodic, out):
    """Bit ``2 a + (d > 0)`` of ``out[i, j, k]``: the neighbour along axis ``a`` in
    direction ``d`` holds water of the same class as the voxel (across the border only on
    a periodic grid). 0 for wall voxels."""
    nx, ny, nz = lab.shape
    for pi in prange(nx):
        i = np.int64(pi)
        for j in range(ny):
            for k in range(nz):
                c = lut[lab[i, j, k]]
                m = 0
                if c >= 0:
                    for a in range(3):
                        for d in range(2):
                            ii, jj, kk = i, j, k
                            step = 1 if d == 1 else -1
                            if a == 0:
                                ii += step
                                n = nx
                                v = ii
                            elif a == 1:
                                jj += step
                                n = ny
                                v = jj
                            else:
                                kk += step
                                n = nz
                                v = kk
                            if v < 0 or v >= n:
                                if not periodic:
                                    continue
                                ii %= nx
                                jj %= ny
                                kk %= nz
                            if lut[lab[ii, jj, kk]] == c:
                                m |= 1 << (2 * a + d)
                out[i, j, k] = m


# ============================================================== the kernel
@numba.njit(cache=True, inline="always")
def _axis_move(f, i, flat, c, w, s, sgn, n, stride, periodic, lab, lut, step, xtab,
               area, use_area, trans, scale):
    """One move along one axis that crosses a face into another code (the slow path);
    returns (f, i, flat, c, w, image change, rng state)."""
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
            g = _ONE_MINUS
        return g, i, flat, c, w, 0, s
    if c2 != c:
        tp = trans[c, c2]
        if tp < 1.0:
            s, u = _uniform(s)
            if u >= tp:
                g = 1.0 - r if sgn > 0 else r
                if g >= 1.0:
                    g = _ONE_MINUS
                return g, i, flat, c, w, 0, s
        r *= scale[c, c2]
        c = c2
    g = r if sgn > 0 else 1.0 - r
    if g >= 1.0:
        g = _ONE_MINUS
    return g, j, nflat, c, w, wrap, s


@numba.njit(cache=True, inline="always")
def _place(x, n, periodic):
    """Voxel index, fraction and image change of a coordinate ``x`` (voxels)."""
    k = math.floor(x)
    f = x - k
    if f >= 1.0:
        f = _ONE_MINUS
    ki = np.int64(k)
    m = np.int64(0)
    if periodic:
        if ki < 0 or ki >= n:
            m = ki // n
            ki -= m * n
    else:
        if ki < 0:
            ki = 0
            f = 0.0
        elif ki >= n:
            ki = n - 1
            f = _ONE_MINUS
    return ki, f, m


def _advance_to(lab, mask, jmap, accel, jq, jthr, margin, shape, periodic, lut, step, xtab,
                area, use_area, trans, scale, spacing, diff, dt, fpt, trunc, cut,
                ix, iy, iz, fx, fy, fz, cls, wt, img, rng, tw, nfix, njump, t_end):
    """Advance every walker to time ``t_end`` (µs), in place.

    A walker whose next fixed step would end after ``t_end`` stops before it (its state
    holds until then); a jump that would end after ``t_end`` is cut there (see the module
    docstring). ``lab``/``mask``/``jmap``/``area`` are flattened (C order); ``jmap`` holds
    ``floor((d - h_diag/2) / jq)`` (uint8), ``d`` the distance (nm) from the voxel centre
    to the nearest centre of a voxel of another class, so a ball of radius
    ``jmap * jq - |p - centre|`` around a point ``p`` of the voxel touches no other class;
    a walker jumps when ``jmap >= jthr`` (so the radius is at least ``rmin``). ``nfix`` and
    ``njump`` count the moves of each walker.
    """
    nx, ny, nz = shape[0], shape[1], shape[2]
    sx = ny * nz
    sy = nz
    sp0, sp1, sp2 = spacing[0], spacing[1], spacing[2]
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
        t = tw[w]
        nf = nfix[w]
        nj = njump[w]
        flat = i0 * sx + i1 * sy + i2
        st0 = step[c, 0]
        st1 = step[c, 1]
        st2 = step[c, 2]
        bits = np.uint64(0)
        nb = 0
        while True:
            if t >= t_end:
                break
            if accel and jmap[flat] >= jthr:
                # ---- first-passage jump
                o0 = (f0 - 0.5) * sp0
                o1 = (f1 - 0.5) * sp1
                o2 = (f2 - 0.5) * sp2
                r = jmap[flat] * jq - math.sqrt(o0 * o0 + o1 * o1 + o2 * o2) - margin
                s, u = _uniform(s)
                tau = _sample_fpt(u, fpt) * r * r / diff[c]
                if t + tau <= t_end or not cut:
                    rr = r
                    t += tau
                    stop = t >= t_end
                else:
                    sdim = diff[c] * (t_end - t) / (r * r)
                    s, u = _uniform(s)
                    rr = r * _sample_trunc(sdim, u, trunc)
                    t = t_end
                    stop = True
                s, u = _uniform(s)
                s, v = _uniform(s)
                cz = 2.0 * u - 1.0
                sz = math.sqrt(max(0.0, 1.0 - cz * cz))
                ph = 2.0 * math.pi * v
                i0, f0, d0 = _place(i0 + f0 + rr * sz * math.cos(ph) / sp0, nx, periodic)
                i1, f1, d1 = _place(i1 + f1 + rr * sz * math.sin(ph) / sp1, ny, periodic)
                i2, f2, d2 = _place(i2 + f2 + rr * cz / sp2, nz, periodic)
                m0 += d0
                m1 += d1
                m2 += d2
                flat = i0 * sx + i1 * sy + i2
                nj += 1
                if stop:
                    break
                continue
            # ---- fixed steps
            if t + dt > t_end:
                break
            nleft = int((t_end - t) / dt)
            if nleft < 1:
                nleft = 1
            done = 0
            while done < nleft:
                done += 1
                if nb < 3:
                    s, bits = _next(s)
                    bits = bits >> np.uint64(4)
                    nb = 60
                b = bits & np.uint64(7)
                bits = bits >> np.uint64(3)
                nb -= 3
                # axis 0
                g = f0 + st0 * (np.float64((b & np.uint64(1)) != np.uint64(0)) * 2.0 - 1.0)
                up = np.int64(g >= 1.0)
                dn = np.int64(g < 0.0)
                k = up - dn
                if ((np.int64(mask[flat]) >> (0 + up)) | (1 - up - dn)) & 1:
                    g -= k
                    i0 += k
                    flat += k * sx
                    if i0 < 0 or i0 >= nx:
                        i0 -= k * nx
                        flat -= k * nx * sx
                        m0 += k
                    f0 = g
                else:
                    sg = 1.0 if k > 0 else -1.0
                    f0, i0, flat, c2, ww, dm, s = _axis_move(
                        f0, i0, flat, c, ww, s, sg, nx, sx, periodic, lab, lut, st0,
                        xtab, area, use_area, trans, scale)
                    m0 += dm
                    if c2 != c:
                        c = c2
                        st0 = step[c, 0]
                        st1 = step[c, 1]
                        st2 = step[c, 2]
                # axis 1
                g = f1 + st1 * (np.float64((b & np.uint64(2)) != np.uint64(0)) * 2.0 - 1.0)
                up = np.int64(g >= 1.0)
                dn = np.int64(g < 0.0)
                k = up - dn
                if ((np.int64(mask[flat]) >> (2 + up)) | (1 - up - dn)) & 1:
                    g -= k
                    i1 += k
                    flat += k * sy
                    if i1 < 0 or i1 >= ny:
                        i1 -= k * ny
                        flat -= k * ny * sy
                        m1 += k
                    f1 = g
                else:
                    sg = 1.0 if k > 0 else -1.0
                    f1, i1, flat, c2, ww, dm, s = _axis_move(
                        f1, i1, flat, c, ww, s, sg, ny, sy, periodic, lab, lut, st1,
                        xtab, area, use_area, trans, scale)
                    m1 += dm
                    if c2 != c:
                        c = c2
                        st0 = step[c, 0]
                        st1 = step[c, 1]
                        st2 = step[c, 2]
                # axis 2
                g = f2 + st2 * (np.float64((b & np.uint64(4)) != np.uint64(0)) * 2.0 - 1.0)
                up = np.int64(g >= 1.0)
                dn = np.int64(g < 0.0)
                k = up - dn
                if ((np.int64(mask[flat]) >> (4 + up)) | (1 - up - dn)) & 1:
                    g -= k
                    i2 += k
                    flat += k
                    if i2 < 0 or i2 >= nz:
                        i2 -= k * nz
                        flat -= k * nz
                        m2 += k
                    f2 = g
                else:
                    sg = 1.0 if k > 0 else -1.0
                    f2, i2, flat, c2, ww, dm, s = _axis_move(
                        f2, i2, flat, c, ww, s, sg, nz, 1, periodic, lab, lut, st2,
                        xtab, area, use_area, trans, scale)
                    m2 += dm
                    if c2 != c:
                        c = c2
                        st0 = step[c, 0]
                        st1 = step[c, 1]
                        st2 = step[c, 2]
                if accel and jmap[flat] >= jthr:
                    break
            t += done * dt
            nf += done
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
        tw[w] = t
        nfix[w] = nf
        njump[w] = nj


#: The kernel over threads (long calls) and on one thread (short calls, where waking the
#: threads of a loaded machine costs more than the work).
advance_to = numba.njit(cache=True, parallel=True)(_advance_to)
advance_to_serial = numba.njit(cache=True)(_advance_to)


@numba.njit(cache=True)
def tally(cls, start, wt, nclass, counts, wsum):
    """Add walker counts and weights by (start class, current class)."""
    for w in range(cls.size):
        a = start[w]
        b = cls[w]
        counts[a, b] += 1
        wsum[a, b] += wt[w]


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
