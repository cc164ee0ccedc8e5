"""Particle tables (sheetview.io.particles) and the ParticleSet core type
(sheetview.particles): round trips, bad input named by file, row and column, mixed tables
refused, the measure path (grid measures run, stacking and order refused as not applicable)."""
from __future__ import annotations

import numpy as np
import pytest

import sheetview as sv
from sheetview.domain import Box, Sphere
from sheetview.errors import InputError, OptionError
from sheetview.io.particles import is_particle_table, write_table
from sheetview.particles import ParticleSet, random_quaternions


def _ellipsoids(n=20, seed=0, periodic=True):
    rng = np.random.default_rng(seed)
    return ParticleSet(rng.uniform(2, 18, (n, 3)), rng.uniform(0.5, 1.5, (n, 3)),
                       random_quaternions(n, seed), Box((0, 0, 0), (20, 20, 20), periodic),
                       columns={"tag": np.arange(n)})


def _spheres(n=20, seed=0):
    rng = np.random.default_rng(seed)
    return ParticleSet(rng.uniform(2, 18, (n, 3)), rng.uniform(0.5, 1.5, n), [1.0, 0, 0, 0],
                       Sphere((10, 10, 10), 12), kind="spheres")


@pytest.mark.parametrize("suffix", [".csv", ".npz", ".parquet"])
@pytest.mark.parametrize("make", [_ellipsoids, _spheres])
def test_round_trip(tmp_path, suffix, make):
    ps = make()
    path = tmp_path / f"p{suffix}"
    sv.write(ps, path)
    assert is_particle_table(path)
    back = sv.read(path)
    assert isinstance(back, ParticleSet) and back.kind == ps.kind
    assert np.array_equal(back.centers, ps.centers)
    assert np.array_equal(back.semi_axes, ps.semi_axes)
    assert np.allclose(back.matrices, ps.matrices, atol=1e-15)
    assert back.domain == ps.domain
    assert set(back.columns) == set(ps.columns)
    with pytest.raises(Exception, match="exists"):
        sv.write(ps, path)


def test_arrays_are_read_only_and_prism_tables_are_not_particle_tables():
    ps = _ellipsoids()
    for a in (ps.centers, ps.semi_axes, ps.rotations, ps.volumes, ps.surfaces):
        assert not a.flags.writeable
    assert not is_particle_table("sample_structures/single_stack.csv")


def _csv(tmp_path, text, name="t.csv"):
    p = tmp_path / name
    p.write_text(text)
    return p


@pytest.mark.parametrize("body, words", [
    ("x,y,z,radius\n0,0,0,1\n1,1,1,nan\n", ["line 3", "'radius'", "finite"]),
    ("x,y,z,radius\n0,0,0,1\n1,1,1,-2\n", ["line 3", "'radius'", "positive"]),
    ("x,y,z,radius\n0,0,0,1\n1,1,1,0\n", ["line 3", "'radius'", "positive"]),
    ("x,y,z,a,b,c\n0,0,0,1,1,0\n", ["line 2", "'c'", "positive"]),
    ("x,y,z,a,b,c,qw,qx,qy,qz\n0,0,0,1,1,1,2,0,0,0\n", ["line 2", "unit quaternion"]),
    ("x,y,z,a,b,c,qw\n0,0,0,1,1,1,1\n", ["all four quaternion"]),
    ("x,y,z\n0,0,0\n", ["missing column"]),
    ("x,y,z,Radius\n0,0,0,1\n", ["did you mean 'radius'"]),
    ("x,y,z,radius\n0,0,0,abc\n", ["'radius'", "not a number"]),
    ("x,y,z,radius,ax,ay,az,bx,by,bz,cx,cy,cz\n" + "0," * 12 + "0\n",
     ["mixes particle columns", "prism columns"]),
    ("x,y,z,radius,a\n0,0,0,1,1\n", ["spheres"]),
    ("x,y,z,a,layers\n0,0,0,3,0\n", ["'layers'", "whole number"]),
    ("x,y,z,a,layers\n0,0,0,3,2.5\n", ["'layers'", "whole number"]),
    ("# thickness: 1.5\nx,y,z,a,layers\n0,0,0,3,2\n", ["thickness", "less than the repeat"]),
    ('# domain: {"shape": "cube"}\nx,y,z,radius\n0,0,0,1\n', ["domain"]),
])
def test_bad_csv_names_file_and_problem(tmp_path, body, words):
    p = _csv(tmp_path, body)
    with pytest.raises(InputError) as e:
        sv.read(p)
    msg = str(e.value)
    assert str(p) in msg
    for w in words:
        assert w in msg, msg


