"""Small-angle scattering curves I(q) predicted from a phase grid.

The scattering length density (SLD) field of the grid, one value per phase, is Fourier
transformed by a real FFT; the squared modulus, radially averaged on log-spaced q bins and
divided by the sample volume, is the macroscopic differential cross-section

.. math:: I(q) = \\frac{1}{V} \\left\\langle \\left| \\int_V \\Delta\\rho(\\mathbf r)
          e^{-i \\mathbf q \\cdot \\mathbf r} d^3 r \\right|^2 \\right\\rangle_{|\\mathbf q| = q}

in cm⁻¹ when :math:`\\Delta\\rho` is in cm⁻² and lengths in cm (``V`` is the volume of the
unpadded grid, the whole box, outside voxels included). :math:`\\Delta\\rho = \\rho -
\\rho_{\\text{outside}}`: the contrast is taken against the fluid that surrounds the
structure, so zero padding of a non-periodic grid continues that fluid. The discrete
transform is ``v * FFT`` with ``v`` the voxel volume.

A voxel field has a valid q range from ``2π / L`` (``L`` the largest box edge; below it
the curve reflects the box, not the structure) to ``π / h`` (``h`` the voxel edge,
the Nyquist limit).

Features: power-law slopes (least squares in log-log), the Porod constant and the
specific surface it implies (Porod, Kolloid-Z. 124 (1951) 83), the Guinier radius
(Guinier & Fournet, Small-Angle Scattering of X-Rays, 1955), the invariant and Bragg peaks.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field

import numba
import numpy as np

from ..errors import OptionError
from ..grid import GEL, INTERLAYER, OUTSIDE, SOLID
from ..threads import budget

NM_TO_CM = 1e-7
#: 1e-6 Å⁻² in cm⁻².
SLD_UNIT_CM2 = 1e10


@dataclass
class ScatteringResult:
    """A predicted scattering curve.

    Attributes
    ----------
    q : (n,) bin centres: mean |q| of the Fourier modes in the bin (nm⁻¹)
    intensity : (n,) I(q) in cm⁻¹ (mean of |F|²/V over the modes of the bin)
    counts : (n,) number of Fourier modes in each bin
    q_valid : (q_min, q_max) nm⁻¹: 2π / box edge to π / voxel
    sld : phase name -> SLD used (1e-6 Å⁻²)
    contrast_reference : SLD (1e-6 Å⁻²) subtracted (the outside fluid)
    two_phase_contrast : Δρ (1e-6 Å⁻²) between the solid and the pore fluid
    volume_nm3 : sample volume V (nm³)
    """

    q: np.ndarray
    intensity: np.ndarray
    counts: np.ndarray
    q_valid: tuple
    sld: dict
    contrast_reference: float
    two_phase_contrast: float
    volume_nm3: float
    q_edges: np.ndarray = None
    mode_volume: float = float("nan")
    periodic: bool = False
    notes: list = field(default_factory=list)

    def valid(self) -> np.ndarray:
        """Mask of bins inside :attr:`q_valid` with a finite positive intensity."""
        lo, hi = self.q_valid
        return (self.q >= lo) & (self.q <= hi) & np.isfinite(self.intensity) & (self.intensity > 0)

    def table(self) -> dict:
        return {"q_nm-1": self.q.tolist(), "intensity_cm-1": self.intensity.tolist(),
                "modes": self.counts.tolist()}

    def to_dict(self) -> dict:
        d = {"q_valid_nm-1": [float(x) for x in self.q_valid],
             "sld_1e-6_A-2": {k: float(v) for k, v in self.sld.items()},
             "contrast_reference_1e-6_A-2": float(self.contrast_reference),
             "two_phase_contrast_1e-6_A-2": float(self.two_phase_contrast),
             "volume_nm3": float(self.volume_nm3), "n_bins": int(self.q.size),
             "notes": list(self.notes)}
        d.update(self.table())
        return d


def phase_slds(solid: float, fluid: float, *, outside: float | None = None,
               interlayer_contrast: bool = True) -> dict:
    """SLD (1e-6 Å⁻²) per phase code: solid; interlayer and gel pores hold the fluid
    (the interlayer takes the solid's SLD when ``interlayer_contrast`` is False: the
    sheets and their interlayer water seen as one particle); outside = ``outside`` or the
    fluid. Other pore codes (size classes split from the gel) take the fluid's SLD too."""
    return {OUTSIDE: fluid if outside is None else outside, SOLID: solid,
            INTERLAYER: fluid if interlayer_contrast else solid, GEL: fluid}


