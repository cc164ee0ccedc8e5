"""Fuzzing sheetview's readers: seed files, mutations, and a crash-proof runner.

Used by ``tests/test_fuzz.py`` (a bounded run in the suite) and
``benchmarks/fuzz_inputs.py`` (thousands of cases, a tally by outcome and format).

* :func:`make_seeds` writes one small valid file of every format sheetview reads, with
  sheetview's own writers where it has one and with the general-purpose libraries
  (pyvista, trimesh, tifffile, Pillow) otherwise, and copies the bundled
  ``sample_structures``.
* :func:`mutate` damages a file the way disks, transfers and hand edits do: bit flips,
  bytes set to boundary values, truncation, deleted/duplicated/inserted chunks,
  count fields replaced by huge values, numbers in text replaced by extreme ones,
  JSON values of the wrong type, deep nesting, integers of thousands of digits.
* :class:`Runner` keeps worker processes that run each case through the command line
  (click's runner, in the worker's own process) or a library reader, with the C-level
  stderr captured and the peak resident memory of the case measured
  (``/proc/self/clear_refs``); a case that kills its worker (a signal) or does not
  finish within the timeout is recorded as such and the worker is replaced.

Outcomes (:func:`classify`): ``ok`` (exit 0), ``refused`` (exit 2, one line naming the
file), and the failures ``traceback``, ``signal``, ``hang``, ``noise`` (more than one line
or a library warning on stderr), ``unnamed`` (the message does not name the file),
``memory`` (peak resident memory above the bound), ``changed`` (the input was modified),
``leftover`` (a file was left beside the input), ``safety-net`` (refused only by the
catch-all of :func:`sheetview.io.read`, i.e. a reader let an unexpected exception through).
"""
from __future__ import annotations

import hashlib
import json
import os
import random
import re
import select
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
SAMPLES = ROOT / "sample_structures"

#: Peak resident memory (MiB) above which a case counts as a runaway allocation.
MEMORY_BOUND_MB = 1024
#: Address-space limit of a worker (bytes): a case that tries to allocate far more fails
#: inside the worker instead of taking the machine's memory.
WORKER_AS_LIMIT = 12 * 2**30
FAILURES = ("traceback", "signal", "hang", "noise", "unnamed", "memory", "changed",
            "leftover", "safety-net")

# ----------------------------------------------------------------------------- seeds


def _structure(n=40, seed=0):
    import numpy as np

    import sheetview as sv

    rng = np.random.default_rng(seed)
    c = rng.uniform(3, 17, (n, 1, 3))
    v = c + rng.normal(0, 1.0, (n, 3, 3))
    return sv.Structure(v, rng.uniform(0.5, 0.9, n), sv.Box((0, 0, 0), (20, 20, 20)), 1.4,
                        {"sheet": rng.integers(0, 5, n), "born": rng.uniform(0, 1, n)},
                        {"study": "fuzz seed", "seed": seed})


def _body():
    import trimesh

    import sheetview as sv
    from sheetview.structure import SurfaceBody

    m = trimesh.creation.icosphere(subdivisions=1, radius=3.0)
    m.apply_translation([5, 5, 5])
    return SurfaceBody(m.vertices, m.faces, sv.Box((0, 0, 0), (10, 10, 10)), {"kind": "ball"})


def _grid():
    import numpy as np

    from sheetview.grid import PhaseGrid

    rng = np.random.default_rng(3)
    lab = rng.integers(0, 4, (9, 8, 7)).astype(np.uint8)
    return PhaseGrid(lab, (0.5, 0.5, 0.5), (0.0, 1.0, 2.0), metadata={"note": "fuzz"})


