"""Scattering curves, SLDs, experimental curve files and the `scatter` command."""
import json

import numpy as np
import pytest
from click.testing import CliRunner

from sheetview.cli import main
from sheetview.io.curves import read_experimental
from sheetview.errors import InputError, OptionError, SheetviewError
from sheetview.grid import PhaseGrid
from sheetview.measures.scattering import (compare_curve, phase_slds, power_law,
                                           scattering_curve)
from sheetview.sld import molar_mass, parse_formula, preset_sld, water_sld

SAMPLE = "sample_structures/single_stack.csv"


def test_intensity_matches_direct_fourier_sum():
    """I(q) = |v Σ Δρ e^{-iq·r}|² / V (definition of the macroscopic cross-section) computed
    by direct summation over voxels with numpy, at the Fourier modes of one bin; the FFT
    path must agree to 1e-4 (float32 transform), and so must the bin's intensity-weighted
    mean |q| and the standard error of its mean intensity over the modes."""
    rng = np.random.default_rng(3)
    lab = (rng.random((6, 5, 7)) < 0.4).astype(np.uint8)
    g = PhaseGrid(lab, (0.3, 0.4, 0.5), periodic=True)
    edges = np.array([4.0, 6.0])
    res = scattering_curve(g, {0: 0.0, 1: 2.0}, bins=edges)
    sp = np.asarray(g.spacing)
    n = np.asarray(lab.shape)
    pos = (np.argwhere(np.ones_like(lab, bool))) * sp
    rho = (lab.ravel().astype(float)) * 2e10
    vals, qs = [], []
    for i in range(n[0]):
        for j in range(n[1]):
            for k in range(n[2]):
                qv = 2 * np.pi * np.array([np.fft.fftfreq(n[a], sp[a])[idx]
                                           for a, idx in enumerate((i, j, k))])
                qq = np.linalg.norm(qv)
                if edges[0] <= qq < edges[1]:
                    F = np.sum(rho * np.exp(-1j * pos @ qv)) * np.prod(sp) * 1e-21
                    vals.append(abs(F) ** 2 / (np.prod(n * sp) * 1e-21))
                    qs.append(qq)
    vals, qs = np.asarray(vals), np.asarray(qs)
    assert res.intensity[0] == pytest.approx(np.mean(vals), rel=1e-4)
    assert res.counts[0] == len(vals)
    # intensity-weighted mean |q| and the standard error over the modes (pairs count once)
    assert res.q_intensity[0] == pytest.approx(np.sum(vals * qs) / np.sum(vals), rel=1e-4)
    assert res.intensity_sem[0] == pytest.approx(
        np.sqrt(np.var(vals) / (len(vals) / 2)), rel=1e-3)


def test_contrast_scaling_and_match_point():
    """I scales as Δρ² (definition), and a fluid matching the solid gives no scattering."""
    rng = np.random.default_rng(0)
    lab = (rng.random((16, 16, 16)) < 0.3).astype(np.uint8) * 3
    lab[lab == 0] = 1
    g = PhaseGrid(lab, 0.5, periodic=True)
    a = scattering_curve(g, phase_slds(2.0, 0.0))
    b = scattering_curve(g, phase_slds(4.0, 0.0))
    assert np.allclose(b.intensity, 4 * a.intensity, rtol=1e-4)
    m = scattering_curve(g, phase_slds(2.0, 2.0))
    assert np.all(m.intensity < 1e-10 * a.intensity.max())


def test_power_law_recovers_slope():
    """Least squares in log-log recovers a pure power law exactly (common practice)."""
    q = np.geomspace(0.1, 10, 50)
    from sheetview.measures.scattering import ScatteringResult
    r = ScatteringResult(q, 3 * q ** -3.2, np.ones(50, int), (0.1, 10), {}, 0.0, 1.0, 1.0)
    pl = power_law(r, (0.2, 5))
    assert pl.slope == pytest.approx(-3.2)
    assert pl.prefactor == pytest.approx(3)
    assert pl.slope_stderr < 1e-8


