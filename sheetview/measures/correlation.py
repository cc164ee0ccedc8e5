"""Two-point correlation function S2(r) of a phase in a PhaseGrid, by FFT.

``S2(r)`` is the probability that two points a vector ``r`` apart both lie in the phase
(Torquato, *Random Heterogeneous Materials*, Springer 2002, ch. 2). ``S2(0) = phi`` (the
volume fraction), ``S2(r) -> phi^2`` for large ``r`` in a statistically homogeneous
medium without long-range order, and the slope at the origin of the orientation average
is ``-s / 4`` with ``s`` the specific surface (interface area per unit volume)
(Debye, Anderson & Brumberger, J. Appl. Phys. 28 (1957) 679, doi:10.1063/1.1722830).
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..errors import MemoryLimitError, OptionError
from ..grid import OUTSIDE, PhaseGrid
from ..threads import budget

#: Default memory ceiling for the FFT work arrays (bytes).
DEFAULT_MAX_BYTES = 2 * 1024 ** 3


@dataclass
class CorrelationResult:
    """Radially averaged two-point correlation of a phase.

    Attributes
    ----------
    r : (n,) bin centres, nm (first bin is r = 0 exactly)
    s2 : (n,) S2 averaged over the pairs in each bin
    pairs : (n,) number of voxel pairs (weight) in each bin
    phi : volume fraction of the phase inside the domain (= S2(0))
    slope0 : slope dS2/dr at the origin, nm^-1 (linear fit over r <= fit_range)
    specific_surface : -4 slope0, nm^-1 (Debye et al. 1957)
    periodic : whether the grid wrapped
    """

    r: np.ndarray
    s2: np.ndarray
    pairs: np.ndarray
    phi: float
    slope0: float
    specific_surface: float
    periodic: bool
    fit_range: float

    def to_dict(self) -> dict:
        return {"r_nm": self.r.tolist(), "s2": self.s2.tolist(), "pairs": self.pairs.tolist(),
                "phi": float(self.phi), "slope0_per_nm": float(self.slope0),
                "specific_surface_per_nm": float(self.specific_surface),
                "periodic": bool(self.periodic), "fit_range_nm": float(self.fit_range)}

    def table(self) -> dict:
        return {"r_nm": self.r.tolist(), "s2": self.s2.tolist(), "pairs": self.pairs.tolist()}


def _lags(n: int, reach: int) -> np.ndarray:
    """Integer lags of a correlation axis of ``n`` points kept to ``|lag| <= reach``, in FFT
    order (0, 1, ..., reach, -reach, ..., -1)."""
    return np.r_[0:reach + 1, -reach:0].astype(np.int64)


def _crop(a: np.ndarray, reach) -> np.ndarray:
    """Keep the lags ``|k_a| <= reach_a`` of a map in FFT order (FFT order kept)."""
    for ax, r in enumerate(reach):
        n = a.shape[ax]
        if 2 * r + 1 < n:
            a = np.take(a, np.r_[0:r + 1, n - r:n], axis=ax)
    return a


def _autocorrelation(x: np.ndarray, shape, workers: int) -> np.ndarray:
    """Circular autocorrelation of ``x`` zero-padded to ``shape`` (real FFT), rounded to
    the nearest integer (``x`` holds 0/1, so every value is a count of pairs)."""
    import scipy.fft as sfft
    F = sfft.rfftn(x, s=shape, axes=(0, 1, 2), workers=workers)
    np.multiply(F, F.conj(), out=F)
    c = sfft.irfftn(F, s=shape, axes=(0, 1, 2), workers=workers, overwrite_x=True)
    del F
    return np.rint(c, out=c)


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


def _s2_map(mask, window=None, periodic=False, reach=None, workers=None):
    m = np.asarray(mask, dtype=bool)
    if m.ndim != 3:
        raise OptionError(f"s2_map needs a 3D mask, got {m.ndim}D")
    workers = workers or budget()
    rch = _reach(m.shape, reach)
    if periodic:
        c = _crop(_autocorrelation(m.astype(np.float64), m.shape, workers), rch)
        lags = [_lags(n, r) if 2 * r + 1 < n else np.fft.fftfreq(n, 1.0 / n).astype(np.int64)
                for n, r in zip(m.shape, rch)]
        n = float(m.size)
        return c / n, np.full(c.shape, n), lags
    shape = padded_shape(m.shape, rch)
    lags = [_lags(n, r) for n, r in zip(m.shape, rch)]
    w = None if window is None else np.asarray(window, dtype=bool)
    x = (m & w if w is not None else m).astype(np.float64)
    c = _crop(_autocorrelation(x, shape, workers), rch)
    del x
    if w is None:
        # pairs with both points in the box at lag k: prod_a (n_a - |k_a|) (exact)
        per = [(n - np.abs(k)).astype(np.float64) for n, k in zip(m.shape, lags)]
        cw = per[0][:, None, None] * per[1][None, :, None] * per[2][None, None, :]
    else:
        cw = _crop(_autocorrelation(w.astype(np.float64), shape, workers), rch)
    with np.errstate(invalid="ignore", divide="ignore"):
        s2 = np.where(cw > 0.5, c / np.maximum(cw, 1.0), np.nan)
    return s2, cw, lags


def s2_map(mask: np.ndarray, window: np.ndarray | None = None, periodic: bool = False,
           reach=None, workers: int | None = None):
    """Full 3D S2 map and pair counts at every lattice displacement (FFT).

    Periodic: circular autocorrelation ``ifft(|fft(I)|^2) / N``. Otherwise the indicator
    (times the window of voxels inside the domain, all True by default) is zero-padded
    to :func:`padded_shape` and ``S2(r) = C_II(r) / C_WW(r)``, the fraction of the
    in-domain pairs at displacement ``r`` that are both in the phase; without a window
    ``C_WW`` is the exact count ``prod_a (n_a - |k_a|)`` and takes no transform.

    ``reach``: the largest lag kept per axis, voxels (an int or three; default all,
    ``n - 1``). Only the lags kept are padded for, so a reach of half the grid needs
    work arrays of about 1.5 n per axis instead of 2 n. ``workers``: FFT threads (default
    :func:`sheetview.threads.budget`). Returns (s2, pairs), of ``2 reach + 1`` values per
    axis (periodic: at most ``n``), displacement axes in FFT order (index ``-k`` is the
    lag ``-k``).
    """
    s2, pairs, _ = _s2_map(mask, window, periodic, reach, workers)
    return s2, pairs


def two_point_correlation(grid: PhaseGrid, phases, r_max: float | None = None,
                          bin_width: float | None = None, fit_range: float | None = None,
                          max_bytes: int = DEFAULT_MAX_BYTES) -> CorrelationResult:
    """Radially averaged S2(r) of a set of phases.

    Parameters
    ----------
    grid : PhaseGrid (OUTSIDE voxels are excluded: only pairs with both points inside the
        domain count)
    phases : phase code or list of codes
    r_max : largest r (nm); default half the smallest grid extent
    bin_width : radial bin width (nm); default the largest voxel spacing
    fit_range : the slope at the origin is a least-squares line through S2 at r = 0 and
        the bins with ``r <= fit_range`` (default 2 bin widths)
    max_bytes : refuse (MemoryLimitError) when the FFT work arrays would exceed this

    Notes
    -----
    Each bin averages S2 over all lattice displacements whose length falls into it,
    weighted by their pair counts. The first value is S2(0) = phi exactly.
    ``specific_surface = -4 S2'(0)`` (Debye, Anderson & Brumberger 1957) applies to the
    orientation average; lattice digitisation biases it by a few percent.
    """
    from .surface import _codes

    if not isinstance(grid, PhaseGrid):
        raise OptionError(f"expected a PhaseGrid, got {type(grid).__name__}")
    codes = _codes(phases, "phases")
    sp = np.asarray(grid.spacing)
    shape = np.asarray(grid.shape)
    ext = shape * sp
    rmax = float(0.5 * ext.min()) if r_max is None else float(r_max)
    bw = float(sp.max()) if bin_width is None else float(bin_width)
    if not (rmax > 0 and bw > 0):
        raise OptionError(f"r_max and bin_width must be positive, got {r_max!r}, {bin_width!r}")
    # lags that can fall in a bin: |k_a| sp_a <= rmax + bw / 2
    reach = tuple(int(v) for v in np.minimum(np.ceil((rmax + 0.5 * bw) / sp + 1e-9),
                                             shape - 1))
    # real input, its half-spectrum (complex) and the real output at once: 3 x 8 bytes
    need = int(np.prod(padded_shape(shape, reach, grid.periodic), dtype=np.float64) * 8 * 3)
    if need > max_bytes:
        raise MemoryLimitError(f"two-point correlation of a {tuple(shape)} grid needs about "
                               f"{need / 1e9:.1f} GB (limit {max_bytes / 1e9:.1f} GB); use a "
                               f"coarser grid or a sub-volume")
    lab = grid.labels
    window = lab != OUTSIDE
    mask = np.isin(lab, codes) & window
    if window.sum() == 0:
        raise OptionError("the grid has no voxel inside the domain")
    s2, pairs, lags = _s2_map(mask, None if window.all() else window, grid.periodic, reach)
    # displacement lengths in FFT order
    comps = [k * s for k, s in zip(lags, sp)]
    R = np.sqrt(comps[0][:, None, None] ** 2 + comps[1][None, :, None] ** 2
                + comps[2][None, None, :] ** 2)
    ok = np.isfinite(s2) & (R <= rmax + 0.5 * bw) & (pairs > 0)
    # bins: [0] exactly r = 0, then (0, bw], (bw, 2bw], ...
    b = np.where(R[ok] == 0, 0, np.ceil(R[ok] / bw - 1e-12).astype(np.int64))
    nb = int(b.max()) + 1
    wts = pairs[ok]
    sums = np.bincount(b, weights=s2[ok] * wts, minlength=nb)
    wsum = np.bincount(b, weights=wts, minlength=nb)
    rsum = np.bincount(b, weights=R[ok] * wts, minlength=nb)
    good = wsum > 0
    r = (rsum[good] / wsum[good])
    S2 = sums[good] / wsum[good]
    W = wsum[good]
    phi = float(S2[0])
    fr = 2 * bw if fit_range is None else float(fit_range)
    sel = r <= fr + 1e-12
    if sel.sum() < 2:
        raise OptionError(f"fit_range {fr} nm holds fewer than two r values")
    # line through the origin point: S2 = phi + slope r (least squares with fixed intercept)
    slope = float(np.sum((S2[sel] - phi) * r[sel]) / np.sum(r[sel] ** 2))
    return CorrelationResult(r, S2, W, phi, slope, -4.0 * slope, bool(grid.periodic), fr)
