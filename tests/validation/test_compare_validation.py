"""Distances between distributions, and `sheetview compare` end to end.

* Two-sample Kolmogorov-Smirnov statistic (Kolmogorov 1933; Smirnov 1948): ours, with weights,
  against scipy.stats.ks_2samp (reference library) -- unit weights, and integer weights against
  the sample with each value repeated that many times.
* Wasserstein-1 distance W1 = integral |F_a - F_b| dx (Vaserstein 1969): against the
  integral of the difference of the weighted empirical CDFs written out in numpy (the module
  itself calls scipy.stats.wasserstein_distance, so scipy is not an independent reference
  here), and W1 of a sample and its copy shifted by c is c (closed form).
* `sheetview compare` end to end: a volume of parallel cylinders of radius R and a micrograph
  of the same discs, both drawn by the test in numpy: each side's solid area fraction is the
  counted disc fraction, its mean solid chord pi R / 2 (Cauchy-Crofton; Santaló, Integral
  Geometry and Geometric Probability, 1976), its mean solid local thickness just under 2R
  (Hildebrand & Rüegsegger, J. Microsc. 185 (1997) 67; off-lattice discs read 1.3-2.2 px
  short, see the planar validation), and the distances between the two sides vanish.
"""
import json

import numpy as np
import pytest
from click.testing import CliRunner
from scipy.stats import ks_2samp

from sheetview import Sphere, write
from sheetview.cli import main
from sheetview.grid import GEL, SOLID, PhaseGrid
from sheetview.measures.compare import distance, weighted_ks
from sheetview.synth import pack_stacks


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_weighted_ks_equals_scipy_for_unit_and_integer_weights(seed):
    rng = np.random.default_rng(seed)
    a = np.round(rng.gamma(2.0, 1.5, 300), 1)   # ties on purpose
    b = np.round(rng.gamma(2.3, 1.4, 250), 1)
    d, p = weighted_ks(a, b)
    ref = ks_2samp(a, b, method="asymp")
    assert d == pytest.approx(ref.statistic, abs=1e-12)
    assert p == pytest.approx(ref.pvalue, rel=1e-9)
    wa = rng.integers(1, 4, a.size)
    wb = rng.integers(1, 4, b.size)
    d2, _ = weighted_ks(a, b, wa, wb)
    assert d2 == pytest.approx(ks_2samp(np.repeat(a, wa), np.repeat(b, wb)).statistic, abs=1e-12)


def w1_numpy(a, b, wa, wb):
    """integral |F_a - F_b| dx of the weighted empirical CDFs (step functions), by summing
    |F_a - F_b| times the gaps between the sorted pooled sample points."""
    x = np.sort(np.concatenate([a, b]))
    ia, ib = np.argsort(a), np.argsort(b)
    ca = np.concatenate([[0.0], np.cumsum(wa[ia])]) / wa.sum()
    cb = np.concatenate([[0.0], np.cumsum(wb[ib])]) / wb.sum()
    fa = ca[np.searchsorted(a[ia], x[:-1], side="right")]
    fb = cb[np.searchsorted(b[ib], x[:-1], side="right")]
    return float(np.sum(np.abs(fa - fb) * np.diff(x)))


@pytest.mark.parametrize("seed", [0, 1])
def test_weighted_wasserstein_equals_the_cdf_integral(seed):
    """W1 of weighted samples (ties included) equals the integral of |F_a - F_b| written out
    in numpy, to 1e-12 relative; D equals the maximum of the same difference."""
    rng = np.random.default_rng(seed)
    a = np.round(rng.gamma(2.0, 1.5, 400), 1)
    b = np.round(rng.lognormal(1.0, 0.5, 300), 1)
    wa, wb = rng.uniform(0.2, 3.0, a.size), rng.uniform(0.2, 3.0, b.size)
    out = distance(a, b, wa, wb)
    assert out["wasserstein_nm"] == pytest.approx(w1_numpy(a, b, wa, wb), rel=1e-12)
    assert out["mean_virtual_nm"] == pytest.approx(np.sum(wa * a) / wa.sum(), rel=1e-12)


def test_wasserstein_of_a_shift_is_the_shift():
    rng = np.random.default_rng(4)
    a = rng.exponential(2.0, 500)
    out = distance(a, a + 0.7)
    assert out["wasserstein_nm"] == pytest.approx(0.7, rel=1e-9)
    assert out["ks_statistic"] > 0
    same = distance(a, a.copy())
    assert same["wasserstein_nm"] == 0.0 and same["ks_statistic"] == 0.0


@pytest.fixture(scope="module")
def pore_file(tmp_path_factory):
    d = tmp_path_factory.mktemp("cmp")
    res = pack_stacks(Sphere((0, 0, 0), 10.0), 40, seeding="wall", orientation="wall",
                      lateral_size="fixed:5", layers="fixed:3", seed=6)
    p = d / "pore.npz"
    write(res.structure, p)
    return p