def test_mixed_parquet_and_npz_refused(tmp_path):
    import pyarrow as pa
    import pyarrow.parquet as pq
    cols = {n: np.zeros(2) for n in ["x", "y", "z", "radius", "ax", "ay", "az", "bx", "by",
                                     "bz", "cx", "cy", "cz"]}
    pq.write_table(pa.table(cols), tmp_path / "m.parquet")
    with pytest.raises(InputError, match="mixes particle columns"):
        sv.read(tmp_path / "m.parquet")
    np.savez(tmp_path / "m.npz", header=np.array("{}"), vertices=np.zeros((2, 3, 3)),
             x=np.zeros(2), y=np.zeros(2), z=np.zeros(2), radius=np.ones(2))
    with pytest.raises(InputError, match="mixes particle columns"):
        sv.read(tmp_path / "m.npz")


def test_npz_pickle_refused(tmp_path):
    np.savez(tmp_path / "p.npz", header=np.array("{}"), x=np.array([object()], dtype=object),
             y=np.zeros(1), z=np.zeros(1), radius=np.ones(1))
    with pytest.raises(InputError, match="pickle|objects"):
        sv.read(tmp_path / "p.npz")


def test_units_and_inferred_domain(tmp_path):
    p = _csv(tmp_path, '# units: "A"\nx,y,z,radius\n0,0,0,10\n30,0,0,5\n')
    ps = sv.read(p)
    assert ps.semi_axes[0, 0] == pytest.approx(1.0) and ps.centers[1, 0] == pytest.approx(3.0)
    assert ps.domain.inferred
    lo, hi = ps.domain.bounds
    assert lo[0] == pytest.approx(-1.0 - 1.4) and hi[0] == pytest.approx(3.5 + 1.4)


def test_exact_bounds_of_a_rotated_ellipsoid():
    """Bounds against a dense sampling of the surface (points x = c + R diag(s) n)."""
    ps = ParticleSet([[1.0, 2.0, 3.0]], [[3.0, 1.0, 0.5]], random_quaternions(1, 4),
                     Box((-10, -10, -10), (10, 10, 10)))
    rng = np.random.default_rng(1)
    n = rng.normal(size=(200000, 3))
    n /= np.linalg.norm(n, axis=1, keepdims=True)
    pts = ps.centers[0] + (ps.matrices[0] @ (n * ps.semi_axes[0]).T).T
    lo, hi = ps.bounds()
    assert np.all(pts.min(axis=0) >= lo - 1e-12) and np.allclose(pts.min(axis=0), lo, atol=2e-3)
    assert np.allclose(pts.max(axis=0), hi, atol=2e-3)


def test_layered_table_reads_as_prisms(tmp_path):
    p = tmp_path / "l.csv"
    write_table({"x": [0.0, 20.0], "y": [0.0, 0.0], "z": [0.0, 0.0], "a": [3.0, 2.0],
                 "b": [3.0, 4.0], "layers": [5, 3]}, {"spacing": 1.4, "thickness": 0.7}, p)
    s = sv.read(p)
    assert isinstance(s, sv.Structure) and s.spacing == 1.4
    assert np.all(s.thickness == 0.7)
    assert set(s.columns) >= {"particle", "layer", "sheet"}
    assert len(np.unique(s.columns["sheet"])) == 8
    # each layer's polygon has the ellipse's area exactly
    per = np.bincount(s.columns["sheet"], weights=s.areas)
    assert np.allclose(per[:5], np.pi * 9) and np.allclose(per[5:], np.pi * 8)
    s2 = sv.read(p, spacing=2.0, thickness=1.0)
    assert s2.spacing == 2.0 and s2.thickness[0] == 1.0


