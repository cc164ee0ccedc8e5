"""2D descriptors (sheetview.measures.planar, sheetview.io.images) checked against closed
forms of integral geometry and of the Boolean model, and against reference libraries
(scikit-image, scipy).

Sources
-------
* Cauchy-Crofton formula in the plane: L. A. Santaló, *Integral Geometry and Geometric
  Probability*, Addison-Wesley 1976 (mean chord of a convex set under isotropic uniform
  random lines = pi A / P).
* Boolean model of discs: J. Serra, *Image Analysis and Mathematical Morphology*,
  Academic Press 1982; D. Stoyan, W. S. Kendall, J. Mecke, *Stochastic Geometry and its
  Applications*, 2nd ed., Wiley 1995 (coverage 1 - exp(-lambda pi R^2); the line meets
  the model in a 1D Boolean model whose gaps are exponential with rate 2 R lambda;
  P(two points r apart uncovered) = exp(-lambda A_union(r))).
* Local thickness: Hildebrand & Rüegsegger, J. Microsc. 185 (1997) 67 (definition,
  checked here against a brute-force evaluation of that definition).
* Structure tensor: scikit-image ``skimage.feature.structure_tensor`` (reference library).
* Otsu threshold: scikit-image ``skimage.filters.threshold_otsu`` (reference library).
* Luma: Recommendation ITU-R BT.709-6 (2015), item 3.2: Y = 0.2126 R + 0.7152 G + 0.0722 B.
"""
from __future__ import annotations

import math

import numba
import numpy as np
import pytest
from scipy import stats

from sheetview.measures import planar as P

# ============================================================== Boolean model


@numba.njit(cache=True)
def _paint_discs(n, cx, cy, R):
    m = np.zeros((n, n), dtype=np.bool_)
    r2 = R * R
    for i in range(cx.size):
        x0 = max(int(math.floor(cx[i] - R)), 0)
        x1 = min(int(math.ceil(cx[i] + R)), n - 1)
        y0 = max(int(math.floor(cy[i] - R)), 0)
        y1 = min(int(math.ceil(cy[i] + R)), n - 1)
        for y in range(y0, y1 + 1):
            for x in range(x0, x1 + 1):
                if (x - cx[i]) ** 2 + (y - cy[i]) ** 2 <= r2:
                    m[y, x] = True
    return m


def boolean_discs(n, R, lam, seed):
    """Boolean model of discs of radius R (pixels) with Poisson centres of intensity
    ``lam`` (per pixel^2), seen on an n x n image whose pixel centres are at integer
    coordinates. Centres are drawn in the window dilated by R (plus the half pixel), so
    every disc that reaches a pixel centre is present (no edge deficit)."""
    rng = np.random.default_rng(seed)
    lo, hi = -0.5 - R, n - 0.5 + R
    k = rng.poisson(lam * (hi - lo) ** 2)
    c = rng.uniform(lo, hi, (k, 2))
    return _paint_discs(n, c[:, 0].copy(), c[:, 1].copy(), float(R))


def lens(r, R):
    """Area of the intersection of two discs of radius R, centres r apart (Serra 1982)."""
    r = np.minimum(np.asarray(r, float), 2 * R)
    return 2 * R * R * np.arccos(r / (2 * R)) - 0.5 * r * np.sqrt(np.maximum(4 * R * R - r * r, 0))


def pore_pair_probability(r, R, lam):
    """P(two points r apart both uncovered) = exp(-lambda (2 pi R^2 - lens(r)))."""
    return np.exp(-lam * (2 * math.pi * R * R - lens(r, R)))


def coverage_se_one_image(n, R, lam):
    """Exact standard deviation of the pixel-centre coverage estimate on one n x n image:
    Var = sum_{i,j} C(x_i - x_j) / N^2 with the covariance C(r) = q^2 (exp(lambda
    lens(r)) - 1) of the Boolean model (q the uncovered probability)."""
    q = math.exp(-lam * math.pi * R * R)
    k = int(math.ceil(2 * R))
    dy, dx = np.mgrid[-k:k + 1, -k:k + 1]
    r = np.hypot(dx, dy)
    C = np.where(r < 2 * R, q * q * (np.exp(lam * lens(r, R)) - 1.0), 0.0)
    cnt = (n - np.abs(dx)) * (n - np.abs(dy))
    return math.sqrt(float((C * cnt).sum())) / (n * n)


