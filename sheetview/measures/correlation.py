"""Two-point correlation function S2(r) of a phase in a PhaseGrid, by FFT.

``S2(r)`` is the probability that two points a vector ``r`` apart both lie in the phase
(Torquato, *Random Heterogeneous Materials*, Springer 2002, ch. 2). ``S2(0) = phi`` (the
volume fraction), ``S2(r) -> phi^2`` for large ``r`` in a statistically homogeneous
medium without long-range order, and the slope at the origin of the orientation average
is ``-s / 4`` with ``s`` the specific surface (interface area per unit volume)
(Debye, Anderson & Brumberger, J. Appl. Phys. 28 (1957) 679, doi:10.1063/1.1722830).

Reference volume: the domain. Voxels labelled OUTSIDE are excluded through a window
``W`` (the standard windowed estimator ``S2(k) = C_II(k) / C_WW(k)``: of the voxel pairs
at displacement ``k`` with both points inside the domain, the fraction with both points in
the phase), so ``S2(0)`` is exactly the phase's volume fraction of the domain as
:func:`sheetview.measures.phases.volume_fractions` counts it.

Slope at the origin (see :func:`two_point_correlation`, Notes): on a voxel lattice the
shells of lattice displacements near ``r = 0`` hold few directions (the first shell only
the six axis neighbours), so a radial fit of the binned curve misses ``-s/4`` by up to
14 % for interfaces aligned with the grid axes. The slope is instead taken as an
orientation average over 37 lattice directions with quadrature weights, from the
probability that the two ends of a lattice displacement lie on different sides of an
interface, with a curvature term from the 13 shortest directions.
"""
from __future__ import annotations

import dataclasses
import functools
import math
from dataclasses import dataclass, field

import numba
import numpy as np

from ..errors import MemoryLimitError, OptionError
from ..grid import OUTSIDE, SOLID, PhaseGrid
from ..threads import budget, run_chunks
from ._result import Result
from .surface import phase_codes

#: Default memory ceiling for the FFT work arrays (bytes).
DEFAULT_MAX_BYTES = 4 * 1024 ** 3

#: Largest squared length (in voxels) of the primitive lattice directions averaged for the
#: slope (37 directions: <100>, <110>, <111>, <210>, <211>); the curvature term uses those
#: of squared length <= 3 (13 directions) at one and two steps.
SLOPE_DIRECTIONS_SQ = 6
CURVATURE_DIRECTIONS_SQ = 3

#: Transforms up to this many padded points run in double precision (pair counts exact
#: after rounding); larger ones in single precision (S2 to about 1e-6, half the memory).
DOUBLE_PRECISION_POINTS = 2 ** 24


@dataclass
class CorrelationResult:
    """Radially averaged two-point correlation of a phase.

    Attributes
    ----------
    r : (n,) bin centres, nm (first bin is r = 0 exactly)
    s2 : (n,) S2 averaged over the pairs in each bin
    pairs : (n,) number of voxel pairs (weight) in each bin
    phi : volume fraction of the phase in the reference volume (= S2(0))
    slope0 : slope dS2/dr at the origin of the orientation average, nm^-1 (lattice-direction
        quadrature, see :func:`two_point_correlation`)
    specific_surface : -4 slope0, nm^-1 (Debye et al. 1957): interface area of the phase
        per unit reference volume
    periodic : whether the grid wrapped
    fit_range : longest displacement (nm) the slope uses
    reference : what ``phi`` and S2 are fractions of: ``"domain"`` (the voxels inside the
        domain) unless a caller computed it on a part (e.g. ``"central block"``)
    reference_volume : volume of the reference (nm^3): voxels inside times voxel volume
    curvature : the curvature term ``q`` of ``S2(0) - S2(r) = g r - q r^2`` near the origin
        (nm^-2, orientation average from the 13 shortest directions)
    precision : ``"double"`` or ``"single"`` (FFT arithmetic)
    quadrature_error : largest relative error of the slope's direction average for a
        planar interface of any orientation (0.014 on a cubic grid)
    """

    r: np.ndarray
    s2: np.ndarray
    pairs: np.ndarray
    phi: float
    slope0: float
    specific_surface: float
    periodic: bool
    fit_range: float
    reference: str = "domain"
    reference_volume: float = float("nan")
    curvature: float = float("nan")
    precision: str = "double"
    notes: list = field(default_factory=list)
    quadrature_error: float = float("nan")

    def to_dict(self) -> dict:
        return {"r_nm": self.r.tolist(), "s2": self.s2.tolist(), "pairs": self.pairs.tolist(),
                "phi": float(self.phi), "reference": self.reference,
                "reference_volume_nm3": _num(self.reference_volume),
                "slope0_per_nm": _num(self.slope0),
                "specific_surface_per_nm": _num(self.specific_surface),
                "slope_method": SLOPE_METHOD, "fit_range_nm": _num(self.fit_range),
                "curvature_per_nm2": _num(self.curvature),
                "slope_quadrature_error": _num(self.quadrature_error),
                "periodic": bool(self.periodic), "precision": self.precision,
                "notes": list(self.notes)}

    def table(self) -> dict:
        return {"r_nm": self.r.tolist(), "s2": self.s2.tolist(), "pairs": self.pairs.tolist()}


SLOPE_METHOD = ("orientation average over 37 lattice directions (|d|^2 <= 6 voxels^2) with "
                "quadrature weights, of the interface-crossing probability per unit length, "
                "curvature term from the 13 directions |d|^2 <= 3 at one and two steps")


