"""Orientation order of sheet normals: Q tensor, order parameter, local and wall order,
orientation distribution and pole figure.

Sheet normals are sign-less (``n`` and ``-n`` are the same orientation), so everything here
is built from the second moment ``n n^T``:

    Q = sum_i w_i (3 n_i n_i^T - I) / 2 / sum_i w_i        (w_i = prism volume)

the nematic order tensor of de Gennes (de Gennes & Prost, The Physics of Liquid Crystals,
2nd ed., Oxford University Press, 1993). Its largest eigenvalue is the order parameter ``S``
(1 for perfect alignment, 1/4 for normals spread evenly over one plane, 0 for an isotropic
set only in the limit of many prisms: N isotropic normals give on average
``(9/4) sqrt(2/(5 pi)) / sqrt(N) = 0.80 / sqrt(N)`` for large N, derived from the Gaussian
limit of Q and checked in tests/validation/test_orientation_validation.py); its
eigenvector is the director.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field

import numba
import numpy as np

from ..errors import OptionError, positive
from ._result import Result
from ..threads import run_chunks
from .cells import cell_list
from .stacking import check_structure

DEFAULTS = {"local_radius": 5.0, "frame": "z", "n_cos": 10, "n_phi": 12, "pole_bins": 41}


# --------------------------------------------------------------------------- tensor
def q_tensor(normals, weights=None) -> np.ndarray:
    """Weighted nematic order tensor ``Q = sum w (3 n n^T - I)/2 / sum w`` (3, 3).

    Normals need not be unit length (they are normalised); zero total weight gives NaN.
    """
    n = np.asarray(normals, dtype=float).reshape(-1, 3)
    n = n / np.linalg.norm(n, axis=1, keepdims=True)
    w = np.ones(len(n)) if weights is None else np.asarray(weights, dtype=float)
    W = w.sum()
    if len(n) == 0 or not W > 0:
        return np.full((3, 3), np.nan)
    M = np.einsum("i,ij,ik->jk", w, n, n) / W
    return 1.5 * M - 0.5 * np.eye(3)


def q_summary(Q):
    """Order parameter, director, biaxiality and eigenvalues (descending) of ``Q``.

    ``S`` is the largest eigenvalue, the director its unit eigenvector (sign chosen so
    that its largest component is positive); biaxiality is ``lambda_2 - lambda_3``,
    zero when the distribution is uniaxial about the director.
    """
    if not np.all(np.isfinite(Q)):
        return float("nan"), None, float("nan"), [float("nan")] * 3
    val, vec = np.linalg.eigh(Q)
    val = val[::-1]
    d = vec[:, 2]
    k = int(np.argmax(np.abs(d)))
    if d[k] < 0:
        d = -d
    return float(val[0]), d, float(val[1] - val[2]), [float(x) for x in val]


# ----------------------------------------------------------------------- local order
@numba.njit(cache=True)
def _axis_cells(c, n, periodic, length, out, shift):
    """Neighbouring cells of cell ``c`` along one axis (each listed once) and the image
    shift to add to their points' coordinate; returns the count, or -1 when a periodic
    axis has fewer than 3 cells (then the minimum image is taken per pair)."""
    if periodic:
        if n < 3:
            for k in range(n):
                out[k] = k
                shift[k] = 0.0
            return -n
        for o in range(3):
            g = c + o - 1
            shift[o] = 0.0
            if g < 0:
                g += n
                shift[o] = -length
            elif g >= n:
                g -= n
                shift[o] = length
            out[o] = g
        return 3
    m = 0
    for o in range(-1, 2):
        g = c + o
        if 0 <= g < n:
            out[m] = g
            shift[m] = 0.0
            m += 1
    return m


@numba.njit(cache=True, nogil=True)
def _local_moments(lo_cell, hi_cell, P, T, W, cells, cell_start, ncell, size, radius,
                   periodic, L, out):
    """Sum of w n n^T (6 components) and of w over the points within ``radius`` of each
    point (itself included), written to the rows of ``out`` (n, 7) of the points of the
    cells ``cells[lo_cell:hi_cell]``. Points are sorted by cell; cells (edges ``size``)
    are at least ``radius`` wide; ``cells`` lists the non-empty cells. Ranges of cells
    run on threads (:func:`sheetview.threads.run_chunks`; each point is in one cell).
    A neighbour cell whose box lies farther than ``radius`` from the point is skipped
    (it holds no neighbour), which leaves the order of the sums unchanged."""
    r2 = radius * radius
    r2_skip = r2 * (1.0 + 1e-9) + 1e-300
    nx, ny, nz = ncell[0], ncell[1], ncell[2]
    gx = np.empty(3, np.int64)
    gy = np.empty(3, np.int64)
    gz = np.empty(3, np.int64)
    sx = np.empty(3)
    sy = np.empty(3)
    sz = np.empty(3)
    acc = np.zeros(7)
    for q in range(lo_cell, hi_cell):
        c = cells[q]
        cz = c % nz
        cy = (c // nz) % ny
        cx = c // (ny * nz)
        mx = _axis_cells(cx, nx, periodic, L[0], gx, sx)
        my = _axis_cells(cy, ny, periodic, L[1], gy, sy)
        mz = _axis_cells(cz, nz, periodic, L[2], gz, sz)
        rnd = mx < 0 or my < 0 or mz < 0
        mx = abs(mx)
        my = abs(my)
        mz = abs(mz)
        for i in range(cell_start[c], cell_start[c + 1]):
            for k in range(7):
                acc[k] = 0.0
            for a in range(mx):
                px = P[i, 0] - sx[a]
                qx = 0.0
                if not rnd:  # distance from the point to the cell's slab along x
                    lo = gx[a] * size[0] - px
                    qx = max(lo, 0.0, -(lo + size[0]))
                    qx *= qx
                for b in range(my):
                    py = P[i, 1] - sy[b]
                    qy = qx
                    if not rnd:
                        lo = gy[b] * size[1] - py
                        t = max(lo, 0.0, -(lo + size[1]))
                        qy += t * t
                        if qy > r2_skip:
                            continue
                    for e in range(mz):
                        pz = P[i, 2] - sz[e]
                        if not rnd:
                            lo = gz[e] * size[2] - pz
                            t = max(lo, 0.0, -(lo + size[2]))
                            if qy + t * t > r2_skip:
                                continue
                        g = (gx[a] * ny + gy[b]) * nz + gz[e]
                        for j in range(cell_start[g], cell_start[g + 1]):
                            d0 = P[j, 0] - px
                            d1 = P[j, 1] - py
                            d2 = P[j, 2] - pz
                            if rnd:
                                d0 -= L[0] * np.round(d0 / L[0])
                                d1 -= L[1] * np.round(d1 / L[1])
                                d2 -= L[2] * np.round(d2 / L[2])
                            if d0 * d0 + d1 * d1 + d2 * d2 <= r2:
                                for k in range(6):
                                    acc[k] += T[j, k]
                                acc[6] += W[j]
            for k in range(7):
                out[i, k] = acc[k]


def _moments6(normals, weights):
    n = normals
    w = weights
    return np.stack([w * n[:, 0] * n[:, 0], w * n[:, 1] * n[:, 1], w * n[:, 2] * n[:, 2],
                     w * n[:, 0] * n[:, 1], w * n[:, 0] * n[:, 2], w * n[:, 1] * n[:, 2]], axis=1)


def _largest_eig(M6, W, chunk=1 << 18):
    """Largest eigenvalue of Q = (3 M/W - I)/2 for rows of 6 moment components."""
    n = len(M6)
    out = np.empty(n)
    for s in range(0, n, chunk):
        m = M6[s:s + chunk] / W[s:s + chunk, None]
        A = np.empty((len(m), 3, 3))
        A[:, 0, 0], A[:, 1, 1], A[:, 2, 2] = m[:, 0], m[:, 1], m[:, 2]
        A[:, 0, 1] = A[:, 1, 0] = m[:, 3]
        A[:, 0, 2] = A[:, 2, 0] = m[:, 4]
        A[:, 1, 2] = A[:, 2, 1] = m[:, 5]
        out[s:s + chunk] = 1.5 * np.linalg.eigvalsh(A)[:, 2] - 0.5
    return out


def local_order(centroids, normals, weights, radius, domain=None) -> np.ndarray:
    """Local order parameter of each prism: the largest eigenvalue of the weighted Q
    tensor of all prisms whose centroids lie within ``radius`` of its centroid (itself
    included; minimum image in a periodic box). Exact, by a numba cell list."""
    P = np.ascontiguousarray(centroids, dtype=np.float64).reshape(-1, 3)
    n = len(P)
    if n == 0:
        return np.zeros(0)
    nrm = np.asarray(normals, dtype=float)
    w = np.asarray(weights, dtype=float)
    cl = cell_list(P, radius, domain, sparse=8.0)
    order = cl.order
    T = np.ascontiguousarray(_moments6(nrm, w)[order])
    mom = np.zeros((n, 7))
    run_chunks(_local_moments, len(cl.cells), cl.P, T, np.ascontiguousarray(w[order]),
               cl.cells, cl.start, cl.ncell, cl.size, float(radius), cl.periodic, cl.L, mom)
    S = np.empty(n)
    S[order] = _largest_eig(mom[:, :6], mom[:, 6])
    return S


# ------------------------------------------------------------------ distributions
def _frame(axis):
    a = np.asarray(axis, dtype=float)
    a = a / np.linalg.norm(a)
    e = np.zeros(3)
    e[int(np.argmin(np.abs(a)))] = 1.0
    if abs(a[2]) > 0.999999:
        e1 = np.array([1.0, 0.0, 0.0])
    else:
        e1 = np.cross(e, a)
        e1 /= np.linalg.norm(e1)
    e2 = np.cross(a, e1)
    return a, e1, e2


def polar_angles(normals, axis=(0, 0, 1)):
    """``cos(theta)`` in [0, 1] and ``phi`` in [-pi, pi) of sign-less normals about
    ``axis`` (each normal flipped into the hemisphere of the axis)."""
    a, e1, e2 = _frame(axis)
    n = np.asarray(normals, dtype=float)
    c = n @ a
    s = np.where(c < 0, -1.0, 1.0)
    ct = np.clip(c * s, 0.0, 1.0)
    phi = np.arctan2((n @ e2) * s, (n @ e1) * s)
    return ct, phi


def orientation_histogram(normals, weights, axis=(0, 0, 1), n_cos=10, n_phi=12):
    """Equal-area histogram of sign-less normals: ``n_cos`` bins equal in cos(theta)
    on [0, 1] times ``n_phi`` bins equal in phi. Every bin covers the same solid angle
    ``2 pi / (n_cos n_phi)`` of the hemisphere (Archimedes' hat-box theorem), so the
    weight fraction per bin times the number of bins is the density in multiples of
    a uniform (isotropic) distribution. Returns (fraction (n_cos, n_phi), cos edges,
    phi edges)."""
    ct, phi = polar_angles(normals, axis)
    ce = np.linspace(0.0, 1.0, n_cos + 1)
    pe = np.linspace(-math.pi, math.pi, n_phi + 1)
    w = np.asarray(weights, dtype=float)
    h, _, _ = np.histogram2d(ct, phi, bins=[ce, pe], weights=w)
    tot = h.sum()
    return (h / tot if tot > 0 else h), ce, pe


def lambert_xy(normals, axis=(0, 0, 1)):
    """Lambert azimuthal equal-area projection of sign-less normals about ``axis``:
    ``r = 2 sin(theta/2) = sqrt(2 (1 - cos theta))``, ``(x, y) = r (cos phi, sin phi)``;
    the upper hemisphere maps onto the disc of radius sqrt(2) preserving area
    (Lambert 1772; Snyder, Map Projections: A Working Manual, USGS Professional Paper
    1395, 1987, chapter on the Lambert azimuthal equal-area projection; the spherical
    formulas are usually cited as pp. 185-186: page numbers not checked)."""
    ct, phi = polar_angles(normals, axis)
    r = np.sqrt(2.0 * (1.0 - ct))
    return r * np.cos(phi), r * np.sin(phi)


def pole_figure(normals, weights, axis=(0, 0, 1), bins=41):
    """Binned Lambert equal-area pole figure: density in multiples of uniform
    (``fraction / cell area * 2 pi``) on a ``bins x bins`` grid over [-sqrt2, sqrt2]^2;
    cells whose centre lies outside the disc are NaN."""
    x, y = lambert_xy(normals, axis)
    r = math.sqrt(2.0)
    e = np.linspace(-r, r, bins + 1)
    w = np.asarray(weights, dtype=float)
    h, _, _ = np.histogram2d(x, y, bins=[e, e], weights=w)
    tot = h.sum()
    cell = (e[1] - e[0]) ** 2
    dens = h / tot / cell * 2.0 * math.pi if tot > 0 else h
    mid = 0.5 * (e[1:] + e[:-1])
    outside = (mid[:, None] ** 2 + mid[None, :] ** 2) > 2.0
    dens[outside] = np.nan
    return dens, e


# ------------------------------------------------------------------------- result
@dataclass(repr=False)
class OrderResult(Result):
    """Orientation order of a structure's prisms (volume-weighted)."""

    n_prisms: int
    Q: np.ndarray
    S: float
    director: np.ndarray | None
    biaxiality: float
    eigenvalues: list
    local_radius: float
    local_S: np.ndarray
    wall: float | None
    wall_S_per_prism: np.ndarray
    frame: str
    axis: np.ndarray
    hist: np.ndarray
    cos_edges: np.ndarray
    phi_edges: np.ndarray
    pole: np.ndarray
    pole_edges: np.ndarray
    lambert: tuple = field(repr=False, default=None)
    notes: list = field(default_factory=list)

    def to_dict(self) -> dict:
        ls = self.local_S
        return {
            "n_prisms": self.n_prisms,
            "S": self.S,
            "director": None if self.director is None else [float(v) for v in self.director],
            "biaxiality": self.biaxiality,
            "eigenvalues": self.eigenvalues,
            "Q": self.Q.tolist(),
            "wall": self.wall,
            "local": {"radius": self.local_radius,
                      "mean": float(ls.mean()) if len(ls) else None,
                      "median": float(np.median(ls)) if len(ls) else None,
                      "histogram": _local_hist(ls)},
            "distribution": {"frame": self.frame, "axis": [float(v) for v in self.axis],
                             "cos_theta_edges": self.cos_edges.tolist(),
                             "phi_edges_deg": np.degrees(self.phi_edges).tolist(),
                             "fraction": self.hist.tolist(),
                             "polar_fraction": self.hist.sum(axis=1).tolist()},
            "pole_figure": {"projection": "Lambert azimuthal equal-area, upper hemisphere",
                            "edges": self.pole_edges.tolist(),
                            "density_multiples_of_uniform": self.pole.tolist()},
            "notes": list(self.notes),
        }

    def table(self) -> dict:
        """Per-prism columns: local order parameter and P2 of the angle to the wall."""
        return {"local_S": self.local_S, "wall_P2": self.wall_S_per_prism}

    def tables(self) -> dict:
        """CSV tables: per-prism columns (``prisms``, joined with the stacking table), the
        equal-area orientation histogram and the pole figure (density in multiples of a
        uniform distribution)."""
        ce, pe = self.cos_edges, self.phi_edges
        nc, nphi = self.hist.shape
        ci, pi = np.meshgrid(np.arange(nc), np.arange(nphi), indexing="ij")
        e = self.pole_edges
        xi, yi = np.meshgrid(np.arange(len(e) - 1), np.arange(len(e) - 1), indexing="ij")
        return {"prisms": {"prism": np.arange(self.n_prisms), **self.table()},
                "orientation_distribution": {
                    "cos_theta_lo": ce[ci.ravel()], "cos_theta_hi": ce[ci.ravel() + 1],
                    "phi_lo_deg": np.degrees(pe[pi.ravel()]),
                    "phi_hi_deg": np.degrees(pe[pi.ravel() + 1]),
                    "fraction": self.hist.ravel(),
                    "density_multiples_of_uniform": self.hist.ravel() * nc * nphi},
                "pole_figure": {"x": 0.5 * (e[xi.ravel()] + e[xi.ravel() + 1]),
                                "y": 0.5 * (e[yi.ravel()] + e[yi.ravel() + 1]),
                                "density_multiples_of_uniform": self.pole.ravel()}}

    def basis(self) -> dict:
        return {"order.S": "largest eigenvalue of the volume-weighted nematic order tensor of "
                           "the sheet normals (1 aligned, 0 isotropic)"}

    def brief(self) -> str:
        if self.director is None:
            return "no prisms"
        return f"S = {self.S:.4f}, biaxiality {self.biaxiality:.4f}, {self.n_prisms} prisms"


def _local_hist(ls, nb=20):
    if len(ls) == 0:
        return {"edges": [], "counts": []}
    e = np.linspace(-0.5, 1.0, nb + 1)
    c, _ = np.histogram(np.clip(ls, -0.5, 1.0), bins=e)
    return {"edges": e.tolist(), "counts": c.tolist()}


def orientation(structure, *, local_radius: float = DEFAULTS["local_radius"],
                frame: str = DEFAULTS["frame"], n_cos: int = DEFAULTS["n_cos"],
                n_phi: int = DEFAULTS["n_phi"], pole_bins: int = DEFAULTS["pole_bins"]) -> OrderResult:
    """Orientation order of the prism normals of ``structure``.

    Parameters
    ----------
    structure : Structure
    local_radius : float
        Radius (nm) of the neighbourhood of the local order parameter (default 5 nm,
        a few repeats: about the size of a stack).
    frame : {"z", "director"}
        Reference axis of the orientation histogram and pole figure.
    n_cos, n_phi : int
        Equal-area histogram bins in cos(theta) and phi.
    pole_bins : int
        Pole-figure grid size.

    Returns
    -------
    OrderResult
        ``S`` (largest eigenvalue of the volume-weighted Q tensor), ``director``,
        ``biaxiality``, ``local_S`` per prism, ``wall`` = volume-weighted
        ``<P2(n . w)>`` with ``w`` the inward wall normal at the centroid
        (``P2(x) = (3x^2 - 1)/2``: +1 when the sheets lie flat against the wall, -1/2 when
        they stand on edge against it, 0 for isotropic sheets; None in a periodic box,
        which has no walls), equal-area histogram and pole figure.

    References
    ----------
    de Gennes & Prost, The Physics of Liquid Crystals, 2nd ed. (1993); Mardia & Jupp,
    Directional Statistics, Wiley (2000), for the Watson distribution used in validation.
    """
    check_structure(structure)
    local_radius = positive(local_radius, "local radius", param="local_radius")
    if frame not in ("z", "director"):
        raise OptionError(f"frame must be 'z' or 'director', got {frame!r}", param="frame")
    for name, v in (("n_cos", n_cos), ("n_phi", n_phi), ("pole_bins", pole_bins)):
        if int(v) != v or v < 1:
            raise OptionError(f"{name} must be a positive whole number, got {v!r}", param=name)
    n = len(structure)
    notes = []
    nrm = np.asarray(structure.normals, dtype=float)
    w = np.asarray(structure.volumes, dtype=float)
    C = np.asarray(structure.centroids, dtype=float)
    dom = structure.domain
    Q = q_tensor(nrm, w)
    S, director, biax, eig = q_summary(Q)
    if n == 0:
        notes.append("no prisms: order parameter undefined (NaN)")
    elif n == 1:
        notes.append("a single prism: S = 1 by definition (one direction is perfectly ordered)")
    local_S = local_order(C, nrm, w, local_radius, dom)
    # wall order
    if getattr(dom, "periodic", False):
        wall = None
        wall_p2 = np.full(n, np.nan)
        notes.append("periodic box: no walls, wall order undefined (null)")
    else:
        wn = np.asarray(dom.inward_normal(C), dtype=float).reshape(-1, 3)
        ok = np.all(np.isfinite(wn), axis=1)
        c = np.einsum("ij,ij->i", nrm, np.where(ok[:, None], wn, 0.0))
        wall_p2 = np.where(ok, 1.5 * c * c - 0.5, np.nan)
        W = w[ok].sum()
        wall = float((w[ok] * wall_p2[ok]).sum() / W) if W > 0 else None
        if getattr(dom, "inferred", False):
            notes.append("no domain in the input: wall order refers to the padded bounding box")
        if n and not ok.all():
            notes.append(f"{int((~ok).sum())} prism(s) at the sphere centre have no wall "
                         "normal and are left out of the wall order")
    axis = director if (frame == "director" and director is not None) else np.array([0.0, 0.0, 1.0])
    if frame == "director" and director is None:
        notes.append("no director (no prisms): the z axis is used as reference")
    hist, ce, pe = orientation_histogram(nrm, w, axis, int(n_cos), int(n_phi))
    pole, pe2 = pole_figure(nrm, w, axis, int(pole_bins))
    return OrderResult(n, Q, S, director, biax, eig, local_radius, local_S, wall, wall_p2,
                       frame, np.asarray(axis, dtype=float), hist, ce, pe, pole, pe2,
                       lambert_xy(nrm, axis), notes)
