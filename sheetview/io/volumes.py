"""Voxel volumes: multi-page TIFF, NumPy ``.npy``, headerless raw and VTK ``.vti``.

A volume becomes a :class:`~sheetview.grid.PhaseGrid` indexed ``labels[i, j, k]`` =
x, y, z. File values are turned into phase codes (outside 0, solid 1, interlayer 2,
gel pore 3).

Axis order
----------
* TIFF: each page is one z slice, rows are y and columns x; tifffile gives
  ``(z, y, x)``, which is transposed to ``(x, y, z)``.
* NPY: the array is taken as ``[i, j, k]`` = x, y, z (the order sheetview writes).
* raw: ``shape = (nx, ny, nz)``; the voxels are stored with x varying fastest, then y,
  then z (C order of ``(nz, ny, nx)``, the usual layout of tomography exports).
* VTI: VTK's own order (x fastest); cell scalars are voxels, or point scalars are
  voxels centred on the points (the grid corner then lies half a voxel before the
  first point).

Voxel size
----------
``voxel_size`` (nm; one number or three) wins. Else the file's own: VTI spacing,
the TIFF description's sheetview marker; else the widely used description keys ``unit``
(the length unit of the resolution tags) and ``spacing`` (the z voxel edge) with the X/Y
resolution tags, or TIFF resolution tags in inch or cm with a description ``spacing`` for
z. Lengths in a file without a unit
(VTI) are nm unless ``units`` says otherwise; ``units`` also overrides a unit the file
states. A file that gives no voxel size is refused with a request for ``voxel_size``
(``--volume-voxel`` on the command line).

Phases
------
``phases`` maps file values to phase names (``outside``, ``solid``, ``interlayer``,
``gel``/``pore``/``void``). Without it: a file written by :func:`write_volume` (it
carries a ``sheetview`` marker) is read as is; a volume whose values are exactly
{0, 1} is read as 0 = gel pore, 1 = solid; anything else is refused with the values
found and a request for ``--phases``.

Damaged files
-------------
The declared size of the volume must fit the file (NPY header against the data that
follows, TIFF strips inside the file and within their compression's expansion, a TIFF
description's
stacks with all their images, VTI extent; :mod:`sheetview.io.vtkfiles`) and the memory
budget, before anything is allocated; voxel size and origin must be finite numbers (the
voxel size positive) whatever gives them; VTK parses ``.vti`` in a child process.

Writers (:func:`write_volume`)
------------------------------
``.vti`` (ImageData, cell data ``phase``, spacing and origin, field data ``sheetview``),
``.npy`` (uint8 ``[i, j, k]``; the marker with spacing and origin sits in a comment of
the NPY header, which NumPy ignores) and ``.tif``/``.tiff`` (one page per z slice,
standard resolution tags in pixels per centimetre for x and y, the page description a JSON
object: sheetview's marker with the spacing of all three axes; one page
per z slice, ``unit=nm``, ``spacing`` = z voxel size, X/Y resolution). All three read
back exactly (labels, spacing, origin, and the grid's metadata; in NPY only while the
header stays short). ``PhaseGrid.solid_fraction`` (float32, when
present) travels in ``.vti`` only, as a second cell array ``solid_fraction`` named by the
marker, and reads back bit for bit; NPY and TIFF hold the labels only (one array per file,
and no second-file convention).
"""
from __future__ import annotations

import json
import math
import re
from pathlib import Path

import numpy as np

from ..domain import MAX_LENGTH_NM
from ..errors import InputError, MemoryLimitError, OptionError
from ..grid import PHASE_ALIASES, PHASE_NAMES, PhaseGrid
from .output import atomic_path, json_default
from .prisms import unit_factor
from .safety import (MEMORY_FRACTION, check_tiff_pages, finite_number, fmt, gib, json_type,
                     load_json, read_npy_header)

MARKER = "sheetview phase codes v1"
#: Name of the VTI cell array holding ``PhaseGrid.solid_fraction``.
FRACTION_ARRAY = "solid_fraction"
#: Largest image data written as a classic (32-bit offset) TIFF; beyond it a
#: BigTIFF with the same metadata in its JSON description.
IMAGEJ_TIFF_LIMIT = 2**32 - 2**25

#: Length units found in image metadata, as factors to nm.
IMAGE_UNITS = {
    "nm": 1.0, "nanometer": 1.0, "nanometre": 1.0, "nanometers": 1.0, "nanometres": 1.0,
    "a": 0.1, "angstrom": 0.1, "\u00c5": 0.1, "\u212b": 0.1,
    "um": 1e3, "\u00b5m": 1e3, "\u03bcm": 1e3, "micron": 1e3, "microns": 1e3,
    "micrometer": 1e3, "micrometre": 1e3, "\\u00b5m": 1e3,
    "mm": 1e6, "millimeter": 1e6, "millimetre": 1e6,
    "cm": 1e7, "centimeter": 1e7, "centimetre": 1e7,
    "m": 1e9, "meter": 1e9, "metre": 1e9,
    "inch": 2.54e7, "in": 2.54e7,
}


