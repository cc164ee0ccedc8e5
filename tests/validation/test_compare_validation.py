"""Distances between distributions, and `sheetview compare` end to end.

* Two-sample Kolmogorov-Smirnov statistic (Kolmogorov 1933; Smirnov 1948): ours, with weights,
  against scipy.stats.ks_2samp (reference library) -- unit weights, and integer weights against
  the sample with each value repeated that many times.
* Wasserstein-1 distance: scipy.stats.wasserstein_distance (reference library); W1 of a sample
  and its copy shifted by c is c (a closed form of the transport distance).
"""
import json

import numpy as np
import pytest
from click.testing import CliRunner
from scipy.stats import ks_2samp

from sheetview import Sphere, write
from sheetview.cli import main
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


def _micrograph_of_section(pore_file, tmp_path, pixel):
    """The structure's own central z section written as an RGBA PNG: solid dark, alpha 0
    outside the domain."""
    from matplotlib.image import imsave

    from sheetview import read
    from sheetview.measures.sections import section
    img = section(read(pore_file), (0, 0, 1), 0.0, pixel=pixel, settings={"voxel": pixel})
    m = img.mask(("solid", "interlayer")) & img.valid
    rgba = np.zeros(m.shape + (4,), np.uint8)
    rgba[..., :3] = np.where(m, 30, 220)[..., None]
    rgba[..., 3] = np.where(img.valid, 255, 0)
    p = tmp_path / "own_section.png"
    imsave(p, rgba)
    return p


def test_compare_a_structure_with_its_own_section_gives_zero_distance(pore_file, tmp_path):
    """The virtual section at the centre (count 1) against a micrograph made of that very
    section: every distribution coincides, D = 0 and W1 = 0 (definition of both distances)."""
    pixel = 0.2
    mg = _micrograph_of_section(pore_file, tmp_path, pixel)
    r = CliRunner().invoke(main, ["compare", str(pore_file), str(mg), "--pixel-size", str(pixel),
                                  "--count", "1", "--voxel", str(pixel), "--json", "--solid", "dark",
                                  "-o", str(tmp_path / "cmp.png"), "--csv", str(tmp_path / "cmp.csv")])
    assert r.exit_code == 0, r.output
    doc = json.loads(r.stdout)
    for name, d in doc["distances"].items():
        assert d["n_virtual"] == d["n_observed"] > 0, name
        assert d["ks_statistic"] == 0.0, name
        assert d["wasserstein_nm"] == 0.0, name
    assert doc["scalars"]["area_fraction"]["virtual_mean"] == pytest.approx(
        doc["scalars"]["area_fraction"]["observed"], abs=1e-12)
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
    r = CliRunner().invoke(main, ["compare", str(pore_file), str(p), "--pixel-size", "0.2",
                                  "--count", "3", "--voxel", "0.2", "--json", "--solid", "dark"])
    assert r.exit_code == 0, r.output
    d = json.loads(r.stdout)["distances"]["thickness_solid"]
    assert d["ks_statistic"] > 0.5
    assert d["wasserstein_nm"] > 1.0