def make_seeds(folder: Path, samples: bool = True) -> list[Path]:
    """Write one valid file of every readable format into ``folder``; return the paths."""
    import numpy as np
    import pyvista as pv
    import tifffile
    from PIL import Image

    import sheetview as sv
    from sheetview.io.meshes import write_body

    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    out = []
    s = _structure()
    for suffix in (".csv", ".npz", ".parquet", ".vtp", ".vtk"):
        p = folder / f"prisms{suffix}"
        sv.write(s, p, force=True)
        out.append(p)
    body = _body()
    for suffix in (".stl", ".ply", ".obj", ".off", ".glb", ".vtp", ".vtk"):
        p = folder / f"body{suffix}"
        write_body(body, p, force=True)
        out.append(p)
    # foreign meshes: ASCII PLY and legacy ASCII VTK and a VTU, open sheets
    sheets = pv.Plane(center=(5, 5, 5), i_resolution=4, j_resolution=3).triangulate()
    sheets.cell_data["thickness"] = np.full(sheets.n_cells, 0.7)
    p = folder / "sheets_ascii.vtk"
    sheets.save(str(p), binary=False)
    out.append(p)
    p = folder / "sheets.vtu"
    sheets.cast_to_unstructured_grid().save(str(p))
    out.append(p)
    p = folder / "sheets_ascii.ply"
    body.to_trimesh().export(str(p), encoding="ascii")
    out.append(p)
    g = _grid()
    for suffix in (".vti", ".npy", ".tif"):
        p = folder / f"grid{suffix}"
        sv.write(g, p, force=True)
        out.append(p)
    # curves
    q = np.geomspace(0.05, 5, 40)
    p = folder / "curve_saxs.csv"
    p.write_text("q (1/nm),I,error\n" + "".join(f"{a:.6g},{1 / a ** 3:.6g},{0.1 / a ** 3:.6g}\n"
                                               for a in q))
    out.append(p)
    p = folder / "curve_t2.txt"
    t = np.geomspace(1e-4, 1, 30)
    p.write_text("T2 (ms)\tamplitude\n" + "".join(f"{a:.6g}\t{np.exp(-np.log10(a) ** 2):.6g}\n"
                                                 for a in t))
    out.append(p)
    # micrographs
    rng = np.random.default_rng(5)
    img = (rng.random((48, 40)) > 0.6).astype(np.uint8) * 180 + rng.integers(0, 40, (48, 40)).astype(np.uint8)
    p = folder / "micrograph.png"
    Image.fromarray(img).save(p)
    out.append(p)
    p = folder / "micrograph.tif"
    tifffile.imwrite(str(p), img.astype(np.uint16) * 100, resolution=(2e3, 2e3),
                     resolutionunit="CENTIMETER")
    out.append(p)
    if samples:
        for f in sorted(SAMPLES.iterdir()):
            if f.suffix.lower() in (".csv", ".npz", ".parquet", ".ply", ".tif") and \
                    "truth" not in f.name:
                dst = folder / f"sample_{f.name}"
                shutil.copyfile(f, dst)
                out.append(dst)
    return out


def op_for(path: Path) -> str:
    """How a seed is exercised: ``info`` (command line), ``micrograph`` or ``curve``."""
    name = Path(path).name
    if name.startswith("micrograph"):
        return "micrograph"
    if name.startswith("curve"):
        return "curve"
    return "info"


def fmt_of(path: Path) -> str:
    """Format label used in tallies (suffix, with micrograph/curve/sample distinctions)."""
    p = Path(path)
    name = re.sub(r"^(m\d+_)", "", p.name)
    suffix = p.suffix.lower().lstrip(".")
    if name.startswith("micrograph"):
        return f"micrograph-{suffix}"
    if name.startswith("curve"):
        return "curve"
    if "ascii" in name:
        return f"{suffix}-ascii"
    return suffix


# ------------------------------------------------------------------------- mutations
_HUGE_COUNTS = [2**31 - 1, 2**31, 2**32 - 1, 2**63 - 1, 200_000_000, 2_000_000_000,
                10**7, 65535, 0]
_TEXT_NUMBERS = ["1e308", "-1e308", "1e19", "1e300", "1e150", "nan", "inf", "-inf", "-1", "0",
                 "2000000000", "200000000", "9" * 5000, "1e-320", "", "abc", "0x10",
                 "1" + "0" * 400, "-0", "3.4e38", "1e-300"]
