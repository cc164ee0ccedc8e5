"""Batch throughput: 1 worker against 2 workers on 8 medium structures, side by side, and the
batch's own overhead per structure (hashing, summary tables, HTML pages, report folder)
against its measure time.

Targets (issue: batch morphometry): 2 workers >= 1.7x the throughput of 1 worker; overhead
per structure (hashing, writing) < 5% of its measure time. The structures are invented
benchmark inputs (:func:`sheetview.synth.pack_stacks`, 40 stacks of 3 layers of 5 nm in a
24 nm box, about 3,500 prisms each), measured at 0.2 nm voxels (120^3 grid) with all default
measures and the same settings in every run (intrusion off, as in `measure`).

    .venv/bin/python benchmarks/bench_batch.py                  # 3 repeats, both modes
    .venv/bin/python benchmarks/bench_batch.py --repeat 5 --mode cli --plots none

Two modes, each run in pairs (1 worker, then 2 workers, alternating which goes first):

* ``inprocess``: :func:`sheetview.batch.run_batch` called from this (warm) process, as a
  library user would; the 1-worker baseline runs in this process with all numba threads.
* ``cli``: each run is a fresh ``python -m sheetview batch`` process (interpreter start,
  imports and numba cache loads included), as a user at the shell sees it.

The speed-up of each pair is the ratio of its wall times (same inputs, same settings; the
summary tables of both runs are checked to hold the same numbers). Beside each pair, before
and after it, the machine's own scaling is measured: two processes of pure-Python arithmetic
at once against one alone (:func:`machine_scaling`); it bounds what any batch can reach.
The machine may be shared: each run also reports the CPU time other processes took during it
(``others``, in cores: busy time of the whole machine from /proc/stat minus this benchmark's
process tree), and the time the hypervisor gave to other machines (``steal``), so a loaded
run can be told from an idle one. Nothing here is a timed assertion. Run one instance at a
time (the runs share benchmarks/_data/batch/).
"""
from __future__ import annotations

import argparse
import os
import shutil
import statistics
import subprocess
import sys
import threading
import time
from pathlib import Path

DATA = Path(__file__).parent / "_data" / "batch"
SETTINGS = ["--voxel", "0.2", "--lines", "20000", "--seed", "0", "--no-intrusion"]


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


# ------------------------------------------------------------------ CPU of the others
def _busy_jiffies() -> tuple[int, int]:
    """(busy, steal) jiffies of the whole machine (proc(5): user nice system idle iowait
    irq softirq steal ...)."""
    with open("/proc/stat") as fh:
        f = [int(x) for x in fh.readline().split()[1:9]]
    return f[0] + f[1] + f[2] + f[5] + f[6], f[7]


def _tree_cpu(root: int) -> dict:
    """utime + stime (jiffies) of ``root`` and every process below it."""
    kids, cpu = {}, {}
    for d in os.listdir("/proc"):
        if not d.isdigit():
            continue
        try:
            with open(f"/proc/{d}/stat") as fh:
                rest = fh.read().rsplit(")", 1)[1].split()
        except OSError:
            continue
        kids.setdefault(int(rest[1]), []).append(int(d))
        cpu[int(d)] = int(rest[11]) + int(rest[12])
    out, todo = {}, [root]
    while todo:
        q = todo.pop()
        if q in cpu:
            out[q] = cpu[q]
        todo.extend(kids.get(q, []))
    return out


class CpuMeter:
    """CPU time (cores) other processes used while this benchmark ran: busy time of the
    machine minus that of this process tree, sampled every 0.1 s (a process of the tree
    that ends between samples loses at most 0.1 s of its time)."""

    def __enter__(self):
        self.hz = os.sysconf("SC_CLK_TCK")
        self.first = _tree_cpu(os.getpid())
        self.last = dict(self.first)
        self.b0 = _busy_jiffies()
        self.t0 = time.perf_counter()
        self.done = threading.Event()
        self.th = threading.Thread(target=self._poll, daemon=True)
        self.th.start()
        return self

    def _poll(self):
        while not self.done.wait(0.1):
            for pid, c in _tree_cpu(os.getpid()).items():
                self.last[pid] = max(c, self.last.get(pid, 0))

    def __exit__(self, *exc):
        self.done.set()
        self.th.join()
        for pid, c in _tree_cpu(os.getpid()).items():
            self.last[pid] = max(c, self.last.get(pid, 0))
        wall = time.perf_counter() - self.t0
        b1 = _busy_jiffies()
        busy = (b1[0] - self.b0[0]) / self.hz
        ours = sum(c - self.first.get(pid, 0) for pid, c in self.last.items()) / self.hz
        self.ours = ours / wall
        self.others = max(0.0, busy - ours) / wall
        self.steal = (b1[1] - self.b0[1]) / self.hz / wall
        return False


