"""The summary document of a measure run: the same JSON for ``summary.json``, ``measure
--json``, ``batch`` rows and ``sheetview.measure(...).summary()``.

Layout: the program version, the input's kind and domain, the settings; the run's headline
keys (phase grid, the headline of each measure: volume fractions, specific surface, chords,
pore sizes); each measure's full result under its name; stage timings. The command line
adds the file's provenance (path and content hash) in front.
"""
from __future__ import annotations

from .._version import __version__
from ..structure import Structure

NOTE = ("numbers describe the simulated structure only; see docs/measures.md for what each "
        "one is and is not")


def document(run, *, timings: bool = True) -> dict:
    """The summary document of a :class:`~sheetview.app.run.Run` (without file provenance)."""
    obj = run.obj
    results = run.results
    dom = getattr(obj, "domain", None)
    doc = {"sheetview_version": __version__,
           "input_kind": type(obj).__name__,
           "domain": dom.to_dict() if dom is not None else None,
           "domain_inferred": bool(getattr(dom, "inferred", False)),
           "spacing": getattr(obj, "spacing", None),
           "measures": list(results), "settings": run.settings.to_dict()}
    doc.update(headline(run))
    for name, res in results.items():
        d = res.to_dict()
        if name in doc and isinstance(doc[name], dict):
            d = {**d, **doc[name]}
        doc[name] = d
    if timings:
        doc["timings_s"] = {k: round(v, 3) for k, v in run.timings.items()}
    doc["note"] = NOTE
    return doc


def file_sha256(path) -> str:
    """SHA-256 of a file's bytes (provenance: identifies the exact input)."""
    import hashlib
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 22), b""):
            h.update(block)
    return h.hexdigest()


def file_document(path, run, *, timings: bool = True) -> dict:
    """:func:`document` with the input file's provenance in front (``file``,
    ``input_sha256``): what ``summary.json`` holds."""
    doc = {"sheetview_version": __version__, "file": str(path), "input_sha256": file_sha256(path),
           "provenance": provenance()}
    doc.update(document(run, timings=timings))
    return doc


#: The libraries whose versions a summary records (those installed).
LIBRARIES = ("numpy", "scipy", "numba", "scikit-image", "trimesh", "pyarrow", "tifffile",
             "meshio", "pyvista", "vtk", "matplotlib", "click", "h5py", "manifold3d", "shapely",
             "dask")


def provenance(command_line=None) -> dict:
    """When and how a document was made: ``created`` (UTC, ISO 8601), ``command_line``
    (the program's arguments; default ``sys.argv``), ``python`` and the ``libraries``
    installed with their versions (docs/summary.schema.json)."""
    import datetime
    import platform
    import sys
    from importlib import metadata
    libs = {}
    for name in LIBRARIES:
        try:
            libs[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            continue
    argv = list(sys.argv if command_line is None else command_line)
    if argv:
        argv[0] = "sheetview" if argv[0].endswith(("sheetview", "__main__.py")) else argv[0]
    return {"created": datetime.datetime.now(datetime.timezone.utc).isoformat(
                timespec="seconds"),
            "command_line": argv, "python": platform.python_version(), "libraries": libs}


def headline(run) -> dict:
    """The documented headline keys: ``n_prisms``, the phase grid (``voxel_size_nm``,
    ``grid_shape``, ``voxel_default``), each measure's own :meth:`headline`, and ``basis``:
    what each headline number refers to, in words (each measure's :meth:`basis`)."""
    obj = run.obj
    out = {"n_prisms": len(obj) if isinstance(obj, Structure) else None}
    if "grid" in run.__dict__:
        g = run.grid
        out["voxel_size_nm"] = float((g.spacing[0] * g.spacing[1] * g.spacing[2]) ** (1 / 3))
        out["grid_shape"] = list(g.shape)
        vd = run.base_grid.metadata.get("voxel_default")
        if vd is not None:
            out["voxel_default"] = dict(vd)
    basis = {}
    for res in run.results.values():
        h = getattr(res, "headline", None)
        if h is not None:
            out.update(h())
        b = getattr(res, "basis", None)
        if b is not None:
            basis.update(b())
    if basis:
        out["basis"] = basis
    return out


def flatten(doc, prefix: str = "") -> dict:
    """Scalars of a nested dict with dotted names (``volume_fractions.solid``).

    Lists of up to 3 scalars become ``name.0``, ``name.1``...; longer lists (histogram
    bins, notes) are left out; ``None`` is kept (an undefined value)."""
    out = {}
    for k, v in doc.items():
        name = f"{prefix}{k}"
        if isinstance(v, dict):
            out.update(flatten(v, name + "."))
        elif isinstance(v, (list, tuple)):
            if 0 < len(v) <= 3 and all(_scalar(x) for x in v):
                for i, x in enumerate(v):
                    out[f"{name}.{i}"] = x
            elif len(v) == 0 and k in ("pore_split",):
                out[name] = ""
        elif _scalar(v):
            out[name] = v
    return out


def _scalar(v) -> bool:
    return v is None or isinstance(v, (bool, int, float, str))


def _json_default(o):
    import numpy as np
    if isinstance(o, np.generic):
        return o.item()
    if isinstance(o, np.ndarray):
        return o.tolist()
    raise TypeError(f"not JSON serialisable: {type(o)}")


def dumps(doc) -> str:
    """JSON text for a result document; NaN and inf become null (valid JSON)."""
    import json
    import math

    def clean(o):
        if isinstance(o, float):
            return None if (math.isnan(o) or math.isinf(o)) else o
        if isinstance(o, dict):
            return {str(k): clean(v) for k, v in o.items()}
        if isinstance(o, (list, tuple)):
            return [clean(v) for v in o]
        return o
    return json.dumps(clean(json.loads(json.dumps(doc, default=_json_default, allow_nan=True))),
                      indent=2, allow_nan=False)
