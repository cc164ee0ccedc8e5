"""The in-memory model of a sheet structure: arrays of triangular prisms in a domain.

A prism is a triangle (its mid-plane, corners ``a, b, c`` in nm) extruded by half its
thickness to either side along the triangle normal ``(b - a) x (c - a)``. Per-prism
columns (``sheet``, ``born``, ``tag``, and any further numeric ones a user's code
writes) travel with the prisms. Derived geometry is computed once and cached; a
Structure is immutable (its arrays are read-only), so the cache never goes stale.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from functools import cached_property

import numpy as np

from .domain import MAX_LENGTH_NM, Box, Domain, bounding_box
from .errors import InputError

#: Optional per-prism columns with a meaning sheetview knows, and their dtypes.
KNOWN_COLUMNS = {"sheet": np.int64, "born": np.float64, "tag": np.int64}

#: Nominal interlayer repeat (nm) when a file gives none: the 1.40 nm basal spacing of
#: 14 A tobermorite (Bonaccorsi, Merlino & Kampf, J. Am. Ceram. Soc. 88 (2005) 505).
DEFAULT_SPACING_NM = 1.4

#: Relative area below which a triangle counts as degenerate.
DEGENERATE_REL_AREA = 1e-12


def _readonly(a: np.ndarray) -> np.ndarray:
    """A read-only contiguous array; a writeable input is copied, so the caller's array
    is never frozen behind its back."""
    a = np.ascontiguousarray(a)
    if a.flags.writeable:
        a = a.copy()
        a.flags.writeable = False
    return a


@dataclass(frozen=True, eq=False)
class Structure:
    """Prisms in a domain.

    Parameters
    ----------
    vertices : (N, 3, 3) float array
        Mid-plane triangle corners in nm, ``vertices[i, k]`` = corner k of prism i.
    thickness : (N,) float array
        Prism thickness in nm (> 0).
    domain : Sphere or Box
        The domain. ``domain.inferred`` is True where the file gave none.
    spacing : float
        Nominal interlayer repeat in nm.
    columns : dict of str -> (N,) array
        Per-prism columns (``sheet``, ``born``, ``tag`` and extra numeric ones).
    metadata : dict
        Free header metadata (JSON-compatible), carried through writers.
    source : str, optional
        Where the structure came from (for messages).
    """

    vertices: np.ndarray
    thickness: np.ndarray
    domain: Domain
    spacing: float = DEFAULT_SPACING_NM
    columns: dict = field(default_factory=dict)
    metadata: dict = field(default_factory=dict)
    source: str | None = None

    def __post_init__(self):
        v = np.asarray(self.vertices, dtype=np.float64)
        if v.ndim != 3 or v.shape[1:] != (3, 3):
            raise ValueError(f"vertices must have shape (N, 3, 3), not {v.shape}")
        n = v.shape[0]
        t = np.asarray(self.thickness, dtype=np.float64)
        if t.ndim == 0:
            t = np.full(n, float(t))
        if t.shape != (n,):
            raise ValueError(f"thickness must have shape ({n},), not {t.shape}")
        cols = {}
        for name, arr in self.columns.items():
            a = np.asarray(arr)
            if a.shape != (n,):
                raise ValueError(f"column {name!r} must have shape ({n},), not {a.shape}")
            dtype = KNOWN_COLUMNS.get(name)
            if dtype is not None:
                a = a.astype(dtype, copy=False)
            cols[name] = _readonly(a)
        object.__setattr__(self, "vertices", _readonly(v))
        object.__setattr__(self, "thickness", _readonly(t))
        object.__setattr__(self, "columns", cols)
        object.__setattr__(self, "spacing", float(self.spacing))
        object.__setattr__(self, "metadata", dict(self.metadata))

    # ------------------------------------------------------------------ basics
    def __len__(self) -> int:
        return self.vertices.shape[0]

    @property
    def n_prisms(self) -> int:
        return len(self)

    def __repr__(self) -> str:
        return (f"Structure({len(self)} prisms, domain={self.domain.to_dict()}, "
                f"spacing={self.spacing} nm, columns={sorted(self.columns)})")

    # ------------------------------------------------------- cached geometry
    @cached_property
    def _cross(self) -> np.ndarray:
        v = self.vertices
        return np.cross(v[:, 1] - v[:, 0], v[:, 2] - v[:, 0])

    @cached_property
    def areas(self) -> np.ndarray:
        """Mid-plane triangle areas (nm^2)."""
        return _readonly(0.5 * np.linalg.norm(self._cross, axis=1))

    @cached_property
    def normals(self) -> np.ndarray:
        """Unit normals ``(b - a) x (c - a) / |...|`` (N, 3)."""
        with np.errstate(invalid="ignore", divide="ignore"):
            return _readonly(self._cross / (2.0 * self.areas[:, None]))

    @cached_property
    def centroids(self) -> np.ndarray:
        """Triangle centroids (N, 3), nm."""
        return _readonly(self.vertices.mean(axis=1))

    @cached_property
    def volumes(self) -> np.ndarray:
        """Prism volumes, area x thickness (nm^3)."""
        return _readonly(self.areas * self.thickness)

    @cached_property
    def edge_lengths(self) -> np.ndarray:
        """Edge lengths (N, 3): |b - a|, |c - b|, |a - c|."""
        v = self.vertices
        return _readonly(np.linalg.norm(np.roll(v, -1, axis=1) - v, axis=2))

    @property
    def total_volume(self) -> float:
        """Sum of prism volumes (overlaps counted twice), nm^3."""
        return float(self.volumes.sum())

    def bounds(self) -> tuple[np.ndarray, np.ndarray]:
        """Bounds of the prism corners including the half-thickness offsets."""
        if len(self) == 0:
            z = np.zeros(3)
            return z, z
        v = self.vertices
        off = np.abs(self.normals) * (0.5 * self.thickness)[:, None]
        lo = (v.min(axis=1) - off).min(axis=0)
        hi = (v.max(axis=1) + off).max(axis=0)
        return lo, hi

    # ------------------------------------------------------------ derived
    def subset(self, mask) -> "Structure":
        """A new Structure holding the prisms selected by a boolean mask or index array."""
        idx = np.asarray(mask)
        return Structure(self.vertices[idx], self.thickness[idx], self.domain, self.spacing,
                         {k: v[idx] for k, v in self.columns.items()}, self.metadata, self.source)

    def prism_corners(self) -> np.ndarray:
        """The six corners of each prism (N, 6, 3): bottom face a, b, c then top face."""
        h = (0.5 * self.thickness)[:, None, None] * self.normals[:, None, :]
        return np.concatenate([self.vertices - h, self.vertices + h], axis=1)

    # ---------------------------------------------------------- validation
    def validate(self) -> None:
        """Raise :class:`InputError` for non-finite or out-of-range values (corners and
        thickness within :data:`~sheetview.domain.MAX_LENGTH_NM`), degenerate triangles,
        non-positive thickness or repeat, naming the first offending prism (1-based row)."""
        src = self.source
        n = len(self)
        flat = self.vertices.reshape(n, 9)
        with np.errstate(invalid="ignore"):
            mag = np.abs(flat).max(axis=1) if n else np.zeros(0)  # NaN where any is NaN
        out = ~(mag <= MAX_LENGTH_NM)  # one pass for NaN, inf and too large
        if out.any():
            bad = ~np.all(np.isfinite(flat), axis=1)
            if bad.any():
                i = int(np.flatnonzero(bad)[0])
                raise InputError(f"prism row {i + 1}: corner coordinates must be finite numbers "
                                 f"(found NaN or inf; {int(bad.sum())} row(s) affected)",
                                 path=src)
            bad = out
            i = int(np.flatnonzero(bad)[0])
            big = float(np.abs(flat[i]).max())
            raise InputError(f"prism row {i + 1}: corner coordinates must lie within "
                             f"{MAX_LENGTH_NM:g} nm (1 m) of the origin, found {big:.4g} nm "
                             f"(check the units; {int(bad.sum())} row(s) affected)", path=src)
        t = self.thickness
        bad = ~np.isfinite(t) | (t <= 0) | (t > MAX_LENGTH_NM)
        if bad.any():
            i = int(np.flatnonzero(bad)[0])
            raise InputError(f"prism row {i + 1}: thickness must be a positive finite number of "
                             f"at most {MAX_LENGTH_NM:g} nm, got {float(t[i]):.6g} "
                             f"({int(bad.sum())} row(s) affected)", path=src)
        if not (np.isfinite(self.spacing) and 0 < self.spacing <= MAX_LENGTH_NM):
            raise InputError(f"the interlayer repeat (spacing) must be a positive number of at "
                             f"most {MAX_LENGTH_NM:g} nm, got {self.spacing:.6g}", path=src,
                             field="spacing")
        with np.errstate(all="ignore"):
            scale = self.edge_lengths.max(axis=1) ** 2
            bad = self.areas <= DEGENERATE_REL_AREA * np.maximum(scale, 1e-300)
        if bad.any():
            i = int(np.flatnonzero(bad)[0])
            raise InputError(f"prism row {i + 1}: degenerate triangle (zero area: corners "
                             f"coincide or are collinear; {int(bad.sum())} row(s) affected)", path=src)
        for name in ("born",):
            if name in self.columns:
                col = self.columns[name]
                bad = ~np.isfinite(col)
                if bad.any():
                    i = int(np.flatnonzero(bad)[0])
                    raise InputError(f"prism row {i + 1}: column '{name}' must be finite",
                                     path=src, field=name)

    # -------------------------------------------------------------- checks
    def outside_counts(self) -> dict:
        """How many prisms lie wholly or partly outside the domain.

        *Wholly outside*: for a sphere, the triangle's nearest point to the centre is
        beyond the radius (exact); for a box, all three corners lie beyond the same face
        plane (exact for "certainly outside"). *Partly outside*: some corner lies outside
        but the prism is not wholly outside. Periodic boxes have no outside.
        """
        dom = self.domain
        n = len(self)
        if n == 0 or getattr(dom, "periodic", False):
            return {"wholly_outside": 0, "partly_outside": 0}
        corner_in = dom.contains(self.vertices)  # (N, 3)
        some_out = ~np.all(corner_in, axis=1)
        if isinstance(dom, Box):
            lo, hi = dom.bounds
            v = self.vertices
            wholly = np.any(np.all(v < lo, axis=1) | np.all(v > hi, axis=1), axis=1)
        else:
            d = triangle_point_distance(self.vertices, np.asarray(dom.center))
            wholly = d > dom.radius
        return {"wholly_outside": int(wholly.sum()),
                "partly_outside": int((some_out & ~wholly).sum())}

    def duplicate_count(self, decimals: int = 6) -> int:
        """Number of prisms whose triangle repeats an earlier one (corners in any order)."""
        if len(self) < 2:
            return 0
        key = np.round(self.vertices, decimals)
        # sort corners inside each triangle lexicographically so their order does not matter
        tri = key.copy()
        perm = np.lexsort((tri[:, :, 2], tri[:, :, 1], tri[:, :, 0]), axis=1)
        tri = np.take_along_axis(tri, perm[:, :, None], axis=1).reshape(len(self), 9)
        uniq = np.unique(tri, axis=0)
        return int(len(self) - len(uniq))


def triangle_point_distance(tri: np.ndarray, p: np.ndarray) -> np.ndarray:
    """Distance from point ``p`` (3,) to each triangle (N, 3, 3), vectorised.

    Closest point on a triangle by region classification (Ericson, Real-Time Collision
    Detection, 2005, section 5.1.5).
    """
    a, b, c = tri[:, 0], tri[:, 1], tri[:, 2]
    ab, ac, ap = b - a, c - a, p - a
    d1 = np.einsum("ij,ij->i", ab, ap)
    d2 = np.einsum("ij,ij->i", ac, ap)
    bp = p - b
    d3 = np.einsum("ij,ij->i", ab, bp)
    d4 = np.einsum("ij,ij->i", ac, bp)
    cp = p - c
    d5 = np.einsum("ij,ij->i", ab, cp)
    d6 = np.einsum("ij,ij->i", ac, cp)
    va = d3 * d6 - d5 * d4
    vb = d5 * d2 - d1 * d6
    vc = d1 * d4 - d3 * d2
    with np.errstate(invalid="ignore", divide="ignore"):
        denom = va + vb + vc
        v = vb / denom
        w = vc / denom
        q = a + ab * v[:, None] + ac * w[:, None]  # interior
        # edges
        t_ab = d1 / (d1 - d3)
        t_ac = d2 / (d2 - d6)
        t_bc = (d4 - d3) / ((d4 - d3) + (d5 - d6))
    conds = [
        (d1 <= 0) & (d2 <= 0),
        (d3 >= 0) & (d4 <= d3),
        (d6 >= 0) & (d5 <= d6),
        (vc <= 0) & (d1 >= 0) & (d3 <= 0),
        (vb <= 0) & (d2 >= 0) & (d6 <= 0),
        (va <= 0) & ((d4 - d3) >= 0) & ((d5 - d6) >= 0),
    ]
    choices = [a, b, c, a + ab * t_ab[:, None], a + ac * t_ac[:, None],
               b + (c - b) * t_bc[:, None]]
    out = q
    for cond, ch in zip(reversed(conds), reversed(choices)):
        out = np.where(cond[:, None], ch, out)
    return np.linalg.norm(out - p, axis=1)


def with_inferred_domain(vertices: np.ndarray, thickness: np.ndarray) -> Box:
    """The padded bounding box used when a file gives no domain.

    Padding: the largest thickness plus one nominal repeat, so that the void next to the
    outermost sheets is part of the domain.
    """
    t = float(np.max(thickness)) if len(thickness) else 0.0
    if len(vertices) == 0:
        return Box((0.0, 0.0, 0.0), (1.0, 1.0, 1.0), inferred=True)
    return bounding_box(vertices, pad=t + DEFAULT_SPACING_NM)


@dataclass(frozen=True, eq=False)
class SurfaceBody:
    """A closed (watertight) triangle surface read as a solid body, lengths in nm.

    Kept as a surface so that later measures can use its exact geometry (inside tests,
    ray clipping). ``domain`` is the padded bounding box unless a file gives one.
    """

    vertices: np.ndarray
    faces: np.ndarray
    domain: Domain
    metadata: dict = field(default_factory=dict)
    source: str | None = None

    def __post_init__(self):
        object.__setattr__(self, "vertices", _readonly(np.asarray(self.vertices, dtype=np.float64)))
        object.__setattr__(self, "faces", _readonly(np.asarray(self.faces, dtype=np.int64)))

    @property
    def n_faces(self) -> int:
        return int(self.faces.shape[0])

    def to_trimesh(self):
        import trimesh
        return trimesh.Trimesh(self.vertices, self.faces, process=False)

    @cached_property
    def volume(self) -> float:
        """Enclosed volume (nm^3), by the divergence theorem over the faces."""
        v = self.vertices[self.faces]
        return float(abs(np.einsum("ij,ij->i", v[:, 0], np.cross(v[:, 1], v[:, 2])).sum()) / 6.0)

    @cached_property
    def area(self) -> float:
        """Surface area (nm^2)."""
        v = self.vertices[self.faces]
        return float(0.5 * np.linalg.norm(np.cross(v[:, 1] - v[:, 0], v[:, 2] - v[:, 0]), axis=1).sum())

    def __repr__(self) -> str:
        return f"SurfaceBody({len(self.vertices)} vertices, {self.n_faces} faces)"
