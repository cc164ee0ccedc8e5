"""Batch throughput: 1 worker against 2 workers on 8 medium structures, and the batch's
own overhead per structure (hashing, summary tables, HTML pages) against its measure time.

Targets (issue: batch morphometry): 2 workers >= 1.7x the throughput of 1 worker; overhead
per structure < 5% of its measure time. The structures are invented benchmark inputs
(:func:`sheetview.synth.pack_stacks`, 40 stacks of 3 layers of 5 nm in a 24 nm box, about
3,500 prisms each), measured at 0.2 nm voxels (120^3 grid) with all default measures (intrusion off, as in
`measure`; the figures in docs/batch.md were taken with intrusion on).

    .venv/bin/python benchmarks/bench_batch.py
    .venv/bin/python benchmarks/bench_batch.py --n 8 --voxel 0.2 --no-plots

One worker runs in the calling process with all numba threads (the baseline of the target);
two workers are spawned processes with cores/2 numba threads each; the third column is one
worker held to one numba thread (per-process scaling). Timings are wall clock on a shared machine.
"""
from __future__ import annotations

import argparse
import os
import shutil
import time
from pathlib import Path

DATA = Path(__file__).parent / "_data" / "batch"


def make_inputs(n: int) -> list[Path]:
    import sheetview as sv
    from sheetview.synth import pack_stacks
    DATA.mkdir(parents=True, exist_ok=True)
    out = []
    for s in range(n):
        p = DATA / f"m{s}.csv"
        if not p.exists():
            r = pack_stacks(sv.Box((0, 0, 0), (24, 24, 24)), 40, layers="fixed:3",
                            lateral_size="fixed:5", seed=s)
            sv.write(r.structure, p)
        out.append(p)
    return out


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=8)
    ap.add_argument("--voxel", type=float, default=0.2)
    ap.add_argument("--no-plots", action="store_true")
    a = ap.parse_args()
    from sheetview.batch import plan, run_batch, write_pages, write_tables
    paths = make_inputs(a.n)
    settings = {"voxel": a.voxel, "max_memory": None, "density": 2.73, "pore_split": [],
                "intrusion": False, "lines": 20000, "seed": 0}
    # warm the numba cache in this process (the spawned workers load it from disk)
    run_batch([paths[0]], DATA / "warm", settings, plots=False, quiet=True)
    shutil.rmtree(DATA / "warm")
    rows = {}
    for workers, threads in ((1, None), (2, None), ("1t", 1)):
        out = DATA / f"out_w{workers}"
        shutil.rmtree(out, ignore_errors=True)
        t0 = time.perf_counter()
        res = run_batch([str(p) for p in paths], out, settings, plots=not a.no_plots,
                        workers=1 if workers == "1t" else workers, threads=threads,
                        quiet=True)
        wall = time.perf_counter() - t0
        assert res.n_done == a.n, res.failed
        meas = sum(r["seconds"] for r in res.records) / a.n
        rep = sum(r["write_seconds"] for r in res.records) / a.n
        # the batch's own work, timed again alone: hashing, tables, pages
        t = time.perf_counter()
        plan(paths, {"settings": settings})
        t_hash = (time.perf_counter() - t) / a.n
        t = time.perf_counter()
        write_tables(out, res.records)
        t_tab = (time.perf_counter() - t) / a.n
        for f in out.glob("runs/*/report.html"):
            f.unlink()
        t = time.perf_counter()
        write_pages(out, res.records)
        t_html = (time.perf_counter() - t) / a.n
        rows[workers] = dict(wall=wall, thr=a.n / wall * 60, meas=meas, rep=rep,
                             hash=t_hash, tab=t_tab, html=t_html)
    load = os.getloadavg()[0]
    print(f"{a.n} structures, voxel {a.voxel} nm, plots {'off' if a.no_plots else 'on'}, "
          f"{os.cpu_count()} cores, load average {load:.2f}")
    print(f"{'':38s}{'1 worker':>12s}{'2 workers':>12s}{'1w,1thread':>12s}")
    lines = [("wall time (s)", "wall", "{:.1f}"), ("throughput (structures/min)", "thr", "{:.2f}"),
             ("measure time per structure (s)", "meas", "{:.2f}"),
             ("report folder per structure (s)", "rep", "{:.3f}"),
             ("hashing per structure (s)", "hash", "{:.4f}"),
             ("summary tables per structure (s)", "tab", "{:.4f}"),
             ("HTML pages per structure (s)", "html", "{:.4f}")]
    for label, k, f in lines:
        print(f"{label:38s}" + "".join(f"{f.format(rows[w][k]):>12s}" for w in (1, 2, "1t")))
    sp = rows[2]["thr"] / rows[1]["thr"]
    ov = {w: (r["hash"] + r["tab"] + r["html"]) / r["meas"] for w, r in rows.items()}
    ovr = {w: (r["hash"] + r["tab"] + r["html"] + r["rep"]) / r["meas"] for w, r in rows.items()}
    print(f"speed-up 2 workers / 1 worker: {sp:.2f}x (target >= 1.7x); 2 workers / 1 worker "
          f"with one numba thread: {rows[2]['thr'] / rows['1t']['thr']:.2f}x")
    print(f"batch overhead (hash + tables + pages) / measure time: {100 * ov[1]:.2f}% (1 worker), "
          f"{100 * ov[2]:.2f}% (2 workers) (target < 5%)")
    print(f"including the report folder (CSV{'' if a.no_plots else ' + PNG'}): "
          f"{100 * ovr[1]:.1f}% (1 worker), {100 * ovr[2]:.1f}% (2 workers)")


if __name__ == "__main__":
    main()
