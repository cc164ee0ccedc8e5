"""Tests of the viewer: meshes, colourings, sections, off-screen pictures, contact sheets,
export and the window callbacks (all without a display)."""
import math

import numpy as np
import pytest

from sheetview import Box, Sphere, Structure
from sheetview.grid import GEL, INTERLAYER, SOLID, PhaseGrid
from sheetview import view as V
from sheetview.errors import OptionError, OutputExistsError, SheetviewError

pv = pytest.importorskip("pyvista")
pv.OFF_SCREEN = True

REPEAT = 1.4
THICK = 0.7


# ------------------------------------------------------------------------ fixtures
def patch_stack(n_layers, *, half=3, edge=1.0, centre=(0.0, 0.0, 0.0), repeat=REPEAT):
    """Own fixture: a planar patch of equilateral triangles (edge ``edge`` nm) in a
    rhombus of ``2*half`` x ``2*half`` lattice cells, copied ``n_layers`` times along
    +z at ``repeat`` nm, centred on ``centre``. Returns (vertices, layer index)."""
    h = edge * math.sqrt(3) / 2
    tris = []
    for i in range(-half, half):
        for j in range(-half, half):
            o = np.array([i * edge + j * edge / 2, j * h, 0.0])
            tris.append([o, o + [edge, 0, 0], o + [edge / 2, h, 0]])
            tris.append([o + [edge, 0, 0], o + [1.5 * edge, h, 0], o + [edge / 2, h, 0]])
    t = np.array(tris)
    t[..., :2] -= t[..., :2].reshape(-1, 2).mean(axis=0)
    layers = []
    for k in range(n_layers):
        lay = t.copy()
        lay[..., 2] += (k - (n_layers - 1) / 2) * repeat
        layers.append(lay)
    v = np.concatenate(layers) + np.asarray(centre)
    lid = np.repeat(np.arange(n_layers), len(t))
    return v, lid


def make_structure(vertices, domain=None, columns=None):
    v = np.asarray(vertices, float)
    if domain is None:
        lo = v.reshape(-1, 3).min(axis=0) - 2 * REPEAT
        hi = v.reshape(-1, 3).max(axis=0) + 2 * REPEAT
        domain = Box(tuple(lo), tuple(hi))
    return Structure(v, np.full(len(v), THICK), domain, REPEAT, columns or {})


@pytest.fixture(scope="module")
def stack4():
    v, lid = patch_stack(4)
    return make_structure(v, columns={"tag": lid, "born": lid * 2.0})


@pytest.fixture(scope="module")
def grid4(stack4):
    return V.phase_grid(stack4, 0.1)


def hand_grid(n_layers=3, voxel=0.1):
    """A PhaseGrid drawn directly with numpy: solid slabs 0.7 nm thick every 1.4 nm
    along z inside |x|, |y| < 3 nm, gel elsewhere; independent of the rasterizer."""
    n = (80, 80, 80)
    origin = np.array([-4.0, -4.0, -4.0])
    c = -4.0 + (np.arange(80) + 0.5) * voxel
    X, Y, Z = np.meshgrid(c, c, c, indexing="ij")
    lab = np.full(n, GEL, np.uint8)
    inside = (np.abs(X) < 3) & (np.abs(Y) < 3)
    for k in range(n_layers):
        z0 = (k - (n_layers - 1) / 2) * REPEAT
        lab[inside & (np.abs(Z - z0) <= THICK / 2)] = SOLID
    return PhaseGrid(lab, voxel, tuple(origin))


def runs(mask):
    """Number of runs of True in a 1D boolean array."""
    m = np.asarray(mask, bool).astype(np.int8)
    return int(np.sum(np.diff(np.concatenate([[0], m])) == 1))


def close_to(img, colour, tol=3):
    ref = np.round(np.asarray(colour[:3]) * 255)
    return np.all(np.abs(img.astype(int) - ref) <= tol, axis=-1)


