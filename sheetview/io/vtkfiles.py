"""VTK files (legacy ``.vtk``, XML ``.vtp``/``.vtu``/``.vti``): checked, then parsed apart.

Reading a VTK file goes in two steps.

1. :func:`precheck` reads the file's own declarations without VTK: the legacy header
   (``# vtk DataFile Version``, ``ASCII``/``BINARY``, the counts after ``POINTS``,
   ``POLYGONS``, ``CELLS``, ``POINT_DATA``, field arrays...) or the XML elements before
   the data (``NumberOfPoints``, ``NumberOfCells``, ``WholeExtent``, ``Spacing``,
   ``Origin``, each ``DataArray``'s type and components, the compressor). Every declared
   block must fit in the file (uncompressed data byte for byte; compressed data within the
   most its compressor can expand: zlib 1032:1, LZ4 255:1), point and cell data must
   agree with the point and cell counts, and the memory the declared content needs must
   fit the budget. A file that fails is refused before anything of that size is
   allocated.
2. :func:`read_mesh_arrays` / :func:`read_image_arrays` then run VTK (through pyvista) in a
   child process (:func:`sheetview.io.isolate.run_isolated`), which hands back plain
   numpy arrays. A file that still makes VTK crash, abort, loop or run out of memory
   costs the child only; the reader says so in one line naming the file.
"""
from __future__ import annotations

import contextlib
import math
import mmap
import re
import warnings
from pathlib import Path

import numpy as np

from ..errors import InputError
from .isolate import run_isolated
from .safety import check_read_memory, memory_budget

#: Bytes of one value of each VTK type name (legacy and XML spellings).
VTK_TYPE_BYTES = {
    "bit": 1, "char": 1, "signed_char": 1, "unsigned_char": 1, "short": 2, "unsigned_short": 2,
    "int": 4, "unsigned_int": 4, "long": 8, "unsigned_long": 8, "float": 4, "double": 8,
    "vtktypeint64": 8, "vtktypeuint64": 8, "vtkidtype": 8, "string": 1, "utf8_string": 1,
    "int8": 1, "uint8": 1, "int16": 2, "uint16": 2, "int32": 4, "uint32": 4, "int64": 8,
    "uint64": 8, "float32": 4, "float64": 8, "idtype": 8,
}
#: Most a compressor of VTK XML files can expand its data (declared bytes per stored byte).
COMPRESSION_MAX_RATIO = {None: 1, "vtkZLibDataCompressor": 1032, "vtkLZ4DataCompressor": 255}
#: Peak bytes per declared point and per declared cell of reading a mesh (VTK's dataset, the
#: surface and triangles made from it, the copies handed over and the prisms built).
MESH_BYTES_PER_POINT = 160
MESH_BYTES_PER_CELL = 400
#: Largest count accepted in any declaration.
MAX_COUNT = 2**40

_LEGACY_RE = re.compile(
    rb"(?m)^[ \t]*(POINTS|VERTICES|LINES|POLYGONS|TRIANGLE_STRIPS|CELLS|CELL_TYPES|POINT_DATA"
    rb"|CELL_DATA|DIMENSIONS|X_COORDINATES|Y_COORDINATES|Z_COORDINATES|FIELD|SCALARS|VECTORS"
    rb"|NORMALS|TENSORS|TEXTURE_COORDINATES|COLOR_SCALARS|LOOKUP_TABLE|OFFSETS|CONNECTIVITY"
    rb"|METADATA|INFORMATION|DATASET)\b([^\r\n]{0,200})")
_FIELD_ARRAY_RE = re.compile(
    rb"(?m)^[ \t]*(\S{1,256})[ \t]+(\d{1,30})[ \t]+(\d{1,30})[ \t]+(bit|unsigned_char|char|"
    rb"unsigned_short|short|unsigned_int|int|unsigned_long|long|float|double|string|utf8_string|"
    rb"vtktypeint64|vtktypeuint64|vtkIdType)[ \t]*\r?$")


@contextlib.contextmanager
def quiet_vtk():
    """Silence VTK's console output and collect its error messages instead."""
    import logging

    import pyvista as pv

    previous = logging.root.manager.disable
    logging.disable(logging.CRITICAL)  # pyvista's readers log VTK errors to the root logger
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            with pv.vtk_verbosity("off"):
                with pv.VtkErrorCatcher(raise_errors=False, send_to_logging=False) as catcher:
                    yield catcher
    finally:
        logging.disable(previous)


