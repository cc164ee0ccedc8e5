"""Local thickness and intrusion kernels vs brute-force references; results and errors."""
from __future__ import annotations

import numpy as np
import pytest

from sheetview.errors import OptionError
from sheetview.grid import GEL, OUTSIDE, SOLID, PhaseGrid
from sheetview.measures.pores import (intrusion_diameter, local_thickness,
                                      pore_size_distribution, size_distribution)


def brute_local_thickness(mask, spacing=(1.0, 1.0, 1.0), periodic=False):
    """Brute force of the definition on voxel centres (Hildebrand & Rüegsegger, J. Microsc.
    185 (1997) 67, from memory for the citation): d(x) = distance to the nearest non-phase
    voxel centre (a ring of wall around a non-periodic grid), ball x = {q : |q - x| < d(x)},
    tau(q) = max over balls holding q of 2 d(x) - h, h = geometric mean spacing."""
    sp = np.asarray(spacing, float)
    h = np.prod(sp) ** (1 / 3)
    m = np.asarray(mask, bool)
    shape = np.asarray(m.shape)
    P = np.argwhere(m).astype(float)
    if periodic:
        B = np.argwhere(~m).astype(float)
    else:
        pad = np.pad(m, 1, constant_values=False)
        B = np.argwhere(~pad).astype(float) - 1
    def dvec(a, b):
        d = a[:, None, :] - b[None, :, :]
        if periodic:
            d -= shape * np.round(d / shape)
        return d * sp
    d2 = (dvec(P, B) ** 2).sum(-1).min(axis=1)
    D2 = (dvec(P, P) ** 2).sum(-1)  # (q, x)
    inside = D2 < d2[None, :]
    val = 2 * np.sqrt(d2) - h
    tau = np.where(inside, val[None, :], -np.inf).max(axis=1)
    out = np.full(m.shape, np.nan)
    out[m] = tau
    return out


@pytest.mark.parametrize("seed", [0, 1])
def test_local_thickness_matches_brute_force_random(seed):
    """Tiny random volume (smoothed noise): ``method="centres"`` = brute force (float32
    rounding)."""
    from scipy.ndimage import gaussian_filter
    rng = np.random.default_rng(seed)
    m = gaussian_filter(rng.normal(size=(14, 12, 13)), 1.5) > 0
    got = local_thickness(m, 1.0, method="centres")
    ref = brute_local_thickness(m)
    np.testing.assert_allclose(got[m], ref[m], rtol=1e-6)
    assert np.isnan(got[~m]).all()


def test_local_thickness_brute_force_anisotropic_and_periodic():
    from scipy.ndimage import gaussian_filter
    rng = np.random.default_rng(3)
    m = gaussian_filter(rng.normal(size=(12, 10, 11)), 1.5, mode="wrap") > 0
    sp = (0.5, 0.6, 0.55)
    np.testing.assert_allclose(local_thickness(m, sp, method="centres")[m],
                               brute_local_thickness(m, sp)[m],
                               rtol=1e-5)
    np.testing.assert_allclose(local_thickness(m, 1.0, periodic=True, method="centres")[m],
                               brute_local_thickness(m, periodic=True)[m], rtol=1e-6)


def brute_intrusion(mask, reservoir):
    """Level-by-level reference of simulated intrusion (Münch & Holzer, J. Am. Ceram. Soc.
    91 (2008) 4059, from memory for the citation) on unit voxels, drainage form, pairwise
    distances. Every length is kept as an integer squared distance, so the open balls are
    exact: at the level of squared radius ``K`` (diameter ``D = 2 sqrt(K) - 1``) the centres
    are the phase voxels with ``d^2 >= K``, clustered by 26-connectivity
    (scipy.ndimage.label); a cluster is invaded if one of its balls ``|q - x|^2 < K``
    holds a reservoir voxel or it holds an already invaded centre; the voxels of the
    balls ``|q - x|^2 < K`` of the invaded centres not yet reached take ``D``.

    (An earlier version compared with ``((D + 1) / 2) ** 2``, which rounds to e.g.
    2.0000000000000004 for ``K = 2``: voxels at exactly the ball's radius, frequent on a
    lattice, were wrongly counted inside the open ball.)"""
    from scipy import ndimage as ndi
    m = np.asarray(mask, bool)
    P = np.argwhere(m)
    pad = np.pad(m, 1, constant_values=False)
    B = np.argwhere(~pad) - 1
    d2 = ((P[:, None, :] - B[None]) ** 2).sum(-1).min(1)
    R = np.argwhere(reservoir & m)
    dR2 = ((P[:, None, :] - R[None]) ** 2).sum(-1).min(1)
    D2 = ((P[:, None, :] - P[None]) ** 2).sum(-1)
    invaded_centre = np.zeros(len(P), bool)
    out = np.zeros(len(P))
    for K in np.unique(d2)[::-1]:
        D = 2 * np.sqrt(K) - 1
        cen = d2 >= K
        grid = np.zeros(m.shape, bool)
        grid[tuple(P[cen].T)] = True
        lab, _ = ndi.label(grid, np.ones((3, 3, 3)))
        lp = lab[tuple(P.T)]
        hit = cen & ((dR2 < K) | invaded_centre)
        good = np.isin(lp, np.unique(lp[hit])) & cen
        invaded_centre |= good
        ball = (D2[:, good] < K).any(axis=1)
        out = np.where(ball & (out == 0), D, out)
    res = np.full(m.shape, np.nan)
    res[m] = out
    return res


