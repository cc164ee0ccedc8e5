"""Simulation domains: a spherical pore or a (possibly periodic) box, lengths in nm.

A domain answers three questions the measures ask: is a point inside, what is the
inward wall normal nearest to a point, and how far is the wall. A periodic box has no
walls: its wall normal is undefined (NaN) and its wall distance is infinite.
"""
from __future__ import annotations

import json
import math
from dataclasses import dataclass, field

import numpy as np

from .errors import InputError

#: Largest magnitude (nm) accepted for a coordinate, a length or a thickness read from a
#: file: 1 m. Nothing sheetview models comes near it, so a larger value means wrong units
#: or a damaged file; it also keeps every derived quantity (areas, volumes, voxel indices,
#: squared distances) far from floating-point overflow.
MAX_LENGTH_NM = 1e9
#: Smallest extent (nm) of a domain read from a file along any axis (a radius: half of it):
#: a thousandth of a nanometre, far below any sheet, so a smaller one is a damaged value.
MIN_EXTENT_NM = 1e-3


@dataclass(frozen=True)
class Sphere:
    """A spherical domain (a pore) of ``radius`` nm about ``center``."""

    center: tuple[float, float, float]
    radius: float
    inferred: bool = field(default=False, compare=False)

    shape = "sphere"
    periodic = False

    def __post_init__(self):
        c = np.asarray(self.center, dtype=float)
        if c.shape != (3,) or not np.all(np.isfinite(c)):
            raise ValueError("sphere center must be three finite numbers")
        if not (math.isfinite(self.radius) and self.radius > 0):
            raise ValueError("sphere radius must be a positive finite number")
        object.__setattr__(self, "center", tuple(float(v) for v in c))
        object.__setattr__(self, "radius", float(self.radius))

    @property
    def volume(self) -> float:
        return 4.0 / 3.0 * math.pi * self.radius ** 3

    @property
    def bounds(self) -> tuple[np.ndarray, np.ndarray]:
        c = np.asarray(self.center)
        return c - self.radius, c + self.radius

    def contains(self, points: np.ndarray) -> np.ndarray:
        p = np.asarray(points, dtype=float) - np.asarray(self.center)
        return np.einsum("...i,...i->...", p, p) <= self.radius ** 2

    def wall_distance(self, points: np.ndarray) -> np.ndarray:
        """Distance from each point to the wall (positive inside)."""
        p = np.asarray(points, dtype=float) - np.asarray(self.center)
        return self.radius - np.linalg.norm(p, axis=-1)

    def inward_normal(self, points: np.ndarray) -> np.ndarray:
        """Unit inward normal of the wall point nearest to each point (NaN at the centre)."""
        p = np.asarray(self.center) - np.asarray(points, dtype=float)
        n = np.linalg.norm(p, axis=-1, keepdims=True)
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(n > 0, p / n, np.nan)

    def to_dict(self) -> dict:
        return {"shape": "sphere", "center": list(self.center), "radius": self.radius}


@dataclass(frozen=True)
class Box:
    """An axis-aligned box from ``min`` to ``max`` (nm); ``periodic`` for periodic cells."""

    min: tuple[float, float, float]
    max: tuple[float, float, float]
    periodic: bool = False
    inferred: bool = field(default=False, compare=False)

    shape = "box"

    def __post_init__(self):
        lo = np.asarray(self.min, dtype=float)
        hi = np.asarray(self.max, dtype=float)
        if lo.shape != (3,) or hi.shape != (3,) or not (np.all(np.isfinite(lo)) and np.all(np.isfinite(hi))):
            raise ValueError("box min and max must each be three finite numbers")
        if np.any(hi <= lo):
            raise ValueError("box max must exceed min on every axis")
        object.__setattr__(self, "min", tuple(float(v) for v in lo))
        object.__setattr__(self, "max", tuple(float(v) for v in hi))
        object.__setattr__(self, "periodic", bool(self.periodic))

    @property
    def lengths(self) -> np.ndarray:
        return np.asarray(self.max) - np.asarray(self.min)

    @property
    def volume(self) -> float:
        return float(np.prod(self.lengths))

    @property
    def bounds(self) -> tuple[np.ndarray, np.ndarray]:
        return np.asarray(self.min), np.asarray(self.max)

    def contains(self, points: np.ndarray) -> np.ndarray:
        p = np.asarray(points, dtype=float)
        return np.all((p >= np.asarray(self.min)) & (p <= np.asarray(self.max)), axis=-1)

    def wrap(self, points: np.ndarray) -> np.ndarray:
        """Map points into the primary cell (periodic boxes only; others unchanged)."""
        p = np.asarray(points, dtype=float)
        if not self.periodic:
            return p
        lo = np.asarray(self.min)
        return lo + np.mod(p - lo, self.lengths)

    def minimum_image(self, d: np.ndarray) -> np.ndarray:
        """Minimum-image separation vectors (periodic boxes only; others unchanged)."""
        d = np.asarray(d, dtype=float)
        if not self.periodic:
            return d
        L = self.lengths
        return d - L * np.round(d / L)

    def _face_distances(self, points: np.ndarray) -> np.ndarray:
        p = np.asarray(points, dtype=float)
        lo = np.asarray(self.min)
        hi = np.asarray(self.max)
        return np.concatenate([p - lo, hi - p], axis=-1)  # (..., 6)

    def wall_distance(self, points: np.ndarray) -> np.ndarray:
        """Distance to the nearest face (positive inside); infinite for a periodic box."""
        p = np.asarray(points, dtype=float)
        if self.periodic:
            return np.full(p.shape[:-1], np.inf)
        return self._face_distances(p).min(axis=-1)

    def inward_normal(self, points: np.ndarray) -> np.ndarray:
        """Inward unit normal of the nearest face; NaN for a periodic box (no walls)."""
        p = np.asarray(points, dtype=float)
        if self.periodic:
            return np.full(p.shape, np.nan)
        face = np.argmin(self._face_distances(p), axis=-1)
        normals = np.array([[1, 0, 0], [0, 1, 0], [0, 0, 1],
                            [-1, 0, 0], [0, -1, 0], [0, 0, -1]], dtype=float)
        return normals[face]

    def to_dict(self) -> dict:
        d = {"shape": "box", "min": list(self.min), "max": list(self.max)}
        if self.periodic:
            d["periodic"] = True
        return d


