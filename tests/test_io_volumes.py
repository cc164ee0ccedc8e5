"""Voxel volumes: round trips, axis order, voxel size from files, phase mapping, bad input.

Reference libraries: tifffile (C. Gohlke, https://github.com/cgohlke/tifffile) and
pyvista/VTK (Sullivan & Kaszynski, JOSS 4 (2019) 1450, doi:10.21105/joss.01450) write
the foreign files that sheetview must read; NumPy's ``np.load`` reads what sheetview
writes.
"""
import json

import numpy as np
import pytest
import pyvista as pv
import tifffile

import sheetview as sv
from sheetview.errors import InputError, MemoryLimitError, OptionError, OutputExistsError
from sheetview.grid import GEL, INTERLAYER, OUTSIDE, SOLID, PhaseGrid
from sheetview.io import volumes


@pytest.fixture
def grid():
    rng = np.random.default_rng(7)
    lab = rng.integers(0, 4, (5, 6, 7)).astype(np.uint8)
    return PhaseGrid(lab, (0.37, 0.41, 0.53), (1 / 7, -2.3, 0.1), periodic=True)


@pytest.mark.parametrize("suffix", [".vti", ".npy", ".tif", ".tiff"])
def test_round_trip_exact(tmp_path, grid, suffix):
    p = tmp_path / f"g{suffix}"
    sv.write(grid, p)
    back = sv.read(p)
    np.testing.assert_array_equal(back.labels, grid.labels)
    assert back.labels.dtype == np.uint8
    assert back.spacing == grid.spacing
    assert back.origin == grid.origin
    assert back.periodic
    with pytest.raises(OutputExistsError):
        sv.write(grid, p)
    sv.write(grid, p, force=True)


def test_bigtiff_form_round_trip(tmp_path, grid, monkeypatch):
    """Past the ImageJ size limit the TIFF is a BigTIFF with the same metadata."""
    monkeypatch.setattr(volumes, "IMAGEJ_TIFF_LIMIT", 0)
    p = tmp_path / "big.tif"
    sv.write(grid, p)
    with tifffile.TiffFile(p) as t:
        assert t.is_bigtiff and not t.is_imagej
    back = sv.read(p)
    np.testing.assert_array_equal(back.labels, grid.labels)
    assert back.spacing == grid.spacing and back.origin == grid.origin


def test_round_trip_only_outside_and_solid(tmp_path):
    """A written grid holding just codes 0 and 1 keeps them (the marker wins over the
    {0, 1} -> gel/solid default)."""
    lab = np.zeros((5, 4, 3), np.uint8)  # three z pages: not to be taken for RGB
    lab[1] = SOLID
    g = PhaseGrid(lab, 1.0)
    for suffix in (".vti", ".npy", ".tif"):
        p = tmp_path / f"g{suffix}"
        sv.write(g, p)
        np.testing.assert_array_equal(sv.read(p).labels, lab)


def test_written_files_are_plain_for_other_readers(tmp_path, grid):
    """np.load, tifffile and pyvista read what sheetview writes, in the documented order."""
    sv.write(grid, tmp_path / "g.npy")
    np.testing.assert_array_equal(np.load(tmp_path / "g.npy", allow_pickle=False), grid.labels)
    sv.write(grid, tmp_path / "g.tif")
    zyx = tifffile.imread(tmp_path / "g.tif")
    np.testing.assert_array_equal(zyx, grid.labels.transpose(2, 1, 0))
    with tifffile.TiffFile(tmp_path / "g.tif") as t:
        desc = json.loads(t.pages[0].description)
        assert desc["unit"] == "nm" and desc["spacing"][2] == pytest.approx(0.53)
        x = t.pages[0].tags["XResolution"].value  # pixels per cm
        assert 1e7 * x[1] / x[0] == pytest.approx(grid.spacing[0])
    sv.write(grid, tmp_path / "g.vti")
    img = pv.read(tmp_path / "g.vti")
    np.testing.assert_array_equal(img.cell_data["phase"].reshape(grid.shape, order="F"),
                                  grid.labels)
    np.testing.assert_allclose(img.spacing, grid.spacing)