def dilation_intrusion(mask, reservoir):
    """Second, independent reference (unit voxels): the same definition with
    scipy.ndimage only -- exact Euclidean distance transforms (scipy), 26-connected
    labelling of the centre set and a binary dilation of the invaded centres by the
    lattice ball ``|p|^2 < K`` at each level ``K`` (Münch & Holzer 2008: intrusion as an
    opening restricted to the reservoir-connected centres)."""
    from scipy import ndimage as ndi
    m = np.asarray(mask, bool)
    r = reservoir & m
    d2 = np.rint(ndi.distance_transform_edt(np.pad(m, 1))[1:-1, 1:-1, 1:-1] ** 2).astype(int)
    dR2 = np.rint(ndi.distance_transform_edt(~r) ** 2).astype(int)
    out = np.zeros(m.shape)
    inv = np.zeros(m.shape, bool)
    for K in np.unique(d2[m])[::-1]:
        cen = m & (d2 >= K)
        lab, _ = ndi.label(cen, np.ones((3, 3, 3)))
        entry = cen & ((dR2 < K) | inv)
        good = np.isin(lab, np.unique(lab[entry])) & cen
        inv |= good
        e = int(np.ceil(np.sqrt(K)))
        g = np.mgrid[-e:e + 1, -e:e + 1, -e:e + 1]
        ball = ndi.binary_dilation(good, (g ** 2).sum(0) < K) & m
        out = np.where(ball & (out == 0), 2 * np.sqrt(K) - 1, out)
    out[~m] = np.nan
    return out


def test_intrusion_matches_level_reference():
    from scipy.ndimage import gaussian_filter
    rng = np.random.default_rng(11)
    m = gaussian_filter(rng.normal(size=(13, 12, 12)), 1.6) > -0.1
    res = np.zeros_like(m)
    res[0] = True
    got = intrusion_diameter(m, 1.0, res)
    ref = brute_intrusion(m, res)
    np.testing.assert_allclose(got[m], ref[m], rtol=1e-6, atol=1e-6)


def _reservoirs(m, seed):
    """Face, whole border (default) and a scattered random reservoir."""
    face = np.zeros_like(m)
    face[:, 0] = True
    rng = np.random.default_rng(seed)
    spots = rng.random(m.shape) < 0.01
    return [("face", face), ("border", None), ("spots", spots)]


def test_intrusion_regression_ties_on_ball_boundary():
    """The volume on which the old reference disagreed with the implementation (36 voxels
    at exactly a ball's squared radius 2 or 5 from an invaded centre): both references
    (derived from Münch & Holzer 2008, exact integer arithmetic) and the implementation
    agree."""
    m = _random_phase(5, (12, 13, 11), smooth=1.5)
    res = np.zeros_like(m)
    res[:, 0] = True
    got = intrusion_diameter(m, 1.0, res)
    ref = brute_intrusion(m, res)
    np.testing.assert_allclose(got[m], ref[m], rtol=1e-6)
    np.testing.assert_allclose(got[m], dilation_intrusion(m, res)[m], rtol=1e-6)


