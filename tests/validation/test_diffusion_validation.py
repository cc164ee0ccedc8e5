"""Validation of the random-walk engine (sheetview.measures.diffusion) against closed forms.

Every check runs at the DEFAULT step length, surface rule and acceleration (first-passage
jumps far from walls); only the physical parameters (relaxivity, diffusivity) and the run
length are chosen per case. The closed forms are written out here from their sources,
independently of the module under test.
"""
import math

import numpy as np
import pytest
from scipy.integrate import quad
from scipy.linalg import expm
from scipy.ndimage import distance_transform_edt
from scipy.optimize import brentq, curve_fit
from scipy.stats import kstest

from sheetview.grid import GEL, INTERLAYER, SOLID, PhaseGrid
from sheetview.measures import _walk
from sheetview.measures.diffusion import (D_BULK_WATER_NM2_PER_US, _build, exchange_fractions,
                                          invert_t2, invert_t2_t2, relaxation_walk,
                                          t2_t2_map, transport_walk)
from sheetview.measures.relaxation import relaxation_spectrum

D0 = D_BULK_WATER_NM2_PER_US


# ---------------------------------------------------------------- closed forms
def bt_slab(t, D, a, rho, nmax=300):
    """Brownstein & Tarr, Phys. Rev. A 19 (1979) 2446: slab of half-width a, uniform start,
    D ∂m/∂n = ρ m at the walls: M(t) = Σ A_n exp(−ξ_n² D t / a²), ξ tan ξ = ρa/D,
    A_n = 2 sin²ξ / (ξ (ξ + sin ξ cos ξ))."""
    k = rho * a / D
    out = np.zeros_like(t, dtype=float)
    for n in range(nmax):
        xi = brentq(lambda x: x * math.tan(x) - k, n * math.pi + 1e-12,
                    n * math.pi + math.pi / 2 - 1e-12)
        A = 2 * math.sin(xi) ** 2 / (xi * (xi + math.sin(xi) * math.cos(xi)))
        out += A * np.exp(-xi * xi * D * t / a ** 2)
    return out


def bt_sphere(t, D, a, rho, nmax=300):
    """Brownstein & Tarr (1979): sphere of radius a: 1 − ξ cot ξ = ρa/D,
    A_n = 12 (sin ξ − ξ cos ξ)² / (ξ³ (2ξ − sin 2ξ))."""
    k = rho * a / D
    out = np.zeros_like(t, dtype=float)
    for n in range(nmax):
        lo, hi = n * math.pi + 1e-9, (n + 1) * math.pi - 1e-9
        xi = brentq(lambda x: 1 - x / math.tan(x) - k, lo, hi)
        A = 12 * (math.sin(xi) - xi * math.cos(xi)) ** 2 / (xi ** 3 * (2 * xi - math.sin(2 * xi)))
        out += A * np.exp(-xi * xi * D * t / a ** 2)
    return out


def _slab_grid(width, axis, h, n_lat=6, n_solid=2):
    shape = [n_lat, n_lat, n_lat]
    shape[axis] = width + n_solid
    lab = np.full(shape, SOLID, np.uint8)
    sl = [slice(None)] * 3
    sl[axis] = slice(0, width)
    lab[tuple(sl)] = GEL
    return PhaseGrid(lab, h, periodic=True)


def _sphere_grid(radius_vox, n, rng, h=0.2, inside=GEL):
    c = n / 2 + rng.uniform(-0.5, 0.5, 3)
    i = np.arange(n) + 0.5
    r2 = ((i[:, None, None] - c[0]) ** 2 + (i[None, :, None] - c[1]) ** 2
          + (i[None, None, :] - c[2]) ** 2)
    lab = np.where(r2 <= radius_vox ** 2, inside, SOLID).astype(np.uint8)
    return PhaseGrid(lab, h, periodic=False)


