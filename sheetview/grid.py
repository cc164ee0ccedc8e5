"""PhaseGrid: a voxel label volume with physical spacing, and the phase codes.

Indexing is ``labels[i, j, k]`` = x, y, z; voxel ``(i, j, k)`` has its centre at
``origin + (i + 0.5, j + 0.5, k + 0.5) * spacing`` (nm).
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

#: Phase codes shared by every measure and writer.
OUTSIDE, SOLID, INTERLAYER, GEL = 0, 1, 2, 3
PHASE_NAMES = {OUTSIDE: "outside", SOLID: "solid", INTERLAYER: "interlayer", GEL: "gel"}
#: Accepted spellings when a user maps file values to phases.
PHASE_ALIASES = {"outside": OUTSIDE, "solid": SOLID, "interlayer": INTERLAYER,
                 "gel": GEL, "pore": GEL, "void": GEL}


@dataclass(frozen=True, eq=False)
class PhaseGrid:
    """Voxel labels with their geometry.

    Parameters
    ----------
    labels : (nx, ny, nz) uint8 array of phase codes
    spacing : voxel edge lengths (nm), three numbers (a scalar is broadcast)
    origin : corner of the grid (nm)
    names : phase code -> name (defaults to :data:`PHASE_NAMES`)
    periodic : whether the grid wraps around (a periodic box)
    """

    labels: np.ndarray
    spacing: tuple = (1.0, 1.0, 1.0)
    origin: tuple = (0.0, 0.0, 0.0)
    names: dict = field(default_factory=lambda: dict(PHASE_NAMES))
    periodic: bool = False
    metadata: dict = field(default_factory=dict)
    source: str | None = None

    def __post_init__(self):
        lab = np.asarray(self.labels)
        if lab.ndim != 3:
            raise ValueError(f"labels must be a 3D array, not {lab.ndim}D")
        if lab.dtype != np.uint8:
            lab = lab.astype(np.uint8)
        sp = np.broadcast_to(np.asarray(self.spacing, dtype=float), (3,))
        if not np.all(np.isfinite(sp)) or np.any(sp <= 0):
            raise ValueError("voxel spacing must be positive")
        org = np.broadcast_to(np.asarray(self.origin, dtype=float), (3,))
        object.__setattr__(self, "labels", lab)
        object.__setattr__(self, "spacing", tuple(float(v) for v in sp))
        object.__setattr__(self, "origin", tuple(float(v) for v in org))

    @property
    def shape(self) -> tuple:
        return self.labels.shape

    @property
    def voxel_volume(self) -> float:
        return float(np.prod(self.spacing))

    @property
    def extent(self) -> np.ndarray:
        return np.asarray(self.shape) * np.asarray(self.spacing)

    def fractions(self) -> dict:
        """Volume fraction of each phase present, over the whole grid."""
        counts = np.bincount(self.labels.ravel(), minlength=256)
        total = counts.sum()
        return {self.names.get(c, f"phase_{c}"): float(counts[c] / total)
                for c in np.flatnonzero(counts)}

    def __repr__(self) -> str:
        return f"PhaseGrid(shape={self.shape}, spacing={self.spacing} nm)"