_JSON_VALUES = ["[]", "null", '"x"', "1", "-1", "1e400", "{}", "true", "[" * 100000 + "]" * 100000,
                "9" * 5000, '{"shape": "box", "min": [0, 0, 0], "max": [0, 0, 1e-300]}',
                '{"shape": "sphere", "center": [0, 0, 0], "radius": 1e300}',
                '{"shape": "box", "min": [0, 0, 0], "max": [1e300, 1e300, 1e300]}']
TEXT_SUFFIXES = {".csv", ".txt", ".obj", ".off"}


def _is_text(data: bytes) -> bool:
    head = data[:4096]
    return b"\x00" not in head


def mutate(data: bytes, rng: random.Random, suffix: str = "") -> tuple[bytes, str]:
    """One random damage of ``data``; returns the damaged bytes and the name of the damage."""
    kinds = ["bitflip", "byteset", "truncate", "delete", "duplicate", "insert", "count"]
    text = _is_text(data) or suffix in TEXT_SUFFIXES
    if text or b"sheetview" in data[:1 << 16] or b"<?xml" in data[:64] or b"# vtk" in data[:64] \
            or data[:3] == b"ply" or b"{" in data[:1 << 16]:
        kinds += ["number", "number", "json", "line"]
    kind = rng.choice(kinds)
    b = bytearray(data)
    n = len(b)
    if n == 0:
        return b"\x00", "empty"
    if kind == "bitflip":
        for _ in range(rng.choice([1, 1, 2, 4, 8])):
            i = rng.randrange(n)
            b[i] ^= 1 << rng.randrange(8)
    elif kind == "byteset":
        for _ in range(rng.choice([1, 2, 4])):
            b[rng.randrange(n)] = rng.choice([0, 0xFF, 0x7F, 0x80, rng.randrange(256)])
    elif kind == "truncate":
        b = b[:rng.randrange(n)]
    elif kind == "delete":
        i = rng.randrange(n)
        del b[i:i + rng.choice([1, 4, 16, 256, 4096])]
    elif kind == "duplicate":
        i = rng.randrange(n)
        b[i:i] = b[i:i + rng.choice([1, 8, 64, 1024])]
    elif kind == "insert":
        i = rng.randrange(n)
        b[i:i] = bytes(rng.randrange(256) for _ in range(rng.choice([1, 3, 17])))
    elif kind == "count":
        v = rng.choice(_HUGE_COUNTS)
        width = rng.choice([4, 8])
        if v >= 2 ** (8 * width):
            v = 2 ** (8 * width) - 1
        i = rng.randrange(max(1, n - width))
        b[i:i + width] = v.to_bytes(width, rng.choice(["little", "big"]))
    elif kind == "number":
        nums = list(re.finditer(rb"-?\d+(\.\d+)?([eE][-+]?\d+)?", bytes(b[:1 << 20])))
        if nums:
            m = rng.choice(nums[:2000] if rng.random() < 0.5 else nums)
            new = rng.choice(_TEXT_NUMBERS + [str(c) for c in _HUGE_COUNTS]).encode()
            b[m.start():m.end()] = new
        else:
            b[rng.randrange(n)] ^= 1
    elif kind == "json":
        vals = list(re.finditer(rb'(:\s*)("[^"]*"|-?[\d.eE+-]+|\[[^\[\]]*\]|\{[^{}]*\}|true|false|null)',
                                bytes(b[:1 << 20])))
        if vals:
            m = rng.choice(vals)
            new = rng.choice(_JSON_VALUES).encode()
            if b'\\"' in bytes(b[max(0, m.start() - 200):m.end()]):
                new = new.replace(b'"', b'\\"')  # a JSON header inside a JSON string
            b[m.start(2):m.end(2)] = new
        else:
            b[rng.randrange(n)] ^= 1
    elif kind == "line":
        lines = bytes(b).split(b"\n")
        i = rng.randrange(len(lines))
        op = rng.choice(["drop", "dup", "swap"])
        if op == "drop":
            del lines[i]
        elif op == "dup":
            lines.insert(i, lines[i])
        else:
            j = rng.randrange(len(lines))
            lines[i], lines[j] = lines[j], lines[i]
        b = bytearray(b"\n".join(lines))
        kind = f"line-{op}"
    return bytes(b), kind


