"""The micrograph loop: what ``sheetview project`` and ``sheetview section`` write is read by
``sheetview micrograph`` as written; the crop, the burned-in scale bar and the pixel size read
from the file (TIFF resolution tags, sheetview's JSON description, PNG pHYs), and the warning on
an enlarged image."""
from __future__ import annotations

import json

import numpy as np
import pytest
import tifffile
from click.testing import CliRunner
from PIL import Image, ImageDraw, ImageFont
from scipy import ndimage as ndi

from sheetview import Sphere, write
from sheetview.cli import main
from sheetview.errors import OptionError
from sheetview.io.images import find_scale_bar, read_micrograph, replication
from sheetview.synth import pack_stacks


def run(*args):
    return CliRunner().invoke(main, [str(a) for a in args])


@pytest.fixture(scope="module")
def grown(tmp_path_factory):
    d = tmp_path_factory.mktemp("loop")
    res = pack_stacks(Sphere((0, 0, 0), 9.0), 25, seeding="wall", orientation="wall",
                      lateral_size="fixed:4", layers="fixed:3", born=True, seed=1)
    p = d / "grown.npz"
    write(res.structure, p)
    return p


def grey_texture(shape=(300, 400), seed=3):
    """A smooth random grey texture with noise, values 1..254 (no pixel at 0 or 255)."""
    rng = np.random.default_rng(seed)
    g = ndi.gaussian_filter(rng.random(shape), 4.0)
    g = (g - g.min()) / (g.max() - g.min())
    return np.rint(30 + 190 * g + rng.normal(0, 4, shape)).clip(1, 254).astype(np.uint8)


# ====================================================================== the loop
def test_project_data_tiff_is_read_as_written(grown, tmp_path):
    """project -o writes a data TIFF of three pages (intensity, thickness, valid); micrograph
    reads it: its pixel size is the projection's, the solid is dark, the valid page marks the
    sample, and the solid area fraction equals both the projection's own --describe number and
    Otsu's threshold (scikit-image) applied to the intensity page read with tifffile."""
    from skimage.filters import threshold_otsu

    stem = tmp_path / "tem" / "projection"  # -o FOLDER writes projection*.{png,tif}
    r = run("project", grown, "--slab", "4", "--pixel", "0.1", "--describe", "--lines", "300",
            "--json", "-o", stem.parent)
    assert r.exit_code == 0, r.output
    proj = json.loads(r.stdout)
    r = run("micrograph", f"{stem}_data.tif", "--json", "--lines", "300")
    assert r.exit_code == 0, r.output
    doc = json.loads(r.stdout)
    assert doc["image"]["pixel_nm"] == pytest.approx(proj["pixel_nm"], rel=1e-9)
    assert doc["image"]["solid"] == "dark"
    with tifffile.TiffFile(f"{stem}_data.tif") as tf:
        inten = tf.pages[0].asarray().astype(float)
        valid = tf.pages[2].asarray() != 0
    t = threshold_otsu(inten[valid])
    expected = float(np.mean(inten[valid] <= t))
    assert doc["image"]["n_valid"] == int(valid.sum())
    assert doc["descriptors"]["area_fraction"] == pytest.approx(expected, abs=1e-12)
    assert doc["descriptors"]["area_fraction"] == pytest.approx(
        proj["descriptors"]["area_fraction"], abs=2e-3)


def test_section_data_tiff_reads_solid_and_interlayer_as_solid(grown, tmp_path):
    """section -o writes the phase codes; micrograph reads solid and interlayer as solid and
    leaves the outside of the domain out, so its area fraction is the section's solid +
    interlayer fraction (the numbers the section command prints)."""
    stem = tmp_path / "cut" / "section"  # -o FOLDER writes section*.{png,tif}
    r = run("section", grown, "--voxel", "0.2", "--json", "-o", stem.parent)
    assert r.exit_code == 0, r.output
    sec = json.loads(r.stdout)
    mg = read_micrograph(f"{stem}_data.tif")
    fr = sec["area_fractions"]
    assert mg.pixel == pytest.approx(sec["pixel_nm"], rel=1e-9)
    assert float(mg.mask[mg.valid].mean()) == pytest.approx(
        fr.get("solid", 0.0) + fr.get("interlayer", 0.0), abs=1e-9)
    # the coloured picture is read but warned about
    pic = read_micrograph(f"{stem}.png")
    assert any("_data.tif" in w for w in pic.warnings)


