"""Unit tests of sheetview.measures.correlation (S2 by FFT against direct pair counts)."""
import numpy as np
import pytest

from sheetview.errors import MemoryLimitError, OptionError
from sheetview.grid import GEL, OUTSIDE, SOLID, PhaseGrid
from sheetview.measures.correlation import s2_map, two_point_correlation


def _direct(m, w, d, periodic):
    """S2 at lattice displacement d by direct pair counting (independent numpy path)."""
    if periodic:
        sh = np.roll(m, tuple(-c for c in d), axis=(0, 1, 2))
        return (m & sh).mean()
    sa, sb = [], []
    for c, n in zip(d, m.shape):
        sa.append(slice(max(0, -c), n - max(0, c)))
        sb.append(slice(max(0, c), n - max(0, -c)))
    sa, sb = tuple(sa), tuple(sb)
    both = (m[sa] & w[sa] & m[sb] & w[sb]).sum()
    pairs = (w[sa] & w[sb]).sum()
    return both / pairs


@pytest.mark.parametrize("periodic", [True, False])
def test_s2_map_matches_direct_counts(periodic):
    rng = np.random.default_rng(0)
    m = rng.random((6, 7, 8)) < 0.4
    w = np.ones_like(m) if periodic else rng.random(m.shape) < 0.8
    s2, pairs = s2_map(m, None if periodic else w, periodic)
    for d in [(0, 0, 0), (1, 0, 0), (0, -2, 1), (3, 3, -3), (-1, 2, 0)]:
        assert s2[d] == pytest.approx(_direct(m, w, d, periodic), abs=1e-12)


def test_radial_average_and_outside_excluded():
    rng = np.random.default_rng(1)
    lab = rng.choice([SOLID, GEL], size=(16, 16, 16)).astype(np.uint8)
    lab[:3] = OUTSIDE
    g = PhaseGrid(lab, spacing=0.3)
    r = two_point_correlation(g, GEL)
    inside = lab != OUTSIDE
    assert r.s2[0] == pytest.approx((lab[inside] == GEL).mean())
    assert r.r[0] == 0 and np.all(np.diff(r.r) > 0)
    assert r.r[-1] <= 0.5 * 16 * 0.3 + 0.3
    # uncorrelated voxels: S2(r > 0) = phi^2 up to noise
    assert np.allclose(r.s2[1:], r.phi ** 2, atol=0.02)
    d = r.to_dict()
    assert len(d["r_nm"]) == len(d["s2"]) and set(r.table()) == {"r_nm", "s2", "pairs"}


def test_errors():
    g = PhaseGrid(np.full((4, 4, 4), GEL, np.uint8))
    with pytest.raises(MemoryLimitError, match="GB"):
        two_point_correlation(g, GEL, max_bytes=10)
    with pytest.raises(OptionError, match="positive"):
        two_point_correlation(g, GEL, bin_width=-1)
    with pytest.raises(OptionError, match="inside the domain"):
        two_point_correlation(PhaseGrid(np.zeros((4, 4, 4), np.uint8)), GEL)
    with pytest.raises(OptionError, match="PhaseGrid"):
        two_point_correlation(np.zeros((4, 4, 4)), GEL)


@pytest.mark.parametrize("periodic", [True, False])
def test_reach_keeps_the_lags_it_names(periodic):
    """A map cut to a reach holds the same values as direct pair counts (independent numpy
    path) at every lag it keeps, in FFT order; the non-periodic one is padded only to
    n + reach (a fast FFT length), not 2 n."""
    from sheetview.measures.correlation import padded_shape
    rng = np.random.default_rng(3)
    m = rng.random((9, 10, 11)) < 0.35
    w = np.ones_like(m) if periodic else rng.random(m.shape) < 0.85
    s2, pairs = s2_map(m, None if periodic else w, periodic, reach=(2, 3, 4))
    assert s2.shape == (5, 7, 9)
    for d in [(0, 0, 0), (2, -3, 4), (-2, 3, -4), (1, 0, -1), (0, -1, 2)]:
        assert s2[d] == pytest.approx(_direct(m, w, d, periodic), abs=1e-12)
    if not periodic:
        pad = padded_shape(m.shape, (2, 3, 4))
        assert all(n + r <= p < 2 * n for n, r, p in zip(m.shape, (2, 3, 4), pad))
        # no window: the pair counts are the exact prod (n_a - |k_a|)
        _, full = s2_map(m, None, False, reach=(2, 3, 4), workers=1)
        assert full[-2, 3, -4] == (9 - 2) * (10 - 3) * (11 - 4)
    with pytest.raises(OptionError, match="reach"):
        s2_map(m, reach=-1)


