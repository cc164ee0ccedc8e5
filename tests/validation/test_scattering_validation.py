"""Validation of predicted scattering curves and SLDs against published closed forms."""
import math

import numpy as np
import pytest
from scipy.spatial import cKDTree

from sheetview.grid import PhaseGrid
from sheetview.measures.scattering import (bragg_peaks, guinier, invariant, phase_slds, porod,
                                           scattering_curve)
from sheetview.sld import neutron_sld, preset_sld, xray_sld


def _ball(n=64, r_vox=12, h=0.5):
    x = np.arange(n) - n / 2 + 0.5
    r = np.sqrt(x[:, None, None] ** 2 + x[None, :, None] ** 2 + x[None, None, :] ** 2)
    lab = (r <= r_vox).astype(np.uint8)
    # radius of the ball of the same volume as the voxel set
    radius = (lab.sum() * 3 / (4 * np.pi)) ** (1 / 3) * h
    return PhaseGrid(lab, h), radius


def _boolean(n=96, h=0.25, radius=2.0, eta=0.5, seed=1):
    """Periodic Boolean model of balls (Poisson centres, intensity eta / (4/3 pi R^3))."""
    rng = np.random.default_rng(seed)
    L = n * h
    lam = eta / (4 / 3 * np.pi * radius ** 3)
    N = rng.poisson(lam * L ** 3)
    c = rng.uniform(0, L, (N, 3))
    xs = (np.arange(n) + 0.5) * h
    pts = np.stack(np.meshgrid(xs, xs, xs, indexing="ij"), -1).reshape(-1, 3)
    d, _ = cKDTree(c, boxsize=L).query(pts, k=1)
    lab = (d <= radius).reshape(n, n, n).astype(np.uint8)
    return PhaseGrid(lab, h, periodic=True), N / L ** 3


def test_sphere_form_factor_minima():
    """Zeros of the sphere form factor [3(sin x - x cos x)/x^3]^2 at x = qR = 4.4934 and
    7.7253 (Rayleigh, Proc. R. Soc. A 84 (1911) 25; Guinier & Fournet, Small-Angle
    Scattering of X-Rays, 1955; zeros derived as roots of tan x = x). Voxelized ball of
    12 voxels radius in a 4x zero-padded box; tolerance 2% (bin width 0.01 nm^-1)."""
    g, R = _ball()
    res = scattering_curve(g, {0: 0.0, 1: 1.0}, pad=4, bins=np.linspace(0.05, 6.0, 596))
    for x0 in (4.4934, 7.7253):
        m = (res.q > 0.85 * x0 / R) & (res.q < 1.15 * x0 / R)
        qmin = res.q[m][np.argmin(res.intensity[m])]
        assert qmin * R == pytest.approx(x0, rel=0.02)


def test_forward_intensity_absolute_units():
    """I(0) of one particle in a box of volume V: (Δρ V_p)^2 / V in cm^-1 (definition of
    the macroscopic cross-section; Guinier & Fournet 1955); Guinier extrapolation within
    3% of the exact value computed from the voxel count."""
    g, R = _ball()
    res = scattering_curve(g, {0: 0.0, 1: 1.0}, pad=4, bins=np.linspace(0.005, 1.5, 150))
    gu = guinier(res, q_range=(0, 6))
    vp_cm3 = g.labels.sum() * g.voxel_volume * 1e-21
    v_cm3 = float(np.prod(g.extent)) * 1e-21
    expected = (1e10 * vp_cm3) ** 2 / v_cm3   # Δρ = 1e-6 Å^-2 = 1e10 cm^-2
    assert gu.i0 == pytest.approx(expected, rel=0.03)


def test_guinier_radius_of_ball():
    """Guinier law: Rg^2 = 3 R^2 / 5 for a ball (Guinier & Fournet 1955). Fit over
    q Rg <= 1; tolerance 2% (voxelization and the q^4 term of the Guinier expansion)."""
    g, R = _ball()
    res = scattering_curve(g, {0: 0.0, 1: 1.0}, pad=4, bins=np.linspace(0.005, 1.5, 150))
    gu = guinier(res, q_range=(0, 6))
    assert gu.rg == pytest.approx(math.sqrt(3 / 5) * R, rel=0.02)


def test_porod_specific_surface_boolean_model():
    """Porod's law I q^4 -> 2π Δρ² S/V (Porod, Kolloid-Z. 124 (1951) 83) on a periodic
    Boolean model of balls, whose specific surface is 4π R² λ exp(-η) (Matheron, Random Sets
    and Integral Geometry, 1975; from memory, standard form) with the realised intensity λ.
    Tolerance 10%: the voxel staircase adds area seen at high q (common practice)."""
    g, lam = _boolean()
    res = scattering_curve(g, {0: 0.0, 1: 1.0})
    R = 2.0
    eta = lam * 4 / 3 * np.pi * R ** 3
    sv = 4 * np.pi * R ** 2 * lam * math.exp(-eta)
    po = porod(res, q_range=(5 / R, 0.5 * np.pi / g.spacing[0]))
    assert po.s_over_v == pytest.approx(sv, rel=0.10)


