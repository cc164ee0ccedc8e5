"""Random-walk engine (sheetview.measures.diffusion): walker steps per second side by side
with a plain numpy walker of the same scheme, the 400³ relaxation case, and the scaling
with walkers, grid size and threads.

    .venv/bin/python benchmarks/bench_diffusion.py [--quick]

The structure: periodic slit pores 18 voxels wide between solid sheets 2 voxels thick
(h = 0.2 nm), normal along z; relaxivity chosen so that rho a / D = 1 (a = 1.8 nm), the
regime where the decay to 1 % takes a few thousand steps. (With C-S-H parameters, bulk
water D and rho2 = 3.7e-3 nm/us, rho a / D ~ 1e-6 and the decay takes ~1e9 steps per
walker: see docs/diffusion.md.)
"""
import argparse
import time

import numba
import numpy as np

from sheetview.grid import GEL, SOLID, PhaseGrid
from sheetview.measures import diffusion as dm

D0 = dm.D_BULK_WATER_NM2_PER_US
H = 0.2


def slits(n):
    lab = np.full((n, n, n), GEL, np.uint8)
    for z0 in range(18, n, 20):
        lab[:, :, z0:z0 + 2] = SOLID
    return PhaseGrid(lab, H, periodic=True)


def engine(g, n):
    a = 9 * H
    eng = dm._build(g, water_phases=None, diffusivity_nm2_per_us=None, d_bulk_nm2_per_us=D0,
                    rho2_nm_per_us=D0 / a, rho2_outside_nm_per_us=None,
                    rho2_by_interface=None, step_fraction=dm.DEFAULT_STEP_FRACTION,
                    surface="smooth", n_walkers=n)
    return eng


def numba_rate(eng, n, steps, seed=0):
    W = dm._Walkers(eng, n, seed)
    W.advance(eng, 1)
    t = time.perf_counter()
    W.advance(eng, steps)
    return n * steps / (time.perf_counter() - t)


def numpy_rate(eng, n, steps, seed=0):
    """The same scheme in plain numpy, vectorised over walkers (one class, weights)."""
    W = dm._Walkers(eng, n, seed)
    lab = eng.lab.reshape(tuple(eng.shape))
    shape = np.asarray(lab.shape)
    idx = np.stack([W.ix, W.iy, W.iz], 1)
    f = np.stack([W.fx, W.fy, W.fz], 1)
    w = np.ones(n)
    L = eng.step[0]
    x = eng.xtab[0, SOLID]
    p = x / (1 + 0.5 * x)
    rng = np.random.default_rng(seed)
    t = time.perf_counter()
    for _ in range(steps):
        sg = rng.integers(0, 2, (n, 3)) * 2 - 1
        for a in range(3):
            g = f[:, a] + sg[:, a] * L[a]
            out = (g < 0) | (g >= 1)
            if out.any():
                o = np.flatnonzero(out)
                nb = idx[o].copy()
                nb[:, a] = (nb[:, a] + sg[o, a]) % shape[a]
                wall = eng.lut[lab[nb[:, 0], nb[:, 1], nb[:, 2]]] < 0
                r = np.where(sg[o, a] > 0, g[o] - 1, -g[o])
                ow, om = o[wall], o[~wall]
                g[ow] = np.where(sg[ow, a] > 0, 1 - r[wall], r[wall])
                w[ow] *= 1 - p
                g[om] = np.where(sg[om, a] > 0, r[~wall], 1 - r[~wall])
                idx[om, a] = nb[~wall, a]
            f[:, a] = g
    return n * steps / (time.perf_counter() - t)


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--quick", action="store_true")
    args = ap.parse_args()
    nthreads = numba.get_num_threads()
    print(f"threads: {nthreads}")
    g = slits(400)
    t = time.perf_counter()
    eng = engine(g, 100_000)
    print(f"400^3 set-up (surface-area factor): {time.perf_counter() - t:.2f} s")
    # side by side: numba engine vs plain numpy
    rn = numba_rate(eng, 100_000, 200)
    rp = numpy_rate(eng, 100_000, 5)
    print(f"| engine | steps/s |\n|---|---|\n| numba ({nthreads} threads) | {rn:.3g} |\n"
          f"| plain numpy | {rp:.3g} |\n| ratio | {rn / rp:.1f}x |")
    numba.set_num_threads(1)
    r1 = numba_rate(eng, 100_000, 200)
    numba.set_num_threads(nthreads)
    print(f"1 thread: {r1:.3g} steps/s; {nthreads} threads / 1 thread = {rn / r1:.2f}x")
    # the 400^3 case: 100,000 walkers until M < 1 %
    t = time.perf_counter()
    res = dm.relaxation_walk(g, n_walkers=100_000, seed=1, rho2_nm_per_us=D0 / (9 * H),
                             t2_bulk_s=None, compare_fast=False, invert=False)
    el = time.perf_counter() - t
    print(f"400^3, 100,000 walkers to M < 1 %: {el:.1f} s, {res.steps} steps/walker "
          f"({res.steps * 1e5 / el:.3g} steps/s overall), M_end = {res.m[-1]:.4f}")
    t = time.perf_counter()
    inv = dm.invert_t2(res.t_us * 1e-6, res.m, sigma=res.m_se)
    print(f"T2 inversion: {time.perf_counter() - t:.2f} s, {inv}")
    # scaling
    print("| walkers | grid | steps/s |\n|---|---|---|")
    sizes = (100, 200, 400) if not args.quick else (100, 200)
    for n in (10_000, 100_000, 1_000_000):
        if args.quick and n > 100_000:
            continue
        print(f"| {n:,} | 400^3 | {numba_rate(eng, n, max(20, 2_000_000 // n * 10)):.3g} |")
    for s in sizes:
        e2 = engine(slits(s), 100_000)
        print(f"| 100,000 | {s}^3 | {numba_rate(e2, 100_000, 200):.3g} |")


if __name__ == "__main__":
    main()