def test_unbounded_r_max_is_the_whole_grid():
    """An r_max beyond the grid (or infinite) keeps every lag the grid has: the same bins
    as r_max equal to the grid's diagonal (derived: no pair is farther apart)."""
    rng = np.random.default_rng(5)
    g = PhaseGrid(np.where(rng.random((8, 9, 10)) < 0.4, SOLID, GEL).astype(np.uint8), 0.3)
    diag = 0.3 * float(np.sqrt(7 ** 2 + 8 ** 2 + 9 ** 2))
    ref = two_point_correlation(g, SOLID, r_max=diag)
    for rmax in (float("inf"), 1e30):
        r = two_point_correlation(g, SOLID, r_max=rmax)
        np.testing.assert_array_equal(r.r, ref.r)
        np.testing.assert_array_equal(r.s2, ref.s2)
    with pytest.raises(OptionError, match="reach"):
        s2_map(np.ones((3, 3, 3), bool), reach=(1, 2))


def test_crossing_counts_match_direct_counts():
    """The counts C_IW(k) = #{x in phase : x + k inside the domain} at the slope's lags
    (block-skipping kernel) equal direct numpy counts, with OUTSIDE voxels, a grid face
    and periodic wrap (independent numpy path)."""
    from sheetview.measures.correlation import _cross_counts
    rng = np.random.default_rng(7)
    one = rng.choice([SOLID, GEL], size=(23, 19, 21)).astype(np.uint8)
    one[rng.random(one.shape) < 0.05] = OUTSIDE
    one[15:, 10:, :] = OUTSIDE
    two = rng.choice([SOLID, GEL], size=(25, 26, 22)).astype(np.uint8)
    two[-1] = OUTSIDE  # reached only across the periodic wrap from the first layers
    inphase = np.zeros(256, bool)
    inphase[SOLID] = True
    lags = np.array([[1, 0, 0], [-2, 1, 0], [2, 2, -2], [0, -1, 2], [-1, -1, -1]])
    for lab, periodic in ((one, False), (one, True), (two, False), (two, True)):
        m = lab == SOLID
        w = lab != OUTSIDE
        got = _cross_counts(lab, inphase, lags, periodic, int(m.sum()))
        for k, g in zip(lags, got):
            if periodic:
                ref = (m & np.roll(w, tuple(-k), axis=(0, 1, 2))).sum()
            else:
                sa = tuple(slice(max(0, -c), n - max(0, c)) for c, n in zip(k, m.shape))
                sb = tuple(slice(max(0, c), n - max(0, -c)) for c, n in zip(k, m.shape))
                ref = (m[sa] & w[sb]).sum()
            assert g == ref, (periodic, k)


def test_single_precision_path_matches_direct_counts(monkeypatch):
    """Past DOUBLE_PRECISION_POINTS the transforms run in single precision: S2 still
    equals direct pair counts (independent numpy path) to 1e-6."""
    import sheetview.measures.correlation as cm
    monkeypatch.setattr(cm, "DOUBLE_PRECISION_POINTS", 0)
    rng = np.random.default_rng(8)
    m = rng.random((20, 18, 16)) < 0.3
    w = rng.random(m.shape) < 0.9
    s2, _ = s2_map(m, w, False, reach=(5, 4, 3))
    for d in [(0, 0, 0), (5, -4, 3), (-1, 2, 0), (3, 0, -3)]:
        assert s2[d] == pytest.approx(_direct(m, w, d, False), abs=1e-6)