# ---------------------------------------------------------------------------- meshes
def test_prism_mesh_closed_and_volume(stack4):
    """The merged mesh holds 6 points and 5 closed cells per prism; its enclosed volume,
    from VTK's vtkMassProperties (divergence theorem; Alyassin et al., Med. Phys. 21
    (1994) 1871), equals the sum of area x thickness (rel. 1e-5, float32 points)."""
    m = V.prism_mesh(stack4, np.arange(len(stack4)))
    n = len(stack4)
    assert m.n_points == 6 * n and m.n_cells == 5 * n
    assert m.n_open_edges == 0
    vol = m.triangulate().volume
    assert vol == pytest.approx(stack4.volumes.sum(), rel=1e-5)
    # every cell carries its prism's value
    assert np.array_equal(m.cell_data["value"], np.repeat(np.arange(n), 5))
    # outward winding: normals of the bottom and top faces point down and up
    nrm = m.cell_normals[:2]
    assert nrm[0, 2] == pytest.approx(-1, abs=1e-6) and nrm[1, 2] == pytest.approx(1, abs=1e-6)


def test_prism_faces_match_pyvista_merge():
    """The vectorised faces give the same cells as merging per-prism meshes one by one
    with pyvista (reference library), here for 3 random prisms."""
    rng = np.random.default_rng(1)
    v = rng.normal(0, 1, (3, 3, 3))
    s = make_structure(v)
    fast = V.prism_mesh(s)
    corners = s.prism_corners()
    one = [pv.PolyData(corners[i], faces=V.prism_faces(1)) for i in range(3)]
    merged = pv.merge(one, merge_points=False)
    assert merged.n_cells == fast.n_cells
    assert merged.triangulate().volume == pytest.approx(fast.triangulate().volume, rel=1e-5)


# ------------------------------------------------------------------------ colourings
def test_wall_and_director_angles():
    """Angle to the wall and to the director, by their closed forms: in a sphere of
    radius 10 nm, a prism at (5, 0, 0) with normal x lies flat against the wall (0 deg)
    and one with normal z stands on edge (90 deg); prisms tilted by +-30 deg about x
    around a majority along z have, by symmetry, the director z and angles 0 / 30 deg
    (derived; tolerance 1e-6 deg)."""
    def tri(normal, at):
        n = np.asarray(normal, float)
        n /= np.linalg.norm(n)
        u = np.cross(n, [0.3, 0.5, 0.7])
        u /= np.linalg.norm(u)
        w = np.cross(n, u)
        return np.asarray(at) + np.array([u, -0.5 * u + 0.866 * w, -0.5 * u - 0.866 * w])

    t30 = math.radians(30)
    v = [tri((1, 0, 0), (5, 0, 0)), tri((0, 0, 1), (5, 0, 0))]
    v += [tri((0, 0, 1), (0, k, 0)) for k in range(-3, 4)]
    v += [tri((0, math.sin(t30), math.cos(t30)), (0, 0, 2)),
          tri((0, -math.sin(t30), math.cos(t30)), (0, 0, -2))]
    s = make_structure(np.array(v), domain=Sphere((0, 0, 0), 10.0))
    wall = V.scalars_for(s, "wall")
    assert wall.unit == "deg" and wall.kind == "continuous"
    assert wall.values[0] == pytest.approx(0, abs=1e-6)
    assert wall.values[1] == pytest.approx(90, abs=1e-6)
    d = V.scalars_for(s, "director").values
    assert np.allclose(d[2:9], 0, atol=1e-6)
    assert np.allclose(d[9:], 30, atol=1e-6)


def test_columns_colourings_and_errors(stack4):
    """born and tag come from the columns; a missing column or an unknown colouring is
    refused with a message naming it (common practice)."""
    b = V.scalars_for(stack4, "born")
    assert np.array_equal(b.values, stack4.columns["born"])
    s = make_structure(stack4.vertices)
    with pytest.raises(OptionError, match="'born' column"):
        V.scalars_for(s, "born")
    with pytest.raises(OptionError, match="unknown colouring"):
        V.scalars_for(s, "rainbow")
    assert "born" not in V.available_colourings(s)
    per = make_structure(stack4.vertices, domain=Box((-9, -9, -9), (9, 9, 9), periodic=True))
    assert "wall" not in V.available_colourings(per)
    with pytest.raises(OptionError, match="no walls"):
        V.scalars_for(per, "wall")