def _sld_field(labels, sld_by_phase, names):
    """Lookup table code -> SLD; pore size classes split from the gel (codes > 3) take the
    gel's SLD unless given. Every code present in ``labels`` must have a value."""
    lut = np.full(256, np.nan, dtype=np.float64)
    for code, v in sld_by_phase.items():
        lut[int(code)] = float(v)
    if not np.isnan(lut[GEL]):
        extra = np.isnan(lut) & (np.arange(256) > GEL)
        lut[extra] = lut[GEL]
    present = np.flatnonzero(_count_codes(labels, max(1, min(labels.shape[0], 8))))
    missing = [int(c) for c in present if np.isnan(lut[c])]
    if missing:
        raise OptionError(f"no SLD given for phase(s) "
                          f"{', '.join(repr(names.get(c, c)) for c in missing)}", field="sld")
    return lut


@numba.njit(cache=True, parallel=True)
def _count_codes(labels, nchunks):
    """Voxel count of each label value 0-255."""
    nx, ny, nz = labels.shape
    acc = np.zeros((nchunks, 256), np.int64)
    step = (nx + nchunks - 1) // nchunks
    for c in numba.prange(nchunks):
        for i in range(c * step, min(nx, (c + 1) * step)):
            for j in range(ny):
                for k in range(nz):
                    acc[c, labels[i, j, k]] += 1
    return acc.sum(axis=0)


@numba.njit(cache=True, parallel=True)
def _fill_field(labels, lut, out):
    """``out[:nx, :ny, :nz] = lut[labels]`` (the rest of ``out`` untouched)."""
    nx, ny, nz = labels.shape
    for i in numba.prange(nx):
        for j in range(ny):
            for k in range(nz):
                out[i, j, k] = lut[labels[i, j, k]]


def _mode_axes(shape_full, spacing):
    """q components (nm⁻¹, float64) of the rfftn modes and the weight of each kz plane
    (2 for the planes whose conjugate is not stored, 1 for kz = 0 and the Nyquist plane)."""
    nx, ny, nz = shape_full
    qx = 2 * np.pi * np.fft.fftfreq(nx, d=spacing[0])
    qy = 2 * np.pi * np.fft.fftfreq(ny, d=spacing[1])
    qz = 2 * np.pi * np.fft.rfftfreq(nz, d=spacing[2])
    w = np.full(qz.size, 2.0)
    w[0] = 1.0
    if nz % 2 == 0:
        w[-1] = 1.0
    return qx, qy, qz, w


@numba.njit(cache=True, parallel=True)
def _radial_kernel(F, qx, qy, qz, w, e2, nchunks):
    """Per-bin weighted mode counts, Σ w|F|² and Σ w|q| over the modes of a real FFT.

    A mode belongs to bin b when ``e[b] <= |q| < e[b+1]`` (compared as squares). Along
    each (i, j) row |q| grows with kz, so the bin index only moves forward: no search or
    logarithm per mode. Rows are split into ``nchunks`` blocks of i with private sums."""
    nx, ny, nzr = F.shape
    nb = e2.size - 1
    acc = np.zeros((nchunks, 3, nb))
    step = (nx + nchunks - 1) // nchunks
    for c in numba.prange(nchunks):
        for i in range(c * step, min(nx, (c + 1) * step)):
            for j in range(ny):
                b2 = qx[i] * qx[i] + qy[j] * qy[j]
                b = np.searchsorted(e2, b2 + qz[0] * qz[0], side="right") - 1
                for k in range(nzr):
                    q2 = b2 + qz[k] * qz[k]
                    while b < nb and q2 >= e2[b + 1]:
                        b += 1
                    if b >= nb:
                        break
                    if b >= 0:
                        v = F[i, j, k]
                        ww = w[k]
                        acc[c, 0, b] += ww
                        acc[c, 1, b] += ww * (v.real * v.real + v.imag * v.imag)
                        acc[c, 2, b] += ww * math.sqrt(q2)
    out = np.zeros((3, nb))
    for c in range(nchunks):
        out += acc[c]
    return out[0], out[1], out[2]


def _radial_sums(F, spacing, nz_full, edges):
    """Numba path: see :func:`_radial_kernel`."""
    qx, qy, qz, w = _mode_axes((F.shape[0], F.shape[1], nz_full), spacing)
    e2 = np.asarray(edges, dtype=np.float64) ** 2
    nchunks = max(1, min(F.shape[0], 4 * numba.get_num_threads()))
    return _radial_kernel(F, qx, qy, qz, w, e2, nchunks)


