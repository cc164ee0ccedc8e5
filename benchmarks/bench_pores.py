"""Local thickness of a 400^3 pore space beside one ``edt.edt`` call on the same volume.

Target (issue: grid and pores): local thickness in <= 5x the time of one ``edt.edt`` call
(uint8 input, parallel=2), for the default method; the "centres" method is measured beside
it (runs interleaved, ratios to the edt call of the same round: the machine is shared). The pore space is invented: the complement of
overlapping solid balls of radius 10 voxels (porosity about 0.5, pores 5 to 30 voxels).
JIT compile time is measured apart. Each timing is the best of ``--repeat`` runs (the
machine is shared).
"""
from __future__ import annotations

import argparse
import time

import edt
import numpy as np

from sheetview.measures.pores import DEFAULT_LT_METHOD, intrusion_diameter, local_thickness


def pore_space(n, seed=0, R=10.0):
    rng = np.random.default_rng(seed)
    nb = int(0.69 * n ** 3 / (4 / 3 * np.pi * R ** 3))
    c = rng.uniform(0, n, (nb, 3)).astype(int).clip(0, n - 1)
    seeds = np.ones((n, n, n), np.uint8)
    seeds[tuple(c.T)] = 0
    return edt.edt(seeds, parallel=2) > R


def best(f, repeat):
    ts = []
    for _ in range(repeat):
        t = time.perf_counter()
        f()
        ts.append(time.perf_counter() - t)
    return min(ts)


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--n", type=int, default=400)
    ap.add_argument("--repeat", type=int, default=2)
    ap.add_argument("--intrusion-n", type=int, default=200,
                    help="edge of the volume for the intrusion row (0: skip)")
    ap.add_argument("--threads", type=int, default=2)
    a = ap.parse_args()
    import numba
    numba.set_num_threads(a.threads)
    t = time.perf_counter()
    small = pore_space(40)
    for meth in ("centres", "subvoxel"):
        local_thickness(small, 0.1, method=meth)
    intrusion_diameter(small, 0.1)
    jit = time.perf_counter() - t
    m = pore_space(a.n)
    m8 = np.ascontiguousarray(m, dtype=np.uint8)
    out = np.empty(m.shape, np.float32)
    rows = {"edt": [], "centres": [], "subvoxel": []}
    for _ in range(a.repeat):  # interleaved rounds
        rows["edt"].append(best(lambda: edt.edt(m8, anisotropy=(0.1, 0.1, 0.1),
                                                parallel=a.threads), 1))
        for meth in ("centres", "subvoxel"):
            rows[meth].append(best(lambda: local_thickness(m, 0.1, out=out, method=meth), 1))
    lt = out[m]
    print(f"pore space {m.shape}, porosity {m.mean():.3f}, mean local thickness "
          f"{lt.mean():.3f} nm (0.1 nm voxels, subvoxel); threads {a.threads}; "
          f"default method {DEFAULT_LT_METHOD!r}")
    print(f"{'operation':36s} {'seconds (best)':>14s} {'ratio per round':>24s}")
    te = np.array(rows["edt"])
    print(f"{'edt.edt (uint8)':36s} {te.min():14.3f} {'1':>24s}")
    for meth in ("centres", "subvoxel"):
        tm = np.array(rows[meth])
        r = tm / te
        lab = f"local_thickness method={meth!r}"
        rs = ", ".join(f"{x:.2f}" for x in r)
        print(f"{lab:36s} {tm.min():14.3f} {rs:>24s}  (min {r.min():.2f}, median "
              f"{np.median(r):.2f})")
    tr = np.array(rows["subvoxel"]) / np.array(rows["centres"])
    print(f"subvoxel / centres per round: " + ", ".join(f"{x:.2f}" for x in tr))
    if a.intrusion_n:
        mi = pore_space(a.intrusion_n)
        mi8 = np.ascontiguousarray(mi, dtype=np.uint8)
        t_edt2 = best(lambda: edt.edt(mi8, anisotropy=(0.1, 0.1, 0.1), parallel=a.threads),
                      a.repeat)
        t_in = best(lambda: intrusion_diameter(mi, 0.1), a.repeat)
        lab = f"edt.edt on {a.intrusion_n}^3"
        print(f"{lab:36s} {t_edt2:9.3f} {1.0:7.2f}")
        print(f"{'intrusion_diameter on same':36s} {t_in:9.3f} {t_in / t_edt2:7.2f}")
    print(f"JIT compile (first calls on 40^3): {jit:.2f} s")


if __name__ == "__main__":
    main()