# ----------------------------------------------------------------------------- memory
def available_memory() -> int:
    """Bytes of memory available now (:func:`sheetview.grid.available_memory`)."""
    from ..grid import available_memory as avail
    return avail()


def memory_budget() -> int:
    """Bytes a volume may take when read: :data:`MEMORY_FRACTION` of the available memory
    (:func:`sheetview.io.safety.memory_budget`)."""
    from . import safety
    return safety.memory_budget()


def _check_memory(shape, itemsize, path):
    n = math.prod(int(s) for s in shape)
    # the file's array, the uint8 labels and one working copy of the labels
    need = n * int(itemsize) + 2 * n
    budget = memory_budget()
    if need > budget:
        raise MemoryLimitError(
            f"volume of {' x '.join(str(s) for s in shape)} voxels ({_gib(n * itemsize)} in the "
            f"file's {itemsize}-byte values) needs about {_gib(need)} to read, more than the "
            f"{_gib(budget)} allowed ({int(MEMORY_FRACTION * 100)}% of the available memory); "
            f"crop or downsample the volume first", path=path)


def _gib(n) -> str:
    return gib(n)


# ----------------------------------------------------------------------------- reading
def read_volume(path, *, voxel_size=None, phases=None, shape=None, dtype=None, units=None,
                byte_order=None) -> PhaseGrid:
    """Read a voxel volume as a :class:`PhaseGrid`.

    Parameters
    ----------
    path : str or Path
        ``.tif``/``.tiff`` (3D stack), ``.npy``, ``.raw`` or ``.vti``.
    voxel_size : float or 3 floats, optional
        Voxel edge(s) in nm; required where the file gives none.
    phases : dict, optional
        File value -> phase name (``outside``, ``solid``, ``interlayer``, ``gel``,
        ``pore``, ``void``) or phase code.
    shape : (nx, ny, nz), optional
        Raw files only (required there).
    dtype : str or numpy dtype, optional
        Raw files only (required there), e.g. ``uint8``, ``<u2``, ``float32``.
    units : str, optional
        Length unit of lengths stored in the file (nm, A, um).
    byte_order : {"<", ">", "little", "big", "="}, optional
        Raw files only: byte order of multi-byte values (default: native, or as in dtype).

    Returns
    -------
    PhaseGrid

    Raises
    ------
    InputError, OptionError, MemoryLimitError
    """
    path = Path(path)
    suffix = path.suffix.lower()
    vs = _check_voxel_size(voxel_size, path)
    if suffix != ".raw":
        extra = [n for n, v in (("--shape", shape), ("--dtype", dtype), ("--byte-order", byte_order))
                 if v is not None]
        if extra:
            raise OptionError(f"{', '.join(extra)} apply to raw files only", path=path)
    ufac = unit_factor(units, path=path) if units is not None else None
    if suffix in (".tif", ".tiff"):
        arr, info = _load_tiff(path, ufac)
    elif suffix == ".npy":
        arr, info = _load_npy(path)
    elif suffix == ".raw":
        arr, info = _load_raw(path, shape, dtype, byte_order)
    elif suffix == ".vti":
        arr, info = _load_vti(path, ufac)
    else:
        raise InputError(f"not a volume file suffix {suffix!r}", path=path)

    if arr.ndim != 3 or min(arr.shape) == 0:
        raise InputError(f"holds an empty volume of shape {arr.shape}", path=path)
    marker = info.get("marker")
    if vs is not None:
        spacing = vs
    elif marker is not None and "spacing" in marker:  # nm by definition
        spacing = _triple(marker["spacing"], "spacing", path, positive=True, where="marker")
    elif info.get("spacing") is not None:
        spacing = _triple(info["spacing"], "voxel size", path, positive=True)
    else:
        why = info.get("no_spacing_reason", "the file gives no voxel size")
        raise InputError(f"{why}; give it with <<voxel_size>> (nm)", path=path, param="voxel_size")
    if marker is not None and "origin" in marker:
        origin = _triple(marker["origin"], "origin", path, positive=False, where="marker")
    else:
        origin = _triple(info.get("origin", (0.0, 0.0, 0.0)), "origin", path, positive=False)
    names = dict(PHASE_NAMES)
    if marker is not None and isinstance(marker.get("names"), dict):
        try:
            names = {int(k): str(v) for k, v in marker["names"].items()}
            if any(not 0 <= k <= 255 for k in names):
                raise ValueError
        except (TypeError, ValueError, OverflowError):
            names = dict(PHASE_NAMES)
    if marker is not None and not isinstance(marker.get("periodic", False), bool):
        raise InputError(f"sheetview marker: \"periodic\" must be true or false, got "
                         f"{json_type(marker['periodic'])}", path=path, field="periodic")
    labels = map_phases(arr, phases, marker is not None, path, names)
    meta = {}
    if marker is not None and isinstance(marker.get("metadata"), dict):
        meta.update(marker["metadata"])
    meta["source_format"] = suffix.lstrip(".")
    periodic = marker.get("periodic", False) if marker is not None else False
    fraction = info.get("solid_fraction")
    try:
        return PhaseGrid(labels, spacing, origin, names, periodic, meta, str(path),
                         solid_fraction=fraction)
    except ValueError as e:
        raise InputError(f"bad voxel geometry: {e}", path=path) from None


