"""2D pictures with a scale bar: virtual sections and projections as PNG and TIFF.

A picture is drawn at its own pixel grid (each image pixel one or more screen pixels,
never resampled between neighbours), with a scale bar of a round length in the lower
right corner and its label. Three files per picture:

* ``STEM.png``: the picture with the scale bar (8-bit RGB);
* ``STEM.tif``: the same picture with the scale bar (8-bit RGB TIFF, for slides and
  papers), with the pixel size in the TIFF resolution tags;
* ``STEM_data.tif``: the numbers without a bar (phase codes as uint8 for a section;
  pages of float32 intensity and solid thickness in nm for a projection), with the pixel
  size in the resolution tags and a JSON description of what each page holds.

TIFF resolution tags count pixels per centimetre (unit 3), the finest length unit TIFF
has (TIFF 6.0 specification, Adobe 1992, tags 282, 283, 296).
"""
from __future__ import annotations

import contextlib
import json
import math
from pathlib import Path

import numpy as np

from .errors import OptionError
from .io.output import atomic_path, check_writable

BAR_COLOUR = "#ffffff"
BAR_EDGE = "#1b1b1b"
#: Smallest side (screen pixels) a picture is enlarged to, so that the bar label is legible.
MIN_SIDE = 360


def nice_bar(width_nm: float) -> float:
    """A round bar length (1, 2 or 5 x 10^k nm) of about a fifth of the picture width."""
    target = width_nm / 5.0
    if not target > 0:
        return 1.0
    e = math.floor(math.log10(target))
    best = 10.0 ** e
    for m in (1.0, 2.0, 5.0):
        if m * 10 ** e <= target * 1.01:
            best = m * 10 ** e
    return float(best)


