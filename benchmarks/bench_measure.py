"""The main job on a large structure: `measure` stages, time and peak memory.

Target (issue: the main job): 400,000 prisms in a 100 nm spherical pore at 0.15 nm voxels in
<= 90 s and <= 8 GB peak on 2 cores. Also prints each stage's time at a smaller size (same
density, same voxel) and the exponent of each stage's time against N.

The structure is built here (vectorised numpy; an invented benchmark scenario): stacks of 4
layers of a 3 x 3 rhombus of unit equilateral triangles (72 prisms), randomly rotated, centred
on a cubic lattice inside the sphere. Neighbouring stacks may overlap (harmless for timing).
Each size runs in a fresh process so its peak RSS is its own.

    .venv/bin/python benchmarks/bench_measure.py                 # 50,000 and 400,000 prisms
    .venv/bin/python benchmarks/bench_measure.py --sizes 50000 --voxel 0.2
"""
from __future__ import annotations

import argparse
import json
import math
import resource
import subprocess
import sys
import time

import numpy as np


def build(n_target: int, seed: int = 0):
    from scipy.spatial.transform import Rotation

    from sheetview import Sphere, Structure
    from sheetview.synth import rhombus_patch
    layer = rhombus_patch(3)
    tmpl = np.concatenate([layer + [0, 0, 1.4 * (k - 1.5)] for k in range(4)])  # (72, 3, 3)
    n_st = max(1, int(round(n_target / len(tmpl))))
    # 400,000 prisms fill a sphere of radius 50 nm at a pitch of 4.6 nm: keep that density
    pitch = 4.6
    R = (3 * n_st * pitch ** 3 / (4 * math.pi)) ** (1 / 3) + 3.0
    m = int(math.ceil(2 * R / pitch)) + 1
    g = np.stack(np.meshgrid(*[np.arange(m)] * 3, indexing="ij"), -1).reshape(-1, 3)
    c = (g - (m - 1) / 2) * pitch
    c = c[np.linalg.norm(c, axis=1) < R - 3.0]
    c = c[np.argsort(np.linalg.norm(c, axis=1), kind="stable")][:n_st]
    rot = Rotation.random(len(c), random_state=seed).as_matrix()
    v = np.einsum("sab,pkb->spka", rot, tmpl) + c[:, None, None, :]
    return Structure(v.reshape(-1, 3, 3), 0.7, Sphere((0.0, 0.0, 0.0), R), 1.4)


def one(n: int, voxel: float) -> dict:
    import sheetview as sv
    # warm the numba caches on a small case so compile time is not timed
    small = build(3000)
    sv.measure(small, voxel=0.3, lines=500)
    s = build(n)
    t = time.perf_counter()
    m = sv.measure(s, voxel=voxel)
    total = time.perf_counter() - t
    return {"n": len(s), "radius_nm": s.domain.radius, "grid": list(m.grid.shape),
            "total_s": total, "stages": m.timings,
            "peak_gb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 2 ** 20}


def main():
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--sizes", default="50000,400000")
    ap.add_argument("--voxel", type=float, default=0.15)
    ap.add_argument("--child", type=int, default=None, help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.child is not None:
        print(json.dumps(one(args.child, args.voxel)))
        return
    rows = []
    for n in (int(x) for x in args.sizes.split(",")):
        r = subprocess.run([sys.executable, __file__, "--child", str(n), "--voxel", str(args.voxel)],
                           capture_output=True, text=True)
        if r.returncode:
            print(r.stderr, file=sys.stderr)
            raise SystemExit(1)
        rows.append(json.loads(r.stdout.strip().splitlines()[-1]))
    stages = list(rows[-1]["stages"])
    print(f"voxel {args.voxel} nm; target for 400,000 prisms: <= 90 s, <= 8 GB")
    head = f"{'stage':24s}" + "".join(f"{r['n']:>12,d}" for r in rows)
    if len(rows) > 1:
        head += f"{'exponent':>10s}"
    print(head)
    for st in stages + ["total"]:
        vals = [r["total_s"] if st == "total" else r["stages"].get(st, float("nan")) for r in rows]
        line = f"{st:24s}" + "".join(f"{v:12.2f}" for v in vals)
        if len(rows) > 1 and vals[0] > 0 and vals[-1] > 0:
            line += f"{math.log(vals[-1] / vals[0]) / math.log(rows[-1]['n'] / rows[0]['n']):10.2f}"
        print(line)
    print(f"{'grid':24s}" + "".join(f"{'x'.join(map(str, r['grid'])):>12s}" for r in rows))
    print(f"{'peak GB':24s}" + "".join(f"{r['peak_gb']:12.2f}" for r in rows))


if __name__ == "__main__":
    main()