def test_project_picture_png_reads_its_data_rows_and_warns(grown, tmp_path):
    """The PNG picture: only the rows above the scale-bar strip are read, its pixel is the
    data pixel over the enlargement, and a warning says the picture is enlarged."""
    stem = tmp_path / "tem" / "projection"
    r = run("project", grown, "--slab", "4", "--pixel", "0.1", "-o", stem.parent, "-q")
    assert r.exit_code == 0, r.output
    with Image.open(f"{stem}.png") as im:
        desc = json.loads(im.info["Description"])
        height = im.size[1]
    k = desc["picture"]["enlargement"]
    mg = read_micrograph(f"{stem}.png")
    assert mg.shape[0] == desc["picture"]["data_rows"][1] < height
    assert mg.pixel == pytest.approx(0.1 / k, rel=1e-6)
    assert any("enlarged" in w for w in mg.warnings)
    assert mg.solid == "dark"


# ====================================================================== pixel size
def test_png_phys_gives_the_pixel_size(tmp_path):
    """A PNG pHYs chunk in pixels per metre (PNG specification 11.3.5.3, written here by
    Pillow) gives the pixel size: 4e8 pixels per metre is 2.5 nm."""
    p = tmp_path / "phys.png"
    per_m = 4e8
    Image.fromarray(grey_texture((64, 80))).save(p, dpi=(per_m * 0.0254, per_m * 0.0254))
    mg = read_micrograph(p, scale_bar="keep")
    assert mg.pixel == pytest.approx(1e9 / per_m, rel=1e-6)
    assert any("pHYs" in n for n in mg.notes)
    # a screen-like pHYs (72 dpi) is not a calibration
    Image.fromarray(grey_texture((64, 80))).save(tmp_path / "screen.png", dpi=(72, 72))
    with pytest.raises(OptionError, match="pixel size"):
        read_micrograph(tmp_path / "screen.png")


def test_replicated_png_is_warned_about(tmp_path):
    """An image enlarged k times by pixel replication (numpy.kron with a k x k block of ones)
    is recognised with k; the original is not."""
    base = grey_texture((60, 70))
    assert replication(base) == 1
    for k in (2, 3):
        big = np.kron(base, np.ones((k, k), np.uint8))
        assert replication(big) == k
        p = tmp_path / f"big{k}.png"
        Image.fromarray(big).save(p)
        mg = read_micrograph(p, pixel_size=1.0)
        assert any(f"enlarged {k} times" in w for w in mg.warnings)
    assert read_micrograph(_save(tmp_path / "plain.png", base), pixel_size=1.0).warnings == []


def _save(path, arr):
    Image.fromarray(arr).save(path)
    return path


# ====================================================================== crop
def test_crop_measures_the_rectangle(tmp_path):
    """--crop X0,Y0,X1,Y1 measures columns X0..X1-1 and rows Y0..Y1-1: the grey values are the
    numpy slice [Y0:Y1, X0:X1] of the file read with Pillow."""
    base = grey_texture((120, 150))
    p = _save(tmp_path / "g.png", base)
    mg = read_micrograph(p, pixel_size=1.0, crop="10,20,110,90")
    assert mg.shape == (70, 100) and mg.crop == (10, 20, 110, 90)
    np.testing.assert_array_equal(mg.grey, np.asarray(Image.open(p), float)[20:90, 10:110])
    r = run("micrograph", p, "--pixel", "1", "--crop", "10,20,110,90", "--json")
    assert r.exit_code == 0, r.output
    assert json.loads(r.stdout)["image"]["crop_px"] == [10, 20, 110, 90]
    # beyond the edge: cut to the image and warned
    mg = read_micrograph(p, pixel_size=1.0, crop=(100, 0, 400, 50))
    assert mg.shape == (50, 50) and mg.warnings


@pytest.mark.parametrize("crop,needle", [
    ("1,2,3", "X0,Y0,X1,Y1"), ("a,b,c,d", "X0,Y0,X1,Y1"), ("5,5,5,10", "X1 above X0"),
    ("-1,0,10,10", "at least 0"), ("500,0,600,10", "outside the image"),
    ("1.5,0,10,10", "whole pixels")])
def test_bad_crops_are_refused(tmp_path, crop, needle):
    p = _save(tmp_path / "g.png", grey_texture((64, 64)))
    with pytest.raises(OptionError, match=needle):
        read_micrograph(p, pixel_size=1.0, crop=crop)
    r = run("micrograph", p, "--pixel", "1", "--crop", crop)
    assert r.exit_code == 2 and "--crop" in r.output