def _num(x):
    x = float(x)
    return x if math.isfinite(x) else None


# ------------------------------------------------------------ lattice directions
def _primitive_directions(max_sq: int) -> np.ndarray:
    """Primitive integer vectors with ``|d|^2 <= max_sq``, one of each pair ``+-d`` (first
    non-zero component positive), sorted by length then lexicographically."""
    r = int(math.isqrt(max_sq))
    g = np.arange(-r, r + 1)
    d = np.stack(np.meshgrid(g, g, g, indexing="ij"), -1).reshape(-1, 3)
    sq = (d * d).sum(1)
    d = d[(sq > 0) & (sq <= max_sq)]
    d = d[np.gcd.reduce(np.abs(d), axis=1) == 1]
    first = d[np.arange(len(d)), np.argmax(d != 0, axis=1)]
    d = d[first > 0]
    order = np.lexsort((d[:, 2], d[:, 1], d[:, 0], (d * d).sum(1)))
    return d[order].astype(np.int64)


def _fibonacci_sphere(n: int) -> np.ndarray:
    i = np.arange(n) + 0.5
    z = 1.0 - 2.0 * i / n
    a = math.pi * (1.0 + math.sqrt(5.0)) * i
    s = np.sqrt(1.0 - z * z)
    return np.c_[s * np.cos(a), s * np.sin(a), z]


@functools.lru_cache(maxsize=16)
def _quadrature(spacing: tuple, max_sq: int):
    """Directions and weights for the orientation average of an even function of the
    direction: ``mean_u f(u) ~ sum_d w_d f(d / |d|)``.

    The weights (equal within each symmetry class of the lattice: components permuted
    among axes of equal spacing, signs flipped) minimise the largest relative error over
    the functions ``f(u) = |u . n|`` for 3,000 quasi-uniform normals ``n`` plus the axes
    and diagonals (linear programme, scipy HiGHS), whose exact average is 1/2: the
    directional slope of S2 for a planar interface of normal ``n`` is proportional to
    ``|u . n|``, and any interface is a positive mixture of planar ones.

    Returns (d (k, 3) int, u (k, 3) physical unit vectors, w (k,), largest relative error).
    """
    from scipy.optimize import linprog
    sp = np.asarray(spacing, float)
    d = _primitive_directions(max_sq)
    v = d * sp
    u = v / np.linalg.norm(v, axis=1)[:, None]
    keys = [tuple(sorted(zip(spacing, np.abs(x).tolist()))) for x in d]
    classes = sorted(set(keys))
    lab = np.array([classes.index(k) for k in keys])
    extra = np.array([[1, 0, 0], [0, 1, 0], [0, 0, 1], [1, 1, 0], [1, 0, 1], [0, 1, 1],
                      [1, 1, 1], [1, -1, 1]], float)
    normals = np.vstack([_fibonacci_sphere(3000), extra / np.linalg.norm(extra, axis=1)[:, None]])
    a = np.abs(u @ normals.T)                       # (k, normals)
    nc = len(classes)
    F = np.stack([a[lab == c].mean(axis=0) for c in range(nc)], axis=1)  # class means
    # minimise e subject to |2 F w - 1| <= e, sum w = 1, w >= 0
    ones = np.ones((len(normals), 1))
    A = np.vstack([np.hstack([2 * F, -ones]), np.hstack([-2 * F, -ones])])
    b = np.r_[np.ones(len(normals)), -np.ones(len(normals))]
    res = linprog(np.r_[np.zeros(nc), 1.0], A_ub=A, b_ub=b,
                  A_eq=np.r_[np.ones(nc), 0.0][None, :], b_eq=[1.0],
                  bounds=[(0, None)] * (nc + 1), method="highs")
    if not res.success:  # pragma: no cover - the programme is always feasible
        wc = np.full(nc, 1.0 / nc)
    else:
        wc = np.clip(res.x[:nc], 0, None)
        wc /= wc.sum()
    counts = np.bincount(lab, minlength=nc)
    w = wc[lab] / counts[lab]
    err = float(np.abs(2 * (a.T @ w) - 1).max())
    return d, u, w, err


# --------------------------------------------------------------------- the FFT part
def _lags(n: int, reach: int) -> np.ndarray:
    """Integer lags of a correlation axis of ``n`` points kept to ``|lag| <= reach``, in FFT
    order (0, 1, ..., reach, -reach, ..., -1)."""
    return np.r_[0:reach + 1, -reach:0].astype(np.int64)


def _keep(m: int, r: int) -> np.ndarray:
    """Indices of the lags ``|k| <= r`` of a length-``m`` circular axis, FFT order."""
    if 2 * r + 1 < m:
        return np.r_[0:r + 1, m - r:m]
    return np.arange(m)


def _reach(shape, reach):
    if reach is None:
        return tuple(int(n) - 1 for n in shape)
    try:
        reach = np.broadcast_to(np.asarray(reach, dtype=np.int64), (3,))
    except (TypeError, ValueError):
        raise OptionError(f"reach must be one or three whole numbers of voxels, got {reach!r}") from None
    if np.any(reach < 0):
        raise OptionError(f"reach must be >= 0 voxels, got {tuple(reach.tolist())}")
    return tuple(int(min(r, n - 1)) for r, n in zip(reach, shape))


def padded_shape(shape, reach=None, periodic: bool = False) -> tuple:
    """Shape of the FFT work arrays of :func:`s2_map`: the grid itself when periodic;
    otherwise each axis zero-padded to at least ``n + reach`` (no wrap-around of the lags
    kept), rounded up to a fast FFT length."""
    import scipy.fft as sfft
    shape = tuple(int(n) for n in shape)
    if periodic:
        return shape
    return tuple(sfft.next_fast_len(n + r, real=True) for n, r in zip(shape, _reach(shape, reach)))


