"""Mesh files: sheet and solid readings, prism VTK export, body writers, bad input.

Reference library: trimesh (Dawson-Haggerty et al., trimesh, https://trimesh.org) for
the meshes themselves and their volumes; pyvista (Sullivan & Kaszynski, "PyVista: 3D
plotting and mesh analysis through a streamlined interface for the Visualization
Toolkit", JOSS 4 (2019) 1450, doi:10.21105/joss.01450) to read back VTK files.
"""
import json

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
    _expect(p, "thickness (nm)")


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
        again = sv.read(p)  # sheetview's own file: the same prisms, not a solid body
        assert isinstance(again, sv.Structure)
        np.testing.assert_allclose(again.vertices, s.vertices, atol=1e-12)
        body = sv.read(p, as_="solid")
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


# ------------------------------------------------------------ the sheetview header
HEADER_FORMATS = ["ply", "obj", "off", "glb", "vtp", "vtk"]


def _apart(n=6, seed=3, domain=None):
    """Random prisms moved apart, so that each written prism is its own closed solid."""
    s = random_structure(n, seed=seed)
    v = s.vertices + (np.arange(n) * 40.0)[:, None, None]
    return Structure(v, s.thickness, domain or s.domain, 1.25, s.columns,
                     {"study": "invented", "seed": 11, "note": "é"})


@pytest.mark.parametrize("domain", [sv.Sphere((1.0, 2.5, -3.125), 300.3),
                                    sv.Box((-7.1, -5.0, -6.3), (230.7, 9.9, 11.2), periodic=True)])
def test_prism_vtk_gives_back_domain_spacing_and_metadata(tmp_path, domain):
    """write_prisms_vtk -> read: the domain is the one written (exact, as its JSON form
    holds shortest round-trip decimals), the spacing of a sheet reading too, and the
    metadata. The field data is plain JSON that pyvista hands over (VTK field data,
    reference reader: pyvista)."""
    s = _apart(domain=domain)
    for suffix in (".vtp", ".vtk"):
        p = tmp_path / f"prisms{suffix}"
        sv.write(s, p)
        fd = np.asarray(pv.read(p).field_data["sheetview"])  # the header's UTF-8 bytes
        raw = json.loads(fd.astype(np.uint8).tobytes().decode("utf-8"))
        assert raw["format"] == "sheetview mesh v1" and raw["domain"] == domain.to_dict()
        assert raw["content"] == "prisms"
        body = sv.read(p, as_="solid")
        assert isinstance(body, SurfaceBody)
        assert body.domain == domain and not body.domain.inferred
        assert {k: body.metadata[k] for k in s.metadata} == s.metadata
        assert body.metadata["source_format"] == suffix[1:]
        sheets = sv.read(p, as_="sheets")
        assert sheets.domain == domain and sheets.spacing == 1.25
        assert sv.read(p, as_="sheets", spacing=2.0).spacing == 2.0  # the option wins
        # --units scales the header's lengths like the vertices
        ang = sv.read(p, as_="sheets", units="A")
        lo, hi = ang.domain.bounds
        np.testing.assert_allclose(lo, 0.1 * domain.bounds[0], rtol=1e-15)
        np.testing.assert_allclose(hi, 0.1 * domain.bounds[1], rtol=1e-15)
        assert ang.spacing == pytest.approx(0.125, rel=1e-15)


def test_inferred_domain_comes_back_as_written_and_marked(tmp_path):
    """A structure with an inferred domain: the written box comes back exactly, still
    marked inferred, although a solid reading would have inferred a different box
    (padding 1.4 nm about the prism corners instead of t_max + 1.4 about mid-planes)."""
    s0 = _apart()
    s = Structure(s0.vertices, s0.thickness, sv.structure.with_inferred_domain(s0.vertices, s0.thickness),
                  s0.spacing, s0.columns, s0.metadata)
    assert s.domain.inferred
    p = tmp_path / "prisms.vtp"
    sv.write(s, p)
    body = sv.read(p)
    assert body.domain == s.domain and body.domain.inferred
    corners = s.prism_corners().reshape(-1, 3)
    assert not np.allclose(body.domain.bounds[0], corners.min(axis=0) - 1.4)


