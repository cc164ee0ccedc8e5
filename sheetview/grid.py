"""PhaseGrid: a voxel label volume with physical spacing, and the phase codes.

Indexing is ``labels[i, j, k]`` = x, y, z; voxel ``(i, j, k)`` has its centre at
``origin + (i + 0.5, j + 0.5, k + 0.5) * spacing`` (nm).
"""
from __future__ import annotations

import contextlib
import math
import os
import warnings
from dataclasses import dataclass, field

import numba
import numpy as np

from .errors import InputError, MemoryLimitError, OptionError, SheetviewError
from .threads import run_chunks

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
        codes = [phase_code(p, self.names) for p in np.atleast_1d(np.asarray(phases, dtype=object))]
        return np.isin(self.labels, np.asarray(codes, dtype=np.uint8))


def phase_code(p, names) -> int:
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
#: Memory estimate of a phase grid with the grid measures that follow it (the default set
#: of ``measure``: phases, surface, pores, chords, correlation), calibrated against the peak
#: resident memory they add, measured with benchmarks/calibrate_grid_memory.py (results in
#: docs/reliability.md): ``GRID_BASE_BYTES + BYTES_PER_VOXEL * n +
#: BYTES_PER_BLOCK_VOXEL * min(n, CORRELATION_BLOCK_VOXELS)`` for ``n`` voxels. The
#: measured peak grows by about 19.5 bytes per voxel on large grids (the labels, the split
#: grid, the float32 local-thickness map, masks); the two-point correlation adds about 95
#: bytes per voxel of its central block (at most 160**3 voxels, the pipeline's ``s2_block``
#: default; up to 107 measured in a spherical domain). The constants lie 10 to 20 % above
#: those slopes; the old estimate, 6 bytes per voxel, was exceeded up to 19-fold.
BYTES_PER_VOXEL = 22
BYTES_PER_BLOCK_VOXEL = 128
CORRELATION_BLOCK_VOXELS = 160 ** 3
GRID_BASE_BYTES = 8 * 2 ** 20
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
    need = estimate_grid_bytes(n_voxels(shape), fraction=fraction)
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
    base = estimate_grid_bytes(1, fraction=fraction)
    if base > limit:
        raise MemoryLimitError(
            f"no voxel size would fit the memory limit of {_gib(limit)}: the grid measures "
            f"need {_gib(base)} at the least, before any voxel; raise --max-memory")
    fit = v * (need / max(limit - base + 1, 1)) ** (1.0 / 3.0) * 1.01
    fit = float(f"{fit:.3g}") if fit >= v else v
    for _ in range(10000):
        if estimate_grid_bytes(n_voxels(grid_geometry(dom, fit)[0]), fraction=fraction) <= limit:
            break
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
        # Python integers: exact for any extent (numpy's int64 would wrap)
        shape = tuple(max(1, int(round(float(e) / v))) for e in ext)
        spacing = tuple(float(e) / n for e, n in zip(ext, shape))
        origin = tuple(float(x) for x in lo)
    return shape, spacing, origin


def n_voxels(shape) -> int:
    """The number of voxels of ``shape``, as an exact Python integer (never wraps)."""
    return math.prod(int(s) for s in shape)


def available_memory() -> int:
    """Bytes of memory available to a new allocation now: Linux ``MemAvailable`` (free
    memory plus what the kernel can reclaim), else free physical pages, else 8 GiB."""
    try:
        with open("/proc/meminfo") as fh:
            for line in fh:
                if line.startswith("MemAvailable:"):
                    return int(line.split()[1]) * 1024
    except (OSError, ValueError, IndexError):
        pass
    try:
        return int(os.sysconf("SC_AVPHYS_PAGES")) * int(os.sysconf("SC_PAGE_SIZE"))
    except (ValueError, OSError, AttributeError):  # pragma: no cover - non-POSIX
        return 8 * 2 ** 30