# ------------------------------------------------------------------ the machine's own scaling
_LOOP = ("import time\nt=time.perf_counter()\ns=0\nfor i in range({n}): s+=i\n"
         "print(time.perf_counter()-t)")


def machine_scaling(n: int = 15_000_000) -> float:
    """Throughput of 2 processes of pure-Python arithmetic (no memory traffic, no I/O)
    running at once, against one alone: 2 * t_alone / t_together. An ideal 2-core machine
    gives 2.0; on a virtual machine whose two cores share a physical core, or that slows
    down with both busy, it is lower, and no batch can scale better than this."""
    code = _LOOP.format(n=n)

    def start():
        return subprocess.Popen([sys.executable, "-c", code], stdout=subprocess.PIPE, text=True)
    alone = float(start().communicate()[0])
    ps = [start(), start()]
    together = max(float(p.communicate()[0]) for p in ps)
    return 2 * alone / together


# ------------------------------------------------------------------ one run
def run_once(mode, paths, out, workers, plots, threads=None):
    from sheetview.batch import run_batch
    from sheetview.cli.measure import measure_settings
    shutil.rmtree(out, ignore_errors=True)
    with CpuMeter() as cpu:
        t0 = time.perf_counter()
        if mode == "inprocess":
            settings = measure_settings(voxel=0.2, lines=20000, seed=0, intrusion=False)
            res = run_batch([str(p) for p in paths], out, settings, plots=plots, workers=workers,
                            threads=threads, quiet=True)
            assert res.n_done == len(paths), res.failed
        else:
            cmd = [sys.executable, "-m", "sheetview", "batch", *map(str, paths), "-o", str(out),
                   *SETTINGS, "--workers", str(workers), "-q"]
            if threads:
                cmd += ["--threads", str(threads)]
            if not plots:
                cmd.append("--no-plots")
            subprocess.run(cmd, check=True, stdout=subprocess.DEVNULL)
        wall = time.perf_counter() - t0
    return dict(wall=wall, thr=len(paths) / wall * 60, others=cpu.others, ours=cpu.ours,
                steal=cpu.steal)


def numbers(out):
    """The summary table without timings and result folders (equal for equal settings)."""
    from sheetview.batch import read_summary
    cols = read_summary(Path(out) / "summary.csv")
    return {k: v for k, v in cols.items() if not k.startswith("timings_s")}


def overheads(paths, out):
    """Per structure: measure time, report folder time (from the batch log records),
    and the batch's own work timed again alone: hashing, tables, pages."""
    import json
    from sheetview.batch import plan, write_pages, write_tables
    from sheetview.cli.measure import measure_settings
    recs = []
    for p in sorted((Path(out) / "runs").glob("*/summary.json")):
        recs.append({"path": str(p), "name": p.parent.name, "status": "ok", "error": None})
    docs = [json.loads((Path(out) / "runs" / r["name"] / "summary.json").read_text())
            for r in recs]
    meas = statistics.fmean(sum(d["timings_s"].values()) for d in docs)
    n = len(paths)
    t = time.perf_counter()
    plan(paths, {"settings": measure_settings(voxel=0.2)})
    t_hash = (time.perf_counter() - t) / n
    t = time.perf_counter()
    write_tables(out, recs)
    t_tab = (time.perf_counter() - t) / n
    for f in Path(out).glob("runs/*/report.html"):
        f.unlink()
    t = time.perf_counter()
    write_pages(out, recs)
    t_html = (time.perf_counter() - t) / n
    return dict(stages=meas, hash=t_hash, tab=t_tab, html=t_html)


