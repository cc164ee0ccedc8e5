"""Particle packings: spheres and ellipsoids in a domain, and layered particles made of sheets.

A :class:`ParticleSet` holds solid particles, each an ellipsoid given by its centre (nm),
its three semi-axes ``a, b, c`` (nm, along the particle's own x, y, z axes) and the unit
quaternion ``q = (qw, qx, qy, qz)`` that rotates the particle's axes into the lab frame
(``x_lab = R(q) x_body + centre``; a sphere has ``a = b = c`` and any ``q``). A point ``p``
is inside particle ``i`` iff ``(p - c_i)^T M_i (p - c_i) <= 1`` with the shape matrix
``M = R diag(a^-2, b^-2, c^-2) R^T``.

Exact geometry (no overlap removed: sums count overlapping parts twice):

* volume ``4/3 pi a b c``;
* surface ``4 pi a b c R_G(a^-2, b^-2, c^-2)`` with Carlson's completely symmetric elliptic
  integral ``R_G`` (Carlson, Numer. Math. 33 (1979) 1; DLMF 19.33.1, `scipy.special.elliprg`);
* axis-aligned bounds: half-extent along lab axis ``i`` = ``sqrt((M^-1)_ii)``.

Layered particles (discs or ellipsoids cut into sheets) are not kept as solid particles:
:func:`layered_structure` turns them into the prisms of a
:class:`~sheetview.structure.Structure` so that stacking, order, interlayer and gel classes
see them as grown sheets do.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field
from functools import cached_property

import numba
import numpy as np

from .domain import MAX_LENGTH_NM, Box, Domain, Sphere, bounding_box
from .errors import InputError, OptionError
from .grid import (MIN_VOXEL_NM, OUTSIDE, SOLID, PhaseGrid, check_domain_for_grid,
                   default_body_voxel_size, domain_frame)
from .structure import DEFAULT_SPACING_NM, Structure

#: Default sheet thickness (nm) of a layered particle: half the 1.4 nm repeat, the
#: calcium-silicate layer of 14 A tobermorite (Bonaccorsi, Merlino & Kampf 2005) taken as
#: 0.7 nm; a choice of this program for invented particles, not a measured value.
DEFAULT_SHEET_THICKNESS_NM = 0.7
#: Polygon sides of each layer of a layered particle (the polygon is scaled so that its
#: area equals the ellipse's exactly).
DEFAULT_SEGMENTS = 24
#: Largest allowed deviation of a quaternion's norm from 1 before it is refused (text
#: files round; a larger deviation means a wrong column). Quaternions are normalised.
QUATERNION_TOL = 1e-3
#: Outlines of the layers of a layered particle.
OUTLINES = ("disc", "ellipsoid")


def _readonly(a) -> np.ndarray:
    a = np.ascontiguousarray(a)
    if a.flags.writeable:
        a = a.copy()
        a.flags.writeable = False
    return a


def quaternion_matrices(q) -> np.ndarray:
    """Rotation matrices (N, 3, 3) of unit quaternions ``(w, x, y, z)`` (N, 4) (normalised
    here); column ``k`` of ``R`` is the particle's axis ``k`` in the lab frame."""
    q = np.asarray(q, dtype=np.float64).reshape(-1, 4)
    q = q / np.linalg.norm(q, axis=1, keepdims=True)
    w, x, y, z = q.T
    R = np.empty((len(q), 3, 3))
    R[:, 0, 0] = 1 - 2 * (y * y + z * z)
    R[:, 0, 1] = 2 * (x * y - w * z)
    R[:, 0, 2] = 2 * (x * z + w * y)
    R[:, 1, 0] = 2 * (x * y + w * z)
    R[:, 1, 1] = 1 - 2 * (x * x + z * z)
    R[:, 1, 2] = 2 * (y * z - w * x)
    R[:, 2, 0] = 2 * (x * z - w * y)
    R[:, 2, 1] = 2 * (y * z + w * x)
    R[:, 2, 2] = 1 - 2 * (x * x + y * y)
    return R