def _radial_sums_numpy(F, spacing, nz_full, edges):
    """Pure-numpy reference of :func:`_radial_sums` (whole arrays, searchsorted and
    bincount), for tests."""
    qx, qy, qz, w = _mode_axes((F.shape[0], F.shape[1], nz_full), spacing)
    e2 = np.asarray(edges, dtype=np.float64) ** 2
    nb = e2.size - 1
    q2 = qx[:, None, None] ** 2 + qy[None, :, None] ** 2 + qz[None, None, :] ** 2
    idx = np.searchsorted(e2, q2, side="right") - 1
    idx[(idx < 0) | (idx >= nb)] = nb
    ww = np.broadcast_to(w, q2.shape).ravel()
    p = (np.abs(F.astype(np.complex128)) ** 2).ravel() * ww
    idx = idx.ravel()
    cnt = np.bincount(idx, weights=ww, minlength=nb + 1)[:nb]
    tot = np.bincount(idx, weights=p, minlength=nb + 1)[:nb]
    qs = np.bincount(idx, weights=np.sqrt(q2).ravel() * ww, minlength=nb + 1)[:nb]
    return cnt, tot, qs


#: Bytes per padded voxel of the transform: the float32 field (4) and the complex64 half
#: spectrum (8 per stored mode, about half the voxels: 4), with the FFT working in place;
#: measured 7.4 bytes per voxel above the grid itself at 512^3 and 1024^3
#: (benchmarks/bench_scattering.py), so 9 leaves about 20 % margin.
FFT_BYTES_PER_VOXEL = 9


def fft_bytes(shape, pad: int = 1) -> int:
    """Estimated peak bytes of :func:`scattering_curve` on a grid of ``shape``."""
    return int(np.prod(np.asarray(shape, dtype=np.int64) * int(pad))) * FFT_BYTES_PER_VOXEL


