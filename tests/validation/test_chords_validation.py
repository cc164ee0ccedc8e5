"""Validation of chord lengths against closed forms of integral geometry and the Boolean
model (the two-point correlation: test_correlation_validation.py)."""
import numpy as np
import pytest
import trimesh
from scipy import stats

from sheetview.domain import Box, Sphere
from sheetview.grid import GEL, OUTSIDE, SOLID, PhaseGrid, rasterize, rasterize_body
from sheetview.measures.chords import cauchy_figures, exact_chords, grid_chords, voxel_chords
from sheetview.measures.surface import minkowski_functionals
from sheetview.structure import Structure, SurfaceBody


def test_ball_chords_mesh():
    """Ball of radius R under IUR lines: CDF l^2/(4R^2) on [0, 2R] (density l/(2R^2)),
    mean 4R/3, mean square 2R^2 (Santaló, Integral Geometry and Geometric Probability,
    1976). Icosphere (trimesh, 5 subdivisions) of R = 5; KS p > 0.001, moments 1.5 %."""
    R = 5.0
    m = trimesh.creation.icosphere(subdivisions=5, radius=R)
    res = exact_chords(SurfaceBody(m.vertices, m.faces, Sphere((0, 0, 0), 6.0)), 20000, seed=11)
    L = res.chords("solid")
    assert res.n_bad_lines == 0 and L.size > 10000
    assert stats.kstest(L, lambda x: np.clip(x / (2 * R), 0, 1) ** 2).pvalue > 1e-3
    assert L.mean() == pytest.approx(4 * R / 3, rel=0.015)
    assert (L ** 2).mean() == pytest.approx(2 * R ** 2, rel=0.015)
    # Cauchy for the body (solid) and for the pore between body and wall (S includes wall)
    assert res.mean("solid", True) == pytest.approx(res.cauchy["solid"], rel=0.015)
    assert res.mean("pore", True) == pytest.approx(res.cauchy["pore"], rel=0.015)


def _polygon_stack_ball(R, n_layers=60, n_sides=96):
    """A ball approximated by stacked thin polygonal discs, each a fan of prisms whose
    radius keeps the layer's volume (a prism structure approximating a convex body)."""
    dz = 2 * R / n_layers
    z = -R + dz * (np.arange(n_layers) + 0.5)
    tris = []
    th = []
    ang = 2 * np.pi * np.arange(n_sides + 1) / n_sides
    for zk in z:
        # exact volume of the ball slice / dz = area of the disc
        a, b = zk - dz / 2, zk + dz / 2
        vol = np.pi * ((R * R * b - b ** 3 / 3) - (R * R * a - a ** 3 / 3))
        area = vol / dz
        rp = np.sqrt(2 * area / (n_sides * np.sin(2 * np.pi / n_sides)))
        for k in range(n_sides):
            tris.append([[0, 0, zk], [rp * np.cos(ang[k]), rp * np.sin(ang[k]), zk],
                         [rp * np.cos(ang[k + 1]), rp * np.sin(ang[k + 1]), zk]])
            th.append(dz)
    return np.array(tris), np.array(th)


def test_ball_chords_prism_stack():
    """Prisms approximating a ball (60 stacked polygon fans): all solid chords average to
    4V/S of the stacked body, with S its staircase surface (lateral + horizontal steps),
    within 2 % (Cauchy mean chord, Santaló 1976, which holds for non-convex bodies when
    every segment counts); the staircase surface exceeds 4 pi R^2, so the mean chord sits
    below the ball's 4R/3 -- the polyhedral body converges in volume, not in surface."""
    R, nl, ns = 5.0, 60, 96
    tri, th = _polygon_stack_ball(R, nl, ns)
    s = Structure(tri, th, Sphere((0, 0, 0), 5.5))
    res = exact_chords(s, 20000, seed=4)
    areas = s.areas.reshape(nl, ns).sum(axis=1)
    rp = np.linalg.norm(tri[::ns, 1, :2], axis=1)
    perim = ns * 2 * rp * np.sin(np.pi / ns)
    dz = th[0]
    V = areas.sum() * dz
    S = (perim * dz).sum() + areas[0] + areas[-1] + np.abs(np.diff(areas)).sum()
    assert V == pytest.approx(4 / 3 * np.pi * R ** 3, rel=0.01)
    assert res.mean("solid", True) == pytest.approx(4 * V / S, rel=0.02)


