"""Validation of predicted scattering curves, their features and SLDs against published closed
forms: the sphere form factor, Guinier's law, Porod's law with the true interface area, the
two-phase invariant, Bragg positions 2πn/d with the lamellar form factor, and SLDs."""
import math

import numpy as np
import pytest
from scipy.spatial import cKDTree

from sheetview.grid import PhaseGrid
from sheetview.measures.scattering import (ScatteringResult, bragg_peaks, guinier, invariant,
                                           phase_slds, porod, scattering_curve)
from sheetview.sld import neutron_sld, preset_sld, xray_sld


def _ball(r_vox, seed, margin=12, h=0.5):
    """A ball of radius ``r_vox`` voxels centred at a random sub-voxel offset: the voxels
    whose centres lie inside the sphere are solid, in a box of fluid ``margin`` voxels wider
    than the ball. Returns the grid, the radius (nm) and the box volume (nm³)."""
    rng = np.random.default_rng(seed)
    n = int(math.ceil(2 * r_vox)) + margin
    off = rng.uniform(-0.5, 0.5, 3)
    x = np.arange(n) - n / 2 + 0.5
    r2 = ((x[:, None, None] - off[0]) ** 2 + (x[None, :, None] - off[1]) ** 2
          + (x[None, None, :] - off[2]) ** 2)
    return PhaseGrid((r2 <= r_vox ** 2).astype(np.uint8), h), r_vox * h, (n * h) ** 3


def _boolean(n=96, h=0.25, radius=2.0, eta=0.5, seed=1):
    """Periodic Boolean model of balls (Poisson centres, intensity eta / (4/3 pi R^3)):
    the grid and the centres."""
    rng = np.random.default_rng(seed)
    L = n * h
    lam = eta / (4 / 3 * np.pi * radius ** 3)
    c = rng.uniform(0, L, (rng.poisson(lam * L ** 3), 3))
    xs = (np.arange(n) + 0.5) * h
    pts = np.stack(np.meshgrid(xs, xs, xs, indexing="ij"), -1).reshape(-1, 3)
    d, _ = cKDTree(c, boxsize=L).query(pts, k=1)
    lab = (d <= radius).reshape(n, n, n).astype(np.uint8)
    return PhaseGrid(lab, h, periodic=True), c


def _union_area(centres, radius, L, n_per=2000, seed=0):
    """Area of the surface of a union of balls in a periodic box, by Monte Carlo: uniform
    points on each sphere, kept when no other centre lies within the radius (scipy
    cKDTree); relative standard error about 0.1 % here."""
    rng = np.random.default_rng(seed)
    v = rng.standard_normal((n_per, 3))
    v /= np.linalg.norm(v, axis=1)[:, None]
    p = ((centres[:, None, :] + radius * v[None]) % L).reshape(-1, 3)
    d, _ = cKDTree(centres, boxsize=L).query(p, k=1)
    return 4 * math.pi * radius ** 2 * np.count_nonzero(d >= radius * (1 - 1e-9)) / n_per


def _lamellae(period, solid, nrep, seed, *, diagonal=False, nxy=16, nz=8, h=0.05):
    """A perfect periodic lamellar stack in a periodic box: sheets ``solid`` samples thick
    at a repeat of ``period`` samples, interlayer water between, the stack shifted by a
    random offset along its normal. Normal z (repeat d = period * h), or (1, 1, 0)/√2
    (samples along the normal every h/√2, repeat period * h/√2, the box period * nrep
    voxels along x and y). Returns the grid and d (nm)."""
    rng = np.random.default_rng(seed)
    if diagonal:
        hn = h / math.sqrt(2)
        i = np.arange(period * nrep)
        s = (i[:, None] + i[None, :]) * hn
        shape_sheet = s[:, :, None]
        reps = (1, 1, nz)
    else:
        hn = h
        shape_sheet = (np.arange(period * nrep) * h)[None, None, :]
        reps = (nxy, nxy, 1)
    d = period * hn
    off = rng.uniform(0, d)
    lab = (((shape_sheet - off) % d) < solid * hn).astype(np.uint8)  # exactly `solid` samples
    lab = np.tile(lab, reps)
    lab[lab == 0] = 2  # interlayer water
    return PhaseGrid(lab, h, periodic=True), d