def scattering_curve(grid, sld_by_phase: dict, *, pad: int = 2, window: str | None = None,
                     bins=None, q_range=None, workers: int | None = None,
                     max_memory: int | None = None) -> ScatteringResult:
    """Predicted small-angle scattering I(q) (cm⁻¹) of a phase grid.

    Parameters
    ----------
    grid : PhaseGrid
    sld_by_phase : dict
        Phase code (or name) -> SLD in 1e-6 Å⁻² (see :func:`phase_slds`). The outside
        phase's SLD is the contrast reference.
    pad : int
        Zero-padding factor per axis for non-periodic grids (finer q sampling, no
        wrap-around). Periodic grids are never padded.
    window : None or 'hann'
        Optional Hann taper (separable, per axis) of the contrast field after removing its
        mean: the faces where the box cuts the structure no longer scatter as interfaces
        (truncation ripples and a spurious Porod term vanish). The intensity is divided by
        the window's mean square so that the scale stays per unit volume; low-q bins then
        describe the windowed sample and the forward spike is gone.
    bins : int or array, optional
        Number of log-spaced bins over the valid range (default 40 per decade), or the
        bin edges (nm⁻¹).
    q_range : (q_min, q_max), optional
        Range of the log-spaced bins (default the valid range).
    workers : int, optional
        Threads of the FFT (default this process's budget, :func:`sheetview.threads.budget`).
    max_memory : int, optional
        Bytes allowed for the transform (default half the available memory); above it a
        :class:`~sheetview.errors.MemoryLimitError` names the padding or voxel size that
        would fit (estimate: :data:`FFT_BYTES_PER_VOXEL` per padded voxel).

    Returns
    -------
    ScatteringResult

    Notes
    -----
    :math:`I(q) = |v\\,\\mathrm{FFT}(\\Delta\\rho)|^2 / V` with :math:`\\Delta\\rho` in cm⁻²,
    the voxel volume ``v`` and ``V`` in cm³, averaged over the modes in each q shell
    (a numba kernel walking each row of modes; pure-numpy reference
    ``_radial_sums_numpy``). The field is float32 and the transform a single-precision
    real FFT (scipy.fft.rfftn). Bin ``b`` holds the modes with ``e_b <= |q| < e_{b+1}``;
    its q is the mean |q| of its modes.
    """
    import scipy.fft

    labels = grid.labels
    names = grid.names
    sp = np.asarray(grid.spacing, dtype=float)
    codes = {}
    from ..grid import _phase_code
    for k, v in sld_by_phase.items():
        codes[_phase_code(k, names)] = float(v)
    lut = _sld_field(labels, codes, names)
    ref = codes.get(OUTSIDE, codes.get(GEL, float("nan")))
    if np.isnan(ref):
        raise OptionError("no SLD given for the outside phase or the gel-pore fluid (the "
                          "contrast reference)", field="sld")
    lut_c = ((lut - ref) * SLD_UNIT_CM2).astype(np.float32)  # contrast in cm^-2
    periodic = bool(grid.periodic)
    pad = 1 if periodic else int(pad)
    if pad < 1:
        raise OptionError(f"pad must be a whole number >= 1, got {pad!r}", field="pad")
    shape = np.asarray(labels.shape)
    shape_pad = tuple(int(n * pad) for n in shape)
    from ..grid import available_memory
    limit = available_memory() // 2 if max_memory is None else int(max_memory)
    need = fft_bytes(shape, pad)
    if need > limit:
        from ..errors import MemoryLimitError
        hint = (f"; --pad 1 would need {fft_bytes(shape, 1) / 2**30:.2f} GiB"
                if pad > 1 else "")
        coarser = float(np.max(sp)) * (need / max(limit, 1)) ** (1 / 3) * 1.01
        raise MemoryLimitError(
            f"the scattering transform of a {shape_pad[0]} x {shape_pad[1]} x {shape_pad[2]} "
            f"padded grid needs about {need / 2**30:.2f} GiB, over the limit of "
            f"{limit / 2**30:.2f} GiB{hint}; a voxel size of {coarser:.3g} nm would fit",
            field="voxel_size")
    f = np.empty(shape_pad, dtype=np.float32) if pad == 1 else np.zeros(shape_pad, np.float32)
    _fill_field(labels, lut_c, f)
    notes = []
    wnorm = 1.0
    if window is not None:
        if str(window).lower() != "hann":
            raise OptionError(f"window must be None or 'hann', got {window!r}", field="window")
        sub = f[:shape[0], :shape[1], :shape[2]]
        sub -= np.float32(sub.mean(dtype=np.float64))
        for a, n in enumerate(shape):
            wa = np.hanning(n + 2)[1:-1].astype(np.float32)
            sh = [1, 1, 1]
            sh[a] = n
            sub *= wa.reshape(sh)
            wnorm *= float(np.mean(wa.astype(np.float64) ** 2))
        notes.append("mean contrast removed and Hann window applied; intensity divided by "
                     "the window's mean square")
    vox_cm3 = float(np.prod(sp)) * NM_TO_CM ** 3
    vol_nm3 = float(np.prod(shape * sp))
    vol_cm3 = vol_nm3 * NM_TO_CM ** 3
    F = scipy.fft.rfftn(f, workers=workers or budget(), overwrite_x=True)
    del f
    q_lo = 2 * np.pi / float(np.max(shape * sp))
    q_hi = np.pi / float(np.max(sp))
    if bins is not None and np.ndim(bins) == 1:
        edges = np.asarray(bins, dtype=float)
        if edges.size < 2 or np.any(np.diff(edges) <= 0) or edges[0] < 0:
            raise OptionError("bin edges must be increasing and non-negative", field="bins")
    else:
        lo, hi = (q_lo * 0.999, q_hi) if q_range is None else (float(q_range[0]), float(q_range[1]))
        if not (0 < lo < hi):
            raise OptionError(f"q range must satisfy 0 < q_min < q_max, got {q_range!r}",
                              field="q_range")
        nb = int(round(40 * math.log10(hi / lo))) if bins is None else int(bins)
        edges = np.geomspace(lo, hi, max(nb, 1) + 1)
    cnt, tot, qsum = _radial_sums(F, sp, shape_pad[2], edges)
    del F
    with np.errstate(invalid="ignore", divide="ignore"):
        inten = tot / cnt * (vox_cm3 ** 2 / vol_cm3 / wnorm)
        qc = qsum / cnt
    keep = cnt > 0
    sld_named = {names.get(c, str(c)): float(v) for c, v in codes.items()}
    solid = codes.get(SOLID, float("nan"))
    fluid = codes.get(GEL, ref)
    qe = np.stack([edges[:-1], edges[1:]], axis=1)[keep]
    return ScatteringResult(q=qc[keep], intensity=inten[keep], counts=cnt[keep].astype(np.int64),
                            q_valid=(q_lo, q_hi), sld=sld_named, contrast_reference=ref,
                            two_phase_contrast=float(solid - fluid), volume_nm3=vol_nm3,
                            q_edges=qe, mode_volume=float((2 * np.pi) ** 3 / np.prod(
                                np.asarray(shape_pad) * sp)), periodic=periodic, notes=notes)


