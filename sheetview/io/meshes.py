"""Triangle meshes: read as sheets (a Structure) or as a solid body (a SurfaceBody).

Readers
-------
* STL, PLY, OBJ, OFF, GLB/GLTF through trimesh (a scene's geometries are concatenated,
  with their transforms applied);
* VTK files (``.vtk`` legacy, ``.vtp``, ``.vtu``) through pyvista: the outer surface is
  extracted and its polygons are split into triangles. Their declared sizes are checked
  first and VTK parses them in a child process, whose crash is a one-line error
  (:mod:`sheetview.io.vtkfiles`, :mod:`sheetview.io.isolate`).

Before parsing, the counts a file declares (PLY elements, OFF counts, binary STL
triangles, glTF accessors and buffers) are checked against its size and the memory budget
(:func:`_precheck_trimesh`).

What becomes what
-----------------
* An **open** surface is a set of sheet mid-surfaces: each triangle becomes one prism, in
  file order. The thickness comes from the ``thickness`` option (nm), else from a
  per-face array named ``thickness`` (VTK cell data, a PLY face property), else the
  reading stops and asks for ``--thickness``. Per-face arrays named ``sheet``, ``born``
  and ``tag`` are kept as prism columns. The domain is the padded bounding box
  (:func:`sheetview.structure.with_inferred_domain`), marked as inferred, unless the
  file carries sheetview's header (below).
* A **closed** (watertight, consistently wound) surface is a solid body: a
  :class:`~sheetview.structure.SurfaceBody` whose domain is its bounding box padded by
  one nominal repeat (the ``spacing`` option, default 1.4 nm), marked as inferred,
  unless the file carries sheetview's header.

``as_="sheets"`` or ``as_="solid"`` forces a reading (a solid reading of a surface that is
not closed is refused). ``units`` gives the length unit of the file (nm, A, um); lengths
are converted to nm. Options given in nm (``thickness``, ``spacing``) are not scaled.

The header sheetview writes
---------------------------
A file sheetview wrote (every form but STL) carries a header ``sheetview mesh v1``
(:func:`mesh_header`): units, domain, ``domain_inferred``, metadata, and for prisms the
spacing. Reading gives them back: the domain exactly (with its inferred mark), the
spacing of a sheet reading (unless ``spacing`` is given), the metadata. Files without
it, or with another program's comments or field data, get the inferred domain as above.
A header that is sheetview's but damaged is refused (:func:`_interpret_header`).

Writers
-------
* :func:`write_prisms_vtk`: the closed prism solids of a Structure as VTK PolyData
  (``.vtp`` binary XML, or legacy ``.vtk``) with every per-prism quantity as cell data
  and the header as field data ``sheetview``;
* :func:`write_body`: a SurfaceBody as STL, PLY, OBJ, OFF, GLB (trimesh) or VTP/VTK
  (pyvista), with the header in a PLY ``comment``, a leading OBJ/OFF ``#`` line, the GLB
  scene ``extras`` or VTK field data (STL: none).
"""
from __future__ import annotations

import dataclasses
import json
import re
import struct
import warnings
from pathlib import Path

import numpy as np

from ..domain import Domain, bounding_box, domain_from_dict
from ..errors import InputError, OptionError, SheetviewError
from ..structure import DEFAULT_SPACING_NM, KNOWN_COLUMNS, Structure, SurfaceBody, with_inferred_domain
from ..domain import MAX_LENGTH_NM
from .output import atomic_path, json_default
from .prisms import UNITS, unit_factor, whole_numbers
from .vtkfiles import quiet_vtk as _quiet_vtk
from .vtkfiles import read_mesh_arrays
from .vtkfiles import short_error as _short
from .safety import (check_declared, check_input_file, check_read_memory, finite_number,
                     json_type, load_json)

VTK_SUFFIXES = {".vtk", ".vtp", ".vtu"}
TRIMESH_SUFFIXES = {".stl", ".ply", ".obj", ".off", ".glb", ".gltf"}
#: Per-face arrays carried from a mesh file onto the prisms.
KEPT_FACE_ARRAYS = ("sheet", "born", "tag")

_FORMAT_NAMES = {".stl": "STL", ".ply": "PLY", ".obj": "OBJ", ".off": "OFF", ".glb": "glTF binary",
                 ".gltf": "glTF", ".vtk": "legacy VTK", ".vtp": "VTK PolyData",
                 ".vtu": "VTK unstructured grid"}


