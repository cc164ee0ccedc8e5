"""Predicted scattering I(q) of a 512^3 phase grid: time and peak memory, beside the bare FFT.

Target (issue: experiment): I(q) of a 512^3 field in <= 3 s and <= 3 GB on 2 cores.
Rows: the bare float32 real FFT (scipy.fft.rfftn, workers=2) of the same field, the whole
``scattering_curve`` (SLD lookup, FFT, radial binning in slabs), ``curve_features`` on that
curve alone (slopes, Porod range, Guinier, invariant, peaks), and a naive numpy
reference of the binning (float64 |F|^2 and searchsorted over the whole array at once).
Input: a periodic Boolean model of balls (invented data), built on a 128^3 grid and
tiled 4x per axis (the structure repeats, which does not matter for timing).
Peak memory: the process's peak resident set (ru_maxrss) after each row, in a fresh
subprocess per row so rows do not inherit each other's peaks.

    .venv/bin/python benchmarks/bench_scattering.py            # 512^3: fft, curve, naive
    .venv/bin/python benchmarks/bench_scattering.py --n 1024   # 1024^3: fft, curve (target 12 GB)
"""
from __future__ import annotations

import json
import subprocess
import sys
import time

N = 512


def make_grid(n=N):
    import numpy as np
    from sheetview.grid import PhaseGrid
    rng = np.random.default_rng(0)
    m = 128
    x = np.arange(m)
    lab = np.zeros((m, m, m), np.uint8)
    for c in rng.uniform(0, m, (300, 3)):
        d = [np.minimum(np.abs(x - c[a]), m - np.abs(x - c[a])) for a in range(3)]
        r2 = d[0][:, None, None] ** 2 + d[1][None, :, None] ** 2 + d[2][None, None, :] ** 2
        lab[r2 <= 36] = 1
    lab = np.tile(lab, (n // m,) * 3)
    return PhaseGrid(lab, 0.2, periodic=True)


def row(kind, n=N):
    import resource
    import numpy as np
    import scipy.fft
    g = make_grid(n)
    base = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    t0 = time.perf_counter()
    if kind == "fft":
        f = g.labels.astype(np.float32)
        t0 = time.perf_counter()
        F = scipy.fft.rfftn(f, workers=2, overwrite_x=True)
        del F
    elif kind == "curve":
        from sheetview.measures.scattering import scattering_curve
        scattering_curve(g, {0: -0.56, 1: 2.55}, workers=2)
    elif kind == "features":
        from sheetview.measures.scattering import curve_features, scattering_curve
        res = scattering_curve(g, {0: -0.56, 1: 2.55}, workers=2)
        t0 = time.perf_counter()
        curve_features(res, float(g.labels.mean()))
    elif kind == "naive":
        f = g.labels.astype(np.float64)
        F = np.fft.rfftn(f)
        p = np.abs(F) ** 2
        n = g.shape
        q = np.sqrt(np.fft.fftfreq(n[0])[:, None, None] ** 2 + np.fft.fftfreq(n[1])[None, :, None] ** 2
                    + np.fft.rfftfreq(n[2])[None, None, :] ** 2) * 2 * np.pi / 0.2
        e = np.geomspace(2 * np.pi / (n[0] * 0.2), np.pi / 0.2, 81)
        idx = np.searchsorted(e, q) - 1
        ok = (idx >= 0) & (idx < 80)
        np.bincount(idx[ok], weights=p[ok], minlength=80)
    dt = time.perf_counter() - t0
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    return {"kind": kind, "seconds": dt, "peak_gb": peak / 2 ** 20, "input_gb": base / 2 ** 20}


def main():
    if len(sys.argv) > 3 and sys.argv[1] == "--row":
        print(json.dumps(row(sys.argv[2], int(sys.argv[3]))))
        return
    n = int(sys.argv[sys.argv.index("--n") + 1]) if "--n" in sys.argv else N
    kinds = ["fft", "curve", "features", "naive"] if n <= 512 else ["fft", "curve", "features"]
    out = []
    for k in kinds:
        r = subprocess.run([sys.executable, __file__, "--row", k, str(n)], capture_output=True,
                           text=True)
        if r.returncode != 0:
            out.append({"kind": k, "error": r.stderr.strip().splitlines()[-1]})
            continue
        out.append(json.loads(r.stdout.strip().splitlines()[-1]))
    print(f"I(q) of a {n}^3 grid, 2 FFT workers (targets: 512^3 <= 3 s and <= 3 GB; "
          f"1024^3 within 12 GB)")
    print(f"{'row':<8}{'time (s)':>10}{'peak RSS (GB)':>15}{'RSS before (GB)':>17}")
    for r in out:
        if "error" in r:
            print(f"{r['kind']:<8} failed: {r['error']}")
        else:
            print(f"{r['kind']:<8}{r['seconds']:>10.2f}{r['peak_gb']:>15.2f}{r['input_gb']:>17.2f}")


if __name__ == "__main__":
    main()