def test_compare_curve_recovers_scale_and_background():
    """A synthetic 'experiment' 2.5 × model + 0.01 is fitted back exactly (linear least
    squares)."""
    rng = np.random.default_rng(1)
    lab = (rng.random((24, 24, 24)) < 0.3).astype(np.uint8)
    res = scattering_curve(PhaseGrid(lab, 0.5, periodic=True), {0: 0.0, 1: 2.0})
    m = res.valid()
    q = np.geomspace(res.q[m][1], res.q[m][-2], 30)
    model = np.exp(np.interp(np.log(q), np.log(res.q[m]), np.log(res.intensity[m])))
    c = compare_curve(res, q, 2.5 * model + 0.01)
    assert c.scale == pytest.approx(2.5, rel=1e-6)
    assert c.background == pytest.approx(0.01, rel=1e-5)
    assert c.chi2_reduced < 1e-10
    with pytest.raises(SheetviewError):
        compare_curve(res, q * 1000, model)


def test_formula_parser():
    """Atom counts of the C-S-H formula of Allen, Thomas & Jennings (2007); molar mass of
    water 18.015 g/mol (IUPAC atomic weights, from memory)."""
    assert parse_formula("(CaO)1.7(SiO2)(H2O)1.8") == pytest.approx(
        {"Ca": 1.7, "O": 5.5, "Si": 1.0, "H": 3.6})
    assert parse_formula("Ca(OH)2") == {"Ca": 1.0, "O": 2.0, "H": 2.0}
    assert molar_mass("H2O") == pytest.approx(18.015, abs=1e-3)
    for bad in ("Xx2", "(H2O", "H2O)", "2H", "", "H2O!"):
        with pytest.raises(OptionError):
            parse_formula(bad)


def test_mixture_is_linear():
    """H2O/D2O mixtures are linear in the D2O volume fraction (ideal mixing, common
    practice): match point of C-S-H (2.55) between H2O (-0.56) and D2O (6.36), all 1e-6 Å^-2,
    at (2.55 + 0.56) / (6.36 + 0.56) = 0.449 D2O (derived from the published values)."""
    assert water_sld(0.5) == pytest.approx(0.5 * (preset_sld("h2o") + preset_sld("d2o")))
    assert preset_sld("30%") == pytest.approx(water_sld(0.3))
    x = (preset_sld("csh") - preset_sld("h2o")) / (preset_sld("d2o") - preset_sld("h2o"))
    assert x == pytest.approx((2.55 + 0.56) / (6.36 + 0.56), rel=0.01)
    with pytest.raises(OptionError):
        preset_sld("1.5")
    with pytest.raises(OptionError):
        preset_sld("mud")


# ------------------------------------------------------------ experimental files
def test_reader_units_from_headers(tmp_path):
    p = tmp_path / "a.csv"
    p.write_text("q (1/A),I (1/cm),dI\n0.01,10,1\n0.02,5,0.5\n0.03,2,0.2\n")
    c = read_experimental(p)
    assert np.allclose(c.x, [0.1, 0.2, 0.3]) and c.unit_found == "Å^-1"
    assert np.allclose(c.sigma, [1, 0.5, 0.2])
    p2 = tmp_path / "b.dat"
    p2.write_text("# q_nm-1 I\n0.1 10\n0.2 5\n0.3 2\n")
    assert np.allclose(read_experimental(p2).x, [0.1, 0.2, 0.3])
    p3 = tmp_path / "c.txt"
    p3.write_text("q\tintensity\n0.1\t1\n0.2\t2\n0.3\t3\n")
    with pytest.raises(InputError, match="c.txt"):
        read_experimental(p3)
    assert np.allclose(read_experimental(p3, unit="A").x, [1, 2, 3])
    p4 = tmp_path / "d.csv"
    p4.write_text("I,q [Å^-1]\n10,0.01\n5,0.02\n2,0.03\n")
    c = read_experimental(p4)
    assert np.allclose(c.x, [0.1, 0.2, 0.3]) and np.allclose(c.y, [10, 5, 2])


def test_reader_drops_and_sorts(tmp_path):
    p = tmp_path / "e.csv"
    p.write_text("q (nm^-1),I\n0.3,2\n0.1,10\n0.2,-1\n0.4,0\n0.5,1\n0.6,0.5\n")
    c = read_experimental(p)
    assert np.allclose(c.x, [0.1, 0.3, 0.5, 0.6])
    assert len(c.warnings) == 2
    assert any("dropped 2" in w for w in c.warnings)