def _triple(value, what, path, *, positive, where=None):
    """Three finite numbers of nm (positive for a spacing), each within
    :data:`~sheetview.domain.MAX_LENGTH_NM`; else an :class:`InputError` naming the file."""
    src = "sheetview marker" if where == "marker" else "the file's"
    vals = None
    if isinstance(value, (list, tuple, np.ndarray)) and len(value) == 3:
        vals = [finite_number(v) for v in value]
    if vals is None or any(v is None for v in vals) or \
            any(abs(v) > MAX_LENGTH_NM for v in vals) or (positive and any(v <= 0 for v in vals)):
        kind = "positive finite numbers" if positive else "finite numbers"
        shown = json.dumps(value, default=str)[:80] if not isinstance(value, np.ndarray) \
            else str(value.tolist())[:80]
        raise InputError(f"{src} {what} must be three {kind} of nm (at most {MAX_LENGTH_NM:g}), "
                         f"got {shown}", path=path, field=what)
    return tuple(vals)


def _check_voxel_size(voxel_size, path):
    if voxel_size is None:
        return None
    vs = np.atleast_1d(np.asarray(voxel_size, dtype=float))
    if vs.shape == (1,):
        vs = np.repeat(vs, 3)
    if vs.shape != (3,) or not np.all(np.isfinite(vs)) or np.any(vs <= 0):
        raise OptionError(f"<<voxel_size>> must be one or three positive numbers of nm, got "
                          f"{voxel_size!r}", path=path, param="voxel_size")
    return tuple(float(v) for v in vs)


def _distinct_values(arr: np.ndarray) -> np.ndarray:
    """Sorted distinct values, by counting for small integer types."""
    if arr.dtype == np.bool_:
        arr = arr.view(np.uint8)
    if arr.dtype.kind in "ui" and arr.dtype.itemsize <= 2:
        off = int(np.iinfo(arr.dtype).min)
        counts = np.bincount((arr.ravel().astype(np.int64) - off) if off else arr.ravel(),
                             minlength=1)
        return (np.flatnonzero(counts) + off).astype(arr.dtype)
    return np.unique(arr)


def _fmt_values(values, limit=10) -> str:
    shown = ", ".join(_fmt_number(v) for v in values[:limit])
    more = f" and {len(values) - limit} more" if len(values) > limit else ""
    return f"{shown}{more}"


def _fmt_number(v) -> str:
    v = v.item() if hasattr(v, "item") else v
    if isinstance(v, float) and v.is_integer():
        return str(int(v))
    return str(v)


def _phase_code(name, path):
    if isinstance(name, (int, np.integer)) and not isinstance(name, bool):
        if 0 <= int(name) <= 255:
            return int(name)
    elif isinstance(name, str) and name.strip().lower() in PHASE_ALIASES:
        return PHASE_ALIASES[name.strip().lower()]
    raise OptionError(f"--phases: unknown phase {name!r}; use one of "
                      f"{', '.join(sorted(PHASE_ALIASES))}", path=path, field="phases")