@pytest.mark.parametrize("seed", [0, 1, 2, 3, 4, 5])
def test_intrusion_matches_references_random(seed):
    """Random smoothed-noise volumes of several shapes and porosities, three reservoirs
    (a face, the whole border, scattered voxels): the implementation equals the two
    references above (derived from the definition of Münch & Holzer 2008) to float32
    rounding, voxel by voxel."""
    rng = np.random.default_rng(100 + seed)
    shape = tuple(int(s) for s in rng.integers(9, 15, 3))
    m = _random_phase(seed, shape, smooth=float(rng.uniform(1.0, 2.0)))
    for name, res in _reservoirs(m, seed):
        full = (np.zeros_like(m) if res is None else res)
        if res is None:
            for ax in range(3):
                sl = [slice(None)] * 3
                sl[ax] = 0
                full[tuple(sl)] = True
                sl[ax] = -1
                full[tuple(sl)] = True
        if not (full & m).any():
            continue
        got = intrusion_diameter(m, 1.0, res)
        ref = brute_intrusion(m, full)
        np.testing.assert_allclose(got[m], ref[m], rtol=1e-6, err_msg=name)
        np.testing.assert_array_equal(np.isnan(got), ~m)


@pytest.mark.parametrize("seed", [0, 1])
def test_intrusion_matches_dilation_reference_larger(seed):
    """Larger random volumes (too big for the pairwise reference): the implementation
    equals the labelling-and-dilation reference (derived, Münch & Holzer 2008)."""
    m = _random_phase(seed, (30, 26, 28), smooth=2.5)
    res = np.zeros_like(m)
    res[-1] = True
    got = intrusion_diameter(m, 1.0, res)
    np.testing.assert_allclose(got[m], dilation_intrusion(m, res)[m], rtol=1e-6)


def test_intrusion_steps_round_down():
    m = np.zeros((9, 20, 20), bool)
    m[2:7] = True
    cont = intrusion_diameter(m, 1.0)
    steps = intrusion_diameter(m, 1.0, diameters=[1.0, 2.0, 4.0])
    ok = cont >= 1.0
    assert np.all(steps[ok] <= cont[ok])
    assert set(np.unique(steps[ok])) <= {1.0, 2.0, 4.0}


def test_result_and_errors():
    lab = np.full((12, 12, 12), SOLID, np.uint8)
    lab[1:6, 1:11, 1:11] = GEL
    lab[0] = OUTSIDE
    g = PhaseGrid(lab, spacing=0.2)
    r = pore_size_distribution(g, bins="linear")
    d = r.to_dict()
    t = r.table()
    assert len({len(c) for c in t.values()}) == 1
    assert sum(t["volume_fraction"]) == pytest.approx(1.0)
    assert d["d50_nm"] == pytest.approx(1.0, abs=0.21)  # a 5-voxel slab: 1.0 nm
    assert r.cumulative_finer[-1] == pytest.approx(1.0)
    import json
    json.dumps(d)
    ri = pore_size_distribution(g, method="intrusion")
    assert 0 < ri.sized_fraction <= 1
    with pytest.raises(OptionError):
        pore_size_distribution(g, method="mercury")
    with pytest.raises(OptionError):
        pore_size_distribution(g, phases="interlayer")
    with pytest.raises(OptionError):
        pore_size_distribution(g, bins="weird")
    with pytest.raises(OptionError):
        intrusion_diameter(lab == GEL, 0.2, np.zeros_like(lab, bool))
    with pytest.raises(OptionError):
        local_thickness(np.ones((4, 4, 4), bool), 1.0, periodic=True)
    with pytest.raises(OptionError):
        local_thickness(np.ones((4, 4), bool), 1.0)


