"""Triangle meshes: read as sheets (a Structure) or as a solid body (a SurfaceBody).

Readers
-------
* STL, PLY, OBJ, OFF, GLB/GLTF through trimesh (a scene's geometries are concatenated,
  with their transforms applied);
* VTK files (``.vtk`` legacy, ``.vtp``, ``.vtu``) through pyvista: the outer surface is
  extracted and its polygons are split into triangles.

What becomes what
-----------------
* An **open** surface is a set of sheet mid-surfaces: each triangle becomes one prism, in
  file order. The thickness comes from the ``thickness`` option (nm), else from a
  per-face array named ``thickness`` (VTK cell data, a PLY face property), else the
  reading stops and asks for ``--thickness``. Per-face arrays named ``sheet``, ``born``
  and ``tag`` are kept as prism columns. The domain is the padded bounding box
  (:func:`sheetview.structure.with_inferred_domain`), marked as inferred.
* A **closed** (watertight, consistently wound) surface is a solid body: a
  :class:`~sheetview.structure.SurfaceBody` whose domain is its bounding box padded by
  one nominal repeat (the ``spacing`` option, default 1.4 nm), marked as inferred.

``as_="sheets"`` or ``as_="solid"`` forces a reading (a solid reading of a surface that is
not closed is refused). ``units`` gives the length unit of the file (nm, A, um); lengths
are converted to nm. Options given in nm (``thickness``, ``spacing``) are not scaled.

Writers
-------
* :func:`write_prisms_vtk`: the closed prism solids of a Structure as VTK PolyData
  (``.vtp`` binary XML, or legacy ``.vtk``) with every per-prism quantity as cell data;
* :func:`write_body`: a SurfaceBody as STL, PLY, OBJ, OFF, GLB (trimesh) or VTP/VTK
  (pyvista).
"""
from __future__ import annotations

import contextlib
import re
import warnings
from pathlib import Path

import numpy as np