# ---------------------------------------------------------------------------- worker
WORKER_CODE = r"""
import io, json, os, resource, sys, time, traceback, warnings
sys.path.insert(0, sys.argv[1])
limit = int(sys.argv[2])
try:
    resource.setrlimit(resource.RLIMIT_AS, (limit, limit))
except (ValueError, OSError):
    pass
from click.testing import CliRunner
from sheetview.cli import main
from sheetview.errors import SheetviewError

def status(key):
    with open("/proc/self/status") as fh:
        for line in fh:
            if line.startswith(key):
                return int(line.split()[1]) / 1024
    return 0.0

def reset_peak():
    try:
        with open("/proc/self/clear_refs", "w") as fh:
            fh.write("5")
    except OSError:
        pass

out = sys.stdout
sys.stdout = sys.stderr
runner = CliRunner()
for line in sys.stdin:
    case = json.loads(line)
    path, op = case["path"], case["op"]
    cap = os.open(case["cerr"], os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o600)
    saved = os.dup(2)
    os.dup2(cap, 2)
    os.close(cap)
    reset_peak()
    base = status("VmRSS:")
    t0 = time.perf_counter()
    res = {}
    try:
        if op == "info":
            r = runner.invoke(main, ["info", path], catch_exceptions=True)
            res["exit"] = r.exit_code
            res["stderr"] = r.stderr
            if r.exception is not None and not isinstance(r.exception, SystemExit):
                res["exit"] = 1
                res["stderr"] = (r.stderr or "") + "".join(
                    traceback.format_exception(type(r.exception), r.exception, r.exception.__traceback__))
        else:
            caught = []
            with warnings.catch_warnings(record=True) as w:
                warnings.simplefilter("always")
                try:
                    if op == "micrograph":
                        from sheetview.io.images import read_micrograph
                        read_micrograph(path, pixel_size=1.0)
                    else:
                        from sheetview.io.curves import read_experimental
                        kind = "t2" if "t2" in os.path.basename(path) else "scattering"
                        read_experimental(path, kind)
                    res["exit"] = 0
                    res["stderr"] = ""
                except SheetviewError as e:
                    res["exit"] = 2
                    res["stderr"] = f"sheetview: error: {e}\n"
                except Exception as e:
                    res["exit"] = 1
                    res["stderr"] = traceback.format_exc()
                caught = [f"{x.category.__name__}: {x.message}" for x in w]
            if caught:
                res["stderr"] = "\n".join(caught) + "\n" + res["stderr"]
    except BaseException as e:
        res["exit"] = 1
        res["stderr"] = traceback.format_exc()
    res["seconds"] = time.perf_counter() - t0
    res["peak_mb"] = max(0.0, status("VmHWM:") - base)
    sys.stderr.flush()
    os.dup2(saved, 2)
    os.close(saved)
    out.write(json.dumps(res) + "\n")
    out.flush()
"""


