"""Benchmark: the first run (empty numba cache) against a warm run.

Runs the README's main command (``sheetview measure
sample_structures/wall_stacks_sphere40.npz --voxel 0.2 -o <tmp> --force``) in a child
process with a fresh ``NUMBA_CACHE_DIR`` (a temporary directory, so the checkout's own
``__pycache__`` is neither read nor written), then again with the cache the first run
filled, and prints the two wall times side by side.

With ``--kernels`` the cold run also records numba's compile events
(``numba.core.event``, kind ``numba:compile``) and prints the compile time of each
kernel: *self* time (the time of nested compilations, e.g. numba's own overloads of
``np.sum`` compiled while a kernel compiles, is given to them, not to the caller), the
number of specialisations, and the totals per module.

    .venv/bin/python benchmarks/bench_cold.py                 # README command, cold vs warm
    .venv/bin/python benchmarks/bench_cold.py --kernels       # + compile time per kernel
    .venv/bin/python benchmarks/bench_cold.py --kernels --json out.json
    .venv/bin/python benchmarks/bench_cold.py --small         # also a small test-like run

The machine may be loaded: compare the cold and warm columns of one run, not absolute
times across runs.
"""
from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
SAMPLE = ROOT / "sample_structures" / "wall_stacks_sphere40.npz"

# Child program: run the command line in-process, optionally recording compile events.
CHILD = r"""
import json, sys, time
record = sys.argv[1]
argv = sys.argv[2:]
events = []
if record != "-":
    from numba.core import event

    class Listener(event.Listener):
        def __init__(self):
            self.stack = []

        @staticmethod
        def _name(ev):
            d = ev.data.get("dispatcher")
            f = getattr(d, "py_func", None)
            return ((getattr(f, "__module__", None) or "?"),
                    (getattr(f, "__qualname__", None) or repr(d)))

        def on_start(self, ev):
            self.stack.append([time.perf_counter(), 0.0, self._name(ev)])

        def on_end(self, ev):
            t0, child, (mod, name) = self.stack.pop()
            dt = time.perf_counter() - t0
            parent = ""
            if self.stack:
                self.stack[-1][1] += dt
                parent = ".".join(self.stack[-1][2])
            sig = ev.data.get("args")
            events.append({"module": mod, "name": name, "self": dt - child,
                           "total": dt, "sig": str(sig), "parent": parent})

    event.register("numba:compile", Listener())
import os
from sheetview.cli import main
t0 = time.perf_counter()
main.main(argv, standalone_mode=False)
wall = time.perf_counter() - t0
if record != "-":
    with open(record, "w") as fh:
        json.dump({"wall_in_process": wall, "events": events}, fh)
sys.stdout.flush()
sys.stderr.flush()
os._exit(0)  # as sheetview.cli.run: do not wait for library worker threads
"""


def run_child(argv: list[str], cache: str, record: str | None) -> float:
    env = dict(os.environ)
    env["NUMBA_CACHE_DIR"] = cache
    t0 = time.perf_counter()
    subprocess.run([sys.executable, "-c", CHILD, record or "-", *argv], env=env,
                   check=True, cwd=ROOT, stdout=subprocess.DEVNULL)
    return time.perf_counter() - t0


def commands(out: str, small: bool) -> dict[str, list[str]]:
    cmds = {"README (wall_stacks_sphere40, voxel 0.2)":
            ["measure", str(SAMPLE), "--voxel", "0.2", "-o", out + "/readme", "--force"]}
    if small:
        cmds["small (voxel 0.5)"] = ["measure", str(SAMPLE), "--voxel", "0.5",
                                     "-o", out + "/small", "--force"]
    return cmds


def kernel_table(events: list[dict], top: int) -> str:
    per: dict[tuple[str, str], list] = {}
    for e in events:
        k = (e["module"], e["name"])
        r = per.setdefault(k, [0.0, 0, set()])
        r[0] += e["self"]
        r[1] += 1
        r[2].add(e["sig"])
    rows = sorted(per.items(), key=lambda kv: -kv[1][0])
    lines = [f"{'module':38s} {'kernel':34s} {'self s':>7s} {'n':>3s}"]
    for (mod, name), (t, n, _) in rows[:top]:
        lines.append(f"{mod[-38:]:38s} {name[-34:]:34s} {t:7.2f} {n:3d}")
    mods: dict[str, list] = {}
    for (mod, _), (t, n, _) in rows:
        key = mod if mod.startswith("sheetview") else "numba/numpy overloads (" + mod.split(".")[0] + ")"
        m = mods.setdefault(key, [0.0, 0])
        m[0] += t
        m[1] += n
    lines.append("")
    lines.append(f"{'per module':60s} {'self s':>7s} {'compiles':>8s}")
    for mod, (t, n) in sorted(mods.items(), key=lambda kv: -kv[1][0]):
        lines.append(f"{mod[-60:]:60s} {t:7.2f} {n:8d}")
    total = sum(e["self"] for e in events)
    lines.append(f"{'all compiles':60s} {total:7.2f} {len(events):8d}")
    return "\n".join(lines)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--kernels", action="store_true", help="compile time per kernel (cold run)")
    ap.add_argument("--small", action="store_true", help="also a small run at voxel 0.5 nm")
    ap.add_argument("--warm", type=int, default=1, help="warm runs after the cold one")
    ap.add_argument("--top", type=int, default=40, help="kernels listed")
    ap.add_argument("--json", help="write the numbers (and events) to this file")
    a = ap.parse_args()
    results = {}
    with tempfile.TemporaryDirectory(prefix="sv_cold_") as tmp:
        for label, argv in commands(tmp, a.small).items():
            cache = tempfile.mkdtemp(prefix="numba_", dir=tmp)
            record = os.path.join(tmp, "events.json") if a.kernels else None
            cold = run_child(argv, cache, record)
            warm = [run_child(argv, cache, None) for _ in range(a.warm)]
            res = {"cold_s": cold, "warm_s": warm}
            if record:
                with open(record) as fh:
                    rec = json.load(fh)
                res["events"] = rec["events"]
                res["compile_s"] = sum(e["self"] for e in rec["events"])
            results[label] = res
            w = min(warm) if warm else float("nan")
            print(f"{label}: cold {cold:.1f} s, warm {', '.join(f'{x:.1f}' for x in warm)} s"
                  f" (cold/warm {cold / w:.1f}x)"
                  + (f"; compile events {res['compile_s']:.1f} s" if record else ""),
                  flush=True)
            if record:
                print(kernel_table(res["events"], a.top), flush=True)
    if a.json:
        with open(a.json, "w") as fh:
            json.dump(results, fh, indent=1)


if __name__ == "__main__":
    main()