def test_tiff_axis_order_and_imagej_units(tmp_path):
    """Pages are z: a stack (z, y, x) written by tifffile becomes labels[x, y, z];
    ImageJ unit 'micron' converts to nm."""
    rng = np.random.default_rng(0)
    xyz = rng.integers(0, 2, (4, 5, 6)).astype(np.uint8)
    p = tmp_path / "b.tif"
    tifffile.imwrite(p, xyz.transpose(2, 1, 0), imagej=True, resolution=(1 / 0.002, 1 / 0.004),
                     metadata={"spacing": 0.005, "unit": "micron", "axes": "ZYX"})
    g = sv.read(p)
    assert g.shape == (4, 5, 6)
    np.testing.assert_array_equal(g.labels == SOLID, xyz == 1)
    np.testing.assert_array_equal(g.labels == GEL, xyz == 0)
    np.testing.assert_allclose(g.spacing, (2.0, 4.0, 5.0))
    # the option wins
    assert sv.read(p, voxel_size=0.7).spacing == (0.7, 0.7, 0.7)


def test_tiff_without_unit_needs_voxel_size(tmp_path):
    p = tmp_path / "plain.tif"
    tifffile.imwrite(p, np.zeros((6, 4, 5), np.uint8) + np.arange(5, dtype=np.uint8) % 2,
                     photometric="minisblack")
    with pytest.raises(InputError) as ei:
        sv.read(p)
    assert str(p) in str(ei.value) and "voxel_size" in str(ei.value)
    assert sv.read(p, voxel_size=2.0).spacing == (2.0, 2.0, 2.0)


def test_npy_axis_order_and_binary_default(tmp_path):
    xyz = np.zeros((3, 4, 5), np.uint8)
    xyz[2, 1, 0] = 1
    p = tmp_path / "b.npy"
    np.save(p, xyz)
    g = sv.read(p, voxel_size=0.5)
    assert g.labels[2, 1, 0] == SOLID
    assert (g.labels == GEL).sum() == xyz.size - 1
    b = tmp_path / "bool.npy"
    np.save(b, xyz.astype(bool))
    np.testing.assert_array_equal(sv.read(b, voxel_size=1).labels, g.labels)


def test_raw_axis_order_dtype_and_byte_order(tmp_path):
    rng = np.random.default_rng(1)
    xyz = rng.integers(0, 2, (4, 5, 6)).astype(np.uint16) * 1000
    p = tmp_path / "v.raw"
    xyz.transpose(2, 1, 0).astype(">u2").tofile(p)  # x fastest on disk
    g = sv.read(p, shape=(4, 5, 6), dtype="uint16", byte_order="big", voxel_size=1.5,
                phases={0: "pore", 1000: "solid"})
    np.testing.assert_array_equal(g.labels == SOLID, xyz == 1000)
    np.testing.assert_array_equal(g.labels == GEL, xyz == 0)
    assert g.spacing == (1.5, 1.5, 1.5)


def test_raw_size_mismatch_and_missing_options(tmp_path):
    p = tmp_path / "v.raw"
    np.zeros(120, np.uint8).tofile(p)
    with pytest.raises(InputError) as ei:
        sv.read(p, shape=(4, 5, 7), dtype="uint8", voxel_size=1)
    msg = str(ei.value)
    assert str(p) in msg and "120 bytes" in msg and "140 bytes" in msg
    with pytest.raises(InputError) as ei:
        sv.read(p, voxel_size=1)
    assert "--shape" in str(ei.value) and "--dtype" in str(ei.value)
    with pytest.raises(OptionError):
        sv.read(p, shape=(4, 5, 6), dtype="nonsense", voxel_size=1)


