"""2D pictures with a scale bar: virtual sections and projections as PNG and TIFF.

A picture is drawn at its own pixel grid (each image pixel one or more screen pixels,
never resampled between neighbours); below it a white strip holds a scale bar of a round
length (lower right), its label, a caption and the legend, so that nothing covers the
data. Three files per picture:

* ``STEM.png``: the picture with the scale bar (8-bit RGB), with its screen pixel size in
  the pHYs chunk and a JSON ``Description`` (which rows hold the data, the enlargement);
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
    """The picture ``rgb`` (rows x cols x 3, uint8) enlarged by a whole factor ``k`` to at
    least :data:`MIN_SIDE` screen pixels on its short side (each image pixel a k x k block,
    never interpolated), above a white strip holding a scale bar of a round length (lower
    right), an optional caption (lower left) and an optional legend (a list of (colour,
    label)). Nothing is drawn over the data: rows ``0 .. rows * k`` of the result are the
    picture itself (:func:`layout` gives the numbers). Returns the RGB uint8 array drawn
    (matplotlib Agg)."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure
    from matplotlib.patches import Patch, Rectangle

    rgb = np.asarray(rgb)
    nr, nc = rgb.shape[:2]
    lay = layout(nr, nc, n_legend=len(legend or ()))
    k, W, H, S = lay["k"], lay["width"], lay["data_rows"], lay["strip"]
    dpi = 100
    fig = Figure(figsize=(W / dpi, (H + S) / dpi), dpi=dpi)
    FigureCanvasAgg(fig)
    ax = fig.add_axes([0, S / (H + S), 1, H / (H + S)])
    big = np.repeat(np.repeat(rgb, k, axis=0), k, axis=1)
    ax.imshow(big, interpolation="nearest", resample=False, extent=(0, W, H, 0), aspect="auto")
    ax.set_xlim(0, W)
    ax.set_ylim(H, 0)
    ax.axis("off")
    st = fig.add_axes([0, 0, 1, S / (H + S)])
    st.set_xlim(0, W)
    st.set_ylim(0, S)
    st.axis("off")
    fs = lay["font_pt"]
    lh = lay["line_px"]
    px_screen = pixel / k  # nm per screen pixel
    width = nc * pixel
    bar = nice_bar(width) if bar_nm is None else float(bar_nm)
    bar_px = bar / px_screen
    pad = max(6.0, 0.03 * W)
    top = S - 0.35 * lh  # baseline region of the first line
    bh = max(3.0, 0.28 * lh)
    x1 = W - pad
    st.add_patch(Rectangle((x1 - bar_px, top - 0.95 * lh), bar_px, bh, facecolor=BAR_EDGE,
                           edgecolor=BAR_EDGE, lw=0))
    st.text(x1 - bar_px / 2, top - 0.95 * lh + bh + 2, f"{bar:g} nm", ha="center",
            va="bottom", fontsize=fs, color=BAR_EDGE, fontweight="bold")
    if caption:
        st.text(pad, top - 0.95 * lh, caption, ha="left", va="bottom", fontsize=fs * 0.85,
                color=BAR_EDGE)
    if legend:
        handles = [Patch(facecolor=c, edgecolor=BAR_EDGE, label=lab) for c, lab in legend]
        st.legend(handles=handles, loc="lower left", bbox_to_anchor=(0, 0), fontsize=fs * 0.8,
                  frameon=False, ncol=lay["legend_cols"], handlelength=1.0, borderaxespad=0.3,
                  columnspacing=1.2)
    fig.canvas.draw()
    img = np.asarray(fig.canvas.buffer_rgba())[..., :3].copy()
    return img