# ------------------------------------------------------------------ form factor, Guinier
def test_sphere_form_factor_minima():
    """Zeros of the sphere form factor [3(sin x - x cos x)/x^3]^2 at x = qR = 4.4934 and
    7.7253 (Rayleigh, Proc. R. Soc. A 84 (1911) 25; Guinier & Fournet, Small-Angle
    Scattering of X-Rays, 1955; zeros derived as roots of tan x = x). A ball of 12 voxels
    radius at a random sub-voxel offset in a 4x zero-padded box; tolerance 2 % (bin width
    0.01 nm^-1)."""
    g, R, _ = _ball(12, seed=5, margin=40)
    res = scattering_curve(g, {0: 0.0, 1: 1.0}, pad=4, bins=np.linspace(0.05, 6.0, 596))
    for x0 in (4.4934, 7.7253):
        m = (res.q > 0.85 * x0 / R) & (res.q < 1.15 * x0 / R)
        qmin = res.q[m][np.argmin(res.intensity[m])]
        assert qmin * R == pytest.approx(x0, rel=0.02)


def test_forward_intensity_absolute_units():
    """I(0) of one particle in a box of volume V: (Δρ V_p)^2 / V in cm^-1 (definition of
    the macroscopic cross-section; Guinier & Fournet 1955), V_p the volume of the voxel
    set; Guinier extrapolation within 3 %."""
    g, R, _ = _ball(12, seed=6, margin=40)
    res = scattering_curve(g, {0: 0.0, 1: 1.0}, pad=4, bins=np.linspace(0.005, 1.5, 150))
    gu = guinier(res, q_range=(0, 6))
    vp_cm3 = g.labels.sum() * g.voxel_volume * 1e-21
    v_cm3 = float(np.prod(g.extent)) * 1e-21
    expected = (1e10 * vp_cm3) ** 2 / v_cm3   # Δρ = 1e-6 Å^-2 = 1e10 cm^-2
    assert gu.i0 == pytest.approx(expected, rel=0.03)


def test_guinier_radius_of_ball():
    """Guinier law: Rg^2 = 3 R^2 / 5 for a ball (Guinier & Fournet 1955), R the sphere's
    radius (the ball at a random sub-voxel offset). Fit over q Rg <= 1; tolerance 2 %
    (voxelization and the q^4 term of the Guinier expansion)."""
    g, R, _ = _ball(12, seed=7, margin=40)
    res = scattering_curve(g, {0: 0.0, 1: 1.0}, pad=4, bins=np.linspace(0.005, 1.5, 150))
    gu = guinier(res, q_range=(0, 6))
    assert gu.rg == pytest.approx(math.sqrt(3 / 5) * R, rel=0.02)


# ------------------------------------------------------------------------------ Porod
@pytest.mark.parametrize("r_vox", [10, 15, 20, 30, 40])
def test_porod_specific_surface_of_ball(r_vox):
    """Porod's law I q^4 -> 2π Δρ² S/V (Porod, Kolloid-Z. 124 (1951) 83) with the true
    interface area: one ball of radius R voxels in a box of fluid, S/V = 4πR² / V_box (3/R
    times the ball's volume fraction). Two random sub-voxel offsets per radius, default
    settings (pad 2, 40 bins per decade, the Porod range found by ``porod``): within 5 %
    (measured: 2 % at most), with the range reported and flat."""
    for seed in (1, 2):
        g, R, vbox = _ball(r_vox, seed=100 * r_vox + seed)
        po = porod(scattering_curve(g, {0: 0.0, 1: 1.0}))
        assert po.status == "ok", po.reason
        assert po.s_over_v == pytest.approx(4 * math.pi * R ** 2 / vbox, rel=0.05)
        assert abs(po.log_slope) <= po.flat_tolerance
        a, b = po.q_range
        assert 0 < a < b <= 0.67 * math.pi / g.spacing[0]
        d = po.to_dict()
        assert d["status"] == "ok" and d["q_range_nm-1"] == [a, b]


