"""Side by side: two bundled structures compared (`sv.compare_structures`), against the two
`sv.measure` runs it is made of.

Target (issue: any mesostructure, side by side): the comparison of two bundled structures,
measured, in <= 30 s on 2 cores. The ratio comparison / (two measure runs) shows the cost of
the comparison itself (table, curves, figure, folder). Run warm (a first run compiles the
kernels). Structures: the bundled invented samples `wall_stacks_sphere40.npz` and
`tilted_defects_box.npz` (sheets), `sphere_packing.csv` and `layered_particles.parquet`
(particles), at the README's voxel (0.2 nm) and at the default voxel.

    .venv/bin/python benchmarks/bench_sidebyside.py
    .venv/bin/python benchmarks/bench_sidebyside.py --voxel 0.2
"""
from __future__ import annotations

import argparse
import tempfile
import time
from pathlib import Path

import sheetview as sv
from sheetview.app.sidebyside import DEFAULT_ONLY

ROOT = Path(__file__).resolve().parents[1]
S = ROOT / "sample_structures"
PAIRS = {"sheets": (S / "wall_stacks_sphere40.npz", S / "tilted_defects_box.npz"),
         "particles": (S / "sphere_packing.csv", S / "layered_particles.parquet")}


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--voxel", type=float, action="append",
                    help="voxel edges in nm (default: 0.2 and the structures' default)")
    ap.add_argument("--pair", choices=sorted(PAIRS), action="append",
                    help="which bundled pair (default both)")
    args = ap.parse_args()
    voxels = args.voxel or [0.2, None]
    print("| pair | voxel | two measure runs | compare_structures + write | ratio | target |")
    print("|---|---|---|---|---|---|")
    for pair in args.pair or sorted(PAIRS):
        A, B = PAIRS[pair]
        sv.compare_structures([A, B], voxel=0.4)  # compile the kernels
        for vox in voxels:
            row(pair, A, B, vox)


def row(pair, A, B, vox):
    """One row: the two measure runs, then the comparison of the same pair."""
    t0 = time.perf_counter()
    m = sv.measure(A, only=DEFAULT_ONLY, voxel=vox)
    v = vox or m.summary()["voxel_size_nm"]
    sv.measure(B, only=DEFAULT_ONLY, voxel=v)
    t_meas = time.perf_counter() - t0
    t0 = time.perf_counter()
    c = sv.compare_structures([A, B], voxel=vox)
    with tempfile.TemporaryDirectory() as d:
        c.write(Path(d) / "cmp")
    t_cmp = time.perf_counter() - t0
    label = f"{v:.3g} nm" + (" (default)" if vox is None else "")
    print(f"| {pair} | {label} | {t_meas:.1f} s | {t_cmp:.1f} s | {t_cmp / t_meas:.2f} "
          f"| <= 30 s |")


if __name__ == "__main__":
    main()
