"""Mesh files: sheet and solid readings, prism VTK export, body writers, bad input.

Reference library: trimesh (Dawson-Haggerty et al., trimesh, https://trimesh.org) for
the meshes themselves and their volumes; pyvista (Sullivan & Kaszynski, "PyVista: 3D
plotting and mesh analysis through a streamlined interface for the Visualization
Toolkit", JOSS 4 (2019) 1450, doi:10.21105/joss.01450) to read back VTK files.
"""
import numpy as np
import pytest
import pyvista as pv
import trimesh

import sheetview as sv
from sheetview.errors import InputError, OptionError, OutputExistsError
from sheetview.io import meshes
from sheetview.structure import Structure, SurfaceBody
from tests.conftest import random_structure

MESH_FORMATS = ["stl", "ply", "obj", "off", "glb"]


@pytest.fixture(scope="module")
def ico():
    return trimesh.creation.icosphere(subdivisions=1, radius=3.0)


def test_open_icosphere_as_sheets_keeps_triangles_in_file_order(tmp_path, ico):
    """--as sheets on a closed icosphere: one prism per triangle, same corners, file order
    (reference: trimesh's own faces)."""
    for fmt in MESH_FORMATS:
        p = tmp_path / f"ico.{fmt}"
        ico.export(p)
        s = sv.read(p, as_="sheets", thickness=0.5)
        assert isinstance(s, Structure)
        assert len(s) == len(ico.faces)
        np.testing.assert_allclose(s.vertices, ico.vertices[ico.faces], rtol=0, atol=1e-6)
        assert np.all(s.thickness == 0.5)
        assert s.domain.inferred


def test_closed_cube_is_a_body_with_trimesh_volume(tmp_path):
    """A closed box mesh is read as a SurfaceBody with trimesh's volume (trimesh.Trimesh.volume)."""
    box = trimesh.creation.box(extents=(2.0, 3.0, 5.0))
    for fmt in MESH_FORMATS:
        p = tmp_path / f"box.{fmt}"
        box.export(p)
        b = sv.read(p)
        assert isinstance(b, SurfaceBody), fmt
        assert b.volume == pytest.approx(box.volume, rel=1e-6)
        assert b.area == pytest.approx(box.area, rel=1e-6)
        assert b.domain.inferred
        lo, hi = b.domain.bounds
        np.testing.assert_allclose(lo, box.bounds[0] - 1.4, atol=1e-6)
        np.testing.assert_allclose(hi, box.bounds[1] + 1.4, atol=1e-6)


def test_vtk_sphere_body_and_sheets_with_cell_arrays(tmp_path):
    """pyvista sphere: closed -> body with pyvista's volume; as sheets, per-cell thickness
    and sheet/born/tag arrays follow the faces."""
    m = pv.Sphere(theta_resolution=12, phi_resolution=8)
    n = m.n_cells
    m.cell_data["thickness"] = np.linspace(0.5, 0.7, n)
    m.cell_data["sheet"] = np.arange(n)
    m.cell_data["born"] = np.linspace(0, 1, n)
    m.cell_data["tag"] = np.arange(n) % 3
    m.cell_data["other"] = np.ones(n)
    for suffix in (".vtp", ".vtk"):
        p = tmp_path / f"s{suffix}"
        m.save(p)
        b = sv.read(p)
        assert isinstance(b, SurfaceBody)
        assert b.volume == pytest.approx(m.volume, rel=1e-9)
        s = sv.read(p, as_="sheets")
        np.testing.assert_allclose(s.thickness, m.cell_data["thickness"])
        np.testing.assert_array_equal(s.columns["sheet"], np.arange(n))
        np.testing.assert_allclose(s.columns["born"], m.cell_data["born"])
        np.testing.assert_array_equal(s.columns["tag"], np.arange(n) % 3)
        assert "other" not in s.columns
        # the option wins over the file's array
        assert np.all(sv.read(p, as_="sheets", thickness=0.2).thickness == 0.2)
    ug = m.cast_to_unstructured_grid()
    p = tmp_path / "s.vtu"
    ug.save(p)
    assert sv.read(p).volume == pytest.approx(m.volume, rel=1e-9)


def test_vtk_quads_are_split_into_triangles(tmp_path):
    plane = pv.Plane(i_size=4, j_size=2, i_resolution=4, j_resolution=2)
    p = tmp_path / "plane.vtp"
    plane.save(p)
    s = sv.read(p, thickness=0.3)
    assert len(s) == 2 * plane.n_cells
    assert s.areas.sum() == pytest.approx(8.0)


def test_ply_face_properties(tmp_path):
    """Per-face PLY properties 'thickness' and 'sheet' are read (ASCII PLY, Turk 1994 format)."""
    text = """ply
format ascii 1.0
element vertex 4
property float x
property float y
property float z
element face 2
property list uchar int vertex_indices
property float thickness
property int sheet
end_header
0 0 0
1 0 0
0 1 0
0 0 1
3 0 1 2 0.5 7
3 0 1 3 0.75 8
"""
    p = tmp_path / "t.ply"
    p.write_text(text)
    s = sv.read(p)
    np.testing.assert_allclose(s.thickness, [0.5, 0.75])
    np.testing.assert_array_equal(s.columns["sheet"], [7, 8])