def test_porod_specific_surface_boolean_model():
    """Porod's law (Porod 1951) on periodic Boolean models of balls (R = 2 nm = 8 voxels,
    η = 0.5, three seeds): S/V within 5 % (measured under 1 %) of the realised area of the
    union of balls, computed by Monte Carlo on the sphere surfaces with scipy's cKDTree
    (the model's mean 4πR²λe^(−η), Matheron 1975, differs from a realisation by several
    %)."""
    for seed in (1, 2, 3):
        g, c = _boolean(seed=seed)
        L = g.extent[0]
        sv = _union_area(c, 2.0, L, seed=seed) / L ** 3
        po = porod(scattering_curve(g, {0: 0.0, 1: 1.0}))
        assert po.status == "ok", po.reason
        assert po.s_over_v == pytest.approx(sv, rel=0.05)


def test_no_porod_range_when_unresolved():
    """A structure unresolved at the voxel (every voxel solid or not at random, φ = 0.3) has
    a flat I(q) (white noise: I = Δρ² φ(1−φ) v, slope 0, not −4; Debye, Anderson &
    Brumberger, J. Appl. Phys. 28 (1957) 679 with a correlation length under the voxel):
    no Porod range, said in words, with null constant and S/V in the JSON, and no tail on
    the invariant."""
    rng = np.random.default_rng(0)
    g = PhaseGrid((rng.random((48, 48, 48)) < 0.3).astype(np.uint8), 0.5, periodic=True)
    res = scattering_curve(g, {0: 0.0, 1: 1.0})
    po = porod(res)
    assert po.status == "no_porod_range" and "not flat" in po.reason
    d = po.to_dict()
    assert d["porod_constant_cm-1_nm-4"] is None and d["s_over_v_nm-1"] is None
    assert d["q_range_nm-1"] == [None, None]   # same columns in a batch table either way
    assert po.describe().startswith("no Porod range: ")
    inv = invariant(res, phi=float(g.labels.mean()))
    assert inv.to_dict()["porod_tail_cm-4"] is None and "no tail" in inv.tail
    assert inv.total == pytest.approx(inv.measured + inv.low_q_extrapolation)


def test_no_porod_range_for_a_q3_power_law():
    """A pure power law I ∝ q^-3 (a surface fractal of dimension 3, or a mass fractal;
    Porod's law needs q^-4) has no Porod range; I ∝ q^-4 has one, with K exact."""
    q = np.geomspace(0.1, 10, 81)
    e = np.stack([q / 10 ** (1 / 160), q * 10 ** (1 / 160)], axis=1)
    kw = dict(q_edges=e, spacing=(0.3, 0.3, 0.3))
    for slope, ok in ((-3.0, False), (-4.0, True)):
        r = ScatteringResult(q, 2.0 * q ** slope, np.full(81, 100), (0.1, 10.0), {}, 0.0, 1.0,
                             1.0, **kw)
        po = porod(r, alias_correction=False)
        assert (po.status == "ok") is ok
        if ok:
            assert po.constant == pytest.approx(2.0, rel=1e-9)
        else:
            assert math.isnan(po.constant) and "log-slope" in po.reason


def test_no_porod_range_below_bragg_orders():
    """A periodic lamellar stack has its Bragg orders 2πn/d (Bragg; Guinier & Fournet 1955)
    up to the resolution limit: q⁴I is never flat there, so there is no Porod range."""
    g, _ = _lamellae(20, 10, 10, seed=3)
    po = porod(scattering_curve(g, phase_slds(2.55, -0.56)))
    assert po.status == "no_porod_range"


def test_invariant_boolean_model():
    """Invariant Q = ∫ q² I dq = 2π² Δρ² φ(1-φ) (Porod 1951), φ the voxel volume fraction
    of the periodic Boolean model; measured range plus the Porod tail K (1/q_max − A) from
    the same Porod range; tolerance 1 % (measured 0.05 %; with the plain K/q_max tail it
    was 2 to 3 % high)."""
    g, _ = _boolean()
    res = scattering_curve(g, {0: 0.0, 1: 2.0})
    phi = float(g.labels.mean())
    inv = invariant(res, phi=phi)
    assert inv.expected_two_phase == pytest.approx(2 * np.pi ** 2 * (2e10) ** 2 * phi * (1 - phi))
    assert inv.porod_tail > 0 and inv.porod_q_range == porod(res).q_range
    assert inv.total == pytest.approx(inv.expected_two_phase, rel=0.01)


