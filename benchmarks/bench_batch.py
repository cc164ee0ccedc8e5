"""Batch throughput: 1 worker against 2 workers on 8 medium structures, side by side, and the
batch's own overhead per structure (hashing, summary tables, HTML pages, report folder)
against its measure time.

Targets (issue: batch morphometry): 2 workers >= 1.7x the throughput of 1 worker; overhead
per structure (hashing, writing) < 5% of its measure time. The structures are invented
benchmark inputs (:func:`sheetview.synth.pack_stacks`, stacks of 3 layers of 5 nm), measured
at 0.2 nm voxels with all default measures and the same settings in every run (intrusion
off, as in `measure`):

* ``--size medium`` (default): 320 stacks in a 48 nm box, about 32,000 prisms, 240^3 grid.
  Medium on the scale of this trade: the geometric middle of the bundled samples (a few
  thousand prisms) and the 400,000-prism structure of bench_measure.py.
* ``--size small``: 40 stacks in a 24 nm box, about 3,500 prisms, 120^3 grid (2 s each:
  start-up and the first structure's loading weigh heavily here).

    .venv/bin/python benchmarks/bench_batch.py                  # medium, 3 rounds, both modes
    .venv/bin/python benchmarks/bench_batch.py --repeat 5 --mode cli --size small

Two modes, each run in rounds of three runs (their order rotating from round to round):

* ``inprocess``: :func:`sheetview.batch.run_batch` called from this (warm) process, as a
  library user would; the 1-worker runs measure in this process.
* ``cli``: each run is a fresh ``python -m sheetview batch`` process (interpreter start,
  imports and numba cache loads included), as a user at the shell sees it.

The three runs of a round: 2 workers (one numba thread each, the default on 2 cores);
1 worker held to one numba thread, that is, one worker with the same share of the machine
as each of the two (``--threads 1``); and 1 worker with all the cores (the default of
``--workers 1``). Two ratios follow:

* scaling = 2 workers / 1 worker of the same share: what the batch itself gains from a second
  worker (the issue's throughput target, read as parallel efficiency per worker);
* gain over the default = 2 workers / 1 worker with all cores: what a user gains by asking
  for ``--workers 2``. A single worker already runs the measure kernels on every core, so
  this ratio is bounded by how well one structure's measure parallelises (its own Amdahl
  limit), not by the batch: the better the kernels scale, the lower it is.

The summary tables of all runs are checked to hold the same numbers. Beside each round,
before and after it, the machine's own scaling is measured: two processes of pure-Python
arithmetic at once against one alone (:func:`machine_scaling`); it bounds what any batch
can reach. The machine may be shared: each run also reports the CPU time other processes
took during it (``others``, in cores: busy time of the whole machine from /proc/stat minus
this benchmark's process tree), and the time the hypervisor gave to other machines
(``steal``), so a loaded run can be told from an idle one. Nothing here is a timed
assertion. Run one instance at a time (the runs share benchmarks/_data/batch/).
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
#: size -> (box edge nm, stacks, file prefix)
SIZES = {"small": (24.0, 40, "m"), "medium": (48.0, 320, "med")}


def make_inputs(n: int, size: str = "medium") -> list[Path]:
    import sheetview as sv
    from sheetview.synth import pack_stacks
    DATA.mkdir(parents=True, exist_ok=True)
    edge, stacks, prefix = SIZES[size]
    out = []
    for s in range(n):
        p = DATA / f"{prefix}{s}.csv"
        if not p.exists():
            r = pack_stacks(sv.Box((0, 0, 0), (edge, edge, edge)), stacks, layers="fixed:3",
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


RUNS = {"2w": (2, None), "1w_share": (1, 1), "1w_all": (1, None)}
LABEL = {"2w": "2 workers", "1w_share": "1 worker, 1 thread", "1w_all": "1 worker, all cores"}


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=8, help="structures (default 8)")
    ap.add_argument("--size", choices=sorted(SIZES), default="medium")
    ap.add_argument("--repeat", type=int, default=3, help="rounds per mode (default 3)")
    ap.add_argument("--mode", choices=["inprocess", "cli", "both"], default="both")
    ap.add_argument("--no-plots", action="store_true", help="report folders without figures")
    a = ap.parse_args()
    from sheetview.batch import run_batch
    from sheetview.cli.measure import measure_settings
    paths = make_inputs(a.n, a.size)
    plots = not a.no_plots
    # warm the numba cache and matplotlib in this process (the workers load them from disk)
    run_batch([paths[0]], DATA / "warm", measure_settings(voxel=0.2), plots=True, quiet=True)
    shutil.rmtree(DATA / "warm")
    modes = ["inprocess", "cli"] if a.mode == "both" else [a.mode]
    import sheetview as sv
    n_prisms = statistics.fmean(len(sv.read(p)) for p in paths)
    print(f"{a.n} {a.size} structures (mean {n_prisms:.0f} prisms, {SIZES[a.size][0]:g} nm box), "
          f"voxel 0.2 nm, figures {'on' if plots else 'off'}, {os.cpu_count()} cores; "
          "'others' = cores used by other processes during the run", flush=True)
    first = None
    summary = {}
    keys = list(RUNS)
    for mode in modes:
        rounds = []
        for rep in range(a.repeat):
            order = keys[rep % 3:] + keys[:rep % 3]
            rows = {}
            ref = [machine_scaling()]
            for k in order:
                w, th = RUNS[k]
                out = DATA / f"out_{mode}_{k}"
                rows[k] = run_once(mode, paths, out, w, plots, threads=th)
                got = numbers(out)
                first = first or got
                assert {c: v for c, v in got.items() if c != "result"} == \
                    {c: v for c, v in first.items() if c != "result"}, "numbers differ"
            ref.append(machine_scaling())
            sc = rows["2w"]["thr"] / rows["1w_share"]["thr"]
            gain = rows["2w"]["thr"] / rows["1w_all"]["thr"]
            rounds.append((sc, gain, statistics.fmean(ref)))
            line = "; ".join(f"{LABEL[k]}: {rows[k]['wall']:.1f} s, {rows[k]['thr']:.1f}/min, "
                             f"others {rows[k]['others']:.2f}, steal {rows[k]['steal']:.2f}"
                             for k in order)
            print(f"[{mode} {rep + 1}] {line}; scaling {sc:.2f}x, gain over the default "
                  f"{gain:.2f}x; machine scaling {ref[0]:.2f}x before, {ref[1]:.2f}x after",
                  flush=True)
        summary[mode] = rounds
    for mode, r in summary.items():
        sc, gain, ms = ([x[i] for x in r] for i in range(3))
        print(f"{mode}: scaling 2 workers / 1 worker (same share) median "
              f"{statistics.median(sc):.2f}x, range {min(sc):.2f}-{max(sc):.2f}x over {len(sc)} "
              f"rounds (target >= 1.7x); gain over 1 worker with all cores median "
              f"{statistics.median(gain):.2f}x, range {min(gain):.2f}-{max(gain):.2f}x; machine "
              f"scaling median {statistics.median(ms):.2f}x")
    # overheads, from the last 1-worker (all cores) result folder
    ov = overheads(paths, DATA / f"out_{modes[-1]}_1w_all")
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
