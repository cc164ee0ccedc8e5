"""Command-line tests of section, project, kinetics and --at-progress / --at-time."""
import json

import numpy as np
import pytest
import tifffile
from click.testing import CliRunner

from sheetview.cli import main
from sheetview.synth import pack_stacks
from sheetview import Sphere, write


@pytest.fixture(scope="module")
def born_file(tmp_path_factory):
    d = tmp_path_factory.mktemp("born")
    res = pack_stacks(Sphere((0, 0, 0), 9.0), 25, seeding="wall", orientation="wall",
                      lateral_size="fixed:4", layers="fixed:3", born=True, seed=1)
    p = d / "grown.npz"
    write(res.structure, p)
    return p


def _run(args):
    r = CliRunner().invoke(main, [str(a) for a in args])
    return r


def test_section_writes_picture_and_data(born_file, tmp_path):
    folder = tmp_path / "cut"
    r = _run(["section", born_file, "--axis", "z", "--voxel", "0.2", "-o", folder, "--json"])
    assert r.exit_code == 0, r.output
    doc = json.loads(r.stdout)
    assert doc["pixel_nm"] == pytest.approx(0.2)
    assert set(doc["area_fractions"]) <= {"solid", "interlayer", "gel"}
    assert sum(doc["area_fractions"].values()) == pytest.approx(1.0)
    for suffix in (".png", ".tif", "_data.tif", ".json"):
        assert (folder / f"section{suffix}").stat().st_size > 0
    with tifffile.TiffFile(folder / "section_data.tif") as tf:
        page = tf.pages[0]
        lab = page.asarray()
        xres = page.tags["XResolution"].value
        desc = json.loads(page.description)
    # pixels per cm -> nm per pixel
    assert 1e7 / (xres[0] / xres[1]) == pytest.approx(0.2, rel=1e-6)
    assert desc["kind"] == "section" and desc["pixel_nm"] == pytest.approx(0.2)
    assert lab.shape == tuple(doc["shape_rows_cols"])
    # existing outputs are refused and left alone
    before = (folder / "section.png").read_bytes()
    r = _run(["section", born_file, "--voxel", "0.2", "-o", folder])
    assert r.exit_code == 2 and "exists" in r.output
    assert (folder / "section.png").read_bytes() == before


def test_project_json_and_files(born_file, tmp_path):
    r = _run(["project", born_file, "--axis", "x", "--slab", "4", "--pixel", "0.1", "--resolution",
              "0.5", "-o", tmp_path / "tem", "--json"])
    assert r.exit_code == 0, r.output
    doc = json.loads(r.stdout)
    assert doc["slab_thickness_nm"] == pytest.approx(4.0)
    assert doc["right"] == "y" and doc["up"] == "z"
    with tifffile.TiffFile(tmp_path / "tem" / "projection_data.tif") as tf:
        assert len(tf.pages) == 3
        inten = tf.pages[0].asarray()
        thick = tf.pages[1].asarray()
    assert inten.dtype == np.float32 and thick.max() > 0
    assert thick.max() <= 4.0 + 1e-5


@pytest.mark.parametrize("args,needle", [
    (["section", "{f}", "--offset", "50"], "outside the sample"),
    (["section", "{f}", "--at", "500"], "outside the sample"),
    (["section", "{f}", "--normal", "1,0,0", "--origin", "500,0,0"], "outside the sample"),
    (["section", "{f}", "--at", "1", "--offset", "1"], "once"),
    (["section", "{f}", "--normal", "0,0,0"], "non-zero"),
    (["section", "{f}", "--pixel", "-1"], "positive"),
    (["section", "{f}", "--axis", "z", "--normal", "0,0,1"], "not both"),
    (["project", "{f}", "--slab", "2", "--offset", "40"], "misses the sample"),
    (["project", "{f}", "--slab", "2", "--at", "500"], "misses the sample"),
    (["project", "{f}", "--mfp", "0"], "--mfp"),
    (["project", "{f}", "--pixel", "0.0001"], "largest side"),
    (["project", "{f}", "--threshold", "dark"], "--threshold"),
    (["section", "{f}", "--at-progress", "50"], "fraction in (0, 1]"),
    (["section", "{f}", "--at-progress", "0.5", "--at-time", "3"], "not both"),
    (["section", "{f}", "--at-time", "-5"], "no prism is born"),
    (["kinetics", "{f}", "--smooth", "-1"], "--smooth"),
    (["kinetics", "{f}", "--track", "a,b"], "--track"),
    (["kinetics", "{f}", "--track", "0.5,50"], "--track values must be fractions in (0, 1], got 50"),
])
def test_bad_options_exit_2_with_a_message(born_file, args, needle):
    r = _run([a.replace("{f}", str(born_file)) for a in args])
    assert r.exit_code == 2, r.output
    assert needle in r.output
    assert "Traceback" not in r.output


