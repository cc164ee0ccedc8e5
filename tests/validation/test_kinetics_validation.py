"""Growth kinetics against closed forms.

* Progress alpha(t) of prisms of known volume born at known times: right triangles with legs
  a, b have area a b / 2 (elementary closed form, common practice), so alpha(t) =
  sum(a b h / 2 for born <= t) / sum(a b h / 2) is known without the project's geometry code;
  the triangles are placed in random orientations.
* Avrami (JMAK) form alpha = 1 - exp(-(k t)^n) (Avrami, J. Chem. Phys. 7 (1939) 1103; 8 (1940)
  212): birth times placed at its quantiles are fitted back to n and k, and the smoothed rate
  follows its derivative n k (k t)^(n-1) exp(-(k t)^n).
"""
import numpy as np
import pytest
from scipy.spatial.transform import Rotation

from sheetview import Box, Structure
from sheetview.measures.kinetics import fit_avrami, progress, structure_at


def _right_triangles(legs_a, legs_b, h, born, spacing=1.4, seed=0):
    """Right triangles with legs a, b, each in a random orientation (scipy
    Rotation.random) about its right-angle corner, corners 10 nm apart (no overlaps)."""
    n = len(legs_a)
    tri = np.zeros((n, 3, 3))
    tri[:, 1, 0] = legs_a
    tri[:, 2, 1] = legs_b
    rot = Rotation.random(n, random_state=seed)
    v = np.einsum("nij,nkj->nki", rot.as_matrix(), tri)
    v[:, :, 0] += (np.arange(n) * 10.0)[:, None]
    v[:, :, 1:] += 5.0
    dom = Box((-5, -5, -5), (10.0 * n + 10, 15, 15))
    return Structure(v, h, dom, spacing, {"born": born}, {"time_unit": "h"})


def test_alpha_exact_at_known_birth_times():
    """alpha(t) equals the cumulative closed-form volume fraction at every birth time and
    between them (a step curve), to 1e-12 (right-triangle area a b / 2: common practice)."""
    rng = np.random.default_rng(3)
    n = 400
    a, b = rng.uniform(0.5, 3, n), rng.uniform(0.5, 3, n)
    h = rng.uniform(0.3, 0.9, n)
    born = rng.integers(0, 60, n).astype(float) * 0.25      # ties on purpose
    s = _right_triangles(a, b, h, born)
    kin = progress(s)
    vol = a * b * h / 2.0
    for t in np.unique(born):
        expected = vol[born <= t].sum() / vol.sum()
        assert kin.alpha_at(t) == pytest.approx(expected, abs=1e-12)
        assert kin.alpha_at(t + 0.1) == pytest.approx(expected, abs=1e-12)  # flat until next birth
    assert kin.alpha_at(born.min() - 1) == 0.0
    assert kin.unit == "h"
    # t50: the first birth time with alpha >= 0.5 (definition)
    ts = np.unique(born)
    al = np.array([vol[born <= t].sum() / vol.sum() for t in ts])
    assert kin.marks["t50"] == ts[np.argmax(al >= 0.5)]
    assert kin.marks["t10"] == ts[np.argmax(al >= 0.1)]
    assert kin.marks["t90"] == ts[np.argmax(al >= 0.9)]


def test_structure_at_keeps_exactly_the_prisms_born_by_then():
    """structure_at(progress=P) keeps the prisms born at or before the first time alpha >= P
    (definition; closed-form volumes as above)."""
    rng = np.random.default_rng(5)
    n = 200
    a, b, h = rng.uniform(0.5, 3, n), rng.uniform(0.5, 3, n), np.full(n, 0.5)
    born = rng.uniform(0, 10, n)
    s = _right_triangles(a, b, h, born)
    vol = a * b * h / 2
    for p in (0.1, 0.37, 0.5, 0.999, 1.0):
        sub, m = structure_at(s, progress=p)
        order = np.argsort(born)
        cum = np.cumsum(vol[order]) / vol.sum()
        t = born[order][np.argmax(cum >= p - 1e-12)]
        assert m.time == t
        assert len(sub) == int((born <= t).sum())
        assert m.progress == pytest.approx(vol[born <= t].sum() / vol.sum(), rel=1e-12)
        assert m.progress >= p - 1e-12
    sub, m = structure_at(s, time=5.0)
    assert len(sub) == int((born <= 5.0).sum())


@pytest.mark.parametrize("n_exp,k", [(1.0, 0.2), (2.0, 0.05), (3.0, 0.8)])
def test_avrami_round_trip(n_exp, k):
    """Equal prisms born at the Avrami quantiles t_i = (-ln(1 - (i - 1/2)/N))^(1/n) / k give
    the fitted n and k back within 2 % (Avrami 1939-41)."""
    N = 2000
    q = (np.arange(N) + 0.5) / N
    born = (-np.log1p(-q)) ** (1.0 / n_exp) / k
    s = _right_triangles(np.full(N, 1.0), np.full(N, 1.0), np.full(N, 0.5), born)
    kin = progress(s, t0=0.0)
    assert kin.avrami.n == pytest.approx(n_exp, rel=0.02)
    assert kin.avrami.k == pytest.approx(k, rel=0.02)
    assert kin.avrami.r2 > 0.999


def test_rate_follows_the_avrami_derivative():
    """The smoothed rate of 20,000 prisms at Avrami quantiles (n = 2, k = 0.1) matches
    d alpha/dt = n k (k t)^(n-1) exp(-(k t)^n) within 3 % of its peak, and integrates to 1."""
    N, n_exp, k = 20000, 2.0, 0.1
    q = (np.arange(N) + 0.5) / N
    born = (-np.log1p(-q)) ** (1.0 / n_exp) / k
    s = _right_triangles(np.full(N, 1.0), np.full(N, 1.0), np.full(N, 0.5), born)
    kin = progress(s, bins=80, smooth=1.0)
    t = kin.bin_centres
    exact = n_exp * k * (k * t) ** (n_exp - 1) * np.exp(-(k * t) ** n_exp)
    w = t[1] - t[0]
    assert (kin.rate_raw * w).sum() == pytest.approx(1.0, rel=1e-9)
    inner = slice(3, -3)
    assert np.max(np.abs(kin.rate[inner] - exact[inner])) < 0.03 * exact.max()


def test_fit_needs_points():
    assert fit_avrami([0, 1], [0.5, 1.0]) is None
