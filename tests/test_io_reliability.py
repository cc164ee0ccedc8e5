"""Bad input and faults: one line naming the file, exit status 2, no traceback, no library
noise, the input unchanged, nothing half-written, no crash, no runaway memory.

References outside the project: the kernel is compared with a plain numpy evaluation of
the centre-inside test (the definition in :func:`sheetview.grid.rasterize`); declared sizes
are those of the formats' own specifications (legacy VTK "File Formats for VTK Version 4.2",
Kitware; NPY format 1.0/2.0, numpy.lib.format; Parquet footer, Apache Parquet format
specification; TIFF 6.0 strips; glTF 2.0 accessors); the deflate bound is RFC 1951's.
"""
from __future__ import annotations

import json
import os
import resource
import subprocess
import sys
import warnings
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import sheetview as sv
from sheetview.cli import main
from sheetview.errors import InputError, MemoryLimitError, SheetviewError
from sheetview.grid import (SOLID, _mark_prisms, _prism_coefficients, check_memory,
                            estimate_grid_bytes, grid_geometry, kernel_checks, n_voxels,
                            rasterize, rasterize_body)
from sheetview.io import isolate, prisms, safety
from tests import fuzz_harness as fh
from tests.conftest import random_structure

ROOT = Path(__file__).resolve().parents[1]


@pytest.fixture(scope="module")
def handmade(tmp_path_factory):
    return fh.handmade_cases(tmp_path_factory.mktemp("handmade"))


@pytest.fixture(scope="module")
def runner():
    r = fh.Runner(timeout=120)
    yield r
    r.close()


# ------------------------------------------------------------------ hand-made files
def test_handmade_files_refused_in_one_line_with_small_memory(handmade, runner):
    """Every hand-made file (declared sizes far beyond the file, values of the wrong type,
    special files) is refused by `sheetview info` with one line naming the file, exit 2,
    and the refusal comes before the allocation it prevents: the worker's peak resident
    memory grows by less than 200 MiB (the files declare gigabytes to petabytes)."""
    bad = []
    for path, what in handmade:
        if path.is_dir():
            continue  # click refuses a folder for FILE itself (see test_folder_refused)
        before = fh._digest(path)
        listing = set(os.listdir(path.parent))
        res = runner.run(path, fh.op_for(path))
        outcome, detail = fh.classify(res, path, before, listing)
        if outcome != "refused" or res.get("peak_mb", 0) > 200:
            bad.append((what, outcome, res.get("peak_mb"), detail))
    assert not bad, bad


def test_handmade_files_through_read(handmade):
    """sheetview.io.read raises a SheetviewError naming the file for each, and no library
    warning escapes."""
    for path, what in handmade:
        with warnings.catch_warnings(record=True) as w:
            warnings.simplefilter("always")
            with pytest.raises(SheetviewError) as ei:
                sv.read(path)
        assert str(path) in str(ei.value), (what, str(ei.value))
        assert "\n" not in str(ei.value)
        assert not w, (what, [str(x.message) for x in w])


def test_folder_refused(tmp_path):
    d = tmp_path / "x.csv"
    d.mkdir()
    with pytest.raises(InputError, match="is a folder"):
        sv.read(d)


def test_fifo_refused_at_once(tmp_path):
    """A named pipe is refused without opening it for reading (which would wait for a
    writer forever); the CLI answers at once with exit status 2."""
    p = tmp_path / "s.csv"
    os.mkfifo(p)
    r = subprocess.run([sys.executable, "-m", "sheetview", "info", str(p)], capture_output=True,
                       text=True, timeout=120, cwd=ROOT)
    assert r.returncode == 2
    assert r.stderr.count("\n") == 1 and str(p) in r.stderr and "FIFO" in r.stderr


def test_link_loop_and_dangling_link(tmp_path):
    loop = tmp_path / "a.npz"
    os.symlink("b.npz", loop)
    os.symlink("a.npz", tmp_path / "b.npz")
    with pytest.raises(InputError, match="link loop"):
        sv.read(loop)
    dang = tmp_path / "c.npz"
    os.symlink("missing.npz", dang)
    with pytest.raises(InputError, match="does not exist"):
        sv.read(dang)