def test_units_convert_to_nm(tmp_path, ico):
    p = tmp_path / "ico.obj"
    ico.export(p)
    s = sv.read(p, as_="sheets", thickness=0.5, units="A")
    np.testing.assert_allclose(s.vertices, 0.1 * ico.vertices[ico.faces], atol=1e-7)
    assert np.all(s.thickness == 0.5)  # the option is in nm, not scaled
    b = sv.read(p, units="um")
    assert b.volume == pytest.approx(ico.volume * 1e9, rel=1e-6)


def test_scene_is_concatenated(tmp_path):
    a = trimesh.creation.box(extents=(1, 1, 1))
    b = trimesh.creation.box(extents=(1, 1, 1))
    b.apply_translation((5, 0, 0))
    scene = trimesh.Scene([a, b])
    p = tmp_path / "two.glb"
    scene.export(p)
    body = sv.read(p)
    assert isinstance(body, SurfaceBody)
    assert body.n_faces == 24
    assert body.volume == pytest.approx(2.0)


# ------------------------------------------------------------------- bad input
def _expect(path, *words, **opts):
    with pytest.raises(InputError) as ei:
        sv.read(path, **opts)
    msg = str(ei.value)
    assert str(path) in msg
    for w in words:
        assert w in msg, msg
    return msg


def test_open_surface_without_thickness_asks_for_it(tmp_path):
    p = tmp_path / "plane.obj"
    trimesh.Trimesh([[0, 0, 0], [1, 0, 0], [0, 1, 0]], [[0, 1, 2]], process=False).export(p)
    _expect(p, "--thickness")


def test_solid_forced_on_open_surface(tmp_path):
    p = tmp_path / "plane.obj"
    trimesh.Trimesh([[0, 0, 0], [1, 0, 0], [0, 1, 0]], [[0, 1, 2]], process=False).export(p)
    _expect(p, "not a closed surface", as_="solid")


def test_garbled_files(tmp_path):
    for name in ("bad.stl", "bad.ply", "bad.vtp", "bad.vtk", "bad.glb"):
        p = tmp_path / name
        p.write_bytes(b"\x00garbage\xff not a mesh" * 8)
        with pytest.raises(InputError) as ei:
            sv.read(p, thickness=0.5)
        assert str(p) in str(ei.value)


def test_no_triangles(tmp_path):
    p = tmp_path / "points.obj"
    p.write_text("v 0 0 0\nv 1 0 0\nv 0 1 0\n")
    _expect(p, "has no triangles", thickness=0.5)
    p = tmp_path / "points.vtp"
    pv.PolyData(np.eye(3)).save(p)
    _expect(p, "has no triangles", thickness=0.5)


def test_degenerate_triangle_named_by_face_row(tmp_path):
    v = [[0, 0, 0], [1, 0, 0], [0, 1, 0], [2, 0, 0], [3, 0, 0], [4, 0, 0]]
    p = tmp_path / "deg.obj"
    trimesh.Trimesh(v, [[0, 1, 2], [3, 4, 5]], process=False).export(p)
    _expect(p, "face row 2", "degenerate", thickness=0.5)


def test_nan_vertex(tmp_path):
    p = tmp_path / "nan.obj"
    p.write_text("v 0 0 0\nv 1 0 0\nv nan 1 0\nf 1 2 3\n")
    _expect(p, "face row 1", "finite", thickness=0.5)


def test_bad_options(tmp_path, ico):
    p = tmp_path / "ico.stl"
    ico.export(p)
    with pytest.raises(OptionError):
        sv.read(p, thickness=-1)
    with pytest.raises(OptionError):
        sv.read(p, as_="liquid")


# ------------------------------------------------------------------- writers
def test_prism_vtp_content_and_volume(tmp_path):
    """Written prisms read back by pyvista: one closed solid per prism, arrays per cell,
    and the closed mesh's volume (trimesh) equals the sum of area x thickness."""
    s = random_structure(12, seed=3)
    # keep prisms apart so that each is its own closed component
    v = s.vertices + (np.arange(12) * 40.0)[:, None, None]
    s = Structure(v, s.thickness, s.domain, s.spacing, s.columns, s.metadata)
    for suffix in (".vtp", ".vtk"):
        p = tmp_path / f"prisms{suffix}"
        sv.write(s, p)
        poly = pv.read(p)
        assert poly.n_cells == 5 * len(s)
        assert poly.n_points == 6 * len(s)
        pid = np.asarray(poly.cell_data["prism_id"])
        np.testing.assert_array_equal(pid, np.repeat(np.arange(len(s)), 5))
        np.testing.assert_allclose(poly.cell_data["thickness"][::5], s.thickness)
        np.testing.assert_allclose(poly.cell_data["volume"][::5], s.volumes)
        np.testing.assert_allclose(poly.cell_data["area"][::5], s.areas)
        np.testing.assert_allclose(poly.cell_data["normal"][::5], s.normals)
        for name in ("sheet", "born", "tag"):
            np.testing.assert_allclose(poly.cell_data[name][::5], s.columns[name])
        np.testing.assert_allclose(np.asarray(poly.points).reshape(-1, 6, 3), s.prism_corners())
        tri = poly.triangulate()
        tm = trimesh.Trimesh(tri.points, tri.regular_faces, process=True)
        assert tm.is_watertight
        assert tm.volume == pytest.approx(s.total_volume, rel=1e-9)
        body = sv.read(p)
        assert isinstance(body, SurfaceBody)
        assert body.volume == pytest.approx(s.total_volume, rel=1e-9)
    with pytest.raises(OutputExistsError):
        sv.write(s, tmp_path / "prisms.vtp")
    sv.write(s, tmp_path / "prisms.vtp", force=True)


