"""Side-by-side comparison of structures (``sheetview beside``, ``sv.compare_structures``).

Ground truth by construction: a stack of N layers of a triangulated rhombus patch (area
8 sqrt(3) nm^2, 0.7 nm sheets at the 1.4 nm repeat of 14 A tobermorite, Bonaccorsi,
Merlino & Kampf, J. Am. Ceram. Soc. 88 (2005) 505) has stacking number N, solid volume
N A t and interlayer volume (N - 1) A (1.4 - t) (derived); the stacks are placed at random
offsets and orientations. The figure passes the checks of tests/test_figures_layout.py
(a journal page wide, text of 6.5 pt or more, nothing clipped or covered). A measured curve that is an exact affine image of a model curve
is fitted back exactly by linear least squares (derived).
"""
import json

import numpy as np
import pytest
from click.testing import CliRunner
from scipy.spatial.transform import Rotation

import sheetview as sv
from sheetview import Box, OptionError, Structure
from sheetview.cli import main
from sheetview.synth import rhombus_patch
from tests.test_figures_layout import check_fit_to_publish

REPEAT, T, L = 1.4, 0.7, 12.0
AREA = 8 * np.sqrt(3)  # 4 x 4 rhombus of unit edge: 32 equilateral triangles


def stack(n_layers, seed):
    rng = np.random.default_rng(seed)
    v = np.concatenate([rhombus_patch(4, 1.0) + [0, 0, REPEAT * k] for k in range(n_layers)])
    v = v - [0, 0, REPEAT * (n_layers - 1) / 2]
    rot = Rotation.random(random_state=seed)
    v = rot.apply(v.reshape(-1, 3)).reshape(-1, 3, 3) + rng.uniform(-0.5, 0.5, 3)
    return Structure(v, T, Box((-L / 2,) * 3, (L / 2,) * 3))


@pytest.fixture(scope="module")
def pair():
    return stack(3, 1), stack(5, 2)


@pytest.fixture(scope="module")
def cmp35(pair):
    return sv.compare_structures(list(pair), labels=["three", "five"],
                                 only="stacking,phases,chords")


def row(c, key):
    return c.table.loc[key]


def test_headline_against_construction(cmp35):
    """Stacking numbers exact; solid and interlayer fractions within 3 % of N A t / V and
    (N - 1) A (1.4 - t) / V at the default voxel; differences and ratios of the second to
    the first (the reference)."""
    V = L ** 3
    r = row(cmp35, "stacking.mean")
    assert r["three"] == 3 and r["five"] == 5
    assert r["five - three"] == pytest.approx(2)
    assert r["five / three"] == pytest.approx(5 / 3)
    s = row(cmp35, "volume_fractions.solid")
    assert s["three"] == pytest.approx(3 * AREA * T / V, rel=0.03)
    assert s["five"] == pytest.approx(5 * AREA * T / V, rel=0.03)
    i = row(cmp35, "volume_fractions.interlayer")
    assert i["three"] == pytest.approx(2 * AREA * (REPEAT - T) / V, rel=0.03)
    assert i["five"] == pytest.approx(4 * AREA * (REPEAT - T) / V, rel=0.03)
    assert i["five / three"] == pytest.approx(2.0, rel=0.04)
    # one voxel for both (the first input's default), so nothing differs
    assert cmp35.settings_differ == {}
    assert row(cmp35, "voxel_size_nm")["five / three"] == pytest.approx(1.0)


def test_curves_on_shared_axes(cmp35):
    """Stacking histograms are the constructions' (all prisms at N); the chord densities of
    both structures share one set of bins and each integrates to 1."""
    st = cmp35.curves["stacking"]
    assert st["three"]["x"].tolist() == [3] and st["three"]["y"].tolist() == [1.0]
    assert st["five"]["x"].tolist() == [5]
    ch = cmp35.curves["chords_solid"]
    assert np.array_equal(ch["three"]["x"], ch["five"]["x"])
    dx = np.diff(ch["three"]["x"])[0]
    for lab in ("three", "five"):
        assert np.sum(ch[lab]["y"]) * dx == pytest.approx(1.0, rel=1e-6)
    assert cmp35.curves["scattering"] == {}  # not asked for
    fig = cmp35.figure()
    assert len(fig.axes) == 8
    check_fit_to_publish("side_by_side", fig)


def test_report_folder_reads_as_measured(pair, tmp_path, cmp35):
    """A report folder written by `measure -o` gives the same headline row and curves as
    the structure measured in memory (CSV cells carry 9 significant digits)."""
    m = sv.measure(pair[0], only="stacking,phases,chords", voxel=cmp35.table.loc[
        "voxel_size_nm", "three"])
    m.write(tmp_path / "rep3", plots=False)
    c = sv.compare_structures([tmp_path / "rep3", pair[1]], labels=["three", "five"],
                              only="stacking,phases,chords")
    for key in ("stacking.mean", "volume_fractions.solid", "volume_fractions.interlayer",
                "chords.solid_mean_nm"):
        assert row(c, key)["three"] == pytest.approx(row(cmp35, key)["three"], rel=1e-8)
    a, b = c.curves["chords_solid"]["three"], cmp35.curves["chords_solid"]["three"]
    assert np.allclose(a["y"], b["y"], rtol=1e-6)


