"""Reading 1,000,000 prisms (CSV, NPZ, Parquet) and `info` on them: time and peak memory.

Targets (issue: foundation): NPZ or Parquet <= 2 s, CSV <= 10 s, info <= 5 s, peak <= 1.5 GB.
Each operation runs in a fresh process so its peak RSS is its own. Reference beside ours:
numpy.loadtxt on the same CSV (a general-purpose reader) for the CSV form.
"""
from __future__ import annotations

import argparse
import json
import subprocess
import sys
from pathlib import Path

HERE = Path(__file__).resolve().parent
DATA = HERE / "_data"

CHILD = r"""
import json, resource, sys, time
t0 = time.perf_counter()
op, path = sys.argv[1], sys.argv[2]
if op == "read":
    import sheetview as sv
    s = sv.read(path)
    n = len(s)
elif op == "info":
    import sheetview as sv
    from sheetview.summary import describe
    s = sv.read(path)
    t0 = time.perf_counter()
    d = describe(s)
    n = d["n_prisms"]
elif op == "loadtxt":
    import numpy as np
    a = np.loadtxt(path, delimiter=",", comments="#", skiprows=5, ndmin=2, dtype=float)
    n = a.shape[0]
dt = time.perf_counter() - t0
print(json.dumps({"n": n, "seconds": dt,
                  "peak_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024}))
"""


def make(n: int) -> dict:
    import numpy as np

    import sheetview as sv

    DATA.mkdir(exist_ok=True)
    paths = {s: DATA / f"prisms_{n}{s}" for s in (".csv", ".npz", ".parquet")}
    if all(p.exists() for p in paths.values()):
        return paths
    rng = np.random.default_rng(0)
    c = rng.uniform(0, 200, (n, 1, 3))
    v = c + rng.normal(0, 0.8, (n, 3, 3))
    s = sv.Structure(v, rng.uniform(0.5, 0.9, n), sv.Box((0, 0, 0), (200, 200, 200)), 1.4,
                     {"sheet": rng.integers(0, 1000, n), "born": rng.uniform(0, 1, n)})
    for p in paths.values():
        sv.write(s, p, force=True)
    return paths


def child(op, path):
    r = subprocess.run([sys.executable, "-c", CHILD, op, str(path)], capture_output=True, text=True)
    if r.returncode:
        raise RuntimeError(r.stderr)
    return json.loads(r.stdout)


def main():
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("-n", type=int, default=1_000_000)
    args = ap.parse_args()
    paths = make(args.n)
    rows = []
    for name, op, suffix, target in [
        ("read NPZ", "read", ".npz", 2.0), ("read Parquet", "read", ".parquet", 2.0),
        ("read CSV", "read", ".csv", 10.0), ("info (after read)", "info", ".npz", 5.0),
        ("numpy.loadtxt CSV (reference)", "loadtxt", ".csv", None)]:
        r = child(op, paths[suffix])
        rows.append((name, r["seconds"], r["peak_mb"], target))
    ours_csv = rows[2][1]
    ref = rows[4][1]
    print(f"{args.n:,} prisms; file sizes: " + ", ".join(
        f"{s} {p.stat().st_size / 1e6:.0f} MB" for s, p in paths.items()))
    print(f"{'operation':32s} {'seconds':>8s} {'peak MB':>8s} {'target s':>9s}")
    for name, sec, mb, target in rows:
        print(f"{name:32s} {sec:8.2f} {mb:8.0f} {('' if target is None else f'{target:.0f}'):>9s}")
    print(f"CSV: sheetview reader is {ref / ours_csv:.1f}x faster than numpy.loadtxt")


if __name__ == "__main__":
    main()