def test_prism_route_matches_mesh_route():
    """One thick prism clipped as a prism and as a closed triangle mesh (trimesh convex
    hull of its corners; Möller & Trumbore, J. Graphics Tools 2 (1997) 21) gives the same
    chords on the same lines (1e-9 nm)."""
    p = np.array([[[0, 0, 0], [3, 0, 0], [0.5, 2.5, 0]]], float)
    s = Structure(p, [1.5], Sphere((1.2, 0.8, 0), 2.8))
    hull = trimesh.convex.convex_hull(s.prism_corners()[0])
    body = SurfaceBody(hull.vertices, hull.faces, s.domain)
    a = exact_chords(s, 3000, seed=9)
    b = exact_chords(body, 3000, seed=9)
    assert b.n_bad_lines == 0
    assert np.array_equal(a.line["solid"], b.line["solid"])
    assert np.allclose(a.lengths["solid"], b.lengths["solid"], atol=1e-9)


def test_cauchy_cube_and_single_prism():
    """Cauchy mean chord 4V/S for convex bodies (Santaló 1976): a cube of side a built
    from two triangular prisms (2a/3), and one thick triangular prism; 2 %."""
    a = 4.0
    tri = np.array([[[0, 0, 2], [4, 0, 2], [0, 4, 2]], [[4, 0, 2], [4, 4, 2], [0, 4, 2]]], float)
    cube = exact_chords(Structure(tri, [a, a], Sphere((2, 2, 2), 3.5)), 20000, seed=1)
    assert cube.chords("solid").size > 10000
    assert cube.mean("solid") == pytest.approx(2 * a / 3, rel=0.02)
    p = np.array([[[0, 0, 0], [3, 0, 0], [0.5, 2.5, 0]]], float)
    t = 1.5
    area = 0.5 * abs(3 * 2.5)
    perim = 3 + np.hypot(2.5, 2.5) + np.hypot(0.5, 2.5)
    V, S = area * t, 2 * area + perim * t
    res = exact_chords(Structure(p, [t], Sphere((1.2, 0.8, 0), 2.8)), 20000, seed=2)
    assert res.mean("solid") == pytest.approx(4 * V / S, rel=0.02)


def test_slab_chords_periodic():
    """Slab of thickness t under isotropic lines: density 2t^2/l^3 for l >= t, i.e. CDF
    1 - t^2/l^2 (derived from the IUR direction weighting |cos|); realised as two prisms
    filling a periodic cell's xy face. KS distance < 0.03 (4000 lines) on the chords up to
    20 t (longer ones are cut by the finite line)."""
    t = 1.0
    tri = np.array([[[-1, -1, 5], [11, -1, 5], [-1, 11, 5]], [[11, -1, 5], [11, 11, 5], [-1, 11, 5]]],
                   float)
    box = Box((0, 0, 0), (10, 10, 10), periodic=True)
    res = exact_chords(Structure(tri, [t, t], box), 4000, seed=3, line_length=400)
    L = res.chords("solid")
    assert L.min() >= t - 1e-9 and L.size > 30000
    Lc = L[L <= 20 * t]
    # CDF of the distribution truncated at 20 t
    F = lambda x: (1 - t * t / np.maximum(x, t) ** 2) / (1 - 1 / 400)
    # chords of one line share its angle, so use the KS distance, not its p-value
    assert stats.kstest(Lc, F).statistic < 0.03