def physical_memory() -> int | None:
    """Bytes of physical memory of the machine, or None when unknown."""
    try:
        return int(os.sysconf("SC_PHYS_PAGES")) * int(os.sysconf("SC_PAGE_SIZE"))
    except (ValueError, OSError, AttributeError):  # pragma: no cover - non-POSIX
        return None


def estimate_grid_bytes(n_voxels: int, *, fraction: bool = False) -> int:
    """Peak bytes of a phase grid of ``n_voxels`` with the working arrays of the grid
    measures that follow (see :data:`BYTES_PER_VOXEL`; plus
    :data:`BYTES_PER_VOXEL_FRACTION` per voxel with a solid fraction); exact integer
    arithmetic, so no voxel count wraps."""
    n = int(n_voxels)
    per = BYTES_PER_VOXEL + (BYTES_PER_VOXEL_FRACTION if fraction else 0)
    return GRID_BASE_BYTES + n * per + min(n, CORRELATION_BLOCK_VOXELS) * BYTES_PER_BLOCK_VOXEL


class MemoryLimitWarning(UserWarning):
    """A memory limit was given that the machine cannot honour."""


def check_max_memory(max_memory) -> str | None:
    """A warning (also issued as a :class:`MemoryLimitWarning`) when ``max_memory`` exceeds
    the machine's physical memory: the guard then allows grids that cannot fit."""
    if max_memory is None:
        return None
    phys = physical_memory()
    if phys is None or int(max_memory) <= phys:
        return None
    msg = (f"--max-memory {_gib(max_memory)} is more than this machine's physical memory "
           f"({_gib(phys)}); a grid allowed by it may not fit")
    warnings.warn(msg, MemoryLimitWarning, stacklevel=3)
    return msg


def _gib(n) -> str:
    """Bytes for a message: MiB, GiB, TiB, PiB or EiB (any size, no overflow)."""
    n = int(n)
    if n < 2**30:
        return f"{n / 2**20:.3g} MiB"
    for unit, shift in (("GiB", 30), ("TiB", 40), ("PiB", 50)):
        if n < 2 ** (shift + 10):
            return f"{n / 2**shift:.2f} {unit}"
    return f"{n / 2**60:.3g} EiB"


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
    unit = np.abs(np.einsum("ij,ij->i", nrm, nrm) - 1.0) < 1e-9  # not an overflowed cross
    fin = (unit & np.isfinite(d0) & np.all(np.isfinite(G.reshape(len(G), 9)), axis=1)
           & np.all(np.isfinite(C), axis=1) & np.all(np.isfinite(lo), axis=1)
           & np.all(np.isfinite(hi), axis=1))
    if not fin.all():  # overflow in the coefficients: skipped like non-finite prisms
        nrm, d0, half, G, C, lo, hi, axis, keep = (
            np.ascontiguousarray(a[fin]) for a in (nrm, d0, half, G, C, lo, hi, axis, keep))
    return nrm, d0, half, G, np.ascontiguousarray(C), lo, hi, axis, keep


# ------------------------------------------------------------------ kernel safety
#: Index range a periodic kernel may walk (far beyond any grid that fits in memory; keeps
#: every index computation inside int64).
_PERIODIC_INDEX_LIMIT = 2 ** 50
_KERNEL_CHECKS = [os.environ.get("SHEETVIEW_KERNEL_CHECKS", "") not in ("", "0")]


def kernel_checks_enabled() -> bool:
    """Whether the rasterization kernels run in their bounds-checked debug build."""
    return _KERNEL_CHECKS[0]


@contextlib.contextmanager
def kernel_checks(enabled: bool = True):
    """Run the rasterization kernels in a debug build that checks every array index
    (numba ``boundscheck``: an index outside its array raises ``IndexError`` instead of
    writing outside it), e.g. ``with kernel_checks(): rasterize(s)``. Also switched on for
    the whole process by the environment variable ``SHEETVIEW_KERNEL_CHECKS=1``. The debug
    build is compiled on first use (not cached) and runs single-threaded."""
    old = _KERNEL_CHECKS[0]
    _KERNEL_CHECKS[0] = bool(enabled)
    try:
        yield
    finally:
        _KERNEL_CHECKS[0] = old


