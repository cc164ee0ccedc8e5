"""sheetview: look inside simulated cement-hydrate sheet structures and measure them.

Public API::

    import sheetview as sv
    s = sv.read("structure.csv")            # Structure, SurfaceBody or PhaseGrid
    m = sv.measure(s, voxel=0.2)            # every measure that applies: a Measurement
    m.phases.fractions                      # each measure's result by name
    m.summary()                             # the document `sheetview measure` writes
    m.to_frame()                            # one row of its scalars (pandas)
    m.write("report/")                      # a report folder
    sv.write(s, "structure.npz")
    c = sv.compare_structures(["a.npz", "b.npz"])   # side by side: c.table, c.figure()
"""
from ._version import __version__
from .api import Comparison, Measurement, compare_structures, measure
from .app.settings import Settings
from .domain import Box, Sphere
from .errors import InputError, OptionError, SheetviewError
from .grid import PhaseGrid
from .io import read, write
from .particles import ParticleSet
from .structure import Structure, SurfaceBody

__all__ = ["Box", "Sphere", "Structure", "SurfaceBody", "ParticleSet", "PhaseGrid", "read",
           "write", "measure", "Measurement", "compare_structures", "Comparison", "Settings",
           "SheetviewError", "InputError", "OptionError",
           "__version__"]