def _weighted_ks(x, w, cdf):
    """Kolmogorov-Smirnov distance between the weighted empirical CDF of x and cdf."""
    o = np.argsort(x)
    x, w = x[o], w[o] / w.sum()
    F = cdf(x)
    c = np.cumsum(w)
    return float(max(np.max(np.abs(c - F)), np.max(np.abs(c - w - F))))


def _periodic_slab_grid(normal, period, t, L, spacing, seed):
    """Periodic grid of L^3 voxels holding parallel slabs of thickness t (nm) every
    ``period`` nm along ``normal`` (a lattice direction, so that the slabs tile the cell),
    at a random offset; voxels by their centres. Returns the grid and the realised
    thickness (solid fraction x period)."""
    rng = np.random.default_rng(seed)
    n = np.asarray(normal, float)
    n /= np.linalg.norm(n)
    x = (np.arange(L) + 0.5) * spacing
    P = np.stack(np.meshgrid(x, x, x, indexing="ij"), -1)
    m = np.mod(P @ n - rng.random() * period, period) < t
    g = PhaseGrid(np.where(m, SOLID, GEL).astype(np.uint8), spacing=spacing, periodic=True)
    return g, float(m.mean() * period)


@pytest.mark.parametrize("normal,L,h,t_nom", [((0, 0, 1), 36, 0.2, 1.2), ((1, 1, 1), 36, 0.2, 1.2),
                                              ((1, 2, 2), 72, 0.1, 0.8)])
def test_voxel_slab_chord_law(normal, L, h, t_nom):
    """Slab of thickness t under isotropic lines: density 2t^2/l^3 for l >= t (CDF
    1 - t^2/l^2), derived from the IUR direction weighting |cos|; mean 2t. Voxel volume
    (periodic cell of 7.2 nm, slabs normal to an axis and to two oblique lattice
    directions, 6 to 8 voxels thick, at a random offset), default settings: isotropic
    lines through the voxel grid. t is the realised thickness (solid fraction x period):
    voxel centres quantise a slab's thickness in steps of the lattice-plane spacing along
    its normal. Uncut chords up to 20 t, weighted by 1/(line length - l) (Miles-Lantuejoul:
    a chord of length l lies wholly on a line of length T for T - l of the line
    positions); law truncated at 20 t: mean 2t (1 - 1/20)/(1 - 1/400). KS distance < 0.03,
    mean 3 % (10,000 lines; the chords of one line have one length, so the lines are the
    sample; measured KS 0.019, 0.010, 0.015, mean +0.3, +0.6, -0.2 %; a slab 4 voxels
    thick gives KS 0.027, the voxels blurring chords near l = t)."""
    period = L * h / {(0, 0, 1): 1, (1, 1, 1): np.sqrt(3), (1, 2, 2): 3}[normal]
    g, t = _periodic_slab_grid(normal, period, t_nom, L, h, seed=7)
    T = 60 * t
    res = grid_chords(g, 10000, seed=3, line_length=T)
    L = res.chords("solid")
    L = L[L <= 20 * t]
    w = 1.0 / (T - L)
    F = lambda x: (1 - t * t / np.maximum(x, t) ** 2) / (1 - 1 / 400)  # noqa: E731
    assert L.size > 20000
    assert _weighted_ks(L, w, F) < 0.03
    assert np.sum(w * L) / np.sum(w) == pytest.approx(2 * t * 0.95 / (1 - 1 / 400), rel=0.03)


def _slab_prisms(seed, t, box=10.0):
    """Two large prisms forming a slab of thickness t at a random orientation and a random
    offset from the centre of a box domain."""
    rng = np.random.default_rng(seed)
    n = rng.normal(size=3)
    n /= np.linalg.norm(n)
    a = np.cross(n, [1.0, 0, 0])
    a /= np.linalg.norm(a)
    b = np.cross(n, a)
    c = np.full(3, box / 2) + rng.random(3) - 0.5
    W = 3 * box
    tri = np.array([[c - W * a - W * b, c + W * a - W * b, c - W * a + W * b],
                    [c + W * a - W * b, c + W * a + W * b, c - W * a + W * b]])
    return Structure(tri, [t, t], Box((0, 0, 0), (box, box, box)))