def _kernel(parallel: bool = False, nogil: bool = False):
    """A numba kernel in two builds: the fast one (cached, parallel or releasing the GIL
    where asked) and a bounds-checked one (:func:`kernel_checks`); calls go to the build
    switched on."""
    def wrap(fn):
        fast = numba.njit(cache=True, parallel=parallel, nogil=nogil,
                          error_model="numpy")(fn)
        checked = []

        def call(*args):
            if not _KERNEL_CHECKS[0]:
                return fast(*args)
            if not checked:
                checked.append(numba.njit(cache=False, boundscheck=True, nogil=nogil,
                                          error_model="numpy")(fn))
            return checked[0](*args)

        call.__name__ = fn.__name__
        call.__doc__ = fn.__doc__
        call.py_func = fn
        call.fast = fast
        return call
    return wrap


@numba.njit(cache=True)
def _first(x, lo, hi):
    """``int(x)`` for a lower index bound ``x`` (a whole float), clamped to ``[lo, hi + 1]``
    before the conversion (``hi + 1``: nothing to visit; NaN too). No float to int
    conversion ever sees a value outside the int64 range."""
    if x != x:
        return hi + 1
    if x <= lo:
        return lo
    if x >= hi + 1:
        return hi + 1
    return int(x)


@numba.njit(cache=True)
def _last(x, lo, hi):
    """``int(x)`` for an upper index bound, clamped to ``[lo - 1, hi]`` (``lo - 1``: nothing
    to visit; NaN too)."""
    if x != x:
        return lo - 1
    if x >= hi:
        return hi
    if x <= lo - 1:
        return lo - 1
    return int(x)


@_kernel(nogil=True)
def _mark_prisms(p0, p1, nrm, d0, half, G, C, lo, hi, axis, org, sp, full, periodic, x0, out,
                 value, keep):
    """Write ``value`` into every voxel of ``out`` whose centre is inside one of the prisms
    ``p0 <= p < p1`` (ranges of prisms run on threads, :func:`sheetview.threads.run_chunks`:
    every write is the same ``value``, so the result does not depend on their order).

    ``out`` is the window ``[x0, x0 + out.shape[0])`` (x index) of a grid of shape
    ``full``; voxels holding ``keep`` are left alone. For each prism the columns along
    its dominant normal axis ``m`` are visited over the corner bounding box of the other
    two axes; in each column the interval of the slab and edge constraints (linear in the
    column coordinate) is widened by one voxel each side and every voxel in it is tested
    directly, so the result is the exact centre-inside test.

    Every index range is computed in floating point and clamped to the grid (to
    :data:`_PERIODIC_INDEX_LIMIT` in a periodic grid, where indices wrap) before it is
    converted to an integer, so no prism, however large, far or thick, can make the kernel
    visit an index outside ``out``.
    """
    wx1 = x0 + out.shape[0]
    big = _PERIODIC_INDEX_LIMIT
    for p in range(p0, p1):
        m = axis[p]
        u = (m + 1) % 3
        w = (m + 2) % 3
        if periodic:
            lo0, hi0, lou, hiu, low, hiw, lom, him = -big, big, -big, big, -big, big, -big, big
        else:
            lo0, hi0 = 0, full[0] - 1
            lou, hiu = 0, full[u] - 1
            low, hiw = 0, full[w] - 1
            lom, him = 0, full[m] - 1
        # periodic/window early rejection along x
        ax0 = _first(math.ceil((lo[p, 0] - org[0]) / sp[0] - 0.5) - 1.0, lo0, hi0)
        ax1 = _last(math.floor((hi[p, 0] - org[0]) / sp[0] - 0.5) + 1.0, lo0, hi0)
        if ax0 > ax1:
            continue
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
        u0 = _first(math.ceil((lo[p, u] - org[u]) / sp[u] - 0.5) - 1.0, lou, hiu)
        u1 = _last(math.floor((hi[p, u] - org[u]) / sp[u] - 0.5) + 1.0, lou, hiu)
        w0 = _first(math.ceil((lo[p, w] - org[w]) / sp[w] - 0.5) - 1.0, low, hiw)
        w1 = _last(math.floor((hi[p, w] - org[w]) / sp[w] - 0.5) + 1.0, low, hiw)
        if periodic:
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
                k0 = _first(math.ceil((zlo - org[m]) / sp[m] - 0.5) - 1.0, lom, him)
                k1 = _last(math.floor((zhi - org[m]) / sp[m] - 0.5) + 1.0, lom, him)
                if periodic:
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