def polygons_only(poly):
    """Drop vertex and line cells of a PolyData (VTK orders its cells verts, lines, polys,
    strips), keeping the polygons and strips with their cell arrays."""
    import pyvista as pv

    nv, nl = poly.n_verts, poly.n_lines
    if nv == 0 and nl == 0:
        return poly
    out = pv.PolyData(np.array(poly.points), faces=np.array(poly.faces),
                      strips=np.array(poly.strips))
    start = nv + nl
    for k in poly.cell_data.keys():
        out.cell_data[k] = np.array(poly.cell_data[k])[start:]
    return out


def short_error(e) -> str:
    """The first line of an exception's text, without memory addresses, at most 200 characters."""
    s = str(e).strip().splitlines()
    s = s[0] if s else type(e).__name__
    s = re.sub(r"\s*\(0x[0-9a-f]+\)", "", s)
    return s[:200]


def _int(tok: bytes | str, what: str, path) -> int:
    try:
        v = int(tok)
    except ValueError:
        raise InputError(f"damaged VTK header: {what} is not a whole number ({tok[:40]!r})",
                         path=path) from None
    if v < 0 or v > MAX_COUNT:
        raise InputError(f"damaged VTK header: {what} is {v:,}, outside 0 to {MAX_COUNT:,}",
                         path=path)
    return v


def precheck(path) -> dict:
    """Check a VTK file's declarations against its size and the memory budget (see the
    module text); returns what was read (``kind``, counts, and for ImageData ``spacing``,
    ``origin``, ``extent``)."""
    path = Path(path)
    size = path.stat().st_size
    if size == 0:
        raise InputError("the file is empty", path=path)
    with open(path, "rb") as fh:
        head = fh.read(64)
        if head.startswith(b"# vtk DataFile"):
            with mmap.mmap(fh.fileno(), 0, access=mmap.ACCESS_READ) as mm:
                return _legacy(mm, size, path)
        fh.seek(0)
        text = _xml_head(fh)
    if "<VTKFile" not in text:
        raise InputError("is neither a legacy VTK file ('# vtk DataFile Version' on the first "
                         "line) nor VTK XML (a <VTKFile> element)", path=path)
    return _xml(text, size, path)


# ------------------------------------------------------------------------------ legacy
def _legacy(mm, size: int, path) -> dict:
    lines = bytes(mm[:1024]).split(b"\n", 4)
    if len(lines) < 4:
        raise InputError("damaged legacy VTK file: fewer than four header lines", path=path)
    mode = lines[2].strip().upper()
    if mode not in (b"ASCII", b"BINARY"):
        raise InputError(f"damaged legacy VTK file: line 3 must say ASCII or BINARY, not "
                         f"{lines[2].strip()[:40].decode('latin1')!r}", path=path)
    binary = mode == b"BINARY"
    per = (lambda itemsize: itemsize) if binary else (lambda itemsize: 2)
    declared = 0
    n_points = n_cells = 0
    cell_values = 0
    point_data = cell_data = None
    for m in _LEGACY_RE.finditer(mm):
        key = m.group(1).decode()
        toks = m.group(2).split()
        if key == "POINTS":
            if len(toks) < 2:
                raise InputError("damaged legacy VTK header: POINTS needs a count and a type",
                                 path=path)
            n = _int(toks[0], "the POINTS count", path)
            item = VTK_TYPE_BYTES.get(toks[1].decode("latin1").lower(), 4)
            n_points += n
            declared += 3 * n * per(item)
        elif key in ("VERTICES", "LINES", "POLYGONS", "TRIANGLE_STRIPS", "CELLS"):
            if len(toks) < 2:
                raise InputError(f"damaged legacy VTK header: {key} needs two counts", path=path)
            n = _int(toks[0], f"the {key} count", path)
            total = _int(toks[1], f"the {key} size", path)
            n_cells += n
            cell_values += total
            declared += total * per(4)
        elif key == "CELL_TYPES":
            if toks:
                declared += _int(toks[0], "the CELL_TYPES count", path) * per(4)
        elif key == "DIMENSIONS":
            dims = [_int(t, "a DIMENSIONS entry", path) for t in toks[:3]]
            if len(dims) == 3:
                n_points += math.prod(dims)
        elif key in ("X_COORDINATES", "Y_COORDINATES", "Z_COORDINATES"):
            if toks:
                declared += _int(toks[0], f"the {key} count", path) * per(4)
        elif key == "POINT_DATA" and toks:
            point_data = _int(toks[0], "the POINT_DATA count", path)
        elif key == "CELL_DATA" and toks:
            cell_data = _int(toks[0], "the CELL_DATA count", path)
    if point_data is not None and point_data > n_points:
        raise InputError(f"damaged legacy VTK file: POINT_DATA declares {point_data:,} values "
                         f"for {n_points:,} points", path=path)
    if cell_data is not None and cell_data > n_cells:
        raise InputError(f"damaged legacy VTK file: CELL_DATA declares {cell_data:,} values for "
                         f"{n_cells:,} cells", path=path)
    for m in _FIELD_ARRAY_RE.finditer(mm):
        comps = _int(m.group(2), "a field array's component count", path)
        tuples = _int(m.group(3), "a field array's tuple count", path)
        item = VTK_TYPE_BYTES.get(m.group(4).decode().lower(), 1)
        declared += comps * tuples * per(item)
    if declared > size:
        raise InputError(f"damaged or truncated legacy VTK file: its header declares "
                         f"{n_points:,} points, {n_cells:,} cells and their data "
                         f"({declared:,} bytes at least) but the file holds {size:,} bytes",
                         path=path)
    need = n_points * MESH_BYTES_PER_POINT + n_cells * MESH_BYTES_PER_CELL + cell_values * 32
    check_read_memory(need, f"{n_points:,} points and {n_cells:,} cells", path)
    return {"kind": "legacy", "n_points": n_points, "n_cells": n_cells}