def test_measure_path_and_not_applicable(tmp_path):
    ps = _ellipsoids(periodic=False)
    p = tmp_path / "e.parquet"
    sv.write(ps, p)
    m = sv.measure(p, voxel=0.2, lines=2000)
    assert "stacking" not in m.results and "order" not in m.results
    assert m.results["chords"].exact.method == "iur-particles"
    with pytest.raises(OptionError, match="solid particles"):
        sv.measure(p, only="order")


def test_rasterize_refuses_bad_voxel():
    ps = _ellipsoids()
    with pytest.raises(OptionError, match="voxel"):
        ps.rasterize(0.001)
    with pytest.raises(OptionError, match="voxel"):
        ps.rasterize(50.0)


def test_exact_surface_only_when_separated():
    box = Box((0, 0, 0), (10, 10, 10), periodic=True)
    apart = ParticleSet([[1, 1, 1], [5, 5, 5]], [1.0, 1.5], [1.0, 0, 0, 0], box, kind="spheres")
    assert apart.separated() is True
    assert apart.exact_surface() == pytest.approx(4 * np.pi * (1 + 2.25))
    # overlapping across the periodic face
    over = ParticleSet([[0.2, 1, 1], [9.5, 1, 1]], [1.0, 1.0], [1.0, 0, 0, 0], box,
                       kind="spheres")
    assert over.separated() is False and over.exact_surface() is None
    m = sv.measure(over, only="surface", voxel=0.2)
    assert m.results["surface"].exact["solid_surface_nm2"] is None


def test_synth_cli_particles(tmp_path):
    from click.testing import CliRunner
    from sheetview.cli import main
    out = tmp_path / "p.csv"
    r = CliRunner().invoke(main, ["synth", "--box", "10,10,10", "--periodic", "--particles",
                                  "spheres", "--radius", "fixed:1", "--target-fraction", "0.5",
                                  "--seed", "2", "-o", str(out)])
    assert r.exit_code == 0, r.output
    ps = sv.read(out)
    assert isinstance(ps, ParticleSet) and ps.separated()
    assert ps.volume_fraction() == pytest.approx(0.5, rel=0.01)
    out2 = tmp_path / "l.npz"
    r = CliRunner().invoke(main, ["synth", "--box", "20,20,20", "--periodic", "--particles",
                                  "layered", "--layers", "fixed:3", "--lateral", "fixed:4",
                                  "--seed", "2", "-o", str(out2)])
    assert r.exit_code == 0, r.output
    s = sv.read(out2)
    assert isinstance(s, sv.Structure) and len(np.unique(s.columns["particle"])) > 5


def test_pack_particles_is_seeded_and_refuses_bad_targets():
    from sheetview.synth import pack_particles
    box = Box((0, 0, 0), (10, 10, 10), periodic=True)
    a = pack_particles(box, 0.4, radius="fixed:1", seed=1)
    b = pack_particles(box, 0.4, radius="fixed:1", seed=1)
    assert np.array_equal(a.particles.centers, b.particles.centers)
    for bad in (0.0, 0.7, float("nan")):
        with pytest.raises(OptionError, match="target fraction"):
            pack_particles(box, bad)


@pytest.mark.parametrize("sample", ["sphere_packing.csv", "layered_particles.parquet"])
def test_damaged_samples_are_refused_in_one_line(tmp_path, sample):
    """Random byte flips, truncations, insertions and deletions of the bundled particle
    samples: each read gives a result or a SheetviewError naming the file in one line, never
    another exception nor the readers' catch-all."""
    import warnings
    from pathlib import Path
    from sheetview.errors import SheetviewError
    from sheetview.io import UNEXPECTED
    raw = (Path(__file__).resolve().parent.parent / "sample_structures" / sample).read_bytes()
    rng = np.random.default_rng(7)
    for k in range(60):
        b = bytearray(raw)
        m = k % 4
        i = int(rng.integers(len(b)))
        if m == 0:
            for _ in range(int(rng.integers(1, 8))):
                b[int(rng.integers(len(b)))] = int(rng.integers(256))
        elif m == 1:
            b = b[:i]
        elif m == 2:
            b[i:i] = bytes(rng.integers(0, 256, int(rng.integers(1, 30))).astype(np.uint8))
        else:
            del b[i:i + int(rng.integers(1, 50))]
        p = tmp_path / f"case{k}{Path(sample).suffix}"
        p.write_bytes(bytes(b))
        with warnings.catch_warnings():
            warnings.simplefilter("error")
            try:
                sv.read(p)
            except SheetviewError as e:
                assert str(p) in str(e) and "\n" not in str(e)
                assert UNEXPECTED not in str(e), str(e)


