"""2D descriptors of a binary image (sheetview.measures.planar): time of describe() and
of each stage, beside general-purpose references doing part of the same work.

Input: an invented Boolean model of discs (radius ``--radius`` px, solid fraction 0.5)
on square images of ``--sizes`` pixels. References in the same run:

* S2: ``scipy.signal.correlate`` (FFT) of the indicator with itself (the numerator
  alone, no window normalisation, no radial binning);
* orientation: ``skimage.feature.structure_tensor`` (Sobel tensor, no statistics);
* local thickness: two ``edt`` distance transforms (the lower bound of the ball
  painting, which needs them).

Usage: .venv/bin/python benchmarks/bench_planar.py [--sizes 512,1024,2048] [--lines 2000]
       [--repeat 3]
The best of ``--repeat`` runs is reported (the machine may be shared). Writes nothing.
"""
from __future__ import annotations

import argparse
import math
import time

import numpy as np

from sheetview.measures import planar as P


def boolean_discs(n, R, phi, seed=0):
    rng = np.random.default_rng(seed)
    lam = -math.log(1 - phi) / (math.pi * R * R)
    lo, hi = -0.5 - R, n - 0.5 + R
    k = rng.poisson(lam * (hi - lo) ** 2)
    c = rng.uniform(lo, hi, (k, 2))
    m = np.zeros((n, n), bool)
    r = int(math.ceil(R))
    yy, xx = np.mgrid[-r - 1:r + 2, -r - 1:r + 2]
    for cx, cy in c:
        ix, iy = int(round(cx)), int(round(cy))
        d = (xx + ix - cx) ** 2 + (yy + iy - cy) ** 2 <= R * R
        y0, x0 = iy - r - 1, ix - r - 1
        ys = slice(max(y0, 0), min(y0 + d.shape[0], n))
        xs = slice(max(x0, 0), min(x0 + d.shape[1], n))
        m[ys, xs] |= d[ys.start - y0:ys.stop - y0, xs.start - x0:xs.stop - x0]
    return m


def best(fn, repeat):
    t = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        t.append(time.perf_counter() - t0)
    return min(t)


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--sizes", default="512,1024,2048")
    ap.add_argument("--radius", type=float, default=8.0)
    ap.add_argument("--lines", type=int, default=2000)
    ap.add_argument("--repeat", type=int, default=3)
    a = ap.parse_args()
    import edt
    from scipy.signal import correlate
    from skimage.feature import structure_tensor

    P.describe(boolean_discs(64, 4, 0.5), 1.0, seed=0, n_lines=10)  # compile / load caches
    rows = []
    for n in (int(s) for s in a.sizes.split(",")):
        m = boolean_discs(n, a.radius, 0.5, seed=n)
        f = m.astype(float)
        t = {
            "describe": best(lambda: P.describe(m, 1.0, seed=0, n_lines=a.lines), a.repeat),
            "area": best(lambda: P.area_fraction(m), a.repeat),
            "chords rows+cols": best(lambda: P.chords_2d(m, 1.0, directions=("rows", "cols")),
                                     a.repeat),
            f"chords {a.lines} lines": best(lambda: P.chords_2d(
                m, 1.0, directions="random", n_lines=a.lines, seed=0), a.repeat),
            "local thickness (2 phases)": best(lambda: P.local_thickness_2d(m, 1.0), a.repeat),
            "  ref: edt x2": best(lambda: (edt.edtsq(m, black_border=True, parallel=2),
                                           edt.edtsq(~m, black_border=True, parallel=2)),
                                  a.repeat),
            "S2": best(lambda: P.s2_2d(m, 1.0), a.repeat),
            "  ref: scipy correlate": best(lambda: correlate(f, f, method="fft"), a.repeat),
            "orientation": best(lambda: P.orientation_2d(m, 1.0), a.repeat),
            "  ref: skimage structure_tensor": best(lambda: structure_tensor(f, sigma=2.0),
                                                    a.repeat),
        }
        rows.append((n, t))
    names = list(rows[0][1])
    w = max(len(s) for s in names)
    print(f"{'stage':<{w}}  " + "  ".join(f"{n}^2 (s)".rjust(12) for n, _ in rows))
    for k in names:
        print(f"{k:<{w}}  " + "  ".join(f"{t[k]:12.3f}" for _, t in rows))


if __name__ == "__main__":
    main()
