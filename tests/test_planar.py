"""2D descriptors of binary images (sheetview.measures.planar): behaviour, edge handling,
options and errors. Closed-form validation is in tests/validation/test_planar_validation.py."""
from __future__ import annotations

import json
import math

import numpy as np
import pytest
from scipy import ndimage as ndi

from sheetview.cli.common import dumps
from sheetview.errors import OptionError
from sheetview.measures import planar as P


def blobs(shape=(60, 70), seed=0, sigma=2.0):
    rng = np.random.default_rng(seed)
    return ndi.gaussian_filter(rng.random(shape), sigma) > 0.5


def naive_runs(code):
    """Runs along rows by a plain loop: (value, start, length, valid stretch start,
    valid stretch length) for runs of value 0/1."""
    out = []
    for row in code:
        L = row.size
        k = 0
        while k < L:
            j = k
            while j < L and row[j] == row[k]:
                j += 1
            if row[k] >= 0:
                a = k
                while a > 0 and row[a - 1] >= 0:
                    a -= 1
                b = j
                while b < L and row[b] >= 0:
                    b += 1
                out.append((int(row[k]), k, j - k, a, b - a))
            k = j
    return out


# ================================================================= area fraction

def test_area_fraction_counts_only_valid_pixels():
    """Point counting on the pixel centres (common practice): solid / valid."""
    m = np.zeros((10, 10), bool)
    m[:, :4] = True
    v = np.ones_like(m)
    v[:, 8:] = False
    a = P.area_fraction(m, v)
    assert (a.n_solid, a.n_valid, a.n_pixels) == (40, 80, 100)
    assert a.area_fraction == 0.5
    assert P.area_fraction(m).area_fraction == 0.4
    m2 = m.copy()
    m2[:, 9] = True  # solid on invalid pixels does not count
    assert P.area_fraction(m2, v).area_fraction == 0.5


# ======================================================================= chords

def test_row_chords_by_hand():
    """Runs along a row, counted by hand: lengths in pixels times the pixel size; a run
    touching the row ends is cut; weights 1 / ((N - n - 1) pixel)."""
    m = np.array([[0, 1, 1, 0, 0, 0, 1, 0]], bool)
    ch = P.chords_2d(m, 0.5, directions="rows")
    np.testing.assert_allclose(ch.lengths["solid"], [1.0, 0.5])
    assert not ch.cut["solid"].any()
    np.testing.assert_allclose(ch.weight["solid"], [1 / (5 * 0.5), 1 / (6 * 0.5)])
    np.testing.assert_allclose(ch.lengths["pore"], [0.5, 1.5, 0.5])
    np.testing.assert_array_equal(ch.cut["pore"], [True, False, True])
    np.testing.assert_allclose(ch.weight["pore"], [0, 1 / (4 * 0.5), 0])
    assert ch.mean("pore", corrected=False) == 1.5
    assert ch.n_lines == {"rows": 1}


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_row_and_column_chords_match_a_plain_loop(seed):
    """Rows and columns (vectorised run lengths) equal a plain loop over every row and
    column, with invalid pixels cutting the runs they touch."""
    m = blobs((23, 31), seed, 1.2)
    rng = np.random.default_rng(seed + 10)
    v = rng.random(m.shape) > 0.08
    ch = P.chords_2d(m, 1.0, valid=v, directions=("rows", "cols"))
    code = np.where(v, m.astype(np.int8), np.int8(-1))
    for d, arr in ((0, code), (1, code.T)):
        ref = naive_runs(arr)
        for val, ph in ((1, "solid"), (0, "pore")):
            rr = [r for r in ref if r[0] == val]
            sel = ch.direction[ph] == d
            np.testing.assert_array_equal(ch.lengths[ph][sel], [r[2] for r in rr])
            cut = [r[1] == r[3] or r[1] + r[2] == r[3] + r[4] for r in rr]
            np.testing.assert_array_equal(ch.cut[ph][sel], cut)
            w = [0.0 if c else 1.0 / (r[4] - r[2] - 1) for r, c in zip(rr, cut)]
            np.testing.assert_allclose(ch.weight[ph][sel], w)