def test_projection_and_huge_periodic_particle():
    from sheetview.app.run import phase_grid
    from sheetview.measures.chords import exact_chords
    from sheetview.measures.sections import projection
    ps = _ellipsoids()
    img = projection(ps, grid=phase_grid(ps, None))
    # mean solid thickness through the periodic box = volume fraction x box height
    assert img.thickness[img.valid].mean() == pytest.approx(
        np.count_nonzero(phase_grid(ps).labels == 1) / phase_grid(ps).labels.size * 20, rel=1e-6)
    big = ParticleSet([[5, 5, 5]], [[25.0, 1, 1]], [1.0, 0, 0, 0],
                      Box((0, 0, 0), (20, 20, 20), periodic=True))
    with pytest.raises(OptionError, match="wider than twice the periodic box"):
        exact_chords(big, 100, seed=0)
    with pytest.raises(OptionError, match="wider than twice the periodic box"):
        big.rasterize(0.5)


def test_quaternion_convention_matches_scipy():
    """R(q) with q = (w, x, y, z) equals scipy's Rotation.from_quat((x, y, z, w))."""
    from scipy.spatial.transform import Rotation
    from sheetview.particles import quaternion_matrices
    q = random_quaternions(50, 3)
    assert np.allclose(quaternion_matrices(q), Rotation.from_quat(q[:, [1, 2, 3, 0]]).as_matrix(),
                       atol=1e-14)


@pytest.mark.parametrize("periodic", [False, True])
def test_kernel_in_bounds_and_same_voxels_as_numpy(periodic):
    """The rasterization kernel in a bounds-checked build (numba boundscheck) never leaves
    its array, for particles inside, across and beyond the grid, and marks exactly the voxel
    centres a numpy evaluation of d^T M d <= 1 finds, M from scipy's rotations."""
    import numba
    from scipy.spatial.transform import Rotation
    from sheetview.grid import GEL, OUTSIDE, grid_geometry
    from sheetview.particles import _mark_ellipsoids
    rng = np.random.default_rng(5 + periodic)
    n = 25
    box = Box((0, 0, 0), (6, 5, 4), periodic)
    c = rng.uniform(-2, 8, (n, 3))
    semi = rng.uniform(0.2, 1.6, (n, 3))
    q = random_quaternions(n, 8)
    ps = ParticleSet(c, semi, q, box)
    shape, spacing, origin = grid_geometry(box, 0.25)
    checked = numba.njit(boundscheck=True)(_mark_ellipsoids.py_func)
    lab = np.full(shape, GEL, np.uint8)
    cen = box.wrap(c) if periodic else c
    checked(np.ascontiguousarray(cen), np.ascontiguousarray(ps.shape_matrices),
            np.ascontiguousarray(ps.half_extents), np.asarray(origin), np.asarray(spacing),
            np.asarray(shape, np.int64), periodic, lab, np.uint8(1), np.uint8(OUTSIDE))
    R = Rotation.from_quat(q[:, [1, 2, 3, 0]]).as_matrix()
    M = np.einsum("nik,nk,njk->nij", R, semi ** -2.0, R)
    pts = np.stack(np.meshgrid(*[origin[a] + (np.arange(shape[a]) + 0.5) * spacing[a]
                                 for a in range(3)], indexing="ij"), axis=-1).reshape(-1, 3)
    inside = np.zeros(len(pts), bool)
    for i in range(n):
        d = pts - c[i]
        if periodic:
            d = box.minimum_image(d)
        inside |= np.einsum("pi,ij,pj->p", d, M[i], d) <= 1
    assert np.array_equal(lab.reshape(-1) == 1, inside)
    fast = ps.rasterize(0.25)
    assert np.array_equal(fast.labels.reshape(-1) == 1, inside)


def test_sheet_options_refused_for_solid_particles(tmp_path):
    p = _csv(tmp_path, "x,y,z,radius\n0,0,0,1\n")
    with pytest.raises(OptionError, match="does not apply to a table of spheres"):
        sv.read(p, thickness=0.5)
