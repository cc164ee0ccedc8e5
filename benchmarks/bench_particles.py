"""Particle tables: reading and rasterizing 100,000 spheres at 0.2 nm, beside a numpy baseline.

Target (issue 18, particle packings): reading (CSV and Parquet) and rasterizing 100,000
spheres at a 0.2 nm voxel in <= 5 s. The reference in the same run is a plain numpy
rasterizer (per sphere, the voxel centres of its bounding box tested at once with array
operations) on a 10,000-sphere subset, scaled to 100,000. Inputs are generated here
(invented data: a packing of non-overlapping polydisperse spheres from
sheetview.synth.pack_particles is too slow to make at this size in a benchmark, so the
spheres are placed at random with overlaps, which costs the rasterizer the same).
JIT compile time is measured apart (a first call on a tiny set).

    .venv/bin/python benchmarks/bench_particles.py
"""
from __future__ import annotations

import time
from pathlib import Path

import numpy as np

import sheetview as sv
from sheetview.grid import SOLID
from sheetview.particles import ParticleSet, rasterize_particles

DATA = Path(__file__).resolve().parent / "_data"
N = 100_000


def spheres(n, seed=0, fraction=0.5, median=1.0):
    rng = np.random.default_rng(seed)
    r = median * np.exp(0.2 * rng.standard_normal(n))
    L = float((4 / 3 * np.pi * (r ** 3).sum() / fraction) ** (1 / 3))
    return ParticleSet(rng.random((n, 3)) * L, r, [1.0, 0, 0, 0],
                       sv.Box((0, 0, 0), (L, L, L), periodic=True), kind="spheres")


def numpy_rasterize(ps, voxel):
    """Reference: per sphere, its bounding box of voxel centres tested with numpy (no
    periodic wrap: spheres near the faces are clipped)."""
    shape, spacing, origin = sv.grid.grid_geometry(ps.domain, voxel)
    lab = np.zeros(shape, np.uint8)
    sp = np.asarray(spacing)
    org = np.asarray(origin)
    for c, r in zip(ps.centers, ps.semi_axes[:, 0]):
        lo = np.maximum(np.ceil((c - r - org) / sp - 0.5).astype(int), 0)
        hi = np.minimum(np.floor((c + r - org) / sp - 0.5).astype(int), np.asarray(shape) - 1)
        if np.any(hi < lo):
            continue
        ax = [org[a] + (np.arange(lo[a], hi[a] + 1) + 0.5) * sp[a] - c[a] for a in range(3)]
        d2 = ax[0][:, None, None] ** 2 + ax[1][None, :, None] ** 2 + ax[2][None, None, :] ** 2
        sub = lab[lo[0]:hi[0] + 1, lo[1]:hi[1] + 1, lo[2]:hi[2] + 1]
        sub[d2 <= r * r] = SOLID
    return lab


def main():
    DATA.mkdir(exist_ok=True)
    ps = spheres(N)
    paths = {}
    for suffix in (".csv", ".parquet"):
        p = DATA / f"spheres_{N}{suffix}"
        sv.write(ps, p, force=True)
        paths[suffix] = p
    t = time.perf_counter()
    rasterize_particles(spheres(10), 0.2)
    compile_s = time.perf_counter() - t
    rows = []
    for suffix, p in paths.items():
        t0 = time.perf_counter()
        back = sv.read(p)
        t1 = time.perf_counter()
        g = rasterize_particles(back, 0.2)
        t2 = time.perf_counter()
        rows.append((suffix, t1 - t0, t2 - t1, t2 - t0, g.shape))
    sub = spheres(10_000, seed=1)
    sub = ParticleSet(sub.centers, sub.semi_axes, sub.rotations,
                      sv.Box(sub.domain.min, sub.domain.max), "spheres")  # no wrap: as numpy
    t = time.perf_counter()
    lab = numpy_rasterize(sub, 0.2)
    ref = (time.perf_counter() - t) * N / 10_000
    t = time.perf_counter()
    g = rasterize_particles(sub, 0.2)
    ours_sub = time.perf_counter() - t
    agree = float(np.mean(lab == np.where(g.labels == SOLID, SOLID, 0)))
    from sheetview.measures.chords import exact_chords
    exact_chords(spheres(50), 100, seed=0)  # compile
    t = time.perf_counter()
    exact_chords(ps, 20_000, seed=1)
    chords_s = time.perf_counter() - t
    print(f"JIT compile (first call, excluded): {compile_s:.2f} s")
    print(f"exact chords, {N:,} spheres (periodic), 20,000 lines of 4 box lengths: "
          f"{chords_s:.1f} s")
    print("| input | read s | rasterize s | total s (target <= 5 s) | grid |")
    for suffix, r, ra, tot, shape in rows:
        print(f"| {N:,} spheres {suffix} | {r:.2f} | {ra:.2f} | {tot:.2f} | "
              f"{'x'.join(map(str, shape))} |")
    print(f"numpy baseline, 10,000 spheres scaled to 100,000: {ref:.1f} s; ours on the same "
          f"10,000: {ours_sub:.3f} s (ratio {ref * 10_000 / N / ours_sub:.0f}x); voxels "
          f"agreeing: {agree:.5f}")


if __name__ == "__main__":
    main()