class Runner:
    """Worker processes that run fuzz cases; a crash or hang costs one worker restart."""

    def __init__(self, timeout: float = 60.0, as_limit: int = WORKER_AS_LIMIT,
                 env: dict | None = None):
        self.timeout = timeout
        self.as_limit = as_limit
        self.env = dict(os.environ, **(env or {}))
        self.env.setdefault("MPLBACKEND", "Agg")
        self.proc = None

    def _start(self):
        self.proc = subprocess.Popen(
            [sys.executable, "-c", WORKER_CODE, str(ROOT), str(self.as_limit)],
            stdin=subprocess.PIPE, stdout=subprocess.PIPE, stderr=subprocess.DEVNULL,
            env=self.env, text=True, bufsize=1, start_new_session=True)

    def close(self):
        if self.proc is not None:
            try:
                self.proc.stdin.close()
                self.proc.wait(timeout=10)
            except (OSError, subprocess.TimeoutExpired):
                self._kill()
            self.proc = None

    def _kill(self):
        try:
            os.killpg(self.proc.pid, signal.SIGKILL)
        except (ProcessLookupError, PermissionError):
            pass
        self.proc.wait()

    def run(self, path: Path, op: str) -> dict:
        if self.proc is None or self.proc.poll() is not None:
            self._start()
        cerr = str(Path(path).parent.parent / f".cerr-{os.getpid()}-{id(self)}")
        self.proc.stdin.write(json.dumps({"path": str(path), "op": op, "cerr": cerr}) + "\n")
        self.proc.stdin.flush()
        t0 = time.monotonic()
        fd = self.proc.stdout.fileno()
        while True:
            left = self.timeout - (time.monotonic() - t0)
            if left <= 0:
                self._kill()
                self.proc = None
                return {"exit": None, "stderr": "", "hang": True, "seconds": self.timeout}
            r, _, _ = select.select([fd], [], [], min(left, 1.0))
            if r:
                line = self.proc.stdout.readline()
                if not line:
                    rc = self.proc.wait()
                    self.proc = None
                    return {"exit": rc, "stderr": "", "died": True,
                            "seconds": time.monotonic() - t0}
                res = json.loads(line)
                try:
                    res["cstderr"] = Path(cerr).read_text(errors="replace")
                except OSError:
                    res["cstderr"] = ""
                return res


def _digest(path: Path) -> str:
    """Content hash of a regular file; for anything else (FIFO, folder, device, broken or
    looping link) its kind, without opening it."""
    import stat
    try:
        st = os.stat(path)
    except OSError as e:
        return f"unstat-able: {e.errno}"
    if not stat.S_ISREG(st.st_mode):
        return f"special: {stat.S_IFMT(st.st_mode)}"
    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


def classify(res: dict, path: Path, before: str, listing_before: set) -> tuple[str, str]:
    """(outcome, detail) of one case; see the module text."""
    path = Path(path)
    if res.get("hang"):
        return "hang", f"no answer within {res['seconds']:.0f} s"
    if res.get("died"):
        rc = res["exit"]
        return "signal", (f"worker killed by {signal.Signals(-rc).name}" if rc < 0
                          else f"worker exited {rc}")
    if _digest(path) != before:
        return "changed", "the input file was modified"
    extra = set(os.listdir(path.parent)) - listing_before
    if extra:
        return "leftover", f"left {sorted(extra)}"
    err = (res.get("stderr") or "")
    cerr = (res.get("cstderr") or "").strip()
    if res["exit"] == 1 or "Traceback" in err:
        last = [ln for ln in err.strip().splitlines() if ln.strip()]
        return "traceback", last[-1] if last else "exit 1"
    if res.get("peak_mb", 0) > MEMORY_BOUND_MB:
        return "memory", f"peak {res['peak_mb']:.0f} MiB"
    if res["exit"] == 0:
        if cerr or err.strip():
            return "noise", (cerr or err).strip().splitlines()[0][:200]
        return "ok", ""
    if res["exit"] == 2:
        lines = [ln for ln in err.splitlines() if ln.strip()]
        if len(lines) != 1 or cerr:
            return "noise", " | ".join(lines[:3] + ([cerr[:100]] if cerr else []))[:300]
        msg = lines[0]
        if str(path) not in msg and path.name not in msg:
            return "unnamed", msg[:300]
        if "unexpected error" in msg:
            return "safety-net", msg[:300]
        return "refused", msg[:300]
    return "traceback", f"exit {res['exit']}: {err.strip()[-200:]}"


