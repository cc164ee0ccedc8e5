"""Measures whose entry functions still live here while their modules change.

Each function is a measure of the registry: its subject is the phase grid, its other
parameters come by name from the run (settings and shared inputs). The ``pores`` measure
moved to :func:`sheetview.measures.pores.pores_measure`.
"""
from __future__ import annotations

from ..grid import PhaseGrid
from ..measures.relaxation import relaxation_spectrum


def relaxation(grid: PhaseGrid, *, thickness=None, interlayer_width=None):
    """Predicted T2 distribution (fast exchange, Brownstein & Tarr 1979) of the phase grid
    (each size class apart) with the default surface relaxivity and bulk T2."""
    return relaxation_spectrum(grid, thickness, interlayer_width=interlayer_width)