def test_reader_refuses(tmp_path):
    p = tmp_path / "f.csv"
    p.write_text("q (nm^-1),I\n0.1,1\nabc,2\n0.3,3\n")
    with pytest.raises(InputError, match="f.csv.*line 3"):
        read_experimental(p)
    p.write_text("q (nm^-1),I\n0.1,1\n")
    with pytest.raises(InputError, match="fewer than 3"):
        read_experimental(p)
    with pytest.raises(InputError, match="cannot read"):
        read_experimental(tmp_path / "missing.csv")


# ------------------------------------------------------------ command line
def test_scatter_cli(tmp_path):
    exp = tmp_path / "exp.csv"
    q = np.geomspace(0.06, 1.5, 25)  # Å^-1 -> 0.6 to 15 nm^-1
    exp.write_text("q (1/A),I\n" + "".join(f"{a},{1e-3 * a ** -3 + 0.01}\n" for a in q))
    r = CliRunner().invoke(main, ["scatter", SAMPLE, "--voxel", "0.25", "--csv",
                                  str(tmp_path / "c.csv"), "-o", str(tmp_path / "c.png"),
                                  "--json", str(tmp_path / "c.json"), "--compare", str(exp),
                                  "--probe", "xray", "--slope", "1:5"])
    assert r.exit_code == 0, r.output
    lines = [ln for ln in (tmp_path / "c.csv").read_text().splitlines() if not ln.startswith("#")]
    assert lines[0] == "q_nm-1,intensity_cm-1,modes"
    d = json.loads((tmp_path / "c.json").read_text())
    assert d["comparison"]["q_unit"] == "Å^-1"
    assert d["features"]["slope_1-5"]["slope"] < 0
    # the sheets get the layer SLD of the material model: the C-S-H (22.49e-6 A^-2 for
    # X-rays, Allen et al. 2007 composition; checked in test_material_validation) less its
    # interlayer water, whose X-ray SLD (9.4e-6) is lower, so the layers scatter more
    assert d["curve"]["sld_1e-6_A-2"]["solid"] > 22.49
    assert "less its interlayer water" in d["solid"]
    assert (tmp_path / "c.png").stat().st_size > 1000
    # existing outputs are refused without --force, cleanly
    r = CliRunner().invoke(main, ["scatter", SAMPLE, "--voxel", "0.25", "--csv",
                                  str(tmp_path / "c.csv")])
    assert r.exit_code == 2 and "already exists" in r.output


def test_scatter_cli_bad_compare(tmp_path):
    exp = tmp_path / "exp.csv"
    exp.write_text("q,I\n0.1,1\n0.2,2\n0.3,3\n")
    r = CliRunner().invoke(main, ["scatter", SAMPLE, "--voxel", "0.25", "--csv",
                                  str(tmp_path / "c.csv"), "--compare", str(exp)])
    assert r.exit_code == 2
    assert "exp.csv" in r.output and "q unit" in r.output
    assert not (tmp_path / "c.csv").exists()
    r = CliRunner().invoke(main, ["scatter", SAMPLE, "--voxel", "0.25", "--csv",
                                  str(tmp_path / "c.csv"), "--fluid", "1.7"])
    assert r.exit_code == 2 and "fluid" in r.output
    assert not (tmp_path / "c.csv").exists()


def _radial_sums_numpy(F, spacing, nz_full, edges):
    """Pure-numpy reference of the binning kernel: whole arrays, searchsorted and bincount,
    every stored rfftn mode weighted 2 except the kz = 0 and Nyquist planes."""
    nx, ny, nzr = F.shape
    qx = 2 * np.pi * np.fft.fftfreq(nx, d=spacing[0])
    qy = 2 * np.pi * np.fft.fftfreq(ny, d=spacing[1])
    qz = 2 * np.pi * np.fft.rfftfreq(nz_full, d=spacing[2])
    w = np.full(nzr, 2.0)
    w[0] = 1.0
    if nz_full % 2 == 0:
        w[-1] = 1.0
    e2 = np.asarray(edges, dtype=np.float64) ** 2
    nb = e2.size - 1
    q2 = qx[:, None, None] ** 2 + qy[None, :, None] ** 2 + qz[None, None, :] ** 2
    idx = np.searchsorted(e2, q2, side="right") - 1
    idx[(idx < 0) | (idx >= nb)] = nb
    idx = idx.ravel()
    ww = np.broadcast_to(w, q2.shape).ravel()
    p = (np.abs(F.astype(np.complex128)) ** 2).ravel()
    qq = np.sqrt(q2).ravel()
    out = []
    for weights in (ww, ww * p, ww * qq, ww * p * qq, ww * p * p):
        out.append(np.bincount(idx, weights=weights, minlength=nb + 1)[:nb])
    return out