# --------------------------------------------------------------------------------- XML
_TAG_RE = re.compile(r"<\s*(/?)\s*([A-Za-z_][\w.-]*)([^<>]*?)(/?)\s*>", re.S)
_ATTR_RE = re.compile(r'([A-Za-z_][\w.-]*)\s*=\s*"([^"]*)"')


def _xml_head(fh, limit: int = 64 * 2**20) -> str:
    """The XML text before the appended data (at most ``limit`` bytes), as latin-1."""
    out = []
    got = 0
    while got < limit:
        block = fh.read(1 << 20)
        if not block:
            break
        i = block.find(b"<AppendedData")
        if i >= 0:
            out.append(block[:i])
            break
        out.append(block)
        got += len(block)
    return b"".join(out).decode("latin1")


def _floats(text: str, n: int, what: str, path) -> tuple:
    try:
        vals = [float(t) for t in text.split()]
    except ValueError:
        vals = []
    if len(vals) != n or not all(math.isfinite(v) for v in vals):
        raise InputError(f"{what} must be {n} finite numbers, got {text.strip()[:80]!r}",
                         path=path, field=what)
    return tuple(vals)


def _xml(text: str, size: int, path) -> dict:
    root = re.search(r"<VTKFile\b([^>]*)>", text)
    attrs = dict(_ATTR_RE.findall(root.group(1))) if root else {}
    kind = attrs.get("type", "")
    compressor = attrs.get("compressor") or None
    ratio = COMPRESSION_MAX_RATIO.get(compressor)  # None: no bound (LZMA...)
    info: dict = {"kind": kind}
    n_points = n_cells = 0
    piece_points = piece_cells = 0
    declared = {"raw": 0, "ascii": 0}
    ascii_values = 0
    pieces = []
    section = None
    for m in _TAG_RE.finditer(text):
        closing, name, body, _selfclose = m.groups()
        if closing:
            if name == section:
                section = None
            continue
        a = dict(_ATTR_RE.findall(body))
        if name == "Piece":
            if kind == "ImageData" or "Extent" in a and "NumberOfPoints" not in a:
                bounds = _extent(a.get("Extent", ""), path)
                pieces.append(bounds)
                ext = _sizes(bounds)
                piece_points = math.prod(e + 1 for e in ext)
                piece_cells = math.prod(max(e, 1) for e in ext)
            else:
                piece_points = _int(a.get("NumberOfPoints", "0"), "NumberOfPoints", path)
                piece_cells = sum(_int(a.get(k, "0"), k, path) for k in
                                  ("NumberOfCells", "NumberOfVerts", "NumberOfLines",
                                   "NumberOfStrips", "NumberOfPolys"))
            n_points += piece_points
            n_cells += piece_cells
        elif name == "ImageData":
            info["whole"] = _extent(a.get("WholeExtent", ""), path)
            info["extent"] = _sizes(info["whole"])
            if "Spacing" in a:
                info["spacing"] = _floats(a["Spacing"], 3, "Spacing", path)
                if min(info["spacing"]) <= 0:
                    raise InputError(f"Spacing must be three positive numbers, got "
                                     f"{a['Spacing'].strip()[:80]!r}", path=path, field="Spacing")
            if "Origin" in a:
                info["origin"] = _floats(a["Origin"], 3, "Origin", path)
            if "Direction" in a:
                info["direction"] = _floats(a["Direction"], 9, "Direction", path)
        elif name in ("Points", "PointData", "CellData", "FieldData", "Verts", "Lines",
                      "Strips", "Polys", "Cells"):
            section = name
        elif name in ("DataArray", "Array"):
            item = VTK_TYPE_BYTES.get(a.get("type", "").lower(), 1)
            comps = _int(a.get("NumberOfComponents", "1"), "NumberOfComponents", path)
            if "NumberOfTuples" in a:
                tuples = _int(a["NumberOfTuples"], "NumberOfTuples", path)
            elif section in ("Points", "PointData"):
                tuples = piece_points
            elif section == "CellData":
                tuples = piece_cells
            elif section in ("Verts", "Lines", "Strips", "Polys", "Cells") and \
                    a.get("Name") in ("offsets", "types"):
                tuples = piece_cells
            else:
                tuples = 0
            fmt = a.get("format", "ascii")
            declared["ascii" if fmt == "ascii" else "raw"] += comps * tuples * item
            if fmt == "ascii":
                ascii_values += comps * tuples
    if kind == "ImageData":
        if "extent" not in info:
            raise InputError("damaged VTK ImageData: no WholeExtent", path=path)
        whole = info["whole"]
        cells = math.prod(max(e, 1) for e in info["extent"])
        inside = all(all(whole[2 * i] <= p[2 * i] and p[2 * i + 1] <= whole[2 * i + 1]
                         for i in range(3)) for p in pieces)
        if not inside or sum(math.prod(max(e, 1) for e in _sizes(p)) for p in pieces) != cells:
            raise InputError(f"damaged VTK ImageData: its pieces ({len(pieces)}, extents "
                             f"{'; '.join(' '.join(map(str, p)) for p in pieces)[:80]}) do not "
                             f"make up its WholeExtent {' '.join(map(str, whole))}", path=path)
    need_stored = max(0, 2 * ascii_values - 1)  # a digit and a separator per value
    if ratio is not None:
        need_stored += declared["raw"] // ratio
    if need_stored > size:
        raise InputError(f"damaged or truncated VTK XML file: it declares {n_points:,} points and "
                         f"{n_cells:,} cells whose data need at least {need_stored:,} bytes "
                         f"stored{f' ({compressor})' if compressor else ''}, but the file holds "
                         f"{size:,} bytes", path=path)
    need = n_points * MESH_BYTES_PER_POINT + n_cells * MESH_BYTES_PER_CELL \
        + 2 * (declared["raw"] + declared["ascii"])
    if kind == "ImageData":
        need = 4 * (declared["raw"] + declared["ascii"]) + n_cells * 4
    check_read_memory(need, f"{n_points:,} points and {n_cells:,} cells", path)
    info.update(n_points=n_points, n_cells=n_cells)
    return info