def _precision(m) -> tuple:
    if float(np.prod(m, dtype=np.float64)) <= DOUBLE_PRECISION_POINTS:
        return np.float64, np.complex128, "double"
    return np.float32, np.complex64, "single"


def work_bytes(shape, reach=None, periodic: bool = False, window: bool = False) -> int:
    """Peak bytes of the FFT work arrays of :func:`s2_map` (the half spectrum of the grid
    along its last axis, one chunk of the padded transform and the kept lags)."""
    shape = tuple(int(n) for n in shape)
    rch = _reach(shape, reach)
    m = padded_shape(shape, rch, periodic)
    real, cplx, _ = _precision(m)
    cs = np.dtype(cplx).itemsize
    h = m[2] // 2 + 1
    spectrum = shape[0] * shape[1] * h * cs
    chunk = _chunk_columns(m, h) * m[0] * m[1] * cs * 2
    kept = [len(_keep(a, r)) for a, r in zip(m, rch)]
    out = kept[0] * kept[1] * h * cs + kept[0] * kept[1] * m[2] * np.dtype(real).itemsize
    slab = _slab_rows(shape, m) * shape[1] * m[2] * (np.dtype(real).itemsize + cs)
    maps = 2 if window else 1
    return int(spectrum + max(chunk, slab) + maps * out)