def test_hann_window_and_box_faces():
    """A Boolean model cut by a non-periodic box: the cut faces are solid-fluid interfaces
    of area 6L²φ_faces (φ_faces the solid fraction on the faces), so Porod's S/V (Porod
    1951) is the union's area (Monte Carlo, as above) plus 6φ_faces/L: within 5 %. The Hann
    taper (common practice in spectral estimation) takes the faces out: within 15 % of the
    union's area alone (a smaller effective sample)."""
    g, c = _boolean(seed=2)
    L = g.extent[0]
    sv = _union_area(c, 2.0, L, seed=2) / L ** 3
    lab = g.labels
    faces = np.concatenate([a.ravel() for a in (lab[0], lab[-1], lab[:, 0], lab[:, -1],
                                                lab[:, :, 0], lab[:, :, -1])]).mean()
    cut = PhaseGrid(lab, g.spacing, periodic=False)
    plain = porod(scattering_curve(cut, {0: 0.0, 1: 1.0}))
    hann = porod(scattering_curve(cut, {0: 0.0, 1: 1.0}, window="hann"))
    assert plain.s_over_v == pytest.approx(sv + 6 * faces / L, rel=0.05)
    assert hann.s_over_v == pytest.approx(sv, rel=0.15)


# ------------------------------------------------------------------------------ peaks
def test_no_peak_from_a_single_ball():
    """A single ball's form-factor maxima are not Bragg peaks (sphere form factor, Rayleigh
    1911): no peak 5 σ above the background for balls of 10, 20 and 40 voxels radius at
    random offsets, nor for periodic Boolean models of balls (Poisson centres: no
    periodicity)."""
    for r_vox, seed in ((10, 1), (20, 2), (40, 3)):
        g, _, _ = _ball(r_vox, seed=seed)
        bp = bragg_peaks(scattering_curve(g, {0: 0.0, 1: 1.0}))
        assert bp.q.size == 0, (r_vox, bp.q, bp.significance)
    for seed in (1, 2):
        g, _ = _boolean(seed=seed)
        assert bragg_peaks(scattering_curve(g, {0: 0.0, 1: 1.0})).q.size == 0


def _orders(res, d):
    bp = bragg_peaks(res)
    return bp, bp.q * d / (2 * np.pi)


@pytest.mark.parametrize("period,solid,diagonal", [(40, 20, False), (40, 12, False),
                                                   (20, 10, True), (20, 5, True)])
def test_lamellar_orders(period, solid, diagonal):
    """A perfect periodic lamellar stack (sheets t thick at repeat d, random offset along
    the normal; normal along z, or along (1,1,0)) shows its Bragg orders at q = 2πn/d
    (Bragg; Guinier & Fournet 1955) where the lamellar form factor |F_n|² ∝
    sin²(nπt/d)/n² is not zero, and nothing else: with t = d/2 the even orders are
    absent. Checked: every order n = 1..5 with F_n ≠ 0 found, at 2πn/d within 0.1 %; no
    peak off the orders or at a zero of F_n; the integrated intensities I_n/I_1 against the
    sampled closed form sin²(πnm/P)/sin²(πn/P) (m of P samples solid: the closed form summed
    over the aliases of the sampling, derived) within 1 %, and against the continuous
    closed form sin²(nπt/d)/(n² sin²(πt/d)) within the alias factor (πn/P)²/sin²(πn/P)
    plus 1 % (1.06 at most for P = 40 and n <= 5, 1.07 for P = 20 and n = 3)."""
    g, d = _lamellae(period, solid, 200 // period if not diagonal else 5, seed=period + solid,
                     diagonal=diagonal)
    res = scattering_curve(g, phase_slds(2.55, -0.56))
    bp, n = _orders(res, d)
    nn = np.round(n)
    assert np.all(np.abs(n - nn) < 1e-3 * nn), n
    fn = np.sin(np.pi * nn * solid / period) ** 2
    assert np.all(fn > 1e-6), nn            # no peak at an absent order
    want = [k for k in range(1, 6) if np.sin(np.pi * k * solid / period) ** 2 > 1e-6
            and 2 * np.pi * k / d <= res.q_valid[1] / 10 ** 0.1]
    assert set(want) <= set(nn.astype(int)), (want, nn)
    if solid * 2 == period:
        assert np.all(nn % 2 == 1)
    i1 = bp.integrated[nn == 1][0]
    for k in want:
        ratio = bp.integrated[nn == k][0] / i1
        sampled = (np.sin(np.pi * k * solid / period) ** 2 / np.sin(np.pi * k / period) ** 2
                   / (np.sin(np.pi * solid / period) ** 2 / np.sin(np.pi / period) ** 2))
        t_over_d = solid / period
        continuous = np.sin(np.pi * k * t_over_d) ** 2 / (k ** 2 * np.sin(np.pi * t_over_d) ** 2)
        alias = (np.pi * k / period) ** 2 / np.sin(np.pi * k / period) ** 2
        assert ratio == pytest.approx(sampled, rel=0.01)
        assert ratio == pytest.approx(continuous, rel=alias - 1 + 0.01)


