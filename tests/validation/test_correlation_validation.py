"""Validation of the two-point correlation S2 against closed forms.

* The slope at the origin of the orientation-averaged S2 is -S_V/4 (Debye, Anderson &
  Brumberger, J. Appl. Phys. 28 (1957) 679), checked against the TRUE specific surface of
  each structure from its geometry (never against this program's own surface figures):
  parallel sheets aligned with the grid axes and tilted at a random orientation, a ball,
  and the Boolean model of balls.
* S2(0) is the volume fraction of the phase in the domain (definition; Torquato, Random
  Heterogeneous Materials, 2002), the same number :func:`volume_fractions` reports.
* The Boolean model of balls: void S2(r) = phi^(1 + 3r/4R - r^3/16R^3) for r <= 2R and
  phi^2 beyond (Torquato 2002; from memory, so checked here by simulation too).

Structures are digitised here with numpy at voxel centres (the rule the rasterizer uses),
with random sub-voxel offsets and orientations (seeded). Sheets are six voxels thick, as
the default voxel size (the thinner of sheet and gap over six) makes them.
"""
import numpy as np
import pytest
from scipy.spatial import cKDTree
from scipy.spatial.transform import Rotation

from sheetview.domain import Sphere
from sheetview.grid import GEL, OUTSIDE, SOLID, PhaseGrid, rasterize
from sheetview.measures.correlation import two_point_correlation
from sheetview.measures.phases import volume_fractions

# sheets 0.6 nm thick, repeat 1.4 nm (gap 0.8 nm): default voxel min(0.6, 0.8)/6 = 0.1 nm
T_NM, REPEAT_NM, VOXEL = 0.6, 1.4, 0.1


def _labels(mask, window=None):
    lab = np.where(mask, SOLID, GEL).astype(np.uint8)
    if window is not None:
        lab[~window] = OUTSIDE
    return lab


def _centres(n, offset=0.0):
    return (np.arange(n) + 0.5) * VOXEL - offset


@pytest.mark.parametrize("axis", [0, 1, 2])
def test_slope_axis_aligned_sheets_periodic(axis):
    """Parallel sheets normal to a grid axis (thickness t, repeat d, random offset) in a
    periodic box: S_V = 2/d exactly (two faces per repeat). The slope at the origin is
    -S_V/4 within 3 % (Debye, Anderson & Brumberger 1957); the previous radial fit gave
    -13.8 % here, the first lattice shell holding only the six axis neighbours."""
    rng = np.random.default_rng(10 + axis)
    n = 8 * 14  # eight repeats of 14 voxels
    z = _centres(n) - rng.uniform(0, REPEAT_NM)
    s = (z % REPEAT_NM) < T_NM
    shp = [1, 1, 1]
    shp[axis] = n
    m = np.broadcast_to(s.reshape(shp), (n, n, n))
    res = two_point_correlation(PhaseGrid(_labels(m), VOXEL, periodic=True), SOLID)
    sv = 2.0 / REPEAT_NM
    assert res.specific_surface == pytest.approx(sv, rel=0.03)
    assert res.slope0 == pytest.approx(-sv / 4, rel=0.03)
    assert res.phi == pytest.approx(m.mean(), abs=1e-15)


def _sheets_in_sphere(normal, R, rng):
    """Stack of parallel sheets of random offset filling a sphere of radius R (nm) whose
    centre is at a random sub-voxel position; returns (mask, window, true S_V per unit
    domain volume): the faces are discs of area pi (R^2 - s^2) at their distances s from
    the centre."""
    n = int(np.ceil(2 * R / VOXEL)) + 2
    c = n * VOXEL / 2 + rng.uniform(-0.5, 0.5, 3) * VOXEL
    x = [_centres(n) - c[a] for a in range(3)]
    X, Y, Z = np.meshgrid(*x, indexing="ij")
    win = X ** 2 + Y ** 2 + Z ** 2 <= R * R
    nrm = np.asarray(normal, float) / np.linalg.norm(normal)
    s = nrm[0] * X + nrm[1] * Y + nrm[2] * Z
    off = rng.uniform(0, REPEAT_NM)
    m = (((s - off) % REPEAT_NM) < T_NM) & win
    js = np.arange(-int(R / REPEAT_NM) - 2, int(R / REPEAT_NM) + 3)
    faces = np.r_[off + js * REPEAT_NM, off + js * REPEAT_NM + T_NM]
    faces = faces[np.abs(faces) < R]
    area = float(np.sum(np.pi * (R * R - faces ** 2)))
    return m, win, area / (4 / 3 * np.pi * R ** 3)


@pytest.mark.parametrize("case", ["axis", "random1", "random2"])
def test_slope_sheets_in_sphere_domain(case):
    """The same stack filling a sphere domain (OUTSIDE voxels excluded), normal along z or
    at a random orientation: slope = -S_V/4 within 3 % with S_V the face areas (discs
    pi (R^2 - s^2), elementary geometry) over the ball's volume (Debye et al. 1957)."""
    rng = np.random.default_rng({"axis": 1, "random1": 2, "random2": 3}[case])
    normal = (0, 0, 1) if case == "axis" else Rotation.random(random_state=rng).apply([0, 0, 1])
    m, win, sv = _sheets_in_sphere(normal, 4.0, rng)
    res = two_point_correlation(PhaseGrid(_labels(m, win), VOXEL), SOLID)
    assert res.specific_surface == pytest.approx(sv, rel=0.03)
    assert res.reference == "domain"


