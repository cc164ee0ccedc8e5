"""Cell lists: points sorted into a grid of cubic-ish cells at least a search radius wide,
so that every pair within the radius lies in the same or adjacent cells (common practice
for fixed-radius neighbour search; e.g. Allen & Tildesley, *Computer Simulation of
Liquids*, 2nd ed., OUP 2017, sec. 5.3).

Shared by the stacking graph's pair search (:mod:`sheetview.measures.stacking`) and the
local order parameter (:mod:`sheetview.measures.orientation`); their numba kernels walk
the cells.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass
class CellList:
    """Points sorted by cell.

    Attributes
    ----------
    P : (n, 3) points in cell order, shifted to start at 0 (periodic: wrapped into
        ``[0, L)``)
    order : (n,) original index of each sorted point
    start : (ncells + 1,) CSR bounds: the points of cell ``c`` are ``start[c]:start[c+1]``
    cells : indices of the non-empty cells, ascending
    ncell : (3,) cells per axis; cell index ``(ix * ncell[1] + iy) * ncell[2] + iz``
    size : (3,) cell edges
    periodic : whether the box wraps
    L : (3,) box lengths when periodic, else ones (unused)
    """

    P: np.ndarray
    order: np.ndarray
    start: np.ndarray
    cells: np.ndarray
    ncell: np.ndarray
    size: np.ndarray
    periodic: bool
    L: np.ndarray


def cell_list(points, radius: float, domain=None, *, sparse: float = 2.0,
              min_periodic: int = 1) -> CellList | None:
    """Sort ``points`` into a grid of cells at least ``radius`` wide.

    Periodic domain (``domain.periodic``): the box is cut into ``max(1, floor(L / radius))``
    equal cells per axis; None when an axis would have fewer than ``min_periodic`` cells
    (a half-shell walk needs 3, or it would meet a neighbour cell twice). Otherwise the
    points' bounding box is cut into cells of edge ``radius``, doubled while there are
    more than ``sparse * n + 64`` cells (sparse points: fewer, larger cells).
    """
    c = np.asarray(points, dtype=np.float64).reshape(-1, 3)
    n = len(c)
    periodic = bool(getattr(domain, "periodic", False))
    if periodic:
        lo = np.asarray(domain.min, dtype=np.float64)
        L = np.asarray(domain.lengths, dtype=np.float64)
        P = np.mod(c - lo, L)
        P[P >= L] = 0.0
        ncell = np.maximum(np.floor(L / radius).astype(np.int64), 1)
        if np.any(ncell < min_periodic):
            return None
        size = L / ncell
    else:
        L = np.ones(3)
        P = c - c.min(axis=0)
        ext = P.max(axis=0)
        size = np.full(3, float(radius))
        ncell = np.floor(ext / size).astype(np.int64) + 1
        while np.prod(ncell.astype(float)) > sparse * n + 64:
            size = size * 2.0
            ncell = np.floor(ext / size).astype(np.int64) + 1
    idx = np.minimum((P / size).astype(np.int64), ncell - 1)
    cell = (idx[:, 0] * ncell[1] + idx[:, 1]) * ncell[2] + idx[:, 2]
    order = np.argsort(cell, kind="stable")
    start = np.zeros(int(np.prod(ncell)) + 1, np.int64)
    np.cumsum(np.bincount(cell, minlength=len(start) - 1), out=start[1:])
    cells = np.flatnonzero(start[1:] != start[:-1])
    return CellList(np.ascontiguousarray(P[order]), order, start, cells, ncell,
                    np.asarray(size, dtype=np.float64), periodic, L)