@pytest.mark.parametrize("seed", [11, 12])
def test_voxel_slab_matches_exact_prisms_on_the_same_lines(seed):
    """A slab (1.3 nm, random orientation and offset) in a 10 nm box domain, as two prisms
    (exact chords) and as its voxel volume at 0.2 nm (isotropic lines through the grid,
    drawn for the same domain and seed: the same lines). Mean of all solid and all pore
    chords within 2 % of the exact ones (measured -0.3 and +0.9 %, +0.6 and +0.3 % for the
    two seeds), KS distance between the two sets of solid chords < 0.04 (measured 0.025,
    0.024): the voxel boundary follows the
    plane within a fraction of a voxel and its thickness averages out over an oblique
    plane; pore chords cut short at the box corners lose the shortest (< 2 hysteresis
    voxels) to the interpolated boundary."""
    s = _slab_prisms(seed, 1.3)
    ex = exact_chords(s, 20000, seed=5)
    vl = grid_chords(rasterize(s, 0.2), 20000, seed=5, domain=s.domain)
    for ph in ("solid", "pore"):
        assert vl.mean(ph, True) == pytest.approx(ex.mean(ph, True), rel=0.02)
    assert stats.ks_2samp(vl.lengths["solid"], ex.lengths["solid"]).statistic < 0.04
    assert ex.lengths["solid"].size > 5000


def _voxel_ball(R_vox, spacing, seed):
    rng = np.random.default_rng(seed)
    n = int(2 * R_vox + 8)
    c = (n / 2 + rng.random(3) - 0.5) * spacing
    x = (np.arange(n) + 0.5) * spacing
    X, Y, Z = np.meshgrid(x, x, x, indexing="ij")
    m = (X - c[0]) ** 2 + (Y - c[1]) ** 2 + (Z - c[2]) ** 2 <= (R_vox * spacing) ** 2
    return PhaseGrid(np.where(m, SOLID, GEL).astype(np.uint8), spacing=spacing), m


def test_voxel_ball_chord_law():
    """Ball of radius R under IUR lines: CDF l^2/(4R^2) on [0, 2R] (density l/(2R^2)),
    mean 4R/3, mean square 2R^2 (Santaló, Integral Geometry and Geometric Probability,
    1976). Voxelized ball, R = 20 voxels of 0.25 nm at a random sub-voxel centre, default
    settings (60,000 isotropic lines through the grid). KS distance < 0.025, mean 1.5 %,
    mean square 2 %: measured with 100,000 lines at R = 10, 20, 40 voxels the mean is
    +0.7 %, +0.2 %, -0.1 % off (the interpolated boundary misses some of the short chords
    of lines grazing the ball, by about 2 hysteresis voxels in depth), KS 0.011, 0.005,
    0.003. The chords of the union of voxel cubes (boundary="faces") instead average to
    4V/S of that union, S its face area (Cauchy, Santaló 1976; 2 %), 2/3 of 4R/3: the
    staircase surface is 1.5 times the ball's."""
    R_vox, h = 20, 0.25
    g, m = _voxel_ball(R_vox, h, seed=21)
    R = R_vox * h
    res = grid_chords(g, 60000, seed=8)
    L = res.chords("solid")
    assert L.size > 10000 and not res.cut["solid"].any()
    assert stats.kstest(L, lambda x: np.clip(x / (2 * R), 0, 1) ** 2).statistic < 0.025
    assert L.mean() == pytest.approx(4 * R / 3, rel=0.015)
    assert (L ** 2).mean() == pytest.approx(2 * R ** 2, rel=0.02)
    faces = grid_chords(g, 60000, seed=8, boundary="faces")
    n_faces = sum(np.count_nonzero(np.diff(np.pad(m, 1).astype(np.int8), axis=a))
                  for a in range(3))
    V, S = m.sum() * h ** 3, n_faces * h * h
    assert faces.mean("solid") == pytest.approx(4 * V / S, rel=0.02)
    assert faces.mean("solid") < 0.75 * 4 * R / 3