# ----------------------------------------------------------------------------- reading
def read_mesh(path, *, thickness=None, spacing=None, units=None, as_=None):
    """Read a triangle mesh as sheets (:class:`Structure`) or a solid (:class:`SurfaceBody`).

    Parameters
    ----------
    path : str or Path
        A ``.stl .ply .obj .off .glb .gltf .vtk .vtp .vtu`` file.
    thickness : float, optional
        Prism thickness in nm for a sheet reading (overrides a per-face array).
    spacing : float, optional
        Nominal interlayer repeat in nm (default 1.4); also the padding of a solid's domain.
    units : str, optional
        Length unit of the file: "nm" (default), "A", "um".
    as_ : {"sheets", "solid", None}
        Force a reading; None chooses by closedness.

    Returns
    -------
    Structure or SurfaceBody

    Raises
    ------
    InputError
        Unreadable file, no triangles, non-finite or degenerate faces, no thickness for
        a sheet reading, a solid reading of an open surface, a damaged or newer
        sheetview header (see the module text).
    """
    path = Path(path)
    suffix = path.suffix.lower()
    if as_ not in (None, "auto", "sheets", "solid"):
        raise OptionError(f"must be 'sheets' or 'solid', not {as_!r}", path=path, param="as_")
    for name, v in (("thickness", thickness), ("spacing", spacing)):
        if v is not None and not (finite_number(v) is not None and 0 < v <= MAX_LENGTH_NM):
            raise OptionError(f"must be a positive number of nm (at most "
                              f"{MAX_LENGTH_NM:g}), got {v}", path=path, param=name)
    if units is not None:
        unit_factor(units, path=path)  # refuse a bad option before reading
    if suffix in VTK_SUFFIXES:
        vertices, faces, face_arrays, found = _load_vtk(path)
    elif suffix in TRIMESH_SUFFIXES:
        _precheck_trimesh(path, suffix)
        vertices, faces, face_arrays = _load_trimesh(path)
        found = _find_text_header(path, suffix)
    else:
        raise InputError(f"not a mesh file suffix {suffix!r}", path=path)
    header = _interpret_header(found, path, units)
    f = header.factor if header is not None else unit_factor(units or "nm", path=path)

    vertices, faces = _checked_arrays(vertices, faces, path, suffix)
    if faces.shape[0] == 0:
        raise InputError(f"has no triangles (the {_FORMAT_NAMES[suffix]} file holds "
                         f"{len(vertices)} points and no faces)", path=path)
    if faces.min() < 0 or faces.max() >= len(vertices):
        raise InputError("a face refers to a vertex that does not exist", path=path)
    tri = vertices[faces]  # (N, 3, 3), file order
    flat = tri.reshape(len(tri), 9)
    bad = ~np.all(np.isfinite(flat), axis=1)
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        raise InputError(f"face row {i + 1}: corner coordinates must be finite numbers "
                         f"(found NaN or inf; {int(bad.sum())} face(s) affected)", path=path)
    bad = np.any(np.abs(flat) * f > MAX_LENGTH_NM, axis=1)
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        raise InputError(f"face row {i + 1}: corner coordinates must lie within "
                         f"{MAX_LENGTH_NM:g} nm (1 m) of the origin, found "
                         f"{float(np.abs(flat[i]).max() * f):.4g} nm (check the units; "
                         f"{int(bad.sum())} face(s) affected)", path=path)
    if f != 1.0:
        vertices = vertices * f
        tri = tri * f

    if header is not None and header.content == CONTENT_PRISMS and as_ != "solid":
        return _own_prisms(vertices, faces, face_arrays, header, path, suffix, thickness,
                           spacing)
    closed = None
    if as_ in (None, "auto"):
        closed = _is_closed(vertices, faces)
        reading = "solid" if closed else "sheets"
    else:
        reading = as_
    meta = dict(header.metadata) if header is not None else {}
    meta["source_format"] = suffix.lstrip(".")
    if reading == "solid":
        if closed is None:
            closed = _is_closed(vertices, faces)
        if not closed:
            raise InputError("is not a closed surface (some edges do not join exactly two "
                             "consistently wound faces), so it cannot be read as a solid; "
                             "read it as sheets (--as sheets) or repair the mesh", path=path)
        v_m, f_m = _merge(vertices, faces)
        _check_degenerate(v_m[f_m], path)
        if header is not None and header.domain is not None:
            dom = header.domain
        else:
            dom = bounding_box(v_m, spacing if spacing is not None else DEFAULT_SPACING_NM)
        return SurfaceBody(v_m, f_m, dom, meta, str(path))

    # sheets
    if thickness is not None:
        thick = np.full(len(tri), float(thickness))
    elif "thickness" in face_arrays:
        thick = np.asarray(face_arrays["thickness"])
        if thick.shape != (len(tri),) or thick.dtype.kind not in "biuf":
            raise InputError(f"per-face array 'thickness' must hold one number per face "
                             f"({len(tri)}), got {thick.dtype} of shape {thick.shape}",
                             path=path, field="thickness")
        thick = thick.astype(np.float64) * f
    else:
        raise InputError(f"no sheet thickness: a mesh read as sheets needs <<thickness>> (nm) "
                         f"(or a per-face array named 'thickness'); the {len(tri)} triangles "
                         f"are the mid-surfaces of the sheets", path=path)
    cols = {}
    for name in KEPT_FACE_ARRAYS:
        if name in face_arrays:
            a = np.asarray(face_arrays[name])
            if a.shape != (len(tri),) or a.dtype.kind not in "biuf":
                raise InputError(f"per-face array '{name}' must hold one number per face "
                                 f"({len(tri)}), got {a.dtype} of shape {a.shape}",
                                 path=path, field=name)
            if KNOWN_COLUMNS[name] is np.int64:
                a = whole_numbers(a, name, path, "per-face array")
            cols[name] = a
    if spacing is not None:
        sp = spacing
    elif header is not None and header.spacing is not None:
        sp = header.spacing
    else:
        sp = DEFAULT_SPACING_NM
    if header is not None and header.domain is not None:
        dom = header.domain
    else:
        dom = with_inferred_domain(tri, thick)
    s = Structure(tri, thick, dom, sp, cols, meta, str(path))
    try:
        s.validate()
    except InputError as e:
        raise InputError(e.detail.replace("prism row", "face row"), path=path,
                         field=e.field) from None
    return s