def random_quaternions(n: int, seed=None) -> np.ndarray:
    """``n`` uniformly random rotations as unit quaternions (normalised Gaussian 4-vectors:
    uniform on the 3-sphere, i.e. Haar-uniform rotations; Shoemake, Graphics Gems III, 1992)."""
    q = np.random.default_rng(seed).normal(size=(int(n), 4))
    return q / np.linalg.norm(q, axis=1, keepdims=True)


def ellipsoid_surface(a, b, c) -> np.ndarray:
    """Exact surface area of ellipsoids with semi-axes ``a, b, c``:
    ``4 pi a b c R_G(a^-2, b^-2, c^-2)`` (Carlson's symmetric form; DLMF 19.33.1)."""
    from scipy.special import elliprg
    a, b, c = (np.asarray(v, dtype=np.float64) for v in (a, b, c))
    return 4.0 * np.pi * a * b * c * elliprg(a ** -2.0, b ** -2.0, c ** -2.0)


@dataclass(frozen=True, eq=False)
class ParticleSet:
    """Solid ellipsoidal particles (spheres included) in a domain, lengths in nm.

    Parameters
    ----------
    centers : (N, 3) float array
    semi_axes : (N, 3) float array, ``a, b, c`` along the particle's own axes (> 0)
    rotations : (N, 4) float array, unit quaternions ``(w, x, y, z)`` (normalised here)
    domain : Sphere or Box
    kind : "spheres" or "ellipsoids" (what the table gave; spheres have ``a = b = c``)
    columns : dict of str -> (N,) array, extra per-particle columns
    metadata : dict, free header metadata
    source : where the particles came from (for messages)
    """

    centers: np.ndarray
    semi_axes: np.ndarray
    rotations: np.ndarray
    domain: Domain
    kind: str = "ellipsoids"
    columns: dict = field(default_factory=dict)
    metadata: dict = field(default_factory=dict)
    source: str | None = None

    def __post_init__(self):
        c = np.asarray(self.centers, dtype=np.float64)
        if c.ndim != 2 or c.shape[1] != 3:
            raise ValueError(f"centers must have shape (N, 3), not {c.shape}")
        n = len(c)
        s = np.asarray(self.semi_axes, dtype=np.float64)
        if s.ndim == 1 and s.shape == (n,):  # radii
            s = np.repeat(s[:, None], 3, axis=1)
        if s.shape != (n, 3):
            raise ValueError(f"semi_axes must have shape ({n}, 3), not {s.shape}")
        q = np.asarray(self.rotations, dtype=np.float64)
        if q.ndim == 1 and q.shape == (4,):
            q = np.broadcast_to(q, (n, 4))
        if q.shape != (n, 4):
            raise ValueError(f"rotations must have shape ({n}, 4), not {q.shape}")
        if self.kind not in ("spheres", "ellipsoids"):
            raise ValueError(f"kind must be 'spheres' or 'ellipsoids', not {self.kind!r}")
        cols = {}
        for name, arr in self.columns.items():
            a = np.asarray(arr)
            if a.shape != (n,):
                raise ValueError(f"column {name!r} must have shape ({n},), not {a.shape}")
            cols[name] = _readonly(a)
        object.__setattr__(self, "centers", _readonly(c))
        object.__setattr__(self, "semi_axes", _readonly(s))
        object.__setattr__(self, "rotations", _readonly(q))
        object.__setattr__(self, "columns", cols)
        object.__setattr__(self, "metadata", dict(self.metadata))

    # ------------------------------------------------------------------ basics
    def __len__(self) -> int:
        return self.centers.shape[0]

    @property
    def n_particles(self) -> int:
        return len(self)

    def __repr__(self) -> str:
        return (f"ParticleSet({len(self)} {self.kind}, domain={self.domain.to_dict()}, "
                f"columns={sorted(self.columns)})")

    # ------------------------------------------------------- exact geometry
    @cached_property
    def matrices(self) -> np.ndarray:
        """Rotation matrices (N, 3, 3), column k = the particle's axis k in the lab frame."""
        return _readonly(quaternion_matrices(self.rotations))

    @cached_property
    def shape_matrices(self) -> np.ndarray:
        """``M = R diag(s^-2) R^T`` (N, 3, 3): inside iff ``d^T M d <= 1``."""
        R = self.matrices
        return _readonly(np.einsum("nik,nk,njk->nij", R, self.semi_axes ** -2.0, R))

    @cached_property
    def volumes(self) -> np.ndarray:
        """Exact volumes ``4/3 pi a b c`` (nm^3)."""
        return _readonly(4.0 / 3.0 * np.pi * np.prod(self.semi_axes, axis=1))

    @cached_property
    def surfaces(self) -> np.ndarray:
        """Exact surface areas (nm^2): ``4 pi R^2`` for spheres, Carlson's form for ellipsoids."""
        s = self.semi_axes
        return _readonly(ellipsoid_surface(s[:, 0], s[:, 1], s[:, 2]))

    @property
    def volume(self) -> float:
        """Sum of particle volumes (overlaps counted twice), nm^3."""
        return float(self.volumes.sum())

    @property
    def area(self) -> float:
        """Sum of particle surfaces (overlaps counted twice), nm^2."""
        return float(self.surfaces.sum())

    @cached_property
    def half_extents(self) -> np.ndarray:
        """Half-widths (N, 3) of each particle's axis-aligned bounding box:
        ``sqrt(sum_k R_ik^2 s_k^2)``."""
        R = self.matrices
        return _readonly(np.sqrt(np.einsum("nik,nk->ni", R ** 2, self.semi_axes ** 2)))

    def bounds(self) -> tuple[np.ndarray, np.ndarray]:
        """Exact axis-aligned bounds of all particles (nm)."""
        if len(self) == 0:
            z = np.zeros(3)
            return z, z
        return ((self.centers - self.half_extents).min(axis=0),
                (self.centers + self.half_extents).max(axis=0))

    def volume_fraction(self) -> float:
        """Sum of particle volumes over the domain volume (overlaps counted twice; exact for
        non-overlapping particles wholly inside the domain or in a periodic box)."""
        return self.volume / float(self.domain.volume)

    def separated(self) -> bool | None:
        """Whether no two particles overlap and every particle lies wholly inside the domain
        (a periodic box has no outside): exact for spheres (a k-d tree, periodic minimum
        image); for ellipsoids True when their bounding spheres (largest semi-axis) are
        apart, else None (not decided)."""
        from scipy.spatial import cKDTree
        dom = self.domain
        periodic = bool(getattr(dom, "periodic", False))
        r = self.semi_axes.max(axis=1)
        if not periodic:
            if isinstance(dom, Sphere):
                inside = np.linalg.norm(self.centers - np.asarray(dom.center), axis=1) + r <= dom.radius
            else:
                lo, hi = dom.bounds
                inside = np.all((self.centers - self.half_extents >= lo)
                                & (self.centers + self.half_extents <= hi), axis=1)
            if not inside.all():
                return False if self.kind == "spheres" or isinstance(dom, Box) else None
        if len(self) < 2:
            return True
        if periodic:
            if np.any(2 * r >= dom.lengths.min()):
                return None
            lo = np.asarray(dom.min)
            tree = cKDTree(dom.wrap(self.centers) - lo, boxsize=dom.lengths * (1 + 1e-12))
        else:
            tree = cKDTree(self.centers)
        pairs = tree.query_pairs(2 * float(r.max()), output_type="ndarray")
        if len(pairs) == 0:
            return True
        d = self.centers[pairs[:, 1]] - self.centers[pairs[:, 0]]
        if periodic:
            d = dom.minimum_image(d)
        apart = np.linalg.norm(d, axis=1) >= r[pairs[:, 0]] + r[pairs[:, 1]]
        if apart.all():
            return True
        return False if self.kind == "spheres" else None

    def exact_surface(self) -> float | None:
        """The exact surface of the solid (nm^2), the sum of the particle surfaces, when
        :meth:`separated` is True; else None (overlaps or wall cuts change the union's
        surface, which is not computed)."""
        return self.area if self.separated() else None

    def subset(self, mask) -> "ParticleSet":
        idx = np.asarray(mask)
        return ParticleSet(self.centers[idx], self.semi_axes[idx], self.rotations[idx],
                           self.domain, self.kind, {k: v[idx] for k, v in self.columns.items()},
                           self.metadata, self.source)

    # ---------------------------------------------------------- validation
    def validate(self) -> None:
        """Raise :class:`InputError` for non-finite or out-of-range centres, semi-axes or
        quaternions, naming the first offending particle (1-based row) and column."""
        src = self.source
        names = {"centers": ("x", "y", "z"),
                 "semi_axes": ("radius",) * 3 if self.kind == "spheres" else ("a", "b", "c"),
                 "rotations": ("qw", "qx", "qy", "qz")}
        for attr, cols in names.items():
            a = getattr(self, attr)
            bad = ~np.isfinite(a)
            if bad.any():
                i, k = (int(v) for v in np.argwhere(bad)[0])
                raise InputError(f"particle row {i + 1}: column '{cols[k]}' must be a finite "
                                 f"number (found NaN or inf; {int(bad.any(axis=1).sum())} row(s) "
                                 f"affected)", path=src, field=cols[k])
        c = self.centers
        bad = np.abs(c) > MAX_LENGTH_NM
        if bad.any():
            i, k = (int(v) for v in np.argwhere(bad)[0])
            raise InputError(f"particle row {i + 1}: column '{'xyz'[k]}' must lie within "
                             f"{MAX_LENGTH_NM:g} nm (1 m) of the origin, found {c[i, k]:.4g} nm "
                             f"(check the units)", path=src, field="xyz"[k])
        s = self.semi_axes
        bad = (s <= 0) | (s > MAX_LENGTH_NM)
        if bad.any():
            i, k = (int(v) for v in np.argwhere(bad)[0])
            col = names["semi_axes"][k]
            what = "radius" if self.kind == "spheres" else "semi-axis"
            raise InputError(f"particle row {i + 1}: column '{col}' ({what}) must be a positive "
                             f"number of at most {MAX_LENGTH_NM:g} nm, got {s[i, k]:.6g} "
                             f"({int(bad.any(axis=1).sum())} row(s) affected)", path=src,
                             field=col)
        norm = np.linalg.norm(self.rotations, axis=1)
        bad = np.abs(norm - 1.0) > QUATERNION_TOL
        if bad.any():
            i = int(np.flatnonzero(bad)[0])
            raise InputError(f"particle row {i + 1}: columns 'qw, qx, qy, qz' must form a unit "
                             f"quaternion (norm 1 within {QUATERNION_TOL:g}), norm is "
                             f"{norm[i]:.6g} ({int(bad.sum())} row(s) affected)", path=src,
                             field="qw")

    # ---------------------------------------------------------- grids
    def rasterize(self, voxel_size=None, *, max_memory=None) -> PhaseGrid:
        """The phase grid (see :func:`rasterize_particles`)."""
        return rasterize_particles(self, voxel_size, max_memory=max_memory)


