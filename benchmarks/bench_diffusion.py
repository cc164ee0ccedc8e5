"""Random-walk engine (sheetview.measures.diffusion): fixed-step walker steps per second side
by side with a plain numpy walker of the same scheme and a bare generator loop (how loaded
the machine is), the realistic 400³ / 100,000-walker relaxation run, and the scaling with
walkers and grid size.

    .venv/bin/python benchmarks/bench_diffusion.py [--quick] [--budget SECONDS]

Structures (periodic, h = 0.2 nm, normal along z):

* ``slits``: slit pores 18 voxels wide between 2-voxel solid sheets (the kernel rates);
* ``mixed``: slits 5, 10, 20 and 50 voxels wide (1, 2, 4 and 10 nm) between 2-voxel sheets,
  repeated: C-S-H-sized pores with the realistic parameters (bulk water D = 2299 nm²/µs,
  ρ2 = 3.7e-3 nm/µs, bulk T2 2.5 s). That run is stopped after ``--budget`` seconds of
  walking (``max_steps``); the time to reach M < 1 % is extrapolated from the simulated
  time per wall second of its second half (the cost per simulated µs is steady once the
  walkers have spread), and the lower bound of the work is printed beside it.
"""
import argparse
import math
import time

import numba
import numpy as np

from sheetview.grid import GEL, SOLID, PhaseGrid
from sheetview.measures import diffusion as dm

D0 = dm.D_BULK_WATER_NM2_PER_US
H = 0.2
RHO = 3.7e-3


def slits(n):
    lab = np.full((n, n, n), GEL, np.uint8)
    for z0 in range(18, n, 20):
        lab[:, :, z0:z0 + 2] = SOLID
    return PhaseGrid(lab, H, periodic=True)


def mixed(n, nz=None):
    nz = n if nz is None else nz
    lab = np.full((n, n, nz), SOLID, np.uint8)
    z, k = 0, 0
    widths = (5, 10, 20, 50)
    while True:
        w = widths[k % 4]
        if z + w + 2 > nz:
            break
        lab[:, :, z:z + w] = GEL
        z += w + 2
        k += 1
    return PhaseGrid(lab, H, periodic=True)


def engine(g, n, accelerate=False, rho=None):
    a = 9 * H
    return dm._build(g, water_phases=None, diffusivity_nm2_per_us=None, d_bulk_nm2_per_us=D0,
                     rho2_nm_per_us=D0 / a if rho is None else rho,
                     rho2_outside_nm_per_us=None, rho2_by_interface=None,
                     step_fraction=dm.DEFAULT_STEP_FRACTION, surface="smooth", n_walkers=n,
                     accelerate=accelerate)


def numba_rate(eng, n, steps, seed=0):
    W = dm._Walkers(eng, n, seed)
    W.advance(eng, 1)
    t = time.perf_counter()
    W.advance(eng, steps)
    el = time.perf_counter() - t
    return (W.nfix.sum() - n) / el


@numba.njit(cache=True)
def _xorshift_loop(n):
    s = np.uint64(88172645463325252)
    acc = np.uint64(0)
    for _ in range(n):
        s ^= s >> np.uint64(12)
        s ^= s << np.uint64(25)
        s ^= s >> np.uint64(27)
        acc += s * np.uint64(0x2545F4914F6CDD1D)
    return acc


def generator_rate():
    _xorshift_loop(10)
    t = time.perf_counter()
    _xorshift_loop(200_000_000)
    return 2e8 / (time.perf_counter() - t)


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


