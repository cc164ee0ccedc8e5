"""Reading micrographs (sheetview.io.images) and ``sheetview micrograph``: formats,
conversions, refusals of bad input (exit status 2, the file named, no traceback) and the
output folder written atomically."""
from __future__ import annotations

import json
import math

import numpy as np
import pytest
import tifffile
from click.testing import CliRunner
from PIL import Image
from scipy import ndimage as ndi

from sheetview.cli import main
from sheetview.errors import InputError, OptionError
from sheetview.io.images import read_micrograph


def texture(shape=(70, 90), seed=0, lo=40, hi=210):
    rng = np.random.default_rng(seed)
    g = ndi.gaussian_filter(rng.random(shape), 3.0)
    g = (g - g.min()) / (g.max() - g.min())
    return (lo + (hi - lo) * g)


@pytest.fixture
def grey_png(tmp_path):
    p = tmp_path / "grey.png"
    Image.fromarray(np.rint(texture()).astype(np.uint8)).save(p)
    return p


def run(*args):
    return CliRunner().invoke(main, [str(a) for a in args])


# ======================================================================= reader

def test_grey_png(grey_png):
    from skimage.filters import threshold_otsu

    img = np.asarray(Image.open(grey_png))
    mg = read_micrograph(grey_png, pixel_size=2.5)
    np.testing.assert_array_equal(mg.grey, img.astype(float))
    t = threshold_otsu(img)
    assert mg.threshold == t and mg.threshold_method == "otsu"
    np.testing.assert_array_equal(mg.mask, img > t)
    assert mg.valid.all() and mg.pixel == 2.5 and mg.dtype == "uint8" and mg.notes == []
    dark = read_micrograph(grey_png, pixel_size=2.5, solid="dark")
    np.testing.assert_array_equal(dark.mask, ~mg.mask)
    d = mg.to_dict()
    assert d["field_of_view_nm"] == [90 * 2.5, 70 * 2.5]


def test_numeric_threshold(grey_png):
    img = np.asarray(Image.open(grey_png)).astype(float)
    mg = read_micrograph(grey_png, pixel_size=1, threshold="100.5")
    np.testing.assert_array_equal(mg.mask, img > 100.5)
    assert mg.threshold_method == "value"
    with pytest.raises(OptionError, match="grey values run from") as e:
        read_micrograph(grey_png, pixel_size=1, threshold=250)
    assert "grey.png" in str(e.value)
    with pytest.raises(OptionError, match="otsu"):
        read_micrograph(grey_png, pixel_size=1, threshold="half")
    with pytest.raises(OptionError):
        read_micrograph(grey_png, pixel_size=1, threshold=float("nan"))
    with pytest.raises(OptionError, match="bright"):
        read_micrograph(grey_png, pixel_size=1, solid="white")


def test_16_bit_png_keeps_its_values(tmp_path):
    g = np.rint(texture(lo=1000, hi=50000)).astype(np.uint16)
    p = tmp_path / "deep.png"
    Image.fromarray(g).save(p)
    mg = read_micrograph(p, pixel_size=1)
    assert mg.grey.max() == g.max() and mg.dtype in ("uint16", "int32")
    assert 1000 < mg.threshold < 50000
    mg2 = read_micrograph(p, pixel_size=1, threshold=20000)
    np.testing.assert_array_equal(mg2.mask, g > 20000)


def test_float_tiff_with_nan(tmp_path):
    g = texture().astype(np.float32) / 255.0
    g[:5, :7] = np.nan
    p = tmp_path / "f.tif"
    tifffile.imwrite(p, g)
    mg = read_micrograph(p, pixel_size=1)
    assert not mg.valid[:5, :7].any() and mg.valid.sum() == g.size - 35
    assert not mg.mask[:5, :7].any()
    assert 0 < mg.threshold < 1
    assert any("NaN" in n for n in mg.notes)
    tifffile.imwrite(tmp_path / "nan.tif", np.full((30, 30), np.nan, np.float32))
    with pytest.raises(InputError, match="NaN") as e:
        read_micrograph(tmp_path / "nan.tif", pixel_size=1)
    assert "nan.tif" in str(e.value)