def inferred_domain(centers, half_extents) -> Box:
    """The padded bounding box used when a particle table gives no domain: the particles'
    exact bounds padded by one nominal repeat (1.4 nm)."""
    c = np.asarray(centers, float).reshape(-1, 3)
    h = np.asarray(half_extents, float).reshape(-1, 3)
    if len(c) == 0:
        return Box((0.0, 0.0, 0.0), (1.0, 1.0, 1.0), inferred=True)
    return bounding_box(np.concatenate([c - h, c + h]), pad=DEFAULT_SPACING_NM)


# ================================================================== rasterization
@numba.njit(cache=True, parallel=True)
def _mark_ellipsoids(cen, M, half, org, sp, full, periodic, out, value, keep):
    """Write ``value`` into every voxel whose centre lies inside an ellipsoid (and whose
    label is not ``keep``). Per particle and (i, j) column, the z-interval inside is the
    root interval of a quadratic: ``A dz^2 + 2 B dz + C <= 0``. Particles run in parallel;
    two threads writing one voxel write the same value."""
    n = cen.shape[0]
    nx, ny, nz = full[0], full[1], full[2]
    for p in numba.prange(n):
        cx, cy, cz = cen[p, 0], cen[p, 1], cen[p, 2]
        m00, m01, m02 = M[p, 0, 0], M[p, 0, 1], M[p, 0, 2]
        m11, m12, m22 = M[p, 1, 1], M[p, 1, 2], M[p, 2, 2]
        i0 = int(math.ceil((cx - half[p, 0] - org[0]) / sp[0] - 0.5))
        i1 = int(math.floor((cx + half[p, 0] - org[0]) / sp[0] - 0.5))
        j0 = int(math.ceil((cy - half[p, 1] - org[1]) / sp[1] - 0.5))
        j1 = int(math.floor((cy + half[p, 1] - org[1]) / sp[1] - 0.5))
        if not periodic:
            i0 = max(i0, 0)
            i1 = min(i1, nx - 1)
            j0 = max(j0, 0)
            j1 = min(j1, ny - 1)
        for i in range(i0, i1 + 1):
            dx = org[0] + (i + 0.5) * sp[0] - cx
            ii = i % nx if periodic else i
            for j in range(j0, j1 + 1):
                dy = org[1] + (j + 0.5) * sp[1] - cy
                B = m02 * dx + m12 * dy
                C = m00 * dx * dx + 2.0 * m01 * dx * dy + m11 * dy * dy - 1.0
                disc = B * B - m22 * C
                if disc < 0.0:
                    continue
                r = math.sqrt(disc)
                zlo = cz + (-B - r) / m22
                zhi = cz + (-B + r) / m22
                k0 = int(math.ceil((zlo - org[2]) / sp[2] - 0.5))
                k1 = int(math.floor((zhi - org[2]) / sp[2] - 0.5))
                if not periodic:
                    k0 = max(k0, 0)
                    k1 = min(k1, nz - 1)
                jj = j % ny if periodic else j
                for k in range(k0, k1 + 1):
                    kk = k % nz if periodic else k
                    if out[ii, jj, kk] != keep:
                        out[ii, jj, kk] = value


