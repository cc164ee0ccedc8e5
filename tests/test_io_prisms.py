"""The native prism table: reading, writing, round trips and bad input."""

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import sheetview as sv
from sheetview.errors import InputError, OutputExistsError
from tests.conftest import random_structure

HEAD = '# sheetview prisms v1\n# thickness: 0.7\n'
COLS = "ax,ay,az,bx,by,bz,cx,cy,cz\n"
ROW = "0,0,0,2,0,0,1,1.732051,0\n"


def write(tmp_path, text, name="s.csv"):
    p = tmp_path / name
    p.write_text(text)
    return p


def test_reads_the_documented_example(sample_csv):
    s = sv.read(sample_csv)
    assert len(s) == 1
    assert s.spacing == 1.4
    assert s.thickness[0] == 0.7
    assert s.domain == sv.Box((0, 0, 0), (30, 30, 30))
    assert not s.domain.inferred
    np.testing.assert_allclose(s.normals[0], [0, 0, 1])
    np.testing.assert_allclose(s.centroids[0], [1, 1.732051 / 3, 0])


def test_sphere_and_periodic_box_domains(tmp_path):
    p = write(tmp_path, '# domain: {"shape": "sphere", "center": [1, 2, 3], "radius": 20}\n'
              + HEAD + COLS + ROW)
    assert sv.read(p).domain == sv.Sphere((1, 2, 3), 20)
    p = write(tmp_path, '# domain: {"shape": "box", "min": [0,0,0], "max": [5,6,7], "periodic": true}\n'
              + HEAD + COLS + ROW, "b.csv")
    d = sv.read(p).domain
    assert d.periodic and d.volume == 210


@pytest.mark.parametrize("units,factor", [("nm", 1.0), ("A", 0.1), ("angstrom", 0.1), ("um", 1000.0)])
def test_units_convert_to_nm(tmp_path, units, factor):
    """1 Å = 0.1 nm, 1 µm = 1000 nm (SI definitions)."""
    p = write(tmp_path, f'# units: "{units}"\n# spacing: 14\n'
              '# domain: {"shape": "sphere", "center": [0, 0, 0], "radius": 300}\n'
              + HEAD + COLS + ROW)
    s = sv.read(p)
    assert s.vertices[0, 1, 0] == pytest.approx(2 * factor)
    assert s.thickness[0] == pytest.approx(0.7 * factor)
    assert s.spacing == pytest.approx(14 * factor)
    assert s.domain.radius == pytest.approx(300 * factor)
    assert s.volumes[0] == pytest.approx(np.sqrt(3) / 4 * 4 * 0.7 * factor ** 3, rel=1e-6)


def test_missing_domain_gives_inferred_padded_box(tmp_path):
    s = sv.read(write(tmp_path, HEAD + COLS + ROW))
    assert s.domain.inferred
    lo, hi = s.domain.bounds
    assert np.all(lo < [0, 0, 0]) and np.all(hi > [2, 1.73, 0])


def test_optional_and_extra_columns(tmp_path):
    p = write(tmp_path, HEAD + "ax,ay,az,bx,by,bz,cx,cy,cz,thickness,sheet,born,tag,energy\n"
              "0,0,0,2,0,0,1,1.732051,0,0.5,3,1.5,7,-2.25\n")
    s = sv.read(p)
    assert s.thickness[0] == 0.5
    assert s.columns["sheet"][0] == 3 and s.columns["sheet"].dtype == np.int64
    assert s.columns["born"][0] == 1.5 and s.columns["tag"][0] == 7
    assert s.columns["energy"][0] == -2.25


def _assert_same(a, b):
    assert np.array_equal(a.vertices, b.vertices)
    assert np.array_equal(a.thickness, b.thickness)
    assert a.spacing == b.spacing
    assert a.domain == b.domain
    assert a.metadata == b.metadata
    assert set(a.columns) == set(b.columns)
    for k in a.columns:
        assert np.array_equal(a.columns[k], b.columns[k])
        assert a.columns[k].dtype == b.columns[k].dtype


@pytest.mark.parametrize("suffix", [".csv", ".npz", ".parquet"])
def test_round_trip_each_form(tmp_path, suffix):
    s = random_structure(50, seed=3)
    p = tmp_path / f"s{suffix}"
    sv.write(s, p)
    _assert_same(s, sv.read(p))


finite = st.floats(-1e6, 1e6, allow_nan=False, allow_infinity=False, width=64)


