"""Exports for general-purpose tools: VTK files read back by PyVista and by meshio (an
independent reader), prisms as wedge cells of exact volume, sheetview's own VTK files read
back as the same prisms, `convert` round-tripping every writable format, the phase grid
exported at a chosen voxel, and `render --export` checking its folder first."""
from __future__ import annotations

import json
import re
from pathlib import Path

import meshio
import numpy as np
import pytest
import pyvista as pv
import tifffile
import trimesh
from click.testing import CliRunner

import sheetview as sv
from sheetview.cli import main

ROOT = Path(__file__).resolve().parents[1]
PRISMS = ROOT / "sample_structures" / "single_stack.csv"
VOLUME = ROOT / "sample_structures" / "small_volume.tif"


def _convert(src, dst, *extra):
    r = CliRunner().invoke(main, ["convert", str(src), str(dst), *map(str, extra)])
    assert r.exit_code == 0, r.output
    return r


@pytest.fixture(scope="module")
def tilted(tmp_path_factory):
    """Prisms at random orientations, sizes and sub-nm offsets, with a per-prism column."""
    rng = np.random.default_rng(7)
    n = 40
    tri = rng.uniform(0, 20, (n, 1, 3)) + rng.normal(0, 1.5, (n, 3, 3))
    thick = rng.uniform(0.3, 1.2, n)
    from sheetview.domain import domain_from_dict
    dom = domain_from_dict({"shape": "box", "min": [-6, -6, -6], "max": [26, 26, 26]})
    s = sv.Structure(tri, thick, dom, 1.3, {"tag": np.arange(n) % 3}, {"seed": 7})
    p = tmp_path_factory.mktemp("t") / "tilted.npz"
    sv.write(s, p)
    return sv.read(p)


@pytest.mark.parametrize("suffix", [".csv", ".npz", ".parquet", ".vtp", ".vtk", ".vtu"])
def test_prisms_round_trip_through_every_writable_format(tilted, tmp_path, suffix):
    """`convert` writes prisms to each format and reading the file gives the same prisms:
    corners, thickness, domain, repeat, per-prism columns (a VTK file sheetview wrote is read
    as prisms, not as a solid body, though its prisms are closed surfaces)."""
    out = tmp_path / f"p{suffix}"
    _convert(tilted.source, out)
    back = sv.read(out)
    assert isinstance(back, sv.Structure)
    assert len(back) == len(tilted)
    np.testing.assert_allclose(back.vertices, tilted.vertices, rtol=0, atol=1e-9)
    np.testing.assert_allclose(back.thickness, tilted.thickness, rtol=1e-9)
    assert back.domain == tilted.domain and back.spacing == pytest.approx(tilted.spacing)
    np.testing.assert_array_equal(back.columns["tag"], tilted.columns["tag"])


def _wedge_volumes(points, wedges):
    """Volume of right triangular prisms from their six corners (bottom a, b, c; top a',
    b', c'): base area (half the cross product) times the distance of the top from the
    base plane. Plain numpy, independent of VTK."""
    p = points[wedges]
    a, b, c, top = p[:, 0], p[:, 1], p[:, 2], p[:, 3]
    cr = np.cross(b - a, c - a)
    area = 0.5 * np.linalg.norm(cr, axis=1)
    n = cr / np.linalg.norm(cr, axis=1)[:, None]
    return area * np.abs(np.einsum("ij,ij->i", top - a, n))


def test_vtu_wedges_have_the_exact_volume_in_pyvista_and_meshio(tilted, tmp_path):
    """The .vtu holds one VTK wedge per prism: meshio reads them as 'wedge' cells whose
    corner geometry gives area x thickness; VTK's own cell volume (PyVista
    compute_cell_sizes) is positive and equal to it (rel 1e-9)."""
    out = tmp_path / "w.vtu"
    _convert(tilted.source, out)
    m = meshio.read(out)
    (block,) = m.cells
    assert block.type == "wedge" and len(block.data) == len(tilted)
    vol = _wedge_volumes(np.asarray(m.points), np.asarray(block.data))
    expected = tilted.thickness * 0.5 * np.linalg.norm(
        np.cross(tilted.vertices[:, 1] - tilted.vertices[:, 0],
                 tilted.vertices[:, 2] - tilted.vertices[:, 0]), axis=1)
    np.testing.assert_allclose(vol, expected, rtol=1e-9)
    np.testing.assert_allclose(m.cell_data["volume"][0], expected, rtol=1e-9)
    g = pv.read(out)
    vtk_vol = g.compute_cell_sizes(length=False, area=False, volume=True)["Volume"]
    np.testing.assert_allclose(vtk_vol, expected, rtol=1e-9)


@pytest.mark.parametrize("suffix", [".vtp", ".vtu", ".vti"])
def test_vtk_xml_files_are_zlib_compressed(tilted, tmp_path, suffix):
    """XML VTK files name the zlib compressor (read by every VTK XML reader; LZ4 is not)."""
    out = tmp_path / f"x{suffix}"
    _convert(VOLUME if suffix == ".vti" else tilted.source, out)
    head = out.read_bytes()[:400].decode("latin-1")
    assert re.search(r'compressor="vtkZLibDataCompressor"', head), head