def test_cauchy_closed_body_in_a_box():
    """Cauchy: the mean of all chords of a phase is 4V/S with S its whole boundary, the
    box wall included (Santaló 1976). A closed mesh ball (icosphere, R = 3 nm, off
    centre) in a non-periodic 10 nm box: the grid's figures (0.1 nm voxels: voxel volume,
    Crofton interface, exact grid edge) equal the closed forms V_box - V_mesh,
    A_mesh + 6 L^2 within 1 % (measured 0.003 %); the exact chords (20,000 lines) and the
    chords of the voxel grid (the same lines) average to them within 1.5 % (measured
    solid -0.8 and -0.5 %, pore +0.5 and +0.6 %)."""
    R = 3.0
    m = trimesh.creation.icosphere(subdivisions=5, radius=R)
    body = SurfaceBody(m.vertices + [0.13, -0.21, 0.07], m.faces, Box((-5, -5, -5), (5, 5, 5)))
    g = rasterize_body(body, 0.1)
    cf = cauchy_figures(g)
    assert cf.figures["pore"] == pytest.approx(4 * (1000 - m.volume) / (m.area + 600), rel=0.01)
    assert cf.figures["solid"] == pytest.approx(4 * m.volume / m.area, rel=0.01)
    assert cf.areas["pore-grid_edge"] == pytest.approx(600)
    ex = exact_chords(body, 20000, seed=3)
    vl = grid_chords(g, 20000, seed=3, domain=body.domain)
    for ph in ("solid", "pore"):
        assert ex.mean(ph, True) == pytest.approx(cf.figures[ph], rel=0.015)
        assert vl.mean(ph, True) == pytest.approx(cf.figures[ph], rel=0.015)


@pytest.mark.parametrize("seed", [0, 1])
def test_cauchy_prisms_in_a_box(seed):
    """Cauchy (Santaló 1976) for prisms: 30 random thick prisms (1-2 nm) in a non-periodic
    10 nm box; exact chords (20,000 lines), figures from the phase grid at 0.05 nm. Pore
    (bounded by the prisms and the box wall, exact on the grid edge) within 4 %, solid
    within 6 %: the Crofton estimate of the digitised prisms' surface runs low by O(voxel)
    at their edges and depends on the orientation of their flat faces (measured, 3 seeds:
    pore -1.6 to -2.5 %, solid -2.4 to -4.1 %; at 0.1 nm -3.1 to -4.2 % and -5.5 to
    -7.2 %)."""
    rng = np.random.default_rng(seed)
    c = rng.uniform(1.5, 8.5, (30, 1, 3))
    s = Structure(c + rng.normal(0, 1.5, (30, 3, 3)), rng.uniform(1.0, 2.0, 30),
                  Box((0, 0, 0), (10, 10, 10)))
    ex = exact_chords(s, 20000, seed=2)
    cf = cauchy_figures(rasterize(s, 0.05))
    assert ex.mean("pore", True) == pytest.approx(cf.figures["pore"], rel=0.04)
    assert ex.mean("solid", True) == pytest.approx(cf.figures["solid"], rel=0.06)