def test_size_distribution_quantiles():
    """Quantiles follow the inverted empirical CDF (Hyndman & Fan, Am. Stat. 50 (1996)
    361, definition 1)."""
    d = np.array([1.0, 2.0, 3.0, 4.0, 5.0, 6.0, 7.0, 8.0, 9.0, 10.0, np.nan]).reshape(1, 1, 11)
    r = size_distribution(d, bins=[0, 5, 10.5])
    assert (r.d10, r.d50, r.d90) == (1.0, 5.0, 9.0)
    assert r.mean == pytest.approx(5.5)
    np.testing.assert_allclose(r.volume_fraction, [0.4, 0.6])


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
@pytest.mark.parametrize("kind", ["continuous", "ties", "on_edges", "one_value", "empty"])
@pytest.mark.parametrize("bins", ["log", "linear", 7, [0.3, 0.7, 1.5, 2.0, 9.0]])
def test_size_distribution_equals_numpy(dtype, kind, bins):
    """The one-pass kernels give numpy's own answers on the same values: the counts of
    ``numpy.histogram`` on the returned edges, ``numpy.quantile(method="inverted_cdf")``
    exactly, the cumulative curves from sorted values, and the mean (to rounding), on maps
    with NaN (not in the phase), zeros (not sized), ties and a single value."""
    rng = np.random.default_rng(7)
    shape = (23, 31, 17) if kind != "continuous" else (41, 43, 47)  # > 65,536: several chunks
    if kind == "continuous":
        d = rng.lognormal(0.0, 0.6, shape)
    elif kind == "ties":  # discrete local thickness values 2 sqrt(K) - 1 (unit voxels)
        d = 2 * np.sqrt(rng.integers(1, 40, shape)) - 1.0
    elif kind == "on_edges":  # on, and one float64 step either side of, every edge used
        e = np.array([0.3, 0.7, 1.5, 2.0, 9.0, 1.0, 10 ** 0.1, 10 ** 0.2, 0.5, 3.5])
        pool = np.concatenate([e, np.nextafter(e, 0), np.nextafter(e, 20)])
        d = rng.choice(pool, shape)
    else:
        d = np.full(shape, 1.7)
    d[rng.random(shape) < 0.25] = np.nan
    d[rng.random(shape) < 0.1] = 0.0
    if kind == "empty":
        d[np.isfinite(d)] = 0.0
    d = d.astype(dtype)
    r = size_distribution(d, bins=bins, voxel_size=0.5)
    vals = d[np.isfinite(d)]
    n_phase = vals.size
    vals = vals[vals > 0].astype(np.float64)
    counts, _ = np.histogram(vals, bins=r.bin_edges)
    total = max(vals.size, 1)
    np.testing.assert_array_equal(r.volume_fraction, counts / total)
    assert r.sized_fraction == pytest.approx(vals.size / n_phase)
    if vals.size:
        q = np.quantile(vals, [0.1, 0.5, 0.9], method="inverted_cdf")
        assert (r.d10, r.d50, r.d90) == tuple(float(x) for x in q)
        assert r.mean == pytest.approx(vals.mean(), rel=1e-12)
        # fraction strictly finer than each upper edge, from the sorted values
        finer = np.searchsorted(np.sort(vals), r.bin_edges[1:], side="left") / total
        np.testing.assert_allclose(r.cumulative_finer, finer, atol=1e-15)
    else:
        assert np.isnan(r.d50) and np.isnan(r.mean) and not r.volume_fraction.any()


def test_size_distribution_subnormal_spread():
    """Values that differ by subnormal amounts (their spread overflows the fine-bin scale)
    still give numpy's histogram and inverted-CDF quantiles."""
    v = np.array([5e-324, 1e-323, 1.5e-323, 2e-323])
    r = size_distribution(v.reshape(1, 1, -1), bins=np.array([0, 1e-323, 1.0]))
    q = np.quantile(v, [0.1, 0.5, 0.9], method="inverted_cdf")
    assert (r.d10, r.d50, r.d90) == tuple(q)
    np.testing.assert_array_equal(r.volume_fraction, np.histogram(v, [0, 1e-323, 1.0])[0] / 4)


# ---------------------------------------------------- fast painting = plain max-painting
import math  # noqa: E402

import numba  # noqa: E402

from sheetview.measures.pores import _units, squared_distance  # noqa: E402


@numba.njit(cache=True)
def _max_paint_all(r2, val, rel, out, periodic):
    """Plain ball painting, no skipping of any kind (the straightforward kernel the fast
    one replaced): ``out[q] = max(out[q], val[x])`` for every phase voxel x and every
    voxel q with ``|q - x|^2 < r2[x]``."""
    n0, n1, n2 = out.shape
    for ci in range(n0):
        for cj in range(n1):
            for ck in range(n2):
                rr = r2[ci, cj, ck]
                v = val[ci, cj, ck]
                if rr <= 0.0 or v <= 0.0:
                    continue
                ri = int(math.sqrt(rr) / rel[0])
                while ri >= 0 and (ri * rel[0]) ** 2 >= rr:
                    ri -= 1
                for di in range(-ri, ri + 1):
                    i = ci + di
                    if periodic:
                        i %= n0
                    elif i < 0 or i >= n0:
                        continue
                    dx2 = (di * rel[0]) ** 2
                    rj = int(math.sqrt(rr - dx2) / rel[1])
                    while rj >= 0 and dx2 + (rj * rel[1]) ** 2 >= rr:
                        rj -= 1
                    for dj in range(-rj, rj + 1):
                        j = cj + dj
                        if periodic:
                            j %= n1
                        elif j < 0 or j >= n1:
                            continue
                        dxy2 = dx2 + (dj * rel[1]) ** 2
                        rk = int(math.sqrt(rr - dxy2) / rel[2])
                        while rk >= 0 and dxy2 + (rk * rel[2]) ** 2 >= rr:
                            rk -= 1
                        for kk in range(ck - rk, ck + rk + 1):
                            k = kk
                            if periodic:
                                k %= n2
                            elif k < 0 or k >= n2:
                                continue
                            if v > out[i, j, k]:
                                out[i, j, k] = v