# ---------------------------------------------------------------- relaxation
@pytest.mark.parametrize("kappa", [0.1, 1.0, 10.0])
def test_slab_against_brownstein_tarr(kappa):
    """Slab pore of width 2a = 20 voxels (normal along a random axis, h = 0.2 nm), walls
    with relaxivity ρ = κ D/a, κ = ρa/D = 0.1 (fast), 1, 10 (slow diffusion), bulk T2 at
    its default (the factor exp(−t/T2b) applied to the series): M(t) against the
    Brownstein–Tarr eigenmode series (Phys. Rev. A 19 (1979) 2446). Tolerance: 0.012
    absolute, and 4 standard errors plus 1 % of the series at every time, at the default
    step (20,000 walkers: about 3 standard errors at the widest point)."""
    rng = np.random.default_rng(int(kappa * 10))
    h, w = 0.2, 20
    a = w * h / 2
    g = _slab_grid(w, int(rng.integers(3)), h)
    rho = kappa * D0 / a
    tmax = 1.6 * a * a / D0 * max(1.0, 1.0 / kappa)
    r = relaxation_walk(g, n_walkers=20000, seed=int(rng.integers(1 << 30)),
                        rho2_nm_per_us=rho, t_max_us=tmax, compare_fast=False, invert=False)
    ref = bt_slab(r.t_us, D0, a, rho) * np.exp(-r.t_us * 1e-6 / 2.5)
    assert np.max(np.abs(r.m - ref)) < 0.012
    assert np.all(np.abs(r.m - ref) <= 4 * r.m_se + 0.01 * ref)


@pytest.mark.parametrize("kappa", [0.3, 3.0])
def test_sphere_against_brownstein_tarr(kappa):
    """Voxelised sphere of radius a = 9 voxels (centre at a random sub-voxel offset, closed
    grid), ρ = κ D/a: M(t) against the sphere's Brownstein–Tarr series
    (1 − ξ cot ξ = ρa/D; Phys. Rev. A 19 (1979) 2446). The default 'smooth' surface rule
    gives the staircase its true area back. Tolerance at every recorded time: 0.02
    absolute, and 4 standard errors plus 3 % of the series (voxelised geometry)."""
    rng = np.random.default_rng(7 + int(kappa * 10))
    h, R = 0.2, 9.0
    g = _sphere_grid(R, 22, rng, h)
    a = R * h
    rho = kappa * D0 / a
    tmax = 0.5 * a * a / D0 * max(1.0, 1.0 / kappa)
    r = relaxation_walk(g, n_walkers=4000, seed=3, rho2_nm_per_us=rho, t2_bulk_s=None,
                        t_max_us=tmax, compare_fast=False, invert=False)
    ref = bt_sphere(r.t_us, D0, a, rho)
    assert np.max(np.abs(r.m - ref)) < 0.02
    assert np.all(np.abs(r.m - ref) <= 4 * r.m_se + 0.03 * ref)


def test_fast_diffusion_limit_reproduces_relax():
    """Two unconnected slits, interlayer 3 voxels and gel 9 voxels wide (h = 0.1 nm),
    relaxivity small enough that ρa/D = 0.003 in the gel (fast diffusion: the
    Brownstein–Tarr lowest mode is within 0.1 % of the fast-exchange rate): the decay rate of each class equals
    relax's 1/T2 = 1/T2b + ρ2·2/w (Brownstein & Tarr 1979), within 1 % (relax's own closed
    form holds to 0.5 %; the rest is the walk's sampling error)."""
    h = 0.1
    lab = np.full((6, 6, 16), SOLID, np.uint8)
    lab[:, :, 0:3] = INTERLAYER
    lab[:, :, 5:14] = GEL
    g = PhaseGrid(lab, h, periodic=True)
    rho = 0.003 * D0 / 0.45             # ρa/D = 0.003 for the gel half-width 0.45 nm
    fast = relaxation_spectrum(g, rho2=rho, t2_bulk=2.5)
    t2_gel = fast.class_t2_logmean["gel"] * 1e6       # µs
    r = relaxation_walk(g, n_walkers=6000, seed=11, rho2_nm_per_us=rho, t2_bulk_s=2.5,
                        t_max_us=0.15 * t2_gel, compare_fast=False, invert=False)
    for name in ("interlayer", "gel"):
        f = r.exchange.start_fraction[r.exchange.classes.index(name)]
        y = np.log(r.m_by_class[name] / f)
        late = r.t_us > 0.2 * r.t_us[-1]
        slope = np.polyfit(r.t_us[late], y[late], 1)[0]
        t2_walk = -1.0 / slope
        expected = fast.class_t2_logmean[name] * 1e6
        assert t2_walk == pytest.approx(expected, rel=0.01), name