def test_body_header_round_trips_in_every_format_but_stl(tmp_path):
    """write_body -> read: domain (exact), its inferred mark and the metadata come back
    for PLY, OBJ, OFF, GLB, VTP and legacy VTK; binary STL has no room for a header and
    gets the inferred box (trimesh's bounds padded by 1.4 nm). Metadata holding the PLY
    header words 'end_header' and 'TextureFile' does not disturb trimesh's PLY parser."""
    ico = trimesh.creation.icosphere(subdivisions=2, radius=4.0)
    dom = sv.Box((-5.25, -6.0, -7.125), (5.5, 6.1, 7.3), periodic=True)
    meta = {"study": "a end_header b TextureFile c.png # d", "n": 3, "x": [0.1, None]}
    body = SurfaceBody(ico.vertices, ico.faces, dom, meta)
    for fmt in HEADER_FORMATS + ["stl"]:
        p = tmp_path / f"body.{fmt}"
        sv.write(body, p)
        back = sv.read(p)
        assert isinstance(back, SurfaceBody), fmt
        assert back.n_faces == body.n_faces, fmt
        assert back.metadata["source_format"] == fmt
        if fmt == "stl":
            assert back.domain.inferred
            np.testing.assert_allclose(back.domain.bounds[0], ico.bounds[0] - 1.4, atol=1e-6)
            continue
        assert back.domain == dom and not back.domain.inferred, fmt
        assert {k: back.metadata[k] for k in meta} == meta, fmt
    inferred = SurfaceBody(ico.vertices, ico.faces, sv.Box((-9, -9, -9), (9, 9, 9), inferred=True))
    for fmt in HEADER_FORMATS:
        p = tmp_path / f"inferred.{fmt}"
        sv.write(inferred, p)
        back = sv.read(p)
        assert back.domain == inferred.domain and back.domain.inferred, fmt


def test_files_with_header_stay_plain_for_other_readers(tmp_path):
    """The header does not disturb other readers: VTK's PLY, OBJ, glTF and XML readers
    (through pyvista) and trimesh's OFF reader give the written triangles."""
    ico = trimesh.creation.icosphere(subdivisions=1, radius=2.0)
    body = SurfaceBody(ico.vertices, ico.faces, sv.Box((-3, -3, -3), (3, 3, 3)),
                       {"note": "end_header texturefile"})
    for fmt in ("ply", "obj", "glb", "vtp", "vtk"):
        p = tmp_path / f"b.{fmt}"
        sv.write(body, p)
        m = pv.read(p)
        if isinstance(m, pv.MultiBlock):
            m = m.combine()
        assert m.n_cells == len(ico.faces), fmt
        assert m.n_points >= len(ico.vertices), fmt
    p = tmp_path / "b.off"
    sv.write(body, p)
    tm = trimesh.load(p, process=False)
    np.testing.assert_allclose(tm.vertices[tm.faces], ico.vertices[ico.faces], atol=1e-12)
    assert p.read_text().splitlines()[0] == "OFF"


def test_foreign_comments_and_fields_keep_the_inferred_domain(tmp_path, ico):
    """Other programs' PLY comments, OBJ comments, VTK field data (including a field named
    'sheetview' with another format) are ignored: the padded bounding box as before."""
    expect_lo = ico.bounds[0] - 1.4
    p = tmp_path / "a.ply"
    ico.export(p)  # trimesh's PLY
    text = p.read_bytes().replace(b"end_header", b"comment VCGLIB generated\ncomment sheetview\nend_header", 1)
    p.write_bytes(text)
    p2 = tmp_path / "a.obj"
    p2.write_text("# Blender 4.0\n# sheetview mesh\n" + ico.export(file_type="obj"))
    m = pv.PolyData.from_regular_faces(ico.vertices, ico.faces)
    m.field_data["sheetview"] = np.array(['{"format": "sheetview phase codes v1", "spacing": [1, 1, 1]}'])
    m.field_data["info"] = np.array(["made elsewhere"])
    p3 = tmp_path / "a.vtp"
    m.save(p3)
    for q in (p, p2, p3):
        b = sv.read(q)
        assert b.domain.inferred, q
        np.testing.assert_allclose(b.domain.bounds[0], expect_lo, atol=1e-6)


def test_first_writer_header_without_format_is_read(tmp_path, ico):
    """Prism files of the first writer hold field data 'sheetview' without a 'format'
    key; it is read as version 1."""
    m = pv.PolyData.from_regular_faces(ico.vertices, ico.faces)
    old = {"spacing": 1.1, "domain": {"shape": "sphere", "center": [0, 0, 0], "radius": 40.0},
           "domain_inferred": False, "metadata": {"k": 1}}
    m.field_data["sheetview"] = np.array([json.dumps(old)])
    p = tmp_path / "old.vtp"
    m.save(p)
    b = sv.read(p)
    assert b.domain == sv.Sphere((0, 0, 0), 40.0) and b.metadata["k"] == 1
    assert sv.read(p, as_="sheets", thickness=0.3).spacing == 1.1