def test_vti_point_and_cell_scalars_and_units(tmp_path):
    """VTK ImageData written by pyvista: cell scalars are voxels with the file's origin;
    point scalars are voxels centred on the points."""
    xyz = np.zeros((3, 4, 5), np.uint8)
    xyz[0, 1, 2] = 1
    img = pv.ImageData(dimensions=(4, 5, 6), spacing=(2, 3, 4), origin=(10, 20, 30))
    img.cell_data["seg"] = xyz.ravel(order="F")
    p = tmp_path / "cells.vti"
    img.save(p)
    g = sv.read(p)
    assert g.labels[0, 1, 2] == SOLID and g.labels.sum() == SOLID + GEL * (xyz.size - 1)
    assert g.spacing == (2, 3, 4) and g.origin == (10, 20, 30)
    g = sv.read(p, units="A")
    assert g.spacing == pytest.approx((0.2, 0.3, 0.4)) and g.origin == pytest.approx((1, 2, 3))
    pts = pv.ImageData(dimensions=(3, 4, 5), spacing=(2, 2, 2), origin=(0, 0, 0))
    pts.point_data["seg"] = xyz.ravel(order="F")
    p = tmp_path / "points.vti"
    pts.save(p)
    g = sv.read(p)
    assert g.shape == (3, 4, 5) and g.labels[0, 1, 2] == SOLID
    assert g.origin == (-1.0, -1.0, -1.0)


def test_phase_mapping(tmp_path):
    a = np.array([0, 50, 255, 50], np.uint8).reshape(1, 2, 2).repeat(2, axis=0)
    p = tmp_path / "a.npy"
    np.save(p, a)
    with pytest.raises(InputError) as ei:
        sv.read(p, voxel_size=1)
    msg = str(ei.value)
    assert str(p) in msg and "0, 50, 255" in msg and "--phases" in msg
    g = sv.read(p, voxel_size=1, phases={0: "outside", 50: "interlayer", 255: "solid"})
    np.testing.assert_array_equal(
        g.labels, np.where(a == 0, OUTSIDE, np.where(a == 50, INTERLAYER, SOLID)))
    with pytest.raises(InputError) as ei:
        sv.read(p, voxel_size=1, phases={0: "gel", 50: "solid"})
    assert "255" in str(ei.value) and str(p) in str(ei.value)
    with pytest.raises(OptionError):
        sv.read(p, voxel_size=1, phases={0: "gel", 50: "rock", 255: "solid"})
    f = tmp_path / "f.npy"
    np.save(f, a.astype(np.float32) / 10)
    g = sv.read(f, voxel_size=1, phases={0: "void", 5: "solid", 25.5: "solid"})
    assert set(np.unique(g.labels)) == {GEL, SOLID}


def test_many_values_listed_up_to_ten(tmp_path):
    p = tmp_path / "many.npy"
    np.save(p, np.arange(60, dtype=np.int32).reshape(3, 4, 5))
    with pytest.raises(InputError) as ei:
        sv.read(p, voxel_size=1)
    assert "0, 1, 2, 3, 4, 5, 6, 7, 8, 9 and 50 more" in str(ei.value)


def test_bad_volume_files(tmp_path):
    cases = []
    p = tmp_path / "obj.npy"
    np.save(p, np.array([[[{}]]], dtype=object), allow_pickle=True)
    cases.append((p, "objects"))
    p = tmp_path / "two.npy"
    np.save(p, np.zeros((3, 4), np.uint8))
    cases.append((p, "2D"))
    p = tmp_path / "garbled.npy"
    p.write_bytes(b"not an npy file at all")
    cases.append((p, "cannot be read"))
    p = tmp_path / "page.tif"
    tifffile.imwrite(p, np.zeros((4, 5), np.uint8))
    cases.append((p, "2D image"))
    p = tmp_path / "rgb.tif"
    tifffile.imwrite(p, np.zeros((3, 4, 5, 3), np.uint8), photometric="rgb")
    cases.append((p, "RGB"))
    p = tmp_path / "4d.tif"
    tifffile.imwrite(p, np.zeros((2, 3, 4, 5), np.uint8), imagej=True,
                     metadata={"axes": "TZYX"})
    cases.append((p, "4D"))
    p = tmp_path / "garbled.tif"
    p.write_bytes(b"II*\x00garbage" * 4)
    cases.append((p, "TIFF"))
    p = tmp_path / "garbled.vti"
    p.write_text("<VTKFile garbage")
    cases.append((p, "ImageData"))
    for path, word in cases:
        with pytest.raises(InputError) as ei:
            sv.read(path, voxel_size=1)
        assert str(path) in str(ei.value), str(ei.value)
        assert word in str(ei.value), str(ei.value)