# ---------------------------------------------------------------- transport
def test_free_diffusion_msd_is_6dt():
    """All-water periodic grid at an arbitrary voxel (0.37 nm): MSD = 6 D t at every
    recorded time and per axis 2 D t (Einstein 1905), within 4 standard errors."""
    lab = np.full((20, 20, 20), GEL, np.uint8)
    g = PhaseGrid(lab, 0.37, periodic=True)
    r = transport_walk(g, n_walkers=20000, seed=5)
    d = np.diag(r.d_eff_nm2_per_us)
    for a in range(3):
        assert abs(d[a] - D0) < 4 * r.d_eff_se_nm2_per_us[a] + 1e-9
    rel = r.msd_total_nm2[1:] / (6 * D0 * r.t_us[1:])
    assert np.all(np.abs(rel - 1) < 0.04)
    assert abs(d.mean() / D0 - 1) < 4 * np.linalg.norm(r.d_eff_se_nm2_per_us) / 3 / D0


def test_closed_sphere_msd_plateau():
    """Restricted diffusion in a closed sphere of radius a: MSD → 2<r²> = 6a²/5 at long
    times (uniform start and end in the ball). Voxelised sphere of radius 8 voxels at a
    random sub-voxel offset; tolerance 3 % (voxelisation and sampling)."""
    rng = np.random.default_rng(3)
    h, R = 0.25, 8.0
    g = _sphere_grid(R, 18, rng, h)
    a = R * h
    r = transport_walk(g, n_walkers=8000, seed=2, t_max_us=2.0 * a * a / D0)
    late = r.t_us > 0.5 * r.t_us[-1]
    plateau = r.msd_total_nm2[late].mean()
    assert plateau == pytest.approx(6 * a * a / 5, rel=0.03)


def test_maxwell_dilute_insulating_spheres():
    """Periodic box with random non-overlapping solid spheres (radius 3.5 voxels, volume
    fraction f ≈ 0.1): Deff/D0 = σeff/(φ σ0) = 2/(2 + f) from Maxwell's result for dilute
    insulating spheres σeff/σ0 = 2(1 − f)/(2 + f) (Maxwell, A Treatise on Electricity and
    Magnetism, 1873, §314) and the Nernst–Einstein relation; tolerance 3 standard errors
    plus 1 %."""
    rng = np.random.default_rng(12)
    n, R = 28, 3.5
    i = np.arange(n) + 0.5
    solid = np.zeros((n, n, n), bool)
    centres = []
    while solid.mean() < 0.1:
        c = rng.uniform(0, n, 3)
        if any(np.linalg.norm((c - q + n / 2) % n - n / 2) < 2 * R + 1 for q in centres):
            continue
        centres.append(c)
        d = [((i - c[k] + n / 2) % n - n / 2) ** 2 for k in range(3)]
        solid |= (d[0][:, None, None] + d[1][None, :, None] + d[2][None, None, :]) <= R * R
    f = solid.mean()
    g = PhaseGrid(np.where(solid, SOLID, GEL).astype(np.uint8), 0.2, periodic=True)
    r = transport_walk(g, n_walkers=20000, seed=9)
    d = np.diag(r.d_eff_nm2_per_us).mean() / D0
    se = np.linalg.norm(r.d_eff_se_nm2_per_us) / 3 / D0
    assert d == pytest.approx(2 / (2 + f), abs=3 * se + 0.01)
    assert d < 1 - 3 * se    # the obstruction is seen