@st.composite
def structures(draw):
    n = draw(st.integers(1, 6))
    rng = np.random.default_rng(draw(st.integers(0, 2**32 - 1)))
    scale = draw(st.sampled_from([1e-3, 1.0, 123.456]))
    v = rng.normal(0, scale, (n, 3, 3))
    v[0, 0, 0] = draw(finite)  # an arbitrary float somewhere
    v[:, 1] += scale * 10  # keep triangles well away from degenerate
    v[:, 2, 1] += scale * 10
    t = rng.uniform(0.01, 2, n)
    dom = draw(st.sampled_from([sv.Sphere((0.1, -2, 3), 1e6), sv.Box((-1e7,) * 3, (1e7,) * 3, True),
                                sv.Box((-1e7,) * 3, (1e7,) * 3)]))
    cols = {}
    if draw(st.booleans()):
        cols["born"] = rng.normal(size=n)
    if draw(st.booleans()):
        cols["sheet"] = rng.integers(-2**40, 2**40, n)
    meta = draw(st.dictionaries(st.sampled_from(["study", "seed", "ratio"]),
                                st.one_of(st.integers(-10, 10), st.text(max_size=5), finite), max_size=2))
    return sv.Structure(v, t, dom, draw(st.floats(0.5, 3.0)), cols, meta)


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(s=structures())
def test_property_any_valid_structure_round_trips_exactly(tmp_path, s):
    """Hypothesis property: CSV, NPZ and Parquet all give back bit-identical arrays."""
    for suffix in (".csv", ".npz", ".parquet"):
        p = tmp_path / f"rt{suffix}"
        sv.write(s, p, force=True)
        _assert_same(s, sv.read(p))


def test_writer_refuses_existing_output_and_leaves_it_untouched(tmp_path):
    s = random_structure(5)
    p = tmp_path / "out.csv"
    p.write_text("precious")
    with pytest.raises(OutputExistsError, match="already exists"):
        sv.write(s, p)
    assert p.read_text() == "precious"
    sv.write(s, p, force=True)
    assert len(sv.read(p)) == 5
    assert [q.name for q in tmp_path.iterdir()] == ["out.csv"]  # no temporary left


def test_written_files_get_the_usual_permissions(tmp_path):
    import os
    import stat
    p = tmp_path / "perm.npz"
    sv.write(random_structure(3), p)
    mask = os.umask(0)
    os.umask(mask)
    assert stat.S_IMODE(p.stat().st_mode) == 0o666 & ~mask


# ----------------------------------------------------------------------------- bad input
@pytest.mark.parametrize("text,pattern", [
    ("", "empty"),
    ("   \n\n", "empty"),
    (HEAD, "no column line"),
    (HEAD + COLS, "no rows"),
    (HEAD + "ax,ay,az,bx,by,bz,cx,cy\n1,2,3,4,5,6,7,8\n", "missing column.*cz"),
    (HEAD + "ax,ay,az,bx,by,bz,cx,cy,cz,thicknes\n" + ROW.strip() + ",1\n", "did you mean 'thickness'"),
    (HEAD + "AX,ay,az,bx,by,bz,cx,cy,cz\n" + ROW, "did you mean 'ax'"),
    (HEAD + COLS + ROW + "0,0,0,2,zero,0,1,1,0\n", r"line 5, column 'by': 'zero' is not a number"),
    (HEAD + COLS + ROW + "0,0,0,2,,0,1,1,0\n", r"line 5, column 'by'"),
    (HEAD + COLS + ROW + "0,0,0,2,0,0,1\n", r"line 5.*expected 9 cells"),
    (HEAD + COLS + "0,0,nan,2,0,0,1,1,0\n", r"line 4.*finite"),
    (HEAD + COLS + ROW + "0,0,inf,2,0,0,1,1,0\n", r"line 5.*finite"),
    (HEAD + COLS + "0,0,0,1,1,1,2,2,2\n", r"line 4.*degenerate"),
    (HEAD + COLS + "0,0,0,0,0,0,2,2,2\n", r"line 4.*degenerate"),
    ("# sheetview prisms v1\n" + "ax,ay,az,bx,by,bz,cx,cy,cz,thickness\n" + ROW.strip() + ",0\n",
     r"line 3.*thickness must be a positive"),
    ("# sheetview prisms v1\n" + "ax,ay,az,bx,by,bz,cx,cy,cz,thickness\n" + ROW.strip() + ",-1\n",
     r"thickness must be a positive"),
    ("# sheetview prisms v1\n# thickness: -0.7\n" + COLS + ROW, r"line 2.*thickness.*positive"),
    ("# sheetview prisms v1\n" + COLS + ROW, "no prism thickness"),
    ('# units: "furlong"\n' + HEAD + COLS + ROW, r"line 1, field 'units': unknown units 'furlong'"),
    ('# domain: {"shape": "sphere", "center": [0, 0], "radius": 3}\n' + HEAD + COLS + ROW,
     r"line 1, field 'domain'"),
    ('# domain: {"shape": "sphere", "center": [0, 0, 0], "radius": -3}\n' + HEAD + COLS + ROW,
     r"field 'domain'.*radius"),
    ('# domain: {"shape": "cube", "min": [0, 0, 0]}\n' + HEAD + COLS + ROW, r"\"shape\" must be"),
    ('# domain: {"shape": "box", "min": [0, 0, 0], "max": [1, 1, 1}\n' + HEAD + COLS + ROW,
     r"line 1, field 'domain'.*JSON"),
    ('# domain: {"shape": "box", "min": [0, 0, 0], "max": [0, 1, 1]}\n' + HEAD + COLS + ROW,
     r"max must exceed min"),
    ("# sheetview prisms v7\n" + COLS + ROW, r"version 7 is newer"),
    (HEAD + "ax,ax,az,bx,by,bz,cx,cy,cz\n" + ROW, "more than once"),
])
def test_bad_csv_is_refused_with_a_clear_message(tmp_path, text, pattern):
    p = write(tmp_path, text)
    with pytest.raises(InputError, match=pattern) as exc:
        sv.read(p)
    assert str(p) in str(exc.value)


