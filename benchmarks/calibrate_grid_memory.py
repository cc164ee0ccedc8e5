"""Peak memory of a default `measure` run against the size of its phase grid.

The memory guard of the rasterizer (`sheetview.grid.estimate_grid_bytes`) must hold the
peak of the grid measures that follow, so that a run allowed by `--max-memory` stays within
it. This script measures that peak: each run in a fresh process reads a sample structure,
runs the default measures once on a coarse grid (so that every numba kernel is loaded and
every import done), resets the peak resident memory (Linux `/proc/self/clear_refs`), then
runs the default measures at the voxel size under test and reports the growth of the
peak resident memory over the resident memory before the run, with the grid's voxel count.

A least-squares line `peak = a + b * voxels` over the runs gives the constant `a` (the
structure measures and buffers that do not scale with the grid) and `b` (bytes per voxel);
the guard uses a margin above both (see `sheetview/grid.py` and docs/reliability.md).

    python benchmarks/calibrate_grid_memory.py [--voxels 0.6 0.3 0.2 0.15 0.12 0.1]
"""
from __future__ import annotations

import argparse
import json
import subprocess
import sys
from pathlib import Path

HERE = Path(__file__).resolve().parent
SAMPLE = HERE.parent / "sample_structures" / "isotropic_box.parquet"

CHILD = r"""
import json, sys
import numpy as np
import sheetview as sv

def status(key):
    with open("/proc/self/status") as fh:
        for line in fh:
            if line.startswith(key):
                return int(line.split()[1]) * 1024
    return 0

s = sv.read(sys.argv[1])
v = float(sys.argv[2])
sv.measure(s, voxel=1.5)  # load every kernel, import everything
with open("/proc/self/clear_refs", "w") as fh:
    fh.write("5")
base = status("VmRSS:")
ctx = sv.measure(s, voxel=v)
peak = status("VmHWM:") - base
print(json.dumps({"voxel": v, "n_voxels": int(np.prod(ctx.grid.shape)), "peak": peak,
                  "shape": list(ctx.grid.shape)}))
"""


def main():
    ap = argparse.ArgumentParser(description=__doc__,
                                 formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--voxels", type=float, nargs="+", default=[0.6, 0.3, 0.2, 0.15, 0.12, 0.1])
    ap.add_argument("--sample", default=str(SAMPLE))
    args = ap.parse_args()
    rows = []
    for v in args.voxels:
        r = subprocess.run([sys.executable, "-c", CHILD, args.sample, str(v)],
                           capture_output=True, text=True)
        if r.returncode:
            print(r.stderr[-2000:], file=sys.stderr)
            continue
        row = json.loads(r.stdout.strip().splitlines()[-1])
        rows.append(row)
        print(f"voxel {v:6.3f} nm  grid {row['n_voxels']:>12,d}  peak {row['peak'] / 2**20:9.1f} MiB"
              f"  {row['peak'] / row['n_voxels']:8.1f} bytes/voxel", flush=True)
    if len(rows) >= 2:
        import numpy as np
        n = np.array([r["n_voxels"] for r in rows], float)
        p = np.array([r["peak"] for r in rows], float)
        b, a = np.polyfit(n, p, 1)
        print(f"least squares: peak = {a / 2**20:.1f} MiB + {b:.2f} bytes/voxel")
        from sheetview.grid import estimate_grid_bytes
        for r in rows:
            est = estimate_grid_bytes(r["n_voxels"])
            print(f"  {r['n_voxels']:>12,d} voxels: measured {r['peak'] / 2**20:8.1f} MiB, "
                  f"estimate {est / 2**20:8.1f} MiB, ratio {r['peak'] / est:5.2f}")


if __name__ == "__main__":
    main()