def realistic(n, walkers, budget, accelerate, log):
    """The C-S-H-sized run for about ``budget`` seconds of walking."""
    g = mixed(n)
    t0 = time.perf_counter()
    eng = engine(g, walkers, accelerate=accelerate, rho=RHO)
    setup = time.perf_counter() - t0
    rates = dm._face_rates(eng)
    t_need = math.log(100.0) / (float(rates.min()) + 1e-6 / dm.DEFAULT_T2_BULK_S)
    W = dm._Walkers(eng, walkers, 1)
    marks = []
    t0 = time.perf_counter()
    for t in dm._record_times(eng.dt):
        W.advance_to(eng, t, cut=False)
        el = time.perf_counter() - t0
        marks.append((el, t, float(np.mean(W.wt)) * math.exp(-t * 1e-6 / 2.5), W.moves))
        if el > budget:
            break
    el, t_end, m_end, moves = marks[-1]
    half = [mk for mk in marks if mk[0] >= 0.5 * el][0]
    us_per_s = (t_end - half[1]) / max(el - half[0], 1e-9)
    eta = el + (t_need - t_end) / us_per_s
    log(f"| {'accelerated' if accelerate else 'fixed steps only'} | {setup:.1f} | "
        f"{el:.0f} | {t_end:.4g} | {m_end:.4f} | {moves:.3g} | "
        f"{W.njump.mean():.3g} | {us_per_s:.3g} | {t_need:.3g} | {eta:.3g} |")
    return eng, W, t_need


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--quick", action="store_true")
    ap.add_argument("--budget", type=float, default=60.0)
    args = ap.parse_args()
    lines = []

    def log(s):
        print(s, flush=True)
        lines.append(s)

    nthreads = numba.get_num_threads()
    log(f"threads: {nthreads}")
    gr = generator_rate()
    log(f"bare xorshift64* loop (1 thread): {gr:.3g} iterations/s "
        f"(the share of a core this process gets: compare runs by it)")
    n = 400 if not args.quick else 200
    g = slits(n)
    t = time.perf_counter()
    eng = engine(g, 100_000)
    log(f"{n}^3 set-up, fixed steps (mask + surface-area factor): "
        f"{time.perf_counter() - t:.2f} s")
    t = time.perf_counter()
    engine(g, 100_000, accelerate=True)
    log(f"{n}^3 set-up with the jump map (edt, periodic padding): "
        f"{time.perf_counter() - t:.2f} s")
    rn = numba_rate(eng, 100_000, 200)
    rp = numpy_rate(eng, 100_000, 5)
    log(f"| fixed-step engine, 100,000 walkers, {n}^3 slits | walker steps/s |\n|---|---|\n"
        f"| numba ({nthreads} threads) | {rn:.3g} |\n| plain numpy | {rp:.3g} |\n"
        f"| ratio | {rn / rp:.1f}x |")
    numba.set_num_threads(1)
    r1 = numba_rate(eng, 100_000, 200)
    numba.set_num_threads(nthreads)
    log(f"1 thread: {r1:.3g} steps/s; {nthreads} threads / 1 thread = {rn / r1:.2f}x; "
        f"steps per generator iteration of one core: {r1 / gr:.3g}")
    # the first version's case: rho a / D = 1, 100,000 walkers until M < 1 %
    t = time.perf_counter()
    res = dm.relaxation_walk(g, n_walkers=100_000, seed=1, rho2_nm_per_us=D0 / (9 * H),
                             t2_bulk_s=None, compare_fast=False, invert=False)
    log(f"{n}^3 slits, rho a/D = 1, 100,000 walkers to M < 1 % (accelerated, set-up "
        f"included): {time.perf_counter() - t:.1f} s, {res.steps} moves/walker "
        f"({res.settings['jumps_per_walker']:.3g} jumps), M_end = {res.m[-1]:.4f}")
    # the realistic run
    log(f"\nRealistic: mixed slits 1-10 nm, {n}^3 at 0.2 nm, 100,000 walkers, D = {D0}, "
        f"rho2 = {RHO} nm/us, budget {args.budget:.0f} s of walking")
    log("| engine | set-up s | walked s | t reached (µs) | M | moves/walker | jumps/walker | "
        "µs per wall s | t for M < 1 % (µs) | extrapolated wall s |\n|---|---|---|---|---|---|"
        "---|---|---|---|")
    eng_a, W, t_need = realistic(n, 100_000, args.budget, True, log)
    realistic(n, 100_000, args.budget / 2, False, log)
    hits = math.log(100.0) * D0 / (RHO * eng_a.step[0, 0] * H)
    log(f"lower bound: a walker that ends at M = 1 % has taken about ln(100) D/(rho delta) = "
        f"{hits:.3g} wall hits (each removes rho delta/D of its weight); every hit is a "
        f"fixed step, so 100,000 walkers need >= {hits * 1e5:.3g} fixed steps")
    # scaling
    log("\n| walkers | grid | fixed steps/s |\n|---|---|---|")
    for nw in (10_000, 100_000, 1_000_000):
        if args.quick and nw > 100_000:
            continue
        log(f"| {nw:,} | {n}^3 | {numba_rate(eng, nw, max(20, 2_000_000 // nw * 10)):.3g} |")
    sizes = (100, 200, 400) if not args.quick else (100, 200)
    for s in sizes:
        e2 = engine(slits(s), 100_000)
        log(f"| 100,000 | {s}^3 | {numba_rate(e2, 100_000, 200):.3g} |")
    log("\n| grid | walkers | accelerated: simulated µs per wall s (mixed slits, realistic) |"
        "\n|---|---|---|")
    for s, nw in ((100, 100_000), (200, 100_000), (n, 10_000), (n, 100_000)):
        g2 = mixed(s)
        e2 = engine(g2, nw, accelerate=True, rho=RHO)
        W2 = dm._Walkers(e2, nw, 2)
        W2.advance_to(e2, 0.05, cut=False)
        t = time.perf_counter()
        W2.advance_to(e2, 0.15, cut=False)
        log(f"| {s}^3 | {nw:,} | {0.1 / (time.perf_counter() - t):.3g} |")


if __name__ == "__main__":
    main()
