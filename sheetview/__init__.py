"""sheetview: look inside simulated cement-hydrate sheet structures and measure them.

Public API::

    import sheetview as sv
    s = sv.read("structure.csv")          # Structure, SurfaceBody or PhaseGrid
    sv.write(s, "structure.npz")
"""
from .domain import Box, Sphere
from .errors import InputError, OptionError, SheetviewError
from .grid import PhaseGrid
from .io import read, write
from .structure import Structure, SurfaceBody

__version__ = "0.1.0"

__all__ = ["Box", "Sphere", "Structure", "SurfaceBody", "PhaseGrid", "read", "write",
           "SheetviewError", "InputError", "OptionError", "__version__"]