def test_invariant_boolean_model():
    """Invariant Q = ∫ q² I dq = 2π² Δρ² φ(1-φ) (Porod 1951), φ the voxel volume fraction
    of the periodic Boolean model; measured range plus Porod tail; tolerance 5%."""
    g, _ = _boolean()
    res = scattering_curve(g, {0: 0.0, 1: 2.0})
    phi = float(g.labels.mean())
    inv = invariant(res, phi=phi)
    assert inv.expected_two_phase == pytest.approx(2 * np.pi ** 2 * (2e10) ** 2 * phi * (1 - phi))
    assert inv.total == pytest.approx(inv.expected_two_phase, rel=0.05)


def test_bragg_peak_periodic_slabs():
    """Bragg: first peak at q = 2π/d for a lamellar stack of repeat d (textbook; Guinier &
    Fournet 1955). Periodic slabs, d = 1.4 nm, solid 0.7 nm; tolerance 2%."""
    h, per = 0.1, 14
    z = np.arange(per * 12)
    lab = np.broadcast_to(((z % per) < 7).astype(np.uint8), (16, 16, z.size)).copy()
    lab[lab == 0] = 2  # interlayer water
    g = PhaseGrid(lab, h, periodic=True)
    res = scattering_curve(g, phase_slds(2.55, -0.56))
    bp = bragg_peaks(res)
    first = bp.q[np.argmin(np.abs(bp.q - 2 * np.pi / 1.4))]
    assert first == pytest.approx(2 * np.pi / 1.4, rel=0.02)
    # the strongest bin of the curve is the first-order reflection
    assert res.q[np.argmax(res.intensity)] == pytest.approx(2 * np.pi / 1.4, rel=0.02)


def test_bragg_peak_finite_stack():
    """A finite stack of 15 layers of repeat 1.4 nm (sheetview.synth.perfect_stack,
    rasterized with its interlayer): strongest peak at 2π/d within 2% (Bragg, textbook)."""
    from sheetview.app.run import phase_grid
    from sheetview.app.settings import Settings
    from sheetview.synth import perfect_stack
    s = perfect_stack(15, 10.0).structure
    g = phase_grid(s, Settings(voxel=0.14))
    res = scattering_curve(g, phase_slds(2.55, -0.56), pad=2)
    bp = bragg_peaks(res, q_range=(2.0, 8.0), prominence=0.5)
    top = bp.q[np.argmax(bp.prominence)]
    assert top == pytest.approx(2 * np.pi / 1.4, rel=0.02)


def test_no_interlayer_contrast_removes_bragg_peak():
    """With the interlayer given the solid's SLD the stack is one uniform slab: no
    peak at 2π/d (the lamellar contrast is gone; Bragg, textbook)."""
    h, per = 0.1, 14
    z = np.arange(per * 12)
    lab = np.broadcast_to(((z % per) < 7).astype(np.uint8), (16, 16, z.size)).copy()
    lab[lab == 0] = 2
    g = PhaseGrid(lab, h, periodic=True)
    off = scattering_curve(g, phase_slds(2.55, -0.56, interlayer_contrast=False))
    on = scattering_curve(g, phase_slds(2.55, -0.56))
    assert off.intensity.max() < 1e-6 * on.intensity.max()


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


def test_hann_window_removes_box_face_surface():
    """A Boolean model cut by a non-periodic box: without a window the box faces scatter as
    extra solid-fluid interface and Porod's S/V (Porod 1951) overshoots the model's
    4π R² λ exp(-η) (Matheron 1975, from memory) by about 6φ/L; the Hann taper (common
    practice in spectral estimation) brings it within 15% (a smaller effective sample)."""
    g, lam = _boolean(seed=2)
    R = 2.0
    sv = 4 * np.pi * R ** 2 * lam * math.exp(-lam * 4 / 3 * np.pi * R ** 3)
    cut = PhaseGrid(g.labels, g.spacing, periodic=False)
    qr = (5 / R, 0.5 * np.pi / g.spacing[0])
    plain = porod(scattering_curve(cut, {0: 0.0, 1: 1.0}), q_range=qr).s_over_v
    hann = porod(scattering_curve(cut, {0: 0.0, 1: 1.0}, window="hann"), q_range=qr).s_over_v
    assert plain > 1.15 * sv
    assert hann == pytest.approx(sv, rel=0.15)