def test_group_palette_distinct_then_cycled():
    """Up to 7 groups get 7 distinct palette colours listed in the legend; more groups
    cycle through the palette (Okabe & Ito, Color Universal Design, 2008)."""
    few = V.display_of(V.Colouring(np.array([4, 9, 4, 2]), "tag", "", "group"))
    assert len(few.legend) == 3 and np.array_equal(few.scalars, [1, 2, 1, 0])
    many = V.display_of(V.Colouring(np.arange(20), "stack", "", "group"))
    assert many.legend == [] and many.scalars.max() == 6
    assert np.array_equal(many.scalars[:14], np.tile(np.arange(7), 2))
    assert len({tuple(c) for c in many.colours}) == 7


# -------------------------------------------------------------------------- sections
def test_sample_section_nearest_voxel():
    """Nearest-voxel lookup on an axis plane returns exactly that voxel layer of the
    label array, and an oblique plane agrees with direct indexing at its pixel centres
    (common practice: floor((p - origin) / spacing))."""
    g = hand_grid()
    k = 47
    z = g.axis_centers(2)[k]
    sec = V.sample_section(g, (0, 0, z), (0, 0, 1))
    assert np.array_equal(sec.labels, g.labels[:, :, k])
    sec = V.sample_section(g, (0.1, -0.2, 0.3), (0.2, 0.5, 1.0), max_pixels=120)
    a = np.arange(0, sec.labels.shape[0], 7)
    b = np.arange(0, sec.labels.shape[1], 5)
    A, B = np.meshgrid(a, b, indexing="ij")
    p = sec.point(A, B)
    idx = np.floor((p - np.asarray(g.origin)) / np.asarray(g.spacing)).astype(int)
    ok = np.all((idx >= 0) & (idx < 80), axis=-1)
    want = g.labels[idx[ok][:, 0], idx[ok][:, 1], idx[ok][:, 2]]
    assert np.array_equal(sec.labels[A[ok], B[ok]], want)
    assert np.all(sec.labels[A[~ok], B[~ok]] == sec.OFF_GRID)