def layout(rows: int, cols: int, n_legend: int = 0) -> dict:
    """The geometry of a picture drawn by :func:`render` for an image of ``rows`` x
    ``cols`` pixels: ``k`` (enlargement), ``width``, ``data_rows`` (screen rows of the
    picture, from the top), ``strip`` (screen rows of the strip below it), the font size
    and line height, the legend's columns."""
    k = max(1, int(math.ceil(MIN_SIDE / max(1, min(rows, cols)))))
    k = min(k, max(1, 4096 // max(rows, cols)))
    W, H = cols * k, rows * k
    fs = max(7.0, min(13.0, 0.032 * W * 72 / 100))
    lh = fs * 100 / 72 * 1.5
    ncol = max(1, min(n_legend, int(W // (9 * fs * 100 / 72)) or 1))
    lines = 2 + (math.ceil(n_legend / ncol) if n_legend else 0)
    S = int(math.ceil(lines * lh + 0.4 * lh))
    return {"k": k, "width": W, "data_rows": H, "strip": S, "font_pt": fs, "line_px": lh,
            "legend_cols": ncol}


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


def _png_dpi(pixel_nm: float) -> dict:
    """Pillow's ``dpi`` keyword for a PNG pHYs chunk (pixels per metre, an unsigned 32-bit
    number: PNG specification, 11.3.5.3), or none where the pixel is too fine for it."""
    per_m = 1e9 / pixel_nm
    if not per_m < 2.0 ** 32 - 1:
        return {}
    return {"dpi": (per_m * 0.0254, per_m * 0.0254)}


def write_picture(stem, picture: np.ndarray, data_pages: dict, pixel: float, description: dict,
                  *, force: bool = False) -> dict:
    """Write STEM.png, STEM.tif (the picture with its bar) and STEM_data.tif (the pages of
    ``data_pages``, name -> 2D array, in order). All three names are checked before any is
    written; each is written under a temporary name and renamed.

    The pictures carry their screen pixel size (PNG pHYs chunk, TIFF resolution tags) and a
    JSON description (PNG ``Description`` text chunk, TIFF ImageDescription) that also says
    which rows hold the data (``picture.data_rows``) and the enlargement ``k``, so that
    :func:`sheetview.io.images.read_micrograph` reads the data rows at the right scale."""
    import tifffile
    from PIL import Image
    from PIL.PngImagePlugin import PngInfo

    files = outputs(stem)
    for p in files.values():
        check_writable(p, force)
    if not (math.isfinite(pixel) and pixel > 0):
        raise OptionError(f"pixel size must be positive, got {pixel!r}")
    desc = dict(description)
    desc.update({"pixel_nm": pixel, "pages": list(data_pages), "software": "sheetview"})
    first = next(iter(data_pages.values()))
    # the picture is drawn at the enlarged scale: its resolution is that of the drawn picture
    k = picture.shape[1] / max(1, first.shape[1])
    shown = {**desc, "pixel_nm": pixel / k, "pages": ["picture with scale bar"],
             "picture": {"enlargement": k, "data_pixel_nm": pixel,
                         "data_rows": [0, int(round(first.shape[0] * k))],
                         "below": "scale bar, caption and legend on a white strip"}}
    # all three are written under temporary names and renamed only when all are complete
    with contextlib.ExitStack() as stack:
        tmps = {key: stack.enter_context(atomic_path(files[key], force)) for key in files}
        info = PngInfo()
        info.add_itxt("Description", json.dumps(shown))
        Image.fromarray(np.ascontiguousarray(picture)).save(
            str(tmps["png"]), format="PNG", pnginfo=info, **_png_dpi(pixel / k))
        tifffile.imwrite(str(tmps["tif"]), np.ascontiguousarray(picture), photometric="rgb",
                         description=json.dumps(shown), **_resolution(pixel / k))
        with tifffile.TiffWriter(str(tmps["data"])) as tw:
            for i, (name, arr) in enumerate(data_pages.items()):
                tw.write(np.ascontiguousarray(arr), photometric="minisblack",
                         description=json.dumps(desc) if i == 0 else json.dumps({"page": name}),
                         **_resolution(pixel))
    return files
