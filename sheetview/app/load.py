"""Loading an input with the reading options that apply to it, and choosing the moment of
a grown structure to analyse (the prisms born by a time or a progress).

Examples
--------
>>> from sheetview.app.load import load
>>> s = load("sample_structures/single_stack.csv")
>>> len(s)
300
"""
from __future__ import annotations

from ..errors import OptionError
from .applies import kind_words, not_applicable
from ..io import family_of, read
from ..structure import Structure
from ..measures.kinetics import structure_at

#: Reading options and the file families they apply to.
READ_OPTIONS = {
    "thickness": ("prisms", "meshes"), "spacing": ("prisms", "meshes"),
    "units": ("prisms", "meshes", "volumes"), "as_": ("meshes",),
    "voxel_size": ("volumes",), "phases": ("volumes",), "shape": ("volumes",),
    "dtype": ("volumes",), "byte_order": ("volumes",),
}


#: How messages speak of each family of files.
FAMILY_WORDS = {"prisms": "a prism table", "meshes": "a mesh", "volumes": "a voxel volume"}
#: What each reading option applies to, in words.
APPLIES_TO = {
    "thickness": "prism tables without a thickness column and meshes read as sheets",
    "spacing": "prism tables and meshes", "units": "every file that does not state its units",
    "as_": "meshes", "voxel_size": "voxel volumes", "phases": "voxel volumes",
    "shape": "raw voxel volumes", "dtype": "raw voxel volumes", "byte_order": "raw voxel volumes",
}
#: A pointer to the option that does the job for another family.
HINTS = {("voxel_size", "prisms"): "; the phase grid of prisms is made at <<voxel>>",
         ("voxel_size", "meshes"): "; the phase grid of a mesh is made at <<voxel>>",
         ("thickness", "volumes"): "; a voxel volume's solid is its labelled voxels"}


def parse_phases(value) -> dict | None:
    """``"0=outside,1=solid,2=gel"`` (or a dict) -> {0: 'outside', ...}."""
    if value is None or isinstance(value, dict):
        return value
    out = {}
    for item in str(value).split(","):
        if "=" not in item:
            raise OptionError(f"expected VALUE=PHASE pairs such as 0=outside,255=solid, "
                              f"got {item!r}", param="phases")
        k, v = item.split("=", 1)
        try:
            out[int(k)] = v.strip().lower()
        except ValueError:
            raise OptionError(f"{k!r} is not a whole number", param="phases") from None
    return out


def parse_shape(value) -> tuple | None:
    """``"NX,NY,NZ"`` (or ``NXxNYxNZ``, or a sequence) -> a tuple of three positive ints."""
    if value is None:
        return None
    try:
        if isinstance(value, str):
            shape = tuple(int(v) for v in value.lower().replace("x", ",").split(","))
        else:
            shape = tuple(int(v) for v in value)
    except (TypeError, ValueError):
        raise OptionError(f"expected NX,NY,NZ, got {value!r}", param="shape") from None
    if len(shape) != 3 or min(shape) <= 0:
        raise OptionError(f"expected three positive whole numbers, got {value!r}", param="shape")
    return shape


def load(path, *, thickness=None, spacing=None, units=None, as_="auto", voxel_size=None,
         phases=None, shape=None, dtype=None, byte_order=None):
    """Read ``path`` with the reading options that apply to its family (prism tables,
    meshes, volumes); an option given for another family is refused (it would be silently
    ignored otherwise), naming what does apply."""
    fam = family_of(path)
    given = {"thickness": thickness, "spacing": spacing, "units": units,
             "as_": None if as_ in (None, "auto") else as_, "voxel_size": voxel_size,
             "phases": phases, "shape": shape, "dtype": dtype, "byte_order": byte_order}
    wrong = [k for k, v in given.items() if v is not None and fam not in READ_OPTIONS[k]]
    if wrong:
        k = wrong[0]
        fits = ", ".join(f"<<{n}>>" for n, fams in READ_OPTIONS.items() if fam in fams)
        hint = HINTS.get((k, fam), "")
        raise not_applicable(k, FAMILY_WORDS[fam], f"{APPLIES_TO[k]} (for {FAMILY_WORDS[fam]}: "
                             f"{fits}){hint}", path=path)
    opts = {k: v for k, v in given.items() if v is not None}
    if "phases" in opts:
        opts["phases"] = parse_phases(opts["phases"])
    if "shape" in opts:
        opts["shape"] = parse_shape(opts["shape"])
    return read(path, **opts)


def at_moment(obj, progress=None, time=None):
    """``(obj, None)`` when neither ``progress`` nor ``time`` is given; else the structure
    as it stood then and the :class:`~sheetview.measures.kinetics.Moment`."""
    if progress is None and time is None:
        return obj, None
    if not isinstance(obj, Structure):
        raise not_applicable("at_progress" if progress is not None else "at_time",
                             kind_words(obj), "prisms with a 'born' column (a grown structure)",
                             path=getattr(obj, "source", None))
    return structure_at(obj, progress=progress, time=time)
