"""Reading micrographs (PNG, TIFF, JPEG) into a grey image and a binary segmentation.

:func:`read_micrograph` returns a :class:`Micrograph`: the grey values as float64 (in the
file's own value scale), the solid mask, the valid pixels (False: transparent, NaN), the
pixel size in nm, the threshold used and notes on every conversion made.

Rules
-----
* Colour (RGB, RGBA, palette) is converted to grey with the ITU-R BT.709 luma weights
  ``0.2126 R + 0.7152 G + 0.0722 B`` applied to the stored values (Recommendation ITU-R
  BT.709-6, item 3.2), or one channel is taken (``channel``). Alpha 0 marks a pixel
  invalid.
* 16-bit, 32-bit and float images keep their values; a numeric threshold is in that
  scale. NaN and infinite pixels are invalid.
* An image holding exactly two values (a bool or already segmented image) needs no
  threshold: the brighter value is solid for ``solid="bright"``.
* ``threshold="otsu"``: Otsu's method (``skimage.filters.threshold_otsu``) on the valid
  pixels; ``solid="bright"`` makes ``grey > t`` solid, ``"dark"`` makes ``grey <= t``
  solid.
* Pixel size: the ``pixel_size`` argument (nm); failing that the file's own: the JSON
  description sheetview writes (``pixel_nm``), a TIFF resolution tag in a length unit
  (inch, cm, or an ImageJ-style ``unit`` of nm, micron or mm) or a PNG pHYs chunk (pixels
  per metre), with square pixels, reported in the notes; a document-like resolution
  (pixels of 10 um or more, as the usual 72-300 dpi defaults give) is not taken as a
  calibration. Otherwise an :class:`OptionError` asks for ``--pixel-size``.
* Files written by sheetview are read as written: the data TIFF of a projection (pages
  intensity, thickness, valid: the intensity read, the solid dark, the valid page marking
  the sample) or of a section (phase codes: solid and interlayer are solid, outside and off
  the grid invalid); a picture (PNG/TIFF with a scale-bar strip) is read above its strip,
  with a warning that it is enlarged (or, for a section, coloured).
* ``crop`` measures a rectangle; ``scale_bar`` finds a burned-in scale bar or information
  strip at the top or bottom edge (:func:`find_scale_bar`) and leaves those rows out, with a
  warning. An image enlarged by pixel replication (:func:`replication`) is warned about;
  an image enlarged by interpolation is not recognised.
* Refused with a message naming the file: missing, unreadable, truncated or corrupt
  files, anything but a regular file (FIFO, device, folder, broken or looping link),
  images whose declared size needs more than the memory budget or (TIFF) more pixels
  than the stored bytes can hold, unknown types, multi-page TIFF (but sheetview's own data
  TIFF), images smaller than 16
  pixels on a side,
  constant images, images with no valid pixel; pixel sizes that are not positive, not
  finite, or absurd for a micrograph (above 1e6 nm or below 1e-3 nm).
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..errors import InputError, OptionError
from .safety import check_input_file, check_read_memory, check_tiff_pages, quiet

#: Suffixes read, by family.
IMAGE_SUFFIXES = {".png": "png", ".tif": "tiff", ".tiff": "tiff", ".jpg": "jpeg",
                  ".jpeg": "jpeg"}
#: ITU-R BT.709 luma weights (R, G, B).
BT709 = (0.2126, 0.7152, 0.0722)
#: Smallest image side accepted (pixels).
MIN_SIDE = 16
#: Accepted pixel sizes (nm).
PIXEL_MIN_NM = 1e-3
PIXEL_MAX_NM = 1e6
#: Resolution tags giving pixels at least this large (nm) are document settings, not a
#: calibration (2540 dpi = 10 um per pixel).
DOCUMENT_PIXEL_NM = 1e4

_NM_PER_UNIT = {"nm": 1.0, "nanometer": 1.0, "nanometers": 1.0, "nanometre": 1.0,
                "nanometres": 1.0, "micron": 1e3, "microns": 1e3, "um": 1e3, "µm": 1e3,
                "\u03bcm": 1e3, "micrometer": 1e3, "micrometre": 1e3, "micrometers": 1e3,
                "micrometres": 1e3, "mm": 1e6, "millimeter": 1e6, "millimetre": 1e6,
                "angstrom": 0.1, "\u00c5": 0.1, "\u212b": 0.1}


@dataclass
class Micrograph:
    """A micrograph read and segmented.

    Attributes
    ----------
    path : the file
    grey : (rows, cols) float64 grey values in the file's own scale (NaN where not finite)
    mask : (rows, cols) bool, True = solid (False on invalid pixels)
    valid : (rows, cols) bool, False = not part of the sample (alpha 0, NaN)
    pixel : pixel edge, nm
    threshold : grey value separating the phases (NaN for a two-valued image read as is)
    threshold_method : "otsu", "value" or "two-valued"
    solid : "bright" or "dark"
    dtype : the stored sample type (e.g. "uint8", "uint16", "float32", "bool")
    notes : what was converted or assumed, in words
    warnings : what may make the numbers misleading (an enlarged image, a scale bar asked
        to be left out but not found), in words
    crop : ``(x0, y0, x1, y1)`` of the region measured, in pixels of the file (x from the
        left, y from the top edge, x1 and y1 excluded)
    """

    path: str
    grey: np.ndarray = field(repr=False)
    mask: np.ndarray = field(repr=False)
    valid: np.ndarray = field(repr=False)
    pixel: float
    threshold: float
    threshold_method: str
    solid: str
    dtype: str
    notes: list = field(default_factory=list)
    warnings: list = field(default_factory=list)
    crop: tuple | None = None

    @property
    def shape(self) -> tuple:
        return tuple(self.grey.shape)

    def to_dict(self) -> dict:
        t = float(self.threshold)
        return {"path": str(self.path), "shape": [int(s) for s in self.shape],
                "pixel_nm": float(self.pixel),
                "field_of_view_nm": [float(self.shape[1] * self.pixel),
                                     float(self.shape[0] * self.pixel)],
                "dtype": self.dtype, "threshold": t if math.isfinite(t) else None,
                "threshold_method": self.threshold_method, "solid": self.solid,
                "n_valid": int(self.valid.sum()), "notes": list(self.notes),
                "warnings": list(self.warnings),
                "crop_px": None if self.crop is None else [int(v) for v in self.crop]}


# ====================================================================== options
def check_pixel_size(value, path=None) -> float:
    """A pixel size in nm: a positive finite number within the accepted range."""
    try:
        p = float(value)
    except (TypeError, ValueError):
        raise OptionError(f"--pixel-size must be a number of nm, not {value!r}", path=path,
                          field="pixel_size") from None
    if not math.isfinite(p) or p <= 0:
        raise OptionError(f"--pixel-size must be a positive number of nm, not {value!r}",
                          path=path, field="pixel_size")
    if p > PIXEL_MAX_NM:
        raise OptionError(f"--pixel-size {p:g} nm is larger than {PIXEL_MAX_NM:g} nm (1 mm) per "
                          "pixel: not a micrograph; give the pixel edge in nanometres",
                          path=path, field="pixel_size")
    if p < PIXEL_MIN_NM:
        raise OptionError(f"--pixel-size {p:g} nm is below {PIXEL_MIN_NM:g} nm (0.01 angstrom): "
                          "give the pixel edge in nanometres", path=path, field="pixel_size")
    return p


def _parse_threshold(threshold, path):
    if isinstance(threshold, str):
        t = threshold.strip().lower()
        if t == "otsu":
            return "otsu"
        try:
            v = float(t)
        except ValueError:
            raise OptionError(f'--threshold must be "otsu" or a grey value, not {threshold!r}',
                              path=path, field="threshold") from None
    else:
        try:
            v = float(threshold)
        except (TypeError, ValueError):
            raise OptionError(f'--threshold must be "otsu" or a grey value, not {threshold!r}',
                              path=path, field="threshold") from None
    if not math.isfinite(v):
        raise OptionError(f"--threshold must be a finite grey value, not {threshold!r}",
                          path=path, field="threshold")
    return v


# ====================================================================== readers
def _read_tiff(path, kind, notes):
    import tifffile

    meta = {}
    try:
        with tifffile.TiffFile(str(path)) as tf:
            n = len(tf.pages)
            page = tf.pages[0]
            own = _own_description(getattr(page, "description", None))
            if n != 1 and not (own and len(own.get("pages", ())) == n):
                raise InputError(f"TIFF holds {n} pages (a stack or series); only single-page "
                                 "images and the data TIFFs sheetview writes are read: save the "
                                 "page to measure as its own file", path=path)
            check_tiff_pages(tf, path, list(tf.pages) if n != 1 else [page])
            _check_image_memory(page.shape, path)
            data = page.asarray()
            if own:
                meta["own"] = own
                names = list(own.get("pages", ()))
                if n > 1 and "valid" in names:
                    vpage = tf.pages[names.index("valid")]
                    if tuple(vpage.shape) == tuple(page.shape):
                        meta["valid"] = np.asarray(vpage.asarray()) != 0
                if n > 1:
                    notes.append(f"sheetview data TIFF of {n} pages ({', '.join(names)}): "
                                 f"page '{names[0]}' read"
                                 + (", page 'valid' marks the pixels of the sample"
                                    if "valid" in meta else ""))
            extra = page.extrasamples if hasattr(page, "extrasamples") else ()
            photometric = int(page.photometric) if page.photometric is not None else None
            planar = int(page.planarconfig) if page.planarconfig is not None else 1
            res = _tiff_resolution(tf, page)
    except InputError:
        raise
    except Exception as e:  # tifffile raises many kinds on bad files
        raise InputError(f"cannot read the TIFF image ({type(e).__name__}: {e}); the file is "
                         "truncated, corrupt or not a TIFF", path=path) from None
    data = np.asarray(data)
    if data.ndim == 3 and planar == 2 and data.shape[0] in (2, 3, 4):
        data = np.moveaxis(data, 0, -1)
    if data.ndim == 3 and data.shape[-1] == 1:
        data = data[..., 0]
    alpha = None
    if data.ndim == 3:
        ns = data.shape[-1]
        has_alpha = bool(len(extra)) or ns in (2, 4)
        if has_alpha:
            alpha = data[..., -1]
            data = data[..., :-1]
            if data.shape[-1] == 1:
                data = data[..., 0]
        if photometric == 5:  # separated (CMYK)
            raise InputError("CMYK TIFF images are not read; save it as RGB or grey",
                             path=path)
    return data, alpha, res, meta


def _own_description(text):
    """The JSON description sheetview writes in its pictures and data TIFFs (a dict with
    ``"software": "sheetview"``), or None."""
    if not text or "sheetview" not in str(text):
        return None
    import json
    try:
        d = json.loads(text)
    except (ValueError, TypeError):
        return None
    return d if isinstance(d, dict) and d.get("software") == "sheetview" else None


#: Peak bytes per sample and per pixel of reading and segmenting a micrograph (the samples
#: as float64, the grey values, masks and Otsu's histogram input).
IMAGE_BYTES_PER_SAMPLE = 24
IMAGE_BYTES_PER_PIXEL = 24


def _check_image_memory(shape, path) -> None:
    """Refuse, before decoding, an image whose declared size needs more than the budget."""
    shape = tuple(int(d) for d in shape)
    need = math.prod(shape) * IMAGE_BYTES_PER_SAMPLE + \
        math.prod(sorted(shape)[-2:]) * IMAGE_BYTES_PER_PIXEL
    check_read_memory(need, f"an image of {' x '.join(str(d) for d in shape)} samples", path)


def _tiff_resolution(tf, page):
    """(pixel_x_nm, pixel_y_nm, how) from the resolution tags, or None."""
    try:
        xr, yr = page.resolution
        unit = int(page.resolutionunit) if page.resolutionunit is not None else 1
    except Exception:
        return None
    if not (xr and yr and xr > 0 and yr > 0):
        return None
    nm_per_unit = {2: 2.54e7, 3: 1e7, 4: 1e6, 5: 1e3}.get(unit)
    how = {2: "inch", 3: "centimetre", 4: "millimetre", 5: "micrometre"}.get(unit)
    if nm_per_unit is None:
        ij = getattr(tf, "imagej_metadata", None) or {}
        u = str(ij.get("unit", "")).strip()
        nm_per_unit = _NM_PER_UNIT.get(u.lower()) or _NM_PER_UNIT.get(u)
        if nm_per_unit is None:
            return None
        how = f"ImageJ unit '{u}'"
    return nm_per_unit / xr, nm_per_unit / yr, how


def _read_pillow(path, kind, notes):
    from PIL import Image, UnidentifiedImageError

    try:
        with Image.open(str(path)) as im:
            n = getattr(im, "n_frames", 1)
            if n != 1:
                raise InputError(f"the image holds {n} frames; only single images are read",
                                 path=path)
            fmt = (im.format or "").upper()
            expected = {"png": "PNG", "jpeg": "JPEG"}[kind]
            if fmt and fmt != expected:
                notes.append(f"the file holds a {fmt} image despite its suffix")
            _check_image_memory((im.size[1], im.size[0], len(im.getbands())), path)
            im.load()
            mode = im.mode
            if mode == "P" or mode == "PA":
                has_t = "transparency" in im.info or mode == "PA"
                im = im.convert("RGBA" if has_t else "RGB")
                notes.append("palette image expanded to its colours")
                mode = im.mode
            elif mode in ("CMYK", "YCbCr", "LAB", "HSV"):
                im = im.convert("RGB")
                notes.append(f"{mode} image converted to RGB by Pillow")
                mode = "RGB"
            elif mode == "RGBa":
                im = im.convert("RGBA")
                mode = "RGBA"
            elif mode == "La":
                im = im.convert("LA")
                mode = "LA"
            data = np.asarray(im)
            meta = {"own": _own_description(im.info.get("Description")),
                    "dpi": im.info.get("dpi")}
    except InputError:
        raise
    except (UnidentifiedImageError, OSError, SyntaxError, ValueError, EOFError,
            Image.DecompressionBombError) as e:
        raise InputError(f"cannot read the {kind.upper()} image ({type(e).__name__}: {e}); the "
                         "file is truncated, corrupt or of another type", path=path) from None
    alpha = None
    if mode in ("RGBA", "LA"):
        alpha = data[..., -1]
        data = data[..., :-1]
        if data.shape[-1] == 1:
            data = data[..., 0]
    if mode == "1":
        data = data.astype(bool)
    res = None
    dpi = meta.get("dpi")
    if kind == "png" and dpi and len(dpi) == 2:
        try:
            dx, dy = float(dpi[0]), float(dpi[1])
        except (TypeError, ValueError):
            dx = dy = 0.0
        if dx > 0 and dy > 0:
            # pHYs holds pixels per metre (PNG specification 11.3.5.3); Pillow gives dpi
            res = (2.54e7 / dx, 2.54e7 / dy, "PNG pHYs chunk (pixels per metre)")
    return data, alpha, res, meta


# ================================================================== main entry
def read_micrograph(path, *, pixel_size=None, threshold="otsu", solid: str | None = None,
                    channel=None, crop=None, scale_bar: str = "auto") -> Micrograph:
    """Read a micrograph and segment it into solid and pore.

    Parameters
    ----------
    path : PNG, TIFF or JPEG file
    pixel_size : pixel edge in nm (required unless the file gives it: TIFF resolution tags,
        a PNG pHYs chunk, or the description sheetview writes)
    threshold : "otsu" or a grey value in the image's own scale
    solid : "bright" (solid brighter than the threshold) or "dark"; None: "bright", or what
        a picture written by sheetview says (a projection shows the solid dark)
    channel : for colour images, one channel (0/1/2 or "r"/"g"/"b") instead of the
        BT.709 luma
    crop : ``(x0, y0, x1, y1)`` in pixels of the file (x from the left, y from the top
        edge, x1 and y1 excluded), or text ``"X0,Y0,X1,Y1"``: measure only this rectangle
    scale_bar : a scale bar or information strip burned into the image
        (:func:`find_scale_bar`): ``"auto"`` looks for one in images of more than two grey
        values not written by sheetview and leaves it out when found (said in the notes and
        the warnings); ``"exclude"`` looks in every image and warns when none is found;
        ``"keep"`` does not look

    Returns
    -------
    Micrograph
    """
    path = Path(path)
    notes: list[str] = []
    if solid not in ("bright", "dark", None):
        raise OptionError(f'--solid must be "bright" or "dark", not {solid!r}', path=path,
                          field="solid")
    box = None if crop is None else parse_crop(crop, path)
    if scale_bar not in ("auto", "exclude", "keep"):
        raise OptionError(f'--scale-bar must be "auto", "exclude" or "keep", not {scale_bar!r}',
                          path=path, field="scale_bar")
    thr = _parse_threshold(threshold, path)
    px = None if pixel_size is None else check_pixel_size(pixel_size, path)
    check_input_file(path, "an image file")
    kind = IMAGE_SUFFIXES.get(path.suffix.lower())
    if kind is None:
        raise InputError(f"unknown image type {path.suffix!r}; expected PNG (.png), TIFF "
                         "(.tif, .tiff) or JPEG (.jpg, .jpeg)", path=path)
    if path.stat().st_size == 0:
        raise InputError("the file is empty", path=path)
    from . import guarded
    reader = _read_tiff if kind == "tiff" else _read_pillow
    data, alpha, res, meta = guarded(reader, path, kind, notes)
    warnings: list[str] = []
    with quiet():
        data, alpha, extra_valid, res, solid, region = _own_file(
            path, data, alpha, res, meta, solid, box, notes, warnings)
        if scale_bar == "auto" and meta.get("own"):
            scale_bar = "keep"  # sheetview's own files hold no bar over the data
        mg = _segment(path, data, alpha, res, px, thr, solid or "bright", channel, notes,
                      extra_valid=extra_valid, scale_bar=scale_bar, warnings=warnings,
                      row0=region[1], lossless=kind in ("png", "tiff"),
                      look_for_enlargement=not isinstance((meta.get("own") or {}).get("picture"),
                                                          dict))
    mg.crop = region
    return mg


def parse_crop(crop, path=None) -> tuple:
    """``(x0, y0, x1, y1)`` of a crop rectangle in pixels from text ``"X0,Y0,X1,Y1"`` or a
    sequence of four whole numbers: columns x0 .. x1 - 1 and rows y0 .. y1 - 1 (x from the
    left, y from the top edge, as image viewers count), x0, y0 at least 0, x1 > x0,
    y1 > y0."""
    vals = crop
    if isinstance(crop, str):
        vals = [t.strip() for t in crop.replace(" ", ",").split(",") if t.strip()]
    try:
        nums = [float(v) for v in vals]
    except (TypeError, ValueError):
        nums = []
    if len(nums) != 4 or any(not math.isfinite(v) or v != int(v) for v in nums):
        raise OptionError(f"--crop: expected X0,Y0,X1,Y1 in whole pixels (x from the left, "
                          f"y from the top edge), got {crop!r}", path=path, field="crop")
    x0, y0, x1, y1 = (int(v) for v in nums)
    if x0 < 0 or y0 < 0 or x1 <= x0 or y1 <= y0:
        raise OptionError(f"--crop: X0 and Y0 must be at least 0, X1 above X0 and Y1 above Y0, "
                          f"got {crop!r}", path=path, field="crop")
    return x0, y0, x1, y1


def _own_file(path, data, alpha, res, meta, solid, box, notes, warnings):
    """What a file written by sheetview says about itself (its JSON description), and the
    crop: returns the samples, alpha and extra valid pixels cut to the region measured, the
    resolution, the solid side and the region ``(x, y, w, h)`` in the file's pixels."""
    own = meta.get("own") or {}
    extra_valid = meta.get("valid")
    data = np.asarray(data)
    rows, cols = data.shape[:2]
    r0, r1 = 0, rows
    pic = own.get("picture") if isinstance(own.get("picture"), dict) else None
    if own:
        px = own.get("pixel_nm")
        if isinstance(px, (int, float)) and math.isfinite(px) and px > 0:
            res = (float(px), float(px), "the description sheetview wrote in the file")
        kind = own.get("kind")
        if solid is None and kind == "projection":
            solid = "dark"
            notes.append("sheetview projection: the solid is dark (transmission "
                         "exp(-t / lambda)); --solid dark taken")
        if kind == "section" and data.dtype.kind in "iu" and data.ndim == 2 and pic is None:
            codes = data
            off = int(own.get("off_grid", 255))
            extra_valid = (codes != off) & (codes != 0) & (
                True if extra_valid is None else extra_valid)
            data = np.isin(codes, (1, 2))
            if solid is None:
                solid = "bright"
            notes.append("sheetview section (phase codes): solid and interlayer read as solid, "
                         "outside the domain and off the grid as not part of the sample")
    if pic is not None:
        dr = pic.get("data_rows") or [0, rows]
        try:
            r0, r1 = max(0, int(dr[0])), min(rows, int(dr[1]))
        except (TypeError, ValueError, IndexError):
            r0, r1 = 0, rows
        k = pic.get("enlargement")
        notes.append(f"sheetview picture: rows {r0} to {r1} hold the image; the strip below "
                     "(scale bar, caption, legend) is left out")
        if own.get("kind") == "section":
            warnings.append("the picture of a section shows the phases in colours, not grey "
                            "levels of a micrograph: measure the _data.tif file written beside "
                            "it (its phase codes are read as solid and pore)")
        elif isinstance(k, (int, float)) and k > 1:
            warnings.append(f"the picture is its data enlarged {k:g} times by pixel replication: "
                            f"its pixels are not independent samples (the data pixel is "
                            f"{pic.get('data_pixel_nm', float('nan')):.4g} nm); measure the "
                            "_data.tif file written beside it instead")
    x0, y0, w, h = 0, r0, cols, r1 - r0
    if box is not None:
        bx0, by0, bx1, by1 = box
        if bx0 >= cols or by0 >= rows:
            raise OptionError(f"--crop: the corner ({bx0}, {by0}) lies outside the image of "
                              f"{cols} x {rows} pixels", path=path, field="crop")
        nx0, ny0 = bx0, max(by0, r0)
        nx1, ny1 = min(bx1, cols), min(by1, r1)
        if nx1 - nx0 < 1 or ny1 - ny0 < 1:
            raise OptionError(f"--crop {bx0},{by0},{bx1},{by1} holds no pixel of the image",
                              path=path, field="crop")
        if (nx0, ny0, nx1, ny1) != tuple(box):
            warnings.append(f"--crop {bx0},{by0},{bx1},{by1} reaches beyond the image"
                            + (" data" if pic is not None else "") + f": cut to "
                            f"{nx0},{ny0},{nx1},{ny1}")
        x0, y0, w, h = nx0, ny0, nx1 - nx0, ny1 - ny0
        notes.append(f"crop: columns {x0} to {x0 + w - 1}, rows {y0} to {y0 + h - 1} "
                     f"({w} x {h} pixels, counted from the top left)")
    if (x0, y0, w, h) != (0, 0, cols, rows):
        sl = (slice(y0, y0 + h), slice(x0, x0 + w))
        data = data[sl]
        alpha = None if alpha is None else np.asarray(alpha)[sl]
        extra_valid = None if extra_valid is None else extra_valid[sl]
    return data, alpha, extra_valid, res, solid, (x0, y0, x0 + w, y0 + h)