def map_phases(arr: np.ndarray, phases, marked: bool, path, names=None) -> np.ndarray:
    """Turn file values into phase codes (uint8), following the rules in the module text."""
    values = _distinct_values(arr)
    if phases is not None:
        if not isinstance(phases, dict) or not phases:
            raise OptionError("--phases must map file values to phase names, e.g. "
                              "0=gel,1=solid", path=path, field="phases")
        keys = []
        codes = []
        for k, v in phases.items():
            try:
                kf = float(k)
            except (TypeError, ValueError):
                raise OptionError(f"--phases: file value {k!r} is not a number", path=path,
                                  field="phases") from None
            keys.append(kf)
            codes.append(_phase_code(v, path))
        keys = np.asarray(keys)
        codes = np.asarray(codes, dtype=np.uint8)
        order = np.argsort(keys)
        keys, codes = keys[order], codes[order]
        if len(np.unique(keys)) != len(keys):
            raise OptionError("--phases names a file value twice", path=path, field="phases")
        vf = values.astype(np.float64)
        pos = np.clip(np.searchsorted(keys, vf), 0, len(keys) - 1)
        covered = keys[pos] == vf
        if not covered.all():
            missing = values[~covered]
            raise InputError(f"value(s) {_fmt_values(missing)} found in the volume are not "
                             f"mapped by --phases (mapped: {_fmt_values(keys)}); add them, "
                             f"e.g. --phases ...,{_fmt_number(missing[0])}=gel", path=path)
        return _apply_lut(arr, values, codes[pos])
    if marked:
        known = set((names or PHASE_NAMES).keys())
        ok = (values.astype(np.float64) == np.round(values.astype(np.float64))) & \
             np.isin(values.astype(np.float64), list(known))
        if not ok.all():
            raise InputError(f"written as sheetview phase codes but holds value(s) "
                             f"{_fmt_values(values[~ok])} that are no phase code "
                             f"({sorted(known)})", path=path)
        return arr.astype(np.uint8, copy=False) if arr.dtype != np.uint8 else arr
    vf = values.astype(np.float64)
    if len(vf) == 2 and vf[0] == 0 and vf[1] == 1:
        return _apply_lut(arr, values, np.array([PHASE_ALIASES["gel"], PHASE_ALIASES["solid"]],
                                                dtype=np.uint8))
    raise InputError(f"holds {len(values)} distinct value(s) ({_fmt_values(values)}) and no "
                     f"phase mapping; pass --phases VALUE=PHASE,... (phases: outside, solid, "
                     f"interlayer, gel/pore/void), e.g. --phases "
                     f"{_fmt_number(values[0])}=gel,{_fmt_number(values[-1])}=solid", path=path)


def _apply_lut(arr, values, codes) -> np.ndarray:
    """Map each distinct ``values[m]`` to ``codes[m]`` over ``arr``."""
    if arr.dtype == np.bool_:
        arr = arr.view(np.uint8)
    if arr.dtype.kind in "ui" and arr.dtype.itemsize <= 2:
        lo = int(values[0])
        lut = np.zeros(int(values[-1]) - lo + 1, dtype=np.uint8)
        lut[values.astype(np.int64) - lo] = codes
        idx = arr if lo == 0 and arr.dtype.kind == "u" else (arr.astype(np.int64) - lo)
        return lut[idx]
    out = np.empty(arr.shape, dtype=np.uint8)
    flat = arr.reshape(-1)
    step = 1 << 24
    o = out.reshape(-1)
    for s in range(0, flat.size, step):  # bounded temporaries on huge volumes
        o[s:s + step] = codes[np.searchsorted(values, flat[s:s + step])]
    return out


# TIFF ---------------------------------------------------------------------------------
def _load_tiff(path: Path, ufac):
    import tifffile

    try:
        tif = tifffile.TiffFile(str(path))
    except Exception as e:  # noqa: BLE001 - tifffile raises many kinds on bad files
        raise InputError(f"cannot be read as TIFF: {_short(e)}", path=path) from None
    with tif:
        try:
            n_pages = len(tif.pages)
            series = tif.series[0]
            shape = tuple(series.shape)
            axes = series.axes
            dtype = np.dtype(series.dtype)
        except Exception as e:  # noqa: BLE001
            raise InputError(f"cannot be read as TIFF: {_short(e)}", path=path) from None
        check_tiff_pages(tif, path)
        nbytes = math.prod(int(d) for d in shape) * dtype.itemsize
        offset = getattr(series, "dataoffset", None)
        if offset is not None and offset + nbytes > path.stat().st_size:
            raise InputError(f"declares a {' x '.join(map(str, shape))} stack ({nbytes:,} bytes "
                             f"of contiguous data from byte {offset:,}) that runs beyond the end "
                             f"of the file ({path.stat().st_size:,} bytes): truncated", path=path)
        ij = tif.imagej_metadata if tif.is_imagej else None
        declared = ij.get("images") if isinstance(ij, dict) else None
        if isinstance(declared, int) and declared > 1 and \
                math.prod(int(d) for d in shape[:-2]) < declared:
            raise InputError(f"its description declares {declared} images but only "
                             f"{math.prod(int(d) for d in shape[:-2])} can be read: a truncated "
                             f"or damaged stack", path=path)
        if "S" in axes and shape[axes.index("S")] > 1:
            raise InputError(f"is a colour (RGB) image stack of shape {shape} (axes {axes}); "
                             f"expected a 3D grey-level stack, one page per z slice", path=path)
        keep = [i for i, s in enumerate(shape) if s != 1 or axes[i] in "XY"]
        if len(shape) > 3 and len([i for i in keep]) <= 3:
            squeeze = True
        else:
            squeeze = False
        eff = tuple(shape[i] for i in keep) if squeeze else shape
        if len(eff) != 3:
            kind = "a single 2D image" if len(eff) == 2 else f"a {len(eff)}D image"
            more = " (if it should hold more pages, it is truncated)" if len(eff) == 2 else ""
            raise InputError(f"holds {kind} of shape {shape} (axes {axes}, {n_pages} page(s)); "
                             f"expected a 3D stack (one page per z slice, shape z, y, x){more}",
                             path=path)
        if dtype.kind not in "biuf":
            raise InputError(f"holds {dtype} values; expected integer or real voxel values",
                             path=path)
        _check_memory(eff, dtype.itemsize, path)
        try:
            data = series.asarray()
        except Exception as e:  # noqa: BLE001
            raise InputError(f"cannot read the image data: {_short(e)}", path=path) from None
        info = _tiff_geometry(tif, ufac)
    data = data.reshape(eff)
    arr = np.ascontiguousarray(data.transpose(2, 1, 0))  # (z, y, x) -> [i, j, k] = x, y, z
    return arr, info


