"""Benchmark: stacking graph + stacks + orientation order, 1e4 to 1e6 prisms.

Builds its own structure (vectorised numpy, no generator): stacks of 4 layers of a
4 x 4 rhombus of unit equilateral triangles (128 prisms), randomly rotated, centred on a
cubic lattice of pitch 7 nm in a periodic box (about 0.37 prisms per nm^3). Each size
runs in a fresh process so that its peak RSS is its own. Prints a side-by-side table
and the fitted exponent of total time against N. References: scipy
cKDTree.query_pairs at the candidate radius (ndarray output) alone, and the graph built
the straightforward way (that k-d tree search, then every candidate pair classified by
the same numba kernel), against sheetview's fused cell-list pass (``graph s``). The
reference graph is timed after the measures, so the peak memory is sheetview's.

    .venv/bin/python benchmarks/bench_stacking.py            # 1e4, 1e5, 1e6
    .venv/bin/python benchmarks/bench_stacking.py --sizes 10000,100000
"""
from __future__ import annotations

import argparse
import json
import math
import os
import resource
import subprocess
import sys
import time

import numpy as np


def build(n_target: int, seed: int = 0):
    from scipy.spatial.transform import Rotation

    from sheetview import Box, Structure
    from sheetview.synth import rhombus_patch
    layer = rhombus_patch(4)
    tmpl = np.concatenate([layer + [0, 0, 1.4 * (k - 1.5)] for k in range(4)])  # (128,3,3)
    n_st = max(1, int(round(n_target / len(tmpl))))
    m = int(math.ceil(n_st ** (1 / 3)))
    pitch = 7.0
    g = np.stack(np.meshgrid(*[np.arange(m)] * 3, indexing="ij"), -1).reshape(-1, 3)[:n_st]
    centres = (g + 0.5) * pitch
    R = Rotation.random(n_st, random_state=seed).as_matrix()  # (S,3,3)
    v = np.einsum("sab,pkb->spka", R, tmpl) + centres[:, None, None, :]
    v = v.reshape(-1, 3, 3)
    L = m * pitch
    return Structure(v, 0.7, Box((0, 0, 0), (L, L, L), periodic=True))


def one(n: int) -> dict:
    from scipy.spatial import cKDTree

    from sheetview.measures.orientation import orientation
    from sheetview.measures.stacking import (StackingSettings, candidate_radius, stacking,
                                             stacking_graph)
    # warm the numba caches on a small case so compile time is not timed
    small = build(2000)
    stacking(small)
    orientation(small)
    reference_graph(small)
    s = build(n)
    _ = s.normals, s.centroids, s.volumes, s.edge_lengths
    out = {"n": len(s)}
    r = candidate_radius(s, StackingSettings())
    L = s.domain.lengths
    c = np.mod(np.array(s.centroids) - np.asarray(s.domain.min), L)
    t = time.perf_counter()
    pairs = cKDTree(c, boxsize=L).query_pairs(r, output_type="ndarray")
    out["kdtree_pairs_s"] = time.perf_counter() - t
    out["pairs"] = int(len(pairs))
    del pairs
    t = time.perf_counter()
    g = stacking_graph(s)
    out["graph_s"] = time.perf_counter() - t
    del g
    t = time.perf_counter()
    res = stacking(s)
    out["stacking_s"] = time.perf_counter() - t
    t = time.perf_counter()
    o = orientation(s)
    out["order_s"] = time.perf_counter() - t
    out["total_s"] = out["stacking_s"] + out["order_s"]
    out["mean_stacking"] = res.mean
    out["n_stacks"] = res.n_stacks
    out["S"] = o.S
    out["peak_rss_gb"] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024 ** 2
    del res, o
    out["ref_graph_s"] = reference_graph(s)
    return out


def reference_graph(s) -> float:
    """Time of the graph by cKDTree candidates + pairwise classification."""
    from sheetview.measures.stacking import (StackingSettings, _box_lengths,
                                             _candidate_pairs_kdtree, _classify_pairs,
                                             candidate_radius)
    from sheetview.threads import run_chunks
    st = StackingSettings(spacing=s.spacing)
    t = time.perf_counter()
    C = np.ascontiguousarray(s.centroids)
    pi, pj = _candidate_pairs_kdtree(C, candidate_radius(s, st), s.domain)
    periodic, L = _box_lengths(s.domain)
    code = np.empty(len(pi), np.int8)
    angle = np.empty(len(pi))
    run_chunks(_classify_pairs, len(pi), pi, pj, np.ascontiguousarray(s.vertices), C,
               np.ascontiguousarray(s.normals), L, periodic, math.cos(math.radians(st.angle_tol)),
               math.cos(math.radians(st.tilt_limit)), float(st.gap_tol), float(st.spacing),
               float(st.overlap), float(st.edge_tol), code, angle)
    return time.perf_counter() - t


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--sizes", default="10000,100000,1000000")
    ap.add_argument("--one", type=int, default=None, help=argparse.SUPPRESS)
    a = ap.parse_args()
    if a.one is not None:
        print(json.dumps(one(a.one)))
        return
    rows = []
    for n in [int(x) for x in a.sizes.split(",")]:
        p = subprocess.run([sys.executable, __file__, "--one", str(n)], capture_output=True,
                           text=True, env=dict(os.environ))
        if p.returncode:
            print(p.stderr, file=sys.stderr)
            sys.exit(1)
        rows.append(json.loads(p.stdout.strip().splitlines()[-1]))
    print(f"threads: NUMBA_NUM_THREADS={os.environ.get('NUMBA_NUM_THREADS', 'default')}, "
          f"cores {os.cpu_count()}")
    hdr = (f"{'prisms':>9} {'pairs':>10} {'kdtree s':>9} {'ref graph s':>11} {'graph s':>8} "
           f"{'speed-up':>8} {'stacking s':>10} {'order s':>8} {'total s':>8} {'peak GB':>8} "
           f"{'stacks':>7} {'mean SN':>7} {'S':>6}")
    print(hdr)
    for r in rows:
        print(f"{r['n']:>9} {r['pairs']:>10} {r['kdtree_pairs_s']:>9.2f} {r['ref_graph_s']:>11.2f} "
              f"{r['graph_s']:>8.2f} {r['ref_graph_s'] / r['graph_s']:>8.2f} "
              f"{r['stacking_s']:>10.2f} {r['order_s']:>8.2f} "
              f"{r['total_s']:>8.2f} {r['peak_rss_gb']:>8.2f} {r['n_stacks']:>7} "
              f"{r['mean_stacking']:>7.3f} {r['S']:>6.3f}")
    if len(rows) >= 2:
        x = np.log([r["n"] for r in rows])
        y = np.log([r["total_s"] for r in rows])
        k = np.polyfit(x, y, 1)[0]
        print(f"fitted exponent of total time vs N: {k:.3f} (target <= 1.15)")


if __name__ == "__main__":
    main()