def test_radial_kernel_matches_numpy_reference():
    """The numba binning kernel (mode counts, Σ|F|², Σ|q|, Σ|F|²|q|, Σ|F|⁴) equals a
    pure-numpy reference (searchsorted + bincount over whole arrays) on odd and even grid
    sizes, log-spaced and arbitrary edges."""
    import scipy.fft
    from sheetview.measures.scattering import _radial_sums
    rng = np.random.default_rng(0)
    for shape in ((20, 24, 30), (17, 9, 13)):
        f = rng.random(shape).astype(np.float32)
        F = scipy.fft.rfftn(f)
        sp = (0.3, 0.25, 0.2)
        for edges in (np.geomspace(0.2, 12, 70), np.sort(rng.uniform(0, 20, 15))):
            a = _radial_sums(F, sp, shape[2], edges)
            b = _radial_sums_numpy(F, sp, shape[2], edges)
            assert len(a) == len(b) == 5
            for x, y in zip(a, b):
                assert np.allclose(x, y, rtol=1e-6, atol=1e-9)  # float32 |F|^2


def test_memory_limit_refused_clearly():
    from sheetview.errors import MemoryLimitError
    g = PhaseGrid(np.ones((32, 32, 32), np.uint8), 0.5)
    with pytest.raises(MemoryLimitError, match="--pad 1"):
        scattering_curve(g, {0: 0.0, 1: 1.0}, pad=2, max_memory=10 * 32 ** 3)
    scattering_curve(g, {0: 0.0, 1: 1.0}, pad=1, max_memory=13 * 32 ** 3)


# ------------------------------------------------------------ Porod and peak machinery
def _lattice(sp, m):
    n = np.arange(-m, m + 1)
    G = np.stack(np.meshgrid(*(2 * np.pi * n / h for h in sp), indexing="ij"), -1).reshape(-1, 3)
    return G[np.any(G != 0, axis=1)]


def test_alias_factor_is_the_direction_average_of_the_lattice_sum():
    """c(q) = Σ_G q⁴/(|G|² − q²)² is the average over the directions of q of
    Σ_G q⁴/|q + G|⁴ (the aliases of a K/q⁴ tail): the spherical average of |q + G|^-4 is
    1/(|G|² − q²)² in closed form. Checked on the vectors |i|,|j|,|k| <= 6 against 2048
    quasi-random directions (scipy Sobol), 0.5 %; and the full sum (sheetview's, with its
    far-field integral) against brute-force partial sums over |i|,|j|,|k| <= 30 and 60
    extrapolated in 1/m (the far tail falls as 1/m), 0.3 %. Cubic and anisotropic voxels."""
    from scipy.stats import qmc
    from sheetview.measures.scattering import porod_alias_factor
    u = qmc.Sobol(2, seed=1).random(2048)
    z = 2 * u[:, 0] - 1
    phi = 2 * np.pi * u[:, 1]
    dirs = np.stack([np.sqrt(1 - z * z) * np.cos(phi), np.sqrt(1 - z * z) * np.sin(phi), z], 1)
    for sp in ((0.2, 0.2, 0.2), (0.3, 0.2, 0.25)):
        G = _lattice(sp, 6)
        g2 = np.sum(G ** 2, axis=1)
        for frac in (0.25, 0.45):
            q = frac * np.pi / max(sp)
            mc = np.mean([np.sum(q ** 4 / np.sum((q * d + G) ** 2, axis=1) ** 2) for d in dirs])
            assert np.sum(q ** 4 / (g2 - q * q) ** 2) == pytest.approx(mc, rel=0.005)
            part = [np.sum(q ** 4 / (np.sum(_lattice(sp, m) ** 2, axis=1) - q * q) ** 2)
                    for m in (30, 60)]
            assert porod_alias_factor(q, sp) == pytest.approx(2 * part[1] - part[0], rel=0.003)