def _json_description(page):
    """The first page's description as a JSON object, or None."""
    try:
        text = page.description
    except Exception:  # noqa: BLE001 - a damaged tag
        return None
    if not isinstance(text, str) or not text.lstrip().startswith("{"):
        return None
    try:
        d = load_json(text, what="the TIFF description")
    except (InputError, ValueError, TypeError):
        return None
    return d if isinstance(d, dict) else None


def _tiff_geometry(tif, ufac) -> dict:
    info: dict = {}
    ij = tif.imagej_metadata if tif.is_imagej else None
    shaped = None
    try:
        sm = tif.shaped_metadata
        shaped = sm[0] if sm else None
    except Exception:
        shaped = None
    own = _json_description(tif.pages[0])
    if isinstance(own, dict) and own.get("format") == MARKER:
        info["marker"] = own
    for md in (ij, shaped):
        if "marker" not in info and isinstance(md, dict) and "sheetview" in md:
            try:
                mk = md["sheetview"]
                mk = load_json(mk) if isinstance(mk, str) else mk
                if isinstance(mk, dict) and mk.get("format") == MARKER:
                    info["marker"] = mk
            except (TypeError, ValueError, InputError):
                pass
    page = tif.pages[0]
    tags = page.tags
    xres = tags["XResolution"].value if "XResolution" in tags else None
    yres = tags["YResolution"].value if "YResolution" in tags else None
    try:
        res_unit = int(tags["ResolutionUnit"].value) if "ResolutionUnit" in tags else 1
    except (TypeError, ValueError, OverflowError):
        res_unit = 1  # a damaged tag: no unit
    unit_f = ufac
    if unit_f is None and ij and isinstance(ij.get("unit"), str):
        unit_f = IMAGE_UNITS.get(ij["unit"].strip().lower()) or IMAGE_UNITS.get(ij["unit"].strip())
    if unit_f is None and res_unit in (2, 3):
        unit_f = 2.54e7 if res_unit == 2 else 1e7
    if unit_f is None:
        info["no_spacing_reason"] = ("the TIFF gives no length unit for its pixels (no 'unit' "
                                     "in its description, resolution unit 'none')")
        return info

    def per_pixel(res):
        """Pixel edge from a resolution tag (pixels per unit, a rational), None when absent
        or damaged."""
        try:
            num, den = res if isinstance(res, tuple) else (res, 1)
            v = float(den) / float(num)
        except (TypeError, ValueError, ZeroDivisionError, OverflowError):
            return None
        return v if math.isfinite(v) and v > 0 else None

    dx, dy = per_pixel(xres), per_pixel(yres)
    dz = ij.get("spacing") if ij else None
    try:
        dz = float(dz) if dz is not None else None
    except (TypeError, ValueError):
        dz = None
    if dx is None or dy is None or dz is None or not all(d > 0 for d in (dx, dy, dz)):
        info["no_spacing_reason"] = ("the TIFF does not give all three voxel edges (x and y "
                                     "resolution and a z 'spacing' in its description)")
        return info
    info["spacing"] = (dx * unit_f, dy * unit_f, dz * unit_f)
    return info