def _own_prisms(vertices, faces, arrays, header, path, suffix, thickness, spacing):
    """The prisms of a VTK file sheetview wrote (header ``"content": "prisms"``): each
    prism's six corners are points ``6i .. 6i + 5`` (bottom a, b, c then top), which the
    triangles of prism ``i`` (cell array ``prism_id``) must use and no others. The
    mid-plane triangle is the mean of bottom and top, the thickness their distance; the
    per-prism arrays come back as columns."""
    n6 = len(vertices)
    pid = arrays.get("prism_id")
    fail = None
    if pid is None or np.asarray(pid).shape != (len(faces),):
        fail = "it has no cell array 'prism_id' with one value per face"
    elif n6 % 6:
        fail = f"its {n6} points are not six per prism"
    else:
        pid = np.asarray(pid).astype(np.int64)
        n = n6 // 6
        if (pid.min() < 0 or pid.max() >= n or not np.all(faces // 6 == pid[:, None])
                or len(np.unique(pid)) != n):
            fail = "its faces do not match the six corners of their prism"
    if fail is not None:
        raise InputError(f"the sheetview header says it holds prisms, but {fail}; read it "
                         f"as a mesh with --as sheets or --as solid", path=path,
                         field="prism_id")
    corners = vertices.reshape(n, 6, 3)
    mid = 0.5 * (corners[:, :3] + corners[:, 3:])
    first = np.zeros(n, np.int64)
    first[pid[::-1]] = np.arange(len(pid))[::-1]  # the first face of each prism
    if thickness is not None:
        thick = np.full(n, float(thickness))
    else:
        thick = np.linalg.norm(corners[:, 3] - corners[:, 0], axis=1)
    cols = {}
    for name in KEPT_FACE_ARRAYS:
        if name in arrays:
            a = np.asarray(arrays[name])[first]
            if KNOWN_COLUMNS[name] is np.int64:
                a = whole_numbers(a, name, path, "cell array")
            cols[name] = a
    sp = spacing if spacing is not None else (header.spacing if header.spacing is not None
                                              else DEFAULT_SPACING_NM)
    dom = header.domain if header.domain is not None else with_inferred_domain(mid, thick)
    meta = dict(header.metadata)
    meta["source_format"] = suffix.lstrip(".")
    s = Structure(mid, thick, dom, sp, cols, meta, str(path))
    s.validate()
    return s


def _checked_arrays(vertices, faces, path, suffix):
    """Vertices as finite-size (n, 3) float64 and faces as (m, 3) int64, or a refusal."""
    fmt = _FORMAT_NAMES[suffix]
    v = np.asarray(vertices)
    fc = np.asarray(faces)
    if v.size == 0:
        v = v.reshape(0, 3)
    if fc.size == 0:
        fc = fc.reshape(0, 3)
    if v.ndim != 2 or v.shape[1] != 3 or v.dtype.kind not in "biuf":
        raise InputError(f"cannot be read as {fmt}: its vertices are not (x, y, z) numbers "
                         f"(got {v.dtype} of shape {v.shape})", path=path)
    if fc.ndim != 2 or fc.shape[1] != 3 or fc.dtype.kind not in "iu":
        raise InputError(f"cannot be read as {fmt}: its faces are not triangles of vertex "
                         f"numbers (got {fc.dtype} of shape {fc.shape})", path=path)
    return v.astype(np.float64, copy=False), fc.astype(np.int64, copy=False)


#: Peak bytes per byte of a text mesh file (OBJ, ASCII STL, ASCII PLY, OFF) while trimesh
#: parses it and the prisms are built (the text, its tokens, the arrays).
TEXT_MESH_READ_FACTOR = 24
#: Peak bytes per declared vertex and face of a binary mesh file.
MESH_BYTES_PER_VERTEX = 160
MESH_BYTES_PER_FACE = 400
#: PLY property types and their sizes in bytes.
PLY_TYPES = {"char": 1, "int8": 1, "uchar": 1, "uint8": 1, "short": 2, "int16": 2, "ushort": 2,
             "uint16": 2, "int": 4, "int32": 4, "uint": 4, "uint32": 4, "float": 4,
             "float32": 4, "double": 8, "float64": 8}


def _precheck_trimesh(path: Path, suffix: str) -> None:
    """What a mesh file declares, checked against its size and the memory budget before
    trimesh allocates: PLY element counts and property sizes, OFF counts, the triangle
    count of a binary STL, the accessors and buffers of a glTF; the size of text files.
    A ``.gltf`` may refer only to data URIs or to regular files beside it."""
    size = path.stat().st_size
    with open(path, "rb") as fh:
        head = fh.read(1 << 16)
    if suffix == ".ply" and head.startswith(b"ply"):
        _precheck_ply(path, size)
    elif suffix == ".off":
        _precheck_off(path, head, size)
    elif suffix == ".stl" and not head.lstrip().lower().startswith(b"solid") and size >= 84:
        n = int.from_bytes(head[80:84], "little")
        if 84 + 50 * n > size:
            raise InputError(f"damaged or truncated binary STL: it declares {n:,} triangles "
                             f"({84 + 50 * n:,} bytes) but holds {size:,} bytes", path=path)
        check_read_memory(n * MESH_BYTES_PER_FACE, f"{n:,} triangles", path)
        return
    elif suffix in (".glb", ".gltf"):
        _precheck_gltf(path, head, size, suffix)
    check_read_memory(size * TEXT_MESH_READ_FACTOR, f"{size:,} bytes of mesh data", path)


def _precheck_ply(path, size):
    with open(path, "rb") as fh:
        lines = []
        used = 0
        while True:
            raw = fh.readline(1 << 16)
            used += len(raw)
            if not raw or used > HEADER_SCAN_BYTES:
                raise InputError("damaged PLY file: no 'end_header' line", path=path)
            text = raw.decode("latin1").strip()
            lines.append(text)
            if text == "end_header":
                break
        body = size - fh.tell()
    fmt = next((ln.split()[1] for ln in lines if ln.startswith("format ") and len(ln.split()) > 1),
               None)
    if fmt not in ("ascii", "binary_little_endian", "binary_big_endian"):
        raise InputError(f"damaged PLY header: unknown format {fmt!r}", path=path)
    elements = []  # [name, count, fixed bytes, list count bytes]
    for ln in lines:
        tok = ln.split()
        if not tok:
            continue
        if tok[0] == "element" and len(tok) >= 3:
            try:
                count = int(tok[2])
            except ValueError:
                count = -1
            if not 0 <= count <= 2**40:
                raise InputError(f"damaged PLY header: element {tok[1]!r} count {tok[2][:30]!r}",
                                 path=path)
            elements.append([tok[1], count, 0, 0])
        elif tok[0] == "property" and elements and len(tok) >= 3:
            if tok[1] == "list" and len(tok) >= 5:
                elements[-1][3] += PLY_TYPES.get(tok[2], 1)
            else:
                elements[-1][2] += PLY_TYPES.get(tok[1], 1)
    if fmt == "ascii":
        declared = sum(n * 2 * max(1, (fixed > 0) + (lst > 0)) for _, n, fixed, lst in elements)
    else:
        declared = sum(n * (fixed + lst) for _, n, fixed, lst in elements)
    counts = ", ".join(f"{n:,} {name}" for name, n, _, _ in elements)
    check_declared(declared, body, f"{counts} elements", path)
    n_all = sum(n for _, n, _, _ in elements)
    check_read_memory(n_all * MESH_BYTES_PER_FACE, counts or "no elements", path)


def _precheck_off(path, head, size):
    toks = []
    for raw in head.split(b"\n")[:64]:
        line = raw.split(b"#", 1)[0].strip()
        if not line:
            continue
        parts = line.split()
        if not toks and parts[0].upper().endswith(b"OFF"):
            parts = parts[1:]
            if not parts:
                continue
        toks = parts
        break
    try:
        nv, nf = int(toks[0]), int(toks[1])
    except (IndexError, ValueError):
        return  # trimesh says what is wrong
    if nv < 0 or nf < 0:
        raise InputError(f"damaged OFF header: negative counts {nv} vertices, {nf} faces",
                         path=path)
    check_declared(nv * 6 + nf * 8, size, f"{nv:,} vertices and {nf:,} faces", path)
    check_read_memory(nv * MESH_BYTES_PER_VERTEX + nf * MESH_BYTES_PER_FACE,
                      f"{nv:,} vertices and {nf:,} faces", path)


_GLTF_COMPONENTS = {"SCALAR": 1, "VEC2": 2, "VEC3": 3, "VEC4": 4, "MAT2": 4, "MAT3": 9, "MAT4": 16}
_GLTF_BYTES = {5120: 1, 5121: 1, 5122: 2, 5123: 2, 5125: 4, 5126: 4}


def _precheck_gltf(path, head, size, suffix):
    """glTF 2.0: accessors within their buffer views, views within their buffers, buffers
    within the file (GLB) or the data they name; external URIs only to regular files
    beside the ``.gltf``."""
    if suffix == ".glb":
        if len(head) < 20 or head[:4] != b"glTF":
            return  # trimesh says what it is not
        length, kind = struct.unpack("<II", head[12:20])
        if kind != 0x4E4F534A:
            return
        if 20 + length > size:
            raise InputError(f"damaged glTF binary: its JSON chunk claims {length:,} bytes, the "
                             f"file holds {size:,}", path=path)
        with open(path, "rb") as fh:
            fh.seek(20)
            text = fh.read(length)
        bin_len = max(0, size - 20 - length - 8)
    else:
        text = path.read_bytes()
        bin_len = None
    doc = load_json(text, path=path, what="the glTF JSON", expect=dict)
    buffers = doc.get("buffers") or []
    views = doc.get("bufferViews") or []
    accessors = doc.get("accessors") or []
    if not all(isinstance(x, list) for x in (buffers, views, accessors)):
        raise InputError("damaged glTF: 'buffers', 'bufferViews' and 'accessors' must be arrays",
                         path=path)
    blen = []
    for i, b in enumerate(buffers):
        n = b.get("byteLength") if isinstance(b, dict) else None
        if not isinstance(n, int) or isinstance(n, bool) or n < 0:
            raise InputError(f"damaged glTF: buffer {i} has no valid byteLength", path=path)
        uri = b.get("uri")
        if uri is None:
            if bin_len is not None and n > bin_len:
                raise InputError(f"damaged glTF binary: buffer {i} claims {n:,} bytes, the "
                                 f"file holds {bin_len:,} after its JSON", path=path)
        elif not isinstance(uri, str):
            raise InputError(f"damaged glTF: buffer {i} has a uri that is not text", path=path)
        elif not uri.startswith("data:"):
            _check_gltf_uri(path, uri, f"buffer {i}")
        blen.append(n)
    for img in doc.get("images") or []:
        if isinstance(img, dict) and isinstance(img.get("uri"), str) and \
                not img["uri"].startswith("data:"):
            _check_gltf_uri(path, img["uri"], "an image")
    for i, v in enumerate(views):
        if not isinstance(v, dict):
            raise InputError(f"damaged glTF: bufferView {i} is not an object", path=path)
        b, off, n = v.get("buffer"), v.get("byteOffset", 0), v.get("byteLength")
        if not (isinstance(b, int) and 0 <= b < len(blen) and isinstance(off, int) and
                isinstance(n, int) and off >= 0 and n >= 0 and off + n <= blen[b]):
            raise InputError(f"damaged glTF: bufferView {i} does not lie inside its buffer",
                             path=path)
    total = 0
    for i, a in enumerate(accessors):
        if not isinstance(a, dict):
            raise InputError(f"damaged glTF: accessor {i} is not an object", path=path)
        count = a.get("count")
        kind, ctype = a.get("type"), a.get("componentType")
        comps = _GLTF_COMPONENTS.get(kind, 1) if isinstance(kind, str) else 1
        item = _GLTF_BYTES.get(ctype, 4) if isinstance(ctype, int) else 4
        if not isinstance(count, int) or isinstance(count, bool) or not 0 <= count <= 2**40:
            raise InputError(f"damaged glTF: accessor {i} has no valid count", path=path)
        view = a.get("bufferView")
        if isinstance(view, int) and 0 <= view < len(views) and count:
            off = a.get("byteOffset", 0)
            stride = views[view].get("byteStride") or comps * item
            if not (isinstance(off, int) and off >= 0 and isinstance(stride, int) and stride > 0):
                raise InputError(f"damaged glTF: accessor {i} has a bad byteOffset or stride",
                                 path=path)
            if off + (count - 1) * stride + comps * item > views[view]["byteLength"]:
                raise InputError(f"damaged glTF: accessor {i} declares {count:,} items, more "
                                 f"than its bufferView holds", path=path)
        total += count * comps * 8
    check_read_memory(total * 8, f"{len(accessors)} accessors", path)


def _check_gltf_uri(path, uri, what):
    """A glTF's external file: a relative name of a regular file in the glTF's folder."""
    from urllib.parse import unquote
    name = unquote(uri)
    target = (path.parent / name)
    if "://" in uri or Path(name).is_absolute() or ".." in Path(name).parts:
        raise InputError(f"{what} refers to {uri[:80]!r}; a glTF may refer only to files "
                         f"beside it", path=path)
    try:
        check_input_file(target)
    except InputError as e:
        raise InputError(f"{what} refers to {uri[:80]!r}, which {e.detail}", path=path) from None


def _load_trimesh(path: Path):
    import trimesh

    fmt = _FORMAT_NAMES[path.suffix.lower()]
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            loaded = trimesh.load(str(path), process=False)
    except Exception as e:  # trimesh raises many kinds on garbled input
        raise InputError(f"cannot be read as {fmt}: {_short(e)}", path=path) from None
    if isinstance(loaded, trimesh.Scene):
        meshes = [g for g in loaded.dump() if isinstance(g, trimesh.Trimesh)] if loaded.geometry else []
        if not meshes:
            if not loaded.geometry and path.stat().st_size > 0:
                raise InputError(f"has no triangles: nothing could be parsed as {fmt} "
                                 f"(garbled, truncated or empty file?)", path=path)
            return np.zeros((0, 3)), np.zeros((0, 3), dtype=np.int64), {}
        if len(meshes) == 1:
            loaded = meshes[0]
        else:
            loaded = trimesh.util.concatenate(meshes)
    if not isinstance(loaded, trimesh.Trimesh):
        n = len(getattr(loaded, "vertices", ()))
        return np.zeros((n, 3)), np.zeros((0, 3), dtype=np.int64), {}
    vertices = np.asarray(loaded.vertices, dtype=np.float64)
    faces = np.asarray(loaded.faces, dtype=np.int64).reshape(-1, 3)
    arrays = {}
    for k, v in getattr(loaded, "face_attributes", {}).items():
        arrays[k] = np.asarray(v)
    raw = loaded.metadata.get("_ply_raw") if isinstance(loaded.metadata, dict) else None
    if raw and "face" in raw and isinstance(raw["face"].get("data"), dict):
        for k, v in raw["face"]["data"].items():
            v = np.asarray(v)
            if k in ("vertex_indices", "vertex_index") or v.dtype == object:
                continue
            if v.ndim == 2 and v.shape[1] == 1:
                v = v[:, 0]
            if v.shape == (len(faces),):
                arrays[k] = v
    return vertices, faces, arrays


def _load_vtk(path: Path):
    """Points, triangles, per-face arrays and the header of a VTK file, parsed by VTK in a
    child process after its declarations are checked (:mod:`sheetview.io.vtkfiles`)."""

    vertices, faces, arrays, raw = read_mesh_arrays(path)
    found = None
    if raw is not None:
        where = f"VTK field data '{HEADER_FIELD}'"
        remedy = (f"remove the field data array '{HEADER_FIELD}' to read the mesh with an "
                  f"inferred domain")
        if raw[0] == "text":
            found = _found_json(raw[1], where, remedy)
        else:
            found = _Found(MESH_FORMAT_VERSION, _NOT_TEXT, where, remedy)
    return vertices, faces, arrays, found


# ----------------------------------------------------------------------------- header
#: The header sheetview writes into its own mesh files: format name and version.
MESH_MAGIC = "sheetview mesh"
MESH_FORMAT_VERSION = 1
MESH_MARKER = f"{MESH_MAGIC} v{MESH_FORMAT_VERSION}"
#: Name of the VTK field data array and of the glTF scene ``extras`` key holding it.
HEADER_FIELD = "sheetview"
#: Most bytes of leading lines searched for the header comment of a PLY, OBJ or OFF file.
HEADER_SCAN_BYTES = 1 << 24
_COMMENT_RE = re.compile(r"sheetview mesh v(\d+)(?:\s+(.*))?$", re.S)
_FORMAT_RE = re.compile(r"sheetview mesh v(\d+)")
_NOT_TEXT = object()


@dataclasses.dataclass(frozen=True)
class MeshHeader:
    """What a sheetview header gives back: the length factor to nm (``--units``, else the
    header's ``units``), the domain (nm), the spacing (nm) and the metadata."""

    factor: float
    domain: Domain | None
    spacing: float | None
    metadata: dict
    content: str | None = None


@dataclasses.dataclass(frozen=True)
class _Found:
    """A sheetview header found in a file, not yet checked."""

    version: int | None  # None: a damaged version number
    payload: object  # JSON text, a parsed object, or _NOT_TEXT
    where: str  # how the file holds it, for messages
    remedy: str  # how to read the mesh without it
    line: int | None = None


def _found_json(value, where, remedy):
    """A header stored as JSON (VTK field data, glTF extras): ours when it is a JSON
    object without a ``format`` key (files of the first writer) or whose ``format`` is
    ``sheetview mesh vN``; another program's header (another ``format``) is None."""
    obj = value
    if isinstance(value, str):
        try:
            obj = load_json(value)
        except InputError:
            return _Found(MESH_FORMAT_VERSION, value, where, remedy)
    version = MESH_FORMAT_VERSION
    if isinstance(obj, dict) and "format" in obj:
        m = _FORMAT_RE.fullmatch(str(obj["format"]))
        if not m:
            return None
        version = _version(m.group(1))
    return _Found(version, obj, where, remedy)


def _version(digits: str) -> int | None:
    """A header's version number, or None when it is damaged (absurdly long)."""
    return int(digits) if len(digits) <= 6 else None


def _find_text_header(path: Path, suffix: str):
    """The sheetview header of a trimesh-read file, or None: a ``comment sheetview mesh
    vN {...}`` line of a PLY header, a leading ``# sheetview mesh vN {...}`` comment line
    of an OBJ or OFF file, or the ``extras`` of the default scene of a GLB file."""
    if suffix == ".glb":
        return _glb_header(path)
    if suffix not in (".ply", ".obj", ".off"):
        return None
    name = {".ply": "PLY", ".obj": "OBJ", ".off": "OFF"}[suffix]
    try:
        fh = open(path, "rb")
    except OSError:
        return None
    with fh:
        used = 0
        lineno = 0
        while used < HEADER_SCAN_BYTES:
            raw = fh.readline(HEADER_SCAN_BYTES - used)
            if not raw:
                break
            used += len(raw)
            lineno += 1
            text = raw.decode("latin1").strip()
            if suffix == ".ply":
                if lineno == 1:
                    if text != "ply":
                        return None
                    continue
                if text == "end_header":
                    return None
                if not text.startswith("comment"):
                    continue
                body = text[len("comment"):].strip()
            else:
                if lineno == 1 and suffix == ".off" and text.endswith("OFF"):
                    continue
                if not text:
                    continue
                if not text.startswith("#"):
                    return None  # the data begins: the header comes before it
                body = text[1:].strip()
            m = _COMMENT_RE.match(body)
            if m:
                return _Found(_version(m.group(1)), m.group(2) or "", f"{name} comment line",
                              "fix or delete that comment line to read the mesh with an "
                              "inferred domain", lineno)
    return None


def _glb_header(path: Path):
    """The ``sheetview`` key of the default scene's ``extras`` in a binary glTF: the file
    starts with a 12-byte header and a JSON chunk (glTF 2.0 specification, "GLB File
    Format Specification")."""
    try:
        with open(path, "rb") as fh:
            head = fh.read(20)
            if len(head) < 20 or head[:4] != b"glTF":
                return None
            length, kind = struct.unpack("<II", head[12:20])
            if kind != 0x4E4F534A or length > HEADER_SCAN_BYTES:  # "JSON"
                return None
            doc = load_json(fh.read(length))
        scene = doc["scenes"][doc.get("scene", 0)]
        extras = scene.get("extras")
    except (OSError, ValueError, KeyError, IndexError, TypeError, AttributeError, InputError):
        return None  # not readable as glTF: trimesh says why
    if not isinstance(extras, dict) or HEADER_FIELD not in extras:
        return None
    return _found_json(extras[HEADER_FIELD], f"glTF scene extras '{HEADER_FIELD}'",
                       f"remove the scene extras '{HEADER_FIELD}' to read the mesh with an "
                       f"inferred domain")


def _interpret_header(found, path, units) -> MeshHeader | None:
    """Check a found header and turn it into a :class:`MeshHeader`; None when there is none.

    A header that is sheetview's but damaged (not JSON, not an object, a bad domain,
    spacing, units or metadata, a newer version) is refused with an :class:`InputError`
    naming the file, the line (text formats) and the key: reading on with an inferred
    domain would silently change every measure that uses the domain.
    """
    if found is None:
        return None

    def bad(msg, field=HEADER_FIELD):
        raise InputError(f"sheetview header ({found.where}): {msg}; {found.remedy}",
                         path=path, line=found.line, field=field)

    if found.version is None:
        raise InputError(f"sheetview header ({found.where}): its version number is damaged; "
                         f"{found.remedy}", path=path, line=found.line, field=HEADER_FIELD)
    if found.version > MESH_FORMAT_VERSION:
        raise InputError(f"sheetview header ({found.where}) is version {found.version}, newer "
                         f"than this sheetview reads (v{MESH_FORMAT_VERSION}); update sheetview",
                         path=path, line=found.line, field=HEADER_FIELD)
    h = found.payload
    if h is _NOT_TEXT:
        bad("expected one JSON text")
    if isinstance(h, str):
        try:
            h = load_json(h, what="the header")
        except InputError as e:
            bad(e.detail.replace("the header is ", "", 1).replace("the header ", "", 1))
    if not isinstance(h, dict):
        bad(f"expected a JSON object, got {json_type(h)}")
    if units is not None:
        f = unit_factor(units, path=path)
    elif "units" in h:
        u = h["units"]
        if not isinstance(u, str) or u.strip().lower() not in UNITS:
            bad(f'unknown units {json.dumps(u)}; expected "nm", "A" or "um"', "units")
        f = UNITS[u.strip().lower()]
    else:
        f = 1.0
    dom = None
    if h.get("domain") is not None:
        try:
            dom = domain_from_dict(h["domain"], scale=f)
        except InputError as e:
            bad(f"domain: {e.detail}", "domain")
        inferred = h.get("domain_inferred", False)
        if not isinstance(inferred, bool):
            bad(f'"domain_inferred" must be true or false, got {json.dumps(inferred)}',
                "domain_inferred")
        if inferred:
            dom = dataclasses.replace(dom, inferred=True)
    sp = None
    if h.get("spacing") is not None:
        v = h["spacing"]
        if finite_number(v) is None or not 0 < float(v) * f <= MAX_LENGTH_NM:
            bad(f"spacing must be a positive number, got {json.dumps(v)[:40]}", "spacing")
        sp = float(v) * f
    meta = h.get("metadata")
    if meta is None:
        meta = {}
    elif not isinstance(meta, dict):
        bad(f"metadata must be a JSON object, got {json_type(meta)}", "metadata")
    content = h.get("content")
    if content is not None and content != CONTENT_PRISMS:
        bad(f'"content" must be "{CONTENT_PRISMS}" when present, got '
            f'{json.dumps(content)[:40]}', "content")
    return MeshHeader(f, dom, sp, meta, content)


def mesh_header(obj) -> dict:
    """The header written into a mesh file made from a Structure or a SurfaceBody:
    format, units (nm), spacing (Structure only), domain, ``domain_inferred`` and metadata."""
    h = {"format": MESH_MARKER, "units": "nm"}
    if isinstance(obj, Structure):
        h["spacing"] = obj.spacing
    h["domain"] = obj.domain.to_dict()
    h["domain_inferred"] = bool(obj.domain.inferred)
    h["metadata"] = obj.metadata
    return h


def header_array(text: str) -> np.ndarray:
    """The header as VTK field data: its UTF-8 bytes as an unsigned-char array (a string
    array is stored in a form that readers other than VTK's own, such as meshio, cannot
    parse; :mod:`sheetview.io.vtkfiles` reads both)."""
    return np.frombuffer(text.encode("utf-8"), dtype=np.uint8).copy()


def _header_json(header: dict) -> str:
    """The header as one line of ASCII JSON. Inside its strings, ``end_header`` and
    ``texturefile`` are written with one JSON ``\\u`` escape (same value), so that PLY
    readers that look for those words anywhere in a header line are not misled."""
    text = json.dumps(header, default=json_default, ensure_ascii=True)
    text = re.sub(r"(?i)(end)_(header)", lambda m: m.group(1) + "\\u005f" + m.group(2), text)
    return re.sub(r"(?i)(texturefil)(e)", lambda m: m.group(1) + "\\u%04x" % ord(m.group(2)), text)


def _comment_line(header: dict) -> str:
    """``sheetview mesh v1 {JSON}``: the text after a PLY ``comment`` or an OBJ/OFF ``#``."""
    body = {k: v for k, v in header.items() if k != "format"}
    return f"{MESH_MARKER} {_header_json(body)}"


def _merge(vertices: np.ndarray, faces: np.ndarray):
    """Merge vertices with identical coordinates (exact match); face order is kept.

    Rows are sorted by a 64-bit hash of their bit patterns (one ``argsort``), and rows
    with equal hashes are checked to be equal; on a hash collision it falls back to a
    ``np.lexsort`` over the coordinates. Either is several times faster than
    ``np.unique(axis=0)`` on millions of rows. Coordinates must be finite.
    """
    v = np.ascontiguousarray(vertices, dtype=np.float64) + 0.0  # -0.0 -> 0.0
    if len(v) == 0:
        return v, faces
    bits = v.view(np.uint64)
    h = bits[:, 0] * np.uint64(0x9E3779B97F4A7C15)
    h ^= (h >> np.uint64(31)) + bits[:, 1] * np.uint64(0xC2B2AE3D27D4EB4F)
    h ^= (h >> np.uint64(29)) + bits[:, 2] * np.uint64(0x165667B19E3779F9)
    order = np.argsort(h)
    hs = h[order]
    sv_ = v[order]
    new = np.empty(len(v), dtype=bool)
    new[0] = True
    np.not_equal(hs[1:], hs[:-1], out=new[1:])
    same = ~new[1:]
    if not np.array_equal(sv_[1:][same], sv_[:-1][same]):  # collision: sort exactly
        order = np.lexsort((v[:, 2], v[:, 1], v[:, 0]))
        sv_ = v[order]
        np.any(sv_[1:] != sv_[:-1], axis=1, out=new[1:])
    ids = np.cumsum(new) - 1
    inv = np.empty(len(v), dtype=np.int64)
    inv[order] = ids
    return sv_[new], inv[faces]


def _is_closed(vertices: np.ndarray, faces: np.ndarray) -> bool:
    """True when, after merging coincident vertices, every edge joins exactly two faces
    that traverse it in opposite directions (watertight and consistently wound).

    Test: every directed edge occurs once, and every undirected edge exactly twice
    (so its two uses run in opposite directions).
    """
    _, f = _merge(vertices, faces)
    edges = np.stack([f[:, [0, 1]], f[:, [1, 2]], f[:, [2, 0]]], axis=1).reshape(-1, 2)
    if np.any(edges[:, 0] == edges[:, 1]) or len(edges) % 2:
        return False
    n = int(f.max()) + 1
    directed = np.sort(edges[:, 0] * n + edges[:, 1])
    if np.any(directed[1:] == directed[:-1]):
        return False
    undirected = np.sort(edges.min(axis=1) * n + edges.max(axis=1))
    pairs_equal = np.all(undirected[0::2] == undirected[1::2])
    no_triples = np.all(undirected[2::2] != undirected[1:-1:2])
    return bool(pairs_equal and no_triples)


def _check_degenerate(tri: np.ndarray, path):
    cross = np.cross(tri[:, 1] - tri[:, 0], tri[:, 2] - tri[:, 0])
    area = 0.5 * np.linalg.norm(cross, axis=1)
    scale = np.linalg.norm(np.roll(tri, -1, axis=1) - tri, axis=2).max(axis=1) ** 2
    from ..structure import DEGENERATE_REL_AREA
    bad = area <= DEGENERATE_REL_AREA * np.maximum(scale, 1e-300)
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        raise InputError(f"face row {i + 1}: degenerate triangle (zero area: corners coincide "
                         f"or are collinear; {int(bad.sum())} face(s) affected)", path=path)


# ----------------------------------------------------------------------------- writing
#: Cells of one prism over its corners 0-2 (bottom a, b, c) and 3-5 (top a', b', c'),
#: wound so that every normal points out of the prism when a, b, c turn
#: counter-clockwise about the prism normal: bottom (reversed), top, three side quads.
PRISM_TRIANGLES = np.array([[0, 2, 1], [3, 4, 5]], dtype=np.int64)
PRISM_QUADS = np.array([[0, 1, 4, 3], [1, 2, 5, 4], [2, 0, 3, 5]], dtype=np.int64)
CELLS_PER_PRISM = 5


def prism_surface_triangles() -> np.ndarray:
    """The closed surface of one prism as 8 outward-wound triangles over its 6 corners
    (order of :meth:`Structure.prism_corners`)."""
    q = PRISM_QUADS
    return np.concatenate([PRISM_TRIANGLES, q[:, [0, 1, 2]], q[:, [0, 2, 3]]])


def prism_polydata(structure: Structure):
    """The prisms of ``structure`` as a pyvista PolyData of closed solids.

    Each prism has 6 points (bottom a, b, c then top a', b', c') and 5 cells (bottom and
    top triangles, three side quads), outward wound. Cell data: ``prism_id`` (0-based
    row), ``thickness``, ``area``, ``volume``, ``normal`` (3 components) and every column
    of the structure (``sheet``, ``born``, ``tag`` and extra ones), each repeated over the
    prism's 5 cells. Built without a Python loop over prisms.
    """
    import pyvista as pv

    n = len(structure)
    pts = structure.prism_corners().reshape(-1, 3) if n else np.zeros((0, 3))
    base = (6 * np.arange(n, dtype=np.int64))[:, None]
    tris = np.concatenate([np.full((n, 2, 1), 3, np.int64),
                           base[:, :, None] + PRISM_TRIANGLES[None]], axis=2).reshape(n, 8)
    quads = np.concatenate([np.full((n, 3, 1), 4, np.int64),
                            base[:, :, None] + PRISM_QUADS[None]], axis=2).reshape(n, 15)
    faces = np.concatenate([tris, quads], axis=1).ravel()  # 23 ints per prism
    poly = pv.PolyData(pts, faces=faces)
    if n == 0:
        return poly  # pyvista refuses empty (0, 3) cell arrays
    rep = lambda a: np.repeat(np.asarray(a), CELLS_PER_PRISM, axis=0)  # noqa: E731
    poly.cell_data["prism_id"] = rep(np.arange(n, dtype=np.int64))
    poly.cell_data["thickness"] = rep(structure.thickness)
    poly.cell_data["area"] = rep(structure.areas)
    poly.cell_data["volume"] = rep(structure.volumes)
    poly.cell_data["normal"] = rep(structure.normals)
    for name in sorted(structure.columns):
        col = np.asarray(structure.columns[name])
        if col.dtype.kind in "biuf":
            poly.cell_data[name] = rep(col)
    return poly


def prism_wedges(structure: Structure):
    """The prisms of ``structure`` as a pyvista UnstructuredGrid of wedge cells (VTK_WEDGE,
    one cell per prism, points in the order of :meth:`Structure.prism_corners`: bottom a,
    b, c then top; VTK's wedge volume of each cell is the prism's area x thickness exactly).
    Cell data as :func:`prism_polydata`, once per prism."""
    import pyvista as pv

    n = len(structure)
    pts = structure.prism_corners().reshape(-1, 3) if n else np.zeros((0, 3))
    cells = np.concatenate([np.full((n, 1), 6, np.int64),
                            6 * np.arange(n, dtype=np.int64)[:, None] + np.arange(6)[None]],
                           axis=1).ravel()
    grid = pv.UnstructuredGrid(cells, np.full(n, pv.CellType.WEDGE, np.uint8), pts)
    if n == 0:
        return grid
    grid.cell_data["prism_id"] = np.arange(n, dtype=np.int64)
    grid.cell_data["thickness"] = np.asarray(structure.thickness, float)
    grid.cell_data["area"] = np.asarray(structure.areas, float)
    grid.cell_data["volume"] = np.asarray(structure.volumes, float)
    grid.cell_data["normal"] = np.asarray(structure.normals, float)
    for name in sorted(structure.columns):
        col = np.asarray(structure.columns[name])
        if col.dtype.kind in "biuf":
            grid.cell_data[name] = col
    return grid


#: The header key saying a VTK file holds sheetview prisms (read back as prisms).
CONTENT_PRISMS = "prisms"


def write_prisms_vtk(structure: Structure, path, *, force: bool = False) -> Path:
    """Write the prisms for general-purpose viewers, by suffix: closed solids in VTK
    PolyData, binary XML ``.vtp`` (appended raw data, zlib-compressed, see
    :func:`write_vtk_xml`) or legacy binary ``.vtk``; or volume cells (wedges) in an XML
    unstructured grid ``.vtu``. Written through :func:`~sheetview.io.output.atomic_path`.

    See :func:`prism_polydata` and :func:`prism_wedges` for the content. The header
    (:func:`mesh_header`: spacing, domain, ``domain_inferred``, metadata, and
    ``"content": "prisms"``) goes into field data ``sheetview`` as a JSON string;
    :func:`read_mesh` reads such a file back as the same prisms.
    """
    path = Path(path)
    suffix = path.suffix.lower()
    if suffix not in (".vtp", ".vtk", ".vtu"):
        raise OptionError(f"prisms are written to VTK as .vtp, .vtk or .vtu, not {suffix!r}",
                          path=path)
    data = prism_wedges(structure) if suffix == ".vtu" else prism_polydata(structure)
    header = {**mesh_header(structure), "content": CONTENT_PRISMS}
    data.field_data[HEADER_FIELD] = header_array(_header_json(header))
    _save_vtk(data, path, suffix, force)
    return path


def _save_vtk(poly, path, suffix, force) -> None:
    """Write a dataset as XML (.vtp, .vtu: appended raw) or legacy binary .vtk, atomically."""
    with atomic_path(path, force) as tmp:
        if suffix in (".vtp", ".vtu"):
            write_vtk_xml(poly, tmp)
        else:
            with _quiet_vtk():
                poly.save(str(tmp), binary=True)


def write_vtk_xml(dataset, fname) -> None:
    """Write a pyvista dataset as VTK XML (``.vtp``, ``.vti``, ``.vtu``) in appended raw
    binary with zlib compression and 64-bit block headers: much faster than base64 inline
    data and smaller; zlib is the compressor every VTK XML reader knows (VTK itself,
    ParaView, meshio), unlike LZ4."""
    from vtkmodules import vtkIOXML

    import pyvista as pv

    writers = {pv.PolyData: "vtkXMLPolyDataWriter", pv.ImageData: "vtkXMLImageDataWriter",
               pv.UnstructuredGrid: "vtkXMLUnstructuredGridWriter"}
    cls = next((getattr(vtkIOXML, w) for t, w in writers.items() if isinstance(dataset, t)), None)
    if cls is None:
        raise TypeError(f"no XML writer for {type(dataset).__name__}")
    w = cls()
    w.SetInputData(dataset)
    w.SetFileName(str(fname))
    w.SetDataModeToAppended()
    w.EncodeAppendedDataOff()
    w.SetHeaderTypeToUInt64()
    w.SetCompressorTypeToZLib()
    with _quiet_vtk() as catcher:
        ok = w.Write()
    errors = [str(getattr(ev, "alert", ev)) for ev in getattr(catcher, "error_events", [])]
    if not ok or errors:
        raise SheetviewError(f"VTK could not write the file: "
                             f"{_short(errors[0]) if errors else 'unknown error'}", path=fname)



BODY_SUFFIXES = {".stl", ".ply", ".obj", ".off", ".glb", ".vtp", ".vtk"}


def write_body(body: SurfaceBody, path, *, force: bool = False) -> Path:
    """Write a SurfaceBody, lengths in nm: STL (binary, float32) and GLB (float32) through
    trimesh, OBJ and OFF (17 significant digits) through trimesh, PLY (binary, float64),
    or VTK PolyData (``.vtp`` / legacy ``.vtk``, float64) through pyvista.

    Every form but STL also carries the header (:func:`mesh_header`: domain,
    ``domain_inferred``, metadata), which :func:`read_mesh` gives back: VTK field data
    ``sheetview``, a PLY ``comment``, a leading OBJ/OFF ``#`` comment line, the GLB
    default scene's ``extras``. Binary STL has no room for it (an 80-byte header).
    """
    path = Path(path)
    suffix = path.suffix.lower()
    if not isinstance(body, SurfaceBody):
        raise OptionError(f"cannot write a {type(body).__name__} as a mesh", path=path)
    if suffix not in BODY_SUFFIXES:
        raise OptionError(f"cannot write a surface body as {suffix or '(no suffix)'!r}; use "
                          f"{', '.join(sorted(BODY_SUFFIXES))}", path=path)
    header = mesh_header(body)
    if suffix in (".vtp", ".vtk"):
        import pyvista as pv

        poly = pv.PolyData.from_regular_faces(np.asarray(body.vertices), np.asarray(body.faces))
        poly.field_data[HEADER_FIELD] = header_array(_header_json(header))
        _save_vtk(poly, path, suffix, force)
        return path
    if suffix == ".ply":
        with atomic_path(path, force) as tmp:
            _write_ply_double(tmp, np.asarray(body.vertices), np.asarray(body.faces),
                              _comment_line(header))
        return path
    mesh = body.to_trimesh()
    if suffix == ".obj":
        from trimesh.exchange.obj import export_obj

        data = export_obj(mesh, include_normals=False, include_color=False,
                          include_texture=False, digits=17)
        data = f"# {_comment_line(header)}\n" + data
    elif suffix == ".off":
        from trimesh.exchange.off import export_off

        first, _, rest = export_off(mesh, digits=17).partition("\n")
        data = f"{first}\n# {_comment_line(header)}\n{rest}"
    elif suffix == ".glb":  # float32 by definition; the header in the scene's extras
        import trimesh

        scene = trimesh.Scene(mesh)
        scene.metadata[HEADER_FIELD] = _header_json(header)
        data = scene.export(file_type="glb")
    else:  # binary STL: float32 by definition, no header
        data = mesh.export(file_type=suffix.lstrip("."))
    with atomic_path(path, force) as tmp:
        mode = "w" if isinstance(data, str) else "wb"
        with open(tmp, mode) as fh:
            fh.write(data)
    return path


def _write_ply_double(fname, vertices: np.ndarray, faces: np.ndarray, comment: str | None = None) -> None:
    """Binary little-endian PLY with float64 vertices (exact round trip) and int32 faces;
    ``comment`` (one line of ASCII) is written as a further ``comment`` line."""
    extra = f"comment {comment}\n" if comment else ""
    header = ("ply\nformat binary_little_endian 1.0\ncomment written by sheetview, lengths in nm\n"
              f"{extra}element vertex {len(vertices)}\nproperty double x\nproperty double y\n"
              f"property double z\nelement face {len(faces)}\n"
              "property list uchar int vertex_indices\nend_header\n")
    fdt = np.dtype([("n", "u1"), ("idx", "<i4", (3,))])
    frec = np.empty(len(faces), dtype=fdt)
    frec["n"] = 3
    frec["idx"] = faces
    with open(fname, "wb") as fh:
        fh.write(header.encode("ascii"))
        fh.write(np.ascontiguousarray(vertices, dtype="<f8").tobytes())
        fh.write(frec.tobytes())