def _segment(path, data, alpha, res, px, thr, solid, channel, notes, *, extra_valid=None,
             scale_bar="keep", warnings=None, row0=0,
             look_for_enlargement=True, lossless=True) -> Micrograph:
    """Grey values, valid pixels, pixel size and segmentation of the decoded samples."""
    warnings = [] if warnings is None else warnings
    data = np.asarray(data)
    dtype = str(data.dtype)
    if data.dtype.kind not in "biuf":
        raise InputError(f"unsupported sample type {data.dtype}; expected integer, float or "
                         "bool samples", path=path)
    if data.ndim not in (2, 3) or (data.ndim == 3 and data.shape[-1] not in (2, 3)):
        raise InputError(f"unsupported image layout {data.shape}; expected a grey or RGB(A) "
                         "image", path=path)
    # ---------------------------------------------------------------- grey
    native = None  # the grey values in their stored integer type, when stored values
    if data.ndim == 3:
        nc = data.shape[-1]
        if channel is not None:
            ci = _channel_index(channel, nc, path)
            native = data[..., ci]
            grey = native.astype(np.float64)
            notes.append(f"colour image: channel {'RGB'[ci] if nc == 3 else ci} used as grey")
        elif nc == 3:
            d = data.astype(np.float64)
            if np.array_equal(data[..., 0], data[..., 1]) and np.array_equal(data[..., 1],
                                                                             data[..., 2]):
                native = data[..., 0]
                grey = d[..., 0]
                notes.append("RGB image with three equal channels read as grey")
            else:
                grey = d[..., 0] * BT709[0] + d[..., 1] * BT709[1] + d[..., 2] * BT709[2]
                notes.append("colour image converted to grey with the ITU-R BT.709 luma "
                             "weights 0.2126 R + 0.7152 G + 0.0722 B (on the stored values)")
        else:
            raise InputError(f"unsupported image with {nc} colour samples", path=path)
    else:
        if channel is not None:
            raise OptionError("--channel applies to colour images; this image is grey",
                              path=path, field="channel")
        native = data
        grey = data.astype(np.float64)
    if native is not None and native.dtype.kind not in "iu":
        native = None
    M, L = grey.shape
    if min(M, L) < MIN_SIDE:
        raise InputError(f"image of {L} x {M} pixels is too small: each side must have at "
                         f"least {MIN_SIDE} pixels", path=path)
    valid = np.isfinite(grey)
    n_bad = int(valid.size - valid.sum())
    if n_bad:
        if n_bad == valid.size:
            raise InputError("every pixel is NaN or infinite: nothing to measure", path=path)
        notes.append(f"{n_bad} NaN or infinite pixel(s) marked invalid")
    if alpha is not None:
        a0 = np.asarray(alpha) == 0
        if a0.any():
            valid &= ~a0
            notes.append(f"{int(a0.sum())} fully transparent pixel(s) (alpha 0) marked invalid")
        if not valid.any():
            raise InputError("every pixel is transparent: nothing to measure", path=path)
    if extra_valid is not None:
        valid &= np.asarray(extra_valid, bool)
        if not valid.any():
            raise InputError("no pixel of the image is part of the sample", path=path)
    many = scale_bar == "auto" and not _two_valued(grey[valid])
    if scale_bar == "exclude" or many:
        band = find_scale_bar(np.where(valid, grey, np.nan))
        if band is None and scale_bar == "exclude":
            warnings.append("--scale-bar exclude: no burned-in scale bar or information strip "
                            "found; every pixel is measured")
        elif band is not None:
            r0, r1 = band["rows"]
            valid[r0:r1, :] = False
            warnings.append(f"burned-in {band['what']} found and left out: rows {r0 + row0} "
                            f"to {r1 - 1 + row0} of the file (counted from the top), all "
                            "columns"
                            + ("; --scale-bar keep measures them" if scale_bar == "auto"
                               else ""))
            if not valid.any():
                raise InputError("nothing is left once the scale bar is left out", path=path)
    step = replication(np.where(valid, grey, np.nan)) if look_for_enlargement else 1
    if step > 1:
        warnings.append(f"the image looks enlarged {step} times by pixel replication (every "
                        f"change of value falls on a {step}-pixel grid): its pixels are not "
                        "independent samples and the image holds no detail finer than "
                        f"{step} pixels")
    elif look_for_enlargement and lossless and not _two_valued(grey[valid]):
        ratio = fine_power_ratio(np.where(valid, grey, np.nan))
        if ratio < FINE_POWER_RATIO:
            warnings.append(f"the image holds almost no detail at the scale of its pixels "
                            f"(power near the Nyquist frequency {ratio:.2g} of that at "
                            "0.1-0.2 cycles per pixel): it looks enlarged by interpolation "
                            "or strongly smoothed, so the pixel size overstates its "
                            "resolution and features of a few pixels are not resolved")
    grey = np.where(valid, grey, np.nan)
    # ---------------------------------------------------------- pixel size
    if res is not None:
        rx, ry, how = res
        if px is None:
            src = how if how.startswith(("PNG", "the description")) else \
                f"TIFF resolution tag ({how})"
            if not math.isclose(rx, ry, rel_tol=1e-3):
                raise InputError(f"the file's resolution ({src}) gives pixels of {rx:.6g} x "
                                 f"{ry:.6g} nm (not square); resample to square pixels or give "
                                 "--pixel-size", path=path)
            if rx >= DOCUMENT_PIXEL_NM:
                notes.append(f"{src}: {rx:.6g} nm per pixel looks like a document or screen "
                             "setting, not a microscope calibration; not used")
            else:
                px = check_pixel_size(rx, path)
                notes.append(f"pixel size {px:.6g} nm taken from the file: {src}")
        elif not math.isclose(rx, px, rel_tol=0.01) and rx < DOCUMENT_PIXEL_NM:
            notes.append(f"the file gives {rx:.6g} nm per pixel; --pixel-size {px:g} nm used")
    if px is None:
        raise OptionError("the pixel size is unknown: give it with --pixel-size NM (the edge "
                          "of one pixel in nanometres)", path=path, field="pixel_size")
    # --------------------------------------------------------- segmentation
    vals = grey[valid]
    lo, hi = float(vals.min()), float(vals.max())
    if lo == hi:
        raise InputError(f"the image is constant (every valid pixel is {lo:g}): there is no "
                         "contrast to separate solid from pore", path=path)
    if data.dtype == bool:
        two = True
    else:
        two = _two_valued(vals)
    if thr == "otsu":
        if two:
            t = 0.5 * (lo + hi)
            method = "two-valued"
            notes.append(f"image holds two values ({lo:g} and {hi:g}): read as already "
                         "segmented, no threshold computed")
        else:
            from skimage.filters import threshold_otsu
            # integer images keep their type: one histogram bin per grey level
            src = native[valid] if native is not None else vals
            t = float(threshold_otsu(src))
            method = "otsu"
    else:
        t = float(thr)
        method = "value"
        if not (lo <= t < hi):
            raise OptionError(f"--threshold {t:g} leaves every valid pixel in one phase: the "
                              f"grey values run from {lo:g} to {hi:g}", path=path,
                              field="threshold")
    with np.errstate(invalid="ignore"):
        bright = grey > t
    mask = (bright if solid == "bright" else ~bright) & valid
    if not mask.any() or mask.sum() == valid.sum():
        raise InputError(f"the threshold {t:g} puts every valid pixel in one phase",
                         path=path)
    if method == "two-valued":
        t = float("nan")
    return Micrograph(str(path), grey, mask, valid, px, t, method, solid, dtype, notes,
                      warnings)


