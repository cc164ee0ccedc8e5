"""Predicted NMR T2 spectra (sheetview.measures.relaxation) against the fast-exchange
closed form 1/T2 = 1/T2,bulk + rho2 S/V (Brownstein & Tarr, Phys. Rev. A 19 (1979) 2446)
with S/V = 2/d, 4/d, 6/d for a slit of width d, a cylinder or a sphere of diameter d
(elementary geometry), and against an independent numpy reimplementation of the spectrum.
rho2 = 3.7e-3 nm/us is only a number to compute with here (the default, from memory)."""
import numpy as np
import pytest

from sheetview.grid import GEL, INTERLAYER, SOLID, PhaseGrid
from sheetview.measures.pores import local_thickness
from sheetview.measures.relaxation import relaxation_spectrum, t2_of_surface_ratio

RHO2 = 3.7e-3  # nm/us


def _slits(width_vox, h=0.1, code=GEL, n_solid=5):
    """Periodic stack of parallel slits of ``width_vox`` voxels between solid slabs."""
    lab = np.full((4, 4, width_vox + n_solid), SOLID, np.uint8)
    lab[:, :, :width_vox] = code
    return PhaseGrid(lab, h, periodic=True)


@pytest.mark.parametrize("m", [21, 41])
def test_slit_t2_without_bulk(m):
    """Slit of width w in the fast-exchange limit, bulk term off: T2 = w / (2 ρ2)
    (Brownstein & Tarr, Phys. Rev. A 19 (1979) 2446). The local thickness of an odd slit of
    m voxels is exactly m h (sheetview's local thickness convention); tolerance 0.5%."""
    h = 0.1
    g = _slits(m, h)
    r = relaxation_spectrum(g, rho2=RHO2, t2_bulk=None)
    w = m * h
    expected = w / (2 * RHO2) * 1e-6  # us -> s
    assert r.class_t2_logmean["gel"] == pytest.approx(expected, rel=0.005)
    # the histogram holds all the signal in the bin containing T2
    k = int(np.argmax(r.total))
    assert r.edges[k] <= expected <= r.edges[k + 1]
    assert r.total.sum() == pytest.approx(1.0)


@pytest.mark.parametrize("shape,factor", [("slit", 2), ("cylinder", 4), ("sphere", 6)])
def test_shape_factors(shape, factor):
    """S/V of a slit of width d: 2/d; of a cylinder of diameter d: 4/d; of a sphere of
    diameter d: 6/d (geometry; Brownstein & Tarr 1979 list the slit, cylinder and sphere
    forms), with the bulk term on: 1/T2 = 1/T2b + ρ2 S/V; tolerance 0.5%."""
    m, h = 31, 0.1
    g = _slits(m, h)
    r = relaxation_spectrum(g, rho2=RHO2, t2_bulk=2.5, shape=shape)
    d = m * h
    expected = 1.0 / (1 / 2.5 + RHO2 * 1e6 * factor / d)
    assert r.class_t2_logmean["gel"] == pytest.approx(expected, rel=0.005)


def test_interlayer_slit_given_and_measured():
    """Interlayer water as slits of gap w: T2 = w/(2 ρ2) without bulk (Brownstein & Tarr
    1979), with the gap given or measured as the local thickness of the interlayer phase
    (odd slit: exact); tolerance 0.5%. Signal fractions follow the voxel counts."""
    h = 0.1
    lab = np.full((4, 4, 40), SOLID, np.uint8)
    lab[:, :, 0:7] = INTERLAYER     # 0.7 nm gap
    lab[:, :, 10:31] = GEL          # 2.1 nm gel slit
    g = PhaseGrid(lab, h, periodic=True)
    for width in (0.7, None):
        r = relaxation_spectrum(g, interlayer_width=width, rho2=RHO2, t2_bulk=None)
        assert r.class_t2_logmean["interlayer"] == pytest.approx(0.7 / (2 * RHO2) * 1e-6,
                                                                 rel=0.005)
        assert r.class_t2_logmean["gel"] == pytest.approx(2.1 / (2 * RHO2) * 1e-6, rel=0.005)
        assert r.class_fraction["interlayer"] == pytest.approx(7 / 28)
        assert r.class_fraction["gel"] == pytest.approx(21 / 28)