def test_memory_limit_checked_before_loading(tmp_path, monkeypatch):
    p = tmp_path / "a.npy"
    np.save(p, np.zeros((10, 10, 10), np.uint8))
    monkeypatch.setattr(volumes, "memory_budget", lambda: 1000)
    with pytest.raises(MemoryLimitError) as ei:
        sv.read(p, voxel_size=1)
    assert str(p) in str(ei.value) and "10 x 10 x 10" in str(ei.value)
    raw = tmp_path / "a.raw"
    np.zeros(1000, np.uint8).tofile(raw)
    with pytest.raises(MemoryLimitError):
        sv.read(raw, shape=(10, 10, 10), dtype="uint8", voxel_size=1)


def test_memory_budget_is_positive():
    assert 0 < volumes.memory_budget() <= volumes.available_memory()


def test_write_refuses_unknown_suffix(tmp_path, grid):
    with pytest.raises(OptionError):
        sv.write(grid, tmp_path / "g.raw")
    assert not (tmp_path / "g.raw").exists()


# ------------------------------------------------------------------- solid fraction
@pytest.fixture(scope="module")
def fraction_grid():
    """A grid rasterized with 3 x 3 x 3 sub-points per voxel: a real solid fraction."""
    from sheetview.grid import rasterize
    from tests.conftest import random_structure

    g = rasterize(random_structure(15, seed=5), 1.5, supersample=3)
    assert g.solid_fraction is not None and g.solid_fraction.dtype == np.float32
    assert 0 < np.count_nonzero((g.solid_fraction > 0) & (g.solid_fraction < 1))
    return g


def test_solid_fraction_round_trips_in_vti(tmp_path, fraction_grid):
    """write_volume -> read_volume gives the fraction back bit for bit (float32). The file
    holds it as a second cell array in VTK's x-fastest order, as pyvista reads it
    (reference reader: pyvista/VTK), and 'phase' stays the active scalars."""
    g = fraction_grid
    p = tmp_path / "g.vti"
    sv.write(g, p)
    back = sv.read(p)
    assert back.solid_fraction is not None and back.solid_fraction.dtype == np.float32
    np.testing.assert_array_equal(back.solid_fraction, g.solid_fraction)
    np.testing.assert_array_equal(back.labels, g.labels)
    img = pv.read(p)
    assert img.active_scalars_name == "phase"
    np.testing.assert_array_equal(np.asarray(img.cell_data["solid_fraction"]),
                                  g.solid_fraction.ravel(order="F"))
    # a grid without a fraction writes none and reads back without one
    plain = PhaseGrid(g.labels, g.spacing, g.origin)
    sv.write(plain, tmp_path / "plain.vti")
    assert "solid_fraction" not in pv.read(tmp_path / "plain.vti").cell_data.keys()
    assert sv.read(tmp_path / "plain.vti").solid_fraction is None


@pytest.mark.parametrize("suffix", [".npy", ".tif"])
def test_npy_and_tiff_carry_labels_only(tmp_path, fraction_grid, suffix):
    """NPY and TIFF hold one array: the labels round-trip, the fraction is not written
    (documented), and the file stays a single plain array for np.load / tifffile."""
    p = tmp_path / f"g{suffix}"
    sv.write(fraction_grid, p)
    back = sv.read(p)
    np.testing.assert_array_equal(back.labels, fraction_grid.labels)
    assert back.solid_fraction is None
    ref = np.load(p) if suffix == ".npy" else tifffile.imread(p).transpose(2, 1, 0)
    np.testing.assert_array_equal(ref, fraction_grid.labels)