def _two_valued(vals) -> bool:
    """Exactly two distinct values (cheap check first on a sample)."""
    s = vals[:: max(1, vals.size // 4096)]
    if np.unique(s).size > 2:
        return False
    return np.unique(vals).size == 2


def _channel_index(channel, nc, path):
    names = {"r": 0, "red": 0, "g": 1, "green": 1, "b": 2, "blue": 2}
    if isinstance(channel, str):
        c = channel.strip().lower()
        if c in names:
            ci = names[c]
        else:
            try:
                ci = int(c)
            except ValueError:
                raise OptionError(f"--channel must be r, g, b or a channel number, not "
                                  f"{channel!r}", path=path, field="channel") from None
    else:
        try:
            ci = int(channel)
        except (TypeError, ValueError):
            raise OptionError(f"--channel must be r, g, b or a channel number, not "
                              f"{channel!r}", path=path, field="channel") from None
    if not 0 <= ci < nc:
        raise OptionError(f"--channel {channel!r}: the image has {nc} colour channels",
                          path=path, field="channel")
    return ci


# ================================================================ burned-in marks
def replication(grey, max_step: int = 64) -> int:
    """The enlargement ``k`` of an image made by pixel replication (each pixel a k x k
    block, as nearest-neighbour resampling by a whole factor makes it), or 1.

    Every change of value between neighbouring rows (and columns) of such an image falls on
    a k-pixel grid, so ``k`` is the greatest common divisor of the distances between
    changes along both axes; at least 8 changes along each axis are needed to say so."""
    a = np.asarray(grey, float)
    if a.ndim != 2 or min(a.shape) < 4:
        return 1
    a = np.where(np.isfinite(a), a, -np.inf)
    steps = []
    for b in (a, a.T):
        change = np.flatnonzero(np.any(b[1:] != b[:-1], axis=1)) + 1
        if change.size < 8:
            return 1
        steps.append(int(np.gcd.reduce(np.diff(change))))
    k = math.gcd(*steps)
    return k if 2 <= k <= max_step else 1


#: Ratio of the spectral power near the Nyquist frequency (0.4-0.5 cycles per pixel) to that
#: at 0.1-0.2 cycles per pixel below which an image is said to hold no detail at the pixel
#: scale (a micrograph with its noise: 0.2-1; enlarged by bilinear, bicubic or Lanczos
#: interpolation by 1.5-3 times: 0.001-0.03; a smooth rendering without noise, 8-bit: 0.06).
FINE_POWER_RATIO = 0.05


def fine_power_ratio(grey) -> float:
    """Mean periodogram power at 0.4-0.5 cycles per pixel over that at 0.1-0.2 cycles per
    pixel, along rows and along columns (Hann window, each line's mean removed, invalid
    pixels at the mean), the larger of the two; NaN for images under 64 pixels a side.

    At most 256 evenly spaced rows (and columns) are used.

    Interpolating an image to a finer grid leaves no power above the Nyquist frequency of
    the original grid (sampling theorem) but the interpolation kernel's leakage, so an
    enlarged image has almost none near its own Nyquist frequency."""
    g = np.asarray(grey, float)
    if g.ndim != 2 or min(g.shape) < 64:
        return float("nan")
    ok = np.isfinite(g)
    if not ok.any():
        return float("nan")
    fill = float(np.mean(g[ok]))
    ratios = []
    for a in (g, g.T):
        # at most 256 evenly spaced lines: enough for a stable mean periodogram, little memory
        a = a[np.unique(np.linspace(0, a.shape[0] - 1, min(a.shape[0], 256)).astype(int))]
        a = np.where(np.isfinite(a), a, fill)
        a = a - a.mean(axis=1, keepdims=True)
        P = (np.abs(np.fft.rfft(a * np.hanning(a.shape[1]), axis=1)) ** 2).mean(axis=0)
        f = np.fft.rfftfreq(a.shape[1])
        lo = float(P[(f >= 0.1) & (f < 0.2)].mean())
        if not lo > 0:
            return float("nan")
        ratios.append(float(P[f >= 0.4].mean()) / lo)
    return max(ratios)


#: Fraction of a row at one extreme grey value that makes it part of an information strip.
STRIP_FILL = 0.6


def find_scale_bar(grey):
    """A scale bar or information strip burned into an image, as the band of rows to leave
    out: ``{"rows": (first, stop), "what": ...}`` (rows from the top), or None.

    * A **scale bar** is a filled rectangle at the image's lowest or highest grey value
      (a connected set filling at least 90 % of its bounding box, at least 2 pixels high,
      4 times as wide as high and at least 8 pixels wide, at most 80 % of the width and
      10 % of the height), lying in the top or bottom 30 % of the rows. Its label is
      followed from the bar away from the image edge: rows holding pixels at either extreme
      value within half a bar length beside the bar, gaps of at most two bar heights, up to
      ten bar heights. The band runs from one bar height beyond the label to the image edge
      (the bar and its label are usually placed against an edge; the caption often beside
      them on the same rows).
    * An **information strip** is a run of rows from the top or bottom edge where at least
      :data:`STRIP_FILL` of each row is one extreme grey value (looked for in images of
      more than two grey values only).

    When both are found at the same edge the band covers both."""
    g = np.asarray(grey, float)
    ok = np.isfinite(g)
    if g.ndim != 2 or not ok.any():
        return None
    M, L = g.shape
    lo, hi = float(np.min(g[ok])), float(np.max(g[ok]))
    if lo == hi:
        return None
    bands = []
    bar = _bar_component(g, lo, hi)
    if bar is not None:
        r0, r1, c0, c1, value = bar
        h = r1 - r0
        w = c1 - c0
        ext = (g == lo) | (g == hi)
        x0, x1 = max(0, c0 - w // 2), min(L, c1 + w // 2)
        bottom = (r0 + r1) / 2 > M / 2
        edge_rows = range(r0 - 1, max(-1, r0 - 1 - 10 * h), -1) if bottom else \
            range(r1, min(M, r1 + 10 * h))
        reach, gap = (r0 if bottom else r1), 0
        for r in edge_rows:
            if ext[r, x0:x1].any():
                reach, gap = r, 0
            else:
                gap += 1
                if gap > max(3, 2 * h):
                    break
        if bottom:
            bands.append(((max(0, reach - h), M), "scale bar and its label"))
        else:
            bands.append(((0, min(M, reach + 1 + h)), "scale bar and its label"))
    if not _two_valued(g[ok]):
        for bottom in (True, False):
            n = _strip_rows(g, lo, hi, bottom)
            if 3 <= n <= 0.3 * M:
                bands.append(((M - n, M) if bottom else (0, n), "information strip"))
    if not bands:
        return None
    bot = [b for b in bands if b[0][1] == M]
    top = [b for b in bands if b[0][0] == 0 and b[0][1] != M]
    pick = bot if len(bot) >= len(top) else top
    first = min(b[0][0] for b in pick)
    stop = max(b[0][1] for b in pick)
    what = " and ".join(sorted({b[1] for b in pick}))
    return {"rows": (int(first), int(stop)), "what": what}


def _bar_component(g, lo, hi):
    """``(row0, row1, col0, col1, value)`` of the widest bar-like component (see
    :func:`find_scale_bar`), or None."""
    from scipy import ndimage

    M, L = g.shape
    best = None
    for value in (hi, lo):
        m = g == value
        if not m.any():
            continue
        lab, n = ndimage.label(m)
        if n == 0:
            continue
        sizes = np.bincount(lab.ravel(), minlength=n + 1)
        for i, sl in enumerate(ndimage.find_objects(lab), start=1):
            if sl is None or sizes[i] < 16:
                continue
            h = sl[0].stop - sl[0].start
            w = sl[1].stop - sl[1].start
            if h < 2 or w < max(8, 4 * h) or w > 0.8 * L or h > 0.1 * M:
                continue
            if sizes[i] < 0.9 * w * h:
                continue
            mid = 0.5 * (sl[0].start + sl[0].stop)
            if 0.3 * M < mid < 0.7 * M:
                continue
            if best is None or w > best[3] - best[2]:
                best = (sl[0].start, sl[0].stop, sl[1].start, sl[1].stop, value)
    return best


def _strip_rows(g, lo, hi, bottom: bool) -> int:
    """Rows from an edge where one extreme value fills at least :data:`STRIP_FILL` of the
    row (the same extreme all along)."""
    M = g.shape[0]
    order = range(M - 1, -1, -1) if bottom else range(M)
    n = 0
    which = None
    for r in order:
        row = g[r]
        f_lo, f_hi = float(np.mean(row == lo)), float(np.mean(row == hi))
        this = "lo" if f_lo >= STRIP_FILL else "hi" if f_hi >= STRIP_FILL else None
        if this is None or (which is not None and this != which):
            break
        which = this
        n += 1
    return n
