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


def s2_map(mask: np.ndarray, window: np.ndarray | None = None, periodic: bool = False):
    """Full 3D S2 map and pair counts at every lattice displacement (FFT).

    Periodic: circular autocorrelation ``ifft(|fft(I)|^2) / N``. Otherwise both the
    indicator and the window (voxels inside the domain; all True by default) are
    zero-padded to twice the size, and ``S2(r) = C_II(r) / C_WW(r)``, the fraction of
    the in-domain pairs at displacement ``r`` that are both in the phase.
    Returns (s2, pairs) with displacement axes in FFT order.
    """
    m = np.asarray(mask, dtype=np.float64)
    if periodic:
        F = np.fft.rfftn(m)
        c = np.fft.irfftn(F * np.conj(F), s=m.shape, axes=(0, 1, 2))
        n = float(m.size)
        return c / n, np.full(m.shape, n)
    w = np.ones_like(m) if window is None else np.asarray(window, dtype=np.float64)
    shape = tuple(2 * s for s in m.shape)
    F = np.fft.rfftn(m * w, s=shape, axes=(0, 1, 2))
    c = np.fft.irfftn(F * np.conj(F), s=shape, axes=(0, 1, 2))
    G = np.fft.rfftn(w, s=shape, axes=(0, 1, 2))
    cw = np.fft.irfftn(G * np.conj(G), s=shape, axes=(0, 1, 2))
    cw = np.rint(cw)
    with np.errstate(invalid="ignore", divide="ignore"):
        s2 = np.where(cw > 0.5, c / np.maximum(cw, 1.0), np.nan)
    return s2, cw


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
    factor = 1 if grid.periodic else 8
    need = int(np.prod(shape) * factor * 8 * 4)
    if need > max_bytes:
        raise MemoryLimitError(f"two-point correlation of a {tuple(shape)} grid needs about "
                               f"{need / 1e9:.1f} GB (limit {max_bytes / 1e9:.1f} GB); use a "
                               f"coarser grid or a sub-volume")
    lab = grid.labels
    window = lab != OUTSIDE
    mask = np.isin(lab, codes) & window
    if window.sum() == 0:
        raise OptionError("the grid has no voxel inside the domain")
    ext = shape * sp
    rmax = float(0.5 * ext.min()) if r_max is None else float(r_max)
    bw = float(sp.max()) if bin_width is None else float(bin_width)
    if not (rmax > 0 and bw > 0):
        raise OptionError(f"r_max and bin_width must be positive, got {r_max!r}, {bin_width!r}")
    s2, pairs = s2_map(mask, None if window.all() else window, grid.periodic)
    n = s2.shape
    # displacement lengths in FFT order
    comps = []
    for a in range(3):
        k = np.fft.fftfreq(n[a], d=1.0 / n[a])
        comps.append(k * sp[a])
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