def _chunk_columns(m, h) -> int:
    """Spectrum columns (last axis) transformed at once along the first two axes: about
    2^24 complex values per chunk."""
    return int(max(1, min(h, 2 ** 24 // max(1, m[0] * m[1]))))


def _slab_rows(shape, m) -> int:
    return int(max(1, min(shape[0], 2 ** 23 // max(1, shape[1] * m[2]))))


@numba.njit(cache=True, nogil=True)
def _abs2(lo, hi, a):
    """``a[lo:hi] <- |a[lo:hi]|^2`` in place (a flat complex array)."""
    for i in range(lo, hi):
        a[i] = a[i].real * a[i].real + a[i].imag * a[i].imag


def _inplace(fn, a, **kw):
    """``a <- fn(a)`` for a scipy.fft transform, in place where scipy allows it."""
    r = fn(a, overwrite_x=True, **kw)
    if not np.shares_memory(r, a):
        a[...] = r


def _autocorrelation(fill, shape, m, rch, workers) -> np.ndarray:
    """Autocorrelation ``sum_x f(x) f(x + k)`` at the lags ``|k_a| <= rch_a`` (FFT order) of a
    signal of ``shape`` zero-padded (or wrapped, ``m = shape``) to ``m``.

    ``fill(i0, i1, out)`` writes rows ``i0:i1`` of the signal into ``out``. Pruned
    transform: the signal is transformed along its last axis a slab of rows at a time
    (half spectrum stored with that axis first); then, a chunk of spectrum planes at a
    time, along the other two axes (padded), squared, transformed back along the first
    axis and cut to the lags kept, then along the second; last the inverse along the last
    axis of the kept lags only. The full padded spectrum is never held; the work buffers
    are allocated once and reused.
    """
    import scipy.fft as sfft
    real, cplx, _ = _precision(m)
    n0, n1, n2 = shape
    h = m[2] // 2 + 1
    F = np.empty((h, n0, n1), cplx)
    step = _slab_rows(shape, m)
    xb = np.empty((step, n1, n2), real)
    for i0 in range(0, n0, step):
        i1 = min(i0 + step, n0)
        x = xb[:i1 - i0]
        fill(i0, i1, x)
        F[:, i0:i1, :] = sfft.rfft(x, n=m[2], axis=2, workers=workers).transpose(2, 0, 1)
    del xb
    k0, k1, k2 = (_keep(a, r) for a, r in zip(m, rch))
    G = np.empty((h, len(k0), len(k1)), cplx)
    c = _chunk_columns(m, h)
    buf = np.zeros((c, m[0], m[1]), cplx)
    for j0 in range(0, h, c):
        j1 = min(j0 + c, h)
        A = buf[:j1 - j0]
        A[:, :n0, :n1] = F[j0:j1]
        A[:, :n0, n1:] = 0
        A[:, n0:, :] = 0
        _inplace(sfft.fft, A[:, :n0, :], axis=2, workers=workers)
        _inplace(sfft.fft, A, axis=1, workers=workers)
        flat = A.reshape(-1)
        run_chunks(_abs2, flat.shape[0], flat)
        _inplace(sfft.ifft, A, axis=1, workers=workers)
        B = A[:, k0] if len(k0) < m[0] else A.copy()
        _inplace(sfft.ifft, B, axis=2, workers=workers)
        G[j0:j1] = B[:, :, k1] if len(k1) < m[1] else B
        del B
    del F, buf
    out = sfft.irfft(G, n=m[2], axis=0, workers=workers)
    del G
    out = np.ascontiguousarray(out[k2].transpose(1, 2, 0), dtype=np.float64)
    return np.rint(out, out=out)


def _symmetric_autocorrelation(w, m, rch, workers) -> np.ndarray:
    """Autocorrelation of a window ``w`` that is mirror-symmetric along each axis
    (``w == w[::-1]`` per axis, as a sphere domain's grid is), at the lags ``|k_a| <= rch_a``
    (FFT order), zero-padded to ``m``: the same numbers as :func:`_autocorrelation` for an
    eighth of the work.

    A signal even about its centre ``c`` has the transform ``e^{-i q c} R(q)`` with
    ``R(q) = sum_x w(x) prod_a cos(q_a (x_a - c_a))`` real, so ``|W(q)|^2 = R(q)^2``; ``R``
    is computed from one octant by real transforms along each axis (a half-sample phase
    for an even length), and ``C_WW = ifft(R^2)``, even in each lag, from half spectra.
    """
    import scipy.fft as sfft
    real, _, _ = _precision(m)
    shape = w.shape
    o = np.asarray(w[shape[0] // 2:, shape[1] // 2:, shape[2] // 2:], dtype=real)
    for ax, n in enumerate(shape):
        wt = np.full(o.shape[ax], 2.0, real)
        if n % 2:
            wt[0] = 1.0
        sh = [1, 1, 1]
        sh[ax] = -1
        o = o * wt.reshape(sh)
    for ax, n in enumerate(shape):
        X = sfft.rfft(o, n=m[ax], axis=ax, workers=workers)
        if n % 2 == 0:
            sh = [1, 1, 1]
            sh[ax] = -1
            ph = np.exp(-1j * np.pi * np.arange(X.shape[ax]) / m[ax]).astype(X.dtype)
            X *= ph.reshape(sh)
        o = np.ascontiguousarray(X.real)
        del X
    np.multiply(o, o, out=o)
    for ax in np.argsort([-a for a in m]):
        o = sfft.irfft(o, n=m[ax], axis=int(ax), workers=workers)
        o = np.take(o, np.arange(rch[ax] + 1), axis=int(ax))
    for ax, r in enumerate(rch):
        o = np.take(o, np.r_[0:r + 1, r:0:-1].astype(np.int64), axis=ax)
    o = np.ascontiguousarray(o, dtype=np.float64)
    return np.rint(o, out=o)


@numba.njit(cache=True, nogil=True)
def _mirror_rows(lo, hi, labels):
    """True when, in the planes ``lo <= i < hi``, the inside voxels (label != OUTSIDE) are
    mirror-symmetric along each axis."""
    n0, n1, n2 = labels.shape
    for i in range(lo, hi):
        for j in range(n1):
            for k in range(n2):
                v = labels[i, j, k] == 0
                if (v != (labels[n0 - 1 - i, j, k] == 0) or v != (labels[i, n1 - 1 - j, k] == 0)
                        or v != (labels[i, j, n2 - 1 - k] == 0)):
                    return False
    return True


def _window_mirror_symmetric(labels) -> bool:
    """True when the inside voxels (label != OUTSIDE) are mirror-symmetric along each axis."""
    return all(run_chunks(_mirror_rows, labels.shape[0], labels))


def _fill_from(arr):
    def fill(i0, i1, out):
        out[...] = arr[i0:i1]
    return fill


@numba.njit(cache=True, nogil=True)
def _lut_rows(lo, hi, labels, lut, i0, out):
    for i in range(lo, hi):
        for j in range(out.shape[1]):
            for k in range(out.shape[2]):
                out[i, j, k] = lut[labels[i0 + i, j, k]]


@numba.njit(cache=True, nogil=True)
def _label_count_rows(lo, hi, labels):
    """Number of voxels of each label value (uint8) in the planes ``lo <= i < hi``."""
    part = np.zeros(256, np.int64)
    for i in range(lo, hi):
        for j in range(labels.shape[1]):
            for k in range(labels.shape[2]):
                part[labels[i, j, k]] += 1
    return part


def _label_counts(labels) -> np.ndarray:
    """Number of voxels of each label value (uint8)."""
    parts = run_chunks(_label_count_rows, labels.shape[0], labels)
    return np.add.reduce(parts) if parts else np.zeros(256, np.int64)


def _fill_lut(labels, lut):
    def fill(i0, i1, out):
        run_chunks(_lut_rows, out.shape[0], labels, lut.astype(out.dtype), i0, out)
    return fill


def _maps(shape, fill_i, fill_w, periodic, rch, workers, sym_window=None):
    """(C_II, C_WW, lags, precision) at the lags kept; ``fill_w`` None: a full box (exact
    counts prod(n_a - |k_a|), no transform; periodic: n). ``sym_window``: the window as an
    array when it is mirror-symmetric along each axis (non-periodic only): its
    autocorrelation by :func:`_symmetric_autocorrelation`."""
    m = padded_shape(shape, rch, periodic)
    prec = _precision(m)[2]
    c = _autocorrelation(fill_i, shape, m, rch, workers)
    if periodic:
        lags = [_lags(n, r) if 2 * r + 1 < n else np.fft.fftfreq(n, 1.0 / n).astype(np.int64)
                for n, r in zip(shape, rch)]
    else:
        lags = [_lags(n, r) for n, r in zip(shape, rch)]
    if fill_w is None:
        if periodic:
            cw = np.full(c.shape, float(np.prod(shape, dtype=np.float64)))
        else:
            per = [(n - np.abs(k)).astype(np.float64) for n, k in zip(shape, lags)]
            cw = per[0][:, None, None] * per[1][None, :, None] * per[2][None, None, :]
    elif sym_window is not None and not periodic:
        cw = _symmetric_autocorrelation(sym_window, m, rch, workers)
    else:
        cw = _autocorrelation(fill_w, shape, m, rch, workers)
    return c, cw, lags, prec


def _ratio(c, cw, prec):
    # single precision: a count below 1e-5 of the largest is within the rounding noise
    floor = 0.5 if prec == "double" else max(0.5, 1e-5 * float(cw.flat[0]))
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(cw > floor, c / np.maximum(cw, 1.0), np.nan)


def _s2_map(mask, window=None, periodic=False, reach=None, workers=None):
    m = np.asarray(mask, dtype=bool)
    if m.ndim != 3:
        raise OptionError(f"s2_map needs a 3D mask, got {m.ndim}D")
    workers = workers or budget()
    rch = _reach(m.shape, reach)
    w = None if window is None else np.asarray(window, dtype=bool)
    if w is not None and w.shape != m.shape:
        raise OptionError(f"window shape {w.shape} differs from the mask's {m.shape}")
    if w is not None and w.all():
        w = None
    x = m & w if w is not None else m
    c, cw, lags, prec = _maps(m.shape, _fill_from(x), None if w is None else _fill_from(w),
                              periodic, rch, workers)
    return _ratio(c, cw, prec), cw, lags


def s2_map(mask: np.ndarray, window: np.ndarray | None = None, periodic: bool = False,
           reach=None, workers: int | None = None):
    """Full 3D S2 map and pair counts at every lattice displacement (FFT).

    ``S2(k) = C_II(k) / C_WW(k)``: of the voxel pairs at displacement ``k`` with both points
    in the window (the voxels inside the domain; all True by default), the fraction with
    both points in ``mask & window``. Periodic: circular correlations; otherwise the
    signals are zero-padded to :func:`padded_shape`; without a window ``C_WW`` is the
    exact count ``prod_a (n_a - |k_a|)`` (periodic: ``N``) and takes no transform.

    ``reach``: the largest lag kept per axis, voxels (an int or three; default all,
    ``n - 1``). Only the lags kept are padded for, so a reach of half the grid needs
    work arrays of about 1.5 n per axis instead of 2 n; the transform is pruned (see
    :func:`work_bytes`). ``workers``: FFT threads (default
    :func:`sheetview.threads.budget`). Returns (s2, pairs), of ``2 reach + 1`` values per
    axis (periodic: at most ``n``), displacement axes in FFT order (index ``-k`` is the
    lag ``-k``). Pair counts are exact (rounded) up to :data:`DOUBLE_PRECISION_POINTS`
    padded points; beyond, single-precision transforms give S2 to about 1e-6.
    """
    s2, pairs, _ = _s2_map(mask, window, periodic, reach, workers)
    return s2, pairs


# --------------------------------------------------------------- slope at the origin
@numba.njit(cache=True, nogil=True)
def _block_flag_rows(lo, hi, labels, inphase, b, out, ph):
    """For each block of ``b^3`` voxels in the block rows ``lo <= bi < hi``: whether it
    holds an OUTSIDE voxel (``out``), and whether it holds a phase voxel (``ph``)."""
    n0, n1, n2 = labels.shape
    for bi in range(lo, hi):
        for i in range(bi * b, min(n0, bi * b + b)):
            for j in range(n1):
                for k in range(n2):
                    v = labels[i, j, k]
                    if v == 0:
                        out[bi, j // b, k // b] = True
                    elif inphase[v]:
                        ph[bi, j // b, k // b] = True


def _block_flags(labels, inphase, b):
    """For each block of ``b^3`` voxels: whether it holds an OUTSIDE voxel, and whether it
    holds a phase voxel."""
    n0, n1, n2 = labels.shape
    shp = ((n0 + b - 1) // b, (n1 + b - 1) // b, (n2 + b - 1) // b)
    out = np.zeros(shp, np.bool_)
    ph = np.zeros(shp, np.bool_)
    run_chunks(_block_flag_rows, shp[0], labels, inphase, int(b), out, ph)
    return out, ph


#: Groups of blocks of :func:`_lag_misses` (block q goes to group q % _LAG_GROUPS).
_LAG_GROUPS = 64


@numba.njit(cache=True, nogil=True)
def _lag_misses(lo, hi, labels, inphase, lags, blocks, b, periodic):
    """For each lag ``k``: the number of phase voxels ``x`` in the listed blocks (corner
    indices ``blocks * b``) of the groups ``lo <= g < hi`` (block q in group q % 64)
    whose partner ``x + k`` is off the grid (non-periodic) or OUTSIDE."""
    n0, n1, n2 = labels.shape
    nl = lags.shape[0]
    nbk = blocks.shape[0]
    ng = _LAG_GROUPS
    part = np.zeros(nl, np.int64)
    for g in range(lo, hi):
        for q0 in range(g, nbk, ng):
            bi = blocks[q0, 0] * b
            bj = blocks[q0, 1] * b
            bk = blocks[q0, 2] * b
            for i in range(bi, min(bi + b, n0)):
                for j in range(bj, min(bj + b, n1)):
                    for k in range(bk, min(bk + b, n2)):
                        if not inphase[labels[i, j, k]]:
                            continue
                        for q in range(nl):
                            a = i + lags[q, 0]
                            c = j + lags[q, 1]
                            e = k + lags[q, 2]
                            if periodic:
                                a %= n0
                                c %= n1
                                e %= n2
                            elif a < 0 or a >= n0 or c < 0 or c >= n1 or e < 0 or e >= n2:
                                part[q] += 1
                                continue
                            if labels[a, c, e] == 0:
                                part[q] += 1
    return part


def _cross_counts(labels, inphase, lags, periodic, n_phase):
    """``C_IW(k) = #{x in phase : x + k inside the domain}`` at small lags ``k``."""
    r = int(np.abs(lags).max())
    b = max(4, r)
    has_out, has_phase = _block_flags(labels, inphase, b)
    dirty = has_out.copy()
    # a block is dirty if it or a neighbour holds an OUTSIDE voxel (b >= reach)
    pad = np.pad(has_out, 1)
    for di in (-1, 0, 1):
        for dj in (-1, 0, 1):
            for dk in (-1, 0, 1):
                dirty |= pad[1 + di:pad.shape[0] - 1 + di, 1 + dj:pad.shape[1] - 1 + dj,
                             1 + dk:pad.shape[2] - 1 + dk]
    # blocks within the reach of a grid face (off the grid, or wrapped onto the far face)
    for ax, n in enumerate(labels.shape):
        idx = [slice(None)] * 3
        lo = np.arange(dirty.shape[ax]) * b
        idx[ax] = (lo < r) | (np.minimum(lo + b, n) > n - r)
        dirty[tuple(idx)] = True
    # only phase voxels of blocks with an OUTSIDE voxel or a grid face within reach can
    # miss a partner
    blocks = np.argwhere(dirty & has_phase).astype(np.int64)
    miss = np.add.reduce(run_chunks(_lag_misses, _LAG_GROUPS, labels, inphase,
                                    np.ascontiguousarray(lags, np.int64), blocks, int(b),
                                    bool(periodic)))
    return n_phase - miss.astype(np.float64)


def _slope(labels, inphase, periodic, spacing, c, cw, lags, n_phase):
    """Slope at the origin of the orientation-averaged S2 (see two_point_correlation).
    Returns (slope, curvature, fit_range, quadrature error) or NaNs when the grid is too
    small."""
    sp = tuple(float(s) for s in spacing)
    d6, u6, w6, _ = _quadrature(sp, SLOPE_DIRECTIONS_SQ)
    d3, u3, w3, _ = _quadrature(sp, CURVATURE_DIRECTIONS_SQ)
    need = np.vstack([d6, 2 * d3])
    r = int(np.abs(need).max())
    nan = (float("nan"),) * 4
    if any(len(k) < 2 * r + 1 for k in lags) or any(n < 2 * r + 1 for n in labels.shape):
        return nan
    lag_idx = [{int(v): i for i, v in enumerate(k)} for k in lags]
    allk = np.vstack([need, -need])
    cross = _cross_counts(labels, inphase, allk, periodic, n_phase)
    nk = len(need)

    def crossing(q):
        k = need[q]
        ix = tuple(lag_idx[a][int(k[a])] for a in range(3))
        cwk = cw[ix]
        if not cwk > 0.5:
            return float("nan")
        # pairs at lag k (either order) with one end in the phase and the other not,
        # per pair with both ends inside the domain: (C_IW(k) + C_IW(-k))/2 - C_II(k)
        return (0.5 * (cross[q] + cross[q + nk]) - c[ix]) / cwk

    D = np.array([crossing(q) for q in range(nk)])
    L6 = np.linalg.norm(d6 * np.asarray(sp), axis=1)
    L3 = np.linalg.norm(d3 * np.asarray(sp), axis=1)
    D6 = D[:len(d6)]
    # D3 at one step: the first 13 of d6 are d3 (sorted by length, same order)
    D3a = D[:len(d3)]
    D3b = D[len(d6):]
    if not np.all(np.isfinite(D)):
        return nan
    q = float(np.sum(w3 * (2 * D3a - D3b) / (2 * L3 ** 2)))
    g = float(np.sum(w6 * (D6 / L6 + q * L6)))
    fit = float(max(L6.max(), 2 * L3.max()))
    return -g, q, fit, float(_quadrature(sp, SLOPE_DIRECTIONS_SQ)[3])


# ------------------------------------------------------------------- the measure
def two_point_correlation(grid: PhaseGrid, phases, r_max: float | None = None,
                          bin_width: float | None = None,
                          max_bytes: int = DEFAULT_MAX_BYTES) -> CorrelationResult:
    """Radially averaged S2(r) of a set of phases over the domain, and its slope at r = 0.

    Parameters
    ----------
    grid : PhaseGrid. OUTSIDE voxels are excluded: only pairs with both points inside the
        domain count, so ``phi = S2(0)`` is the phase's volume fraction of the domain.
    phases : phase code or list of codes
    r_max : largest r (nm); default half the smallest grid extent. Only the lags up to
        ``r_max + bin_width/2`` are transformed for (the FFT is padded to n + that reach).
    bin_width : radial bin width (nm); default the largest voxel spacing
    max_bytes : refuse (MemoryLimitError) when the FFT work arrays would exceed this

    Notes
    -----
    *Curve.* Each bin averages S2 over all lattice displacements whose length falls into
    it, weighted by their pair counts (the windowed estimator ``C_II / C_WW``; it assumes a
    statistically homogeneous medium). The first value is S2(0) = phi exactly. Near
    r = 0 the shells of lattice displacements hold few directions (the first bin only the
    six axis neighbours), so the first bins of a structure aligned with the grid axes are
    not orientation averages.

    *Slope at the origin* (Debye, Anderson & Brumberger 1957: ``S2'(0) = -s/4``). Along a
    lattice displacement ``k`` let ``D(k)`` be the fraction of in-domain voxel pairs
    ``(x, x + k)`` with one point in the phase and the other not, halved (for a
    homogeneous medium ``D(k) = S2(0) - S2(k)``; counting the crossings themselves keeps
    it right near the domain wall and for bodies inside a window). Voxel labels sample the
    structure at voxel centres, so ``D(k)`` estimates the continuous structure's value at
    the displacement ``k`` without staircase bias. Model near the origin:
    ``D(r u) = g(u) r - q r^2``, ``g(u) = (s/2) <|n . u|>`` over the interface. The
    curvature ``q`` is the quadrature average of ``(2 D(d) - D(2 d)) / (2 |d|^2)`` over the
    13 primitive directions ``|d|^2 <= 3``; the slope is
    ``-sum_d w_d (D(d)/|d| + q |d|)`` over the 37 primitive directions ``|d|^2 <= 6``
    (voxels), the weights ``w_d`` making the average of ``|n . u|`` exact to 1.4 % for every
    planar interface normal ``n`` on a cubic grid (6.1 % over the 13 short directions
    alone; a few % more on strongly anisotropic grids, reported as ``quadrature_error``;
    see ``_quadrature``). The longest displacement used is ``2 sqrt(3)`` voxels
    (``fit_range``): the model holds for solid and pore features thicker than that (the
    default voxel puts six across the thinnest); thinner ones bias the slope.
    """

    if not isinstance(grid, PhaseGrid):
        raise OptionError(f"expected a PhaseGrid, got {type(grid).__name__}")
    codes = phase_codes(phases, "phases")
    sp = np.asarray(grid.spacing, float)
    shape = np.asarray(grid.shape)
    ext = shape * sp
    rmax = float(0.5 * ext.min()) if r_max is None else float(r_max)
    bw = float(sp.max()) if bin_width is None else float(bin_width)
    if not (rmax > 0 and bw > 0):
        raise OptionError(f"r_max and bin_width must be positive, got {r_max!r}, {bin_width!r}")
    # lags that can fall in a bin: |k_a| sp_a <= rmax + bw / 2; at least those of the slope
    reach = np.ceil((rmax + 0.5 * bw) / sp + 1e-9)
    reach = tuple(int(v) for v in np.minimum(np.maximum(reach, 2), shape - 1))
    lab = np.ascontiguousarray(grid.labels)  # one layout for every kernel below
    counts = _label_counts(lab)
    n_in = int(counts.sum() - counts[OUTSIDE])
    if n_in == 0:
        raise OptionError("the grid has no voxel inside the domain")
    has_window = n_in < lab.size
    need = work_bytes(shape, reach, grid.periodic, has_window)
    if need > max_bytes:
        raise MemoryLimitError(f"two-point correlation of a {tuple(shape)} grid needs about "
                               f"{need / 1e9:.1f} GB (limit {max_bytes / 1e9:.1f} GB); use a "
                               f"smaller r_max, a coarser grid or a sub-volume")
    inphase = np.zeros(256, np.bool_)
    inphase[codes] = True
    inphase[OUTSIDE] = False
    n_phase = int(counts[inphase].sum())
    lut_i = inphase.astype(np.float32)
    lut_w = np.ones(256, np.float32)
    lut_w[OUTSIDE] = 0
    workers = budget()
    sym = None
    if has_window and not grid.periodic and _window_mirror_symmetric(lab):
        sym = lab != OUTSIDE  # e.g. a sphere domain: an eighth of the window's transform
    c, cw, lags, prec = _maps(lab.shape, _fill_lut(lab, lut_i),
                              _fill_lut(lab, lut_w) if has_window else None,
                              grid.periodic, reach, workers, sym)
    del sym
    s2 = _ratio(c, cw, prec)
    # S2(0) = phi exactly (integer counts)
    phi = n_phase / n_in
    s2[0, 0, 0] = phi
    cw[0, 0, 0] = n_in
    c[0, 0, 0] = n_phase
    slope, curv, fit, qerr = _slope(lab, inphase, grid.periodic, sp, c, cw, lags, n_phase)
    # displacement lengths in FFT order
    comps = [k * s for k, s in zip(lags, sp)]
    R = np.sqrt(comps[0][:, None, None] ** 2 + comps[1][None, :, None] ** 2
                + comps[2][None, None, :] ** 2)
    ok = np.isfinite(s2) & (R <= rmax + 0.5 * bw) & (cw > 0.5)
    # bins: [0] exactly r = 0, then (0, bw], (bw, 2bw], ...
    b = np.where(R[ok] == 0, 0, np.ceil(R[ok] / bw - 1e-12).astype(np.int64))
    nb = int(b.max()) + 1
    wts = cw[ok]
    sums = np.bincount(b, weights=s2[ok] * wts, minlength=nb)
    wsum = np.bincount(b, weights=wts, minlength=nb)
    rsum = np.bincount(b, weights=R[ok] * wts, minlength=nb)
    good = wsum > 0
    r = rsum[good] / wsum[good]
    S2 = sums[good] / wsum[good]
    S2[0] = phi
    W = wsum[good]
    notes = []
    if not math.isfinite(slope):
        notes.append("the grid is too small for the slope at the origin (lags of up to 2 "
                     "voxels per axis are needed)")
    return CorrelationResult(r, S2, W, phi, slope, -4.0 * slope, bool(grid.periodic), fit,
                             "domain", n_in * float(np.prod(sp)), curv, prec, notes, qerr)


# ------------------------------------------------------- the measure of `measure`
#: Cap of the default S2 range in voxels (see :func:`default_s2_rmax`).
S2_RMAX_VOXELS = 80
#: Largest padded transform (points) the ``correlation`` measure runs S2 on: 512^3, about
#: 4 s for the phase and the window of a 432^3 grid on 2 cores (docs/performance.md);
#: beyond, the largest central block within it, named as the reference volume.
S2_WHOLE_POINTS = 512 ** 3


def default_s2_rmax(g: PhaseGrid) -> float:
    """Largest r (nm) of the ``correlation`` measure: half the grid's smallest extent, at
    most :data:`S2_RMAX_VOXELS` voxels (the FFT is padded by that many voxels per axis)."""
    sp = np.asarray(g.spacing, float)
    return float(min(0.5 * float((np.asarray(g.shape) * sp).min()), S2_RMAX_VOXELS * sp.max()))


def s2_cost(shape, spacing, periodic: bool, rmax: float) -> tuple:
    """(padded points, FFT work bytes with a window) of S2 on a grid of ``shape`` up to
    ``rmax`` (the reach of :func:`two_point_correlation`)."""
    sp = np.broadcast_to(np.asarray(spacing, float), (3,))
    shape = np.asarray(shape)
    reach = np.minimum(np.maximum(np.ceil((rmax + 0.5 * sp.max()) / sp + 1e-9), 2), shape - 1)
    reach = tuple(int(r) for r in reach)
    pts = float(np.prod(padded_shape(tuple(shape), reach, periodic), dtype=np.float64))
    return pts, work_bytes(tuple(shape), reach, periodic, True)


def central_block(g: PhaseGrid, n: int):
    """The central block of at most ``n`` voxels per side (the grid itself if smaller) and
    a note describing it (None for the grid itself)."""
    shape = np.asarray(g.shape)
    if np.all(shape <= n):
        return g, None
    m = np.minimum(shape, n)
    lo = (shape - m) // 2
    sl = tuple(slice(int(a), int(a + b)) for a, b in zip(lo, m))
    origin = np.asarray(g.origin) + lo * np.asarray(g.spacing)
    sub = PhaseGrid(np.ascontiguousarray(g.labels[sl]), g.spacing, tuple(origin), g.names,
                    periodic=False, metadata={}, source=g.source)
    return sub, (f"computed on the central {m[0]} x {m[1]} x {m[2]} voxel block "
                 f"({m[0] * g.spacing[0]:.3g} nm across) of the {shape[0]} x {shape[1]} x "
                 f"{shape[2]} grid")


@dataclass(repr=False)
class CorrelationMeasure(Result):
    """The ``correlation`` measure: S2 of the solid (:class:`CorrelationResult`), over the
    domain unless a block had to be used (``reference``, ``block_voxels``)."""

    s2_solid: CorrelationResult
    reference: str
    r_max: float
    block_voxels: list | None = None
    notes: list = field(default_factory=list)

    def to_dict(self) -> dict:
        d = {"reference": self.reference, "r_max_nm": float(self.r_max),
             "s2_solid": self.s2_solid.to_dict()}
        if self.block_voxels is not None:
            d["block_voxels"] = list(self.block_voxels)
        if self.notes:
            d["notes"] = list(self.notes)
        return d

    def tables(self) -> dict:
        return {"s2_solid": self.s2_solid.table()}

    def brief(self) -> str:
        r = self.s2_solid
        return (f"S2 of the solid over the {self.reference}: phi {r.phi:.4g}, S_V "
                f"{r.specific_surface:.4g} nm^-1 from the slope, r up to {self.r_max:.3g} nm")


def correlation_measure(grid: PhaseGrid, *, s2_block: int | None = None,
                        s2_rmax: float | None = None,
                        max_memory: int | None = None) -> CorrelationMeasure:
    """S2 of the solid over the whole domain (OUTSIDE voxels excluded through the window),
    so S2(0) is the solid fraction ``phases`` reports: the ``correlation`` measure.

    ``s2_rmax`` (nm) bounds the lags transformed for (default :func:`default_s2_rmax`). A
    central block is used only when ``s2_block`` (voxels per side) asks for one, or when
    the domain's padded transform would exceed :data:`S2_WHOLE_POINTS` points (time) or
    ``max_memory`` bytes (default :data:`DEFAULT_MAX_BYTES`): the largest central cube
    within both. The result then names the block as its reference volume, and a note says
    why.
    """
    g = grid
    limit = int(max_memory or DEFAULT_MAX_BYTES)
    rmax = default_s2_rmax(g) if s2_rmax is None else float(s2_rmax)
    note = None

    def fits(shape, periodic):
        pts, nbytes = s2_cost(shape, g.spacing, periodic, rmax)
        return pts <= S2_WHOLE_POINTS and nbytes <= limit

    if s2_block is None:
        sub = g
        if not fits(g.shape, g.periodic):
            n = max(g.shape)
            while n > 16 and not fits(np.minimum(g.shape, n), False):
                n = int(n * 0.95)
            sub, note = central_block(g, n)
            pts, nbytes = s2_cost(g.shape, g.spacing, g.periodic, rmax)
            note = (f"two-point correlation {note}, not the whole domain: its padded transform "
                    f"would have {pts / 1e6:.0f} M points (at most {S2_WHOLE_POINTS / 1e6:.0f} M "
                    f"for time) and need {nbytes / 1e9:.1f} GB (max_memory "
                    f"{limit / 1e9:.1f} GB); phi and S2 are fractions of the block")
    else:
        sub, note = central_block(g, int(s2_block))
        if note:
            note = (f"two-point correlation {note} (s2_block), not the whole domain; phi and "
                    "S2 are fractions of the block")
    res = two_point_correlation(sub, (SOLID,), r_max=rmax, max_bytes=limit)
    if note:
        res = dataclasses.replace(res, reference="central block", notes=res.notes + [note])
        return CorrelationMeasure(res, "central block", rmax, list(sub.shape), [note])
    return CorrelationMeasure(res, "domain", rmax)