def ratio_se(num, den):
    """Standard error of sum(num) / sum(den) over independent realisations (delta method,
    common practice for ratio estimators)."""
    num = np.asarray(num, float)
    den = np.asarray(den, float)
    m = num.sum() / den.sum()
    k = num.size
    return m, math.sqrt(k / (k - 1) * np.sum((num - m * den) ** 2)) / den.sum()


N_IMG, R_DISC, PHI_SOLID, N_REAL, LINES_PER_IMAGE = 512, 10.0, 0.5, 60, 40
LAM = -math.log(1 - PHI_SOLID) / (math.pi * R_DISC ** 2)
CUT_PX = 2.0  # memoryless check: chords longer than this, minus this
S2_RMAX = 30


@pytest.fixture(scope="module")
def boolean_runs():
    """N_REAL independent realisations: coverage, chords and S2 (full image and through a
    circular window) of each."""
    yy, xx = np.indices((N_IMG, N_IMG))
    c = 0.5 * (N_IMG - 1)
    window = (xx - c) ** 2 + (yy - c) ** 2 <= (0.45 * N_IMG) ** 2
    out = {"window": window, "cover": [], "grid_num": [], "grid_den": [], "mem_num": [],
           "mem_den": [], "random": [], "T": [], "s2": [], "s2w": [], "phi_pore": []}
    for s in range(N_REAL):
        m = boolean_discs(N_IMG, R_DISC, LAM, 1000 + s)
        af = P.area_fraction(m)
        out["cover"].append(af.area_fraction)
        ch = P.chords_2d(m, 1.0, n_lines=LINES_PER_IMAGE, seed=s)
        # rows and columns: edge-corrected pore runs
        Lg = np.concatenate([ch.chords("pore", "rows"), ch.chords("pore", "cols")])
        Wg = np.concatenate([ch.weights("pore", "rows"), ch.weights("pore", "cols")])
        out["grid_num"].append(np.sum(Wg * Lg))
        out["grid_den"].append(np.sum(Wg))
        L = ch.chords("pore", "random")
        W = ch.weights("pore", "random")
        sel = L > CUT_PX
        out["mem_num"].append(np.sum(W[sel] * (L[sel] - CUT_PX)))
        out["mem_den"].append(np.sum(W[sel]))
        out["random"].append(L)
        _, _, _, _, t0, t1 = P.iur_lines_2d(LINES_PER_IMAGE, m.shape, s)
        out["T"].append(t1 - t0)
        pore = ~m
        out["s2"].append(P.s2_2d(pore, 1.0, r_max=S2_RMAX))
        out["s2w"].append(P.s2_2d(pore, 1.0, valid=window, r_max=S2_RMAX))
        out["phi_pore"].append(P.area_fraction(pore).area_fraction)
    return out


def test_boolean_area_fraction(boolean_runs):
    """Coverage of the Boolean model of discs: 1 - exp(-lambda pi R^2) (Serra 1982; Stoyan,
    Kendall & Mecke 1995). Tolerance 3 standard errors, the standard error from the exact
    covariance of the model (see coverage_se_one_image) over N_REAL images."""
    est = float(np.mean(boolean_runs["cover"]))
    expect = 1 - math.exp(-LAM * math.pi * R_DISC ** 2)
    se = coverage_se_one_image(N_IMG, R_DISC, LAM) / math.sqrt(N_REAL)
    assert abs(est - expect) < 3 * se, (est, expect, se)
    assert se < 0.005  # the test resolves better than 1 % of the coverage