def test_prism_vtk_empty_structure(tmp_path):
    s = random_structure(3).subset(np.zeros(3, bool))
    p = tmp_path / "empty.vtp"
    sv.write(s, p)
    assert pv.read(p).n_cells == 0


def test_body_round_trips(tmp_path):
    """write_body -> read_mesh gives back the same closed surface (same triangles as a set,
    same volume)."""
    box = trimesh.creation.icosphere(subdivisions=2, radius=4.0)
    body = SurfaceBody(box.vertices, box.faces, sv.Box((-5, -5, -5), (5, 5, 5)))
    for fmt in ("stl", "ply", "obj", "off", "glb", "vtp", "vtk"):
        p = tmp_path / f"body.{fmt}"
        sv.write(body, p)
        back = sv.read(p)
        assert isinstance(back, SurfaceBody), fmt
        assert back.n_faces == body.n_faces
        tol = 1e-6 if fmt in ("stl", "glb") else 1e-12  # STL and glTF hold float32
        np.testing.assert_allclose(back.vertices[back.faces], body.vertices[body.faces],
                                   rtol=0, atol=tol)
        assert back.volume == pytest.approx(body.volume, rel=1e-6)
    with pytest.raises(OptionError):
        sv.write(body, tmp_path / "body.xyz")
    with pytest.raises(OutputExistsError):
        sv.write(body, tmp_path / "body.stl")


def test_prism_surface_triangles_are_outward():
    """The 8-triangle closed prism of a unit right triangle, thickness 2: trimesh volume
    1/2 x 2 = 1 and positive (outward winding)."""
    s = Structure(np.array([[[0, 0, 0], [1, 0, 0], [0, 1, 0]]], float), [2.0],
                  sv.Box((-1, -1, -2), (2, 2, 2)))
    tm = trimesh.Trimesh(s.prism_corners()[0], meshes.prism_surface_triangles(), process=False)
    assert tm.is_watertight and tm.is_winding_consistent
    assert tm.volume == pytest.approx(1.0)


def test_vertex_merge_matches_numpy_unique():
    """The hashed vertex merge gives the same vertex classes as np.unique(axis=0)
    (reference: NumPy), with -0.0 and 0.0 merged and faces kept in order."""
    rng = np.random.default_rng(4)
    base = rng.integers(-3, 3, (200, 3)).astype(float)
    base[base == 0] = -0.0
    v = np.concatenate([base, np.abs(base), rng.normal(size=(50, 3))])
    faces = rng.integers(0, len(v), (300, 3))
    uniq, f = meshes._merge(v, faces)
    ref, inv = np.unique(v + 0.0, axis=0, return_inverse=True)
    assert len(uniq) == len(ref)
    np.testing.assert_array_equal(uniq[f], (v + 0.0)[faces])
    # same partition of the vertices into classes
    _, f_all = meshes._merge(v, np.arange(len(v))[:, None])
    assert len(np.unique(np.stack([f_all[:, 0], inv.ravel()], 1), axis=0)) == len(ref)


def test_vtk_lines_and_vertices_are_ignored(tmp_path):
    """A PolyData holding a line and a vertex cell besides two triangles gives two prisms,
    with their cell arrays in file order."""
    pts = np.array([[0, 0, 0], [1, 0, 0], [0, 1, 0], [0, 0, 1], [5, 5, 5]], float)
    poly = pv.PolyData(pts, faces=[3, 0, 1, 2, 3, 0, 1, 3], lines=[2, 3, 4], verts=[1, 4])
    poly.cell_data["sheet"] = np.array([9, 8, 7, 6])  # VTK orders verts, lines, polys
    p = tmp_path / "mixed.vtp"
    poly.save(p)
    s = sv.read(p, thickness=0.4)
    assert len(s) == 2
    np.testing.assert_allclose(s.vertices, pts[[[0, 1, 2], [0, 1, 3]]])
    np.testing.assert_array_equal(s.columns["sheet"], [7, 6])