# NPY ----------------------------------------------------------------------------------
def _load_npy(path: Path):
    size = path.stat().st_size
    try:
        with open(path, "rb") as fh:
            shape, fortran, dtype = read_npy_header(fh)
            hend = fh.tell()
            fh.seek(0)
            raw_header = fh.read(hend)
    except Exception as e:  # noqa: BLE001 - numpy raises several kinds on a bad header
        raise InputError(f"cannot be read as a NumPy .npy file: {_short(e)}", path=path) from None
    if dtype.hasobject:
        raise InputError("holds Python objects (an object array, stored with pickle); "
                         "sheetview reads only plain numeric arrays and does not unpickle",
                         path=path)
    if len(shape) != 3:
        raise InputError(f"holds a {len(shape)}D array of shape {tuple(shape)}; expected a 3D "
                         f"volume indexed [i, j, k] = x, y, z", path=path)
    if dtype.kind not in "biuf":
        raise InputError(f"holds {dtype} values; expected integer or real voxel values", path=path)
    nbytes = math.prod(int(d) for d in shape) * dtype.itemsize
    if nbytes > size - hend:
        raise InputError(f"declares a {' x '.join(str(d) for d in shape)} array of {dtype} "
                         f"({nbytes:,} bytes) but holds {size - hend:,} bytes of data: "
                         f"truncated or damaged", path=path)
    _check_memory(shape, dtype.itemsize, path)
    try:
        arr = np.load(path, allow_pickle=False)
    except Exception as e:  # noqa: BLE001
        raise InputError(f"cannot be read as a NumPy .npy file: {_short(e)}", path=path) from None
    info: dict = {"no_spacing_reason": "a .npy file holds no voxel size"}
    text = raw_header.decode("latin1", errors="replace")
    m = re.search(r"#\s*" + re.escape(MARKER) + r"\s*(\{.*\})", text)
    if m:
        try:
            mk = load_json(m.group(1), path=path, what="the sheetview marker")
            if isinstance(mk, dict):
                mk["format"] = MARKER
                info["marker"] = mk
        except InputError:
            pass
    return np.ascontiguousarray(arr), info


# raw ----------------------------------------------------------------------------------
_BYTE_ORDERS = {"<": "<", "little": "<", "le": "<", ">": ">", "big": ">", "be": ">",
                "=": "=", "native": "="}


def _load_raw(path: Path, shape, dtype, byte_order):
    missing = [n for n, v in (("--shape NX,NY,NZ", shape), ("--dtype", dtype)) if v is None]
    if missing:
        raise InputError(f"a raw volume has no header: pass {' and '.join(missing)} "
                         f"(e.g. --shape 200,200,100 --dtype uint8)", path=path)
    try:
        shp = tuple(int(s) for s in shape)
    except (TypeError, ValueError):
        raise OptionError(f"--shape must be three whole numbers, got {shape!r}", path=path) from None
    if len(shp) != 3 or min(shp) <= 0:
        raise OptionError(f"--shape must be three positive whole numbers, got {shape!r}", path=path)
    try:
        dt = np.dtype(dtype)
    except TypeError:
        raise OptionError(f"--dtype {dtype!r} is not a numpy dtype (e.g. uint8, <u2, float32)",
                          path=path) from None
    if dt.kind not in "biuf" or dt.hasobject:
        raise OptionError(f"--dtype {dtype!r}: expected an integer or real type", path=path)
    if byte_order is not None:
        bo = _BYTE_ORDERS.get(str(byte_order).strip().lower())
        if bo is None:
            raise OptionError(f"--byte-order must be little or big, not {byte_order!r}", path=path)
        dt = dt.newbyteorder(bo)
    expected = int(np.prod(shp)) * dt.itemsize
    size = path.stat().st_size
    if size != expected:
        raise InputError(f"file size is {size} bytes but shape {shp[0]} x {shp[1]} x {shp[2]} "
                         f"of {dt.name} ({dt.itemsize} byte(s) each) needs {expected} bytes; "
                         f"check --shape and --dtype", path=path)
    _check_memory(shp, dt.itemsize, path)
    nx, ny, nz = shp
    data = np.fromfile(path, dtype=dt).reshape(nz, ny, nx)  # x fastest on disk
    arr = np.ascontiguousarray(data.transpose(2, 1, 0))
    if arr.dtype.byteorder not in ("=", "|"):
        arr = arr.astype(arr.dtype.newbyteorder("="))
    return arr, {"no_spacing_reason": "a raw file holds no voxel size"}


