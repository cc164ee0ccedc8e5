"""Benchmark: the demonstration generator's fill mode against its sequential placement.

For a 40 nm box (open and periodic) and a 40 nm-diameter sphere, at the default sizes
(layers poisson:3, lateral size lognormal:5,0.3 nm, clearance 0.3 nm), side by side:

* ``sequential``: the reference, ``pack_stacks(domain, 100000)``: random sequential
  placement until 10,000 candidates in a row fail (the domain is full for it);
* ``fill 0.35``: ``pack_stacks(domain, target_fraction=0.35)``, the target of the issue;
* ``fill full``: ``target_fraction=0.99``, i.e. until nothing more fits;
* ``fill to seq.``: the fill mode to the fraction the reference reached (time ratio).

C-S-H = prisms + the gaps between the stacked layers of each stack (exact from the
construction), as a fraction of the domain volume. Every run is checked: the stacking
measure (sheetview.measures.stacking, default tolerances) must find the generated
stacking numbers exactly. ``--scaling`` adds the fill time (to 0.3) against the box edge,
with the fitted exponent of time against the number of prisms placed (the overlap tests
use a cell list and the map is updated locally, so it should stay near 1).

Each run is in a fresh process (its own peak memory); the numba kernels are compiled
and cached by a warm-up run first, so compile time is not counted.

    .venv/bin/python benchmarks/bench_synth.py                # table (about 10 minutes)
    .venv/bin/python benchmarks/bench_synth.py --no-reference # fill rows only
    .venv/bin/python benchmarks/bench_synth.py --skip-table --scaling 20,30,40,60,80
"""
from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import sys
import time

import numpy as np

DOMAINS = ("box", "periodic", "sphere")
#: Target of the scaling runs: one that every box size reaches well before it is full,
#: so that the time measures the placement and not the search of a nearly full domain.
SCALING_TARGET = 0.3


def domain(kind: str, size: float):
    from sheetview import Box, Sphere
    if kind == "sphere":
        return Sphere((0.0, 0.0, 0.0), size / 2.0)
    return Box((0.0, 0.0, 0.0), (size,) * 3, periodic=kind == "periodic")


def one(kind: str, size: float, mode: str, seed: int, check: bool) -> dict:
    from sheetview import Box
    from sheetview.synth import pack_stacks
    # warm-up: compile (or load from the cache) every kernel on a small case
    pack_stacks(Box((0, 0, 0), (12, 12, 12), periodic=True), target_fraction=0.2, seed=1,
                tilt_probability=0.5, tilt_angle=10.0)
    pack_stacks(Box((0, 0, 0), (12, 12, 12)), 5, seed=1)
    dom = domain(kind, size)
    t = time.perf_counter()
    if mode == "sequential":
        r = pack_stacks(dom, 100000, seed=seed)
    else:
        r = pack_stacks(dom, target_fraction=float(mode), seed=seed)
    dt = time.perf_counter() - t
    out = {"domain": kind, "size": size, "mode": mode, "seconds": dt,
           "csh": r.csh_fraction, "solid": r.solid_fraction, "stacks": r.n_stacks,
           "prisms": len(r.structure), "stopped": r.settings.get("stopped", "full"),
           "peak_rss_gb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024 ** 2}
    if check:
        from sheetview.measures.stacking import stacking
        out["truth_ok"] = bool(np.array_equal(stacking(r.structure).stacking_number,
                                              r.stacking_number))
    return out


def run(kind, size, mode, seed, check) -> dict:
    p = subprocess.run([sys.executable, __file__, "--one", kind, str(size), mode, str(seed),
                        str(int(check))], capture_output=True, text=True,
                       env=dict(os.environ))
    if p.returncode:
        print(p.stderr, file=sys.stderr)
        sys.exit(1)
    return json.loads(p.stdout.strip().splitlines()[-1])


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--size", type=float, default=40.0, help="box edge / sphere diameter, nm")
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--no-reference", action="store_true",
                    help="skip the sequential reference (about 100 s per domain)")
    ap.add_argument("--scaling", default=None, metavar="L1,L2,...",
                    help=f"also time the fill to {SCALING_TARGET} in periodic boxes of these "
                         f"edges (nm)")
    ap.add_argument("--skip-table", action="store_true", help="only the --scaling table")
    ap.add_argument("--one", nargs=5, default=None, help=argparse.SUPPRESS)
    a = ap.parse_args()
    if a.one is not None:
        kind, size, mode, seed, check = a.one
        print(json.dumps(one(kind, float(size), mode, int(seed), bool(int(check)))))
        return
    modes = ([] if a.no_reference else ["sequential"]) + ["0.35", "0.99"]
    rows = []
    for kind in ([] if a.skip_table else DOMAINS):
        for mode in modes:
            rows.append(run(kind, a.size, mode, a.seed, mode != "sequential"))
            print(".", end="", file=sys.stderr, flush=True)
            if mode == "sequential":
                # the fill mode to the fraction the reference reached, for a time ratio
                r = run(kind, a.size, repr(rows[-1]["csh"]), a.seed, True)
                r["mode"] = "ref"
                rows.append(r)
    print(file=sys.stderr)
    if rows:
        table(rows, a)
    if a.scaling:
        scaling(a)


