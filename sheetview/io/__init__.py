"""Readers and writers. :func:`read` picks the reader from the file's suffix.

Families: ``prisms`` (native table: CSV, NPZ, Parquet), ``meshes`` (STL, PLY, OBJ, OFF,
GLB/GLTF through trimesh; VTK files through pyvista) and ``volumes`` (TIFF, NPY, raw,
VTI). A reader returns a :class:`~sheetview.structure.Structure`, a
:class:`~sheetview.structure.SurfaceBody` or a :class:`~sheetview.grid.PhaseGrid`.
"""
from __future__ import annotations

from pathlib import Path

from ..errors import InputError, OptionError

PRISM_SUFFIXES = {".csv", ".txt", ".npz", ".parquet", ".pq"}
MESH_SUFFIXES = {".stl", ".ply", ".obj", ".off", ".glb", ".gltf", ".vtk", ".vtp", ".vtu"}
VOLUME_SUFFIXES = {".tif", ".tiff", ".npy", ".raw", ".vti"}


def family_of(path) -> str:
    suffix = Path(path).suffix.lower()
    if suffix in PRISM_SUFFIXES:
        return "prisms"
    if suffix in MESH_SUFFIXES:
        return "meshes"
    if suffix in VOLUME_SUFFIXES:
        return "volumes"
    known = sorted(PRISM_SUFFIXES | MESH_SUFFIXES | VOLUME_SUFFIXES)
    raise InputError(f"unknown file type {suffix or '(no suffix)'!r}; sheetview reads "
                     f"{', '.join(known)}", path=path)


def read(path, **options):
    """Read any supported file.

    Options by family (others are refused with a clear message):

    * prisms: ``thickness``, ``spacing`` (nm) and ``units`` override the header;
    * meshes: ``thickness``, ``spacing``, ``units``, ``as_`` ("sheets", "solid" or None
      for automatic);
    * volumes: ``voxel_size`` (nm), ``phases`` (mapping of file value -> phase name),
      ``shape`` and ``dtype`` for raw files, ``units``.
    """
    path = Path(path)
    if not path.exists():
        raise InputError("no such file", path=path)
    if path.is_dir():
        raise InputError("is a folder, expected a file", path=path)
    fam = family_of(path)
    options = {k: v for k, v in options.items() if v is not None}
    if fam == "prisms":
        from . import prisms
        _only(options, {"thickness", "spacing", "units"}, path, fam)
        prisms.check_options(options.get("thickness"), options.get("spacing"))
        return prisms.READERS[path.suffix.lower()](path, **options)
    if fam == "meshes":
        from . import meshes
        _only(options, {"thickness", "spacing", "units", "as_"}, path, fam)
        return meshes.read_mesh(path, **options)
    from . import volumes
    _only(options, {"voxel_size", "phases", "shape", "dtype", "units", "byte_order"}, path, fam)
    return volumes.read_volume(path, **options)


def _only(options, allowed, path, fam):
    extra = set(options) - allowed
    if extra:
        names = ", ".join("--" + e.rstrip("_").replace("_", "-") for e in sorted(extra))
        raise OptionError(f"option(s) {names} do not apply to {fam} files", path=path)


def write(obj, path, *, force: bool = False):
    """Write a Structure (prism table or VTK PolyData), a SurfaceBody (mesh) or a
    PhaseGrid (.vti/.npy/.tif), chosen by suffix. Refuses to overwrite unless ``force``."""
    from ..grid import PhaseGrid
    from ..structure import Structure

    path = Path(path)
    suffix = path.suffix.lower()
    if isinstance(obj, Structure):
        from . import prisms
        if suffix in prisms.WRITERS:
            return prisms.WRITERS[suffix](obj, path, force=force)
        if suffix in {".vtp", ".vtk"}:
            from . import meshes
            return meshes.write_prisms_vtk(obj, path, force=force)
        raise OptionError(f"cannot write prisms as {suffix or '(no suffix)'!r}; use .csv, .npz, "
                          f".parquet, or .vtp/.vtk for general-purpose viewers", path=path)
    if isinstance(obj, PhaseGrid):
        from . import volumes
        return volumes.write_volume(obj, path, force=force)
    from . import meshes
    return meshes.write_body(obj, path, force=force)
