"""Chords: exact IUR chords through prisms against trimesh ray casting, and IUR chords
through a voxel grid against numpy sampling and the axis rows.

Part 1 (exact). Same lines, same prisms. trimesh (with the embree backend when embreex is
installed) casts each line as a ray with ``multiple_hits=True`` against a mesh of all prism
faces (8 triangles per prism); its hits are turned into solid intervals by a depth counter
(entering +1, leaving -1, faces oriented outward), clipped to the domain, and compared
line by line with sheetview's solid chords (tolerance ``--tol`` nm).

Part 2 (voxel grid). The same structure rasterized on a ``--grid``^3 grid; ``grid_chords``
with ``--grid-lines`` lines (default interpolated boundary, and ``boundary="faces"``),
against (a) a plain numpy reference that samples the voxel label every quarter voxel along
each line (nearest voxel: the faces model up to the sampling step; run on a tenth of the
lines and scaled) and (b) the axis rows of the same grid (``voxel_rows``, the previous
definition for volumes).

Usage: .venv/bin/python benchmarks/bench_chords.py [--n-prisms 100000] [--n-lines 100000]
       [--repeat 2] [--grid 400] [--grid-lines 100000] [--part exact|grid|both]
Each method runs ``--repeat`` times, alternating, and its best time is reported (the
machine may be shared). Writes nothing; prints a table.
"""
from __future__ import annotations

import argparse
import time

import numpy as np
import trimesh

from sheetview.domain import Box, Sphere
from sheetview.grid import OUTSIDE, SOLID, PhaseGrid
from sheetview.measures._rays import domain_interval
from sheetview.measures.chords import (exact_chords, grid_chords, iur_lines,
                                       signed_distance, voxel_rows)
from sheetview.structure import Structure


def make_structure(n, radius=50.0, seed=0):
    """Invented test structure: random triangles (edges ~3 nm, thickness 0.3 nm), partly
    stacked in pairs 1.4 nm apart, centres uniform in a ball of radius-5 nm."""
    rng = np.random.default_rng(seed)
    m = n // 2
    c = rng.normal(size=(m, 3))
    c *= ((radius - 5) * rng.random(m) ** (1 / 3) / np.linalg.norm(c, axis=1))[:, None]
    tri = c[:, None, :] + rng.normal(0, 1.5, (m, 3, 3))
    nrm = np.cross(tri[:, 1] - tri[:, 0], tri[:, 2] - tri[:, 0])
    nrm /= np.linalg.norm(nrm, axis=1, keepdims=True)
    tri2 = tri + 1.4 * nrm[:, None, :] + rng.normal(0, 0.3, (m, 1, 3))
    v = np.concatenate([tri, tri2])[:n]
    return Structure(v, np.full(len(v), 0.3), Sphere((0, 0, 0), radius))


def prism_mesh(s: Structure) -> trimesh.Trimesh:
    c = s.prism_corners()  # bottom a b c, top a' b' c'
    N = len(c)
    base = (np.arange(N) * 6)[:, None]
    f = [[3, 4, 5], [0, 2, 1]]
    for i in range(3):
        j = (i + 1) % 3
        f += [[i, j, j + 3], [i, j + 3, i + 3]]
    faces = (base[:, None, :] + np.array(f)[None]).reshape(-1, 3)
    return trimesh.Trimesh(c.reshape(-1, 3), faces, process=False)