def report_times(paths, plots_modes):
    """Mean measure time and report folder time per structure (with and without figures),
    in this process with all numba threads: the job of one worker, structure by structure."""
    import sheetview.batch as B
    rows = {}
    for plots in plots_modes:
        out = DATA / f"rep_{plots}"
        shutil.rmtree(out, ignore_errors=True)
        out.mkdir(parents=True)
        ms, ws = [], []
        from sheetview.cli.measure import measure_settings
        settings = measure_settings(voxel=0.2, lines=20000, seed=0, intrusion=False)
        for i, p in enumerate(paths):
            r = B.measure_one(str(p), str(out / f"r{i}"), settings, {}, None, plots)
            assert r["status"] == "ok", r
            ms.append(r["seconds"])
            ws.append(r["write_seconds"])
        rows[plots] = (statistics.fmean(ms), statistics.fmean(ws))
    return rows


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=8, help="structures (default 8)")
    ap.add_argument("--repeat", type=int, default=3, help="pairs per mode (default 3)")
    ap.add_argument("--mode", choices=["inprocess", "cli", "both"], default="both")
    ap.add_argument("--no-plots", action="store_true", help="report folders without figures")
    ap.add_argument("--one-thread", action="store_true",
                    help="also 1 worker held to 1 numba thread (per-process scaling)")
    a = ap.parse_args()
    from sheetview.batch import run_batch
    from sheetview.cli.measure import measure_settings
    paths = make_inputs(a.n)
    plots = not a.no_plots
    # warm the numba cache and matplotlib in this process (the workers load them from disk)
    run_batch([paths[0]], DATA / "warm", measure_settings(voxel=0.2), plots=True, quiet=True)
    shutil.rmtree(DATA / "warm")
    modes = ["inprocess", "cli"] if a.mode == "both" else [a.mode]
    print(f"{a.n} structures, voxel 0.2 nm, figures {'on' if plots else 'off'}, "
          f"{os.cpu_count()} cores; 'others' = cores used by other processes during the run",
          flush=True)
    first = None
    summary = {}
    for mode in modes:
        ratios = []
        for rep in range(a.repeat):
            order = (1, 2) if rep % 2 == 0 else (2, 1)
            rows = {}
            ref = [machine_scaling()]
            for w in order:
                rows[w] = run_once(mode, paths, DATA / f"out_{mode}_w{w}", w, plots)
                got = numbers(DATA / f"out_{mode}_w{w}")
                first = first or got
                assert {k: v for k, v in got.items() if k != "result"} == \
                    {k: v for k, v in first.items() if k != "result"}, "numbers differ"
            if a.one_thread:
                rows["1t"] = run_once(mode, paths, DATA / f"out_{mode}_1t", 1, plots, threads=1)
            ref.append(machine_scaling())
            sp = rows[2]["thr"] / rows[1]["thr"]
            ms = statistics.fmean(ref)
            ratios.append((sp, ms))
            line = "; ".join(f"{w} worker(s){' 1 thread' if w == '1t' else ''}: "
                             f"{r['wall']:.1f} s, {r['thr']:.1f}/min, ours {r['ours']:.2f}, "
                             f"others {r['others']:.2f}, steal {r['steal']:.2f}"
                             for w, r in rows.items())
            print(f"[{mode} {rep + 1}] {line}; speed-up {sp:.2f}x; machine scaling "
                  f"{ref[0]:.2f}x before, {ref[1]:.2f}x after", flush=True)
        summary[mode] = ratios
    for mode, r in summary.items():
        sp = [a for a, _ in r]
        eff = [a / b for a, b in r]
        print(f"{mode}: speed-up 2 workers / 1 worker median {statistics.median(sp):.2f}x, "
              f"range {min(sp):.2f}-{max(sp):.2f}x over {len(sp)} pairs (target >= 1.7x); "
              f"machine scaling {statistics.median([b for _, b in r]):.2f}x; speed-up / "
              f"machine scaling median {statistics.median(eff):.2f}, range "
              f"{min(eff):.2f}-{max(eff):.2f}")
    # overheads, from the last in-process (or cli) 1-worker result folder
    ov = overheads(paths, DATA / f"out_{modes[0]}_w1")
    rt = report_times(paths, [True, False])
    m = rt[True][0]
    own = ov["hash"] + ov["tab"] + ov["html"]
    print(f"per structure: measure {m:.2f} s; hashing {1e3 * ov['hash']:.2f} ms, summary "
          f"tables {1e3 * ov['tab']:.2f} ms, HTML pages {1e3 * ov['html']:.2f} ms "
          f"-> batch overhead {100 * own / m:.2f}% of the measure time (target < 5%)")
    for plots_on, (mm, ww) in rt.items():
        print(f"report folder {'with' if plots_on else 'without'} figures: {ww:.3f} s per "
              f"structure = {100 * ww / mm:.1f}% of its measure time ({mm:.2f} s)")


if __name__ == "__main__":
    main()