@pytest.mark.parametrize("R_vox", [8.0, 12.0])
def test_slope_ball(R_vox):
    """One ball of radius R at a random sub-voxel position inside a box (no window):
    S_V = 4 pi R^2 / V_box (closed form); slope = -S_V/4 within 3 % (Debye et al. 1957)."""
    rng = np.random.default_rng(int(R_vox))
    n = int(4 * R_vox)
    c = n / 2 + rng.uniform(-1, 1, 3)
    x = np.arange(n) + 0.5
    m = ((x[:, None, None] - c[0]) ** 2 + (x[None, :, None] - c[1]) ** 2
         + (x[None, None, :] - c[2]) ** 2) <= R_vox ** 2
    res = two_point_correlation(PhaseGrid(_labels(m), 0.2), SOLID)
    sv = 4 * np.pi * (R_vox * 0.2) ** 2 / (n * 0.2) ** 3
    assert res.specific_surface == pytest.approx(sv, rel=0.03)


def boolean_balls(n, R, eta, seed, mc=2000):
    """Voxelised periodic Boolean model of balls (radius R voxels, Poisson centres of
    intensity eta / (4/3 pi R^3)). Returns the solid mask, the centres and the area of the
    union's surface per unit volume, measured independently of the grid: each sphere's
    area 4 pi R^2 times the fraction of ``mc`` random points on it that no other ball covers
    (scipy cKDTree, periodic)."""
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
    tree = cKDTree(c, boxsize=n)
    u = rng.normal(size=(mc, 3))
    u /= np.linalg.norm(u, axis=1)[:, None]
    free = 0
    for p in c:
        hits = tree.query_ball_point((p + R * u) % n, R * (1 - 1e-9), return_length=True)
        free += int(np.count_nonzero(hits == 0))
    return m, c, 4 * np.pi * R ** 2 * free / mc / n ** 3


@pytest.fixture(scope="module")
def boolean_grid():
    R, eta = 8.0, 0.7
    m, c, sv = boolean_balls(128, R, eta, seed=1)
    g = PhaseGrid(np.where(m, SOLID, GEL).astype(np.uint8), spacing=0.5, periodic=True)
    return g, m, len(c) / (128 * 0.5) ** 3, R * 0.5, sv / 0.5  # per nm^3, nm, per nm


@pytest.mark.parametrize("phase", [GEL, SOLID])
def test_boolean_slope(boolean_grid, phase):
    """Boolean balls (128^3, R = 8 voxels, eta = 0.7): slope = -S_V/4 within 3 % for either
    phase, S_V the realised union's area (Monte Carlo on the spheres, independent of the
    grid) (Debye et al. 1957). The previous radial fit gave -4.7 % here."""
    g, m, lam, R, sv = boolean_grid
    res = two_point_correlation(g, phase)
    assert res.specific_surface == pytest.approx(sv, rel=0.03)


@pytest.mark.parametrize("periodic", [True, False])
def test_boolean_two_point_function(boolean_grid, periodic):
    """Void S2 of the Boolean model: S2(0) = phi exactly; S2(r) = phi^(1 + 3r/4R - r^3/16R^3)
    for r <= 2R and phi^2 beyond, within 0.01 at every bin to 3R, with the grid treated as
    periodic (circular estimator) and as a bounded box (windowed estimator) (Torquato 2002;
    from memory, the form is checked by this simulation)."""
    g, m, lam, R, sv = boolean_grid
    gg = g if periodic else PhaseGrid(g.labels, spacing=g.spacing, periodic=False)
    res = two_point_correlation(gg, GEL, r_max=3 * R)
    phi = 1 - m.mean()
    assert res.s2[0] == phi
    r = np.minimum(res.r, 2 * R)
    expect = phi ** (1 + 3 * r / (4 * R) - r ** 3 / (16 * R ** 3))
    assert np.max(np.abs(res.s2 - expect)) < 0.01


def test_s2_zero_is_the_domain_fraction():
    """S2(0) equals the solid fraction of the domain that volume_fractions reports, in a
    sphere domain with OUTSIDE voxels (definition; Torquato 2002): the window excludes
    them, the reference volume is the domain's voxels."""
    from sheetview.synth import pack_stacks
    s = pack_stacks(Sphere((0, 0, 0), 6.0), 12, lateral_size="fixed:4", layers="fixed:3",
                    seed=5).structure
    g = rasterize(s, 0.15)
    assert (g.labels == OUTSIDE).any()
    res = two_point_correlation(g, SOLID)
    vf = volume_fractions(g)
    assert res.phi == vf.fractions["solid"]
    assert res.s2[0] == vf.fractions["solid"]
    assert res.reference == "domain"
    assert res.reference_volume == pytest.approx(vf.domain_volume_nm3, rel=1e-12)