def _cylinders_and_discs(tmp_path, px=0.2, n=160, nz=10, R=3.0, k=8, seed=0):
    """A periodic-free volume of k parallel cylinders (axis z, radius R nm, random centres
    off the lattice, clear of each other and of the edges) written as VTI, and a PNG of the
    same discs (rows = -y, cols = x; solid dark), both drawn here in numpy."""
    from PIL import Image
    rng = np.random.default_rng(seed)
    cs = []
    while len(cs) < k:
        c = rng.uniform(R + 1, n * px - R - 1, 2)
        if all(np.hypot(*(c - o)) > 2 * R + 0.5 for o in cs):
            cs.append(c)
    x = (np.arange(n) + 0.5) * px
    X, Y = np.meshgrid(x, x, indexing="ij")
    disc = np.zeros((n, n), bool)
    for c in cs:
        disc |= (X - c[0]) ** 2 + (Y - c[1]) ** 2 <= R * R
    lab = np.where(disc[:, :, None], SOLID, GEL).astype(np.uint8).repeat(nz, axis=2)
    write(PhaseGrid(lab, px), tmp_path / "cylinders.vti")
    Image.fromarray(np.where(disc.T[::-1], 30, 220).astype(np.uint8)).save(tmp_path / "discs.png")
    return tmp_path / "cylinders.vti", tmp_path / "discs.png", disc


def test_compare_cylinders_with_their_discs(tmp_path):
    """Virtual sections of a volume of cylinders (radius R = 3 nm = 15 px) against a
    micrograph of the same discs, both made by the test: on both sides the solid area
    fraction is the counted disc fraction (exact), the mean solid chord pi R / 2 within 3 %
    (Cauchy-Crofton; Santaló 1976; measured +1 %), the mean solid local thickness within
    2.5 px below 2R (Hildebrand & Rüegsegger 1997; measured 1.6 px below), and the
    local-thickness distributions coincide (D = 0, W1 = 0: the two digitisations are the
    same pixels, so this also checks the picture orientation); the chord distributions,
    on different random lines, are within D < 0.05."""
    R, px = 3.0, 0.2
    vol, png, disc = _cylinders_and_discs(tmp_path, px=px, R=R)
    r = CliRunner().invoke(main, ["compare", str(vol), str(png), "--pixel", str(px),
                                  "--count", "3", "--json", "--solid", "dark",
                                  "-o", str(tmp_path / "cmp.png"), "--csv", str(tmp_path / "cmp.csv")])
    assert r.exit_code == 0, r.output
    doc = json.loads(r.stdout)
    sc = doc["scalars"]
    assert sc["area_fraction"]["observed"] == pytest.approx(disc.mean(), abs=1e-12)
    assert sc["area_fraction"]["virtual_mean"] == pytest.approx(disc.mean(), abs=1e-12)
    for side in ("virtual_mean", "observed"):
        assert sc["mean_chord_solid_nm"][side] == pytest.approx(np.pi * R / 2, rel=0.03)
        assert 2 * R - 2.5 * px <= sc["mean_thickness_solid_nm"][side] <= 2 * R
    dist = doc["distances"]
    for name in ("thickness_solid", "thickness_pore"):
        assert dist[name]["n_virtual"] == 3 * dist[name]["n_observed"] > 0, name
        assert dist[name]["ks_statistic"] == 0.0 and dist[name]["wasserstein_nm"] == 0.0, name
    assert dist["chord_solid"]["ks_statistic"] < 0.05
    assert (tmp_path / "cmp.png").stat().st_size > 0
    assert (tmp_path / "cmp.csv").read_text().startswith("distribution,")


def test_compare_against_a_different_image_gives_large_distances(pore_file, tmp_path):
    """Big discs (radius 12 px) against thin sheets: the solid thickness distributions differ
    by more than a nm (W1) and D is large -- the distances can fail."""
    from matplotlib.image import imsave
    rng = np.random.default_rng(0)
    yy, xx = np.mgrid[0:200, 0:200]
    m = np.zeros((200, 200), bool)
    for cy, cx in rng.uniform(0, 200, (25, 2)):
        m |= (yy - cy) ** 2 + (xx - cx) ** 2 < 12 ** 2
    p = tmp_path / "discs.png"
    imsave(p, np.where(m, 20, 230).astype(np.uint8), cmap="gray", vmin=0, vmax=255)
    r = CliRunner().invoke(main, ["compare", str(pore_file), str(p), "--pixel", "0.2",
                                  "--count", "3", "--voxel", "0.2", "--json", "--solid", "dark"])
    assert r.exit_code == 0, r.output
    d = json.loads(r.stdout)["distances"]["thickness_solid"]
    assert d["ks_statistic"] > 0.5
    assert d["wasserstein_nm"] > 1.0
