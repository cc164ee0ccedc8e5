"""Exact IUR chords through prisms: sheetview's kernel against trimesh ray casting.

Same lines, same prisms. trimesh (with the embree backend when embreex is installed)
casts each line as a ray with ``multiple_hits=True`` against a mesh of all prism faces
(8 triangles per prism); its hits are turned into solid intervals by a depth counter
(entering +1, leaving -1, faces oriented outward), clipped to the domain, and compared
line by line with sheetview's solid chords (tolerance ``--tol`` nm).

Usage: .venv/bin/python benchmarks/bench_chords.py [--n-prisms 100000] [--n-lines 100000]
       [--repeat 2]
Each method runs ``--repeat`` times, alternating, and its best time is reported (the
machine may be shared). Writes nothing; prints a table.
"""
from __future__ import annotations

import argparse
import time

import numpy as np
import trimesh

from sheetview.domain import Sphere
from sheetview.measures.chords import _domain_interval, exact_chords, iur_lines
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


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--n-prisms", type=int, default=100_000)
    ap.add_argument("--n-lines", type=int, default=100_000)
    ap.add_argument("--tol", type=float, default=1e-4)
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--repeat", type=int, default=2)
    a = ap.parse_args()
    s = make_structure(a.n_prisms)
    R = s.domain.radius
    # warm the numba cache
    exact_chords(s.subset(np.arange(100)), 100, seed=0)
    # the same lines
    o, u = iur_lines(a.n_lines, np.zeros(3), R * (1 + 1e-9), a.seed)
    tlo, thi = _domain_interval(s.domain, o, u, np.full(a.n_lines, 2 * R * (1 + 1e-9)))
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