def test_no_born_column_is_refused(tmp_path):
    res = pack_stacks(Sphere((0, 0, 0), 6.0), 5, seed=0)
    p = tmp_path / "plain.npz"
    write(res.structure, p)
    for cmd in (["kinetics", p], ["section", p, "--at-progress", "0.5"],
                ["scatter", p, "--at-time", "1", "--csv", tmp_path / "q.csv"]):
        r = _run(cmd)
        assert r.exit_code == 2, r.output
        assert "no 'born' column" in r.output and "plain.npz" in r.output
    assert not (tmp_path / "q.csv").exists()


def test_kinetics_outputs_and_track(born_file, tmp_path):
    r = _run(["kinetics", born_file, "--csv", tmp_path / "a.csv", "--rate-csv", tmp_path / "r.csv",
              "-o", tmp_path / "k.png", "--track", "0.5,1", "--keys", "stacking.mean", "--json"])
    assert r.exit_code == 0, r.output
    doc = json.loads(r.stdout)
    assert doc["t10"] <= doc["t50"] <= doc["t90"]
    tr = doc["track"]
    assert tr["progress_requested"] == [0.5, 1.0]
    assert tr["n_prisms"][1] == doc["n_prisms"]
    assert "stacking.mean" in tr
    a = np.loadtxt(tmp_path / "a.csv", delimiter=",", skiprows=1)
    assert a[-1, 1] == pytest.approx(1.0) and np.all(np.diff(a[:, 1]) > 0)
    assert (tmp_path / "k.png").stat().st_size > 0


def test_at_progress_on_scatter_and_relax_records_the_moment(born_file, tmp_path):
    r = _run(["scatter", born_file, "--at-progress", "0.5", "--voxel", "0.25", "--csv",
              tmp_path / "q.csv", "--json", tmp_path / "q.json"])
    assert r.exit_code == 0, r.output
    at = json.loads((tmp_path / "q.json").read_text())["at"]
    assert 0.5 <= at["progress"] < 0.7 and at["n_prisms"] < at["n_total"]
    r = _run(["relax", born_file, "--at-time", "10", "--voxel", "0.25", "--csv", tmp_path / "t.csv",
              "--json", tmp_path / "t.json"])
    assert r.exit_code == 0, r.output
    at = json.loads((tmp_path / "t.json").read_text())["at"]
    assert at["time"] == 10.0


def test_section_at_progress_has_less_solid(born_file):
    """Earlier in growth there is less solid on the same plane (born prisms only)."""
    fr = []
    for p in ("0.3", "1"):
        r = _run(["section", born_file, "--voxel", "0.2", "--at-progress", p, "--json"])
        assert r.exit_code == 0, r.output
        d = json.loads(r.stdout)
        fr.append(d["area_fractions"].get("solid", 0.0) + d["area_fractions"].get("interlayer", 0.0))
    assert fr[0] < fr[1]


def test_describe_on_section_and_projection(born_file):
    """--describe adds the 2D descriptors; counting the interlayer as solid raises the solid
    area fraction by the interlayer's own area fraction (same pixels, definition)."""
    docs = {}
    for phases in ("solid", "solid,interlayer"):
        r = _run(["section", born_file, "--voxel", "0.2", "--describe", "--solid-phases", phases,
                  "--lines", "300", "--json"])
        assert r.exit_code == 0, r.output
        docs[phases] = json.loads(r.stdout)
    d0, d1 = docs["solid"], docs["solid,interlayer"]
    fr = d0["area_fractions"]
    assert d0["descriptors"]["area_fraction"] == pytest.approx(fr.get("solid", 0), abs=1e-9)
    assert d1["descriptors"]["area_fraction"] == pytest.approx(
        fr.get("solid", 0) + fr.get("interlayer", 0), abs=1e-9)
    r = _run(["project", born_file, "--slab", "4", "--pixel", "0.1", "--describe", "--lines", "300",
              "--json"])
    assert r.exit_code == 0, r.output
    d = json.loads(r.stdout)
    assert 0 < d["descriptors"]["area_fraction"] < 1 and 0 < d["threshold"] < 1