def test_cauchy_wall_of_a_sphere_domain():
    """The wall of a spherical domain, as OUTSIDE voxels, counts in the pore boundary:
    a pore-only grid in a sphere (R = 4 nm, 0.1 nm voxels) gives 4V/S = 4R/3 within
    1.5 % (Cauchy; Santaló 1976) through the pore-OUTSIDE Crofton interface."""
    R, h = 4.0, 0.1
    n = int(2 * R / h) + 4
    x = (np.arange(n) + 0.5) * h - n * h / 2
    X, Y, Z = np.meshgrid(x, x, x, indexing="ij")
    lab = np.where(X ** 2 + Y ** 2 + Z ** 2 <= R * R, GEL, OUTSIDE).astype(np.uint8)
    lab[n // 2, n // 2, n // 2] = SOLID
    cf = cauchy_figures(PhaseGrid(lab, spacing=h))
    assert cf.figures["pore"] == pytest.approx(4 * R / 3, rel=0.015)
    assert cf.areas["pore-outside"] == pytest.approx(4 * np.pi * R ** 2, rel=0.015)


def boolean_balls(n, R, eta, seed):
    """Voxelised periodic Boolean model of balls (radius R voxels, Poisson centres of
    intensity eta / (4/3 pi R^3)); returns the solid mask and the realised intensity."""
    rng = np.random.default_rng(seed)
    lam = eta / (4 / 3 * np.pi * R ** 3)
    N = rng.poisson(lam * n ** 3)
    c = rng.random((N, 3)) * n
    m = np.zeros((n,) * 3, bool)
    k = int(np.ceil(R)) + 1
    off = np.arange(-k, k + 1)
    for p in c:
        ix = np.floor(p).astype(int)[:, None] + off[None, :]
        d = [(ix[a] + 0.5 - p[a]) ** 2 for a in range(3)]
        ball = d[0][:, None, None] + d[1][None, :, None] + d[2][None, None, :] <= R * R
        m[np.ix_(ix[0] % n, ix[1] % n, ix[2] % n)] |= ball
    return m, N / n ** 3


@pytest.fixture(scope="module")
def boolean_grid():
    R, eta = 8.0, 0.7
    m, lam = boolean_balls(128, R, eta, seed=1)
    g = PhaseGrid(np.where(m, SOLID, GEL).astype(np.uint8), spacing=0.5, periodic=True)
    return g, m, lam * 8.0, R * 0.5  # intensity per nm^3, radius nm


def test_boolean_porosity_surface_chords(boolean_grid):
    """Boolean model of balls: porosity exp(-eta), specific surface 4 pi R^2 lambda
    exp(-eta), exponential pore chords of mean 1/(lambda pi R^2) (Matheron, Random Sets
    and Integral Geometry, 1975; Stoyan, Kendall & Mecke, Stochastic Geometry and its
    Applications, 1995; from memory, so checked here by simulation with the realised
    intensity). 128^3 voxels, R = 8 voxels, pore chords along 20,000 isotropic random
    lines through the voxel grid (the default definition). Tolerances: porosity 2 %;
    surface 6 %; pore chord mean 8 % (measured +6.1 %: pore gaps thinner than about a
    voxel where balls nearly touch are lost -- by the voxels, which lowers the Crofton
    surface by 4.6 %, and by the hysteresis of the interpolated boundary; the bias falls
    to +2.4 % at R = 12 voxels); the mean of all pore chords agrees with the Cauchy
    figure 4V/S of the grid (Santaló 1976) within 3 % (measured +1.3 %); the axis-row
    chords (an isotropic medium: same mean) within 6 % (measured +3.1 %)."""
    g, m, lam, R = boolean_grid
    eta = lam * 4 / 3 * np.pi * R ** 3
    phi = 1 - m.mean()
    assert phi == pytest.approx(np.exp(-eta), rel=0.02)
    mf = minkowski_functionals(m, g.spacing, periodic=True)
    assert mf.densities["S_V"] == pytest.approx(4 * np.pi * R ** 2 * lam * np.exp(-eta), rel=0.06)
    ch = grid_chords(g, 20000, seed=0)
    mean = ch.mean("pore")
    assert mean == pytest.approx(1 / (lam * np.pi * R ** 2), rel=0.08)
    assert ch.mean("pore", include_cut=True) == pytest.approx(cauchy_figures(g).figures["pore"],
                                                              rel=0.03)
    # exponential shape: coefficient of variation of an exponential is 1
    L = ch.chords("pore")
    assert L.std() / L.mean() == pytest.approx(1.0, abs=0.08)
    rows = voxel_chords(g, GEL, name="pore")
    assert rows.mean("pore") == pytest.approx(1 / (lam * np.pi * R ** 2), rel=0.06)