def test_spectrum_equals_a_numpy_reimplementation():
    """A random phase grid (interlayer, gel and a size class) with an arbitrary positive
    thickness map: every class's histogram, signal fraction and geometric-mean T2 equal
    those computed here with numpy from 1/T2 = 1/T2b + rho2 k/d (k = 2, 4, 6; Brownstein &
    Tarr 1979), numpy.histogram on the default edges (20 per decade, 1 us to 10 s), to
    1e-12; voxels outside the edges are counted in the class fractions only."""
    rng = np.random.default_rng(3)
    lab = rng.choice([SOLID, INTERLAYER, GEL, 4], size=(9, 10, 11), p=[0.4, 0.2, 0.3, 0.1])
    names = {0: "outside", SOLID: "solid", INTERLAYER: "interlayer", GEL: "gel", 4: "gel_big"}
    g = PhaseGrid(lab.astype(np.uint8), 0.13, names=names)
    d = np.exp(rng.uniform(np.log(1e-4), np.log(50.0), lab.shape))  # some beyond the edges
    edges = np.geomspace(1e-6, 10.0, 141)
    for shape, k in (("slit", 2.0), ("cylinder", 4.0), ("sphere", 6.0)):
        for t2b in (None, 2.5):
            r = relaxation_spectrum(g, d, interlayer_width=0.61, rho2=RHO2, t2_bulk=t2b,
                                    shape=shape)
            np.testing.assert_allclose(r.edges, edges, rtol=1e-12)
            n_pore = np.isin(lab, [INTERLAYER, GEL, 4]).sum()
            for code, name in ((INTERLAYER, "interlayer"), (GEL, "gel"), (4, "gel_big")):
                sv = np.full((lab == code).sum(), 2 / 0.61) if code == INTERLAYER else k / d[lab == code]
                rate = RHO2 * 1e6 * sv + (0.0 if t2b is None else 1 / t2b)
                t2 = 1 / rate
                np.testing.assert_allclose(r.fraction[name], np.histogram(t2, edges)[0] / n_pore,
                                           rtol=0, atol=1e-12)
                assert r.class_fraction[name] == pytest.approx(t2.size / n_pore, abs=1e-12)
                assert r.class_t2_logmean[name] == pytest.approx(np.exp(np.log(t2).mean()),
                                                                 rel=1e-12)


@pytest.mark.parametrize("hkl", [(1, 1, 2), (1, 2, 2), (0, 1, 1)])
def test_tilted_slit_t2(hkl):
    """Periodic stack of gel slits of width w = 1.9 nm whose normal is the lattice direction
    hkl (so the stack is periodic in the 8 nm cell), at a random offset, 0.1 nm voxels
    (19 across the slit); bulk term off: the gel T2 (geometric mean) is w/(2 rho2)
    (Brownstein & Tarr 1979). With the thickness map of ``method="subvoxel"`` within one
    voxel on w (5.3 %): the voxel centres lie in lattice planes normal to hkl, at most one
    voxel apart, and the digital slit's wall lies somewhere between its last phase plane and
    the next, so its width is known to one plane spacing (measured +1.0 %, +0.02 %, -3.2 %).
    At the defaults (the "centres" local thickness) within 10 % (measured -2 %, -3 %,
    -8 %: it reads tilted digital slits short)."""
    rng = np.random.default_rng(sum(hkl))
    L, n, w = 8.0, 80, 1.9
    ax = (np.arange(n) + 0.5) * (L / n)
    X, Y, Z = np.meshgrid(ax, ax, ax, indexing="ij")
    a, b, c = hkl
    period = L / np.sqrt(a * a + b * b + c * c)
    depth = np.mod((a * X + b * Y + c * Z) / L + rng.uniform(), 1.0) * period
    g = PhaseGrid(np.where(depth < w, GEL, SOLID).astype(np.uint8), L / n, periodic=True)
    r = relaxation_spectrum(g, rho2=RHO2, t2_bulk=None)
    assert r.class_t2_logmean["gel"] == pytest.approx(w / (2 * RHO2) * 1e-6, rel=0.10)
    lt = local_thickness(g.labels == GEL, L / n, periodic=True, method="subvoxel")
    r = relaxation_spectrum(g, lt, rho2=RHO2, t2_bulk=None)
    assert r.class_t2_logmean["gel"] == pytest.approx(w / (2 * RHO2) * 1e-6, rel=0.1 / w)


def test_bulk_limit():
    """S/V -> 0 gives T2 -> T2,bulk (Brownstein & Tarr 1979)."""
    assert t2_of_surface_ratio(0.0, RHO2, 2.5) == pytest.approx(2.5)
    assert t2_of_surface_ratio(1e-12, RHO2, 2.5) == pytest.approx(2.5, rel=1e-6)