def test_render_at_progress_draws_the_earlier_structure(born_file, tmp_path):
    """render --at-progress reports the moment it draws and writes the picture."""
    out = tmp_path / "early.png"
    r = _run(["render", born_file, "--at-progress", "0.3", "-o", out, "--size", "320x240"])
    assert r.exit_code == 0, r.output
    assert "as it stood at progress 0.3" in r.output
    assert out.stat().st_size > 0


def test_measure_at_progress_measures_the_earlier_structure(born_file, tmp_path):
    """measure --at-progress: the summary counts only the prisms born by then and records
    the moment (its n_prisms equals the kept prisms)."""
    r = _run(["measure", born_file, "--only", "stacking", "--at-progress", "0.5", "--json"])
    assert r.exit_code == 0, r.output
    doc = json.loads(r.stdout)
    assert doc["at"]["n_prisms"] == doc["n_prisms"] < doc["at"]["n_total"]
    assert doc["at"]["progress"] >= 0.5
    r = _run(["measure", born_file, "--only", "stacking", "--at-time", "1e9", "--json"])
    assert r.exit_code == 0, r.output
    doc = json.loads(r.stdout)
    assert doc["at"]["n_prisms"] == doc["at"]["n_total"] == doc["n_prisms"]


SAMPLE_TIF = "sample_structures/small_volume.tif"


def test_project_and_compare_a_voxel_volume(tmp_path):
    """A voxel volume projects by voxel counts over its own box (solid thickness = solid
    voxels x 0.5 nm along z, checked against the file's array), and compare accepts it."""
    import tifffile as tf
    r = _run(["project", SAMPLE_TIF, "--json", "-o", tmp_path / "v"])
    assert r.exit_code == 0, r.output
    doc = json.loads(r.stdout)
    zyx = tf.imread(SAMPLE_TIF)            # pages along z, rows y, columns x; 1 = solid
    expected = (zyx == 1).sum(axis=0)[::-1] * 0.5   # picture rows run down y
    with tf.TiffFile(tmp_path / "v" / "projection_data.tif") as t:
        thick = t.pages[1].asarray()
    np.testing.assert_allclose(thick, expected, atol=1e-6)
    assert doc["pixel_nm"] == 0.5
    from matplotlib.image import imsave
    m = np.where(np.random.default_rng(0).random((64, 64)) < 0.1, 20, 230).astype(np.uint8)
    imsave(tmp_path / "mg.png", m, cmap="gray", vmin=0, vmax=255)
    r = _run(["compare", SAMPLE_TIF, tmp_path / "mg.png", "--pixel", "0.5", "--count", "2",
              "--lines", "200", "--json"])
    assert r.exit_code == 0, r.output


@pytest.mark.parametrize("args,needle", [
    (["project", "{f}", "--offset", "3"], "give its thickness with --slab"),
    (["project", "{f}", "--offset", "nan", "--slab", "2"], "finite"),
    (["project", "{f}", "--resolution", "1e6"], "over ten times"),
    (["project", "{f}", "--threshold", "2", "--describe"], "between 0 and 1"),
    (["section", "{f}", "--normal", "1,1,1", "--offset", "14"], "meets no voxel"),
    (["kinetics", "{f}", "--t0", "-inf"], "--t0"),
    (["kinetics", "{f}", "--t0", "1e9"], "--t0"),
])
def test_more_bad_options(born_file, args, needle):
    r = _run([a.replace("{f}", str(born_file)) for a in args])
    assert r.exit_code == 2, r.output
    assert needle in r.output and "Traceback" not in r.output


def test_kinetics_track_default_selection(born_file):
    r = _run(["kinetics", born_file, "--track", "1", "--only", "default", "--voxel", "0.3",
              "--keys", "phases.", "--json"])
    assert r.exit_code == 0, r.output
    assert any(k.startswith("phases.") for k in json.loads(r.stdout)["track"])


def test_picture_with_a_pixel_too_fine_for_tiff_tags(tmp_path):
    """A pixel finer than a TIFF rational can state is written without resolution tags (the
    description still gives pixel_nm), all three files or none."""
    import tifffile as tf
    from sheetview.pictures import write_picture
    pic = np.zeros((20, 20, 3), np.uint8)
    files = write_picture(tmp_path / "fine", pic, {"phase": np.zeros((20, 20), np.uint8)}, 1e-4,
                          {"kind": "section"})
    with tf.TiffFile(files["data"]) as t:
        # no length unit is claimed (tifffile writes the neutral 1/1, unit NONE)
        assert int(t.pages[0].tags["ResolutionUnit"].value) == 1
        assert json.loads(t.pages[0].description)["pixel_nm"] == 1e-4
    assert all(p.exists() for p in files.values())