def test_boolean_pore_runs_along_rows_and_columns(boolean_runs):
    """Pore runs along rows/columns of pixel centres: the 1D Boolean model's gaps are
    exponential with rate beta = 2 R lambda, so the number of consecutive uncovered
    lattice points is geometric with mean 1 / (1 - exp(-beta)) (memorylessness of the
    Poisson left ends; Stoyan, Kendall & Mecke 1995). Edge-corrected mean (weights
    1 / (N - n - 1)); tolerance 3 standard errors across realisations."""
    m, se = ratio_se(boolean_runs["grid_num"], boolean_runs["grid_den"])
    expect = 1.0 / (1.0 - math.exp(-2 * R_DISC * LAM))
    assert abs(m - expect) < 3 * se, (m, expect, se)
    assert se / expect < 0.02


def _ks_cdf(T, mu, c):
    """CDF of the uncut chords longer than c seen on lines whose window intercepts are T:
    density proportional to exp(-l / mu) sum_i (T_i - l)^+ (a chord of length l lies
    wholly inside an intercept on T_i - l of its positions). With A(l, T) = mu
    exp(-l/mu) (l - T + mu), an antiderivative of exp(-l/mu) (T - l), the CDF at x sums
    A(min(x, T_i), T_i) - A(c, T_i) over the T_i > c: linear in T_i where T_i > x, so it is
    evaluated with prefix sums over the sorted T_i."""
    T = np.sort(T[T > c])

    def A(l, Ti):
        return mu * np.exp(-l / mu) * (l - Ti + mu)

    inner = A(T, T) - A(c, T)  # the whole term of an intercept shorter than x
    cs_inner = np.concatenate([[0.0], np.cumsum(inner)])
    cs_T = np.concatenate([[0.0], np.cumsum(T)])
    den = cs_inner[-1]

    def cdf(x):
        x = np.maximum(np.atleast_1d(np.asarray(x, float)), c)
        k = np.searchsorted(T, x, side="right")  # intercepts with T_i <= x
        n_long = T.size - k
        sum_long = cs_T[-1] - cs_T[k]
        ex, ec = mu * np.exp(-x / mu), mu * np.exp(-c / mu)
        long = n_long * (ex * (x + mu) - ec * (c + mu)) - sum_long * (ex - ec)
        return (cs_inner[k] + long) / den
    return cdf


def test_boolean_pore_chords_memoryless_mean_and_ks(boolean_runs):
    """Pore chords on isotropic random lines through the Boolean model of discs are
    exponential with mean 1 / (2 R lambda) (Serra 1982; Stoyan, Kendall & Mecke 1995).

    * Mean: by memorylessness, chords longer than c = 2 px, minus c, have the same mean
      (gaps narrower than about a pixel cannot appear on a digitised image); weighted by
      the edge correction; 3 standard errors (ratio estimator across realisations).
    * Distribution: KS test (scipy.stats.kstest) of the unweighted uncut chords longer
      than c against the exponential seen through the actual line intercepts (density
      proportional to exp(-l/mu) sum_i (T_i - l)^+), p > 0.001; the same chords scaled
      by 0.95 and 1.05 must be rejected (p < 0.001), which shows the test can fail."""
    mu = 1.0 / (2 * R_DISC * LAM)
    m, se = ratio_se(boolean_runs["mem_num"], boolean_runs["mem_den"])
    assert abs(m - mu) < 3 * se, (m, mu, se)
    assert se / mu < 0.03
    L = np.concatenate(boolean_runs["random"])
    T = np.concatenate(boolean_runs["T"])
    Lc = L[L > CUT_PX]
    assert Lc.size > 5000
    cdf = _ks_cdf(T, mu, CUT_PX)
    assert stats.kstest(Lc, cdf).pvalue > 1e-3
    for f in (0.95, 1.05):
        assert stats.kstest(Lc * f, cdf).pvalue < 1e-3, f