def check_memory(dom, v, shape, max_memory=None, *, fraction=False, path=None) -> None:
    """Raise :class:`MemoryLimitError` (naming ``path``, the file) when a grid of ``shape``
    at voxel ``v`` over ``dom`` would need more than ``max_memory`` bytes (default half the
    available memory) by :func:`estimate_grid_bytes`; the message names a voxel size that
    fits. A ``max_memory`` above the machine's memory gets a warning
    (:func:`check_max_memory`). The arithmetic is exact: no voxel count wraps."""
    check_max_memory(max_memory)
    nvox = n_voxels(shape)
    need = estimate_grid_bytes(nvox, fraction=fraction)
    limit = available_memory() // 2 if max_memory is None else int(max_memory)
    if need > limit:
        fit = _voxel_that_fits(dom, v, need, limit, fraction)
        which = ("--max-memory" if max_memory is not None
                 else "the default limit, half the available memory (--max-memory)")
        raise MemoryLimitError(
            f"a phase grid of {shape[0]:,} x {shape[1]:,} x {shape[2]:,} voxels at {v:.4g} nm "
            f"would need about {_gib(need)} with the working arrays of the grid measures, "
            f"over {which} of {_gib(limit)}; a voxel size of {fit:.4g} nm would fit "
            f"(--voxel {fit:.4g})", path=path)


def _check_voxel_size(structure, voxel_size):
    src = getattr(structure, "source", None)
    try:
        v = float(voxel_size)
    except (TypeError, ValueError):
        raise OptionError(f"--voxel must be a number of nm, not {str(voxel_size)[:40]!r}",
                          path=src) from None
    if not math.isfinite(v) or v < MIN_VOXEL_NM:
        raise OptionError(f"--voxel {v:g} nm is below the smallest accepted voxel, "
                          f"{MIN_VOXEL_NM} nm", path=src)
    lo, hi = (np.asarray(b, dtype=float) for b in structure.domain.bounds)
    ext = float(np.min(hi - lo))
    if v > ext:
        raise OptionError(f"--voxel {v:g} nm is larger than the domain's smallest extent "
                          f"({ext:.4g} nm)", path=src)
    return v


#: The axes' names, for messages.
_AXES = "xyz"


def check_domain_for_grid(domain, source=None) -> None:
    """Refuse, before any grid is sized, a domain the rasterizer cannot cover: bounds not
    finite or beyond :data:`~sheetview.domain.MAX_LENGTH_NM`, or an extent below the
    smallest voxel (:data:`MIN_VOXEL_NM`) along some axis."""
    from .domain import MAX_LENGTH_NM
    lo, hi = (np.asarray(b, dtype=float) for b in domain.bounds)
    if not (np.all(np.isfinite(lo)) and np.all(np.isfinite(hi))):
        raise InputError("the domain's bounds are not finite numbers", path=source,
                         field="domain")
    big = float(max(np.abs(lo).max(), np.abs(hi).max()))
    if big > MAX_LENGTH_NM:
        raise InputError(f"the domain reaches {big:.4g} nm from the origin, beyond the "
                         f"{MAX_LENGTH_NM:g} nm (1 m) a grid can cover (check the units)",
                         path=source, field="domain")
    ext = hi - lo
    a = int(np.argmin(ext))
    if not ext[a] >= MIN_VOXEL_NM:
        raise InputError(f"the domain is {ext[a]:.3g} nm across along {_AXES[a]}, less than the "
                         f"smallest voxel ({MIN_VOXEL_NM} nm): there is nothing to rasterize "
                         f"(check the domain in the file)", path=source, field="domain")