# ===================================================================== features
@dataclass
class PowerLaw:
    """I(q) = A q^slope fitted by least squares in log-log over ``q_range`` (nm⁻¹)."""

    slope: float
    slope_stderr: float
    prefactor: float
    q_range: tuple
    n_points: int

    def to_dict(self) -> dict:
        return {"slope": _f(self.slope), "slope_stderr": _f(self.slope_stderr),
                "prefactor": _f(self.prefactor), "q_range_nm-1": [_f(x) for x in self.q_range],
                "n_points": int(self.n_points)}


def _f(x):
    x = float(x)
    return x if math.isfinite(x) else None


def _in_range(res, q_range):
    """Bins with a finite positive intensity: in the valid range when ``q_range`` is None,
    else in ``q_range`` and below the Nyquist limit (an explicit range may reach below
    2π/L, which is meaningful for an isolated object surrounded by fluid in a padded box)."""
    if q_range is None:
        return res.valid()
    m = np.isfinite(res.intensity) & (res.intensity > 0) & (res.q <= res.q_valid[1])
    return m & (res.q >= float(q_range[0])) & (res.q <= float(q_range[1]))


def power_law(res: ScatteringResult, q_range=None) -> PowerLaw:
    """Slope of log I against log q (ordinary least squares) with its standard error.

    The standard error is that of the regression slope, ``s / sqrt(Σ (x - x̄)²)`` with
    ``s²`` the residual variance on ``n - 2`` degrees of freedom (common practice); it
    measures scatter about a straight line, not systematic curvature.
    """
    m = _in_range(res, q_range)
    n = int(m.sum())
    if n < 3:
        raise OptionError(f"power law: fewer than 3 valid points in q range {q_range}",
                          field="q_range")
    x = np.log(res.q[m])
    y = np.log(res.intensity[m])
    A = np.stack([x, np.ones_like(x)], axis=1)
    coef, *_ = np.linalg.lstsq(A, y, rcond=None)
    r = y - A @ coef
    s2 = float(r @ r) / (n - 2)
    se = math.sqrt(s2 / float(((x - x.mean()) ** 2).sum()))
    qr = (float(res.q[m][0]), float(res.q[m][-1]))
    return PowerLaw(float(coef[0]), se, float(math.exp(coef[1])), qr, n)


@dataclass
class Porod:
    """Porod constant K = lim I q⁴ and the specific surface S/V = K / (2π Δρ²)."""

    constant: float          # cm^-1 nm^-4
    constant_stderr: float
    s_over_v: float          # nm^-1 (interface area per sample volume)
    contrast: float          # 1e-6 Å^-2
    q_range: tuple

    def to_dict(self) -> dict:
        return {"porod_constant_cm-1_nm-4": _f(self.constant),
                "porod_constant_stderr": _f(self.constant_stderr),
                "s_over_v_nm-1": _f(self.s_over_v), "contrast_1e-6_A-2": _f(self.contrast),
                "q_range_nm-1": [_f(x) for x in self.q_range]}


def porod(res: ScatteringResult, q_range=None, contrast: float | None = None) -> Porod:
    r"""Porod constant as the mean of I q⁴ over ``q_range`` (default: the top half decade of
    the valid range) and the implied specific surface.

    .. math:: I(q) \to 2\pi (\Delta\rho)^2 \frac{S}{V} q^{-4}

    (Porod, Kolloid-Z. 124 (1951) 83). K is reported in cm⁻¹ nm⁻⁴ (I in cm⁻¹, q in
    nm⁻¹); S/V is computed in cm (K × 1e28 cm⁻⁵, Δρ in cm⁻²) and returned in nm⁻¹. ``contrast`` (1e-6 Å⁻²) defaults to the two-phase contrast.
    """
    if q_range is None:
        hi = res.q_valid[1]
        q_range = (hi / 10 ** 0.5, hi)
    m = _in_range(res, q_range)
    if m.sum() < 2:
        raise OptionError(f"Porod: fewer than 2 valid points in q range {q_range}",
                          field="q_range")
    k = res.intensity[m] * res.q[m] ** 4
    K = float(k.mean())
    se = float(k.std(ddof=1) / math.sqrt(k.size))
    dr = res.two_phase_contrast if contrast is None else float(contrast)
    dr_cm = dr * SLD_UNIT_CM2
    # K in cm^-1 nm^-4 -> cm^-5 (q_cm = q_nm * 1e7)
    K_cm = K * 1e28
    sv_cm = K_cm / (2 * math.pi * dr_cm ** 2) if dr_cm else float("nan")
    return Porod(K, se, sv_cm * NM_TO_CM, dr, (float(res.q[m][0]), float(res.q[m][-1])))