# VTI ----------------------------------------------------------------------------------
def _load_vti(path: Path, ufac):
    """The voxel array and geometry of a ``.vti``: the XML declarations checked first
    (extent against the file size and the memory budget; Spacing, Origin and Direction
    finite, spacing positive), then parsed by VTK in a child process
    (:func:`sheetview.io.vtkfiles.read_image_arrays`)."""
    from .vtkfiles import read_image_arrays

    grid = read_image_arrays(path)
    direction = grid.get("direction")
    if direction is not None and not np.allclose(np.asarray(direction).reshape(3, 3), np.eye(3)):
        raise InputError("has a rotated grid (non-identity Direction); only axis-aligned "
                         "grids are read", path=path)
    dims = np.asarray(grid["dimensions"])
    name, where = _vti_array(grid, path)
    data = np.asarray(grid[where][name])
    if data.ndim != 1:
        raise InputError(f"array '{name}' has {data.shape[1]} components; expected one value "
                         f"per voxel", path=path, field=name)
    vshape = tuple(int(d) for d in (np.maximum(dims - 1, 1) if where == "cell" else dims))
    if data.size != math.prod(vshape):
        raise InputError(f"array '{name}' holds {data.size:,} values for {math.prod(vshape):,} "
                         f"voxels", path=path, field=name)
    arr = np.ascontiguousarray(data.reshape(vshape, order="F"))
    f = ufac if ufac is not None else 1.0
    spacing = tuple(float(s) * f for s in grid["spacing"])
    origin = np.asarray(grid["origin"], dtype=float) * f
    if not (all(math.isfinite(s) and s > 0 for s in spacing) and np.all(np.isfinite(origin))):
        raise InputError(f"Spacing {grid['spacing']} and Origin {grid['origin']} must be finite "
                         f"(spacing positive) in nm", path=path)
    if where == "point":
        origin = origin - 0.5 * np.asarray(spacing)
    info = {"spacing": spacing, "origin": tuple(float(o) for o in origin)}
    if grid.get("marker") is not None:
        try:
            mk = json.loads(grid["marker"])
            if isinstance(mk, dict) and mk.get("format") == MARKER:
                info["marker"] = mk
        except (ValueError, RecursionError):
            pass
    mk = info.get("marker")
    if mk is not None and mk.get("solid_fraction") is not None:
        info["solid_fraction"] = _vti_fraction(grid, mk["solid_fraction"], where, vshape, path)
    return arr, info


def _vti_fraction(grid, name, where, vshape, path) -> np.ndarray:
    """The solid-fraction array that the marker of a sheetview VTI names: one float per
    voxel, beside the phase array (same cell or point association), each in [0, 1]."""
    data = grid[where]
    if not isinstance(name, str) or name not in data:
        raise InputError(f"its sheetview marker announces a solid-fraction array {name!r}, "
                         f"but the file holds no {where} array of that name", path=path,
                         field="solid_fraction")
    a = np.asarray(data[name])
    if a.ndim != 1 or a.size != int(np.prod(vshape)) or a.dtype.kind != "f":
        raise InputError(f"solid-fraction array {name!r} must hold one real number per voxel "
                         f"({int(np.prod(vshape))}), got {a.dtype} of shape {a.shape}",
                         path=path, field=name)
    bad = ~((a >= 0) & (a <= 1))  # NaN is bad too
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        raise InputError(f"solid-fraction array {name!r} must lie in [0, 1]; value {fmt(a[i])} "
                         f"at voxel {i} ({int(bad.sum())} voxel(s) affected)", path=path,
                         field=name)
    return np.ascontiguousarray(a.reshape(vshape, order="F"), dtype=np.float32)


def _vti_array(grid, path):
    cells = list(grid["cell"])
    points = list(grid["point"])
    if "phase" in cells:
        return "phase", "cell"
    if "phase" in points:
        return "phase", "point"
    for where, names in (("cell", cells), ("point", points)):
        active = grid["active"].get(where)
        if active in names:
            return active, where
    if len(cells) + len(points) == 1:
        return (cells[0], "cell") if cells else (points[0], "point")
    if not cells and not points:
        raise InputError("holds no voxel values (no point or cell arrays)", path=path)
    raise InputError(f"holds several arrays (cell: {cells}, point: {points}) and none is named "
                     f"'phase' or marked active; rename the one to read 'phase'", path=path)


def _short(e) -> str:
    s = str(e).strip().splitlines()
    s = s[0] if s else type(e).__name__
    return re.sub(r"\s*\(0x[0-9a-f]+\)", "", s)[:200]


# ----------------------------------------------------------------------------- writing
#: numpy.load refuses (without ``max_header_size``) NPY headers longer than this (bytes).
NPY_SAFE_HEADER = 10000


def _marker(grid: PhaseGrid) -> dict:
    mk = {"format": MARKER, "spacing": list(grid.spacing), "origin": list(grid.origin)}
    if grid.periodic:
        mk["periodic"] = True
    if dict(grid.names) != PHASE_NAMES:
        mk["names"] = {str(k): v for k, v in grid.names.items()}
    meta = {k: v for k, v in dict(grid.metadata or {}).items() if k != "source_format"}
    if meta:  # JSON-ready: numpy scalars and arrays as numbers and lists, the rest as text
        mk["metadata"] = json.loads(json.dumps(meta, default=json_default))
    return mk