def run_cases(runner: Runner, seeds: list[Path], n_per_seed: int, workdir: Path, seed: int = 0,
              log=None) -> list[dict]:
    """Mutate each seed ``n_per_seed`` times (plus the seed itself) and run every case.
    Each case sits alone in its own folder so that leftovers can be seen."""
    rng = random.Random(seed)
    rows = []
    workdir = Path(workdir)
    k = 0
    for s in seeds:
        data = Path(s).read_bytes()
        for m in range(n_per_seed + 1):
            if m == 0:
                mutated, kind = data, "none"
            else:
                mutated, kind = mutate(data, rng, Path(s).suffix.lower())
                if rng.random() < 0.25:  # a second damage now and then
                    mutated, kind2 = mutate(mutated, rng, Path(s).suffix.lower())
                    kind = f"{kind}+{kind2}"
            case_dir = workdir / f"c{k:06d}"
            case_dir.mkdir(parents=True)
            p = case_dir / Path(s).name
            p.write_bytes(mutated)
            before = _digest(p)
            listing = set(os.listdir(case_dir))
            res = runner.run(p, op_for(p))
            outcome, detail = classify(res, p, before, listing)
            row = {"case": k, "seed": Path(s).name, "format": fmt_of(p), "mutation": kind,
                   "outcome": outcome, "detail": detail, "seconds": res.get("seconds"),
                   "peak_mb": res.get("peak_mb")}
            rows.append(row)
            if outcome in FAILURES:
                keep = workdir / "failures"
                keep.mkdir(exist_ok=True)
                shutil.copyfile(p, keep / f"{k:06d}_{outcome}_{p.name}")
            else:
                shutil.rmtree(case_dir, ignore_errors=True)
            if log is not None:
                log(row)
            k += 1
    return rows


def tally(rows: list[dict]) -> dict:
    """{format: {outcome: count}} plus a total row."""
    t: dict = {}
    for r in rows:
        t.setdefault(r["format"], {}).setdefault(r["outcome"], 0)
        t[r["format"]][r["outcome"]] += 1
        t.setdefault("all", {}).setdefault(r["outcome"], 0)
        t["all"][r["outcome"]] += 1
    return t


# ----------------------------------------------------------------------- hand-made files
def _npz_bytes(arrays: dict) -> bytes:
    import io

    import numpy as np
    buf = io.BytesIO()
    np.savez_compressed(buf, **arrays)
    return buf.getvalue()