def _model_bins(R, lam, rmax, window=None):
    """The model S2 averaged over the lattice displacements of each one-pixel bin (the
    binning of s2_2d), weighted by the number of valid pixel pairs at each displacement:
    (n - |dy|)(n - |dx|) on the full image, the window's autocorrelation (scipy.signal)
    through a window."""
    k = rmax
    dy, dx = np.mgrid[-k:k + 1, -k:k + 1]
    r = np.hypot(dx, dy)
    ok = r <= rmax + 1e-9
    if window is None:
        w = ((N_IMG - np.abs(dy)) * (N_IMG - np.abs(dx))).astype(float)
    else:
        from scipy.signal import correlate

        full = correlate(window.astype(float), window.astype(float), mode="full",
                         method="fft")
        c0 = np.array(window.shape) - 1
        w = np.rint(full[c0[0] - k:c0[0] + k + 1, c0[1] - k:c0[1] + k + 1])
    b = np.ceil(r[ok] - 1e-9).astype(int)
    val = pore_pair_probability(r[ok], R, lam)
    return np.bincount(b, w[ok] * val) / np.bincount(b, w[ok])


@pytest.mark.parametrize("key", ["s2", "s2w"])
def test_boolean_pore_two_point_probability(boolean_runs, key):
    """S2 of the pore phase of the Boolean model of discs: exp(-lambda (2 pi R^2 -
    lens(r))) for r < 2R, q^2 beyond, with lens(r) = 2 R^2 acos(r / 2R) - (r/2)
    sqrt(4 R^2 - r^2) (Serra 1982). Averaged over N_REAL realisations, every one-pixel bin
    up to 3R within 4 standard errors (spread across realisations); both on the full
    image and through a circular window (only valid pairs counted). S2(0) equals the
    area fraction computed by counting (exact identity)."""
    runs = boolean_runs[key]
    S = np.array([r.s2 for r in runs])
    model = _model_bins(R_DISC, LAM, S2_RMAX,
                        boolean_runs["window"] if key == "s2w" else None)
    mean = S.mean(axis=0)
    se = S.std(axis=0, ddof=1) / math.sqrt(len(runs))
    assert mean.size == S2_RMAX + 1
    assert np.all(np.abs(mean - model) < 4 * se), np.max(np.abs(mean - model) / se)
    assert np.max(se) < 0.005
    if key == "s2":
        phis = np.array(boolean_runs["phi_pore"])
        np.testing.assert_allclose(S[:, 0], phis, atol=1e-12)
    # beyond 2R the pore pairs are independent: S2 = q^2
    q = math.exp(-LAM * math.pi * R_DISC ** 2)
    far = runs[0].r > 2 * R_DISC + 1
    assert np.all(np.abs(mean[far] - q * q) < 4 * se[far])


# ================================================================ chords: disc


def _disc(n, R, c):
    y, x = np.indices((n, n))
    return (x - c[0]) ** 2 + (y - c[1]) ** 2 <= R * R


@pytest.mark.parametrize("pixel", [1.0, 0.25])
def test_disc_mean_chord_cauchy_crofton(pixel):
    """Disc of radius R = 40 px under isotropic uniform random lines: mean chord
    pi A / P = pi R / 2 (Cauchy-Crofton; Santaló 1976), within 2 %. The disc lies wholly
    inside the image, so the plain mean of the (uncut) chords is the IUR mean (the edge
    correction is for textures that run past the window). Rows and columns: A / (2R)
    = pi R / 2 as well (mean chord in a fixed direction = area / width). The number of
    chords checks the line measure: one per line meeting the disc."""
    R = 40.0
    m = _disc(128, R, (63.3, 63.83))
    ch = P.chords_2d(m, pixel, n_lines=20000, seed=3)
    expect = math.pi * R * pixel / 2
    assert ch.mean("solid", "random", corrected=False) == pytest.approx(expect, rel=0.02)
    assert ch.mean("solid", "rows", corrected=False) == pytest.approx(expect, rel=0.02)
    assert ch.mean("solid", "cols", corrected=False) == pytest.approx(expect, rel=0.02)
    # one chord per line meeting the disc: of the lines meeting the image square, the
    # fraction meeting the disc is perimeter(disc) / perimeter(square) (Crofton: the
    # measure of the lines meeting a convex set is its perimeter; Santaló 1976)
    nchord = ch.chords("solid", "random").size
    p_hit = (2 * math.pi * R) / (4 * 128)
    assert nchord == pytest.approx(20000 * p_hit, rel=0.03)