def test_random_lines_are_reproducible_and_seeded():
    m = blobs()
    a = P.chords_2d(m, 1.0, n_lines=300, seed=4, directions="random")
    b = P.chords_2d(m, 1.0, n_lines=300, seed=4, directions="random")
    c = P.chords_2d(m, 1.0, n_lines=300, seed=5, directions="random")
    np.testing.assert_array_equal(a.lengths["solid"], b.lengths["solid"])
    assert not np.array_equal(a.lengths["solid"], c.lengths["solid"])
    assert a.n_lines == {"random": 300}


def test_random_lines_follow_the_motion_invariant_measure():
    """Isotropic uniform random lines hitting a convex window: the density of their
    direction theta is proportional to the window's width across it, here
    L |sin theta| + M |cos theta| for an L x M rectangle (Santaló 1976: the measure of the
    lines of one direction meeting a convex set is its projected width). KS test
    (scipy.stats.kstest) against that law for a 80 x 50 image, and against the uniform
    law for a square; the intercepts end on the image rectangle."""
    from scipy import stats

    def cdf_rect(L, M):
        def F(t):
            t = np.asarray(t, float)
            s_abs = np.where(t <= np.pi / 2, np.sin(t), 2 - np.sin(t))  # int |cos|
            return (L * (1 - np.cos(t)) + M * s_abs) / (2 * L + 2 * M)
        return F

    for M, L in ((50, 80), (64, 64)):
        ox, oy, ux, uy, t0, t1 = P.iur_lines_2d(6000, (M, L), seed=1)
        assert ox.size == 6000 and np.all(t1 > t0)
        th = np.mod(np.arctan2(uy, ux), np.pi)
        assert stats.kstest(th, cdf_rect(L, M)).pvalue > 1e-3
        if M == L:
            assert stats.kstest(th / np.pi, "uniform").pvalue > 1e-3
        else:  # the uniform law is rejected: the test can tell the two apart
            assert stats.kstest(th / np.pi, "uniform").pvalue < 1e-3
        for t in (t0, t1):
            x, y = ox + t * ux, oy + t * uy
            on = (np.isclose(x, -0.5) | np.isclose(x, L - 0.5) | np.isclose(y, -0.5)
                  | np.isclose(y, M - 0.5))
            assert on.all()


def test_random_chords_stop_at_invalid_pixels():
    """Through a circular window, a solid disc in its middle: every solid chord is whole
    (uncut, mean pi R / 2 for R = 15 px within 3 %), every pore chord touches the window
    edge (cut)."""
    n = 101
    y, x = np.indices((n, n))
    r = np.hypot(x - 50, y - 50)
    valid = r <= 45
    m = r <= 15
    ch = P.chords_2d(m, 1.0, valid=valid, n_lines=4000, seed=0)
    assert not ch.cut["solid"].any()
    assert ch.cut["pore"].all()
    assert ch.mean("solid", "random", corrected=False) == pytest.approx(math.pi * 15 / 2,
                                                                         rel=0.03)
    assert np.isnan(ch.mean("pore"))
    assert ch.lengths["pore"].max() <= 90.0 + 0.5


def test_line_step_and_hysteresis_are_checked():
    m = blobs()
    for kw in ({"line_step": 0}, {"line_step": 1.5}, {"hysteresis": 0.5},
               {"hysteresis": -0.1}, {"n_lines": 0}, {"directions": ("diagonal",)},
               {"directions": ()}):
        with pytest.raises(OptionError):
            P.chords_2d(m, 1.0, **kw)


def test_chords_of_an_image_with_one_phase():
    m = np.ones((30, 40), bool)
    ch = P.chords_2d(m, 1.0, n_lines=50, seed=0)
    assert ch.cut["solid"].all() and ch.lengths["pore"].size == 0
    d = ch.to_dict()
    assert d["phases"]["pore"]["mean_nm"] is None
    json.loads(dumps(d))


def test_chord_table_columns():
    ch = P.chords_2d(blobs(), 2.0, n_lines=100, seed=0)
    t = ch.table()
    n = sum(ch.lengths[p].size for p in P.PHASES)
    assert all(len(c) == n for c in t.values())
    assert set(t["direction"]) == {"rows", "cols", "random"}
    assert set(t["phase"]) == {"solid", "pore"}
    assert np.all(t["weight_per_nm"][t["cut"] == 1] == 0)


# ============================================================== local thickness

def test_thickness_general_path_matches_the_grid_path(monkeypatch):
    """The fallback for distances beyond the exact float32 range (pores.py's general ball
    painting) gives the same map as the fast path."""
    from sheetview.measures import pores

    m = blobs((40, 44), 3, 2.5)
    fast = P.thickness_map(m, 0.3)
    monkeypatch.setattr(pores, "_int_max", lambda K, n: -1)
    slow = P.thickness_map(m, 0.3)
    np.testing.assert_allclose(slow, fast, atol=1e-5)