def _damage(tmp_path, fmt, payload):
    """A closed icosphere body file whose sheetview header text is replaced by ``payload``."""
    ico = trimesh.creation.icosphere(subdivisions=1, radius=2.0)
    body = SurfaceBody(ico.vertices, ico.faces, sv.Box((-3, -3, -3), (3, 3, 3)), {"k": "v"})
    p = tmp_path / f"dmg.{fmt}"
    if fmt in ("vtp", "vtk"):
        m = pv.PolyData.from_regular_faces(ico.vertices, ico.faces)
        m.field_data["sheetview"] = payload if isinstance(payload, np.ndarray) else np.array([payload])
        m.save(p)
        return p, None
    sv.write(body, p)
    raw = p.read_bytes()
    if fmt == "glb":  # keep the chunk length: rewrite the JSON chunk
        import struct
        n = struct.unpack("<I", raw[12:16])[0]
        doc = json.loads(raw[20:20 + n])
        doc["scenes"][0]["extras"]["sheetview"] = payload
        j = json.dumps(doc).encode()
        j += b" " * (-len(j) % 4)
        rest = raw[20 + n:]
        out = raw[:12] + struct.pack("<I", len(j)) + b"JSON" + j + rest
        out = out[:8] + struct.pack("<I", len(out)) + out[12:]
        p.write_bytes(out)
        return p, None
    start = raw.index(b"sheetview mesh v1 ")
    end = raw.index(b"\n", start)
    line = raw[:start].count(b"\n") + 1
    p.write_bytes(raw[:start] + payload.encode() + raw[end:])
    return p, line


DAMAGED = [
    ("ply", "sheetview mesh v1 {\"domain\": {\"shape\": \"box\", ", "not valid JSON", "sheetview"),
    ("obj", 'sheetview mesh v1 {"domain": {"shape": "box", "min": [0, 0, 0], "max": [1, -1, 1]}}',
     "max must exceed min", "domain"),
    ("off", 'sheetview mesh v1 {"spacing": -1}', "spacing must be a positive number", "spacing"),
    ("ply", 'sheetview mesh v1 [1, 2]', "expected a JSON object", "sheetview"),
    ("obj", 'sheetview mesh v2 {}', "newer than this sheetview reads", "sheetview"),
    ("off", 'sheetview mesh v1 {"units": "furlong"}', "unknown units", "units"),
    ("ply", 'sheetview mesh v1 {"domain": {"shape": "cube"}}', "domain", "domain"),
    ("obj", 'sheetview mesh v1 {"domain": {"shape": "sphere", "center": [0, 0], "radius": 2}, '
            '"domain_inferred": false}', "sphere center", "domain"),
    ("ply", 'sheetview mesh v1 {"domain": {"shape": "box", "min": [0, 0, 0], "max": [1, 1, 1]}, '
            '"domain_inferred": "yes"}', "true or false", "domain_inferred"),
    ("vtp", '{"domain": {"shape": "sphere", "center": [0, 0, 0], "radius": -2}}', "radius",
     "domain"),
    ("vtk", "not json at all", "not valid JSON", "sheetview"),
    ("vtp", np.array([1.0, 2.0]), "expected one JSON text", "sheetview"),
    ("vtp", '{"format": "sheetview mesh v1", "metadata": [1]}', "metadata must be a JSON object",
     "metadata"),
    ("glb", '{"format": "sheetview mesh v1", "domain": {"shape": "box", "min": [0, 0, 0]}}',
     "a box needs", "domain"),
]


@pytest.mark.parametrize("fmt,payload,words,field", DAMAGED)
def test_damaged_sheetview_header_is_refused_with_file_line_and_key(tmp_path, fmt, payload, words, field):
    """A header that is sheetview's but damaged is refused (not silently replaced by a
    bounding box), naming the file, the line for text formats and the key, and saying how
    to read the mesh anyway. Reference for the file layouts: the PLY, OBJ and OFF headers
    as written by trimesh and sheetview, VTK field data written by pyvista, the GLB chunk
    layout of the glTF 2.0 specification."""
    p, line = _damage(tmp_path, fmt, payload)
    before = p.read_bytes()
    with pytest.raises(InputError) as ei:
        sv.read(p)
    msg = str(ei.value)
    assert msg.startswith(str(p)), msg
    assert words in msg, msg
    assert ei.value.field == field, msg
    assert ei.value.line == line, msg
    if "newer" not in msg:
        assert "inferred domain" in msg, msg  # how to read it anyway
    assert p.read_bytes() == before  # the input is never touched


def test_damaged_header_exits_2_from_the_command_line(tmp_path):
    """`sheetview info` on a damaged header: one line on stderr, exit status 2, no traceback."""
    from click.testing import CliRunner

    from sheetview.cli import main

    p, _ = _damage(tmp_path, "obj", 'sheetview mesh v1 {"domain": 5}')
    r = CliRunner().invoke(main, ["info", str(p)])
    assert r.exit_code == 2, r.output
    assert "Traceback" not in r.output and str(p) in r.output and "domain" in r.output