def test_alias_integral_matches_quadrature():
    """∫₀^Q c(q) q⁻² dq in closed form per G equals scipy quad of c(q)/q² (1e-6)."""
    from scipy.integrate import quad
    from sheetview.measures.scattering import porod_alias_factor, porod_alias_integral
    for sp, Q in (((0.25, 0.25, 0.25), np.pi / 0.25), ((0.3, 0.2, 0.25), 0.8 * np.pi / 0.3)):
        ref, _ = quad(lambda q: porod_alias_factor(q, sp) / q ** 2, 0, Q, limit=200)
        assert porod_alias_integral(Q, sp) == pytest.approx(ref, rel=1e-6)


def test_porod_given_range_reports_flatness():
    """An explicit Porod range is used as given, with its flatness stated: a pure q^-4
    curve is flat (status ok, K exact), a q^-3.5 one is 'not_flat' with its log-slope
    +0.5 (definition: slope of ln(q⁴I) on ln q) and the number still given."""
    from sheetview.measures.scattering import ScatteringResult, porod
    q = np.geomspace(0.1, 10, 81)
    e = np.stack([q / 10 ** (1 / 160), q * 10 ** (1 / 160)], axis=1)
    r4 = ScatteringResult(q, 5 * q ** -4.0, np.full(81, 50), (0.1, 10), {}, 0.0, 1.0, 1.0,
                          q_edges=e)
    po = porod(r4, q_range=(1, 5))
    assert po.status == "ok" and po.constant == pytest.approx(5, rel=1e-9)
    r35 = ScatteringResult(q, 5 * q ** -3.5, np.full(81, 50), (0.1, 10), {}, 0.0, 1.0, 1.0,
                           q_edges=e)
    po = porod(r35, q_range=(1, 5))
    assert po.status == "not_flat" and po.log_slope == pytest.approx(0.5, abs=0.02)
    assert np.isfinite(po.constant) and "not flat" in po.reason
    with pytest.raises(OptionError):
        porod(r35, q_range=(20, 30))
    with pytest.raises(OptionError):
        porod(r35, flat_tol=0)


def test_scatter_cli_reports_porod_range_and_peaks(tmp_path):
    """`sheetview scatter` says in words whether there is a Porod range and lists the peaks
    with their significance; the JSON carries the same (status, reason, null S/V)."""
    r = CliRunner().invoke(main, ["scatter", SAMPLE, "--voxel", "0.25", "--csv",
                                  str(tmp_path / "c.csv"), "--json", str(tmp_path / "c.json")])
    assert r.exit_code == 0, r.output
    d = json.loads((tmp_path / "c.json").read_text())
    po = d["features"]["porod"]
    bp = d["features"]["bragg_peaks"]
    if po["status"] == "ok":
        assert "Porod: S/V" in r.output and po["s_over_v_nm-1"] > 0
    else:
        assert "Porod: no Porod range: " + po["reason"] in r.output
        assert po["s_over_v_nm-1"] is None and po["porod_constant_cm-1_nm-4"] is None
    assert bp["n_peaks"] == len(bp["q_nm-1"]) == len(bp["significance_sigma"])
    assert all(z >= bp["significance_min_sigma"] for z in bp["significance_sigma"])
    if bp["n_peaks"]:
        assert "sigma or more above the background" in r.output
        assert f"d = 2pi/q {bp['d_nm'][0]:.4g} nm" in r.output
    inv = d["features"]["invariant"]
    assert (inv["porod_tail_cm-4"] is None) == (po["status"] != "ok")


def test_window_median_kernel_matches_numpy():
    """The numba running median / median absolute deviation over the kept points of each
    window equals numpy's median on the same slices (random windows, keep masks with gaps)."""
    from sheetview.measures.scattering import _window_stat
    rng = np.random.default_rng(4)
    n = 60
    y = rng.standard_normal(n)
    keep = rng.random(n) < 0.7
    keep[10:20] = False
    a = np.maximum(0, np.arange(n) - rng.integers(0, 8, n))
    b = np.minimum(n, np.arange(n) + 1 + rng.integers(0, 8, n))
    med = _window_stat(y, keep, a, b, False, 1)
    mad = _window_stat(y, keep, a, b, True, 3)
    for i in range(n):
        v = y[a[i]:b[i]][keep[a[i]:b[i]]]
        ref = np.median(v) if v.size else np.median(y[a[i]:b[i]])
        assert med[i] == pytest.approx(ref, abs=1e-12)
        if v.size >= 3:
            assert mad[i] == pytest.approx(1.4826 * np.median(np.abs(v - np.median(v))), abs=1e-12)
        else:
            assert np.isnan(mad[i])
