"""Fuzzing the readers: damaged copies of every format, and generated headers and tables.

Promise under test (docs/reliability.md): whatever the bytes of an input file, sheetview
either reads it (exit 0) or refuses it with exit status 2 and one line naming the file;
never a traceback, a signal, a hang, library noise on stderr, a runaway allocation, a
changed input or a file left behind.

* Mutation fuzzing (bounded to about a minute on two cores): every format sheetview reads,
  as written by its own writers, by the general-purpose libraries (pyvista, trimesh,
  tifffile, Pillow) and as bundled in ``sample_structures/``, each damaged
  :data:`N_MUTATIONS` times by :func:`tests.fuzz_harness.mutate` with a fixed seed, run
  through ``sheetview info`` (micrographs and curves through their readers) in worker
  processes with a timeout, so that a crash or a hang is seen as such
  (:class:`tests.fuzz_harness.Runner`). The longer run is ``benchmarks/fuzz_inputs.py``.
* Property tests (hypothesis): headers of the prism table with JSON values of every type and
  nesting, tables of arbitrary numbers and shapes, NPZ archives of arbitrary arrays,
  Parquet schema metadata; read in this process (these readers cannot crash it), asserting
  a Structure or a SheetviewError naming the file, and no warning.
"""
from __future__ import annotations

import json
import warnings

import numpy as np
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import sheetview as sv
from sheetview.errors import SheetviewError
from tests import fuzz_harness as fh

#: Damaged copies per seed file in the suite (the benchmark runs thousands).
N_MUTATIONS = 9
SEED = 20261203


def test_mutated_files_of_every_format(tmp_path):
    seeds = fh.make_seeds(tmp_path / "seeds")
    formats = {fh.fmt_of(p) for p in seeds}
    assert {"csv", "npz", "parquet", "stl", "ply", "obj", "off", "glb", "vtk", "vtp", "vtu",
            "vti", "tif", "npy", "curve", "micrograph-png", "micrograph-tif"} <= formats
    runner = fh.Runner(timeout=60)
    try:
        rows = fh.run_cases(runner, seeds, N_MUTATIONS, tmp_path / "cases", seed=SEED)
    finally:
        runner.close()
    unmutated = [r for r in rows if r["mutation"] == "none"]
    # every seed reads as it is, but the open sheets, which need --thickness
    assert all(r["outcome"] == "ok" or r["seed"] == "sample_open_sheets.ply"
               and "thickness" in r["detail"] for r in unmutated), unmutated
    failures = [r for r in rows if r["outcome"] in fh.FAILURES]
    assert not failures, "\n".join(f"{r['format']} {r['mutation']}: {r['outcome']}: {r['detail']}"
                                   for r in failures)
    assert sum(r["outcome"] == "refused" for r in rows) > len(rows) // 3


# ------------------------------------------------------------------ property tests
def _read_quietly(path):
    """``sv.read(path)``: a result, or a SheetviewError naming the file; never another
    exception, never a warning."""
    with warnings.catch_warnings(record=True) as w:
        warnings.simplefilter("always")
        try:
            out = sv.read(path)
        except SheetviewError as e:
            assert str(path) in str(e), str(e)
            assert "\n" not in str(e)
            out = None
    assert not w, [str(x.message) for x in w]
    return out


json_values = st.recursive(
    st.none() | st.booleans() | st.integers() | st.floats(allow_nan=True, allow_infinity=True)
    | st.text(max_size=20),
    lambda inner: st.lists(inner, max_size=4) | st.dictionaries(st.text(max_size=8), inner,
                                                                max_size=4),
    max_leaves=12)
header_keys = st.sampled_from(["units", "thickness", "spacing", "domain", "study", "format"])
numbers = st.one_of(st.floats(allow_nan=True, allow_infinity=True),
                    st.sampled_from([0.0, -1.0, 1e308, -1e308, 1e19, 1e150, 5e-324, 2.0**63]),
                    st.integers(-10**30, 10**30).map(float))
ROW_OK = [0.0, 0.0, 0.0, 1.0, 0.0, 0.0, 0.0, 1.0, 0.0]
CORNERS = ["ax", "ay", "az", "bx", "by", "bz", "cx", "cy", "cz"]


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture,
                                                                 HealthCheck.too_slow])
@given(header=st.dictionaries(header_keys, json_values, max_size=4),
       raw=st.lists(st.tuples(header_keys, st.text(max_size=40)), max_size=2),
       rows=st.lists(st.lists(numbers, min_size=9, max_size=9), max_size=3))
def test_generated_csv_headers_and_tables(tmp_path, header, raw, rows):
    lines = [f"# {k}: {json.dumps(v)}" for k, v in header.items()]
    lines += [f"# {k}: {v}".replace("\n", " ").replace("\r", " ") for k, v in raw]
    body = [ROW_OK] + rows
    text = "\n".join(lines + [",".join(CORNERS) + ",thickness"]
                     + [",".join(repr(float(x)) for x in r) + ",0.7" for r in body]) + "\n"
    p = tmp_path / "g.csv"
    p.write_text(text)
    _read_quietly(p)


arrays = st.one_of(
    st.builds(lambda n, s: np.random.default_rng(s).normal(0, 3, (n, 3, 3)),
              st.integers(0, 4), st.integers(0, 100)),
    st.builds(lambda shape, v: np.full(shape, v), st.lists(st.integers(0, 3), max_size=3).map(tuple),
              numbers),
    st.sampled_from([np.array(["a", "b"]), np.array(1.5), np.zeros((2, 2), np.int8),
                     np.array([True]), np.array([2**63 - 1], np.uint64)]))


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture,
                                                                 HealthCheck.too_slow])
@given(vertices=arrays, thickness=st.one_of(st.none(), arrays),
       sheet=st.one_of(st.none(), arrays),
       header=st.one_of(json_values, st.dictionaries(header_keys, json_values, max_size=3)))
def test_generated_npz(tmp_path, vertices, thickness, sheet, header):
    d = {"vertices": vertices, "header": np.array(json.dumps(header))}
    if thickness is not None:
        d["thickness"] = thickness
    if sheet is not None:
        d["col_sheet"] = sheet
    p = tmp_path / "g.npz"
    with open(p, "wb") as fh_:
        np.savez_compressed(fh_, **d)
    _read_quietly(p)


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture,
                                                                 HealthCheck.too_slow])
@given(meta=st.one_of(json_values.map(json.dumps), st.binary(max_size=40).map(
           lambda b: b.decode("latin1"))),
       rows=st.lists(st.lists(numbers, min_size=9, max_size=9), max_size=3),
       null=st.booleans())
def test_generated_parquet(tmp_path, meta, rows, null):
    import pyarrow as pa
    import pyarrow.parquet as pq
    body = np.array([ROW_OK] + rows, dtype=float)
    cols = {c: pa.array(body[:, k]) for k, c in enumerate(CORNERS)}
    if null:
        cols["ax"] = pa.array([None] + list(body[1:, 0]), type=pa.float64())
    cols["thickness"] = pa.array(np.full(len(body), 0.7))
    t = pa.table(cols).replace_schema_metadata({b"sheetview": meta.encode("utf-8", "replace")})
    p = tmp_path / "g.parquet"
    pq.write_table(t, p)
    _read_quietly(p)