def test_vtp_read_by_pyvista_has_closed_prisms(tilted, tmp_path):
    """The .vtp seen by PyVista: five cells per prism, a closed (manifold) surface, per-cell
    volumes equal to area x thickness."""
    out = tmp_path / "p.vtp"
    _convert(tilted.source, out)
    poly = pv.read(out)
    assert poly.n_cells == 5 * len(tilted)
    assert poly.triangulate().is_manifold
    np.testing.assert_allclose(poly.cell_data["volume"][::5], tilted.volumes, rtol=1e-12)


@pytest.mark.parametrize("suffix", [".tif", ".vti", ".npy"])
def test_volumes_round_trip(tmp_path, suffix):
    """A voxel volume converted to each volume format reads back with the same labels,
    voxel size and origin."""
    v = sv.read(VOLUME)
    out = tmp_path / f"v{suffix}"
    _convert(VOLUME, out, *(["--volume-voxel", v.spacing[0]] if suffix == ".npy" else []))
    back = sv.read(out, **({"voxel_size": v.spacing[0]} if suffix == ".npy" else {}))
    np.testing.assert_array_equal(back.labels, v.labels)
    assert back.spacing == pytest.approx(v.spacing)


@pytest.mark.parametrize("suffix", [".stl", ".ply", ".obj", ".off", ".glb", ".vtp", ".vtk"])
def test_solid_bodies_round_trip(tmp_path, suffix):
    """A closed body (a trimesh icosphere, volume checked by trimesh) converted to each mesh
    format reads back as a solid of the same volume."""
    src = tmp_path / "ball.stl"
    ball = trimesh.creation.icosphere(subdivisions=2, radius=5.0)
    ball.export(src)
    out = tmp_path / f"b{suffix}"
    _convert(src, out)
    back = sv.read(out)
    assert isinstance(back, sv.SurfaceBody)
    assert back.volume == pytest.approx(ball.volume, rel=1e-6)


def test_convert_writes_the_phase_grid_at_the_chosen_voxel(tilted, tmp_path):
    """Prisms converted to a TIFF volume: the phase grid at --voxel (the voxel edge in the
    file's resolution tags, read with tifffile), with solid voxels whose volume matches the
    prisms' total volume within the rasterization error (prisms may overlap, so at most)."""
    out = tmp_path / "g.tif"
    _convert(tilted.source, out, "--voxel", "0.2")
    with tifffile.TiffFile(out) as tf:
        arr = tf.asarray()
        x = tf.pages[0].tags["XResolution"].value
        unit = tf.pages[0].tags["ResolutionUnit"].value
    assert int(unit) == 3  # centimetre (TIFF 6.0)
    nm = 1e7 / (x[0] / x[1])
    assert nm == pytest.approx(0.2, rel=1e-6)
    solid = np.count_nonzero(arr == 1) * 0.2 ** 3
    assert 0 < solid <= tilted.volumes.sum() * 1.15


def test_render_export_checks_its_folder_before_writing(tmp_path):
    """`render --export` into a folder that does not exist is refused before the picture
    is drawn."""
    pic = tmp_path / "r.png"
    r = CliRunner().invoke(main, ["render", str(PRISMS), "-o", str(pic), "--export",
                                  str(tmp_path / "missing")])
    assert r.exit_code == 2 and "does not exist" in r.output
    assert not pic.exists()


def test_volume_tiff_has_standard_tags_and_its_own_description(tmp_path):
    """A volume TIFF written by sheetview: one page per z slice, X/Y resolution in pixels
    per centimetre (TIFF 6.0 tags, read with tifffile), a JSON description of its own
    (format marker, spacing and origin in nm) that names no other program, and it reads
    back exactly."""
    v = sv.read(VOLUME)
    out = tmp_path / "v.tif"
    sv.write(v, out)
    with tifffile.TiffFile(out) as tf:
        page = tf.pages[0]
        assert len(tf.pages) == v.labels.shape[2] and not tf.is_imagej
        desc = json.loads(page.description)
        res = page.tags["XResolution"].value
        assert int(page.tags["ResolutionUnit"].value) == 3
        raw = out.read_bytes()
    assert 1e7 / (res[0] / res[1]) == pytest.approx(v.spacing[0], rel=1e-7)
    assert desc["format"].startswith("sheetview") and desc["unit"] == "nm"
    assert desc["spacing"] == pytest.approx(list(v.spacing))
    assert b"ImageJ" not in raw and b"imagej" not in raw.lower()
    back = sv.read(out)
    np.testing.assert_array_equal(back.labels, v.labels)
    assert back.spacing == pytest.approx(v.spacing) and back.origin == pytest.approx(v.origin)


def test_volume_tiff_of_the_widely_used_convention_is_still_read(tmp_path):
    """A stack written in the widely used hyperstack convention (description keys unit and
    spacing, written here by tifffile) is read with its voxel size, non-cubic included."""
    arr = (np.arange(4 * 5 * 6).reshape(4, 5, 6) % 2).astype(np.uint8)  # z, y, x
    p = tmp_path / "other.tif"
    tifffile.imwrite(p, arr, imagej=True, resolution=(1 / 0.25, 1 / 0.25),
                     metadata={"unit": "nm", "spacing": 0.75, "axes": "ZYX"})
    g = sv.read(p)
    assert g.spacing == pytest.approx((0.25, 0.25, 0.75))
    np.testing.assert_array_equal(g.labels == 1, arr.transpose(2, 1, 0) == 1)  # 1 = solid