# ====================================================================== scale bar
def _with_bar(base):
    """The texture with a white scale bar (rows 275..280) and its label above it, drawn with
    Pillow's ImageDraw and default bitmap font, lower right; returns (image, drawn rows)."""
    im = Image.fromarray(base.copy())
    d = ImageDraw.Draw(im)
    d.rectangle([300, 275, 379, 280], fill=255)
    d.text((315, 258), "50 nm", fill=255, font=ImageFont.load_default())
    a = np.asarray(im)
    return a, np.flatnonzero((a != base).any(axis=1))


def test_burned_in_scale_bar_is_found_and_left_out(tmp_path):
    """A bar and its label burned into the lower edge are left out (every row they touch,
    found by comparing with the image before drawing), with a warning; the image without them
    loses nothing; --scale-bar keep measures every pixel."""
    base = grey_texture()
    a, drawn = _with_bar(base)
    p = _save(tmp_path / "bar.png", a)
    mg = read_micrograph(p, pixel_size=1.0)
    out = np.flatnonzero(~mg.valid.any(axis=1))
    assert set(drawn) <= set(out)
    assert out.min() >= drawn.min() - 12 and out.max() == a.shape[0] - 1
    assert any("scale bar" in w for w in mg.warnings)
    # the area fraction is that of the remaining rows, segmented alone
    rest = read_micrograph(_save(tmp_path / "rest.png", base[:out.min()]), pixel_size=1.0,
                           threshold=mg.threshold)
    assert float(mg.mask[mg.valid].mean()) == pytest.approx(float(rest.mask.mean()), abs=1e-12)
    plain = read_micrograph(_save(tmp_path / "plain.png", base), pixel_size=1.0)
    assert plain.valid.all() and plain.warnings == []
    assert read_micrograph(p, pixel_size=1.0, scale_bar="keep").valid.all()
    # --scale-bar exclude on an image without one says so
    assert read_micrograph(tmp_path / "plain.png", pixel_size=1.0,
                           scale_bar="exclude").warnings


def test_information_strip_is_found():
    """A black data strip with white text along the lower edge (as many microscopes write
    it) is left out, rows drawn checked against the image before drawing."""
    base = grey_texture()
    im = Image.fromarray(base.copy())
    d = ImageDraw.Draw(im)
    d.rectangle([0, 280, 399, 299], fill=0)
    d.text((5, 284), "HV 5 kV  WD 4 mm  mag 100 kx", fill=255, font=ImageFont.load_default())
    a = np.asarray(im)
    band = find_scale_bar(a.astype(float))
    assert band is not None and band["rows"][1] == 300 and 270 <= band["rows"][0] <= 280


def test_two_valued_images_are_not_searched_by_default(tmp_path):
    """A binary image of thin bars (sheet sections look like scale bars) keeps every pixel
    under --scale-bar auto."""
    a = np.zeros((200, 200), np.uint8)
    a[185:189, 20:100] = 255
    a[10:14, 50:150] = 255
    a[90:110, 30:60] = 255
    mg = read_micrograph(_save(tmp_path / "bin.png", a), pixel_size=1.0)
    assert mg.valid.all() and mg.warnings == []


def _one_over_f(n=256, seed=5):
    """A grey image with a 1/f amplitude spectrum (natural-image-like) plus sensor noise."""
    rng = np.random.default_rng(seed)
    F = np.fft.fft2(rng.normal(size=(n, n)))
    fy, fx = np.fft.fftfreq(n)[:, None], np.fft.fftfreq(n)[None]
    a = np.real(np.fft.ifft2(F / np.maximum(np.hypot(fx, fy), 1.0 / n)))
    a = (a - a.min()) / np.ptp(a) * 200 + 20
    return np.rint(a + rng.normal(0, 3, a.shape)).clip(0, 255).astype(np.uint8)


@pytest.mark.parametrize("factor,method", [(2, "BILINEAR"), (2, "BICUBIC"), (1.5, "LANCZOS"),
                                           (3, "BICUBIC")])
def test_interpolated_enlargement_is_warned_about(tmp_path, factor, method):
    """An image enlarged by interpolation (Pillow's resize) keeps no power above the
    original grid's Nyquist frequency (sampling theorem): warned; the original with its noise
    is not. JPEG is not judged (its compression removes fine detail too)."""
    base = _one_over_f()
    assert read_micrograph(_save(tmp_path / "orig.png", base), pixel_size=1.0).warnings == []
    n = int(round(base.shape[0] * factor))
    big = Image.fromarray(base).resize((n, n), getattr(Image.Resampling, method))
    mg = read_micrograph(_save(tmp_path / "big.png", np.asarray(big)), pixel_size=1.0)
    assert any("enlarged by interpolation" in w for w in mg.warnings)