def test_bragg_peaks_finite_stack():
    """A finite stack of 15 layers of repeat 1.4 nm and thickness 0.7 nm
    (sheetview.synth.perfect_stack, rasterized with its interlayer), default settings: the
    first and third orders at 2π/d and 6π/d within 2 % (Bragg), no second order (t = d/2:
    sin²(2π t/d) = 0, lamellar form factor), and the first order's FWHM between 2πK/(Nd),
    K = 0.89 (Scherrer form for N = 15, textbook), and 2.5 times that (the bins, 5.8 % of q,
    are as wide as the peak: measured 1.8 times)."""
    from sheetview.app.run import phase_grid
    from sheetview.app.settings import Settings
    from sheetview.synth import perfect_stack
    s = perfect_stack(15, 10.0).structure
    g = phase_grid(s, Settings(voxel=0.14))
    res = scattering_curve(g, phase_slds(2.55, -0.56))
    bp = bragg_peaks(res)
    q1 = 2 * np.pi / 1.4
    for k in (1, 3):
        near = np.abs(bp.q / (k * q1) - 1) < 0.02
        assert near.sum() == 1, (k, bp.q)
    assert not np.any(np.abs(bp.q / (2 * q1) - 1) < 0.05)
    w1 = bp.fwhm[np.argmin(np.abs(bp.q - q1))]
    assert 1.0 < w1 / (2 * np.pi * 0.89 / (15 * 1.4)) < 2.5


def test_no_interlayer_contrast_removes_bragg_peak():
    """With the interlayer given the solid's SLD the stack is one uniform slab: no
    peak at 2π/d (the lamellar contrast is gone; Bragg, textbook)."""
    g, _ = _lamellae(28, 14, 6, seed=0)
    off = scattering_curve(g, phase_slds(2.55, -0.56, interlayer_contrast=False))
    on = scattering_curve(g, phase_slds(2.55, -0.56))
    assert off.intensity.max() < 1e-6 * on.intensity.max()
    assert bragg_peaks(off).q.size == 0


# ------------------------------------------------------------------------------ SLDs
@pytest.mark.parametrize("name,probe,value", [("h2o", "neutron", -0.56), ("d2o", "neutron", 6.36),
                                              ("h2o", "xray", 9.4)])
def test_water_slds(name, probe, value):
    """Water SLDs near room temperature: H2O -0.56, D2O 6.36 (neutrons; Sears, Neutron News
    3 (1992) 26 lengths with handbook densities 0.997 and 1.104 g/cm3, densities from
    memory) and X-ray water 9.4 (electron density × r_e, International Tables Vol. C
    6.1.1), all 1e-6 Å^-2; derived values, tolerance 1%."""
    assert preset_sld(name, probe) == pytest.approx(value, rel=0.01)


def test_csh_sld():
    """C-S-H (CaO)1.7(SiO2)(H2O)1.8 at 2.604 g/cm3 (Allen, Thomas & Jennings, Nature Materials
    6 (2007) 311): neutron SLD about 2.55e-6 and X-ray about 22.5e-6 Å^-2 (derived), 1%."""
    assert neutron_sld("(CaO)1.7(SiO2)(H2O)1.8", 2.604) == pytest.approx(2.55, rel=0.01)
    assert xray_sld("(CaO)1.7(SiO2)(H2O)1.8", 2.604) == pytest.approx(22.5, rel=0.01)
