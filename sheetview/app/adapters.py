"""Measures whose entry functions still live here while their modules change.

Each function is a measure of the registry: its subject is the phase grid, its other
parameters come by name from the run (settings and shared inputs). None is left: ``pores``
moved to :func:`sheetview.measures.pores.pores_measure` and ``relaxation`` to
:mod:`sheetview.measures.relaxation`.
"""
from __future__ import annotations