# ------------------------------------------------------------- memory before allocation
CHILD = r"""
import json, resource, sys
import sheetview.io.safety as safety
safety.memory_budget = lambda: int(sys.argv[2])
from sheetview.cli import main
try:
    main(["info", sys.argv[1]], standalone_mode=True)
except SystemExit as e:
    code = e.code
print(json.dumps({"code": code, "maxrss_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024}),
      file=sys.__stdout__)
"""


def _child_info(path, budget):
    r = subprocess.run([sys.executable, "-c", CHILD, str(path), str(budget)], capture_output=True,
                       text=True, timeout=300, cwd=ROOT)
    out = json.loads(r.stdout.strip().splitlines()[-1])
    return out["code"], r.stderr, out["maxrss_mb"]


def _baseline_rss():
    code = "import resource, sheetview.cli; print(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024)"
    r = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, cwd=ROOT)
    return float(r.stdout.strip())


def test_parquet_rows_refused_before_allocation(tmp_path):
    """4 million identical rows compress to a small Parquet file (dictionary encoding); with
    a memory budget of 200 MB the footer's row count is refused before any row is read: the
    child's peak resident memory stays within 150 MB of an idle sheetview process."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    cols = prisms.CORNER_COLUMNS
    row = [0, 0, 0, 1, 0, 0, 0, 1, 0]
    batch = pa.table({c: np.full(100_000, float(v)) for c, v in zip(cols, row)})
    p = tmp_path / "many.parquet"
    with pq.ParquetWriter(p, batch.schema, compression="zstd") as w:
        for _ in range(40):
            w.write_table(batch)
    assert p.stat().st_size < 2_000_000
    code, err, peak = _child_info(p, 200 * 2**20)
    assert code == 2, err
    assert err.count("\n") == 1 and str(p) in err and "4,000,000 rows" in err, err
    assert peak < _baseline_rss() + 150, peak


def test_csv_size_refused_before_reading(tmp_path):
    p = tmp_path / "big.csv"
    p.write_text("# thickness: 0.7\nax,ay,az,bx,by,bz,cx,cy,cz\n" + "0,0,0,1,0,0,0,1,0\n" * 20000)
    code, err, peak = _child_info(p, 100_000)
    assert code == 2 and "bytes of CSV text" in err and str(p) in err, err


# ------------------------------------------------------------------- JSON and values
@pytest.mark.parametrize("text,word", [
    ("[1]", "must be a JSON object"), ("null", "got null"), ('"x"', "got a string"),
    ("3", "got a number"), ("[" * 100000 + "]" * 100000, "deeper than"),
    ("9" * 5000, "digits")])
def test_load_json_refuses(text, word):
    with pytest.raises(InputError, match=word) as ei:
        safety.load_json(text, path="f.npz", field="header", expect=dict)
    assert "f.npz" in str(ei.value)


def test_numbers_in_messages_are_plain(tmp_path):
    """No `np.float64(...)` in a message (numpy 2 repr)."""
    p = tmp_path / "t.npz"
    tri = np.array([[[0, 0, 0], [1, 0, 0], [0, 1, 0]]], float)
    np.savez(p, vertices=tri, thickness=np.array([-0.7]),
             header=np.array(json.dumps({"format": "sheetview prisms v1"})))
    with pytest.raises(InputError) as ei:
        sv.read(p)
    assert "-0.7" in str(ei.value) and "np." not in str(ei.value)


def test_zero_row_npz_refused_like_csv_and_parquet(tmp_path):
    s = random_structure(3)
    for suffix in (".csv", ".npz", ".parquet"):
        p = tmp_path / f"e{suffix}"
        sv.write(s.subset(np.zeros(3, bool)), p)
        with pytest.raises(InputError, match="no rows|0 rows") as ei:
            sv.read(p)
        assert str(p) in str(ei.value)


def test_corrupt_deflate_in_npz(tmp_path):
    """A damaged deflate stream (bytes of the compressed vertices overwritten) is one line,
    never zlib.error."""
    s = random_structure(200)
    p = tmp_path / "s.npz"
    sv.write(s, p)
    data = bytearray(p.read_bytes())
    i = data.index(b"vertices.npy") + 200
    data[i:i + 64] = b"\xff" * 64
    p.write_bytes(bytes(data))
    with pytest.raises(InputError, match="NPZ") as ei:
        sv.read(p)
    assert str(p) in str(ei.value)


# ----------------------------------------------------------------- silent damage
def test_parquet_bit_flip_in_data_is_refused(tmp_path):
    """Every one-bit flip inside the column data of a Parquet file sheetview wrote is
    refused (page CRC-32, Parquet format specification, or the content hash) or, when
    it lands in padding, leaves the numbers exactly as written: never other numbers."""
    s = random_structure(300, seed=4)
    p = tmp_path / "s.parquet"
    sv.write(s, p)
    data = p.read_bytes()
    import pyarrow.parquet as pq
    md = pq.ParquetFile(p).metadata
    col = md.row_group(0).column(0)
    start = col.data_page_offset
    end = start + col.total_compressed_size
    rng = np.random.default_rng(0)
    for pos in rng.integers(start, end, 40):
        q = tmp_path / "f.parquet"
        b = bytearray(data)
        b[pos] ^= 1 << int(rng.integers(8))
        q.write_bytes(bytes(b))
        try:
            back = sv.read(q)
        except InputError as e:
            assert str(q) in str(e)
            continue
        assert np.array_equal(back.vertices, s.vertices)


def test_parquet_content_hash_checked(tmp_path):
    """A table whose numbers were changed after its checksum was computed (a decodable
    damage that page checksums cannot see, since pages are rewritten here) is refused."""
    import pyarrow.parquet as pq
    s = random_structure(20)
    p = tmp_path / "s.parquet"
    sv.write(s, p)
    t = pq.read_table(p)
    col = t.column("ax").to_numpy().copy()
    col[3] += 1e-9
    t = t.set_column(0, "ax", [col]).replace_schema_metadata(t.schema.metadata)
    q = tmp_path / "changed.parquet"
    pq.write_table(t, q)
    with pytest.raises(InputError, match="checksum"):
        sv.read(q)
    # a foreign Parquet file without the checksum is read as before
    pq.write_table(t.replace_schema_metadata({b"sheetview": t.schema.metadata[b"sheetview"]}),
                   tmp_path / "foreign.parquet")
    assert len(sv.read(tmp_path / "foreign.parquet")) == 20


def test_sheet_beyond_int64_refused(tmp_path):
    p = tmp_path / "s.csv"
    p.write_text("# thickness: 0.7\nax,ay,az,bx,by,bz,cx,cy,cz,sheet\n0,0,0,1,0,0,0,1,0,1e30\n")
    with pytest.raises(InputError, match="whole numbers within"):
        sv.read(p)


@pytest.mark.parametrize("attr,value,word", [("Spacing", "nan 0.5 0.5", "Spacing"),
                                             ("Origin", "inf 0 0", "Origin"),
                                             ("Spacing", "0.5 -1 0.5", "positive")])
def test_vti_geometry_not_silently_replaced(tmp_path, attr, value, word):
    """VTK reads Spacing "nan" as 1 and Origin "inf" as 0 without a word; sheetview reads
    the attributes itself and refuses them."""
    from sheetview.grid import PhaseGrid
    g = PhaseGrid(np.zeros((3, 3, 3), np.uint8) + 1, 0.5)
    p = tmp_path / "g.vti"
    sv.write(g, p)
    text = p.read_bytes()
    import re
    text = re.sub(rf'{attr}="[^"]*"'.encode(), f'{attr}="{value}"'.encode(), text, count=1)
    p.write_bytes(text)
    with pytest.raises(InputError, match=word) as ei:
        sv.read(p)
    assert str(p) in str(ei.value)


# ---------------------------------------------------------------- VTK in a child
def test_isolated_crash_becomes_one_line():
    """A parser that dies of SIGSEGV in the child is one InputError naming the file."""
    with pytest.raises(InputError, match=r"crashed while parsing it \(SIGSEGV\)") as ei:
        isolate.run_isolated("ctypes:string_at", (0,), path="x.vtp", what="VTK")
    assert "x.vtp" in str(ei.value)


def test_isolated_runaway_memory_and_time():
    with pytest.raises(MemoryLimitError, match="memory"):
        isolate.run_isolated("numpy:ones", (2**34,), path="x.vtk", what="VTK", memory=2**28)
    with pytest.raises(InputError, match="within 2 s"):
        isolate.run_isolated("time:sleep", (30,), path="x.vtk", what="VTK", timeout=2)


def test_isolated_without_fork(monkeypatch):
    """Where fork is refused (process or memory limits), a fresh interpreter does the same."""
    def no_fork():
        raise OSError(11, "fork refused")
    monkeypatch.setattr(os, "fork", no_fork)
    assert isolate.run_isolated("math:hypot", (3.0, 4.0), path="x", what="t") == 5.0
    with pytest.raises(InputError, match="SIGSEGV"):
        isolate.run_isolated("ctypes:string_at", (0,), path="x.vtp", what="VTK")


def test_isolated_passes_errors_and_results():
    assert isolate.run_isolated("math:hypot", (3.0, 4.0), path="x", what="t") == 5.0
    with pytest.raises(InputError, match="cannot be read by t"):
        isolate.run_isolated("math:sqrt", (-1.0,), path="x", what="t")


def test_damaged_vtk_appended_header(tmp_path):
    """A block header of a compressed array (VTK XML appended data) set to 2**40 (some of
    which make VTK abort): one line naming the file, or, where VTK ignores the field, the
    same labels as written."""
    from sheetview.grid import PhaseGrid
    import re
    import struct
    g = PhaseGrid((np.arange(9 * 8 * 7).reshape(9, 8, 7) % 4).astype(np.uint8), 0.5)
    p = tmp_path / "g.vti"
    sv.write(g, p)
    data = p.read_bytes()
    i = data.index(b"<AppendedData")
    j = data.index(b"_", i) + 1
    offs = [int(x) for x in re.findall(rb'offset="(\d+)"', data[:i])]
    for off in offs:
        for field in range(4):
            b = bytearray(data)
            b[j + off + 8 * field:j + off + 8 * field + 8] = struct.pack("<Q", 2**40)
            q = tmp_path / f"m{off}_{field}.vti"
            q.write_bytes(bytes(b))
            try:
                back = sv.read(q)
            except SheetviewError as e:
                assert str(q) in str(e)
                continue
            np.testing.assert_array_equal(back.labels, g.labels)


# ------------------------------------------------------------------- rasterizer
def _reference_inside(structure, shape, spacing, origin, periodic):
    """Centre-inside test of every voxel against every prism, in plain numpy (the
    definition in rasterize's docstring), with periodic images of the box."""
    nrm, d0, half, G, C, lo, hi, axis, keep = _prism_coefficients(structure)
    idx = np.stack(np.meshgrid(*[np.arange(n) for n in shape], indexing="ij"), -1).reshape(-1, 3)
    out = np.zeros(len(idx), bool)
    ext = np.asarray(shape) * np.asarray(spacing)
    shifts = [np.zeros(3)]
    if periodic:
        shifts = [np.array([a, b, c]) * ext for a in (-1, 0, 1) for b in (-1, 0, 1)
                  for c in (-1, 0, 1)]
    for sh in shifts:
        p = np.asarray(origin) + (idx + 0.5) * np.asarray(spacing) + sh
        for k in range(len(nrm)):
            n0, n1, n2 = nrm[k]
            s = n0 * p[:, 0] + n1 * p[:, 1] + n2 * p[:, 2] - d0[k]
            ok = np.abs(s) <= half[k]
            for e in range(3):
                ok &= G[k, e, 0] * p[:, 0] + G[k, e, 1] * p[:, 1] + G[k, e, 2] * p[:, 2] - C[k, e] >= 0
            out |= ok
    return out.reshape(shape)


def _kernel_labels(structure, shape, spacing, origin, periodic):
    nrm, d0, half, G, C, lo, hi, axis, keep = _prism_coefficients(structure)
    out = np.zeros(shape, np.uint8)
    with kernel_checks():
        _mark_prisms(0, len(nrm), nrm, d0, half, G, C, lo, hi, axis, np.asarray(origin, float),
                     np.asarray(spacing, float), np.asarray(shape, np.int64), periodic, 0, out,
                     np.uint8(SOLID), np.uint8(255))
    return out == SOLID


@pytest.mark.parametrize("thickness", [1e19, 1e300, 1e-300, 0.3])
@pytest.mark.parametrize("periodic", [False, True])
def test_kernel_in_bounds_and_exact_for_extreme_thickness(thickness, periodic):
    """The bounds-checked kernel never indexes outside its array (it would raise
    IndexError) for a thickness of 1e19 and 1e300 nm (which made the fast kernel write
    outside its array), and marks exactly the voxels of the numpy centre-inside test (in a
    periodic box, for prisms smaller than the box)."""
    rng = np.random.default_rng(3)
    v = rng.uniform(0.5, 4.5, (3, 3, 3))
    s = sv.Structure(v, np.full(3, thickness), sv.Box((0, 0, 0), (5, 5, 5), periodic), 1.4)
    shape, spacing, origin = (9, 10, 11), (5 / 9, 0.5, 5 / 11), (0.0, 0.0, 0.0)
    got = _kernel_labels(s, shape, spacing, origin, periodic)
    if periodic and thickness > 5:
        return  # a prism thicker than the periodic cell overlaps its own images: in bounds only
    ref = _reference_inside(s, shape, spacing, origin, periodic)
    np.testing.assert_array_equal(got, ref)


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(scale=st.sampled_from([0.3, 1.0, 1e3, 1e8, 1e15, 1e100]),
       offset=st.sampled_from([0.0, -1e6, 1e12, 1e200]),
       thick=st.sampled_from([0.2, 2.0, 1e10, 1e200]),
       seed=st.integers(0, 10_000), periodic=st.booleans())
def test_kernel_never_leaves_its_array(scale, offset, thick, seed, periodic):
    """Random prisms of any size, far away or huge: the bounds-checked kernel stays inside
    its array and agrees with the numpy reference wherever the numbers are finite."""
    rng = np.random.default_rng(seed)
    c = rng.uniform(0, 4, (4, 1, 3)) + offset
    v = c + rng.normal(0, 1.0, (4, 3, 3)) * scale
    s = sv.Structure(v, np.full(4, thick), sv.Box((0, 0, 0), (4, 4, 4), periodic), 1.4)
    shape, spacing, origin = (6, 7, 5), (4 / 6, 4 / 7, 0.8), (0.0, 0.0, 0.0)
    with np.errstate(all="ignore"):
        got = _kernel_labels(s, shape, spacing, origin, periodic)
        # exact where the numbers are moderate (periodic: prisms smaller than the box and
        # inside it, as the reference tests one image each way)
        if periodic and scale <= 0.3 and offset == 0.0 and thick <= 0.2 or \
                not periodic and scale <= 1e3 and abs(offset) <= 1e6 and thick <= 1e10:
            np.testing.assert_array_equal(got, _reference_inside(s, shape, spacing, origin,
                                                                 periodic))


def test_rasterize_refuses_before_the_kernel():
    """Values a kernel cannot place are refused with the file (source) named: a thickness
    of 1e19 nm, a domain thinner than the smallest voxel, a domain reaching 1e300 nm."""
    rng = np.random.default_rng(1)
    v = rng.uniform(1, 4, (2, 3, 3))
    s = sv.Structure(v, np.array([1e19, 0.5]), sv.Box((0, 0, 0), (5, 5, 5)), 1.4, source="f.npz")
    with pytest.raises(InputError, match="prism row 1.*beyond") as ei:
        rasterize(s, 0.5)
    assert "f.npz" in str(ei.value)
    thin = sv.Structure(v, np.full(2, 0.5), sv.Box((0, 0, 0), (5, 5, 1e-300)), 1.4,
                        source="f.npz")
    for vox in (None, 0.5):
        with pytest.raises(InputError, match="smallest voxel") as ei:
            rasterize(thin, vox)
        assert "f.npz" in str(ei.value)
    far = sv.Structure(v, np.full(2, 0.5), sv.Sphere((0, 0, 0), 1e300), 1.4, source="f.npz")
    with pytest.raises(InputError, match="beyond"):
        rasterize(far, 0.5)


def test_rasterize_body_refuses_bad_vertices():
    import trimesh
    from sheetview.structure import SurfaceBody
    m = trimesh.creation.icosphere(1, 2.0)
    v = np.array(m.vertices) + 3
    v[0, 0] = 1e300
    body = SurfaceBody(v, m.faces, sv.Box((0, 0, 0), (6, 6, 6)), {}, "b.ply")
    with pytest.raises(InputError, match="within") as ei:
        rasterize_body(body, 0.5)
    assert "b.ply" in str(ei.value)


# ------------------------------------------------------------------- memory guard
def test_memory_guard_exact_beyond_int64():
    """A grid whose voxel count exceeds the int64 range (1e33 voxels) is refused by the
    guard with the file and --voxel named, not passed on to numpy."""
    s = sv.Structure(np.array([[[0, 0, 0], [1, 0, 0], [0, 1, 0]]], float), np.array([0.7]),
                     sv.Box((0, 0, 0), (1e9, 1e9, 1e9)), 1.4, source="huge.csv")
    shape = grid_geometry(s.domain, 0.01)[0]
    assert n_voxels(shape) == 10**33 and n_voxels(shape) > 2**63
    with pytest.raises(MemoryLimitError) as ei:
        rasterize(s, 0.01)
    msg = str(ei.value)
    assert "huge.csv" in msg and "--voxel" in msg and "field" not in msg
    with pytest.raises(MemoryLimitError), pytest.warns(UserWarning, match="physical memory"):
        check_memory(s.domain, 0.01, (2**40, 2**40, 2**40), 2**60)


def test_max_memory_above_the_machine_warns():
    from sheetview.grid import MemoryLimitWarning, physical_memory
    s = random_structure(5)
    phys = physical_memory()
    with pytest.warns(MemoryLimitWarning, match="physical memory"):
        rasterize(s, 0.5, max_memory=4 * phys)


PEAK_CHILD = r"""
import json, sys
import numpy as np
import sheetview as sv

def status(key):
    with open("/proc/self/status") as fh:
        for line in fh:
            if line.startswith(key):
                return int(line.split()[1]) * 1024

s = sv.read(sys.argv[1])
sv.measure(s, voxel=1.0)
with open("/proc/self/clear_refs", "w") as fh:
    fh.write("5")
base = status("VmRSS:")
ctx = sv.measure(s, voxel=float(sys.argv[2]))
print(json.dumps({"n": int(np.prod(ctx.grid.shape)), "peak": status("VmHWM:") - base}))
"""


@pytest.mark.skipif(not Path("/proc/self/clear_refs").exists(), reason="needs Linux /proc")
def test_memory_estimate_holds_the_measured_peak():
    """The default measures on a grid of about 1.7 million voxels: the peak resident memory
    they add (measured, Linux VmHWM) stays within estimate_grid_bytes (calibrated in
    benchmarks/calibrate_grid_memory.py; the old 6 bytes per voxel was exceeded 19-fold)."""
    sample = ROOT / "sample_structures" / "single_stack.csv"
    r = subprocess.run([sys.executable, "-c", PEAK_CHILD, str(sample), "0.1"], capture_output=True,
                       text=True, timeout=900, cwd=ROOT)
    assert r.returncode == 0, r.stderr[-2000:]
    out = json.loads(r.stdout.strip().splitlines()[-1])
    assert out["n"] > 1_000_000
    assert out["peak"] <= estimate_grid_bytes(out["n"]), out


# --------------------------------------------------------------- outputs untouched
def test_convert_of_damaged_input_leaves_nothing(tmp_path):
    """`sheetview convert` of a damaged file: exit 2, one line, the input unchanged, no
    output file and no temporary file left."""
    s = random_structure(50)
    src = tmp_path / "in.npz"
    sv.write(s, src)
    data = bytearray(src.read_bytes())
    data[len(data) // 2:len(data) // 2 + 32] = b"\x00" * 32
    src.write_bytes(bytes(data))
    before = src.read_bytes()
    out = tmp_path / "out" / "s.parquet"
    out.parent.mkdir()
    r = CliRunner().invoke(main, ["convert", str(src), str(out)])
    assert r.exit_code == 2, r.output
    assert r.stderr.count("\n") == 1 and str(src) in r.stderr
    assert src.read_bytes() == before
    assert list(out.parent.iterdir()) == []


# ------------------------------------------------------ cases the long fuzz run found
def test_vti_pieces_must_make_up_the_whole_extent(tmp_path):
    """A WholeExtent enlarged to 10 million voxels along y around an intact 8-voxel piece
    made VTK allocate the whole (5 GB) and sheetview read it; it is refused before VTK."""
    import re
    from sheetview.grid import PhaseGrid
    g = PhaseGrid((np.arange(9 * 8 * 7).reshape(9, 8, 7) % 4).astype(np.uint8), 0.5)
    p = tmp_path / "g.vti"
    sv.write(g, p)
    text = re.sub(rb'WholeExtent="[^"]*"', b'WholeExtent="0 9 0 10000000 0 7"', p.read_bytes())
    p.write_bytes(text)
    with pytest.raises(InputError, match="WholeExtent") as ei:
        sv.read(p)
    assert str(p) in str(ei.value)


def test_mesh_header_version_of_5000_digits(tmp_path):
    import trimesh
    from sheetview.io.meshes import write_body
    from sheetview.structure import SurfaceBody
    m = trimesh.creation.icosphere(1, 2.0)
    p = tmp_path / "b.ply"
    write_body(SurfaceBody(np.array(m.vertices) + 3, m.faces, sv.Box((0, 0, 0), (6, 6, 6))), p)
    data = p.read_bytes().replace(b"sheetview mesh v1", b"sheetview mesh v" + b"9" * 5000, 1)
    p.write_bytes(data)
    with pytest.raises(InputError, match="version number is damaged"):
        sv.read(p)


def test_npz_header_the_tokenizer_cannot_read(tmp_path):
    """An NPY header inside the archive cut in the middle of its dictionary (numpy's parser
    raises tokenize.TokenError, which is no ValueError)."""
    import io
    import zipfile
    head = b"{'descr': '<f8', 'fortran_order': False, 'shape': (1, 3,\n"
    npy = b"\x93NUMPY\x01\x00" + len(head).to_bytes(2, "little") + head + b"\x00" * 72
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w") as z:
        z.writestr("vertices.npy", npy)
        z.writestr("header.npy", npy)
    p = tmp_path / "t.npz"
    p.write_bytes(buf.getvalue())
    with pytest.raises(InputError, match="NPZ") as ei:
        sv.read(p)
    assert str(p) in str(ei.value)


def test_gltf_accessor_type_of_the_wrong_kind(tmp_path):
    import struct
    import trimesh
    scene = trimesh.Scene(trimesh.creation.box())
    data = bytearray(scene.export(file_type="glb"))
    length = struct.unpack("<I", data[12:16])[0]
    doc = json.loads(bytes(data[20:20 + length]))
    doc["accessors"][0]["type"] = ["VEC3"]
    text = json.dumps(doc).encode()
    text += b" " * ((-len(text)) % 4)
    out = data[:12] + struct.pack("<II", len(text), 0x4E4F534A) + text + data[20 + length:]
    out[8:12] = struct.pack("<I", len(out))
    p = tmp_path / "m.glb"
    p.write_bytes(bytes(out))
    with pytest.raises(InputError) as ei:
        sv.read(p)
    assert str(p) in str(ei.value) and "unexpected" not in str(ei.value)


def test_message_with_a_line_break_from_the_file_is_one_line(tmp_path):
    p = tmp_path / "s.csv"
    p.write_text('# units: "par\\nsec"\n# thickness: 1\nax,ay,az,bx,by,bz,cx,cy,cz\n0,0,0,1,0,0,0,1,0\n')
    with pytest.raises(InputError) as ei:
        sv.read(p)
    assert "\n" not in str(ei.value)