def _extent(text: str, path) -> tuple:
    """The six numbers ``lo hi lo hi lo hi`` of an extent attribute."""
    try:
        e = [int(t) for t in text.split()] if len(text) < 200 else []
    except ValueError:
        e = []
    if len(e) != 6 or any(abs(v) > MAX_COUNT for v in e) or any(e[2 * i + 1] < e[2 * i]
                                                                    for i in range(3)):
        raise InputError(f"damaged VTK ImageData: an extent must be six whole numbers "
                         f"lo hi lo hi lo hi, got {text.strip()[:80]!r}", path=path)
    return tuple(e)


def _sizes(bounds) -> tuple:
    return tuple(bounds[2 * i + 1] - bounds[2 * i] for i in range(3))


# ------------------------------------------------------------------------ isolated parse
def read_mesh_arrays(path):
    """``(vertices, faces, face_arrays, header)`` of a VTK mesh file, parsed by VTK in a
    child process after :func:`precheck`. ``header`` is None, ``("text", str)`` or
    ``("not_text", None)`` (the field data ``sheetview``)."""
    precheck(path)
    _preload()
    return run_isolated("sheetview.io.vtkfiles:_mesh_child", (str(path),), path=path,
                        what="VTK", memory=memory_budget())


def read_image_arrays(path):
    """The arrays and geometry of a VTK ImageData (``.vti``) file, parsed by VTK in a child
    process after :func:`precheck`, whose Spacing/Origin/Direction (read from the XML
    text, finite, spacing positive) win over VTK's."""
    info = precheck(path)
    if info.get("kind") != "ImageData":
        raise InputError(f"holds VTK {str(info.get('kind') or 'data')[:40]!r}, expected "
                         f"ImageData", path=path)
    _preload()
    out = run_isolated("sheetview.io.vtkfiles:_image_child", (str(path),), path=path,
                       what="VTK", memory=memory_budget())
    for k in ("spacing", "origin", "direction"):
        if k in info:
            out[k] = info[k]
    return out