@pytest.mark.parametrize("seed", range(10))
def test_ball_pore_t2_follows_its_diameter(seed):
    """A spherical gel pore of random radius R (4 to 10 voxels, 0.1 nm voxels) at a random
    sub-voxel offset in solid, bulk term off, sphere reading, otherwise defaults, thickness
    map from ``local_thickness(method="subvoxel")`` (the default "centres" reads such a ball
    1.4 to 2 voxels small; it keeps the speed floor): every voxel relaxes at the
    fast-diffusion rate of the sphere, T2 = V / (rho2 S) = d / (6 rho2) with d = 2R
    (Brownstein & Tarr, Phys. Rev. A 19 (1979) 2446), within the T2 of half a voxel on d
    (the local thickness target)."""
    rng = np.random.default_rng(700 + seed)
    h = 0.1
    R = rng.uniform(4.0, 10.0)
    n = int(2 * R) + 8
    c = n / 2 + rng.uniform(-0.5, 0.5, 3)
    x = np.indices((n, n, n)).astype(float)
    lab = np.full((n, n, n), SOLID, np.uint8)
    lab[((x - c[:, None, None, None]) ** 2).sum(0) <= R * R] = GEL
    g = PhaseGrid(lab, h)
    lt = local_thickness(lab == GEL, h, method="subvoxel")
    r = relaxation_spectrum(g, lt, t2_bulk=None, shape="sphere")
    rho2 = r.settings["rho2_nm_per_us"]
    d = 2 * R * h
    expected = d / (6 * rho2) * 1e-6  # us -> s
    assert r.class_t2_logmean["gel"] == pytest.approx(expected, rel=0.5 / (2 * R))
    # every voxel in the one bin holding T2 (or its neighbour: bins are 1/20 decade)
    k = int(np.argmax(r.total))
    assert r.total[max(k - 1, 0):k + 2].sum() == pytest.approx(1.0)


@pytest.mark.parametrize("seed", range(3))
def test_relax_of_a_mesh_cavity_exact(seed):
    """``sheetview.measure(body, only="relaxation", pore_method="exact")`` on a closed mesh
    (a cube with a spherical cavity of random radius and centre, 0.2 nm voxels): the run's
    thickness map comes from the exact geometry, so the gel T2 is the fast-diffusion value
    of the cavity's diameter d (twice the inscribed radius of the polyhedron, numpy) read
    with the default slit factor, 1/T2 = 1/T2,bulk + rho2 2/d (Brownstein & Tarr, Phys.
    Rev. A 19 (1979) 2446; the sphere's own S/V = 6/d is the ``shape="sphere"`` reading);
    tolerance 1e-4 relative (float32 map)."""
    import sheetview as sv
    from sheetview.domain import Box
    from sheetview.measures.relaxation import DEFAULT_RHO2_NM_PER_US, DEFAULT_T2_BULK_S
    from sheetview.structure import SurfaceBody
    from tests.validation.test_pores_validation import _icosphere
    rng = np.random.default_rng(900 + seed)
    L, h = 4.0, 0.2
    R = rng.uniform(0.8, 1.5)
    c = L / 2 + rng.uniform(-0.5, 0.5, 3)
    V, F = _icosphere(3)
    V = V * R + c
    cube = np.array([(i, j, k) for i in (0, L) for j in (0, L) for k in (0, L)], float)
    cf = np.array([(0, 1, 3), (0, 3, 2), (4, 6, 7), (4, 7, 5), (0, 4, 5), (0, 5, 1),
                   (2, 3, 7), (2, 7, 6), (0, 2, 4), (2, 6, 4), (1, 5, 3), (5, 7, 3)])
    body = SurfaceBody(np.concatenate([cube, V]),
                       np.concatenate([cf, F[:, ::-1] + len(cube)]), Box((0, 0, 0), (L, L, L)))
    T = V[F]
    nrm = np.cross(T[:, 1] - T[:, 0], T[:, 2] - T[:, 0])
    nrm /= np.linalg.norm(nrm, axis=1)[:, None]
    d = 2 * np.abs(((c - T[:, 0]) * nrm).sum(1)).min()
    r = sv.measure(body, only="relaxation", voxel=h,
                   pore_method="exact").results["relaxation"]
    expected = 1.0 / (1.0 / DEFAULT_T2_BULK_S + DEFAULT_RHO2_NM_PER_US * 1e6 * 2.0 / d)
    assert r.class_t2_logmean["gel"] == pytest.approx(expected, rel=1e-4)
