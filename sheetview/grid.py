"""PhaseGrid: a voxel label volume with physical spacing, and the phase codes.

Indexing is ``labels[i, j, k]`` = x, y, z; voxel ``(i, j, k)`` has its centre at
``origin + (i + 0.5, j + 0.5, k + 0.5) * spacing`` (nm).
"""
from __future__ import annotations

import math
import os
from dataclasses import dataclass, field

import numba
import numpy as np

from .errors import MemoryLimitError, OptionError

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
    metadata : free metadata (JSON-compatible)
    source : where the grid came from (for messages)
    solid_fraction : optional (nx, ny, nz) float32 array, the fraction of each voxel's
        volume inside prisms, estimated from ``s**3`` sub-points (see :func:`rasterize`)
    """

    labels: np.ndarray
    spacing: tuple = (1.0, 1.0, 1.0)
    origin: tuple = (0.0, 0.0, 0.0)
    names: dict = field(default_factory=lambda: dict(PHASE_NAMES))
    periodic: bool = False
    metadata: dict = field(default_factory=dict)
    source: str | None = None
    solid_fraction: np.ndarray | None = None

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

    # ------------------------------------------------------------ geometry helpers
    def axis_centers(self, axis: int) -> np.ndarray:
        """Voxel-centre coordinates (nm) along one axis: ``origin + (i + 0.5) * spacing``."""
        n = self.shape[axis]
        return self.origin[axis] + (np.arange(n) + 0.5) * self.spacing[axis]

    def voxel_centers(self, index=None) -> np.ndarray:
        """Centres (nm) of the voxels given by ``index`` (an (M, 3) integer array, or a
        tuple of index arrays as from ``np.nonzero``); all voxels, (nx, ny, nz, 3), if None."""
        sp = np.asarray(self.spacing)
        org = np.asarray(self.origin)
        if index is None:
            x, y, z = (self.axis_centers(a) for a in range(3))
            out = np.empty(self.shape + (3,))
            out[..., 0] = x[:, None, None]
            out[..., 1] = y[None, :, None]
            out[..., 2] = z[None, None, :]
            return out
        if isinstance(index, tuple):
            index = np.stack(index, axis=-1)
        return org + (np.asarray(index) + 0.5) * sp

    def mask(self, phases) -> np.ndarray:
        """Boolean mask of the voxels whose label is one of ``phases`` (codes or names)."""
        codes = [_phase_code(p, self.names) for p in np.atleast_1d(np.asarray(phases, dtype=object))]
        return np.isin(self.labels, np.asarray(codes, dtype=np.uint8))


def _phase_code(p, names) -> int:
    """A phase code from a code or a name (``PHASE_ALIASES`` or ``names``)."""
    if isinstance(p, (int, np.integer)) and not isinstance(p, bool):
        if not 0 <= int(p) <= 255:
            raise OptionError(f"phase code {p} is out of range 0-255", field="phases")
        return int(p)
    key = str(p).strip().lower()
    if key in PHASE_ALIASES:
        return PHASE_ALIASES[key]
    for code, name in names.items():
        if str(name).lower() == key:
            return int(code)
    raise OptionError(f"unknown phase {p!r}: expected a code 0-255 or one of "
                      f"{sorted(set(PHASE_ALIASES) | {str(n) for n in names.values()})}",
                      field="phases")


# ============================================================== rasterization
#: Smallest voxel edge accepted (nm).
MIN_VOXEL_NM = 0.01
#: Bytes per voxel assumed by the memory estimate: the uint8 labels (1 byte) plus the
#: working arrays of the grid measures that follow (a float32 distance or size map,
#: 4 bytes, and a boolean phase mask, 1 byte).
BYTES_PER_VOXEL = 6
#: Extra bytes per voxel when a solid fraction is requested (the float32 array).
BYTES_PER_VOXEL_FRACTION = 4
#: Largest working buffer (bytes) used for the sub-point slabs of the supersampling.
SUPERSAMPLE_BUFFER_BYTES = 64 * 2 ** 20


def default_voxel_size(structure) -> float:
    """Default voxel edge (nm): ``min(t_min, d - t_max) / 6``, never below 0.01 nm.

    ``t_min``, ``t_max`` are the smallest and largest prism thickness and ``d`` the
    structure's nominal repeat (``structure.spacing``); six voxels across the thinner of a
    sheet and an interlayer gap keep both resolved. If ``d - t_max <= 0`` (sheets thicker
    than the repeat) the gap is ignored: ``t_min / 6``. Six voxels across the smallest
    feature is a choice of this program (common practice puts 5 to 10 voxels across
    the smallest feature to be measured), not a published value.
    """
    t = np.asarray(structure.thickness, dtype=float)
    t = t[np.isfinite(t) & (t > 0)]
    if t.size == 0:
        raise OptionError("the structure has no prisms with a positive thickness: "
                          "cannot choose a voxel size", field="voxel_size")
    gap = float(structure.spacing) - float(t.max())
    v = min(float(t.min()), gap) / 6.0 if gap > 0 else float(t.min()) / 6.0
    return max(v, MIN_VOXEL_NM)


#: Voxels across the mean chord (4V/S) of the thinner of solid and pore space in the
#: default voxel of a closed body: 12 across a slab's mean chord 2t puts 6 across its
#: thickness t, as :func:`default_voxel_size` does for prisms.
VOXELS_PER_MEAN_CHORD = 12


def default_body_voxel_size(body) -> tuple[float, str]:
    """Default voxel edge (nm) of a closed body and the rule that gave it:
    ``min(4 V/S, 4 V_pore/S) / 12`` with V the body's volume, S its area and V_pore the
    domain volume outside it (Cauchy's mean chords, Santaló 1976: a slab of thickness t has
    mean chord 2t, so this puts 6 voxels across the thinner of the body and the pore space,
    as for prisms), never below 0.01 nm."""
    v, a = float(body.volume), float(body.area)
    if not (a > 0 and v > 0):
        raise OptionError("the closed surface encloses no volume: cannot choose a voxel size",
                          path=body.source, field="voxel_size")
    chords = {"solid": 4.0 * v / a}
    vp = float(body.domain.volume) - v
    if vp > 0:
        chords["pore"] = 4.0 * vp / a
    which = min(chords, key=chords.get)
    vox = max(chords[which] / VOXELS_PER_MEAN_CHORD, MIN_VOXEL_NM)
    return vox, (f"{which} mean chord 4V/S = {chords[which]:.4g} nm / "
                 f"{VOXELS_PER_MEAN_CHORD}")


#: A default voxel is coarsened at most this much to fit the memory limit (half the
#: voxels across the thinnest feature: 3 instead of 6); beyond, the run stops and names
#: the voxel that would fit.
MAX_DEFAULT_COARSENING = 2.0


def fit_default_voxel(dom, v: float, max_memory=None, *, fraction=False) -> tuple[float, str | None]:
    """The default voxel ``v``, or the finest coarser voxel (at most
    :data:`MAX_DEFAULT_COARSENING` times ``v``) whose grid fits in ``max_memory`` (default
    half the available memory), with a note saying so; :class:`MemoryLimitError` when even
    that does not fit."""
    shape = grid_geometry(dom, v)[0]
    need = estimate_grid_bytes(int(np.prod(shape, dtype=np.int64)), fraction=fraction)
    limit = available_memory() // 2 if max_memory is None else int(max_memory)
    if need <= limit:
        return v, None
    fit = _voxel_that_fits(dom, v, need, limit, fraction)
    if fit > MAX_DEFAULT_COARSENING * v:
        check_memory(dom, v, shape, max_memory, fraction=fraction)  # raises, naming the fit
    return fit, (f"the default voxel {v:.4g} nm would need {need / 2**30:.2f} GiB, over the "
                 f"memory limit of {limit / 2**30:.2f} GiB: {fit:.4g} nm used instead (give "
                 f"--voxel or --max-memory to choose)")


def _voxel_that_fits(dom, v, need, limit, fraction):
    fit = v * (need / max(limit, 1)) ** (1.0 / 3.0) * 1.01
    fit = float(f"{fit:.3g}") if fit >= v else v
    while estimate_grid_bytes(int(np.prod(grid_geometry(dom, fit)[0], dtype=np.int64)),
                              fraction=fraction) > limit:
        fit = float(f"{fit * 1.05:.3g}")
    return fit


def grid_geometry(domain, voxel_size: float) -> tuple[tuple, tuple, tuple]:
    """Shape, spacing and origin of the grid covering ``domain`` at ``voxel_size`` nm.

    A sphere: its bounding cube, ``ceil(2R / v)`` voxels of edge ``v`` per axis, centred
    on the sphere. A box: ``round(L / v)`` voxels per axis (at least one), the spacing
    adjusted to ``L / n`` so the grid tiles the box exactly (needed for periodic boxes).
    """
    v = float(voxel_size)
    lo, hi = (np.asarray(b, dtype=float) for b in domain.bounds)
    ext = hi - lo
    if getattr(domain, "shape", None) == "sphere":
        n = int(math.ceil(2.0 * domain.radius / v - 1e-9))
        c = np.asarray(domain.center, dtype=float)
        shape = (n, n, n)
        spacing = (v, v, v)
        origin = tuple(float(x) for x in c - 0.5 * n * v)
    else:
        n = np.maximum(1, np.rint(ext / v)).astype(np.int64)
        shape = tuple(int(x) for x in n)
        spacing = tuple(float(x) for x in ext / n)
        origin = tuple(float(x) for x in lo)
    return shape, spacing, origin


def available_memory() -> int:
    """Bytes of physical memory currently available (``SC_AVPHYS_PAGES``)."""
    try:
        return int(os.sysconf("SC_AVPHYS_PAGES")) * int(os.sysconf("SC_PAGE_SIZE"))
    except (ValueError, OSError, AttributeError):  # pragma: no cover - non-POSIX
        return 8 * 2 ** 30


def estimate_grid_bytes(n_voxels: int, *, fraction: bool = False) -> int:
    """Bytes a grid of ``n_voxels`` needs with the working arrays of later measures."""
    per = BYTES_PER_VOXEL + (BYTES_PER_VOXEL_FRACTION if fraction else 0)
    return int(n_voxels) * per


def _prism_coefficients(structure):
    """Per-prism plane and edge coefficients of the inside test (numpy, float64).

    Returns ``normal (N,3)``, ``d0 (N,)`` with ``d0 = n . a``, ``half (N,)`` the half
    thickness, ``G (N,3,3)`` inward edge normals ``g_e = n x (v_{e+1} - v_e)``, ``C (N,3)``
    with ``C_e = g_e . v_e``, ``lo, hi (N,3)`` corner bounds, ``axis (N,)`` the axis of the
    largest normal component, and the indices of the prisms kept (finite, non-degenerate).
    A point ``p`` is inside prism ``i`` iff ``|n . p - d0| <= t/2`` and
    ``g_e . p - C_e >= 0`` for the three edges.
    """
    v = np.asarray(structure.vertices, dtype=np.float64)
    t = np.asarray(structure.thickness, dtype=np.float64)
    nrm = np.asarray(structure.normals, dtype=np.float64)
    ok = np.all(np.isfinite(nrm), axis=1) & np.isfinite(t) & (t > 0) \
        & np.all(np.isfinite(v.reshape(len(v), 9)), axis=1)
    keep = np.flatnonzero(ok)
    if keep.size != len(v):
        v, t, nrm = v[keep], t[keep], nrm[keep]
    v = np.ascontiguousarray(v)
    nrm = np.ascontiguousarray(nrm)
    d0 = nrm[:, 0] * v[:, 0, 0] + nrm[:, 1] * v[:, 0, 1] + nrm[:, 2] * v[:, 0, 2]
    e = np.roll(v, -1, axis=1) - v
    G = np.ascontiguousarray(np.cross(nrm[:, None, :], e))
    C = G[:, :, 0] * v[:, :, 0] + G[:, :, 1] * v[:, :, 1] + G[:, :, 2] * v[:, :, 2]
    half = 0.5 * t
    off = np.abs(nrm) * half[:, None]
    lo = v.min(axis=1) - off
    hi = v.max(axis=1) + off
    axis = np.argmax(np.abs(nrm), axis=1).astype(np.int64)
    return nrm, d0, half, G, np.ascontiguousarray(C), lo, hi, axis, keep


@numba.njit(cache=True, parallel=True)
def _mark_prisms(nrm, d0, half, G, C, lo, hi, axis, org, sp, full, periodic, x0, out,
                 value, keep):
    """Write ``value`` into every voxel of ``out`` whose centre is inside a prism.

    ``out`` is the window ``[x0, x0 + out.shape[0])`` (x index) of a grid of shape
    ``full``; voxels holding ``keep`` are left alone. For each prism the columns along
    its dominant normal axis ``m`` are visited over the corner bounding box of the other
    two axes; in each column the interval of the slab and edge constraints (linear in the
    column coordinate) is widened by one voxel each side and every voxel in it is tested
    directly, so the result is the exact centre-inside test.
    """
    n_prisms = nrm.shape[0]
    wx1 = x0 + out.shape[0]
    for p in numba.prange(n_prisms):
        m = axis[p]
        u = (m + 1) % 3
        w = (m + 2) % 3
        # periodic/window early rejection along x
        ax0 = int(math.ceil((lo[p, 0] - org[0]) / sp[0] - 0.5)) - 1
        ax1 = int(math.floor((hi[p, 0] - org[0]) / sp[0] - 0.5)) + 1
        if periodic:
            if ax1 - ax0 + 1 < full[0]:
                am = ax0 % full[0]
                span = ax1 - ax0
                hit = False
                for sh in (-full[0], 0, full[0]):
                    if am + sh <= wx1 - 1 and am + sh + span >= x0:
                        hit = True
                if not hit:
                    continue
        else:
            if ax1 < x0 or ax0 > wx1 - 1:
                continue
        u0 = int(math.ceil((lo[p, u] - org[u]) / sp[u] - 0.5)) - 1
        u1 = int(math.floor((hi[p, u] - org[u]) / sp[u] - 0.5)) + 1
        w0 = int(math.ceil((lo[p, w] - org[w]) / sp[w] - 0.5)) - 1
        w1 = int(math.floor((hi[p, w] - org[w]) / sp[w] - 0.5)) + 1
        if not periodic:
            u0 = max(u0, 0)
            u1 = min(u1, full[u] - 1)
            w0 = max(w0, 0)
            w1 = min(w1, full[w] - 1)
        else:
            u1 = min(u1, u0 + full[u] - 1)
            w1 = min(w1, w0 + full[w] - 1)
        n0 = nrm[p, 0]
        n1 = nrm[p, 1]
        n2 = nrm[p, 2]
        nm = nrm[p, m]
        h = half[p]
        dd = d0[p]
        for iu in range(u0, u1 + 1):
            pu = org[u] + (iu + 0.5) * sp[u]
            for iw in range(w0, w1 + 1):
                pw = org[w] + (iw + 0.5) * sp[w]
                rest = nrm[p, u] * pu + nrm[p, w] * pw - dd
                t1 = (-h - rest) / nm
                t2 = (h - rest) / nm
                zlo = min(t1, t2)
                zhi = max(t1, t2)
                for e in range(3):
                    gm = G[p, e, m]
                    gu = G[p, e, u]
                    gw = G[p, e, w]
                    gn = math.sqrt(gm * gm + gu * gu + gw * gw)
                    if abs(gm) <= 1e-6 * gn:
                        continue
                    bound = -(gu * pu + gw * pw - C[p, e]) / gm
                    if gm > 0:
                        zlo = max(zlo, bound)
                    else:
                        zhi = min(zhi, bound)
                k0 = int(math.ceil((zlo - org[m]) / sp[m] - 0.5)) - 1
                k1 = int(math.floor((zhi - org[m]) / sp[m] - 0.5)) + 1
                if not periodic:
                    k0 = max(k0, 0)
                    k1 = min(k1, full[m] - 1)
                else:
                    k1 = min(k1, k0 + full[m] - 1)
                for km in range(k0, k1 + 1):
                    pm = org[m] + (km + 0.5) * sp[m]
                    if m == 0:
                        i, j, k = km, iu, iw
                        px, py, pz = pm, pu, pw
                    elif m == 1:
                        i, j, k = iw, km, iu
                        px, py, pz = pw, pm, pu
                    else:
                        i, j, k = iu, iw, km
                        px, py, pz = pu, pw, pm
                    s = n0 * px + n1 * py + n2 * pz - dd
                    if abs(s) > h:
                        continue
                    inside = True
                    for e in range(3):
                        if G[p, e, 0] * px + G[p, e, 1] * py + G[p, e, 2] * pz - C[p, e] < 0.0:
                            inside = False
                            break
                    if not inside:
                        continue
                    if periodic:
                        i = i % full[0]
                        j = j % full[1]
                        k = k % full[2]
                    i -= x0
                    if i < 0 or i >= out.shape[0]:
                        continue
                    if out[i, j, k] != keep:
                        out[i, j, k] = value


def _fill_domain(labels, domain, spacing, origin) -> bool:
    """Write GEL inside the domain and OUTSIDE elsewhere (voxel centres), slab by slab;
    return whether any voxel centre is inside."""
    if getattr(domain, "shape", None) == "sphere":
        c = np.asarray(domain.center, dtype=float)
        r2 = float(domain.radius) ** 2
        x, y, z = (origin[a] + (np.arange(labels.shape[a]) + 0.5) * spacing[a] for a in range(3))
        yz = (y - c[1])[:, None] ** 2 + (z - c[2])[None, :] ** 2
        tmp = np.empty(yz.shape, dtype=bool)
        any_in = False
        for i in range(labels.shape[0]):
            np.less_equal(yz, r2 - (x[i] - c[0]) ** 2, out=tmp)
            np.multiply(tmp, np.uint8(GEL), out=labels[i], casting="unsafe")
            any_in = any_in or bool(tmp.any())
        return any_in
    labels.fill(GEL)  # a box grid tiles the box: every voxel centre is inside
    return labels.size > 0


def check_memory(dom, v, shape, max_memory=None, *, fraction=False) -> None:
    """Raise :class:`MemoryLimitError` when a grid of ``shape`` at voxel ``v`` over ``dom``
    would need more than ``max_memory`` bytes (default half the available memory); the
    message names a voxel size that fits."""
    nvox = int(np.prod(shape, dtype=np.int64))
    need = estimate_grid_bytes(nvox, fraction=fraction)
    limit = available_memory() // 2 if max_memory is None else int(max_memory)
    if need > limit:
        fit = _voxel_that_fits(dom, v, need, limit, fraction)
        raise MemoryLimitError(
            f"a grid of {shape[0]} x {shape[1]} x {shape[2]} voxels at {v:g} nm needs about "
            f"{need / 2**30:.2f} GiB ({BYTES_PER_VOXEL} bytes per voxel with working arrays), "
            f"over the limit of {limit / 2**30:.2f} GiB; a voxel size of {fit:g} nm would fit",
            field="voxel_size")


def _check_voxel_size(structure, voxel_size):
    try:
        v = float(voxel_size)
    except (TypeError, ValueError):
        raise OptionError(f"voxel size must be a number (nm), not {voxel_size!r}",
                          field="voxel_size") from None
    if not math.isfinite(v) or v < MIN_VOXEL_NM:
        raise OptionError(f"voxel size {voxel_size!r} nm is below the smallest accepted, "
                          f"{MIN_VOXEL_NM} nm", field="voxel_size")
    lo, hi = (np.asarray(b, dtype=float) for b in structure.domain.bounds)
    ext = float(np.min(hi - lo))
    if v > ext:
        raise OptionError(f"voxel size {v:g} nm is larger than the domain's smallest extent "
                          f"({ext:g} nm)", field="voxel_size")
    return v


def rasterize(structure, voxel_size=None, *, supersample: int = 1, max_memory=None,
              out=None) -> PhaseGrid:
    """Label the voxels of the domain's grid as SOLID (inside a prism), GEL or OUTSIDE.

    The grid covers the domain's bounds (a sphere: its bounding cube; a box: the box,
    tiled exactly). Voxel ``(i, j, k)`` has its centre at ``origin + (i + 0.5) * spacing``.
    A voxel is SOLID when its centre lies inside some prism, where a point ``p`` is inside
    the prism of mid-plane triangle ``a, b, c``, unit normal ``n`` and thickness ``t`` iff

    .. math:: |(p - a)\\cdot n| \\le t/2 \\quad\\text{and}\\quad
              (n \\times (v_{e+1} - v_e))\\cdot (p - v_e) \\ge 0,\\; e = 0, 1, 2

    (the projection of ``p`` on the plane lies in the triangle; edge-function test, common
    practice). Voxels inside the domain and not solid are GEL (pore space, before any
    interlayer classification); voxels whose centre is outside the domain are OUTSIDE
    (prism parts beyond the domain wall are clipped). In a periodic box, prisms that cross
    the box wrap around (indices modulo the grid shape) and the grid is ``periodic``.

    Parameters
    ----------
    structure : Structure
    voxel_size : float, optional
        Voxel edge in nm (a box grid adjusts it to tile the box exactly); default
        :func:`default_voxel_size`. Must be >= 0.01 nm and <= the domain's extent.
    supersample : int
        With ``s > 1``, also estimate the fraction of each voxel inside prisms from a
        regular ``s x s x s`` lattice of sub-points (cell centres of the sub-voxels),
        stored as ``grid.solid_fraction`` (float32; 0 in OUTSIDE voxels; not clipped by a
        sphere wall within partially covered voxels).
    max_memory : int, optional
        Bytes allowed for the grid and the working arrays of later measures
        (:data:`BYTES_PER_VOXEL` per voxel); default half the available memory.
    out : (nx, ny, nz) uint8 C-contiguous array, optional
        A buffer to fill (reusing memory already touched is much faster than a fresh
        allocation for large grids).

    Returns
    -------
    PhaseGrid

    Raises
    ------
    OptionError
        Bad voxel size, empty structure, empty domain, bad ``out`` or ``supersample``.
    MemoryLimitError
        The estimate exceeds ``max_memory``; the message gives a voxel size that fits.
    """
    if len(structure) == 0:
        raise OptionError("the structure has no prisms: nothing to rasterize",
                          path=structure.source)
    try:
        s = int(supersample)
    except (TypeError, ValueError):
        raise OptionError(f"supersample must be a positive integer, not {supersample!r}",
                          field="supersample") from None
    if s < 1 or s != supersample:
        raise OptionError(f"supersample must be a positive integer, not {supersample!r}",
                          field="supersample")
    dom = structure.domain
    rule = note = None
    if voxel_size is None:
        v0 = default_voxel_size(structure)
        rule = f"min(thickness, repeat - thickness) / 6 = {v0:.4g} nm"
        v, note = fit_default_voxel(dom, v0, max_memory, fraction=s > 1)
    else:
        v = _check_voxel_size(structure, voxel_size)
    shape, spacing, origin = grid_geometry(dom, v)
    check_memory(dom, v, shape, max_memory, fraction=s > 1)
    if out is None:
        labels = np.empty(shape, dtype=np.uint8)
    else:
        labels = out
        if (not isinstance(out, np.ndarray) or out.shape != shape or out.dtype != np.uint8
                or not out.flags.c_contiguous or not out.flags.writeable):
            raise OptionError(f"out must be a writeable C-contiguous uint8 array of shape "
                              f"{shape}", field="out")
    nonempty = _fill_domain(labels, dom, spacing, origin)
    periodic = bool(getattr(dom, "periodic", False))
    nrm, d0, half, G, C, lo, hi, axis, keep = _prism_coefficients(structure)
    org = np.asarray(origin, dtype=np.float64)
    sp = np.asarray(spacing, dtype=np.float64)
    full = np.asarray(shape, dtype=np.int64)
    if not nonempty:
        raise OptionError("the domain contains no voxel centre at this voxel size "
                          f"({v:g} nm): the domain is empty", field="voxel_size")
    _mark_prisms(nrm, d0, half, G, C, lo, hi, axis, org, sp, full, periodic, 0, labels,
                 np.uint8(SOLID), np.uint8(OUTSIDE))
    frac = None
    if s > 1:
        frac = _solid_fraction(labels, s, nrm, d0, half, G, C, lo, hi, axis, org, sp, full,
                               periodic)
    meta = {"voxel_size_nm": v, "supersample": s, "n_prisms": int(len(structure)),
            "skipped_prisms": int(len(structure) - keep.size)}
    if rule is not None:
        meta["voxel_default"] = {"rule": rule, "note": note}
    return PhaseGrid(labels, spacing, origin, periodic=periodic, metadata=meta,
                     source=structure.source, solid_fraction=frac)


def _solid_fraction(labels, s, nrm, d0, half, G, C, lo, hi, axis, org, sp, full, periodic):
    n0, n1, n2 = labels.shape
    fine_full = full * s
    fine_sp = sp / s
    plane = s ** 3 * n1 * n2
    step = max(1, min(n0, SUPERSAMPLE_BUFFER_BYTES // plane))
    buf = np.empty((step * s, s * n1, s * n2), dtype=np.uint8)
    frac = np.empty(labels.shape, dtype=np.float32)
    for c0 in range(0, n0, step):
        nx = min(step, n0 - c0)
        b = buf[: nx * s]
        b.fill(0)
        _mark_prisms(nrm, d0, half, G, C, lo, hi, axis, org, fine_sp, fine_full, periodic,
                     c0 * s, b, np.uint8(1), np.uint8(255))
        cnt = b.reshape(nx, s, n1, s, n2, s).sum(axis=(1, 3, 5), dtype=np.int32)
        frac[c0:c0 + nx] = cnt * np.float32(1.0 / s ** 3)
    frac[labels == OUTSIDE] = 0.0
    return frac


def rasterize_fraction(structure, voxel_size=None, *, supersample: int = 4,
                       max_memory=None) -> np.ndarray:
    """The solid fraction per voxel (float32) from ``supersample**3`` sub-points per voxel;
    see :func:`rasterize`."""
    if int(supersample) < 2:
        raise OptionError("rasterize_fraction needs supersample >= 2", field="supersample")
    return rasterize(structure, voxel_size, supersample=supersample,
                     max_memory=max_memory).solid_fraction


# ------------------------------------------------------------ closed surface meshes
#: Columns are shifted by this fraction of a voxel (an irrational multiple) so that they
#: do not pass exactly through mesh vertices or edges, where parity counting would break.
_COLUMN_JITTER = 1e-6 * math.pi


@numba.njit(cache=True)
def _column_hits(tri, org, sp, nx, ny, count_only, start, zs):
    """Crossings of the z-parallel voxel columns with the triangles (parity ray casting).

    Column (i, j) runs through x = org0 + (i + 0.5 + jitter) sp0, y likewise. Pass 1
    (``count_only``) counts the crossings per column into ``start``; pass 2 writes their
    z into ``zs`` at the CSR offsets ``start`` (advanced as it goes).
    """
    jit = _COLUMN_JITTER
    for t in range(tri.shape[0]):
        x0 = tri[t, 0, 0]; y0 = tri[t, 0, 1]; z0 = tri[t, 0, 2]
        x1 = tri[t, 1, 0]; y1 = tri[t, 1, 1]; z1 = tri[t, 1, 2]
        x2 = tri[t, 2, 0]; y2 = tri[t, 2, 1]; z2 = tri[t, 2, 2]
        det = (x1 - x0) * (y2 - y0) - (x2 - x0) * (y1 - y0)
        if det == 0.0:
            continue  # seen edge-on from z: no column crosses it
        xmin = min(x0, min(x1, x2)); xmax = max(x0, max(x1, x2))
        ymin = min(y0, min(y1, y2)); ymax = max(y0, max(y1, y2))
        i0 = max(0, int(math.ceil((xmin - org[0]) / sp[0] - 0.5 - jit)))
        i1 = min(nx - 1, int(math.floor((xmax - org[0]) / sp[0] - 0.5 - jit)))
        j0 = max(0, int(math.ceil((ymin - org[1]) / sp[1] - 0.5 - jit)))
        j1 = min(ny - 1, int(math.floor((ymax - org[1]) / sp[1] - 0.5 - jit)))
        for i in range(i0, i1 + 1):
            x = org[0] + (i + 0.5 + jit) * sp[0]
            for j in range(j0, j1 + 1):
                y = org[1] + (j + 0.5 + jit) * sp[1]
                # barycentric coordinates of (x, y) in the projected triangle
                b1 = ((x - x0) * (y2 - y0) - (x2 - x0) * (y - y0)) / det
                b2 = ((x1 - x0) * (y - y0) - (x - x0) * (y1 - y0)) / det
                b0 = 1.0 - b1 - b2
                if b0 < 0.0 or b1 < 0.0 or b2 < 0.0:
                    continue
                c = i * ny + j
                if count_only:
                    start[c + 1] += 1
                else:
                    zs[start[c]] = b0 * z0 + b1 * z1 + b2 * z2
                    start[c] += 1


@numba.njit(cache=True)
def _fill_columns(labels, start, zs, org2, sp2, code, keep):
    """Mark voxels between successive pairs of sorted crossings of each column."""
    nx, ny, nz = labels.shape
    for i in range(nx):
        for j in range(ny):
            c = i * ny + j
            a = start[c]
            b = start[c + 1]
            if b - a < 2:
                continue
            z = np.sort(zs[a:b])
            for p in range(0, b - a - 1, 2):
                k0 = max(0, int(math.ceil((z[p] - org2) / sp2 - 0.5)))
                k1 = min(nz - 1, int(math.floor((z[p + 1] - org2) / sp2 - 0.5)))
                for k in range(k0, k1 + 1):
                    if labels[i, j, k] == keep:
                        labels[i, j, k] = code


def rasterize_body(body, voxel_size=None, *, max_memory=None) -> PhaseGrid:
    """Label the voxels of a closed surface mesh (a SurfaceBody) as SOLID, GEL, OUTSIDE.

    A voxel is SOLID when its centre is inside the closed surface, decided by parity
    ray casting along z columns (a point is inside a closed surface iff a ray from it
    crosses the surface an odd number of times; Jordan-Brouwer separation theorem,
    common practice in voxelization). Columns are shifted by a negligible irrational
    fraction of a voxel so that they miss vertices and edges. Default voxel size:
    :func:`default_body_voxel_size` (from the body's own mean chords), coarsened to fit the
    memory limit if need be (said in the grid's metadata, ``voxel_default``).
    """
    dom = body.domain
    lo, hi = (np.asarray(b, dtype=float) for b in dom.bounds)
    default = None
    if voxel_size is None:
        v0, rule = default_body_voxel_size(body)
        v, note = fit_default_voxel(dom, min(v0, float(np.min(hi - lo))), max_memory)
        default = {"rule": rule, "note": note}
    else:
        v = float(voxel_size)
        if not math.isfinite(v) or v < MIN_VOXEL_NM or v > float(np.min(hi - lo)):
            raise OptionError(f"voxel size {voxel_size!r} nm must lie between {MIN_VOXEL_NM} nm "
                              f"and the domain's smallest extent", field="voxel_size")
    shape, spacing, origin = grid_geometry(dom, v)
    check_memory(dom, v, shape, max_memory)
    labels = np.empty(shape, dtype=np.uint8)
    if not _fill_domain(labels, dom, spacing, origin):
        raise OptionError("the domain contains no voxel centre at this voxel size",
                          field="voxel_size")
    tri = np.ascontiguousarray(body.vertices[body.faces], dtype=np.float64)
    org = np.asarray(origin, dtype=np.float64)
    sp = np.asarray(spacing, dtype=np.float64)
    nx, ny = shape[0], shape[1]
    start = np.zeros(nx * ny + 1, np.int64)
    _column_hits(tri, org, sp, nx, ny, True, start, np.zeros(0))
    np.cumsum(start, out=start)
    zs = np.empty(int(start[-1]), np.float64)
    fill = start[:-1].copy()
    _column_hits(tri, org, sp, nx, ny, False, np.concatenate([fill, start[-1:]]), zs)
    _fill_columns(labels, start, zs, org[2], sp[2], np.uint8(SOLID), np.uint8(GEL))
    meta = {"voxel_size_nm": v, "n_faces": int(body.n_faces)}
    if default is not None:
        meta["voxel_default"] = default
    return PhaseGrid(labels, spacing, origin, periodic=False, metadata=meta, source=body.source)