def test_thickness_invalid_pixels_are_walls():
    """A 15-pixel square cut by an invalid column: each half is 7 pixels wide."""
    m = np.zeros((40, 40), bool)
    m[10:25, 10:25] = True
    v = np.ones_like(m)
    v[:, 17] = False
    res = P.local_thickness_2d(m, 1.0, valid=v)
    assert np.isnan(res.maps["solid"][:, 17]).all() and np.isnan(res.maps["pore"][:, 17]).all()
    assert np.nanmax(res.maps["solid"]) == pytest.approx(7.0, abs=1e-5)
    full = P.local_thickness_2d(m, 1.0)
    assert np.nanmax(full.maps["solid"]) == pytest.approx(15.0, abs=1e-5)


def test_thickness_distribution_and_table():
    m = blobs()
    res = P.local_thickness_2d(m, 2.0)
    for ph, sel in (("solid", m), ("pore", ~m)):
        assert res.values(ph).size == sel.sum()
        assert res.fraction[ph].sum() == pytest.approx(1.0)
        assert res.mean[ph] == pytest.approx(res.values(ph).mean())
    t = res.table()
    assert len(t["d_lower_nm"]) == len(t["area_fraction_solid"]) == len(t["area_fraction_pore"])
    np.testing.assert_allclose(np.diff(res.bin_edges), 2.0)
    only = P.local_thickness_2d(m, 2.0, phases="pore")
    assert set(only.maps) == {"pore"}
    with pytest.raises(OptionError):
        P.local_thickness_2d(m, 2.0, phases=("gel",))


# ========================================================================== S2

def naive_s2(I, W, rmax):
    """S2 by direct pair counting: for each displacement d with |d| <= rmax, the solid
    pairs and the valid pairs (both pixels valid), binned by ceil(|d|)."""
    M, L = I.shape
    num = {}
    den = {}
    for dy in range(-rmax, rmax + 1):
        for dx in range(-rmax, rmax + 1):
            r = math.hypot(dx, dy)
            if r > rmax:
                continue
            a = (slice(max(0, -dy), M - max(0, dy)), slice(max(0, -dx), L - max(0, dx)))
            b = (slice(max(0, dy), M - max(0, -dy)), slice(max(0, dx), L - max(0, -dx)))
            nw = float((W[a] & W[b]).sum())
            if nw == 0:
                continue
            k = math.ceil(r - 1e-9)
            s = float((I[a] & I[b]).sum()) / nw
            num[k] = num.get(k, 0.0) + s * nw
            den[k] = den.get(k, 0.0) + nw
    ks = sorted(num)
    return np.array([num[k] / den[k] for k in ks]), np.array([den[k] for k in ks])


@pytest.mark.parametrize("with_window", [False, True])
def test_s2_equals_direct_pair_counting(with_window):
    """FFT S2 with zero padding equals the direct count of pairs (the definition; only
    pairs of valid pixels count)."""
    m = blobs((27, 34), 1, 1.5)
    v = None
    W = np.ones_like(m)
    if with_window:
        y, x = np.indices(m.shape)
        W = np.hypot(x - 16, y - 13) <= 14
        v = W
    res = P.s2_2d(m, 1.0, valid=v, r_max=9)
    ref, pairs = naive_s2(m & W, W, 9)
    np.testing.assert_allclose(res.s2, ref, atol=1e-9)
    np.testing.assert_allclose(res.pairs, pairs, rtol=1e-9)
    assert res.phi == pytest.approx(P.area_fraction(m, v).area_fraction, abs=1e-12)


def test_s2_r_max_and_units():
    m = blobs()
    a = P.s2_2d(m, 0.5)
    assert a.r[0] == 0.0 and a.r[-1] <= 0.5 * (min(m.shape) - 1) * 0.5 + 1e-9
    b = P.s2_2d(m, 0.5, r_max=5.0)
    assert b.r.size == 11 and b.r[-1] <= 5.0 + 1e-9
    np.testing.assert_allclose(b.s2, a.s2[:11])
    for bad in (0, -1, float("nan"), "x"):
        with pytest.raises(OptionError):
            P.s2_2d(m, 0.5, r_max=bad)