def table(rows, a):
    print(f"threads: NUMBA_NUM_THREADS={os.environ.get('NUMBA_NUM_THREADS', 'default')}, "
          f"cores {os.cpu_count()}; defaults: layers poisson:3, lateral lognormal:5,0.3, "
          f"clearance 0.3 nm, seed {a.seed}")
    hdr = (f"{'domain':<18} {'mode':<12} {'C-S-H':>7} {'solid':>7} {'stacks':>7} "
           f"{'prisms':>7} {'time s':>7} {'peak GB':>7} {'stopped':>8} {'truth':>6}")
    print(hdr)
    ref = {}
    for r in rows:
        name = (f"sphere D={r['size']:g} nm" if r["domain"] == "sphere"
                else f"{r['domain']} {r['size']:g} nm")
        mode = {"sequential": "sequential", "ref": "fill to seq.", "0.99": "fill full"}.get(
            r["mode"], f"fill {r['mode']}")
        truth = "-" if "truth_ok" not in r else ("same" if r["truth_ok"] else "DIFF")
        print(f"{name:<18} {mode:<12} {r['csh']:>7.4f} {r['solid']:>7.4f} {r['stacks']:>7} "
              f"{r['prisms']:>7} {r['seconds']:>7.1f} {r['peak_rss_gb']:>7.2f} "
              f"{r['stopped']:>8} {truth:>6}")
        if r["mode"] == "sequential":
            ref[r["domain"]] = r
    if ref:
        full = {r["domain"]: r["csh"] for r in rows if r["mode"] == "0.99"}
        same = {r["domain"]: r["seconds"] for r in rows if r["mode"] == "ref"}
        print("C-S-H fraction, fill until full / sequential reference: "
              + ", ".join(f"{k} {full[k] / v['csh']:.2f}x" for k, v in ref.items()))
        print("time to the reference's fraction, sequential / fill: "
              + ", ".join(f"{k} {v['seconds'] / same[k]:.1f}x" for k, v in ref.items()))


def scaling(a):
    print(f"\nfill to {SCALING_TARGET} in periodic boxes")
    print(f"{'edge nm':>8} {'prisms':>8} {'time s':>7} {'C-S-H':>7}")
    sc = [run("periodic", float(L), str(SCALING_TARGET), a.seed, False)
          for L in a.scaling.split(",")]
    for r in sc:
        print(f"{r['size']:>8g} {r['prisms']:>8} {r['seconds']:>7.2f} {r['csh']:>7.4f}")
    if len(sc) >= 2:
        k = np.polyfit(np.log([r["prisms"] for r in sc]), np.log([r["seconds"] for r in sc]), 1)[0]
        print(f"fitted exponent of time vs prisms: {k:.2f}")


if __name__ == "__main__":
    main()