def test_lamellar_full_along_none_across():
    """Impermeable solid layers (2 voxels) every 12 voxels, normal along a random axis:
    full diffusivity along the layers (Deff = D0 within 4 standard errors) and none
    across (the MSD across stays below w²/6 ×1.05 of a slit of width w = 10 voxels, its
    uniform-distribution plateau): the parallel and series bounds of a lamellar medium
    (e.g. Torquato, Random Heterogeneous Materials, 2002)."""
    rng = np.random.default_rng(4)
    axis = int(rng.integers(3))
    shape = [10, 10, 10]
    shape[axis] = 24
    lab = np.full(shape, GEL, np.uint8)
    for start in (10, 22):
        sl = [slice(None)] * 3
        sl[axis] = slice(start, start + 2)
        lab[tuple(sl)] = SOLID
    h = 0.3
    g = PhaseGrid(lab, h, periodic=True)
    r = transport_walk(g, n_walkers=10000, seed=1, t_max_us=(24 * h) ** 2 / D0)
    d = np.diag(r.d_eff_nm2_per_us)
    for a in range(3):
        if a != axis:
            assert abs(d[a] - D0) < 4 * r.d_eff_se_nm2_per_us[a]
    w = 10 * h
    assert r.msd_nm2[-1, axis, axis] < 1.05 * w * w / 6
    assert r.tortuosity[axis] > 20 and r.formation_factor[axis] > 20