# ================================================================ orientation

def test_orientation_with_a_hole_of_invalid_pixels():
    """Stripes at 40 degrees with an invalid disc in the middle: the invalid pixels
    leave the angle and the order unchanged (their edge is left out)."""
    from tests.validation.test_planar_validation import stripes

    g = stripes(40.0, n=160, period=10.0)
    y, x = np.indices(g.shape)
    v = np.hypot(x - 80, y - 80) > 30
    g2 = np.where(v, g, 5.0)  # a bright blot where invalid
    o = P.orientation_2d(g2, 1.0, valid=v)
    assert abs((o.angle - 40.0 + 90) % 180 - 90) < 1.0
    assert o.order > 0.99
    assert np.isnan(o.angle_map[~v]).all()
    bad = P.orientation_2d(g2, 1.0)  # the blot's edge would disturb it
    assert bad.order < o.order


def test_orientation_of_a_flat_image_is_undefined():
    o = P.orientation_2d(np.zeros((30, 30)), 1.0)
    assert math.isnan(o.angle) and math.isnan(o.order)
    assert o.to_dict()["angle_deg"] is None


def test_orientation_options_are_checked():
    g = np.random.default_rng(0).random((20, 20))
    for kw in ({"sigma_nm": -1}, {"bins": 0}, {"derivative": "prewitt"},
               {"derivative_px": 0}):
        with pytest.raises(OptionError):
            P.orientation_2d(g, 1.0, **kw)
    with pytest.raises(OptionError):
        P.orientation_2d(g[None], 1.0)
    with pytest.raises(OptionError):
        P.orientation_2d(g, 1.0, valid=np.zeros((20, 20), bool))


# =================================================================== describe

def test_describe_headline_and_distributions():
    m = blobs((64, 80), 2, 2.5)
    d = P.describe(m, 1.5, seed=1, n_lines=200)
    doc = json.loads(dumps(d.to_dict()))
    for k in ("area_fraction", "mean_chord_solid_nm", "mean_chord_pore_nm",
              "mean_thickness_solid_nm", "mean_thickness_pore_nm", "orientation_order",
              "coherence"):
        assert k in doc and doc[k] is not None
    assert doc["area_fraction"] == pytest.approx(m.mean())
    dist = d.distributions()
    wts = d.weights()
    assert set(dist) == {"chord_solid", "chord_pore", "thickness_solid", "thickness_pore"}
    for k in dist:
        assert dist[k].ndim == 1 and dist[k].size == wts[k].size and dist[k].size > 0
        assert np.all(dist[k] > 0)
    # the chord distributions pool the uncut chords of all directions
    assert dist["chord_solid"].size == (~d.chords.cut["solid"]).sum()
    assert dist["thickness_pore"].size == (~m).sum()
    assert doc["mean_chord_solid_nm"] == pytest.approx(d.chords.mean("solid", "random"))
    rnd, rw = d.distributions("random"), d.weights("random")
    assert rnd["chord_pore"].size == rw["chord_pore"].size
    on_random = d.chords.direction["pore"] == 2
    assert rnd["chord_pore"].size == (~d.chords.cut["pore"] & on_random).sum()


def test_describe_with_valid_mask_and_determinism():
    m = blobs((50, 50), 4)
    y, x = np.indices(m.shape)
    v = np.hypot(x - 25, y - 25) <= 22
    a = P.describe(m, 1.0, valid=v, seed=3, n_lines=100)
    b = P.describe(m, 1.0, valid=v, seed=3, n_lines=100)
    assert a.to_dict() == b.to_dict()
    assert a.area.n_valid == v.sum()


@pytest.mark.parametrize("bad", [
    {"mask": np.zeros((3, 3, 3), bool)},
    {"mask": np.zeros((0, 5), bool)},
    {"pixel": 0}, {"pixel": -1.0}, {"pixel": float("nan")}, {"pixel": "a"},
    {"valid": np.ones((4, 4), bool)},
    {"valid": np.zeros((10, 10), bool)},
    {"mask": np.array([["a"] * 10] * 10)},
])
def test_bad_inputs_raise_option_errors(bad):
    kw = {"mask": np.zeros((10, 10), bool), "pixel": 1.0, "valid": None}
    kw.update(bad)
    with pytest.raises(OptionError):
        P.describe(kw["mask"], kw["pixel"], valid=kw["valid"], n_lines=5)
