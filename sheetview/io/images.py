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
* Pixel size: the ``pixel_size`` argument (nm); failing that a TIFF resolution tag in a
  length unit (inch, cm, or an ImageJ-style ``unit`` of nm, micron or mm) with square
  pixels, reported in the notes; a document-like resolution (pixels of 10 um or more, as
  the usual 72-300 dpi defaults give) is not taken as a calibration. Otherwise an
  :class:`OptionError` asks for ``--pixel-size``.
* Refused with a message naming the file: missing, unreadable, truncated or corrupt
  files, anything but a regular file (FIFO, device, folder, broken or looping link),
  images whose declared size needs more than the memory budget or (TIFF) more pixels
  than the stored bytes can hold, unknown types, multi-page TIFF, images smaller than 16
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
                "n_valid": int(self.valid.sum()), "notes": list(self.notes)}


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

    try:
        with tifffile.TiffFile(str(path)) as tf:
            n = len(tf.pages)
            if n != 1:
                raise InputError(f"TIFF holds {n} pages (a stack or series); only single-page "
                                 "images are read: save the page to measure as its own file",
                                 path=path)
            page = tf.pages[0]
            check_tiff_pages(tf, path, [page])
            _check_image_memory(page.shape, path)
            data = page.asarray()
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
    return data, alpha, res


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
    return data, alpha, None


# ================================================================== main entry
def read_micrograph(path, *, pixel_size=None, threshold="otsu", solid: str = "bright",
                    channel=None) -> Micrograph:
    """Read a micrograph and segment it into solid and pore.

    Parameters
    ----------
    path : PNG, TIFF or JPEG file
    pixel_size : pixel edge in nm (required unless a TIFF resolution tag gives it)
    threshold : "otsu" or a grey value in the image's own scale
    solid : "bright" (solid brighter than the threshold) or "dark"
    channel : for colour images, one channel (0/1/2 or "r"/"g"/"b") instead of the
        BT.709 luma

    Returns
    -------
    Micrograph
    """
    path = Path(path)
    notes: list[str] = []
    if solid not in ("bright", "dark"):
        raise OptionError(f'--solid must be "bright" or "dark", not {solid!r}', path=path,
                          field="solid")
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
    data, alpha, res = guarded(reader, path, kind, notes)
    with quiet():
        return _segment(path, data, alpha, res, px, thr, solid, channel, notes)


def _segment(path, data, alpha, res, px, thr, solid, channel, notes) -> Micrograph:
    """Grey values, valid pixels, pixel size and segmentation of the decoded samples."""
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
    grey = np.where(valid, grey, np.nan)
    # ---------------------------------------------------------- pixel size
    if res is not None:
        rx, ry, how = res
        if px is None:
            if not math.isclose(rx, ry, rel_tol=1e-3):
                raise InputError(f"the TIFF resolution tags give pixels of {rx:.6g} x {ry:.6g} nm "
                                 "(not square); resample to square pixels or give "
                                 "--pixel-size", path=path)
            if rx >= DOCUMENT_PIXEL_NM:
                notes.append(f"TIFF resolution tag ({rx:.6g} nm per pixel, in {how}) looks like "
                             "a document or screen setting, not a microscope calibration; "
                             "not used")
            else:
                px = check_pixel_size(rx, path)
                notes.append(f"pixel size {px:.6g} nm taken from the TIFF resolution tag "
                             f"({how})")
        elif not math.isclose(rx, px, rel_tol=0.01) and rx < DOCUMENT_PIXEL_NM:
            notes.append(f"the TIFF resolution tag gives {rx:.6g} nm per pixel; "
                         f"--pixel-size {px:g} nm used")
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
    return Micrograph(str(path), grey, mask, valid, px, t, method, solid, dtype, notes)


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