from ..domain import bounding_box
from ..errors import InputError, OptionError, SheetviewError
from ..structure import DEFAULT_SPACING_NM, KNOWN_COLUMNS, Structure, SurfaceBody, with_inferred_domain
from .output import atomic_path
from .prisms import unit_factor

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
        a sheet reading, a solid reading of an open surface.
    """
    path = Path(path)
    suffix = path.suffix.lower()
    if as_ not in (None, "auto", "sheets", "solid"):
        raise OptionError(f"--as must be 'sheets' or 'solid', not {as_!r}", path=path)
    for name, v in (("thickness", thickness), ("spacing", spacing)):
        if v is not None and not (np.isfinite(v) and v > 0):
            raise OptionError(f"--{name} must be a positive number of nm, got {v}", path=path)
    f = unit_factor(units if units is not None else "nm", path=path)
    if suffix in VTK_SUFFIXES:
        vertices, faces, face_arrays = _load_vtk(path)
    elif suffix in TRIMESH_SUFFIXES:
        vertices, faces, face_arrays = _load_trimesh(path)
    else:
        raise InputError(f"not a mesh file suffix {suffix!r}", path=path)

    if faces.shape[0] == 0:
        raise InputError(f"has no triangles (the {_FORMAT_NAMES[suffix]} file holds "
                         f"{len(vertices)} points and no faces)", path=path)
    if faces.min() < 0 or faces.max() >= len(vertices):
        raise InputError("a face refers to a vertex that does not exist", path=path)
    tri = vertices[faces]  # (N, 3, 3), file order
    bad = ~np.all(np.isfinite(tri.reshape(len(tri), 9)), axis=1)
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        raise InputError(f"face row {i + 1}: corner coordinates must be finite numbers "
                         f"(found NaN or inf; {int(bad.sum())} face(s) affected)", path=path)
    if f != 1.0:
        vertices = vertices * f
        tri = tri * f

    closed = None
    if as_ in (None, "auto"):
        closed = _is_closed(vertices, faces)
        reading = "solid" if closed else "sheets"
    else:
        reading = as_
    meta = {"source_format": suffix.lstrip(".")}
    if reading == "solid":
        if closed is None:
            closed = _is_closed(vertices, faces)
        if not closed:
            raise InputError("is not a closed surface (some edges do not join exactly two "
                             "consistently wound faces), so it cannot be read as a solid; "
                             "read it as sheets (--as sheets) or repair the mesh", path=path)
        v_m, f_m = _merge(vertices, faces)
        _check_degenerate(v_m[f_m], path)
        pad = spacing if spacing is not None else DEFAULT_SPACING_NM
        return SurfaceBody(v_m, f_m, bounding_box(v_m, pad), meta, str(path))

    # sheets
    if thickness is not None:
        thick = np.full(len(tri), float(thickness))
    elif "thickness" in face_arrays:
        thick = np.asarray(face_arrays["thickness"], dtype=np.float64) * f
    else:
        raise InputError(f"no sheet thickness: a mesh read as sheets needs --thickness <nm> "
                         f"(or a per-face array named 'thickness'); the {len(tri)} triangles "
                         f"are the mid-surfaces of the sheets", path=path)
    cols = {}
    for name in KEPT_FACE_ARRAYS:
        if name in face_arrays:
            a = np.asarray(face_arrays[name])
            if KNOWN_COLUMNS[name] is np.int64 and a.dtype.kind == "f":
                if not np.all(np.isfinite(a)) or np.any(a != np.round(a)):
                    raise InputError(f"per-face array '{name}' must hold whole numbers",
                                     path=path, field=name)
            cols[name] = a
    sp = spacing if spacing is not None else DEFAULT_SPACING_NM
    s = Structure(tri, thick, with_inferred_domain(tri, thick), sp, cols, meta, str(path))
    try:
        s.validate()
    except InputError as e:
        raise InputError(e.detail.replace("prism row", "face row"), path=path,
                         field=e.field) from None
    return s


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


@contextlib.contextmanager
def _quiet_vtk():
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


def _load_vtk(path: Path):
    import pyvista as pv

    fmt = _FORMAT_NAMES[path.suffix.lower()]
    mesh = None
    err = None
    with _quiet_vtk() as catcher:
        try:
            mesh = pv.read(str(path))
        except Exception as e:
            err = _short(e)
    errors = [str(getattr(ev, "alert", ev)) for ev in getattr(catcher, "error_events", [])]
    if mesh is None or (errors and mesh.n_points == 0):
        why = err or (errors[0] if errors else "unknown error")
        raise InputError(f"cannot be read as {fmt}: {_short(why)}", path=path)
    if isinstance(mesh, pv.MultiBlock):
        mesh = mesh.combine()
    if mesh.n_cells == 0:
        return np.array(mesh.points, dtype=np.float64).reshape(-1, 3), np.zeros((0, 3), np.int64), {}
    with _quiet_vtk():
        if not isinstance(mesh, pv.PolyData):
            mesh = mesh.extract_surface()
        mesh = _polygons_only(mesh)
        if mesh.n_cells == 0:
            return np.array(mesh.points, dtype=np.float64).reshape(-1, 3), np.zeros((0, 3), np.int64), {}
        surf = mesh.triangulate()
    # copies: views into VTK memory must not outlive the dataset
    faces = np.array(surf.regular_faces, dtype=np.int64).reshape(-1, 3)
    arrays = {k: np.array(surf.cell_data[k]) for k in surf.cell_data.keys()
              if np.asarray(surf.cell_data[k]).ndim == 1}
    return np.array(surf.points, dtype=np.float64), faces, arrays


def _polygons_only(poly):
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


def _short(e) -> str:
    s = str(e).strip().splitlines()
    s = s[0] if s else type(e).__name__
    s = re.sub(r"\s*\(0x[0-9a-f]+\)", "", s)
    return s[:200]


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


def write_prisms_vtk(structure: Structure, path, *, force: bool = False) -> Path:
    """Write the prisms as closed solids in VTK PolyData: binary XML ``.vtp`` (appended raw
    data, LZ4-compressed, see :func:`write_vtk_xml`) or legacy binary ``.vtk`` (by suffix),
    through :func:`~sheetview.io.output.atomic_path`.

    See :func:`prism_polydata` for the content. The spacing, domain and metadata go into
    field data ``sheetview`` as a JSON string.
    """
    import json

    path = Path(path)
    suffix = path.suffix.lower()
    if suffix not in (".vtp", ".vtk"):
        raise OptionError(f"prisms are written to VTK as .vtp or .vtk, not {suffix!r}", path=path)
    poly = prism_polydata(structure)
    header = {"spacing": structure.spacing, "domain": structure.domain.to_dict(),
              "domain_inferred": bool(structure.domain.inferred), "metadata": structure.metadata}
    poly.field_data["sheetview"] = np.array([json.dumps(header, default=_json_default)])
    _save_vtk(poly, path, suffix, force)
    return path


def _save_vtk(poly, path, suffix, force) -> None:
    """Write a PolyData as .vtp (appended raw XML) or legacy binary .vtk, atomically."""
    with atomic_path(path, force) as tmp:
        if suffix == ".vtp":
            write_vtk_xml(poly, tmp)
        else:
            with _quiet_vtk():
                poly.save(str(tmp), binary=True)


def write_vtk_xml(dataset, fname) -> None:
    """Write a pyvista dataset as VTK XML (``.vtp``, ``.vti``...) in appended raw binary
    with LZ4 compression and 64-bit block headers: several times faster than base64
    inline data and about half the size; read by every VTK-based viewer (VTK >= 8.2)."""
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
    w.SetCompressorTypeToLZ4()
    with _quiet_vtk() as catcher:
        ok = w.Write()
    errors = [str(getattr(ev, "alert", ev)) for ev in getattr(catcher, "error_events", [])]
    if not ok or errors:
        raise SheetviewError(f"VTK could not write the file: "
                             f"{_short(errors[0]) if errors else 'unknown error'}", path=fname)


def _json_default(o):
    if isinstance(o, np.generic):
        return o.item()
    if isinstance(o, np.ndarray):
        return o.tolist()
    return str(o)


BODY_SUFFIXES = {".stl", ".ply", ".obj", ".off", ".glb", ".vtp", ".vtk"}


def write_body(body: SurfaceBody, path, *, force: bool = False) -> Path:
    """Write a SurfaceBody, lengths in nm: STL (binary, float32) and GLB (float32) through
    trimesh, OBJ and OFF (17 significant digits) through trimesh, PLY (binary, float64),
    or VTK PolyData (``.vtp`` / legacy ``.vtk``, float64) through pyvista."""
    path = Path(path)
    suffix = path.suffix.lower()
    if not isinstance(body, SurfaceBody):
        raise OptionError(f"cannot write a {type(body).__name__} as a mesh", path=path)
    if suffix not in BODY_SUFFIXES:
        raise OptionError(f"cannot write a surface body as {suffix or '(no suffix)'!r}; use "
                          f"{', '.join(sorted(BODY_SUFFIXES))}", path=path)
    if suffix in (".vtp", ".vtk"):
        import pyvista as pv

        poly = pv.PolyData.from_regular_faces(np.asarray(body.vertices), np.asarray(body.faces))
        _save_vtk(poly, path, suffix, force)
        return path
    if suffix == ".ply":
        with atomic_path(path, force) as tmp:
            _write_ply_double(tmp, np.asarray(body.vertices), np.asarray(body.faces))
        return path
    mesh = body.to_trimesh()
    if suffix == ".obj":
        from trimesh.exchange.obj import export_obj

        data = export_obj(mesh, include_normals=False, include_color=False,
                          include_texture=False, digits=17)
    elif suffix == ".off":
        from trimesh.exchange.off import export_off

        data = export_off(mesh, digits=17)
    else:  # STL and GLB hold float32 by definition
        data = mesh.export(file_type=suffix.lstrip("."))
    with atomic_path(path, force) as tmp:
        mode = "w" if isinstance(data, str) else "wb"
        with open(tmp, mode) as fh:
            fh.write(data)
    return path


def _write_ply_double(fname, vertices: np.ndarray, faces: np.ndarray) -> None:
    """Binary little-endian PLY with float64 vertices (exact round trip) and int32 faces."""
    header = ("ply\nformat binary_little_endian 1.0\ncomment written by sheetview, lengths in nm\n"
              f"element vertex {len(vertices)}\nproperty double x\nproperty double y\n"
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
