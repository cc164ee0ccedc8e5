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
    """Tiny random volume (smoothed noise): kernel = brute force (float32 rounding)."""
    from scipy.ndimage import gaussian_filter
    rng = np.random.default_rng(seed)
    m = gaussian_filter(rng.normal(size=(14, 12, 13)), 1.5) > 0
    got = local_thickness(m, 1.0)
    ref = brute_local_thickness(m)
    np.testing.assert_allclose(got[m], ref[m], rtol=1e-6)
    assert np.isnan(got[~m]).all()


def test_local_thickness_brute_force_anisotropic_and_periodic():
    from scipy.ndimage import gaussian_filter
    rng = np.random.default_rng(3)
    m = gaussian_filter(rng.normal(size=(12, 10, 11)), 1.5, mode="wrap") > 0
    sp = (0.5, 0.6, 0.55)
    np.testing.assert_allclose(local_thickness(m, sp)[m], brute_local_thickness(m, sp)[m],
                               rtol=1e-5)
    np.testing.assert_allclose(local_thickness(m, 1.0, periodic=True)[m],
                               brute_local_thickness(m, periodic=True)[m], rtol=1e-6)


def brute_intrusion(mask, reservoir):
    """Level-by-level reference (Münch & Holzer, J. Am. Ceram. Soc. 91 (2008) 4059, from
    memory for the citation), drainage form: for each distinct ball diameter D in
    decreasing order, centres with 2 d - 1 >= D, 26-connected clusters (scipy.ndimage.label),
    a cluster is invaded if one of its balls of diameter D holds a reservoir voxel or it
    holds an already invaded centre; invaded voxels = union of the balls of diameter D."""
    from scipy import ndimage as ndi
    m = np.asarray(mask, bool)
    P = np.argwhere(m)
    pad = np.pad(m, 1, constant_values=False)
    B = np.argwhere(~pad) - 1
    d2 = ((P[:, None, :] - B[None]) ** 2).sum(-1).min(1)
    v = 2 * np.sqrt(d2) - 1
    R = np.argwhere(reservoir & m)
    dR2 = ((P[:, None, :] - R[None]) ** 2).sum(-1).min(1)
    D2 = ((P[:, None, :] - P[None]) ** 2).sum(-1)
    invaded_centre = np.zeros(len(P), bool)
    out = np.zeros(len(P))
    for D in np.unique(v)[::-1]:
        cen = v >= D - 1e-9
        grid = np.zeros(m.shape, bool)
        grid[tuple(P[cen].T)] = True
        lab, _ = ndi.label(grid, np.ones((3, 3, 3)))
        lp = lab[tuple(P.T)]
        rad2 = ((D + 1) / 2) ** 2
        hit = cen & ((dR2 < rad2) | invaded_centre)
        good = np.isin(lp, np.unique(lp[hit])) & cen
        invaded_centre |= good
        ball = (D2[:, good] < np.minimum(rad2, d2[good])[None, :]).any(axis=1)
        out = np.where(ball & (out == 0), D, out)
    res = np.full(m.shape, np.nan)
    res[m] = out
    return res


def test_intrusion_matches_level_reference():
    from scipy.ndimage import gaussian_filter
    rng = np.random.default_rng(11)
    m = gaussian_filter(rng.normal(size=(13, 12, 12)), 1.6) > -0.1
    res = np.zeros_like(m)
    res[0] = True
    got = intrusion_diameter(m, 1.0, res)
    ref = brute_intrusion(m, res)
    np.testing.assert_allclose(got[m], ref[m], rtol=1e-6, atol=1e-6)


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