# ============================================================= local thickness


def brute_force_thickness(phase):
    """The definition evaluated naively: walls are the non-phase pixels and a frame
    around the image; d2(x) = min squared distance from phase pixel x to a wall pixel
    centre; each phase pixel q takes max{2 sqrt(d2(x)) - 1 : |q - x|^2 < d2(x)}."""
    M, L = phase.shape
    pad = np.zeros((M + 2, L + 2), bool)
    pad[1:-1, 1:-1] = phase
    wy, wx = np.nonzero(~pad)
    wy, wx = wy - 1, wx - 1
    py, px = np.nonzero(phase)
    d2 = ((py[:, None] - wy[None]) ** 2 + (px[:, None] - wx[None]) ** 2).min(axis=1)
    D2 = (py[:, None] - py[None]) ** 2 + (px[:, None] - px[None]) ** 2
    val = np.where(D2 < d2[None, :], 2 * np.sqrt(d2[None, :]) - 1, -np.inf).max(axis=1)
    out = np.full(phase.shape, np.nan)
    out[py, px] = val
    return out


@pytest.mark.parametrize("seed", range(6))
def test_local_thickness_equals_brute_force(seed):
    """Local thickness (Hildebrand & Rüegsegger 1997) on small random images equals the
    brute-force maximum over all inscribed discs covering each pixel (both phases)."""
    from scipy import ndimage as ndi

    rng = np.random.default_rng(seed)
    img = ndi.gaussian_filter(rng.random((26, 31)), rng.uniform(0.6, 2.5)) > 0.5
    res = P.local_thickness_2d(img, 0.7)
    for ph, sel in (("solid", img), ("pore", ~img)):
        ref = brute_force_thickness(sel) * 0.7
        got = res.maps[ph]
        assert np.array_equal(np.isnan(got), np.isnan(ref))
        np.testing.assert_allclose(got[sel], ref[sel], atol=1e-5)


@pytest.mark.parametrize("R", [6.0, 15.0, 31.0])
def test_local_thickness_disc(R):
    """A disc of diameter D = 2R gives D everywhere (Hildebrand & Rüegsegger 1997): within
    one pixel for a disc centred on a pixel centre. Off the lattice the inscribed discs
    are centred up to 0.7 px from the true centre and the rim is digitised: the
    area-weighted mean is then within 2.5 pixels below D (measured 1.3-2.2 px below)."""
    h = 0.5
    n = int(2 * R + 12)
    c = n // 2
    m = _disc(n, R, (c, c))
    lt = P.local_thickness_2d(m, h).maps["solid"][m]
    assert np.max(np.abs(lt - 2 * R * h)) <= h + 1e-5
    m2 = _disc(n, R, (c + 0.31, c - 0.23))
    lt2 = P.local_thickness_2d(m2, h).maps["solid"][m2]
    assert 2 * R * h - 2.5 * h <= lt2.mean() <= 2 * R * h


@pytest.mark.parametrize("w", [5, 8, 13])
def test_local_thickness_strip(w):
    """A strip w pixels wide gives w (Hildebrand & Rüegsegger 1997): exactly w pixels for
    odd w, w - 1 for even w (disc centres on pixel centres). The image border is a wall,
    so only the strip's middle (farther than w from its ends) is checked; the pore on
    either side (also strips) likewise."""
    h = 0.8
    m = np.zeros((w + 30, 6 * w + 20), bool)
    m[10:10 + w] = True
    res = P.local_thickness_2d(m, h)
    mid = slice(w + 2, m.shape[1] - w - 2)
    expect = (w if w % 2 else w - 1) * h
    np.testing.assert_allclose(res.maps["solid"][10:10 + w, mid], expect, atol=1e-5)
    assert res.mean["solid"] <= expect + 1e-5