@dataclass
class Guinier:
    """ln I = ln I0 - q² Rg² / 3 fitted where q Rg <= ``qrg_max``."""

    rg: float
    rg_stderr: float
    i0: float
    q_range: tuple
    n_points: int

    def to_dict(self) -> dict:
        return {"rg_nm": _f(self.rg), "rg_stderr_nm": _f(self.rg_stderr), "i0_cm-1": _f(self.i0),
                "q_range_nm-1": [_f(x) for x in self.q_range], "n_points": int(self.n_points)}


def guinier(res: ScatteringResult, qrg_max: float = 1.0, q_range=None) -> Guinier:
    """Radius of gyration from the Guinier law (Guinier & Fournet 1955).

    Fits ``ln I`` against ``q²`` over the lowest valid points, iterating until every point
    satisfies ``q Rg <= qrg_max`` (1.0 by default; common practice uses 1.0 to 1.3).
    ``q_range`` restricts the candidate points (default: the valid range).
    """
    m0 = _in_range(res, q_range)
    q = res.q[m0]
    y = np.log(res.intensity[m0])
    if q.size < 3:
        raise OptionError("Guinier: fewer than 3 valid points", field="q_range")
    n = max(3, q.size // 4)
    for _ in range(50):
        A = np.stack([q[:n] ** 2, np.ones(n)], axis=1)
        coef, *_ = np.linalg.lstsq(A, y[:n], rcond=None)
        if coef[0] >= 0:
            return Guinier(float("nan"), float("nan"), float("nan"),
                           (float(q[0]), float(q[n - 1])), n)
        rg = math.sqrt(-3 * coef[0])
        n_new = max(3, int(np.searchsorted(q, qrg_max / rg, side="right")))
        if n_new == n:
            break
        n = n_new
    A = np.stack([q[:n] ** 2, np.ones(n)], axis=1)
    coef, *_ = np.linalg.lstsq(A, y[:n], rcond=None)
    rg = math.sqrt(-3 * coef[0]) if coef[0] < 0 else float("nan")
    se = float("nan")
    if n > 2 and coef[0] < 0:
        r = y[:n] - A @ coef
        s2 = float(r @ r) / (n - 2)
        se_slope = math.sqrt(s2 / float(((q[:n] ** 2 - (q[:n] ** 2).mean()) ** 2).sum()))
        se = 1.5 * se_slope / rg  # d rg = 3/(2 rg) d(-slope)
    return Guinier(rg, se, float(math.exp(coef[1])), (float(q[0]), float(q[n - 1])), n)


@dataclass
class Invariant:
    """Q = ∫ q² I(q) dq (cm⁻⁴ after unit conversion) and its two-phase expectation."""

    measured: float          # cm^-4, over the valid range
    low_q_extrapolation: float
    porod_tail: float
    total: float
    expected_two_phase: float  # 2π² Δρ² φ(1-φ), cm^-4 (nan if phi not given)
    phi: float

    def to_dict(self) -> dict:
        return {"invariant_cm-4": _f(self.total), "measured_part_cm-4": _f(self.measured),
                "low_q_part_cm-4": _f(self.low_q_extrapolation),
                "porod_tail_cm-4": _f(self.porod_tail),
                "two_phase_expected_cm-4": _f(self.expected_two_phase), "phi": _f(self.phi)}


def invariant(res: ScatteringResult, phi: float | None = None, contrast: float | None = None,
              porod_range=None) -> Invariant:
    """The scattering invariant ``Q = ∫₀^∞ q² I(q) dq``.

    Over the valid range the Fourier modes are summed, ``Q = (1/4π) Σ I_mode Δ³q`` with
    ``Δ³q = (2π)³ / V_padded`` per mode (the discrete form of ``∫ q² I dq = (1/4π) ∫ I
    d³q`` for isotropic I); below the range, for a non-periodic grid, ``I(q_min) q_min³ /
    3`` (flat Guinier plateau; a periodic grid has no mode there but q = 0); above it the
    Porod tail ``K / q_max``. For a two-phase structure
    ``Q = 2π² Δρ² φ (1 - φ)`` (Porod 1951), given as ``expected_two_phase`` when ``phi``
    (volume fraction of one phase) is given. Units: q in nm⁻¹ and I in cm⁻¹ give
    cm⁻¹ nm⁻³, converted to cm⁻⁴ (× 1e21).
    """
    m = res.valid()
    if m.sum() < 2:
        raise OptionError("invariant: fewer than 2 valid points", field="q_range")
    lo, hi = res.q_edges[m, 0], res.q_edges[m, 1]
    meas = float(np.sum(res.intensity[m] * res.counts[m]) * res.mode_volume / (4 * np.pi))
    low = 0.0 if res.periodic else float(res.intensity[m][0] * lo[0] ** 3 / 3.0)
    K = porod(res, porod_range, contrast).constant
    tail = float(K / hi[-1])
    c = 1e21
    dr = (res.two_phase_contrast if contrast is None else float(contrast)) * SLD_UNIT_CM2
    exp_ = float("nan") if phi is None else 2 * math.pi ** 2 * dr ** 2 * phi * (1 - phi)
    return Invariant(meas * c, low * c, tail * c, (meas + low + tail) * c, exp_,
                     float("nan") if phi is None else float(phi))


@dataclass
class BraggPeaks:
    """Peaks of I(q) above the power-law trend: positions, d = 2π/q, widths (FWHM)."""

    q: np.ndarray
    d: np.ndarray
    fwhm: np.ndarray
    prominence: np.ndarray

    def table(self) -> dict:
        return {"q_nm-1": self.q.tolist(), "d_nm": self.d.tolist(),
                "fwhm_nm-1": self.fwhm.tolist(), "prominence_ln": self.prominence.tolist()}

    def to_dict(self) -> dict:
        return self.table()


def bragg_peaks(res: ScatteringResult, prominence: float = 1.0, q_range=None,
                smooth: float = 1.0, max_peaks: int = 10) -> BraggPeaks:
    """Peaks of ``ln I`` above the straight-line (power-law) trend of ``q_range``.

    The residual of ``ln I`` from a least-squares line in log-log is smoothed by a
    Gaussian of ``smooth`` bins (fringes of finite particles are damped; 0 turns it off);
    its maxima with a topographic prominence of at least ``prominence`` (natural log
    units; 1.0 is a factor e above the surrounding trend) are kept, the ``max_peaks``
    most prominent first, returned in increasing q. Position: vertex of the parabola
    through the highest bin and its neighbours in ``ln I`` against q; width: the full
    width at half prominence of the residual (scipy.signal.peak_widths, interpolated in
    q), limited by the bin size. d = 2π / q (Bragg).
    """
    from scipy.ndimage import gaussian_filter1d
    from scipy.signal import find_peaks, peak_widths
    m = _in_range(res, q_range)
    q = res.q[m]
    empty = BraggPeaks(*(np.zeros(0) for _ in range(4)))
    if q.size < 5:
        return empty
    x = np.log(q)
    y = np.log(res.intensity[m])
    coef = np.polyfit(x, y, 1)
    r = y - np.polyval(coef, x)
    if smooth and smooth > 0:
        r = gaussian_filter1d(r, float(smooth), mode="nearest")
    idx, props = find_peaks(r, prominence=prominence)
    if idx.size == 0:
        return empty
    order = np.sort(np.argsort(props["prominences"])[::-1][:int(max_peaks)])
    idx = idx[order]
    prom = props["prominences"][order]
    w = peak_widths(r, idx, rel_height=0.5)
    pos = []
    for i in idx:
        if 0 < i < q.size - 1:
            a, b, c = r[i - 1], r[i], r[i + 1]
            q0, q1, q2 = q[i - 1], q[i], q[i + 1]
            den = (q0 - q1) * (q0 - q2) * (q1 - q2)
            A = (q2 * (b - a) + q1 * (a - c) + q0 * (c - b)) / den
            B = (q2 ** 2 * (a - b) + q1 ** 2 * (c - a) + q0 ** 2 * (b - c)) / den
            v = -B / (2 * A) if A < 0 else q1
            pos.append(v if q0 <= v <= q2 else q1)
        else:
            pos.append(q[i])
    pos = np.asarray(pos, dtype=float)
    ii = np.arange(q.size)
    left = np.interp(w[2], ii, q)
    right = np.interp(w[3], ii, q)
    return BraggPeaks(pos, 2 * np.pi / pos, right - left, np.asarray(prom, float))


# ================================================================== comparison
@dataclass
class CurveComparison:
    """Model curve scaled and shifted onto an experimental curve:
    ``I_exp ≈ scale * I_model + background`` on the overlapping q range."""

    scale: float
    background: float
    chi2_reduced: float
    weighting: str
    q: np.ndarray
    experiment: np.ndarray
    model_fitted: np.ndarray
    q_overlap: tuple

    def table(self) -> dict:
        return {"q_nm-1": self.q.tolist(), "experiment_cm-1": self.experiment.tolist(),
                "model_fitted_cm-1": self.model_fitted.tolist()}

    def to_dict(self) -> dict:
        return {"scale": _f(self.scale), "background_cm-1": _f(self.background),
                "chi2_reduced": _f(self.chi2_reduced), "weighting": self.weighting,
                "q_overlap_nm-1": [_f(x) for x in self.q_overlap], "n_points": int(self.q.size)}


def compare_curve(res: ScatteringResult, q_exp, i_exp, sigma=None, *, background: bool = True,
                  source: str | None = None) -> CurveComparison:
    """Fit ``scale`` (and a flat ``background``) so that ``scale * I_model + background``
    matches an experimental curve (q in nm⁻¹, I in cm⁻¹ or arbitrary units).

    The model is interpolated log-log at the experimental q values inside the overlap of
    both q ranges (model: its valid range); linear least squares weighted by ``1/sigma``
    or, without uncertainties, by ``1/I_exp`` (relative residuals, so that every decade
    counts). ``chi2_reduced = Σ w² r² / (n - p)``.
    """
    q_exp = np.asarray(q_exp, float)
    i_exp = np.asarray(i_exp, float)
    mv = res.valid()
    qm, im = res.q[mv], res.intensity[mv]
    if qm.size < 2:
        raise OptionError("the model curve has fewer than 2 valid points", path=source)
    lo, hi = max(qm[0], q_exp.min()), min(qm[-1], q_exp.max())
    sel = (q_exp >= lo) & (q_exp <= hi)
    p = 2 if background else 1
    if sel.sum() < p + 1:
        raise OptionError(f"the experimental q range [{q_exp.min():.4g}, {q_exp.max():.4g}] "
                          f"nm^-1 overlaps the model's valid range [{qm[0]:.4g}, {qm[-1]:.4g}] "
                          f"nm^-1 in fewer than {p + 1} points", path=source)
    q = q_exp[sel]
    ie = i_exp[sel]
    mod = np.exp(np.interp(np.log(q), np.log(qm), np.log(im)))
    if sigma is not None:
        sg = np.asarray(sigma, float)[sel]
        if np.any(~(sg > 0)):
            raise OptionError("uncertainties must be positive", path=source)
        w = 1.0 / sg
        weighting = "1/sigma"
    else:
        w = 1.0 / ie
        weighting = "1/I (relative)"
    A = np.stack([mod, np.ones_like(mod)], axis=1)[:, :p] * w[:, None]
    coef, *_ = np.linalg.lstsq(A, ie * w, rcond=None)
    scale = float(coef[0])
    bg = float(coef[1]) if background else 0.0
    fit = scale * mod + bg
    r = (ie - fit) * w
    dof = max(q.size - p, 1)
    return CurveComparison(scale, bg, float(r @ r) / dof, weighting, q, ie, fit,
                           (float(lo), float(hi)))


def curve_features(res: ScatteringResult, phi: float | None = None, ranges=()) -> dict:
    """The features of a curve as JSON-ready dicts: power-law slopes over the lowest and
    highest half decade of the valid range (and over each ``ranges`` (qmin, qmax)), Porod,
    Guinier, invariant (``phi``: solid volume fraction) and Bragg peaks. A feature that
    cannot be fitted holds ``{"error": ...}`` instead."""
    lo, hi = res.q_valid
    out = {}
    todo = [("slope_low_q", lambda: power_law(res, (lo, lo * 10 ** 0.5))),
            ("slope_high_q", lambda: power_law(res, (hi / 10 ** 0.5, hi))),
            ("porod", lambda: porod(res)), ("guinier", lambda: guinier(res)),
            ("invariant", lambda: invariant(res, phi=phi)),
            ("bragg_peaks", lambda: bragg_peaks(res))]
    for a, b in ranges:
        todo.append((f"slope_{a:g}-{b:g}", lambda a=a, b=b: power_law(res, (a, b))))
    for name, fn in todo:
        try:
            out[name] = fn().to_dict()
        except OptionError as e:
            out[name] = {"error": e.detail}
    return out


@dataclass
class ScatteringMeasure:
    """The ``scattering`` measure of ``sheetview measure``: a curve with fixed contrast
    (neutrons; the C-S-H preset solid in H2O, interlayer water as pore fluid) and its
    features."""

    curve: ScatteringResult
    features: dict
    probe: str
    solid: str
    fluid: str

    def table(self) -> dict:
        return self.curve.table()

    def to_dict(self) -> dict:
        return {"probe": self.probe, "solid": self.solid, "fluid": self.fluid,
                "features": self.features, **self.curve.to_dict()}