_WARM = []


def _preload() -> None:
    """Import pyvista and VTK's readers and filters here, once, and run the filters on a
    tiny dataset made in memory: a forked child then finds them loaded (a fresh import or
    first use in each child would cost more than the parse)."""
    if _WARM:
        return
    import pyvista as pv
    from vtkmodules import (vtkCommonMisc, vtkFiltersCore, vtkFiltersGeometry,  # noqa: F401
                            vtkIOLegacy, vtkIOXML)

    with quiet_vtk():
        tri = pv.PolyData(np.eye(3), faces=[3, 0, 1, 2])
        tri.cast_to_unstructured_grid().extract_surface().triangulate()
        pv.wrap(pv.ImageData(dimensions=(2, 2, 2)))
    _WARM.append(True)


def _vtk_read(path: str):
    """The dataset of a VTK file, read with VTK's own reader for its suffix (legacy files:
    every attribute array), wrapped by pyvista."""
    import pyvista as pv
    from vtkmodules import vtkIOLegacy, vtkIOXML

    suffix = Path(path).suffix.lower()
    if suffix == ".vtk":
        r = vtkIOLegacy.vtkDataSetReader()
        for flag in ("ReadAllScalars", "ReadAllVectors", "ReadAllNormals", "ReadAllTensors",
                     "ReadAllColorScalars", "ReadAllTCoords", "ReadAllFields"):
            getattr(r, flag + "On")()
    else:
        r = {".vtp": vtkIOXML.vtkXMLPolyDataReader, ".vtu": vtkIOXML.vtkXMLUnstructuredGridReader,
             ".vti": vtkIOXML.vtkXMLImageDataReader}[suffix]()
    r.SetFileName(path)
    r.Update()
    out = r.GetOutputDataObject(0)
    return None if out is None else pv.wrap(out)


def _vtk_errors(catcher) -> list:
    return [str(getattr(ev, "alert", ev)) for ev in getattr(catcher, "error_events", [])]


def _sequential_smp():
    try:
        from vtkmodules.vtkCommonCore import vtkSMPTools
        vtkSMPTools.SetBackend("Sequential")
    except Exception:  # noqa: BLE001 - older VTK: its default backend
        pass


