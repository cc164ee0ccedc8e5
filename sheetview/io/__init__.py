"""Readers and writers. :func:`read` picks the reader from the file's suffix.

Families: ``prisms`` (native table: CSV, NPZ, Parquet), ``meshes`` (STL, PLY, OBJ, OFF,
GLB/GLTF through trimesh; VTK files through pyvista) and ``volumes`` (TIFF, NPY, raw,
VTI). A reader returns a :class:`~sheetview.structure.Structure`, a
:class:`~sheetview.structure.SurfaceBody` or a :class:`~sheetview.grid.PhaseGrid`.

Bad input (docs/reliability.md): :mod:`.safety` holds what every reader does first (regular
files only, JSON checked, declared sizes against the file and the memory budget, library
noise off); :mod:`.vtkfiles` and :mod:`.isolate` check VTK files and parse them in a child
process; :func:`guarded` turns anything unforeseen into one line naming the file.
"""
from __future__ import annotations

from pathlib import Path

from ..errors import InputError, MemoryLimitError, OptionError, SheetviewError
from .safety import check_input_file, quiet

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

    * prisms: ``thickness``, ``spacing`` (nm) and ``units`` override the header; a table
      with particle columns (``x, y, z``...) is a particle table
      (:mod:`sheetview.io.particles`): a ParticleSet, or the prisms of layered particles;
    * meshes: ``thickness``, ``spacing``, ``units``, ``as_`` ("sheets", "solid" or None
      for automatic);
    * volumes: ``voxel_size`` (nm), ``phases`` (mapping of file value -> phase name),
      ``shape`` and ``dtype`` for raw files, ``units``.

    Anything but a readable regular file (after following links) is refused at once
    (:func:`~sheetview.io.safety.check_input_file`); the reader runs under
    :func:`guarded`: every failure is a :class:`SheetviewError` naming the file.
    """
    path = check_input_file(path)
    fam = family_of(path)
    options = {k: v for k, v in options.items() if v is not None}
    if fam == "prisms":
        from . import prisms
        _only(options, {"thickness", "spacing", "units"}, path, fam)
        prisms.check_options(options.get("thickness"), options.get("spacing"))
        reader = prisms.READERS[path.suffix.lower()]
        from . import particles
        if particles.is_particle_table(path):  # same suffixes; told apart by the columns
            reader = particles.READERS[path.suffix.lower()]
    elif fam == "meshes":
        from . import meshes
        _only(options, {"thickness", "spacing", "units", "as_"}, path, fam)
        reader = meshes.read_mesh
    else:
        from . import volumes
        _only(options, {"voxel_size", "phases", "shape", "dtype", "units", "byte_order"}, path,
              fam)
        reader = volumes.read_volume
    return guarded(reader, path, **options)


#: Words that mark the message of the catch-all in :func:`guarded` (the fuzz tests count
#: how often a reader needed it: never, so far).
UNEXPECTED = "unexpected error while reading"


def guarded(reader, path, *args, **kwargs):
    """Run ``reader(path, ...)`` quietly (:func:`~sheetview.io.safety.quiet`) and turn any
    exception that is not a :class:`SheetviewError` into one line naming the file.

    Readers check what they parse and say what is wrong; this is the net under them, so
    that a damaged file the checks did not foresee still gives one line and exit status 2
    rather than a traceback. ``MemoryError`` becomes a :class:`MemoryLimitError`.
    """
    try:
        with quiet():
            return reader(path, *args, **kwargs)
    except SheetviewError as e:
        if "\n" in str(e) or "\r" in str(e):  # text from the file: keep the message one line
            raise type(e)(" ".join(e.detail.split()), path=e.path, line=e.line,
                          field=e.field) from None
        raise
    except MemoryError:
        raise MemoryLimitError("ran out of memory while reading it (the file declares more "
                               "content than fits)", path=path) from None
    except RecursionError:
        raise InputError("its content nests too deeply to be read", path=path) from None
    except Exception as e:  # noqa: BLE001 - the net under every reader, see above
        text = " ".join(str(e).split())[:160] or type(e).__name__
        raise InputError(f"{UNEXPECTED} ({type(e).__name__}: {text}); the file is probably "
                         f"damaged", path=path) from None


def _only(options, allowed, path, fam):
    extra = set(options) - allowed
    if extra:
        first = sorted(extra)[0]
        fits = ", ".join(f"<<{k}>>" for k in sorted(allowed))
        raise OptionError(f"<<{first}>> does not apply to {fam} files; it applies to other "
                          f"families (for {fam} files: {fits})", path=path, param=first)


def write(obj, path, *, force: bool = False):
    """Write a Structure (prism table, VTK PolyData or VTK wedge cells), a SurfaceBody (mesh) or a
    PhaseGrid (.vti/.npy/.tif), chosen by suffix. Refuses to overwrite unless ``force``."""
    from ..grid import PhaseGrid
    from ..particles import ParticleSet
    from ..structure import Structure

    path = Path(path)
    suffix = path.suffix.lower()
    if isinstance(obj, Structure):
        from . import prisms
        if suffix in prisms.WRITERS:
            return prisms.WRITERS[suffix](obj, path, force=force)
        if suffix in {".vtp", ".vtk", ".vtu"}:
            from . import meshes
            return meshes.write_prisms_vtk(obj, path, force=force)
        raise OptionError(f"cannot write prisms as {suffix or '(no suffix)'!r}; use .csv, .npz, "
                          f".parquet, .vtp/.vtk (closed surfaces) or .vtu (wedge cells) for "
                          f"general-purpose viewers, or a volume (.tif, .vti, .npy) for the "
                          f"phase grid", path=path)
    if isinstance(obj, ParticleSet):
        from . import particles
        return particles.write_particles(obj, path, force=force)
    if isinstance(obj, PhaseGrid):
        from . import volumes
        return volumes.write_volume(obj, path, force=force)
    from . import meshes
    return meshes.write_body(obj, path, force=force)