def default_voxel_size(particles: ParticleSet) -> tuple[float, str]:
    """Default voxel edge (nm) and its rule: the rule of closed bodies
    (:func:`sheetview.grid.default_body_voxel_size`: the thinner of the solid and pore mean
    chords ``4V/S`` over 12), with V and S the exact sums over the particles (overlaps
    counted twice), and at most the smallest particle's mean chord ``4 V_i / S_i`` over 6."""
    v, rule = default_body_voxel_size(particles)
    small = float(np.min(4.0 * particles.volumes / particles.surfaces)) / 6.0
    if small < v:
        v, rule = max(small, MIN_VOXEL_NM), f"smallest particle's mean chord 4V/S = {6 * small:.4g} nm / 6"
    return v, rule


def rasterize_particles(particles: ParticleSet, voxel_size=None, *, max_memory=None) -> PhaseGrid:
    """Label the voxels of the domain's grid as SOLID (centre inside some particle), GEL
    (inside the domain, not solid) or OUTSIDE, as :func:`sheetview.grid.rasterize` does for
    prisms: voxel centre sampling, the same grid geometry (:func:`~sheetview.grid.grid_geometry`)
    and memory guard; particles crossing a periodic box wrap around.

    A voxel centre ``p`` is inside particle ``i`` iff ``(p - c_i)^T M_i (p - c_i) <= 1``;
    per particle and grid column the inside part is the root interval of a quadratic in
    ``z`` (exact, no per-voxel test). Default voxel: :func:`default_voxel_size`.
    """
    if not isinstance(particles, ParticleSet):
        raise OptionError(f"expected a ParticleSet, got {type(particles).__name__}")
    src = particles.source
    if len(particles) == 0:
        raise OptionError("the table holds no particles: nothing to rasterize", path=src)
    dom = particles.domain
    check_domain_for_grid(dom, src)
    labels, v, spacing, origin, default = domain_frame(
        dom, voxel_size, lambda: default_voxel_size(particles), max_memory, src)
    shape = labels.shape
    periodic = bool(getattr(dom, "periodic", False))
    if periodic and np.any(particles.half_extents > dom.lengths):
        raise OptionError("a particle is wider than twice the periodic box along some axis: "
                          "its periodic images are not supported; use a larger box", path=src)
    cen = np.ascontiguousarray(dom.wrap(particles.centers) if periodic else particles.centers)
    _mark_ellipsoids(cen, np.ascontiguousarray(particles.shape_matrices),
                     np.ascontiguousarray(particles.half_extents),
                     np.asarray(origin, np.float64), np.asarray(spacing, np.float64),
                     np.asarray(shape, np.int64), periodic, labels, np.uint8(SOLID),
                     np.uint8(OUTSIDE))
    meta = {"voxel_size_nm": v, "n_particles": int(len(particles))}
    if default is not None:
        meta["voxel_default"] = default
    return PhaseGrid(labels, spacing, origin, periodic=periodic, metadata=meta, source=src)