def _marked_vti(path, frac, *, name="solid_fraction", announce="solid_fraction"):
    """A sheetview-marked VTI (marker as documented in docs/formats.md) built with pyvista."""
    import json

    lab = np.ones((3, 4, 5), np.uint8)
    img = pv.ImageData(dimensions=(4, 5, 6), spacing=(1, 1, 1))
    img.cell_data["phase"] = lab.ravel(order="F")
    if frac is not None:
        img.cell_data[name] = frac
    mk = {"format": volumes.MARKER, "spacing": [1, 1, 1], "origin": [0, 0, 0]}
    if announce is not None:
        mk["solid_fraction"] = announce
    img.field_data["sheetview"] = np.array([json.dumps(mk)])
    img.save(path)
    return path


@pytest.mark.parametrize("frac,kw,words", [
    (None, {}, "holds no cell array"),
    (np.full(60, 0.5, np.float32), {"name": "other"}, "holds no cell array"),
    (np.full(60, 1.5, np.float32), {}, "must lie in [0, 1]"),
    (np.where(np.arange(60) == 7, np.nan, 0.2).astype(np.float32), {}, "at voxel 7"),
    (np.arange(60, dtype=np.int32), {}, "one real number per voxel"),
    (np.zeros((60, 3), np.float32), {}, "one real number per voxel"),
])
def test_bad_solid_fraction_is_refused(tmp_path, frac, kw, words):
    """A marked VTI whose announced fraction is missing, out of [0, 1], NaN, integer or
    multi-component is refused with the file and the problem named."""
    p = _marked_vti(tmp_path / "f.vti", frac, **kw)
    with pytest.raises(InputError) as ei:
        sv.read(p)
    assert str(p) in str(ei.value) and words in str(ei.value), str(ei.value)


def test_fraction_array_read_only_when_the_marker_names_it(tmp_path):
    """An array called solid_fraction that sheetview's marker does not announce (a file
    made elsewhere) is not taken for the fraction; an announced one is read."""
    frac = np.linspace(0, 1, 60).astype(np.float32)
    p = _marked_vti(tmp_path / "quiet.vti", frac, announce=None)
    assert sv.read(p).solid_fraction is None
    p = _marked_vti(tmp_path / "told.vti", frac)
    np.testing.assert_array_equal(sv.read(p).solid_fraction, frac.reshape((3, 4, 5), order="F"))


def test_write_refuses_a_fraction_of_the_wrong_shape(tmp_path):
    """A fraction whose shape is not the labels' (here transposed) is refused before any
    file is made (derived: the format needs one value per voxel)."""
    g = PhaseGrid(np.zeros((3, 4, 5), np.uint8), 1.0, solid_fraction=np.zeros((5, 4, 3), np.float32))
    with pytest.raises(OptionError) as ei:
        sv.write(g, tmp_path / "g.vti")
    assert "solid_fraction" in str(ei.value)
    assert not (tmp_path / "g.vti").exists()


@pytest.mark.parametrize("suffix", [".vti", ".npy", ".tif"])
def test_metadata_round_trips(tmp_path, suffix):
    """A grid's metadata (study parameters, rasterization settings; numpy scalars among
    them) comes back from every volume form; ``source_format`` names the file just read.
    An NPY file keeps metadata only while its header stays within what ``numpy.load``
    reads by default (10,000 bytes, numpy's ``max_header_size``): longer metadata is left
    out and the file stays readable by numpy."""
    rng = np.random.default_rng(3)
    lab = rng.integers(0, 4, (4, 5, 6)).astype(np.uint8)
    meta = {"w_c": 0.45, "replica": np.int64(3), "voxel_size_nm": np.float32(0.25),
            "note": "invented study", "source_format": "csv"}
    g = PhaseGrid(lab, 0.25, metadata=meta)
    p = tmp_path / f"m{suffix}"
    sv.write(g, p)
    back = sv.read(p)
    assert back.metadata["source_format"] == suffix.lstrip(".")
    assert {k: v for k, v in back.metadata.items() if k != "source_format"} == {
        "w_c": 0.45, "replica": 3, "voxel_size_nm": pytest.approx(0.25), "note": "invented study"}
    if suffix == ".npy":
        big = PhaseGrid(lab, 0.25, metadata={"long": "x" * 70000})
        q = tmp_path / "big.npy"
        sv.write(big, q)
        np.testing.assert_array_equal(np.load(q), lab)
        assert "long" not in sv.read(q).metadata