def _check_prisms_for_grid(structure) -> None:
    """Refuse finite prisms beyond :data:`~sheetview.domain.MAX_LENGTH_NM` (corners or
    thickness), naming the first row; non-finite ones are skipped by the rasterizer."""
    from .domain import MAX_LENGTH_NM
    v = np.asarray(structure.vertices, dtype=np.float64).reshape(len(structure), 9)
    t = np.asarray(structure.thickness, dtype=np.float64)
    with np.errstate(invalid="ignore"):
        bad = np.any(np.abs(v) > MAX_LENGTH_NM, axis=1) & np.all(np.isfinite(v), axis=1)
        bad |= np.isfinite(t) & (t > MAX_LENGTH_NM)
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        raise InputError(f"prism row {i + 1}: corners or thickness beyond {MAX_LENGTH_NM:g} nm "
                         f"(1 m): cannot be rasterized (check the units; {int(bad.sum())} "
                         f"row(s) affected)", path=structure.source)


def _check_grid(shape, spacing, origin, source=None) -> None:
    """The grid a kernel writes into: positive whole shape, positive finite spacing, finite
    origin, and voxel indices of the whole grid far inside the int64 range."""
    sp = np.asarray(spacing, dtype=float)
    org = np.asarray(origin, dtype=float)
    ok = (len(shape) == 3 and all(int(n) >= 1 for n in shape) and np.all(np.isfinite(sp))
          and np.all(sp > 0) and np.all(np.isfinite(org))
          and all(int(n) < _PERIODIC_INDEX_LIMIT for n in shape))
    if not ok:
        raise InputError(f"cannot build a grid of shape {tuple(shape)}, spacing "
                         f"{tuple(float(x) for x in sp)} nm, origin "
                         f"{tuple(float(x) for x in org)} nm", path=source)


def _with_path(e, source):
    """``e`` again with the file named when it names none."""
    if e.path is None and source is not None:
        return type(e)(e.detail, path=source, line=e.line, field=e.field)
    return e