def trimesh_intervals(mesh, o, u, tlo, thi, engine):
    t0 = time.perf_counter()
    if hasattr(engine, "_scene"):  # embree: ask for enough hits for every crossing
        tri, ray, loc = engine.intersects_id(o, u, multiple_hits=True, max_hits=100_000,
                                             return_locations=True)
    else:
        loc, ray, tri = engine.intersects_location(o, u, multiple_hits=True)
    dt = time.perf_counter() - t0
    t = np.einsum("ij,ij->i", loc - o[ray], u[ray])
    sign = -np.sign(np.einsum("ij,ij->i", mesh.face_normals[tri], u[ray]))  # +1 entering
    order = np.lexsort((-sign, t, ray))  # at equal t, enter before leave (touching prisms)
    ray, t, sign = ray[order], t[order], sign[order]
    out = {}
    start = np.r_[0, np.flatnonzero(np.diff(ray)) + 1]
    stop = np.r_[start[1:], len(ray)]
    for a, b in zip(start, stop):
        i = int(ray[a])
        depth = np.cumsum(sign[a:b])
        prev = np.r_[0, depth[:-1]]
        s_ = t[a:b][(prev <= 0) & (depth > 0)]
        e_ = t[a:b][(prev > 0) & (depth <= 0)]
        k = min(len(s_), len(e_))
        s_, e_ = np.maximum(s_[:k], tlo[i]), np.minimum(e_[:k], thi[i])
        keep = e_ > s_
        out[i] = (s_[keep], e_[keep])
    return out, dt


def grid_lines(g, n_all, n_lines, seed):
    """The first ``n_lines`` of the ``n_all`` lines of ``grid_chords`` (grid circumsphere,
    same seed): origins, directions, parameter interval in the grid."""
    sp = np.asarray(g.spacing)
    lo = np.asarray(g.origin)
    hi = lo + np.asarray(g.shape) * sp
    c, R = 0.5 * (lo + hi), 0.5 * float(np.linalg.norm(hi - lo))
    o, u = iur_lines(n_all, c, R * (1 + 1e-9), seed)
    o, u = o[:n_lines], u[:n_lines]
    tlo, thi = domain_interval(Box(tuple(lo), tuple(hi)), o, u,
                                np.full(n_lines, 2 * R * (1 + 1e-9)))
    return o, u, tlo, thi


def numpy_sampling(g, n_all, n_lines, seed, step=0.25):
    """Reference: the voxel label sampled every ``step`` voxels along each of the first
    ``n_lines`` lines, runs of solid samples counted. Returns (solid runs, seconds)."""
    sp = np.asarray(g.spacing)
    lo = np.asarray(g.origin)
    o, u, tlo, thi = grid_lines(g, n_all, n_lines, seed)
    lab = g.labels
    n = np.asarray(g.shape)
    dt = step * float(sp.min())
    t0 = time.perf_counter()
    count = 0
    for i in range(n_lines):
        if not tlo[i] < thi[i]:
            continue
        t = np.arange(tlo[i] + dt / 2, thi[i], dt)
        idx = np.clip(np.floor((o[i] + t[:, None] * u[i] - lo) / sp).astype(np.int64), 0, n - 1)
        L = lab[idx[:, 0], idx[:, 1], idx[:, 2]]
        solid = np.concatenate([[False], L == SOLID, [False]])
        count += int(np.count_nonzero(solid[1:] & ~solid[:-1]))
        _ = L == OUTSIDE
    return count, time.perf_counter() - t0


def random_grid(n, seed=0, corr=3.0):
    """Invented two-phase grid: Gaussian-filtered noise (correlation about ``corr``
    voxels) thresholded at porosity 0.5, OUTSIDE beyond the inscribed sphere (a spherical
    pore, as prisms in a sphere domain give), voxels of 0.25 nm."""
    from scipy import ndimage as ndi
    rng = np.random.default_rng(seed)
    f = ndi.gaussian_filter(rng.standard_normal((n, n, n), dtype=np.float32), corr)
    lab = np.where(f > 0, SOLID, 3).astype(np.uint8)
    del f
    x = np.arange(n) - (n - 1) / 2
    r2 = x[:, None] ** 2 + x[None, :] ** 2
    for i in range(n):
        lab[i][r2 + x[i] ** 2 > (n / 2) ** 2] = OUTSIDE
    return PhaseGrid(lab, spacing=0.25)