def _mesh_child(path: str):
    """In the child: read a VTK mesh file with pyvista and reduce it to triangles."""
    import pyvista as pv


    _sequential_smp()
    fmt = {".vtk": "legacy VTK", ".vtp": "VTK PolyData", ".vtu": "VTK unstructured grid"}.get(
        Path(path).suffix.lower(), "VTK")
    mesh = None
    err = None
    with quiet_vtk() as catcher:
        try:
            mesh = _vtk_read(path)
        except Exception as e:  # noqa: BLE001 - pyvista raises many kinds on garbled input
            err = short_error(e)
    errors = _vtk_errors(catcher)
    if mesh is None or errors:
        why = err or (errors[0] if errors else "unknown error")
        raise InputError(f"cannot be read as {fmt}: {short_error(why)}")
    header = None
    fd = getattr(mesh, "field_data", None)
    if fd is not None and "sheetview" in fd.keys():
        try:
            a = np.asarray(fd["sheetview"]).ravel()
        except Exception:  # noqa: BLE001
            a = None
        if a is not None and a.dtype in (np.uint8, np.int8) and a.size:
            try:  # the header's UTF-8 bytes (what sheetview writes)
                header = ("text", a.astype(np.uint8).tobytes().decode("utf-8"))
            except UnicodeDecodeError:
                header = ("not_text", None)
        elif a is None or a.size != 1 or a.dtype.kind not in "USO":
            header = ("not_text", None)
        else:
            header = ("text", str(a[0]))
    if isinstance(mesh, pv.MultiBlock):
        mesh = mesh.combine()
    empty = np.zeros((0, 3), np.int64)
    if mesh.n_cells == 0:
        return np.array(mesh.points, dtype=np.float64).reshape(-1, 3), empty, {}, header
    original = None
    with quiet_vtk() as catcher:
        if not isinstance(mesh, pv.PolyData):
            original = np.array(mesh.points, dtype=np.float64).reshape(-1, 3)
            mesh = mesh.extract_surface(pass_pointid=True)
        mesh = polygons_only(mesh)
        if mesh.n_cells == 0:
            return np.array(mesh.points, dtype=np.float64).reshape(-1, 3), empty, {}, header
        surf = mesh.triangulate()
        errors = _vtk_errors(catcher)
        if errors:
            raise InputError(f"cannot be read as {fmt}: {short_error(errors[0])}")
        faces = np.asarray(surf.faces)
        if faces.size % 4 or (faces.size and np.any(faces[::4] != 3)):
            raise InputError(f"cannot be read as {fmt}: its cells do not reduce to triangles")
        faces = np.array(faces.reshape(-1, 4)[:, 1:], dtype=np.int64)
        arrays = {k: np.array(surf.cell_data[k]) for k in surf.cell_data.keys()
                  if np.asarray(surf.cell_data[k]).ndim == 1}
        points = np.array(surf.points, dtype=np.float64).reshape(-1, 3)
        ids = surf.point_data.get("vtkOriginalPointIds") if original is not None else None
        if ids is not None and len(ids) == len(points):
            # the file's own point numbering (a volume mesh's surface renumbers its points)
            faces = np.asarray(ids, dtype=np.int64)[faces]
            points = original
        arrays.pop("vtkOriginalCellIds", None)
    return points, faces, arrays, header


def _image_child(path: str):
    """In the child: read a ``.vti`` with pyvista; plain arrays and geometry."""
    import pyvista as pv


    _sequential_smp()
    grid = None
    err = None
    with quiet_vtk() as catcher:
        try:
            grid = _vtk_read(path)
        except Exception as e:  # noqa: BLE001
            err = short_error(e)
    errors = _vtk_errors(catcher)
    if grid is None or errors:
        why = err or (errors[0] if errors else "unknown error")
        raise InputError(f"cannot be read as VTK ImageData (.vti): {short_error(why)}")
    if not isinstance(grid, pv.ImageData):
        raise InputError(f"holds a {type(grid).__name__}, expected ImageData")
    out = {"dimensions": tuple(int(d) for d in grid.dimensions),
           "spacing": tuple(float(s) for s in grid.spacing),
           "origin": tuple(float(o) for o in grid.origin),
           "cell": {k: np.array(grid.cell_data[k]) for k in grid.cell_data.keys()},
           "point": {k: np.array(grid.point_data[k]) for k in grid.point_data.keys()},
           "active": {"cell": getattr(grid.cell_data, "active_scalars_name", None),
                      "point": getattr(grid.point_data, "active_scalars_name", None)},
           "marker": None}
    direction = getattr(grid, "direction_matrix", None)
    if direction is not None:
        out["direction"] = tuple(float(v) for v in np.asarray(direction).ravel())
    if "sheetview" in grid.field_data:
        try:
            out["marker"] = str(np.asarray(grid.field_data["sheetview"]).ravel()[0])
        except (ValueError, IndexError, TypeError):
            out["marker"] = None
    return out