def plain_local_thickness(mask, spacing, periodic=False):
    """The definition of Hildebrand & Rüegsegger (J. Microsc. 185 (1997) 67) on the
    module's lattice conventions, painted ball by ball with no skipping (derived
    reference): same distance transform, every ball painted, max kept."""
    m = np.asarray(mask, bool)
    sp = np.broadcast_to(np.asarray(spacing, float), (3,))
    unit, rel, hc = _units(sp)
    d2 = squared_distance(m, rel, periodic=periodic).astype(np.float64)
    exact = bool(np.all(rel == 1.0)) and bool(np.all(np.floor(d2) == d2))
    val = np.where(d2 > 0, ((2.0 * np.sqrt(d2) - hc) * unit), 0.0).astype(np.float32)
    rr = d2 if exact else d2 * (1.0 - 1e-6)
    out = np.zeros(m.shape, np.float32)
    _max_paint_all(rr, val, np.asarray(rel, float), out, bool(periodic))
    out[~m] = np.nan
    return out


def _random_phase(seed, shape, smooth=2.0):
    from scipy.ndimage import gaussian_filter
    rng = np.random.default_rng(seed)
    g = gaussian_filter(rng.normal(size=shape), smooth, mode="wrap")
    return g > np.quantile(g, rng.uniform(0.3, 0.6))


@pytest.mark.parametrize("seed", [0, 1, 2])
@pytest.mark.parametrize("spacing", [1.0, (0.5, 0.6, 0.55), (1.0, 1.0, 2.0)])
@pytest.mark.parametrize("periodic", [False, True])
def test_local_thickness_identical_to_plain_painting(seed, spacing, periodic):
    """The fast painting (ridge, plane masks, first-cover bit sets, slabs) returns exactly
    the plain max over all balls (derived reference: the definition, Hildebrand &
    Rüegsegger 1997), bit for bit, on random volumes."""
    m = _random_phase(seed, (22 + seed, 19, 24 - seed))
    got = local_thickness(m, spacing, periodic=periodic, method="centres")
    ref = plain_local_thickness(m, spacing, periodic=periodic)
    np.testing.assert_array_equal(got, ref)


def test_local_thickness_identical_large_wrapping_balls():
    """Balls wider than a periodic grid (wrapping onto themselves, radius above 31 voxels,
    beyond the plane masks) and a big non-periodic pore: exactly the plain max-painting
    (derived reference)."""
    m = np.zeros((72, 3, 4), bool)
    m[1:70] = True  # periodic slab 69 voxels thick: balls of radius up to 35
    np.testing.assert_array_equal(local_thickness(m, 1.0, periodic=True, method="centres"),
                                  plain_local_thickness(m, 1.0, periodic=True))
    m = np.ones((34, 30, 36), bool)
    m[10:13, 5:8, 20:22] = False
    np.testing.assert_array_equal(local_thickness(m, 1.0, method="centres"),
                                  plain_local_thickness(m, 1.0))



@pytest.mark.parametrize("spacing", [1.0, 0.37, (0.5, 0.6, 0.55)])
@pytest.mark.parametrize("periodic", [False, True])
def test_intrusion_whole_phase_reservoir_is_local_thickness(spacing, periodic):
    """Reservoir = the whole phase: every centre is an entry, so intrusion equals the local
    thickness (Münch & Holzer, J. Am. Ceram. Soc. 91 (2008) 4059: the two distributions
    differ only by pore access), bit for bit on the same lattice conventions (derived;
    intrusion uses the lattice conventions of ``method="centres"``)."""
    m = _random_phase(7, (21, 18, 20))
    np.testing.assert_array_equal(
        intrusion_diameter(m, spacing, m, periodic=periodic),
        local_thickness(m, spacing, periodic=periodic, method="centres"))