def scipy_trilinear_sampling(g, F, n_all, n_lines, seed, step=0.25):
    """Reference for the interpolated boundary: the first ``n_lines`` lines, the signed
    distance interpolated by ``scipy.ndimage.map_coordinates`` (order 1) every ``step``
    voxels, sign changes counted. Returns (sign changes, seconds)."""
    from scipy.ndimage import map_coordinates
    sp = np.asarray(g.spacing)
    lo = np.asarray(g.origin)
    o, u, tlo, thi = grid_lines(g, n_all, n_lines, seed)
    dt = step * float(sp.min())
    t0 = time.perf_counter()
    count = 0
    for i in range(n_lines):
        if not tlo[i] < thi[i]:
            continue
        t = np.arange(tlo[i] + dt / 2, thi[i], dt)
        q = (o[i] + t[:, None] * u[i] - lo) / sp - 0.5
        v = map_coordinates(F, q.T, order=1, mode="nearest")
        count += int(np.count_nonzero((v[1:] > 0) != (v[:-1] > 0)))
    return count, time.perf_counter() - t0


def grid_part(a):
    g = random_grid(a.grid)
    print(f"\nvoxel grid {g.shape[0]}^3 (Gaussian random field, porosity 0.5, OUTSIDE beyond "
          f"the inscribed sphere), {a.grid_lines} IUR lines")
    grid_chords(g.__class__(g.labels[:40, :40, :40], g.spacing), 100, seed=0)  # warm up
    grid_chords(g.__class__(g.labels[:40, :40, :40], g.spacing), 100, seed=0, boundary="faces")
    best = {}
    for _ in range(max(1, a.repeat)):
        for name, fn in (
                ("signed distance (separable, capped)", lambda: signed_distance(g)),
                ("grid_chords, interpolated (whole)", lambda: grid_chords(g, a.grid_lines, seed=a.seed)),
                ("grid_chords, faces", lambda: grid_chords(g, a.grid_lines, seed=a.seed,
                                                            boundary="faces")),
                ("axis rows (voxel_rows)", lambda: voxel_rows(g))):
            t0 = time.perf_counter()
            out = fn()
            dt = time.perf_counter() - t0
            if dt < best.get(name, (np.inf,))[0]:
                best[name] = (dt, out)
    n_ref = max(1, a.grid_lines // 10)
    cnt, t_ref = numpy_sampling(g, a.grid_lines, n_ref, a.seed)
    t_ref_all = t_ref * a.grid_lines / n_ref
    faces = best["grid_chords, faces"][1]
    n_faces = int(np.count_nonzero(faces.line["solid"] < n_ref))
    print(f"{'method':44s} {'time (s)':>10s} {'chords':>10s}")
    for name, (dt, out) in best.items():
        n = (len(out.lengths["solid"]) + len(out.lengths["pore"])) if hasattr(out, "lengths") else ""
        print(f"{name:44s} {dt:10.2f} {n!s:>10s}")
    print(f"{'numpy sampling every 1/4 voxel (scaled)':44s} {t_ref_all:10.2f} "
          f"{'(' + str(n_ref) + ' lines run)':>10s}")
    n_ref2 = max(1, a.grid_lines // 100)
    _, t_ref2 = scipy_trilinear_sampling(g, best["signed distance (separable, capped)"][1],
                                         a.grid_lines, n_ref2, a.seed)
    t_ref2_all = t_ref2 * a.grid_lines / n_ref2
    print(f"{'scipy map_coordinates(order=1), 1/4 voxel (scaled)':44s} {t_ref2_all:10.2f} "
          f"{'(' + str(n_ref2) + ' lines run)':>10s}")
    t_int = best["grid_chords, interpolated (whole)"][0]
    t_fac = best["grid_chords, faces"][0]
    print(f"solid runs on the first {n_ref} lines: numpy sampling {cnt}, faces kernel {n_faces}")
    print(f"speed-up: faces over numpy label sampling {t_ref_all / t_fac:.1f}x; interpolated "
          f"(whole) over scipy trilinear sampling {t_ref2_all / t_int:.1f}x, over numpy label "
          f"sampling {t_ref_all / t_int:.1f}x; axis rows / interpolated lines: "
          f"{best['axis rows (voxel_rows)'][0] / t_int:.2f}")


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--n-prisms", type=int, default=100_000)
    ap.add_argument("--n-lines", type=int, default=100_000)
    ap.add_argument("--tol", type=float, default=1e-4)
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--repeat", type=int, default=2)
    ap.add_argument("--grid", type=int, default=400)
    ap.add_argument("--grid-lines", type=int, default=100_000)
    ap.add_argument("--part", choices=("exact", "grid", "both"), default="both")
    a = ap.parse_args()
    if a.part != "exact":
        grid_part(a)
    if a.part == "grid":
        return
    s = make_structure(a.n_prisms)
    R = s.domain.radius
    # warm the numba cache
    exact_chords(s.subset(np.arange(100)), 100, seed=0)
    # the same lines
    o, u = iur_lines(a.n_lines, np.zeros(3), R * (1 + 1e-9), a.seed)
    tlo, thi = domain_interval(s.domain, o, u, np.full(a.n_lines, 2 * R * (1 + 1e-9)))
    mesh = prism_mesh(s)
    try:
        from trimesh.ray.ray_pyembree import RayMeshIntersector
        engine, name = RayMeshIntersector(mesh), "trimesh + embree (embreex)"
    except Exception as e:  # embreex missing
        from trimesh.ray.ray_triangle import RayMeshIntersector
        engine, name = RayMeshIntersector(mesh), f"trimesh default ({e.__class__.__name__})"
    t_sv = t_sv1 = t_tm = t_cast = np.inf
    for _ in range(max(1, a.repeat)):
        t0 = time.perf_counter()
        res = exact_chords(s, a.n_lines, seed=a.seed)
        t_sv = min(t_sv, time.perf_counter() - t0)
        t0 = time.perf_counter()
        exact_chords(s, a.n_lines, seed=a.seed, n_threads=1)
        t_sv1 = min(t_sv1, time.perf_counter() - t0)
        t0 = time.perf_counter()
        tm, tc = trimesh_intervals(mesh, o, u, tlo, thi, engine)
        t_tm = min(t_tm, time.perf_counter() - t0)
        t_cast = min(t_cast, tc)
    # compare solid chord sets line by line
    ls, ss = res.line["solid"], res.lengths["solid"]
    order = np.argsort(ls, kind="stable")
    ls, ss = ls[order], ss[order]
    bounds = np.searchsorted(ls, np.arange(a.n_lines + 1))
    wrong = 0
    for i in range(a.n_lines):
        mine = ss[bounds[i]:bounds[i + 1]]
        s_, e_ = tm.get(i, (np.empty(0), np.empty(0)))
        theirs = e_ - s_
        if len(mine) != len(theirs) or not np.allclose(np.sort(mine), np.sort(theirs), atol=a.tol):
            wrong += 1
    n_chords = len(res.lengths["solid"])
    print(f"best of {max(1, a.repeat)} runs each")
    print(f"{len(s)} prisms ({mesh.faces.shape[0]} triangles), {a.n_lines} IUR lines, "
          f"{n_chords} solid chords")
    print(f"{'method':40s} {'time (s)':>10s} {'lines/s':>12s} {'lines differing':>16s}")
    print(f"{'sheetview exact (2 threads)':40s} {t_sv:10.2f} {a.n_lines / t_sv:12.0f} {'reference':>16s}")
    print(f"{'sheetview exact (1 thread)':40s} {t_sv1:10.2f} {a.n_lines / t_sv1:12.0f} {'-':>16s}")
    print(f"{name:40s} {t_tm:10.2f} {a.n_lines / t_tm:12.0f} {wrong:16d}")
    print(f"  of which ray casting alone: {t_cast:.2f} s")
    print(f"speed-up: {t_tm / t_sv:.1f}x (2 threads), {t_tm / t_sv1:.1f}x (1 thread); "
          f"trimesh differs on {wrong} of {a.n_lines} lines ({100 * wrong / a.n_lines:.2f} %)")


if __name__ == "__main__":
    main()