_RNG = np.random.default_rng(2718)
_TILTED = [(w, float(_RNG.uniform(0, 180)), float(_RNG.uniform(-0.5, 0.5)))
           for w in (5.0, 8.0, 12.3, 13.0) for _ in range(2)]


@pytest.mark.parametrize("w,angle,offset", _TILTED)
def test_local_thickness_tilted_strip(w, angle, offset):
    """A strip of width w px at a random angle and sub-pixel offset (Hildebrand & Rüegsegger
    1997: local thickness w): away from the image border every pixel reads within
    [w - 1.5, w + 1] px and the mean within [w - 1, w + 0.5] px (the digitised strip is
    locally up to a pixel narrower or wider than w; measured means 0.3-0.9 px below w)."""
    n, h = 160, 0.5
    r, c = np.indices((n, n)).astype(float)
    a = math.radians(angle)
    d = (c - n / 2) * math.cos(a) + (r - n / 2) * math.sin(a) + offset
    m = np.abs(d) <= w / 2
    lt = P.local_thickness_2d(m, h).maps["solid"] / h
    inner = m & (np.minimum.reduce([r, c, n - 1 - r, n - 1 - c]) > w + 2)
    v = lt[inner]
    assert v.size > 100
    assert np.all((v >= w - 1.5) & (v <= w + 1.0)), (v.min(), v.max())
    assert w - 1.0 <= v.mean() <= w + 0.5


# ================================================================ orientation


def stripes(angle_deg, n=256, period=12.0, binary=False, phase=0.0):
    """Stripes running at angle_deg counter-clockwise from +x (columns), y up."""
    r, c = np.indices((n, n)).astype(float)
    a = math.radians(angle_deg)
    nx, ny = -math.sin(a), math.cos(a)  # normal to the stripes in (x, y_up)
    g = np.cos(2 * math.pi * ((c * nx - r * ny) / period + phase))
    return g > 0 if binary else g


@pytest.mark.parametrize("angle", [0.0, 30.0, 75.0, 120.0]
                         + [round(float(a), 3) for a in _RNG.uniform(0, 180, 3)])
@pytest.mark.parametrize("binary", [False, True])
def test_orientation_of_stripes(angle, binary):
    """Stripes at a known angle (four fixed, three random) and a random phase: the structure
    tensor (Bigün & Granlund 1987; Jähne, Digital Image Processing) gives that angle within
    1 degree and an order parameter of about 1 (grey and binarised stripes)."""
    phase = float(np.random.default_rng(int(angle * 1000)).uniform())
    o = P.orientation_2d(stripes(angle, binary=binary, phase=phase), 0.5)
    d = (o.angle - angle + 90.0) % 180.0 - 90.0
    assert abs(d) < 1.0, o.angle
    assert o.order > 0.99
    assert o.coherence > 0.95
    assert o.histogram.sum() == pytest.approx(1.0)
    k = int(np.argmax(o.histogram))
    assert o.bin_edges[k] - 5 <= angle % 180 <= o.bin_edges[k + 1] + 5


def test_orientation_of_isotropic_noise():
    """White noise is isotropic: the order parameter <cos 2(theta - theta0)> is near 0
    (common practice: its expected magnitude falls as one over the root of the number of
    independent local orientations)."""
    rng = np.random.default_rng(5)
    for k in range(3):
        o = P.orientation_2d(rng.random((384, 384)), 1.0)
        assert abs(o.order) < 0.08