def render(rgb: np.ndarray, pixel: float, *, bar_nm: float | None = None,
           caption: str | None = None, legend=None) -> np.ndarray:
    """The picture ``rgb`` (rows x cols x 3, uint8) enlarged by a whole factor to at least
    :data:`MIN_SIDE` screen pixels on its short side, with a scale bar, an optional
    caption in the lower left and an optional legend (a list of (colour, label)) in the
    upper left. Returns the RGB uint8 array drawn (matplotlib Agg)."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure
    from matplotlib.patches import Rectangle

    rgb = np.asarray(rgb)
    nr, nc = rgb.shape[:2]
    k = max(1, int(math.ceil(MIN_SIDE / max(1, min(nr, nc)))))
    k = min(k, max(1, 4096 // max(nr, nc)))
    H, W = nr * k, nc * k
    dpi = 100
    fig = Figure(figsize=(W / dpi, H / dpi), dpi=dpi)
    FigureCanvasAgg(fig)
    ax = fig.add_axes([0, 0, 1, 1])
    ax.imshow(rgb, interpolation="nearest", resample=False, extent=(0, nc * pixel, 0, nr * pixel),
              aspect="auto")
    ax.set_xlim(0, nc * pixel)
    ax.set_ylim(0, nr * pixel)
    ax.axis("off")
    width = nc * pixel
    bar = nice_bar(width) if bar_nm is None else float(bar_nm)
    fs = max(7.0, min(14.0, 0.045 * min(H, W) * 72 / dpi))
    pad = 0.04 * width
    bh = max(0.012 * nr * pixel, 2.5 * pixel / k, 0.012 * width)
    x1 = nc * pixel - pad
    y0 = 0.05 * nr * pixel
    ax.add_patch(Rectangle((x1 - bar, y0), bar, bh, facecolor=BAR_COLOUR, edgecolor=BAR_EDGE, lw=1.0))
    ax.text(x1 - bar / 2, y0 + bh * 1.6, f"{bar:g} nm", ha="center", va="bottom", fontsize=fs,
            color=BAR_COLOUR, fontweight="bold",
            path_effects=_outline())
    if caption:
        ax.text(pad, y0, caption, ha="left", va="bottom", fontsize=fs * 0.8, color=BAR_COLOUR,
                path_effects=_outline())
    if legend:
        from matplotlib.patches import Patch
        handles = [Patch(facecolor=c, edgecolor=BAR_EDGE, label=lab) for c, lab in legend]
        ax.legend(handles=handles, loc="upper left", fontsize=fs * 0.75, framealpha=0.85,
                  borderpad=0.4, handlelength=1.0)
    fig.canvas.draw()
    img = np.asarray(fig.canvas.buffer_rgba())[..., :3].copy()
    return img


def _outline():
    from matplotlib import patheffects
    return [patheffects.withStroke(linewidth=2.5, foreground=BAR_EDGE)]


def grey_rgb(values: np.ndarray, valid: np.ndarray | None = None, *, lo=None, hi=None,
             background: float = 1.0) -> np.ndarray:
    """Grey RGB uint8 of ``values`` stretched from ``lo`` (black) to ``hi`` (white), by
    default the range over the valid pixels; invalid pixels get ``background`` (0..1)."""
    v = np.asarray(values, float)
    ok = np.ones(v.shape, bool) if valid is None else np.asarray(valid, bool)
    sel = v[ok]
    lo = float(sel.min()) if lo is None and sel.size else (0.0 if lo is None else float(lo))
    hi = float(sel.max()) if hi is None and sel.size else (1.0 if hi is None else float(hi))
    if not hi > lo:
        hi = lo + 1.0
    g = np.clip((v - lo) / (hi - lo), 0.0, 1.0)
    g = np.where(ok, g, background)
    g8 = np.round(255 * g).astype(np.uint8)
    return np.repeat(g8[..., None], 3, axis=2)


def outputs(stem) -> dict:
    """The three file names written for ``stem`` (a suffix .png/.tif is dropped)."""
    p = Path(stem)
    if p.suffix.lower() in (".png", ".tif", ".tiff"):
        p = p.with_suffix("")
    return {"png": p.with_name(p.name + ".png"), "tif": p.with_name(p.name + ".tif"),
            "data": p.with_name(p.name + "_data.tif")}


#: Largest pixels-per-cm a TIFF rational (two uint32) can hold with some precision.
_MAX_PER_CM = 2.0 ** 31


def _resolution(pixel_nm: float) -> dict:
    """TIFF resolution keywords for tifffile (pixels per cm), or none where the pixel is
    too fine for a TIFF rational (the JSON description still gives ``pixel_nm``)."""
    per_cm = 1e7 / pixel_nm
    if not per_cm < _MAX_PER_CM:
        return {}
    return {"resolution": (per_cm, per_cm), "resolutionunit": 3}  # RESUNIT.CENTIMETER


def write_picture(stem, picture: np.ndarray, data_pages: dict, pixel: float, description: dict,
                  *, force: bool = False) -> dict:
    """Write STEM.png, STEM.tif (the picture with its bar) and STEM_data.tif (the pages of
    ``data_pages``, name -> 2D array, in order). All three names are checked before any is
    written; each is written under a temporary name and renamed."""
    import tifffile
    from matplotlib.image import imsave

    files = outputs(stem)
    for p in files.values():
        check_writable(p, force)
    if not (math.isfinite(pixel) and pixel > 0):
        raise OptionError(f"pixel size must be positive, got {pixel!r}")
    desc = dict(description)
    desc.update({"pixel_nm": pixel, "pages": list(data_pages), "software": "sheetview"})
    # the bar is drawn at the enlarged scale: its resolution is that of the drawn picture
    k = picture.shape[1] / max(1, next(iter(data_pages.values())).shape[1])
    # all three are written under temporary names and renamed only when all are complete
    with contextlib.ExitStack() as stack:
        tmps = {key: stack.enter_context(atomic_path(files[key], force)) for key in files}
        imsave(str(tmps["png"]), np.ascontiguousarray(picture), format="png")
        tifffile.imwrite(str(tmps["tif"]), np.ascontiguousarray(picture), photometric="rgb",
                         description=json.dumps({**desc, "pixel_nm": pixel / k,
                                                 "pages": ["picture with scale bar"]}),
                         **_resolution(pixel / k))
        with tifffile.TiffWriter(str(tmps["data"])) as tw:
            for i, (name, arr) in enumerate(data_pages.items()):
                tw.write(np.ascontiguousarray(arr), photometric="minisblack",
                         description=json.dumps(desc) if i == 0 else json.dumps({"page": name}),
                         **_resolution(pixel))
    return files