Domain = Sphere | Box


def domain_from_dict(d, *, scale: float = 1.0, path=None, line=None) -> Domain:
    """Build a domain from its JSON form, lengths multiplied by ``scale`` (unit conversion).

    Raises :class:`InputError` naming the file, line and the key that is wrong.
    """
    def bad(msg):
        raise InputError(msg, path=path, line=line, field="domain")

    if isinstance(d, str):
        try:
            d = json.loads(d)
        except json.JSONDecodeError as e:
            bad(f"not valid JSON ({e.msg} at column {e.colno})")
    if not isinstance(d, dict):
        bad('expected a JSON object such as {"shape": "sphere", "center": [x, y, z], "radius": r}')
    shape = d.get("shape")
    try:
        if shape == "sphere":
            extra = set(d) - {"shape", "center", "radius"}
            if "center" not in d or "radius" not in d:
                bad('a sphere needs "center": [x, y, z] and "radius": r')
            if extra:
                bad(f"unknown key(s) {sorted(extra)} for a sphere (expected center, radius)")
            dom = Sphere(tuple(float(v) * scale for v in d["center"]), float(d["radius"]) * scale)
            _check_magnitude(np.append(dom.center, dom.radius), bad, dom)
            return dom
        if shape == "box":
            extra = set(d) - {"shape", "min", "max", "periodic"}
            if "min" not in d or "max" not in d:
                bad('a box needs "min": [x, y, z] and "max": [x, y, z]')
            if extra:
                bad(f"unknown key(s) {sorted(extra)} for a box (expected min, max, periodic)")
            periodic = d.get("periodic", False)
            if not isinstance(periodic, bool):
                bad('"periodic" must be true or false')
            dom = Box(tuple(float(v) * scale for v in d["min"]),
                      tuple(float(v) * scale for v in d["max"]), periodic)
            _check_magnitude(np.append(dom.min, dom.max), bad, dom)
            return dom
    except OverflowError:
        bad(f"a number of the {shape} is too large")
    except (TypeError, ValueError) as e:
        bad(str(e) if isinstance(e, ValueError) and "must" in str(e)
            else f"malformed {shape}: {str(e)[:120]}")
    bad(f'"shape" must be "sphere" or "box", not {str(shape)[:40]!r}')


def _check_magnitude(values, bad, dom=None) -> None:
    big = np.abs(np.asarray(values, dtype=float)).max()
    if big > MAX_LENGTH_NM:
        bad(f"lengths must lie within {MAX_LENGTH_NM:g} nm (1 m), found {big:.4g} nm "
            f"(check the units)")
    if dom is not None:
        lo, hi = dom.bounds
        ext = float(np.min(np.asarray(hi) - np.asarray(lo)))
        if ext < MIN_EXTENT_NM:
            bad(f"the domain is {ext:.3g} nm across, less than {MIN_EXTENT_NM:g} nm")


def bounding_box(points: np.ndarray, pad: float) -> Box:
    """The padded bounding box of ``points``, marked as inferred."""
    p = np.asarray(points, dtype=float).reshape(-1, 3)
    lo = p.min(axis=0) - pad
    hi = p.max(axis=0) + pad
    return Box(tuple(lo), tuple(hi), False, inferred=True)