# ---------------------------------------------------------------- exchange
def test_two_pores_joined_by_a_channel_two_site_exchange():
    """Two cubic pores (8³ voxels, classes gel and 'pore_b') joined by a 2×2 channel 8
    voxels long in a closed grid: the share of the walkers started in A found in B follows
    the two-site exchange model p_B (1 − exp(−k t)) (e.g. Zimmerman & Brittin, J. Phys.
    Chem. 61 (1957) 1328) with k = k_AB + k_BA = D A_c / R_eff (1/V_A + 1/V_B),
    R_eff = L + 2 × π r/4 (the channel plus the access length of each mouth, r the radius of
    the disc of the channel's section; Hall, J. Gen. Physiol. 66 (1975) 531; from memory).
    Fitted k within 15 % and the curve within 0.02 of the fit. (Measured over seeds 8-10:
    +8 to +12 % with the first-passage jumps, +2 to +3 % with fixed steps only; at half
    the voxel, +6 to +8 % and +1 to +9 %: the 5,000-walker fit scatters by ~3 %, and the
    access term is approximate.)"""
    n_p, L, wch = 8, 8, 2
    nx = 2 * n_p + L
    lab = np.full((nx, n_p + 2, n_p + 2), SOLID, np.uint8)
    lab[0:n_p, 1:n_p + 1, 1:n_p + 1] = GEL
    lab[n_p + L:, 1:n_p + 1, 1:n_p + 1] = 4
    c0 = 1 + n_p // 2 - wch // 2
    lab[n_p:n_p + L // 2, c0:c0 + wch, c0:c0 + wch] = GEL
    lab[n_p + L // 2:n_p + L, c0:c0 + wch, c0:c0 + wch] = 4
    h = 0.2
    g = PhaseGrid(lab, h, periodic=False, names={0: "outside", 1: "solid", 3: "gel",
                                                 4: "pore_b"})
    V = n_p ** 3 * h ** 3
    A = (wch * h) ** 2
    r_disc = math.sqrt(A / math.pi)
    R_eff = L * h + 2 * math.pi * r_disc / 4
    k = D0 * A / R_eff * (2 / V)
    ex = exchange_fractions(g, t_max_us=1.5 / k, n_walkers=5000, seed=8)
    i, j = ex.classes.index("gel"), ex.classes.index("pore_b")
    pB = np.sum(lab == 4) / np.sum((lab == 4) | (lab == GEL))
    y = ex.fraction[:, i, j]
    (kfit,), _ = curve_fit(lambda t, kk: pB * (1 - np.exp(-kk * t)), ex.t_us, y, p0=[k])
    assert kfit == pytest.approx(k, rel=0.15)
    assert np.max(np.abs(y - pB * (1 - np.exp(-kfit * ex.t_us)))) < 0.02


# ---------------------------------------------------------------- inversion
@pytest.mark.parametrize("sigma", [1e-3, 1e-2])
def test_inversion_of_synthetic_biexponential(sigma):
    """Synthetic decay 0.3 exp(−t/0.1 ms) + 0.7 exp(−t/1 ms) with Gaussian noise σ (400
    points to 5 ms): the non-negative Tikhonov inversion with α from the discrepancy
    principle (Morozov) and from the L-curve (Hansen 1992) recovers both amplitudes within
    0.05 and both geometric-mean T2 within 25 % (one component per side of 0.3 ms)."""
    rng = np.random.default_rng(1)
    t = np.linspace(0, 5e-3, 400)
    y = 0.3 * np.exp(-t / 1e-4) + 0.7 * np.exp(-t / 1e-3) + sigma * rng.standard_normal(t.size)
    for s in (sigma, None):
        inv = invert_t2(t, y, sigma=s)
        lt = np.log(inv.t2_s)
        a = inv.amplitude
        lo = inv.t2_s < 3e-4
        assert a[lo].sum() == pytest.approx(0.3, abs=0.05)
        assert a[~lo].sum() == pytest.approx(0.7, abs=0.05)
        assert math.exp(np.sum(a[lo] * lt[lo]) / a[lo].sum()) == pytest.approx(1e-4, rel=0.25)
        assert math.exp(np.sum(a[~lo] * lt[~lo]) / a[~lo].sum()) == pytest.approx(1e-3, rel=0.25)


# ---------------------------------------------------------------- first-passage jumps
def _sphere_survival(s, nterms=400):
    """P(T > s r²/D) for Brownian motion leaving a ball of radius r from its centre: the
    Dirichlet eigenmode series 2 Σ (−1)^(n+1) exp(−n²π² s) (e.g. Carslaw & Jaeger,
    Conduction of Heat in Solids, 2nd ed. 1959, §9.3, the sphere with zero surface
    temperature, evaluated at the centre; from memory), mean exit time r²/(6D)."""
    n = np.arange(1, nterms + 1)
    s = np.atleast_1d(s)[:, None]
    return 2 * np.sum((-1.0) ** (n + 1) * np.exp(-n * n * math.pi ** 2 * s), axis=1)


def test_first_passage_time_sampler():
    """The exit times the jumps draw (200,000 quantiles u → s) against the eigenmode CDF
    written out here: Kolmogorov–Smirnov p > 0.01 and the mean within 0.3 % of 1/6 (the
    mean exit time r²/(6D); Torquato & Kim, Appl. Phys. Lett. 55 (1989) 1847 use the same
    first-passage sphere; from memory)."""
    tab = _walk.fpt_table()
    u = np.random.default_rng(3).random(200_000)
    s = np.array([_walk._sample_fpt(v, tab) for v in u])
    grid = np.linspace(0.02, 3.0, 3000)
    cdf = 1 - _sphere_survival(grid)
    assert kstest(s, lambda x: np.interp(x, grid, cdf, left=0.0, right=1.0)).pvalue > 0.01
    assert s.mean() == pytest.approx(1 / 6, rel=3e-3)


@pytest.mark.parametrize("s", [1e-4, 0.01, 0.08, 0.3, 1.0])
def test_position_inside_the_ball_at_a_recording_time(s):
    """Where a cut jump puts the walker: |Y|/r at dimensionless time s = D t/r² of
    Brownian motion from the centre of a ball, conditioned on not having left it; its
    mean square and median against the radial density x Σ n sin(nπx) exp(−n²π² s) of the
    Dirichlet heat kernel of the ball (Carslaw & Jaeger §9.3; from memory), integrated here
    with scipy's quad, and for s → 0 against the free spread E x² = 6 s. Tolerance 0.3 %."""
    tab = _walk.trunc_table()
    u = (np.arange(100_000) + 0.5) / 100_000
    x = np.array([_walk._sample_trunc(s, v, tab) for v in u])
    if s < 1e-3:
        assert np.mean(x * x) == pytest.approx(6 * s, rel=3e-3)
        return
    nn = np.arange(1, 200)

    def rho(y):
        return y * np.sum(nn * np.sin(nn * math.pi * y) * np.exp(-nn * nn * math.pi ** 2 * s))

    z = quad(rho, 0, 1, limit=400)[0]
    m2 = quad(lambda y: y * y * rho(y), 0, 1, limit=400)[0] / z
    med = brentq(lambda q: quad(rho, 0, q, limit=400)[0] / z - 0.5, 1e-6, 1 - 1e-9)
    assert np.mean(x * x) == pytest.approx(m2, rel=3e-3)
    assert np.median(x) == pytest.approx(med, rel=3e-3)


def test_jump_radius_never_reaches_another_class():
    """The jump map against scipy's exact Euclidean distance transform: on a random
    two-class grid with anisotropic voxels (closed, and periodic), for every voxel that
    allows a jump, the radius bound (map × quantum − half the voxel diagonal, the worst
    place in the voxel) stays below the distance from the voxel's surface to the
    nearest other-class voxel, d_scipy − h_diag (scipy.ndimage.distance_transform_edt of
    each class's indicator, sampling = the spacing; periodic grid tiled 3×)."""
    rng = np.random.default_rng(5)
    from scipy.ndimage import zoom
    noise = zoom(rng.random((6, 7, 5)), 6, order=1)[:30, :34, :26]
    lab = np.where(noise > 0.62, SOLID, np.where(noise > 0.4, GEL, 4)).astype(np.uint8)
    sp = (0.2, 0.15, 0.25)
    hd = 0.5 * math.sqrt(sum(v * v for v in sp))
    for periodic in (False, True):
        g = PhaseGrid(lab, sp, periodic=periodic)
        eng = _build(g, water_phases=None, diffusivity_nm2_per_us=None,
                     d_bulk_nm2_per_us=D0, rho2_nm_per_us=0.0, rho2_outside_nm_per_us=None,
                     rho2_by_interface=None, step_fraction=0.5, surface="voxel", relax=False)
        jm = eng.jmap.reshape(lab.shape).astype(float)
        for code in (GEL, 4):
            own = lab == code
            big = np.tile(own, (3, 3, 3)) if periodic else np.pad(own, 1)
            d = distance_transform_edt(big, sampling=sp)
            n = lab.shape
            d = d[n[0]:2 * n[0], n[1]:2 * n[1], n[2]:2 * n[2]] if periodic else d[1:-1, 1:-1, 1:-1]
            ok = own & (jm >= eng.jthr)
            assert ok.sum() > 100
            assert np.all(jm[ok] * eng.jq - hd <= d[ok] - hd + 1e-12)
            # the bound is not needlessly loose: within 1.5 voxel diagonals of the truth
            assert np.all(jm[ok] * eng.jq >= d[ok] - 3 * hd - eng.jq)


def test_accelerated_and_fixed_step_walks_agree():
    """A periodic structure with a large pore (22 voxels, where the walkers jump) joined to
    thin slits (3 voxels, a second class, fixed steps only), ρa/D ≈ 0.5 in the large pore:
    M(t) of the accelerated walk and of the fixed-step walk (acceleration off) agree
    within 4 combined standard errors plus 0.003 at every recorded time, and so do the
    class occupations. Both walks are the same scheme near the walls; this checks that the
    jumps (exact exit times and positions) change nothing but the cost."""
    lab = np.full((30, 14, 14), SOLID, np.uint8)
    lab[2:24, :, :] = GEL
    lab[24:28, 5:8, :] = 4        # slits of 3 voxels, touching the pore
    lab[26:30, :, 5:8] = 4
    g = PhaseGrid(lab, 0.2, periodic=True, names={0: "outside", 1: "solid", 3: "gel",
                                                   4: "narrow"})
    rho = 0.5 * D0 / (11 * 0.2)
    kw = dict(n_walkers=12000, rho2_nm_per_us=rho, t2_bulk_s=None, t_max_us=0.01,
              invert=False, compare_fast=False)
    a = relaxation_walk(g, seed=1, accelerate=True, **kw)
    b = relaxation_walk(g, seed=2, accelerate=False, **kw)
    assert a.settings["jumps_per_walker"] > 50 and b.settings["jumps_per_walker"] == 0
    np.testing.assert_allclose(a.t_us, b.t_us)
    se = np.hypot(a.m_se, b.m_se)
    assert np.all(np.abs(a.m - b.m) <= 4 * se + 0.003)
    i = a.exchange.classes.index("narrow")
    fa = a.exchange.fraction[:, i, i]
    fb = b.exchange.fraction[:, i, i]
    n_i = a.exchange.start_fraction[i] * 12000
    assert np.all(np.abs(fa - fb) <= 4 * np.sqrt(2 * 0.25 / n_i) + 0.003)
    assert a.m[-1] < 0.6


# ---------------------------------------------------------------- T2-T2 exchange
def _two_site_signal(t1, t2, tm, R, k_ab, p):
    """REXSY signal of the two-site exchange model (McConnell, J. Chem. Phys. 28 (1958)
    430; the T2–T2 form of e.g. Washburn & Callaghan, Phys. Rev. Lett. 97 (2006) 175502;
    from memory): S = 1ᵀ exp((K − R) t2) exp(K tm) exp((K − R) t1) p, K the exchange
    matrix with detailed balance k_ba = k_ab p_a / p_b."""
    k_ba = k_ab * p[0] / p[1]
    K = np.array([[-k_ab, k_ba], [k_ab, -k_ba]])
    Rm = np.diag(R)
    E2 = [expm((K - Rm) * b) for b in t2]
    mid = expm(K * tm)
    out = np.empty((len(t1), len(t2)))
    for i, a in enumerate(t1):
        v = mid @ expm((K - Rm) * a) @ p
        for j in range(len(t2)):
            out[i, j] = np.sum(E2[j] @ v)
    return out


@pytest.mark.parametrize("tm_over_T", [0.0, 0.3, 1.5])
def test_t2_t2_inversion_of_a_two_site_signal(tm_over_T):
    """Synthetic REXSY signal of the two-site model (T2 0.1 and 1 ms, populations 0.4 and
    0.6, exchange k_ab = 300/s), Gaussian noise 1e-3: the 2D inversion (SVD-compressed,
    Butler–Reeds–Dawson; Venkataramanan, Song & Hürlimann, IEEE Trans. Signal Process. 50
    (2002) 1017) puts the share moved between the sites during the mixing time,
    p_a P(a→b) + p_b P(b→a) from exp(K tm), off the diagonal blocks within 0.03, and the
    fast site's diagonal amplitude within 0.05."""
    p = np.array([0.4, 0.6])
    k_ab = 300.0
    t = np.concatenate([[0.0], np.geomspace(5e-6, 5e-3, 31)])
    tm = tm_over_T / (k_ab / p[1])
    S = _two_site_signal(t, t, tm, np.array([1e4, 1e3]), k_ab, p)
    noise = 1e-3 * np.random.default_rng(int(tm_over_T * 10)).standard_normal(S.shape)
    inv = invert_t2_t2(t, t, S + noise, sigma=np.full(S.shape, 1e-3))
    F, T = inv["amplitude"], inv["t2_s"]
    lo = T < 3e-4
    cross = (F[np.ix_(lo, ~lo)].sum() + F[np.ix_(~lo, lo)].sum()) / F.sum()
    k_ba = k_ab * p[0] / p[1]
    P = expm(np.array([[-k_ab, k_ba], [k_ab, -k_ba]]) * tm)
    moved = p[0] * P[1, 0] + p[1] * P[0, 1]
    assert cross == pytest.approx(moved, abs=0.03)
    assert F[np.ix_(lo, lo)].sum() == pytest.approx(p[0] * P[0, 0], abs=0.05)


def test_t2_t2_map_cross_peaks_grow_as_two_site_exchange():
    """Two cubic pores (8³ voxels, h = 0.2 nm) joined by a 1×1 channel 16 voxels long in a
    closed grid, surface relaxivities 6 times apart (fast-diffusion rates 6ρ/side = 100 and
    600 /µs; ρa/D ≤ 0.06), exchange through the channel k = k_ab + k_ba = D A_c/R_eff
    (1/V_A + 1/V_B) (R_eff = L + 2 × πr/4; Hall, J. Gen. Physiol. 66 (1975) 531, from
    memory), about 8 times slower than the slower relaxation. Reference: the signal of the
    two-site exchange model with these rates (McConnell 1958; exchange during encoding
    and detection included), inverted with the walk's own standard errors so that both
    maps are equally regularised. The map's off-diagonal share at tm = 0.05/k, 0.7/k and
    2/k is within 0.05 of the model's, it grows with the mixing time, and at long mixing
    approaches the two-site limit 2 p_a p_b (1 − e^(−k tm)) (Zimmerman & Brittin,
    J. Phys. Chem. 61 (1957) 1328) within 0.06."""
    n_p, L = 8, 16
    nx = 2 * n_p + L
    lab = np.full((nx, n_p + 2, n_p + 2), SOLID, np.uint8)
    lab[0:n_p, 1:n_p + 1, 1:n_p + 1] = GEL
    lab[n_p + L:, 1:n_p + 1, 1:n_p + 1] = 4
    c0 = 1 + n_p // 2
    lab[n_p:n_p + L // 2, c0, c0] = GEL
    lab[n_p + L // 2:n_p + L, c0, c0] = 4
    h = 0.2
    g = PhaseGrid(lab, h, periodic=False, names={0: "outside", 1: "solid", 3: "gel",
                                                 4: "pore_b"})
    V = (n_p * h) ** 3
    A = h * h
    R_eff = L * h + 2 * math.pi * math.sqrt(A / math.pi) / 4
    k = D0 * A / R_eff * (2 / V)
    side = n_p * h
    rho_a, rho_b = 100 * side / 6, 600 * side / 6          # R = 6ρ/side = 100 and 600 /µs
    tms = [0.05 / k, 0.7 / k, 2.0 / k]
    res = t2_t2_map(g, mixing_time_us=tms, n_walkers=2500, seed=1, rho2_nm_per_us=rho_a,
                    rho2_by_interface={"pore_b/solid": rho_b, "pore_b/outside": rho_b},
                    t2_bulk_s=None, n_times=20)
    split = math.sqrt(1e-8 * 1e-8 / 6)      # geometric middle of the two T2 (s)
    pa = np.sum(lab == GEL) / np.sum((lab == GEL) | (lab == 4))
    p = np.array([pa, 1 - pa])
    cross = []
    for tm, r in zip(tms, res):
        S = _two_site_signal(r.t1_us, r.t2_us, tm, np.array([100.0, 600.0]), k * p[1], p)
        inv = invert_t2_t2(r.t1_us * 1e-6, r.t2_us * 1e-6, S, sigma=r.signal_se)
        F, T2 = inv["amplitude"], inv["t2_s"]
        lo = T2 < split
        model = (F[np.ix_(lo, ~lo)].sum() + F[np.ix_(~lo, lo)].sum()) / F.sum()
        c = r.cross_fraction(split)
        cross.append(c)
        assert c == pytest.approx(model, abs=0.05)
    assert cross[0] < cross[1] < cross[2]
    assert cross[2] == pytest.approx(2 * pa * (1 - pa) * (1 - math.exp(-k * tms[2])), abs=0.06)