@pytest.mark.parametrize("spacing", [(1.0, 1.0, 1.0), (1.0, 1.0, 2.5), (0.7, 1.0, 1.3)])
def test_direction_quadrature_averages_planar_slopes(spacing):
    """The slope quadrature averages |u . n| over directions u to its exact sphere mean
    1/2 (closed form: the mean of |cos| over the sphere) within its stated error, for
    2,000 random normals n (not those it was fitted on); weights positive, summing to 1.
    On a cubic grid the error is at most 1.4 % (37 directions)."""
    from sheetview.measures.correlation import _quadrature
    d, u, w, err = _quadrature(spacing, 6)
    assert len(d) == 37 and np.all(w >= 0) and w.sum() == pytest.approx(1.0)
    n = np.random.default_rng(0).normal(size=(2000, 3))
    n /= np.linalg.norm(n, axis=1)[:, None]
    avg = np.abs(u @ n.T).T @ w
    assert np.max(np.abs(2 * avg - 1)) <= err + 3e-3  # fitted on other normals
    if spacing == (1.0, 1.0, 1.0):
        assert err < 0.014


def test_small_grid_has_no_slope():
    """A grid too small for the slope's lags reports NaN (JSON null) and says why."""
    g = PhaseGrid(np.where(np.arange(64).reshape(4, 4, 4) % 3 == 0, SOLID, GEL).astype(np.uint8), 0.5)
    r = two_point_correlation(g, SOLID)
    assert np.isnan(r.slope0) and r.to_dict()["slope0_per_nm"] is None
    assert "too small" in r.notes[0]


def _measure(**settings):
    import sheetview as sv
    from sheetview.domain import Sphere
    from sheetview.synth import pack_stacks
    s = pack_stacks(Sphere((0, 0, 0), 5.0), 8, lateral_size="fixed:3", layers="fixed:2",
                    seed=3).structure
    return sv.measure(s, only="phases,correlation", voxel=0.2, **settings)


def test_measure_uses_the_whole_domain():
    """`measure`'s S2 is over the domain: phi is the solid fraction `phases` reports and
    the reference is named; with s2_block, or when max_memory cannot hold the domain's
    transform, a central block is used, named as the reference, and a note says so."""
    m = _measure()
    b = m.correlation
    res = b.s2_solid
    assert res.phi == m.phases.fractions["solid"]
    assert b.reference == "domain" and res.reference == "domain" and not b.notes
    b = _measure(s2_block=20).correlation
    assert b.reference == "central block" == b.s2_solid.reference
    assert b.block_voxels == [20, 20, 20] and "s2_block" in b.notes[0]
    d = b.to_dict()
    assert d["s2_solid"]["reference"] == "central block" and d["notes"]
    # the memory limit of the S2 stage alone (the whole run's grid guard needs more here)
    from sheetview.measures.correlation import correlation_measure
    b = correlation_measure(m.grid, max_memory=3_000_000)
    assert b.reference == "central block" and "max_memory" in b.notes[0]


@pytest.mark.parametrize("shape", [(21, 20, 17), (16, 17, 18)])
def test_symmetric_window_transform_matches_direct_counts(shape):
    """A window mirror-symmetric along each axis (an ellipsoid; odd and even sizes) is
    detected as such (and one voxel off breaks it), and its octant transform gives the
    window pair counts of direct numpy counting at the kept lags (naive reference)."""
    from sheetview.measures.correlation import (_reach, _symmetric_autocorrelation,
                                                _window_mirror_symmetric, padded_shape)
    c = [(np.arange(n) + 0.5 - n / 2) for n in shape]
    w = (c[0][:, None, None] ** 2 / 1.1 + c[1][None, :, None] ** 2
         + c[2][None, None, :] ** 2 / 0.9) <= (min(shape) / 2) ** 2
    lab = np.where(w, GEL, OUTSIDE).astype(np.uint8)
    assert _window_mirror_symmetric(lab)
    lab[0, 0, 0] = GEL
    assert not _window_mirror_symmetric(lab)
    rch = _reach(shape, (5, 7, 4))
    cw = _symmetric_autocorrelation(w, padded_shape(shape, rch), rch, 1)
    assert cw.shape == (11, 15, 9)
    for d in [(0, 0, 0), (5, -7, 4), (-3, 2, 0), (1, 1, -1), (0, 7, -4), (-5, -1, -2)]:
        sa = tuple(slice(max(0, -k), n - max(0, k)) for k, n in zip(d, shape))
        sb = tuple(slice(max(0, k), n - max(0, -k)) for k, n in zip(d, shape))
        assert cw[d] == (w[sa] & w[sb]).sum()