def test_structure_tensor_matches_skimage():
    """With Sobel derivatives the tensor equals skimage.feature.structure_tensor divided by
    64 (skimage leaves out the 1/8 of each Sobel derivative), and the dominant angle from
    skimage's unsmoothed tensor (x = column, y = -row) is the one orientation_2d reports."""
    from skimage.feature import structure_tensor

    rng = np.random.default_rng(2)
    img = rng.random((48, 70)) + stripes(33.0, n=70, period=9.0)[:48]
    for sigma in (0.8, 1.5, 3.0):
        ours = P.structure_tensor_2d(img, sigma, derivative="sobel")
        ref = structure_tensor(img, sigma=sigma, mode="reflect", order="rc")
        for a, b in zip(ours, ref):
            np.testing.assert_allclose(a * 64.0, b, rtol=1e-10, atol=1e-10)
    Arr, Arc, Acc = structure_tensor(img, sigma=0.0, mode="reflect", order="rc")
    Jxx, Jyy, Jxy = Acc.sum(), Arr.sum(), -Arc.sum()
    ref_angle = (math.degrees(0.5 * math.atan2(2 * Jxy, Jxx - Jyy)) + 90.0) % 180.0
    o = P.orientation_2d(img, 1.0, derivative="sobel", sigma_nm=0.0)
    assert o.angle == pytest.approx(ref_angle, abs=1e-9)


# ============================================================== image reading


def test_otsu_threshold_matches_skimage(tmp_path):
    """Otsu threshold of a bimodal 8-bit image equals skimage.filters.threshold_otsu of the
    stored values (reference library; integer images keep their type, one histogram bin
    per grey level) and falls between the two modes (60 and 180); on a 16-bit RGBA TIFF
    with transparent pixels, it is the threshold of the valid pixels only."""
    from PIL import Image
    from skimage.filters import threshold_otsu

    from sheetview.io.images import read_micrograph

    rng = np.random.default_rng(0)
    img = np.where(rng.random((80, 90)) < 0.4, rng.normal(60, 12, (80, 90)),
                   rng.normal(180, 15, (80, 90)))
    img = np.clip(np.rint(img), 0, 255).astype(np.uint8)
    p = tmp_path / "bimodal.png"
    Image.fromarray(img).save(p)
    mg = read_micrograph(p, pixel_size=1.0)
    assert mg.threshold_method == "otsu"
    assert mg.threshold == threshold_otsu(img)
    assert 90 < mg.threshold < 150
    np.testing.assert_array_equal(mg.mask, img > threshold_otsu(img))
    # 16-bit with transparent pixels left out: the threshold of the valid values only
    img16 = (img.astype(np.uint16) * 200 + 7)
    alpha = np.full(img.shape, 65535, np.uint16)
    alpha[:, :30] = 0
    rgba = np.dstack([img16, img16, img16, alpha])
    import tifffile
    tifffile.imwrite(tmp_path / "b16.tif", rgba, photometric="rgb", extrasamples=[2])
    mg16 = read_micrograph(tmp_path / "b16.tif", pixel_size=1.0)
    assert mg16.threshold == threshold_otsu(img16[:, 30:])
    assert not mg16.valid[:, :30].any() and mg16.valid[:, 30:].all()


def test_bt709_luma(tmp_path):
    """RGB is converted with the ITU-R BT.709-6 (item 3.2) luma weights
    Y = 0.2126 R + 0.7152 G + 0.0722 B, applied to the stored values."""
    from PIL import Image

    from sheetview.io.images import read_micrograph

    rng = np.random.default_rng(1)
    rgb = rng.integers(0, 256, (40, 50, 3), dtype=np.uint8)
    p = tmp_path / "c.png"
    Image.fromarray(rgb).save(p)
    mg = read_micrograph(p, pixel_size=2.0)
    expect = 0.2126 * rgb[..., 0] + 0.7152 * rgb[..., 1] + 0.0722 * rgb[..., 2]
    np.testing.assert_allclose(mg.grey, expect, rtol=0, atol=1e-9)
    assert any("BT.709" in n for n in mg.notes)
    # pure primaries give the weights themselves
    prim = np.zeros((20, 20, 3), np.uint8)
    prim[:, :7, 0] = 100
    prim[:, 7:14, 1] = 100
    prim[:, 14:, 2] = 100
    Image.fromarray(prim).save(tmp_path / "p.png")
    g = read_micrograph(tmp_path / "p.png", pixel_size=1.0, threshold=10).grey
    assert g[0, 0] == pytest.approx(21.26) and g[0, 10] == pytest.approx(71.52)
    assert g[0, 17] == pytest.approx(7.22)
