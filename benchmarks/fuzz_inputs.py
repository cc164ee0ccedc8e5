"""Long fuzz run of every reader: thousands of damaged files, a tally by format and outcome.

Each seed file (one of every format sheetview reads, written by sheetview's own writers and
by general-purpose libraries, plus the bundled `sample_structures/`; see
`tests/fuzz_harness.py`) is damaged `--per-seed` times (bit flips, bytes set to boundary
values, truncation, deleted/duplicated/inserted chunks, count fields set to huge values,
numbers in text set to extreme ones, JSON values of the wrong type or nesting), and the
hand-made files of `fuzz_harness.handmade_cases` are added. Every case runs through
`sheetview info` (micrographs and curves through their readers) in worker processes with a
timeout; the outcome is one of

    ok, refused                      (the promise holds)
    traceback, signal, hang, noise, unnamed, memory, changed, leftover, safety-net
                                     (it does not; the damaged files are kept)

and the tally (Markdown) goes to stdout, the rows to `--out` (JSON).

    python benchmarks/fuzz_inputs.py --per-seed 150 --workers 2 --out fuzz.json
"""
from __future__ import annotations

import argparse
import json
import os
import shutil
import sys
import tempfile
import threading
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from tests import fuzz_harness as fh  # noqa: E402

OUTCOMES = ("ok", "refused") + fh.FAILURES


def _run_handmade(runner, folder):
    rows = []
    for path, what in fh.handmade_cases(folder):
        if path.is_dir():
            continue
        before = fh._digest(path)
        listing = set(os.listdir(path.parent))
        res = runner.run(path, fh.op_for(path))
        outcome, detail = fh.classify(res, path, before, listing)
        rows.append({"case": f"handmade:{path.name}", "seed": path.name, "format": "hand-made",
                     "mutation": what, "outcome": outcome, "detail": detail,
                     "seconds": res.get("seconds"), "peak_mb": res.get("peak_mb")})
    return rows


def main():
    ap = argparse.ArgumentParser(description=__doc__,
                                 formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--per-seed", type=int, default=150)
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--timeout", type=float, default=120.0)
    ap.add_argument("--out", default=None, help="JSON file for every row")
    ap.add_argument("--keep", default=None, help="folder to keep the failing files in")
    args = ap.parse_args()

    work = Path(tempfile.mkdtemp(prefix="sheetview-fuzz-"))
    t0 = time.time()
    seeds = fh.make_seeds(work / "seeds")
    groups = [seeds[i::args.workers] for i in range(args.workers)]
    results: list = [None] * args.workers

    def work_on(i):
        r = fh.Runner(timeout=args.timeout)
        try:
            results[i] = fh.run_cases(r, groups[i], args.per_seed, work / f"cases{i}",
                                      seed=args.seed * 1000 + i)
            if i == 0:
                results[i] += _run_handmade(r, work / "handmade")
        finally:
            r.close()

    threads = [threading.Thread(target=work_on, args=(i,)) for i in range(args.workers)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    rows = [r for part in results if part for r in part]
    elapsed = time.time() - t0

    tally = fh.tally(rows)
    used = [o for o in OUTCOMES if any(o in t for t in tally.values())]
    print(f"{len(rows):,} cases, {len(seeds)} seed files x {args.per_seed} damaged copies + "
          f"hand-made files, {args.workers} workers, {elapsed / 60:.1f} min\n")
    print("| format | " + " | ".join(used) + " |")
    print("|---|" + "---|" * len(used))
    for fmt in sorted(k for k in tally if k != "all") + ["all"]:
        print(f"| {fmt} | " + " | ".join(str(tally[fmt].get(o, 0)) for o in used) + " |")
    fails = [r for r in rows if r["outcome"] in fh.FAILURES]
    peak = max((r.get("peak_mb") or 0) for r in rows)
    print(f"\nfailures: {len(fails)}; largest peak memory of a case: {peak:.0f} MiB")
    for r in fails[:40]:
        print(f"  {r['format']:>14s} {r['mutation']:>18s} {r['outcome']:>10s}  {r['detail'][:160]}")
    if args.out:
        Path(args.out).write_text(json.dumps(rows, indent=0))
    if args.keep and fails:
        keep = Path(args.keep)
        keep.mkdir(parents=True, exist_ok=True)
        for d in work.glob("cases*/failures"):
            for f in d.iterdir():
                shutil.copy(f, keep / f.name)
    shutil.rmtree(work, ignore_errors=True)
    return 1 if fails else 0


if __name__ == "__main__":
    sys.exit(main())