def _fraction_to_write(grid: PhaseGrid, shape, path):
    """``grid.solid_fraction`` as float32 of the labels' shape, or None when there is none."""
    frac = grid.solid_fraction
    if frac is None:
        return None
    frac = np.asarray(frac)
    if frac.shape != tuple(shape) or frac.dtype.kind != "f":
        raise OptionError(f"the grid's solid_fraction must be a real array of the labels' shape "
                          f"{tuple(shape)}, got {frac.dtype} of shape {frac.shape}", path=path,
                          field="solid_fraction")
    return np.asarray(frac, dtype=np.float32)


def write_volume(grid: PhaseGrid, path, *, force: bool = False) -> Path:
    """Write a PhaseGrid as ``.vti``, ``.npy`` or ``.tif``/``.tiff`` (see the module text).

    Every form carries a ``sheetview`` marker so that reading it back needs no options and
    gives the same labels, spacing and origin. ``grid.solid_fraction``, when present, is
    written to ``.vti`` only (a second cell array, float32, named in the marker); NPY and
    TIFF hold one array, the labels, and leave it out.
    """
    path = Path(path)
    suffix = path.suffix.lower()
    labels = np.ascontiguousarray(grid.labels, dtype=np.uint8)
    if suffix == ".vti":
        import pyvista as pv

        from .meshes import write_vtk_xml

        img = pv.ImageData(dimensions=tuple(int(s) + 1 for s in labels.shape),
                           spacing=grid.spacing, origin=grid.origin)
        img.cell_data["phase"] = labels.ravel(order="F")
        mk = _marker(grid)
        frac = _fraction_to_write(grid, labels.shape, path)
        if frac is not None:
            img.cell_data[FRACTION_ARRAY] = frac.ravel(order="F")
            img.set_active_scalars("phase", preference="cell")
            mk["solid_fraction"] = FRACTION_ARRAY
        img.field_data["sheetview"] = np.array([json.dumps(mk)])
        with atomic_path(path, force) as tmp:
            write_vtk_xml(img, tmp)
        return path
    if suffix == ".npy":
        with atomic_path(path, force) as tmp:
            _write_npy_marked(tmp, labels, _npy_marker(grid, labels))
        return path
    if suffix in (".tif", ".tiff"):
        import tifffile

        zyx = np.ascontiguousarray(labels.transpose(2, 1, 0))
        dx, dy, dz = grid.spacing
        description = json.dumps(tiff_description(grid))
        with atomic_path(path, force) as tmp:
            tifffile.imwrite(str(tmp), zyx, photometric="minisblack",
                             bigtiff=zyx.nbytes > IMAGEJ_TIFF_LIMIT,
                             resolution=(1e7 / dx, 1e7 / dy), resolutionunit="CENTIMETER",
                             description=description, metadata=None, software="sheetview")
        return path
    raise OptionError(f"cannot write a phase grid as {suffix or '(no suffix)'!r}; use .vti, "
                      f".npy, .tif or .tiff", path=path)


def tiff_description(grid: PhaseGrid) -> dict:
    """The description of a volume TIFF sheetview writes: its marker (format, spacing and
    origin in nm, phase names, metadata) plus ``axes`` (``ZYX``: pages are z slices) and
    ``unit`` (``nm``)."""
    return {**_marker(grid), "axes": "ZYX", "unit": "nm"}


def _write_npy_marked(fname, labels: np.ndarray, marker: dict) -> None:
    """Write a version 1.0 NPY file whose header dictionary is followed by a comment
    ``# sheetview phase codes v1 {json}``; NumPy's reader ignores the comment."""
    body = {k: v for k, v in marker.items() if k != "format"}
    d = f"{{'descr': '{labels.dtype.str}', 'fortran_order': False, 'shape': {tuple(labels.shape)!r}, }}"
    comment = f" # {MARKER} {json.dumps(body, separators=(',', ':'))}"
    header = d + comment
    magic = b"\x93NUMPY\x01\x00"
    total = len(magic) + 2 + len(header) + 1
    hb = (header + " " * ((-total) % 64) + "\n").encode("latin1")
    if len(hb) > NPY_SAFE_HEADER:
        raise ValueError("npy header too long")  # _npy_marker keeps it short
    with open(fname, "wb") as fh:
        fh.write(magic + len(hb).to_bytes(2, "little") + hb)
        fh.write(labels.tobytes(order="C"))


def _npy_marker(grid: PhaseGrid, labels: np.ndarray) -> dict:
    """The marker of an NPY file: with the grid's metadata only when the header stays
    within what ``numpy.load`` reads without ``max_header_size`` (:data:`NPY_SAFE_HEADER`);
    longer metadata is left out (``.vti`` and TIFF carry any length)."""
    mk = _marker(grid)
    body = {k: v for k, v in mk.items() if k != "format"}
    size = len(json.dumps(body, separators=(",", ":"))) + 200 + len(str(labels.shape))
    if size > NPY_SAFE_HEADER - 64:
        mk.pop("metadata", None)
    return mk