def periodic_images(particles: ParticleSet) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Centres (wrapped into the box), shape matrices and particle ids of the particles of a
    periodic box and of their images shifted by box lengths where a particle's bounding box
    crosses a face (so that lines inside the primary cell meet every part of every particle)."""
    dom = particles.domain
    cen = dom.wrap(particles.centers)
    M = particles.shape_matrices
    h = particles.half_extents
    L = dom.lengths
    lo, hi = dom.bounds
    if np.any(h > L):
        raise OptionError("a particle is wider than twice the periodic box along some axis: "
                          "its periodic images are not supported; use a larger box",
                          path=particles.source)
    out_c, out_m, out_i = [cen], [M], [np.arange(len(cen))]
    # shifts -1, 0, +1 per axis reach every part of a particle no wider than 2 L
    for sx in (-1, 0, 1):
        for sy in (-1, 0, 1):
            for sz in (-1, 0, 1):
                if sx == sy == sz == 0:
                    continue
                s = np.array([sx, sy, sz], float)
                c2 = cen + s * L
                keep = np.all((c2 + h >= lo) & (c2 - h <= hi), axis=1)
                if keep.any():
                    out_c.append(c2[keep])
                    out_m.append(M[keep])
                    out_i.append(np.flatnonzero(keep))
    return (np.ascontiguousarray(np.concatenate(out_c)), np.ascontiguousarray(np.concatenate(out_m)),
            np.concatenate(out_i).astype(np.int64))


# ================================================================ layered particles
def layered_structure(centers, semi_axes, layers, rotations=None, domain=None, *,
                      spacing: float = DEFAULT_SPACING_NM,
                      thickness: float = DEFAULT_SHEET_THICKNESS_NM, outline: str = "disc",
                      segments: int = DEFAULT_SEGMENTS, columns=None, metadata=None,
                      source=None) -> Structure:
    """Prisms of layered particles: particle ``i`` is ``layers[i]`` parallel sheets of
    ``thickness`` nm at a repeat of ``spacing`` nm, stacked along the particle's own z axis
    and centred on ``centers[i]``; each sheet is an ellipse of semi-axes ``a, b``
    (``semi_axes[i]``, (N, 2); or (N,) for circular discs) along the particle's x and y
    axes, tiled by a fan of ``segments`` triangular prisms about its centre.

    ``outline="disc"``: every layer has the full outline (a stack of equal discs);
    ``"ellipsoid"``: layer k at height ``z_k = (k - (N-1)/2) * spacing`` is scaled by
    ``sqrt(1 - (z_k / h)^2)`` with ``h = N * spacing / 2`` (the cross-sections of an
    ellipsoid of semi-axes a, b, h). The polygon of each layer is scaled by
    ``sqrt(2 pi / (m sin(2 pi / m)))`` so that its area equals the ellipse's ``pi a b``
    exactly. Columns: ``particle`` (0-based particle index), ``layer`` (0-based within the
    particle), ``sheet`` (one id per layer over the whole set).

    Ground truth of one particle of N layers, outline disc: stacking number N, interlayer
    volume ``(N - 1) (spacing - thickness) pi a b``.
    """
    c = np.asarray(centers, float).reshape(-1, 3)
    n = len(c)
    ab = np.asarray(semi_axes, float)
    if ab.ndim == 1:
        ab = np.repeat(ab[:, None], 2, axis=1)
    ab = ab.reshape(n, 2)
    nl = np.asarray(layers).reshape(n)
    if outline not in OUTLINES:
        raise OptionError(f"outline must be one of {', '.join(OUTLINES)}, not {outline!r}",
                          param="outline")
    m = int(segments)
    if m < 3:
        raise OptionError(f"segments must be at least 3, got {segments!r}", param="segments")
    if not (np.isfinite(spacing) and np.isfinite(thickness) and 0 < thickness < spacing):
        raise OptionError(f"a layered particle needs 0 < sheet thickness ({thickness:g} nm) < "
                          f"repeat ({spacing:g} nm)", param="thickness", path=source)
    if n and (np.any(nl < 1) or np.any(nl != np.round(nl))):
        i = int(np.flatnonzero((nl < 1) | (nl != np.round(nl)))[0])
        raise InputError(f"particle row {i + 1}: column 'layers' must be a whole number >= 1, "
                         f"got {nl[i]:g}", path=source, field="layers")
    nl = nl.astype(np.int64)
    R = quaternion_matrices(np.broadcast_to([1.0, 0, 0, 0], (n, 4)) if rotations is None
                            else rotations) if n else np.zeros((0, 3, 3))
    pid = np.repeat(np.arange(n), nl)
    first = np.concatenate([[0], np.cumsum(nl)[:-1]]) if n else np.zeros(0, np.int64)
    k = np.arange(int(nl.sum())) - np.repeat(first, nl)
    z = (k - 0.5 * (nl[pid] - 1)) * spacing
    f = np.ones(len(z))
    if outline == "ellipsoid":
        f = np.sqrt(1.0 - (z / (0.5 * nl[pid] * spacing)) ** 2)
    g = math.sqrt(2 * math.pi / (m * math.sin(2 * math.pi / m)))
    th = 2 * np.pi * np.arange(m + 1) / m
    ring = np.stack([np.cos(th), np.sin(th)], axis=1) * g          # (m+1, 2)
    # corners in the particle frame, per layer: (L, m+1, 3)
    loc = np.empty((len(z), m + 1, 3))
    loc[:, :, 0] = ring[None, :, 0] * (ab[pid, 0] * f)[:, None]
    loc[:, :, 1] = ring[None, :, 1] * (ab[pid, 1] * f)[:, None]
    loc[:, :, 2] = z[:, None]
    lab = np.einsum("lij,lmj->lmi", R[pid], loc) + c[pid][:, None, :]
    mid = np.einsum("lij,j->li", R[pid], [0.0, 0.0, 1.0]) * z[:, None] + c[pid]
    V = np.empty((len(z), m, 3, 3))
    V[:, :, 0] = mid[:, None, :]
    V[:, :, 1] = lab[:, :-1]
    V[:, :, 2] = lab[:, 1:]
    V = V.reshape(-1, 3, 3)
    cols = {"particle": np.repeat(pid, m), "layer": np.repeat(k, m),
            "sheet": np.repeat(np.arange(len(z)), m)}
    for name, arr in (columns or {}).items():
        cols[name] = np.repeat(np.repeat(np.asarray(arr), nl), m)
    if domain is None:
        dom = bounding_box(V.reshape(-1, 3), pad=thickness + spacing) if len(V) else \
            Box((0.0, 0.0, 0.0), (1.0, 1.0, 1.0), inferred=True)
    else:
        dom = domain
    meta = dict(metadata or {})
    meta.setdefault("layered_particles", {"n_particles": int(n), "outline": outline,
                                          "segments": m, "sheet_thickness_nm": float(thickness),
                                          "repeat_nm": float(spacing)})
    return Structure(V, np.full(len(V), float(thickness)), dom, float(spacing), cols, meta,
                     source)