def handmade_cases(folder: Path) -> list[tuple[Path, str]]:
    """Small files built to hurt: each declares far more than it holds, or holds a value of
    the wrong type, or is not a regular file. Returns ``(path, what)`` pairs; every one must
    be refused (exit 2, one line naming the file) with a small peak memory."""
    import numpy as np
    import pyarrow as pa
    import pyarrow.parquet as pq

    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    cases = []

    def add(name, data, what):
        p = folder / name
        p.write_bytes(data if isinstance(data, bytes) else data.encode())
        cases.append((p, what))

    # legacy VTK declaring 2e8 and 2e9 points in about 126 bytes
    for n, name in ((200_000_000, "points_2e8.vtk"), (2_000_000_000, "points_2e9.vtk")):
        add(name, f"# vtk DataFile Version 3.0\nhuge\nBINARY\nDATASET POLYDATA\nPOINTS {n} float\n"
                  + "\x00" * 24 + f"\nPOLYGONS 1 4\n" + "\x00" * 16, "declared points")
        add("ascii_" + name, f"# vtk DataFile Version 3.0\nhuge\nASCII\nDATASET POLYDATA\n"
                             f"POINTS {n} float\n0 0 0 1 0 0 0 1 0\nPOLYGONS 1 4\n3 0 1 2\n",
            "declared points (ASCII)")
    add("cells_huge.vtk", "# vtk DataFile Version 3.0\nx\nASCII\nDATASET POLYDATA\nPOINTS 3 float\n"
                          "0 0 0 1 0 0 0 1 0\nPOLYGONS 1 4000000000\n3 0 1 2\n", "declared cells")
    add("field_huge.vtk", "# vtk DataFile Version 3.0\nx\nASCII\nDATASET POLYDATA\nPOINTS 3 float\n"
                          "0 0 0 1 0 0 0 1 0\nPOLYGONS 1 4\n3 0 1 2\nFIELD FieldData 1\n"
                          "sheetview 1 2000000000 string\nabc\n", "declared field array")
    add("points_xml.vtp", '<?xml version="1.0"?>\n<VTKFile type="PolyData" version="1.0" '
                          'byte_order="LittleEndian" header_type="UInt64">\n<PolyData>\n'
                          '<Piece NumberOfPoints="2000000000" NumberOfPolys="1">\n<Points>\n'
                          '<DataArray type="Float32" NumberOfComponents="3" format="ascii">'
                          '0 0 0 1 0 0 0 1 0</DataArray>\n</Points>\n</Piece>\n</PolyData>\n'
                          '</VTKFile>\n', "declared points (XML)")
    for sp, org, tag in (("nan 1 1", "0 0 0", "spacing_nan"), ("1 1 1", "inf 0 0", "origin_inf"),
                         ("0 1 1", "0 0 0", "spacing_zero"), ("1 1", "0 0 0", "spacing_two")):
        add(f"{tag}.vti", '<?xml version="1.0"?>\n<VTKFile type="ImageData" version="1.0" '
                          'byte_order="LittleEndian" header_type="UInt64">\n'
                          f'<ImageData WholeExtent="0 2 0 2 0 2" Origin="{org}" Spacing="{sp}">\n'
                          '<Piece Extent="0 2 0 2 0 2">\n<CellData Scalars="phase">\n'
                          '<DataArray type="UInt8" Name="phase" format="ascii">0 1 0 1 0 1 0 1'
                          '</DataArray>\n</CellData>\n</Piece>\n</ImageData>\n</VTKFile>\n',
            f"VTI {tag}")
    add("extent_huge.vti", '<?xml version="1.0"?>\n<VTKFile type="ImageData" version="1.0" '
                           'byte_order="LittleEndian" header_type="UInt64">\n<ImageData '
                           'WholeExtent="0 100000 0 100000 0 100000" Origin="0 0 0" Spacing="1 1 1">'
                           '\n<Piece Extent="0 100000 0 100000 0 100000">\n<CellData>\n'
                           '<DataArray type="UInt8" Name="phase" format="ascii">0 1</DataArray>\n'
                           '</CellData>\n</Piece>\n</ImageData>\n</VTKFile>\n', "declared extent")
    # NPZ: zeros bomb, 0 rows, wrong header types, bad thickness, sheet 1e30, pickles
    v = np.zeros((20_000_000, 3, 3))
    hdr = np.array(json.dumps({"format": "sheetview prisms v1", "thickness": 0.7}))
    add("zeros_bomb.npz", _npz_bytes({"vertices": v, "header": hdr}), "decompression bomb")
    del v
    tri = np.array([[[0, 0, 0], [1, 0, 0], [0, 1, 0]]], float)
    add("zero_rows.npz", _npz_bytes({"vertices": np.zeros((0, 3, 3)), "header": hdr}), "0 rows")
    for tag, h in (("list", "[1, 2]"), ("null", "null"), ("string", '"x"'), ("number", "3"),
                   ("deep", "[" * 100000 + "]" * 100000), ("bigint", "9" * 5000),
                   ("bigint_value", '{"thickness": ' + "1" + "0" * 400 + "}")):
        add(f"header_{tag}.npz", _npz_bytes({"vertices": tri, "header": np.array(h)}),
            f"NPZ header {tag}")
    for tag, t in (("shape", np.ones((1, 2))), ("strings", np.array(["a"])),
                   ("huge", np.array([1e19])), ("huge300", np.array([1e300]))):
        add(f"thickness_{tag}.npz", _npz_bytes({"vertices": tri, "thickness": t, "header": hdr}),
            f"thickness {tag}")
    add("sheet_1e30.npz", _npz_bytes({"vertices": tri, "header": hdr,
                                      "col_sheet": np.array([1e30])}), "sheet 1e30")
    add("coords_1e150.npz", _npz_bytes({"vertices": tri * 1e150, "header": hdr}), "1e150")
    add("coords_1e308.npz", _npz_bytes({"vertices": tri * 1e308, "header": hdr}), "1e308")
    add("object.npz", _npz_bytes({"vertices": tri, "header": hdr,
                                  "col_x": np.array([{"a": 1}], dtype=object)}), "pickle")
    # CSV headers of the wrong type, huge numbers, deep JSON
    row = "ax,ay,az,bx,by,bz,cx,cy,cz\n0,0,0,1,0,0,0,1,0\n"
    for tag, line in (("thickness_list", "# thickness: [1]"), ("thickness_null", "# thickness: null"),
                      ("thickness_str", '# thickness: "x"'), ("thickness_int", "# thickness: 1" + "0" * 400),
                      ("thickness_digits", "# thickness: " + "9" * 5000),
                      ("domain_deep", "# domain: " + "[" * 100000 + "]" * 100000),
                      ("domain_list", "# thickness: 0.7\n# domain: [1, 2]"),
                      ("domain_num", "# thickness: 0.7\n# domain: 7"),
                      ("domain_tiny", '# thickness: 0.7\n# domain: {"shape": "box", "min": [0, 0, 0], '
                                      '"max": [1, 1, 1e-300]}'),
                      ("domain_huge", '# thickness: 0.7\n# domain: {"shape": "sphere", "center": '
                                      '[0, 0, 0], "radius": 1e300}'),
                      ("units_list", "# thickness: 0.7\n# units: [1]"),
                      ("spacing_huge", "# thickness: 0.7\n# spacing: 1e300")):
        add(f"header_{tag}.csv", f"# sheetview prisms v1\n{line}\n{row}", f"CSV {tag}")
    add("thickness_1e19.csv", "# thickness: 1e19\n" + row, "thickness 1e19")
    add("coords_1e150.csv", "# thickness: 0.7\nax,ay,az,bx,by,bz,cx,cy,cz\n"
                            "0,0,0,1e150,0,0,0,1e150,0\n", "coordinates 1e150")
    # Parquet: header metadata of the wrong type
    t = pa.table({k: [float(x)] for k, x in zip("ax ay az bx by bz cx cy cz".split(),
                                                 (0, 0, 0, 1, 0, 0, 0, 1, 0))})
    for tag, meta in (("list", b"[1]"), ("null", b"null"), ("deep", b"[" * 100000 + b"]" * 100000)):
        p = folder / f"meta_{tag}.parquet"
        pq.write_table(t.replace_schema_metadata({b"sheetview": meta}), p)
        cases.append((p, f"Parquet metadata {tag}"))
    # a micrograph TIFF declaring a huge image in a few bytes, a truncated volume TIFF
    import struct

    import tifffile
    p = folder / "micrograph_huge.tif"
    tifffile.imwrite(str(p), np.zeros((64, 64), np.uint8))
    data = bytearray(p.read_bytes())
    with tifffile.TiffFile(str(p)) as tf:
        tags = tf.pages[0].tags
        for name, val in (("ImageWidth", 100_000), ("ImageLength", 100_000)):
            tag = tags[name]
            fmt_ = "<H" if tag.dtype == 3 else "<I"
            data[tag.valueoffset:tag.valueoffset + struct.calcsize(fmt_)] = struct.pack(fmt_, val)
    p.write_bytes(bytes(data))
    cases.append((p, "micrograph declared size"))
    src = SAMPLES / "small_volume.tif"
    if src.exists():
        add("truncated_volume.tif", src.read_bytes()[:5000], "truncated stack")
    # special files
    fifo = folder / "pipe.csv"
    try:
        os.mkfifo(fifo)
        cases.append((fifo, "FIFO"))
    except (OSError, AttributeError):
        pass
    loop = folder / "loop.csv"
    try:
        os.symlink(loop.name, loop)
        cases.append((loop, "link loop"))
        dangling = folder / "dangling.npz"
        os.symlink("nowhere.npz", dangling)
        cases.append((dangling, "dangling link"))
        dev = folder / "zero.npy"
        os.symlink("/dev/zero", dev)
        cases.append((dev, "device"))
    except OSError:
        pass
    d = folder / "folder.parquet"
    d.mkdir(exist_ok=True)
    cases.append((d, "folder"))
    return cases