def test_measured_scattering_fit_recovers_affine_image(pair, tmp_path):
    """A 'measured' curve 2.5 I_model + 0.01 of the first structure is fitted back with
    scale 2.5, background 0.01 and chi2 ~ 0 (exact linear least squares); the second
    structure gets its own fit."""
    c0 = sv.compare_structures(list(pair), labels=["a", "b"], only="scattering")
    cur = c0.curves["scattering"]["a"]
    f = tmp_path / "measured.csv"
    np.savetxt(f, np.c_[cur["x"], 2.5 * cur["y"] + 0.01], delimiter=",",
               header="q_nm-1,I_cm-1", comments="")
    c = sv.compare_structures(list(pair), labels=["a", "b"], only="scattering",
                              measured_scattering=f)
    fit = c.measured["scattering"]["fits"]
    assert fit["a"]["scale"] == pytest.approx(2.5, rel=1e-6)
    assert fit["a"]["background_cm-1"] == pytest.approx(0.01, rel=1e-4)
    assert fit["a"]["chi2_reduced"] < 1e-10
    assert fit["b"]["chi2_reduced"] > 1e-4
    check_fit_to_publish("side_by_side with a measured curve", c.figure())


def test_bad_calls(pair, tmp_path):
    with pytest.raises(OptionError, match="at least two"):
        sv.compare_structures([pair[0]])
    with pytest.raises(OptionError, match="labels"):
        sv.compare_structures(list(pair), labels=["x", "x"], only="stacking")
    with pytest.raises(OptionError, match="2 labels for 3"):
        sv.compare_structures([*pair, pair[0]], labels="a,b", only="stacking")


def test_cli_beside(pair, tmp_path):
    """The command: a table on stdout, a comparison folder, JSON, one-line errors with
    status 2, and an input report folder never used as the output."""
    for lab, s in zip(("s3", "s5"), pair):
        sv.write(s, tmp_path / f"{lab}.npz")
    r = CliRunner().invoke(main, ["beside", str(tmp_path / "s3.npz"), str(tmp_path / "s5.npz"),
                                  "--only", "stacking,phases", "-q", "-o",
                                  str(tmp_path / "cmp")])
    assert r.exit_code == 0, r.output
    assert "mean stacking number, over prisms [layers]" in r.output
    doc = json.loads((tmp_path / "cmp" / "comparison.json").read_text())
    assert doc["reference"] == "s3"
    keys = {h["key"]: h for h in doc["headline"]}
    assert keys["stacking.mean"]["s5 / s3"] == pytest.approx(5 / 3)
    head = (tmp_path / "cmp" / "headline.csv").read_text().splitlines()[0]
    assert head.startswith("key,quantity,unit,s3,s5")
    assert (tmp_path / "cmp" / "side_by_side.png").stat().st_size > 10_000
    r = CliRunner().invoke(main, ["beside", str(tmp_path / "s3.npz"), str(tmp_path / "s5.npz"),
                                  "--only", "stacking", "--json"])
    assert r.exit_code == 0 and json.loads(r.output)["structures"][1]["label"] == "s5"
    r = CliRunner().invoke(main, ["beside", str(tmp_path / "s3.npz")])
    assert r.exit_code == 2 and "at least two" in r.output
    # the output folder may not be an input report folder
    sv.measure(pair[0], only="stacking").write(tmp_path / "rep")
    before = sorted(p.name for p in (tmp_path / "rep").iterdir())
    r = CliRunner().invoke(main, ["beside", str(tmp_path / "rep"), str(tmp_path / "s5.npz"),
                                  "--only", "stacking", "-q", "-o", str(tmp_path / "rep"),
                                  "--force"])
    assert r.exit_code == 2 and "one of the inputs" in r.output
    assert sorted(p.name for p in (tmp_path / "rep").iterdir()) == before


def test_particle_packings_side_by_side():
    """Two random sphere packings (our generator, periodic 8 nm boxes, 0.30 and 0.45 of the
    volume): the solid fractions of the comparison equal the packings' exact volume fractions
    (sum of 4/3 pi r^3 over the box, non-overlapping spheres: derived) within 1 % at the
    default voxel, their ratio within 2 %; stacking and order do not apply to particles and
    their rows stay empty."""
    from sheetview.synth import pack_particles
    box = Box((0, 0, 0), (8, 8, 8), periodic=True)
    a = pack_particles(box, 0.30, radius="lognormal:1.0,0.2", seed=3).particles
    b = pack_particles(box, 0.45, radius="lognormal:1.0,0.2", seed=4).particles
    c = sv.compare_structures([a, b], labels=["loose", "dense"], only="phases,surface")
    s = row(c, "volume_fractions.solid")
    fa, fb = a.volume_fraction(), b.volume_fraction()
    assert s["loose"] == pytest.approx(fa, rel=0.01)
    assert s["dense"] == pytest.approx(fb, rel=0.01)
    assert s["dense / loose"] == pytest.approx(fb / fa, rel=0.02)
    assert "stacking.mean" not in c.table.index
