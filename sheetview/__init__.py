"""sheetview: look inside simulated cement-hydrate sheet structures and measure them.

Public API::

    import sheetview as sv
    s = sv.read("structure.csv")          # Structure, SurfaceBody or PhaseGrid
    ctx = sv.measure(s, voxel=0.2)        # every measure that applies
    ctx.results["phases"].fractions       # ... each result has to_dict()
    sv.write(s, "structure.npz")
"""
from .domain import Box, Sphere
from .errors import InputError, OptionError, SheetviewError
from .grid import PhaseGrid
from .io import read, write
from .structure import Structure, SurfaceBody

__version__ = "0.1.0"


def measure(obj, only=None, **settings):
    """Run the named measures (default: all that apply to ``obj``) on a Structure,
    SurfaceBody or PhaseGrid, sharing the stacking graph and the phase grid.

    ``settings`` are those of ``sheetview measure`` (see ``sheetview.pipeline.DEFAULTS``:
    ``voxel``, ``max_memory``, ``density``, ``lines``, ``seed``, ``intrusion``, ...).
    Returns the :class:`sheetview.pipeline.Context`: ``.results`` (name -> result),
    ``.grid`` (the phase grid, when a grid measure ran) and ``.timings``.
    """
    from . import measures
    from .pipeline import DEFAULTS
    unknown = sorted(set(settings) - set(DEFAULTS))
    if unknown:
        raise OptionError(f"unknown setting(s) {unknown}; known: {sorted(DEFAULTS)}")
    names = measures.select(only, obj)
    return measures.run(names, obj, settings)

__all__ = ["Box", "Sphere", "Structure", "SurfaceBody", "PhaseGrid", "read", "write", "measure",
           "SheetviewError", "InputError", "OptionError", "__version__"]