def domain_frame(dom, voxel_size, default_voxel, max_memory=None, src=None):
    """The labels of a closed body's or a particle packing's grid before its solid is
    marked: ``(labels, voxel, spacing, origin, default)``, GEL inside the domain and
    OUTSIDE elsewhere. ``voxel_size`` None takes ``default_voxel()`` (``(voxel, rule)``),
    coarsened to fit ``max_memory`` and at most the domain's smallest extent (``default``
    then says so, else None); a given voxel is checked against the same range. Refusals
    name ``src``."""
    lo, hi = (np.asarray(b, dtype=float) for b in dom.bounds)
    default = None
    try:
        if voxel_size is None:
            v0, rule = default_voxel()
            v, note = fit_default_voxel(dom, min(v0, float(np.min(hi - lo))), max_memory)
            default = {"rule": rule, "note": note}
        else:
            try:
                v = float(voxel_size)
            except (TypeError, ValueError):
                v = float("nan")
            if not math.isfinite(v) or v < MIN_VOXEL_NM or v > float(np.min(hi - lo)):
                raise OptionError(f"--voxel {str(voxel_size)[:40]} nm must lie between "
                                  f"{MIN_VOXEL_NM} nm and the domain's smallest extent "
                                  f"({float(np.min(hi - lo)):.4g} nm)", path=src)
        shape, spacing, origin = grid_geometry(dom, v)
        check_memory(dom, v, shape, max_memory, path=src)
    except SheetviewError as e:
        raise _with_path(e, src) from None
    _check_grid(shape, spacing, origin, src)
    labels = np.empty(shape, dtype=np.uint8)
    if not _fill_domain(labels, dom, spacing, origin):
        raise OptionError("the domain contains no voxel centre at this voxel size; use a finer "
                          "--voxel", path=src)
    return labels, v, spacing, origin, default


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
        (:func:`estimate_grid_bytes`); default half the available memory.
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
    src = structure.source
    check_domain_for_grid(dom, src)
    _check_prisms_for_grid(structure)
    rule = note = None
    try:
        if voxel_size is None:
            v0 = default_voxel_size(structure)
            rule = f"min(thickness, repeat - thickness) / 6 = {v0:.4g} nm"
            v, note = fit_default_voxel(dom, v0, max_memory, fraction=s > 1)
        else:
            v = _check_voxel_size(structure, voxel_size)
        shape, spacing, origin = grid_geometry(dom, v)
        check_memory(dom, v, shape, max_memory, fraction=s > 1, path=src)
    except SheetviewError as e:
        raise _with_path(e, src) from None
    _check_grid(shape, spacing, origin, src)
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
    with np.errstate(all="ignore"):
        nrm, d0, half, G, C, lo, hi, axis, keep = _prism_coefficients(structure)
    org = np.asarray(origin, dtype=np.float64)
    sp = np.asarray(spacing, dtype=np.float64)
    full = np.asarray(shape, dtype=np.int64)
    if not nonempty:
        raise OptionError("the domain contains no voxel centre at this voxel size "
                          f"({v:g} nm): the domain is empty; use a finer --voxel", path=src)
    run_chunks(_mark_prisms, nrm.shape[0], nrm, d0, half, G, C, lo, hi, axis, org, sp, full,
               periodic, 0, labels, np.uint8(SOLID), np.uint8(OUTSIDE))
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
        run_chunks(_mark_prisms, nrm.shape[0], nrm, d0, half, G, C, lo, hi, axis, org,
                   fine_sp, fine_full, periodic, c0 * s, b, np.uint8(1), np.uint8(255))
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


@_kernel()
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
        i0 = _first(math.ceil((xmin - org[0]) / sp[0] - 0.5 - jit), np.int64(0), nx - 1)
        i1 = _last(math.floor((xmax - org[0]) / sp[0] - 0.5 - jit), np.int64(0), nx - 1)
        j0 = _first(math.ceil((ymin - org[1]) / sp[1] - 0.5 - jit), np.int64(0), ny - 1)
        j1 = _last(math.floor((ymax - org[1]) / sp[1] - 0.5 - jit), np.int64(0), ny - 1)
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


@_kernel()
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
                k0 = _first(math.ceil((z[p] - org2) / sp2 - 0.5), np.int64(0), nz - 1)
                k1 = _last(math.floor((z[p + 1] - org2) / sp2 - 0.5), np.int64(0), nz - 1)
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
    from .domain import MAX_LENGTH_NM
    dom = body.domain
    src = body.source
    check_domain_for_grid(dom, src)
    verts = np.asarray(body.vertices, dtype=np.float64)
    faces = np.asarray(body.faces)
    if verts.size and not (np.all(np.isfinite(verts)) and np.abs(verts).max() <= MAX_LENGTH_NM):
        raise InputError(f"the surface's vertices must be finite and within {MAX_LENGTH_NM:g} nm "
                         f"(1 m): cannot be rasterized", path=src)
    if faces.size and (faces.min() < 0 or faces.max() >= len(verts)):
        raise InputError("a face of the surface refers to a vertex that does not exist",
                         path=src)
    labels, v, spacing, origin, default = domain_frame(
        dom, voxel_size, lambda: default_body_voxel_size(body), max_memory, src)
    shape = labels.shape
    tri = np.ascontiguousarray(verts[faces], dtype=np.float64)
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