def test_rgba_alpha_zero_is_invalid(tmp_path):
    g = np.rint(texture()).astype(np.uint8)
    rgba = np.dstack([g, g // 2, 255 - g, np.full_like(g, 255)])
    rgba[10:20, 30:50, 3] = 0
    p = tmp_path / "a.png"
    Image.fromarray(rgba).save(p)
    mg = read_micrograph(p, pixel_size=1)
    assert not mg.valid[10:20, 30:50].any() and mg.valid.sum() == g.size - 200
    assert any("alpha" in n for n in mg.notes) and any("BT.709" in n for n in mg.notes)
    green = read_micrograph(p, pixel_size=1, channel="g")
    np.testing.assert_array_equal(green.grey[mg.valid], (g // 2).astype(float)[mg.valid])


def test_palette_and_grey_as_rgb(tmp_path):
    g = np.rint(texture()).astype(np.uint8)
    Image.fromarray(g).convert("P").save(tmp_path / "pal.png")
    mg = read_micrograph(tmp_path / "pal.png", pixel_size=1)
    assert any("palette" in n for n in mg.notes)
    Image.fromarray(np.dstack([g, g, g])).save(tmp_path / "rgb.png")
    mg2 = read_micrograph(tmp_path / "rgb.png", pixel_size=1)
    np.testing.assert_array_equal(mg2.grey, g.astype(float))
    assert any("equal channels" in n for n in mg2.notes)


def test_binary_images_need_no_threshold(tmp_path):
    b = texture() > 120
    Image.fromarray(b).save(tmp_path / "bits.png")  # mode "1"
    mg = read_micrograph(tmp_path / "bits.png", pixel_size=1)
    np.testing.assert_array_equal(mg.mask, b)
    assert mg.threshold_method == "two-valued" and math.isnan(mg.threshold)
    Image.fromarray(b.astype(np.uint8) * 255).save(tmp_path / "seg.png")
    mg2 = read_micrograph(tmp_path / "seg.png", pixel_size=1, solid="dark")
    np.testing.assert_array_equal(mg2.mask, ~b)
    assert any("two values" in n for n in mg2.notes)
    tifffile.imwrite(tmp_path / "b.tif", b)
    np.testing.assert_array_equal(read_micrograph(tmp_path / "b.tif", pixel_size=1).mask, b)


def test_jpeg(tmp_path):
    g = np.rint(texture()).astype(np.uint8)
    Image.fromarray(g).save(tmp_path / "j.jpg", quality=95)
    mg = read_micrograph(tmp_path / "j.jpg", pixel_size=3)
    assert mg.shape == g.shape
    assert np.mean(mg.mask == (g > mg.threshold)) > 0.97


def test_tiff_resolution_tags(tmp_path):
    g = np.rint(texture()).astype(np.uint8)
    # 0.5 um per pixel = 20000 pixels per cm
    tifffile.imwrite(tmp_path / "cal.tif", g, resolution=(20000, 20000),
                     resolutionunit="CENTIMETER")
    mg = read_micrograph(tmp_path / "cal.tif")
    assert mg.pixel == pytest.approx(500.0)
    assert any("resolution tag" in n for n in mg.notes)
    given = read_micrograph(tmp_path / "cal.tif", pixel_size=2.0)
    assert given.pixel == 2.0 and any("--pixel-size 2 nm used" in n for n in given.notes)
    # ImageJ-style unit with no resolution unit: 4 pixels per nm
    tifffile.imwrite(tmp_path / "ij.tif", g, imagej=True, resolution=(4.0, 4.0),
                     metadata={"unit": "nm"})
    assert read_micrograph(tmp_path / "ij.tif").pixel == pytest.approx(0.25)
    # a 72 dpi document default is not a calibration
    tifffile.imwrite(tmp_path / "doc.tif", g, resolution=(72, 72), resolutionunit="INCH")
    with pytest.raises(OptionError, match="--pixel-size") as e:
        read_micrograph(tmp_path / "doc.tif")
    assert "doc.tif" in str(e.value)
    tifffile.imwrite(tmp_path / "rect.tif", g, resolution=(20000, 10000),
                     resolutionunit="CENTIMETER")
    with pytest.raises(InputError, match="not square"):
        read_micrograph(tmp_path / "rect.tif")
    # no tag at all
    tifffile.imwrite(tmp_path / "bare.tif", g)
    with pytest.raises(OptionError, match="pixel size is unknown"):
        read_micrograph(tmp_path / "bare.tif")


@pytest.mark.parametrize("value", [0, -1, float("nan"), float("inf"), 2e6, 1e-5, "abc"])
def test_bad_pixel_sizes(grey_png, value):
    with pytest.raises(OptionError) as e:
        read_micrograph(grey_png, pixel_size=value)
    assert "grey.png" in str(e.value) and "pixel-size" in str(e.value)


def _truncate(src, dst, keep=0.5):
    b = src.read_bytes()
    dst.write_bytes(b[: int(len(b) * keep)])
    return dst


def test_refusals_name_the_file(tmp_path, grey_png):
    g = np.rint(texture()).astype(np.uint8)
    cases = {}
    with tifffile.TiffWriter(tmp_path / "stack.tif") as tw:
        for k in range(3):
            tw.write(g)
    cases["stack.tif"] = "pages"
    Image.fromarray(g[:10]).save(tmp_path / "tiny.png")
    cases["tiny.png"] = "too small"
    Image.fromarray(np.full((40, 40), 7, np.uint8)).save(tmp_path / "flat.png")
    cases["flat.png"] = "constant"
    _truncate(grey_png, tmp_path / "cut.png")
    cases["cut.png"] = "truncated"
    Image.fromarray(g).save(tmp_path / "full.jpg")
    _truncate(tmp_path / "full.jpg", tmp_path / "cut.jpg", 0.4)
    cases["cut.jpg"] = "truncated"
    tifffile.imwrite(tmp_path / "full.tif", g)
    _truncate(tmp_path / "full.tif", tmp_path / "cut.tif", 0.3)
    cases["cut.tif"] = "truncated"
    (tmp_path / "junk.png").write_bytes(b"this is not an image at all" * 10)
    cases["junk.png"] = "corrupt"
    (tmp_path / "empty.png").write_bytes(b"")
    cases["empty.png"] = "empty"
    (tmp_path / "pic.bmp").write_bytes(b"BM")
    cases["pic.bmp"] = "unknown image type"
    cases["missing.png"] = "no such file"
    for name, msg in cases.items():
        with pytest.raises(InputError) as e:
            read_micrograph(tmp_path / name, pixel_size=1)
        assert name in str(e.value) and msg in str(e.value), (name, str(e.value))
    with pytest.raises(OptionError, match="colour images"):
        read_micrograph(grey_png, pixel_size=1, channel="r")
    Image.fromarray(np.dstack([g, g // 2, g // 3])).save(tmp_path / "c.png")
    for ch in ("x", 5):
        with pytest.raises(OptionError, match="--channel"):
            read_micrograph(tmp_path / "c.png", pixel_size=1, channel=ch)


def test_fully_transparent_image_is_refused(tmp_path):
    g = np.rint(texture()).astype(np.uint8)
    Image.fromarray(np.dstack([g, g, g, np.zeros_like(g)])).save(tmp_path / "clear.png")
    with pytest.raises(InputError, match="transparent"):
        read_micrograph(tmp_path / "clear.png", pixel_size=1)


# ========================================================================== CLI

def test_cli_summary_json_and_quiet(grey_png):
    r = run("micrograph", grey_png, "--pixel", 2, "--lines", 300)
    assert r.exit_code == 0, r.output
    assert "solid area" in r.output and "chords" in r.output and "orientation" in r.output
    r = run("micrograph", grey_png, "--pixel", 2, "--lines", 300, "--json")
    assert r.exit_code == 0
    doc = json.loads(r.stdout)
    assert doc["image"]["pixel_nm"] == 2.0 and doc["settings"] == {"lines": 300, "seed": 0}
    d = doc["descriptors"]
    assert 0 < d["area_fraction"] < 1 and d["mean_chord_solid_nm"] > 0
    assert d["chords"]["n_lines"]["random"] == 300
    r = run("micrograph", grey_png, "--pixel", 2, "--lines", 300, "-q")
    assert r.exit_code == 0 and r.stdout == ""


def test_cli_writes_the_folder_atomically(grey_png, tmp_path):
    out = tmp_path / "res"
    r = run("micrograph", grey_png, "--pixel", 2, "--lines", 200, "-o", out, "--seed", 7)
    assert r.exit_code == 0, r.output
    names = {p.name for p in out.iterdir()}
    assert names == {"descriptors.json", "chords.csv", "thickness.csv", "s2.csv",
                     "orientation.csv", "overview.png", ".sheetview-files"}
    doc = json.loads((out / "descriptors.json").read_text())
    again = json.loads(run("micrograph", grey_png, "--pixel", 2, "--lines", 200,
                           "--seed", 7, "--json").stdout)
    assert doc == again
    assert (out / "chords.csv").read_text().splitlines()[0] == \
        "phase,direction,length_nm,cut,weight_per_nm"
    assert (out / "s2.csv").read_text().startswith("r_nm,s2,pairs")
    with Image.open(out / "overview.png") as im:
        assert im.format == "PNG" and im.size[0] > 600
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".res")]
    # an existing folder is refused without --force, its files untouched
    before = (out / "descriptors.json").read_bytes()
    r = run("micrograph", grey_png, "--pixel", 3, "--lines", 200, "-o", out)
    assert r.exit_code == 2 and "--force" in r.output and str(out) in r.output
    assert "Traceback" not in r.output
    assert (out / "descriptors.json").read_bytes() == before
    r = run("micrograph", grey_png, "--pixel", 3, "--lines", 200, "-o", out, "--force")
    assert r.exit_code == 0
    assert json.loads((out / "descriptors.json").read_text())["image"]["pixel_nm"] == 3.0


def test_cli_failure_while_writing_leaves_nothing(grey_png, tmp_path, monkeypatch):
    import sheetview.cli.micrograph as cm

    def boom(*a, **k):
        raise RuntimeError("disk on fire")

    monkeypatch.setattr(cm, "overview_figure", boom)
    r = run("micrograph", grey_png, "--pixel", 2, "--lines", 100, "-o", tmp_path / "o")
    assert r.exit_code != 0
    assert sorted(p.name for p in tmp_path.iterdir()) == ["grey.png"]


@pytest.mark.parametrize("args, fragment", [
    ((), "--pixel"),
    (("--pixel", "-1"), "positive"),
    (("--pixel", "nan"), "positive"),
    (("--pixel", "5e7"), "not a micrograph"),
    (("--pixel", "1", "--threshold", "mid"), "--threshold"),
    (("--pixel", "1", "--threshold", "9999"), "one phase"),
    (("--pixel", "1", "--lines", "0"), "--lines"),
])
def test_cli_bad_options_exit_2(grey_png, args, fragment):
    r = run("micrograph", grey_png, *args)
    assert r.exit_code == 2, r.output
    assert fragment in r.output and "Traceback" not in r.output


def test_cli_bad_files_exit_2_naming_the_file(tmp_path, grey_png):
    _truncate(grey_png, tmp_path / "broken.png")
    Image.fromarray(np.zeros((8, 100), np.uint8)).save(tmp_path / "thin.png")
    for name in ("broken.png", "thin.png", "absent.tif"):
        r = run("micrograph", tmp_path / name, "--pixel", 1)
        assert r.exit_code == 2 and name in r.output and "Traceback" not in r.output
        assert r.output.startswith("sheetview: error:")