def test_binary_garbage_is_refused(tmp_path):
    p = tmp_path / "g.csv"
    p.write_bytes(bytes(range(256)) * 10)
    with pytest.raises(InputError, match="not a text file|not a number|cannot parse|missing"):
        sv.read(p)


def test_truncated_npz_is_refused(tmp_path):
    s = random_structure(200)
    p = tmp_path / "s.npz"
    sv.write(s, p)
    data = p.read_bytes()
    q = tmp_path / "cut.npz"
    q.write_bytes(data[: len(data) // 2])
    with pytest.raises(InputError, match="damaged or truncated NPZ"):
        sv.read(q)


def test_npz_with_objects_is_refused(tmp_path):
    p = tmp_path / "obj.npz"
    np.savez(p, vertices=np.zeros((1, 3, 3)), header=np.array([{"a": 1}], dtype=object))
    with pytest.raises(InputError, match="pickles"):
        sv.read(p)


def test_npz_without_our_arrays_is_refused(tmp_path):
    p = tmp_path / "other.npz"
    np.savez(p, x=np.zeros(3))
    with pytest.raises(InputError, match="not a sheetview prism NPZ"):
        sv.read(p)


def test_corrupt_parquet_is_refused(tmp_path):
    p = tmp_path / "bad.parquet"
    p.write_bytes(b"PAR1 this is not parquet")
    with pytest.raises(InputError, match="Parquet"):
        sv.read(p)


def test_unknown_suffix_and_missing_file(tmp_path):
    with pytest.raises(InputError, match="unknown file type '.xyz'"):
        p = tmp_path / "a.xyz"
        p.write_text("x")
        sv.read(p)
    with pytest.raises(InputError, match="no such file"):
        sv.read(tmp_path / "none.csv")


def test_unreadable_path(tmp_path):
    import os
    p = write(tmp_path, HEAD + COLS + ROW)
    p.chmod(0)
    try:
        if os.access(p, os.R_OK):  # root reads anyway
            pytest.skip("running as a user that ignores file permissions")
        with pytest.raises(InputError, match="cannot read"):
            sv.read(p)
    finally:
        p.chmod(0o644)


def test_read_error_names_the_file(tmp_path, monkeypatch):
    """An unreadable path (permission denied) gives a clear message, not a traceback."""
    from pathlib import Path
    p = write(tmp_path, HEAD + COLS + ROW)

    def denied(self):
        raise PermissionError(13, "Permission denied")
    monkeypatch.setattr(Path, "read_bytes", denied)
    with pytest.raises(InputError, match="cannot read: Permission denied"):
        sv.read(p)


def test_folder_instead_of_file(tmp_path):
    (tmp_path / "d.csv").mkdir()
    with pytest.raises(InputError, match="is a folder"):
        sv.read(tmp_path / "d.csv")


def test_outside_and_duplicate_counts(tmp_path):
    """Sphere radius 10 at the origin: one prism inside, one wholly outside (nearest point at
    distance 20, exact), one crossing the wall, one duplicate with its corners permuted."""
    rows = ["0,0,0,1,0,0,0,1,0",  # inside
            "20,0,0,21,0,0,20,1,0",  # wholly outside
            "9,0,0,12,0,0,9,1,0",  # crossing
            "0,1,0,0,0,0,1,0,0"]  # duplicate of the first
    p = write(tmp_path, '# domain: {"shape": "sphere", "center": [0, 0, 0], "radius": 10}\n'
              + HEAD + COLS + "\n".join(rows) + "\n")
    s = sv.read(p)
    assert s.outside_counts() == {"wholly_outside": 1, "partly_outside": 1}
    assert s.duplicate_count() == 1


def test_sphere_wholly_outside_uses_exact_triangle_distance(tmp_path):
    """A big triangle whose corners are all outside a sphere but whose face cuts it is not
    wholly outside (closest point on a triangle: Ericson, Real-Time Collision Detection, 2005)."""
    p = write(tmp_path, '# domain: {"shape": "sphere", "center": [0, 0, 0], "radius": 10}\n'
              + HEAD + COLS + "-30,-30,0,30,-30,0,0,30,0\n")
    assert sv.read(p).outside_counts() == {"wholly_outside": 0, "partly_outside": 1}