def test_contact_sheet_counts_bands(tmp_path):
    """A contact-sheet panel of a vertical section through 3 solid slabs 1.4 nm apart
    crosses 3 solid bands, whose centres lie one repeat apart (within one voxel):
    a plane across a stack of n layers cuts each layer once (common practice)."""
    from matplotlib.image import imread

    g = hand_grid(3)
    out = tmp_path / "sheet.png"
    lay = V.contact_sheet(g, out, axis="y", count=1, panel_px=300)
    img = (imread(str(out))[..., :3] * 255).round().astype(np.uint8)
    r0, r1, c0, c1 = lay.boxes[0]
    col = img[r0 + 2:r1 - 2, (c0 + c1) // 2]
    solid = close_to(col, V.colour_rgb(V.PHASE_COLOURS[SOLID]), tol=2)
    assert runs(solid) == 3
    rows = np.flatnonzero(solid)
    starts = np.flatnonzero(np.diff(np.concatenate([[0], solid.astype(int)])) == 1)
    ends = np.flatnonzero(np.diff(np.concatenate([solid.astype(int), [0]])) == -1)
    centres = (starts + ends) / 2
    px_per_nm = (r1 - r0) / (lay.extent[3] - lay.extent[2])
    assert np.diff(centres) == pytest.approx([REPEAT * px_per_nm] * 2, abs=0.1 * px_per_nm + 1)
    assert len(rows) > 0 and lay.positions[0] == pytest.approx(g.axis_centers(1)[40])
    with pytest.raises(OutputExistsError):
        V.contact_sheet(g, out, axis="y", count=1)
    with pytest.raises(OptionError, match="count"):
        V.contact_sheet(g, tmp_path / "b.png", count=0)


def test_render_section_crosses_n_bands(stack4, grid4, tmp_path):
    """Off-screen render of the cut of a perfect stack of 4 layers, seen face on: a line
    across the layers crosses 4 solid bands (common practice: one per layer) and 3
    interlayer bands (the gaps of the 3 stacked pairs; derived from the definition of the
    interlayer class in sheetview.measures.phases)."""
    img = V.render(stack4, tmp_path / "cut.png", plane=((0, 0, 0), (1, 0, 0)), grid=grid4,
                   camera="+x", size=(300, 300), lighting=False, decorations=False)
    assert (tmp_path / "cut.png").exists()
    col = img[:, 150]
    assert runs(close_to(col, V.colour_rgb(V.PHASE_COLOURS[SOLID]), tol=2)) == 4
    assert runs(close_to(col, V.colour_rgb(V.PHASE_COLOURS[INTERLAYER]), tol=2)) == 3
    # the pore around the stack is drawn (blended) too: no background inside the domain
    assert not close_to(col[140:160], V.colour_rgb(V.BACKGROUND), tol=0).any()


def test_render_stacking_number_colours(tmp_path):
    """Two separated stacks of 2 and 5 layers, coloured by stacking number and seen from
    above with flat colours: the pixel over each stack is viridis((n - 1) / (5 - 1)),
    as matplotlib computes it (reference library), within 3/255 per channel."""
    import matplotlib

    va, _ = patch_stack(2, centre=(-6.0, 0, 0))
    vb, _ = patch_stack(5, centre=(6.0, 0, 0))
    s = make_structure(np.concatenate([va, vb]))
    cache = {}
    sn = V.scalars_for(s, "stacking", cache).values
    assert set(np.unique(sn[: len(va)])) == {2} and set(np.unique(sn[len(va):])) == {5}
    W = H = 300
    scene = V.Scene(s, colour_by="stacking", section=False, lighting=False,
                    decorations=False, cache=cache)
    img = V.render(s, None, camera="+z", size=(W, H), scene=scene)
    lo, hi = (np.asarray(b) for b in s.domain.bounds)
    c = 0.5 * (lo + hi)
    half = 1.04 * max((hi - lo)[1] / 2, (hi - lo)[0] / 2 / (W / H))
    cmap = matplotlib.colormaps["viridis"]
    for x, n in ((-6.0, 2), (6.0, 5)):
        col = int(W / 2 + (x - c[0]) / half * H / 2)
        row = int(H / 2 - (0.0 - c[1]) / half * H / 2)
        got = img[row - 2:row + 3, col - 2:col + 3].reshape(-1, 3).astype(int)
        want = np.round(np.asarray(cmap((n - 1) / 4))[:3] * 255)
        assert np.all(np.abs(got - want) <= 3), (n, got[0], want)


# --------------------------------------------------------------------------- scene
def test_step_plane_moves_section(stack4, grid4):
    """Stepping the cut by half a repeat (0.7 nm) moves its origin by exactly that along
    the normal, and the point on the stack's axis goes from a sheet (solid) to the gap
    between sheets (interlayer) and back to the next sheet (derived from the
    construction: layers at (j - 1.5) * 1.4 nm); above the top sheet it is gel pore."""
    z0 = -0.5 * REPEAT  # mid-plane of layer 1
    sc = V.Scene(stack4, grid=grid4, plane=((0, 0, z0), (0, 0, 1)), step=0.5 * REPEAT,
                 colour_by="tag")

    def centre_phase():
        sec = sc.section
        a = int(round(-sec.u0 / sec.pixel - 0.5))
        b = int(round(-sec.v0 / sec.pixel - 0.5))
        return sec.labels[a, b]

    assert centre_phase() == SOLID
    o = sc.step_plane(+1)
    assert o == pytest.approx([0, 0, z0 + 0.7], abs=1e-12)
    assert centre_phase() == INTERLAYER
    sc.step_plane(+1)
    assert sc.plane_origin[2] == pytest.approx(z0 + 1.4)
    assert centre_phase() == SOLID
    for _ in range(3):
        sc.step_plane(+1)
    assert sc.plane_origin[2] == pytest.approx(z0 + 3.5)  # half a repeat above the top sheet
    assert centre_phase() == GEL
    for _ in range(5):
        sc.step_plane(-1)
    assert sc.plane_origin[2] == pytest.approx(z0)
    sc.face_axis(0)
    assert np.array_equal(sc.plane_normal, [1, 0, 0])
    assert runs(sc.section.labels[sc.section.labels.shape[0] // 2] == SOLID) == 4


def test_callbacks_without_window(stack4, grid4):
    """Colouring, phase, outline, cut and pick callbacks change the scene's state without
    a window; the picked stack's figures agree with the stacking measure."""
    from sheetview.measures.stacking import stacking

    sc = V.Scene(stack4, grid=grid4, colour_by="stacking")
    keys = V.available_colourings(stack4)
    seen = [sc.next_colouring() for _ in keys]
    assert seen[-1] == "stacking" and sorted(seen) == sorted(keys)
    assert sc.colour_by == "stacking"
    assert sc.toggle_phase(GEL) is False and GEL not in sc.visible_phases
    assert sc.toggle_phase(GEL) is True
    assert sc.toggle_outline() is False and sc.toggle_outline() is True
    assert sc.toggle_section() is False and sc.toggle_section() is True
    text = sc.pick_prism(5)
    ref = stacking(stack4)
    k = ref.stack[5]
    assert f"{ref.stacks['layers'][k]} layers" in text and "4 layers" in text
    f = sc.stack_figures(5)
    assert f["lateral_diameter"] == pytest.approx(ref.stacks["lateral_diameter"][k])
    assert sc.pick_prism(None) == "" and sc.picked is None
    with pytest.raises(OptionError):
        sc.stack_figures(len(stack4))
    with pytest.raises(SheetviewError, match="not drawn"):
        sc.save_screenshot()


def test_attached_scene_screenshot(stack4, grid4, tmp_path, monkeypatch):
    """Callbacks on a drawn (off-screen) scene: switching colouring and saving a picture
    writes a PNG with the next free number."""
    monkeypatch.chdir(tmp_path)
    sc = V.Scene(stack4, grid=grid4, colour_by="stacking", screenshot_stem="st")
    p = pv.Plotter(off_screen=True, window_size=(200, 160))
    try:
        sc.attach(p)
        sc.camera("iso", (200, 160))
        sc.next_colouring()
        sc.step_plane(+1)
        assert "prisms" in p.actors and "section" in p.actors
        first = sc.save_screenshot()
        sc.toggle_phase(GEL)
        sc.toggle_phase(INTERLAYER)  # the cut lies between sheets: nothing left to draw
        assert "section" not in p.actors
        second = sc.save_screenshot()
        assert first.name == "st_view_001.png" and second.name == "st_view_002.png"
        sc.pick_prism(0)
        assert sc.pick_at(100, 80) in (None,) + tuple(range(len(stack4)))
    finally:
        sc.plotter = None
        p.close()


# --------------------------------------------------------------------------- export
def test_export_arrays_and_grid(stack4, grid4, tmp_path):
    """Exported prisms carry the computed per-prism arrays (read back with pyvista, a
    reference library) and the grid round-trips through sheetview.io.read."""
    import sheetview as sv

    paths = V.export(stack4, tmp_path, grid=grid4, stem="s4")
    assert [p.name for p in paths] == ["s4_prisms.vtp", "s4_phases.vti"]
    m = pv.read(paths[0])
    sn = V.scalars_for(stack4, "stacking").values
    assert np.array_equal(m.cell_data["stacking_number"][::5], sn)
    for name in ("stack", "local_order", "director_angle", "wall_angle", "tag", "born"):
        assert name in m.cell_data, name
    g = sv.read(paths[1])
    assert np.array_equal(g.labels, grid4.labels)
    with pytest.raises(OutputExistsError):
        V.export(stack4, tmp_path, grid=grid4, stem="s4")


# ------------------------------------------------------------------------------ CLI
def _group(*cmds):
    from sheetview.cli import _Group

    g = _Group("t")
    for c in cmds:
        g.add_command(c)
    return g


@pytest.fixture(scope="module")
def stack_file(tmp_path_factory, stack4):
    import sheetview as sv
    p = tmp_path_factory.mktemp("v") / "stack.npz"
    sv.write(stack4, p)
    return p


def test_cli_render_and_slices(stack_file, tmp_path):
    """render and slices write PNGs without a display; refusing to overwrite exits 2."""
    from click.testing import CliRunner
    from matplotlib.image import imread

    from sheetview.cli.view import render, slices

    g = _group(render, slices)
    r = CliRunner()
    out = tmp_path / "r.png"
    res = r.invoke(g, ["render", str(stack_file), "-o", str(out), "--size", "240x180",
                       "--axis", "y", "--voxel", "0.15", "--colour-by", "stack",
                       "--export", str(tmp_path)])
    assert res.exit_code == 0, res.output
    assert imread(str(out)).shape[:2] == (180, 240)
    assert (tmp_path / "stack_prisms.vtp").exists() and (tmp_path / "stack_phases.vti").exists()
    res = r.invoke(g, ["render", str(stack_file), "-o", str(out)])
    assert res.exit_code == 2 and "already exists" in res.output
    res = r.invoke(g, ["render", str(stack_file), "-o", str(tmp_path / "x.png"), "--size", "big"])
    assert res.exit_code == 2 and "WIDTHxHEIGHT" in res.output
    res = r.invoke(g, ["render", str(stack_file), "-o", str(tmp_path / "y.png"),
                       "--at", "3"])
    assert res.exit_code == 2 and "--at needs --axis" in res.output
    sheet = tmp_path / "s.png"
    res = r.invoke(g, ["slices", str(stack_file), "-o", str(sheet), "--axis", "x",
                       "--count", "4", "--voxel", "0.15"])
    assert res.exit_code == 0, res.output
    assert sheet.exists()
    res = r.invoke(g, ["slices", str(stack_file), "-o", str(tmp_path / "t.png"), "--count", "0",
                       "--voxel", "0.15"])
    assert res.exit_code == 2 and "--count" in res.output


def test_cli_view_without_display(stack_file, monkeypatch):
    """Without a display, view exits 2 and points to render and slices."""
    from click.testing import CliRunner

    from sheetview.cli.view import view

    monkeypatch.delenv("DISPLAY", raising=False)
    monkeypatch.delenv("WAYLAND_DISPLAY", raising=False)
    res = CliRunner().invoke(_group(view), ["view", str(stack_file)])
    assert res.exit_code == 2
    assert "sheetview render" in res.output and "sheetview slices" in res.output


def test_pick_at_finds_the_top_prism(stack4):
    """Picking at the window centre of a view from +z returns a prism of the top layer
    whose triangle contains the stack's axis (a VTK cell picker, reference library; the
    cell -> prism map is 5 cells per prism)."""
    sc = V.Scene(stack4, section=False, colour_by="tag", decorations=False)
    p = pv.Plotter(off_screen=True, window_size=(201, 201))
    try:
        sc.attach(p)
        sc.camera("+z", (201, 201))
        p.render()
        k = sc.pick_at(100.5, 100.5)
    finally:
        sc.plotter = None
        p.close()
    assert k is not None
    assert stack4.centroids[k, 2] == pytest.approx(stack4.centroids[:, 2].max())
    assert np.linalg.norm(stack4.centroids[k, :2]) < 1.0  # one triangle edge
    assert "prism %d in stack" % k in sc.panel_text


class FakePlotter:
    """Records what bind_keys registers (no window)."""

    def __init__(self):
        self.keys, self.texts, self.clicks, self.widget = {}, {}, [], None

    def add_key_event(self, key, fn):
        self.keys[key] = fn

    def add_plane_widget(self, callback, **kw):
        self.widget_cb = callback
        return None

    def track_click_position(self, callback, **kw):
        self.clicks.append(callback)

    def add_text(self, text, **kw):
        self.texts[kw.get("name")] = text


def test_key_bindings_call_scene_methods(stack4, grid4):
    """Each bound key calls its scene method: '.' and ',' step the cut, 'n' changes the
    colouring, '2' hides the interlayer, 'o' the outline, 'z' turns the cut; the plane
    widget's callback moves the cut."""
    sc = V.Scene(stack4, grid=grid4, plane=((0, 0, 0), (1, 0, 0)), step=0.5)
    fp = FakePlotter()
    sc.bind_keys(fp)
    sc.plotter = None  # bind_keys does not attach; the methods run on the state alone
    assert set(fp.keys) == set(V.KEYS) and "right click" in fp.texts["help"]
    fp.keys["period"]()
    assert sc.plane_origin[0] == pytest.approx(0.5)
    fp.keys["comma"]()
    fp.keys["comma"]()
    assert sc.plane_origin[0] == pytest.approx(-0.5)
    before = sc.colour_by
    fp.keys["n"]()
    assert sc.colour_by != before
    fp.keys["2"]()
    assert INTERLAYER not in sc.visible_phases
    fp.keys["o"]()
    assert sc.outline_on is False
    fp.keys["z"]()
    assert np.array_equal(sc.plane_normal, [0, 0, 1])
    fp.widget_cb((0, 1, 0), (1.0, 2.0, 3.0))
    assert np.array_equal(sc.plane_normal, [0, 1, 0]) and sc.plane_origin[1] == 2.0


def test_cli_volume_files(tmp_path):
    """A voxel volume is drawn by slices as read; render refuses it (exit 2) and points
    to slices."""
    from click.testing import CliRunner

    import sheetview as sv
    from sheetview.cli.view import render, slices

    vol = tmp_path / "g.vti"
    sv.write(hand_grid(2), vol)
    g = _group(render, slices)
    r = CliRunner()
    res = r.invoke(g, ["slices", str(vol), "-o", str(tmp_path / "s.png"), "--axis", "y",
                       "--count", "2"])
    assert res.exit_code == 0, res.output
    res = r.invoke(g, ["slices", str(vol), "-o", str(tmp_path / "t.png"), "--voxel", "0.2"])
    assert res.exit_code == 2 and "--voxel" in res.output
    res = r.invoke(g, ["render", str(vol), "-o", str(tmp_path / "r.png")])
    assert res.exit_code == 2 and "sheetview slices" in res.output


def test_view_voxel_size_caps_the_grid(stack4):
    """The viewer's default voxel is the rasterizer's default for a small domain, and is
    coarsened so that a large domain's box holds at most VIEW_MAX_VOXELS voxels."""
    from sheetview.grid import default_voxel_size

    assert V.view_voxel_size(stack4) == pytest.approx(default_voxel_size(stack4))
    big = make_structure(stack4.vertices, domain=Box((0, 0, 0), (500, 400, 300)))
    v = V.view_voxel_size(big)
    assert v > default_voxel_size(big)
    assert 500 * 400 * 300 / v ** 3 <= V.VIEW_MAX_VOXELS
    assert 500 * 400 * 300 / (0.99 * v) ** 3 > V.VIEW_MAX_VOXELS * 0.97


WINDOW_SCRIPT = r"""
import sys
import pyvista as pv
import sheetview as sv
from sheetview import view
s = sv.read(sys.argv[1])
scene = view.Scene(s)
view.check_display()
p = pv.Plotter(window_size=(400, 300), title="sheetview")
scene.attach(p)
scene.bind_keys(p)
p.show(interactive_update=True, auto_close=False)
before = scene.colour_by
iren = p.iren.interactor
iren.SetKeySym("n")
iren.SetKeyCode("n")
iren.InvokeEvent("KeyPressEvent")
iren.InvokeEvent("CharEvent")
p.update()
img = p.screenshot()
print(before, scene.colour_by, img.shape[0], img.shape[1], int(img.std() > 1))
p.close()
"""


def test_real_window_under_a_virtual_display(tmp_path, sample_csv):
    """The interactive window opens on a real (virtual, Xvfb) display, draws, and a key
    press reaches the scene. Skipped where Xvfb is not installed."""
    import shutil
    import subprocess
    import sys
    if shutil.which("xvfb-run") is None:
        pytest.skip("xvfb-run is not installed")
    script = tmp_path / "win.py"
    script.write_text(WINDOW_SCRIPT)
    r = subprocess.run(["xvfb-run", "-a", "-s", "-screen 0 800x600x24", sys.executable,
                        str(script), str(sample_csv)], capture_output=True, text=True,
                       timeout=120)
    assert r.returncode == 0, r.stderr
    before, after, h, w, varied = r.stdout.split()[-5:]
    assert before != after  # the "next colouring" key changed the colouring
    assert (int(h), int(w)) == (300, 400) and varied == "1"
