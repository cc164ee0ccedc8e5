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

Features: power-law slopes (least squares in log-log); the Porod constant and the
specific surface it implies, over a Porod range found in the data, with the aliasing of
the voxel sampling divided out, or a plain "no Porod range" and the reason (Porod,
Kolloid-Z. 124 (1951) 83); the Guinier radius (Guinier & Fournet, Small-Angle Scattering
of X-Rays, 1955); the invariant 2π²Δρ²φ(1−φ) with its Porod tail from the same range
(Porod 1951); and the peaks that stand a stated significance above a running-median
background, with d = 2π/q (Bragg).
"""
from __future__ import annotations

import functools
import math
from dataclasses import dataclass, field

import numba
import numpy as np

from ..errors import OptionError
from ..grid import GEL, INTERLAYER, OUTSIDE, SOLID
from ..material import Hydrate, interlayer_share
from ..sld import preset_sld
from ..threads import budget, run_chunks
from ._result import Result
from ..errors import MemoryLimitError
from ..grid import phase_code, available_memory

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
    q_edges : (n, 2) bin edges (nm⁻¹)
    mode_volume : volume of one Fourier mode in q space, (2π)³ / V_padded (nm⁻³)
    periodic : whether the grid was periodic (no padding, no mode below 2π/L but q = 0)
    q_intensity : (n,) intensity-weighted mean |q| of the bin's modes, Σ|F|²|q| / Σ|F|²
        (nm⁻¹): the position of a peak narrower than the bin (Bragg peaks of a periodic
        stack), equal to ``q`` for a flat bin
    spacing : voxel edges (nm) of the grid (the alias correction of :func:`porod`)
    intensity_sem : (n,) standard error of the bin's mean intensity over its modes,
        sqrt(var(|F|²/V) / (n/2)) in cm⁻¹ (a conjugate pair counts once): the scatter of the
        shell average from speckle and anisotropy, not an experimental error
    numerical_floor : intensity (cm⁻¹) below which a bin is float32 roundoff, not structure:
        :data:`NUMERICAL_FLOOR` times the mean intensity per mode (v² Σ Δρ² / V, Parseval)
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
    q_intensity: np.ndarray = None
    spacing: tuple = None
    intensity_sem: np.ndarray = None
    numerical_floor: float = 0.0

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
    gel's SLD unless given. Every code present in ``labels`` must have a value. Returns the
    table and the voxel count of each code."""
    lut = np.full(256, np.nan, dtype=np.float64)
    for code, v in sld_by_phase.items():
        lut[int(code)] = float(v)
    if not np.isnan(lut[GEL]):
        extra = np.isnan(lut) & (np.arange(256) > GEL)
        lut[extra] = lut[GEL]
    counts = _count_codes(labels)
    present = np.flatnonzero(counts)
    missing = [int(c) for c in present if np.isnan(lut[c])]
    if missing:
        raise OptionError(f"no SLD given for phase(s) "
                          f"{', '.join(repr(names.get(c, c)) for c in missing)}", field="sld")
    return lut, counts


@numba.njit(cache=True, nogil=True)
def _count_code_rows(lo, hi, labels):
    """Voxel count of each label value 0-255 in the planes ``lo <= i < hi``."""
    nx, ny, nz = labels.shape
    acc = np.zeros(256, np.int64)
    for i in range(lo, hi):
        for j in range(ny):
            for k in range(nz):
                acc[labels[i, j, k]] += 1
    return acc


def _count_codes(labels):
    """Voxel count of each label value 0-255."""
    parts = run_chunks(_count_code_rows, labels.shape[0], labels)
    return np.add.reduce(parts) if parts else np.zeros(256, np.int64)


@numba.njit(cache=True, nogil=True)
def _fill_field(lo, hi, labels, lut, out):
    """``out[lo:hi, :ny, :nz] = lut[labels[lo:hi]]`` (the rest of ``out`` untouched)."""
    nx, ny, nz = labels.shape
    for i in range(lo, hi):
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


@numba.njit(cache=True, nogil=True)
def _radial_kernel(c0, c1, F, qx, qy, qz, w, e2, step, acc):
    """Per-bin weighted mode counts, Σ w|F|², Σ w|q|, Σ w|F|²|q| and Σ w|F|⁴ over the
    modes of a real FFT.

    A mode belongs to bin b when ``e[b] <= |q| < e[b+1]`` (compared as squares). Along
    each (i, j) row |q| grows with kz, so the bin index only moves forward: no search or
    logarithm per mode. Rows are split into blocks of ``step`` values of i with private
    sums ``acc[c]``; this call fills the blocks ``c0 <= c < c1`` (blocks run on threads,
    :func:`sheetview.threads.run_chunks`, and are added in block order)."""
    nx, ny, nzr = F.shape
    nb = e2.size - 1
    for c in range(c0, c1):
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
                        p = ww * (v.real * v.real + v.imag * v.imag)
                        qq = math.sqrt(q2)
                        acc[c, 0, b] += ww
                        acc[c, 1, b] += p
                        acc[c, 2, b] += ww * qq
                        acc[c, 3, b] += p * qq
                        acc[c, 4, b] += p * (v.real * v.real + v.imag * v.imag)


def _radial_sums(F, spacing, nz_full, edges):
    """Numba path: see :func:`_radial_kernel`."""
    qx, qy, qz, w = _mode_axes((F.shape[0], F.shape[1], nz_full), spacing)
    e2 = np.asarray(edges, dtype=np.float64) ** 2
    nchunks = max(1, min(F.shape[0], 4 * budget()))
    step = (F.shape[0] + nchunks - 1) // nchunks
    nb = e2.size - 1
    acc = np.zeros((nchunks, 5, nb))
    run_chunks(_radial_kernel, nchunks, F, qx, qy, qz, w, e2, step, acc)
    out = np.zeros((5, nb))
    for c in range(nchunks):  # in block order, as the parallel kernel did
        out += acc[c]
    return out[0], out[1], out[2], out[3], out[4]


#: Intensities below this fraction of the mean intensity per Fourier mode are float32
#: roundoff of the transform (ε² log2 N ≈ 1e-13 of it for ε = 2^-24, N = 1024³), not
#: structure; the peak search treats them as this level.
NUMERICAL_FLOOR = 1e-10

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
    (a numba kernel walking each row of modes; a pure-numpy reference is in the tests). The field is float32 and the transform a single-precision
    real FFT (scipy.fft.rfftn). Bin ``b`` holds the modes with ``e_b <= |q| < e_{b+1}``;
    its q is the mean |q| of its modes.
    """
    import scipy.fft

    labels = grid.labels
    names = grid.names
    sp = np.asarray(grid.spacing, dtype=float)
    codes = {}
    for k, v in sld_by_phase.items():
        codes[phase_code(k, names)] = float(v)
    lut, code_counts = _sld_field(labels, codes, names)
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
    limit = available_memory() // 2 if max_memory is None else int(max_memory)
    need = fft_bytes(shape, pad)
    if need > limit:
        hint = (f"; --pad 1 would need {fft_bytes(shape, 1) / 2**30:.2f} GiB"
                if pad > 1 else "")
        coarser = float(np.max(sp)) * (need / max(limit, 1)) ** (1 / 3) * 1.01
        raise MemoryLimitError(
            f"the scattering transform of a {shape_pad[0]} x {shape_pad[1]} x {shape_pad[2]} "
            f"padded grid needs about {need / 2**30:.2f} GiB, over the limit of "
            f"{limit / 2**30:.2f} GiB{hint}; a voxel size of {coarser:.3g} nm would fit",
            field="voxel_size")
    f = np.empty(shape_pad, dtype=np.float32) if pad == 1 else np.zeros(shape_pad, np.float32)
    run_chunks(_fill_field, labels.shape[0], labels, lut_c, f)
    notes = []
    if not periodic and window is None:
        faces = [labels[0], labels[-1], labels[:, 0], labels[:, -1], labels[:, :, 0],
                 labels[:, :, -1]]
        cut = sum(int(np.count_nonzero(lut_c[fc] != 0)) for fc in faces)
        frac = cut / sum(fc.size for fc in faces)
        if frac > 0.01:
            notes.append(f"the structure meets the box faces ({100 * frac:.0f} % of the face "
                         f"voxels differ from the outside fluid): on a non-periodic grid the "
                         f"cut faces scatter as interfaces (counted in Porod's S/V) and the "
                         f"box's own fringes at odd multiples of pi/L can stand out as peaks; "
                         f"window='hann' or a periodic grid avoids both")
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
    cnt, tot, qsum, pqsum, p2sum = _radial_sums(F, sp, shape_pad[2], edges)
    del F
    scale = vox_cm3 ** 2 / vol_cm3 / wnorm
    # float32 roundoff: |δF|² ~ ε² log2(N) Σ f² per mode against a mean of Σ f² (Parseval);
    # NUMERICAL_FLOOR (1e-10) sits about 1000 times above that estimate
    sumsq = float(np.sum(code_counts * np.nan_to_num(lut_c.astype(np.float64)) ** 2))
    floor = NUMERICAL_FLOOR * sumsq * vox_cm3 ** 2 / vol_cm3
    with np.errstate(invalid="ignore", divide="ignore"):
        inten = tot / cnt * scale
        qc = qsum / cnt
        qw = np.where(tot > 0, pqsum / tot, qc)
        # standard error of the bin mean over its modes (a conjugate pair counts once)
        var = np.maximum(p2sum / cnt - (tot / cnt) ** 2, 0.0)
        sem = np.sqrt(var / np.maximum(cnt / 2.0, 1.0)) * scale
    keep = cnt > 0
    sld_named = {names.get(c, str(c)): float(v) for c, v in codes.items()}
    solid = codes.get(SOLID, float("nan"))
    fluid = codes.get(GEL, ref)
    qe = np.stack([edges[:-1], edges[1:]], axis=1)[keep]
    return ScatteringResult(q=qc[keep], intensity=inten[keep], counts=cnt[keep].astype(np.int64),
                            q_valid=(q_lo, q_hi), sld=sld_named, contrast_reference=ref,
                            two_phase_contrast=float(solid - fluid), volume_nm3=vol_nm3,
                            q_edges=qe, mode_volume=float((2 * np.pi) ** 3 / np.prod(
                                np.asarray(shape_pad) * sp)), periodic=periodic, notes=notes,
                            q_intensity=qw[keep], spacing=tuple(float(v) for v in sp),
                            intensity_sem=sem[keep], numerical_floor=floor)


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


def _in_range(res, q_range, positive: bool = True):
    """Bins with a finite positive intensity (non-negative when not ``positive``): in the
    valid range when ``q_range`` is None, else in ``q_range`` and below the Nyquist limit
    (an explicit range may reach below 2π/L, which is meaningful for an isolated object
    surrounded by fluid in a padded box)."""
    ok = np.isfinite(res.intensity) & ((res.intensity > 0) if positive else (res.intensity >= 0))
    if q_range is None:
        lo, hi = res.q_valid
        return ok & (res.q >= lo) & (res.q <= hi)
    m = ok & (res.q <= res.q_valid[1])
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


# ------------------------------------------------------------------------ Porod
#: Width (decades of q) of a Porod window.
POROD_WINDOW_DECADES = 0.5
#: Flatness a Porod window must show: |d ln(q⁴I) / d ln q| (= |power-law slope + 4|) at most
#: this over the window; q⁴I then changes by at most ±6 % across half a decade.
POROD_FLAT_TOL = 0.1
#: The windows stay where the aliased share of the sampled intensity c(q) (see
#: :func:`porod_alias_factor`) is at most this: the data, not the alias model, carry the
#: estimate (c = 0.25 at q ≈ 0.66 π/h for cubic voxels).
POROD_ALIAS_MAX = 0.25
#: Curvature a Porod window may show: a weighted quadratic fit of q⁴I against ln q departs
#: from its mean by at most this (relative) anywhere in the window. Catches bumps (a Bragg
#: peak, a form-factor shoulder) that leave the slope near zero.
POROD_DEV_TOL = 0.1
#: How far (decades) below the highest q allowed a Porod window's top may slide. Porod's law
#: is the last regime of the curve: a flat stretch with structure above it (a Bragg peak,
#: unresolved sheets) belongs to a coarser level (the envelope of stacks seen with their mean
#: contrast), and its constant is not the interface area.
POROD_SLIDE_DECADES = 0.25
#: Fewest valid bins in a Porod window (20 per decade over half a decade).
POROD_MIN_POINTS = 10


def _reciprocal_lattice(spacing, m):
    return _reciprocal_lattice_cached(tuple(float(v) for v in np.broadcast_to(
        np.asarray(spacing, dtype=float), (3,))), int(m))


@functools.lru_cache(maxsize=16)
def _reciprocal_lattice_cached(spacing, m):
    """|G| (nm⁻¹) of the reciprocal lattice vectors G = 2π (i/hx, j/hy, k/hz) with
    0 < max(|i|, |j|, |k|) <= m, and the far-field moments T_k = density × ∫ |G|^-k d³G
    over the rest (k = 4, 6, 8): outside the box of half-widths 2π (m + 1/2) / h_i (the
    cells of the summed vectors), as ∫ dΩ r_box(Ω)^(3-k) / (k - 3) with r_box(Ω) =
    min_i b_i / |ω_i|, by quadrature over 20000 Fibonacci points of the sphere."""
    h = np.asarray(spacing, dtype=float)
    n = np.arange(-m, m + 1, dtype=float)
    gx, gy, gz = ((2 * np.pi * n / h[i]) ** 2 for i in range(3))
    g2 = (gx[:, None, None] + gy[None, :, None] + gz[None, None, :]).ravel()
    g2 = g2[g2 > 0]
    npts = 20000
    k = np.arange(npts) + 0.5
    z = 1 - 2 * k / npts
    ph = np.pi * (1 + 5 ** 0.5) * k
    rz = np.sqrt(1 - z * z)
    om = np.abs(np.stack([rz * np.cos(ph), rz * np.sin(ph), z], axis=1))
    b = 2 * np.pi * (m + 0.5) / h
    inv_r = np.max(om / b, axis=1)                # 1 / r_box
    density = float(np.prod(h)) / (2 * np.pi) ** 3
    far = np.array([4 * np.pi * density * np.mean(inv_r ** (p - 3)) / (p - 3) for p in (4, 6, 8)])
    return np.sqrt(g2), far


def porod_alias_factor(q, spacing, m: int = 8) -> np.ndarray:
    r"""Aliased share of the sampled intensity of a sharp-interface structure,
    :math:`c(q) = \sum_{G \ne 0} q^4 / (|G|^2 - q^2)^2`, so that the shell-averaged
    intensity of the voxel field is :math:`I_s(q) = (K / q^4)\,[1 + c(q)]`.

    Why: the FFT of a phase grid is the transform of its voxel-centre samples, which by
    the Poisson summation formula is :math:`\sum_G F(\mathbf q + \mathbf G)` over the
    reciprocal lattice of the grid, :math:`\mathbf G = 2\pi (i/h_x, j/h_y, k/h_z)`. The
    alias terms have phases that vary over a q shell, so the shell average adds their
    intensities; every alias lies beyond :math:`2\pi/h - q`, where a structure with sharp
    interfaces is in its Porod regime, :math:`I(k) = K / k^4`; and the average of
    :math:`|\mathbf q + \mathbf G|^{-4}` over the directions of q is exactly
    :math:`(|G|^2 - q^2)^{-2}` (for :math:`q < |G|`). Hence the factor. For cubic voxels
    :math:`c \approx 16.53\,(qh/2\pi)^4` at small q (the lattice sum
    :math:`\sum |n|^{-4}` = 16.53), 0.07 at :math:`q = \pi/2h`, 0.25 at
    :math:`0.66\,\pi/h` and 1.4 at the Nyquist limit :math:`\pi/h`: the sampled Porod
    plateau rises steeply towards Nyquist (the "staircase excess" of a voxelized surface,
    seen inside the valid range as aliasing; the staircase's own 3/2 excess area belongs
    to :math:`q \gg 1/h`, beyond Nyquist).

    The sum runs over the vectors with :math:`\max(|i|,|j|,|k|) \le m` exactly and over the
    rest as an integral (:math:`q^4/G^4 + 2q^6/G^6 + 3q^8/G^8` over the reciprocal space
    outside their cells): relative error under 5e-4 at the default m = 8.
    """
    q = np.asarray(q, dtype=float)
    g, far = _reciprocal_lattice(spacing, m)
    q2 = q.reshape(-1)[:, None] ** 2
    c = np.sum(q2 ** 2 / (g[None, :] ** 2 - q2) ** 2, axis=1)
    q2 = q2[:, 0]
    c += far[0] * q2 ** 2 + 2 * far[1] * q2 ** 3 + 3 * far[2] * q2 ** 4
    return c.reshape(q.shape)


def _alias_limit(spacing, alias_max, q_max):
    """Largest q <= ``q_max`` with c(q) <= ``alias_max`` (c grows with q; bisection)."""
    if porod_alias_factor(q_max, spacing) <= alias_max:
        return float(q_max)
    a, b = 0.0, float(q_max)
    for _ in range(40):
        mid = 0.5 * (a + b)
        if porod_alias_factor(mid, spacing) <= alias_max:
            a = mid
        else:
            b = mid
    return a


def porod_alias_integral(q_max: float, spacing, m: int = 8) -> float:
    r""":math:`A = \int_0^{q_{max}} c(q)\, q^{-2}\, dq` (nm): the aliased Porod intensity
    already inside a measured invariant up to :math:`q_{max}`, per unit K (see
    :func:`porod_alias_factor`; closed form per G:
    :math:`\int_0^Q q^2 (G^2 - q^2)^{-2} dq = Q / (2(G^2 - Q^2)) - \ln((G + Q)/(G - Q)) / 4G`)."""
    g, far = _reciprocal_lattice(spacing, m)
    Q = float(q_max)
    if not np.all(g > Q):
        raise OptionError(f"q_max {Q:g} nm^-1 is beyond the first alias of the grid",
                          field="q_range")
    per_g = Q / (2 * (g ** 2 - Q ** 2)) - np.log((g + Q) / (g - Q)) / (4 * g)
    return float(per_g.sum() + far[0] * Q ** 3 / 3 + 2 * far[1] * Q ** 5 / 5
                 + 3 * far[2] * Q ** 7 / 7)


@dataclass
class Porod:
    """Porod constant K = lim I q⁴, the specific surface S/V = K / (2π Δρ²) and how they
    were found (see :func:`porod`). Without a Porod range, ``constant`` and ``s_over_v``
    are nan and ``reason`` says why."""

    constant: float          # cm^-1 nm^-4 (nan without a Porod range)
    s_over_v: float          # nm^-1 (interface area per sample volume)
    contrast: float          # 1e-6 Å^-2
    q_range: tuple           # nm^-1, the Porod window (nan, nan) without one
    status: str              # "ok", "no_porod_range", or "not_flat" (a given q_range)
    reason: str | None
    log_slope: float         # d ln(q^4 I) / d ln q over the window (the flattest tried if none)
    flat_tolerance: float
    departure: float         # largest relative departure of the quadratic trend from K
    departure_tolerance: float
    n_points: int
    points_per_decade: float
    alias_correction: float  # largest c(q) divided out inside the window (0 when off)
    q_search_max: float      # nm^-1: highest q a window may reach (alias limit, Nyquist)

    @property
    def found(self) -> bool:
        return self.status == "ok"

    def to_dict(self) -> dict:
        return {"status": self.status, "reason": self.reason,
                "porod_constant_cm-1_nm-4": _f(self.constant),
                "s_over_v_nm-1": _f(self.s_over_v), "contrast_1e-6_A-2": _f(self.contrast),
                "q_range_nm-1": [_f(x) for x in self.q_range],  # [null, null] without
                "log_slope_q4I": _f(self.log_slope), "flat_tolerance": _f(self.flat_tolerance),
                "trend_departure": _f(self.departure),
                "trend_departure_tolerance": _f(self.departure_tolerance),
                "n_points": int(self.n_points), "points_per_decade": _f(self.points_per_decade),
                "alias_correction_max": _f(self.alias_correction),
                "q_search_max_nm-1": _f(self.q_search_max),
                "estimator": "Hann-weighted mean of q^4 I / (1 + c(q)) over the highest flat "
                             "window"}

    def describe(self) -> str:
        """One line for a terminal."""
        if not np.isfinite(self.constant):
            return f"no Porod range: {self.reason}"
        line = (f"S/V {self.s_over_v:.4g} nm^-1 (K {self.constant:.4g} cm^-1 nm^-4) over q "
                f"{self.q_range[0]:.4g}-{self.q_range[1]:.4g} nm^-1 (log-slope of q^4 I "
                f"{self.log_slope:+.3f}, trend within {100 * self.departure:.1f} %)")
        if self.status != "ok":
            line += f"; {self.reason}"
        return line


def _bin_widths(res, m):
    """Lower and upper edges of the bins ``m`` (from ``q_edges``, else geometric midpoints)."""
    if res.q_edges is not None:
        e = np.asarray(res.q_edges, dtype=float)[m]
        return e[:, 0], e[:, 1]
    q = res.q[m]
    mid = np.sqrt(q[1:] * q[:-1])
    lo = np.concatenate([[q[0] ** 2 / mid[0] if q.size > 1 else q[0]], mid])
    hi = np.concatenate([mid, [q[-1] ** 2 / mid[-1] if q.size > 1 else q[-1]]])
    return lo, hi


def _porod_window(q, y, lo, hi):
    """Hann-weighted (in linear q, over the window's outer bin edges) mean K of ``y``, its
    relative log-slope ``d ln y / d ln q`` (weighted least squares on ln q), and the largest
    relative departure from K of a weighted quadratic fit in ln q across the window."""
    a, b = lo[0], hi[-1]
    w = np.sin(np.pi * (q - a) / (b - a)) ** 2 * (hi - lo)
    sw = w.sum()
    K = float(np.sum(w * y) / sw)
    x = np.log(q)
    xm = float(np.sum(w * x) / sw)
    sxx = float(np.sum(w * (x - xm) ** 2))
    if not (sxx > 0 and K > 0):
        return K, float("nan"), float("nan")
    s = float(np.sum(w * (x - xm) * (y - K)) / sxx) / K
    u = (x - xm) / max(xm - math.log(a), math.log(b) - xm)
    A = np.stack([np.ones_like(u), u, u * u], axis=1) * np.sqrt(w)[:, None]
    coef, *_ = np.linalg.lstsq(A, y * np.sqrt(w), rcond=None)
    uu = np.linspace(u.min(), u.max(), 41)
    dev = float(np.max(np.abs(coef[0] + coef[1] * uu + coef[2] * uu * uu - K)) / K)
    return K, s, dev


def porod(res: ScatteringResult, q_range=None, contrast: float | None = None, *,
          window_decades: float = POROD_WINDOW_DECADES, flat_tol: float = POROD_FLAT_TOL,
          dev_tol: float = POROD_DEV_TOL, slide_decades: float = POROD_SLIDE_DECADES,
          alias_max: float = POROD_ALIAS_MAX, min_points: int = POROD_MIN_POINTS,
          alias_correction: bool = True) -> Porod:
    r"""Porod constant and specific surface, over a Porod range found in the data.

    .. math:: I(q) \to \frac{K}{q^4}, \qquad K = 2\pi (\Delta\rho)^2 \frac{S}{V}

    (Porod, Kolloid-Z. 124 (1951) 83; Guinier & Fournet, Small-Angle Scattering of X-Rays,
    1955). S/V is the interface area per unit sample volume (the whole box, as I is): for
    one ball of radius R in a box, :math:`4\pi R^2 / V_{box}` = 3/R times its volume
    fraction.

    Estimator. Over the valid bins, :math:`y = q^4 I / (1 + c(q))`, where ``c`` is the
    aliased share of a sampled Porod tail (:func:`porod_alias_factor`; without this
    correction the plateau rises towards Nyquist, and the plain mean of q⁴I over the top
    half decade read S/V 23 to 31 % high for balls of 10 to 40 voxels radius). Windows
    ``window_decades`` wide (default 0.5) are slid down from the highest q allowed,
    ``q_top = min(π/h, q where c = alias_max)`` (0.66 π/h for cubic voxels), one bin at a
    time. In each window K is the mean of y weighted by a Hann taper in linear q (times each
    bin's width), and two flatness figures are computed by weighted least squares against
    ln q: the log-slope :math:`d\ln(q^4 I)/d\ln q` (= power-law slope + 4) and the largest
    relative departure from K of a quadratic trend across the window (it catches a bump,
    such as a Bragg peak, that leaves the slope near zero). The Porod range is the first
    (highest) window with ``|log-slope| <= flat_tol`` (0.1), ``departure <= dev_tol``
    (0.1) and at least ``min_points`` valid bins (10, i.e. 20 per decade), whose top lies
    within ``slide_decades`` (0.25) of ``q_top``: Porod's law is the last regime of the
    curve, and a flat stretch with structure above it (the envelope of a stack of sheets
    seen below its basal reflection) describes a coarser level, not the interfaces.

    Why the taper: a particle of sharp size has :math:`q^4 I` oscillating as
    :math:`\cos^2(qR)` about K (a ball: :math:`(\sin x - x\cos x)^2 = x^2\cos^2 x + O(x)`),
    and a plain mean over a window that is not a whole number of periods is off by up to
    :math:`1/((q_2 - q_1)R)`; the Hann taper suppresses that leakage to about
    :math:`((q_2 - q_1)R)^{-3}` (about 1 % for a ball of 10 voxels radius over the default
    window). Within the window the next term of a ball's mean, :math:`1 + 1/(qR)^2`, stays
    under 3 % at :math:`qR \ge 6`. Measured (tests/validation): balls of 10 to 40 voxels
    radius at random sub-voxel offsets, S/V within 2 % of :math:`4\pi R^2/V_{box}`.

    When no window qualifies the result says so: ``status = "no_porod_range"``, a
    ``reason`` in words, and nan constant and S/V (``log_slope`` and ``departure`` then
    hold the flattest window's). A structure unresolved at the voxel, a surface fractal
    (slope above −4), a mass fractal, or sheets whose Bragg orders run up to the
    resolution limit have no Porod range.

    ``q_range`` (nm⁻¹) fixes the window instead: K and the flatness are computed over it
    the same way, and ``status`` is ``"not_flat"`` (the numbers still given) when it fails
    the tolerances. ``contrast`` (1e-6 Å⁻²) defaults to the two-phase contrast.
    ``alias_correction=False`` uses q⁴I as it is (and searches up to π/h). K is in
    cm⁻¹ nm⁻⁴ (I in cm⁻¹, q in nm⁻¹); S/V is computed in cm (K × 1e28 cm⁻⁵, Δρ in cm⁻²)
    and returned in nm⁻¹.
    """
    dr = res.two_phase_contrast if contrast is None else float(contrast)
    dr_cm = dr * SLD_UNIT_CM2
    nan = float("nan")
    if not (window_decades > 0 and flat_tol > 0 and dev_tol > 0 and alias_max > 0
            and int(min_points) >= 3):
        raise OptionError("Porod: window_decades, flat_tol, dev_tol and alias_max must be "
                          "positive and min_points at least 3", field="porod")

    def result(K, s, dev, qr, status, reason, n, ppd, cmax, qsmax):
        sv = K * 1e28 / (2 * math.pi * dr_cm ** 2) * NM_TO_CM if dr_cm else nan
        return Porod(float(K), float(sv), dr, tuple(float(v) for v in qr), status, reason,
                     float(s), float(flat_tol), float(dev), float(dev_tol), int(n), float(ppd),
                     float(cmax), float(qsmax))

    def flat(s, dev):
        return abs(s) <= flat_tol and dev <= dev_tol

    def verdict(s, dev):
        return (f"log-slope of q^4 I {s:+.3f} (tolerance {flat_tol:g}), largest departure of "
                f"its quadratic trend {100 * dev:.1f} % (tolerance {100 * dev_tol:g} %)")

    m = _in_range(res, q_range)
    q_all = res.q[m]
    lo_all, hi_all = _bin_widths(res, m)
    if alias_correction and res.spacing is not None:
        c_all = porod_alias_factor(q_all, res.spacing)
    else:
        c_all = np.zeros_like(q_all)
    y_all = res.intensity[m] * q_all ** 4 / (1 + c_all)
    nyq = float(res.q_valid[1])
    if q_range is not None:
        if q_all.size < 3:
            raise OptionError(f"Porod: fewer than 3 valid points in q range {q_range}",
                              field="q_range")
        K, s, dev = _porod_window(q_all, y_all, lo_all, hi_all)
        dec = math.log10(hi_all[-1] / lo_all[0])
        ok = flat(s, dev)
        reason = None if ok else f"q^4 I is not flat over the given range: {verdict(s, dev)}"
        return result(K, s, dev, (q_all[0], q_all[-1]), "ok" if ok else "not_flat", reason,
                      q_all.size, q_all.size / dec if dec > 0 else nan, c_all.max(), nyq)

    if alias_correction and res.spacing is not None:
        q_top = _alias_limit(res.spacing, alias_max, nyq)
    else:
        q_top = nyq

    def none(s, dev, why):
        return result(nan, s, dev, (nan, nan), "no_porod_range", why, 0, nan, 0.0, q_top)

    if q_all.size == 0:
        return none(nan, nan, "no valid point in the curve")
    best = None
    lower = None
    for j in np.flatnonzero(q_all <= q_top)[::-1]:
        q_low = q_all[j] / 10 ** window_decades
        beyond = q_all[j] < q_top / 10 ** slide_decades * (1 - 1e-12)
        if q_low < q_all[0] * (1 - 1e-12):
            break                                   # the window would leave the valid range
        a = int(np.searchsorted(q_all, q_low, side="left"))
        n = j - a + 1
        if n < int(min_points):
            continue
        sl = slice(a, j + 1)
        K, s, dev = _porod_window(q_all[sl], y_all[sl], lo_all[sl], hi_all[sl])
        if not (K > 0 and np.isfinite(s) and np.isfinite(dev)):
            continue
        if beyond:
            if flat(s, dev):                    # flat, but with structure above it
                lower = (q_all[a], q_all[j], K)
                break
            continue
        score = max(abs(s) / flat_tol, dev / dev_tol)
        if best is None or score < best[0]:
            best = (score, s, dev, sl)
        if flat(s, dev):
            dec = math.log10(hi_all[j] / lo_all[a])
            return result(K, s, dev, (q_all[a], q_all[j]), "ok", None, n, n / dec,
                          c_all[sl].max(), q_top)
    if best is None:
        span = math.log10(min(q_top, q_all[-1]) / q_all[0]) if q_top > q_all[0] else 0.0
        return none(nan, nan, f"no {window_decades:g}-decade window with at least "
                              f"{int(min_points)} valid bins and positive q^4 I below q = "
                              f"{q_top:.4g} nm^-1 (the valid range below the alias limit "
                              f"spans {max(span, 0):.2f} decades)")
    _, s, dev, sl = best
    why = (f"q^4 I is not flat in any {window_decades:g}-decade window reaching within "
           f"{slide_decades:g} decade of q = {q_top:.4g} nm^-1 (the alias limit); the flattest, "
           f"{q_all[sl][0]:.4g}-{q_all[sl][-1]:.4g} nm^-1, has {verdict(s, dev)}")
    if lower is not None:
        why += (f". A lower stretch, {lower[0]:.4g}-{lower[1]:.4g} nm^-1, is flat but has "
                f"structure above it: it describes a coarser level (e.g. the envelope of "
                f"stacks), not the interfaces")
    return none(s, dev, why)


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
    """Q = ∫ q² I(q) dq (cm⁻⁴ after unit conversion) and its two-phase expectation.
    Without a Porod range ``porod_tail`` is nan and ``total`` has no tail (see
    :func:`invariant`)."""

    measured: float          # cm^-4, over the valid range
    low_q_extrapolation: float
    porod_tail: float        # nan without a Porod range
    total: float
    expected_two_phase: float  # 2π² Δρ² φ(1-φ), cm^-4 (nan if phi not given)
    phi: float
    tail: str = ""           # how the part above q_max was treated, in words
    porod_q_range: tuple = (float("nan"), float("nan"))

    def to_dict(self) -> dict:
        return {"invariant_cm-4": _f(self.total), "measured_part_cm-4": _f(self.measured),
                "low_q_part_cm-4": _f(self.low_q_extrapolation),
                "porod_tail_cm-4": _f(self.porod_tail), "tail": self.tail,
                "porod_q_range_nm-1": [_f(x) if np.isfinite(self.porod_tail) else None
                                       for x in self.porod_q_range],
                "two_phase_expected_cm-4": _f(self.expected_two_phase), "phi": _f(self.phi),
                "phi_reference": "the scattering volume: the whole grid box (pore fluid outside "
                                 "the domain), the volume I(q) is per"}


def invariant(res: ScatteringResult, phi: float | None = None, contrast: float | None = None,
              porod_range=None, *, porod_fit: Porod | None = None) -> Invariant:
    r"""The scattering invariant ``Q = ∫₀^∞ q² I(q) dq``.

    Over the valid range the Fourier modes are summed, ``Q = (1/4π) Σ I_mode Δ³q`` with
    ``Δ³q = (2π)³ / V_padded`` per mode (the discrete form of ``∫ q² I dq = (1/4π) ∫ I
    d³q`` for isotropic I); below the range, for a non-periodic grid, ``I(q_min) q_min³ /
    3`` (flat Guinier plateau; a periodic grid has no mode there but q = 0).

    Above ``q_max`` (the top of the valid range, π/h) the Porod tail uses the constant K of
    :func:`porod` over the same Porod range (``porod_fit``, or ``porod(res, porod_range,
    contrast)``): the continuous tail is ``K / q_max``, but the measured sum already holds
    the aliased part of it (the sampled intensity is :math:`(K/q^4)(1 + c(q))`, see
    :func:`porod_alias_factor`), so the tail added is
    :math:`K\,(1/q_{max} - A)`, :math:`A = \int_0^{q_{max}} c(q) q^{-2} dq`
    (:func:`porod_alias_integral`; about 0.41/q_max for cubic voxels, so the tail is
    0.59 K/q_max). By Parseval the measured sum plus this tail equals the whole Brillouin
    zone's sum, i.e. the field's variance, when the structure has sharp interfaces.
    Without a Porod range (``porod`` status not ``"ok"``) no tail is added:
    ``porod_tail`` is nan, ``total`` = measured + low-q part, and ``tail`` says so; the
    total then misses the part above q_max and is not a two-phase invariant to rely on.

    For a two-phase structure ``Q = 2π² Δρ² φ (1 - φ)`` (Porod 1951), given as
    ``expected_two_phase`` when ``phi`` (volume fraction of one phase) is given. Units: q
    in nm⁻¹ and I in cm⁻¹ give cm⁻¹ nm⁻³, converted to cm⁻⁴ (× 1e21).
    """
    m = res.valid()
    if m.sum() < 2:
        raise OptionError("invariant: fewer than 2 valid points", field="q_range")
    lo, hi = res.q_edges[m, 0], res.q_edges[m, 1]
    meas = float(np.sum(res.intensity[m] * res.counts[m]) * res.mode_volume / (4 * np.pi))
    low = 0.0 if res.periodic else float(res.intensity[m][0] * lo[0] ** 3 / 3.0)
    po = porod(res, porod_range, contrast) if porod_fit is None else porod_fit
    q_max = float(hi[-1])
    if po.status == "ok" and np.isfinite(po.constant):
        a = porod_alias_integral(q_max, res.spacing) if res.spacing is not None else 0.0
        tail = float(po.constant * (1.0 / q_max - a))
        how = (f"Porod tail K (1/q_max - A) above q_max = {q_max:.4g} nm^-1, K from "
               f"{po.q_range[0]:.4g}-{po.q_range[1]:.4g} nm^-1, alias part A = {a:.4g} nm")
    else:
        tail = float("nan")
        how = (f"no Porod range (see porod): no tail added above q_max = {q_max:.4g} nm^-1; "
               f"the total is the measured range and the low-q part only")
    c = 1e21
    dr = (res.two_phase_contrast if contrast is None else float(contrast)) * SLD_UNIT_CM2
    exp_ = float("nan") if phi is None else 2 * math.pi ** 2 * dr ** 2 * phi * (1 - phi)
    total = meas + low + (tail if np.isfinite(tail) else 0.0)
    return Invariant(meas * c, low * c, tail * c, total * c, exp_,
                     float("nan") if phi is None else float(phi), how, tuple(po.q_range))


#: Significance a peak must reach: its relative excess over the background, I / I_bg - 1, in
#: units of the local scatter σ of that excess (see :func:`bragg_peaks`).
PEAK_SIGNIFICANCE = 5.0
#: Half-width (decades of q) of the running-median background and of the scatter window.
PEAK_BACKGROUND_HALF_DECADES = 0.25
#: Half-width (decades) of the running mean applied to the running median.
PEAK_SMOOTH_HALF_DECADES = 0.1
#: Peaks are sought at q >= this many times 2π/L (d <= L / this: so many repeats in the box).
PEAK_MIN_REPEATS = 4
#: A peak needs at least this much of the curve (decades) on each side of it.
PEAK_MIN_HALF_DECADES = 0.1
#: Floor of σ: a 5 % jitter between bins is never counted as noise-free.
PEAK_SIGMA_FLOOR = 0.05


@dataclass
class BraggPeaks:
    """Peaks standing above a smooth background by a stated significance (see
    :func:`bragg_peaks`): positions, d = 2π/q, widths (FWHM), height ln(I/I_bg), the
    significance, and the integrated intensity of each peak above the background."""

    q: np.ndarray
    d: np.ndarray
    fwhm: np.ndarray
    height: np.ndarray        # ln(I_peak / I_background)
    significance: np.ndarray  # height / local sigma
    integrated: np.ndarray    # cm^-4: (1/4π) Σ_modes (I - I_bg) Δ³q over the peak
    threshold: float = PEAK_SIGNIFICANCE
    background_half_decades: float = PEAK_BACKGROUND_HALF_DECADES

    def table(self) -> dict:
        return {"q_nm-1": self.q.tolist(), "d_nm": self.d.tolist(),
                "fwhm_nm-1": self.fwhm.tolist(), "height_ln": self.height.tolist(),
                "significance_sigma": self.significance.tolist(),
                "integrated_cm-4": [_f(v) for v in self.integrated]}

    def to_dict(self) -> dict:
        return {**self.table(), "n_peaks": int(self.q.size),
                "significance_min_sigma": float(self.threshold),
                "background": f"running median of ln I over +-{self.background_half_decades:g} "
                              f"decade of q, then a running mean over "
                              f"+-{PEAK_SMOOTH_HALF_DECADES:g} decade"}

    def describe(self) -> list:
        """Lines for a terminal."""
        if self.q.size == 0:
            return [f"no peak {self.threshold:g} sigma above the background"]
        return [f"q {q:.4g} nm^-1 (d {d:.4g} nm), FWHM {w:.3g} nm^-1, {math.exp(h):.3g}x the "
                f"background, {z:.1f} sigma" for q, d, w, h, z in
                zip(self.q, self.d, self.fwhm, self.height, self.significance)]


def _window_bounds(x, half, symmetric):
    """Index bounds [a, b) of the points within ``half`` of each ``x_i``; ``symmetric``:
    as many points on each side of ``i`` (the fewer of the two sides' counts), so that the
    median of a monotonic sequence is its centre value even where the points are uneven
    (low q, where empty bins are dropped) or near the ends of the range."""
    a = np.searchsorted(x, x - half - 1e-12, side="left")
    b = np.searchsorted(x, x + half + 1e-12, side="right")
    if symmetric:
        i = np.arange(x.size)
        k = np.minimum(i - a, b - 1 - i)
        a, b = i - k, i + k + 1
    return a, b


@numba.njit(cache=True)
def _window_stat(y, keep, a, b, mad, min_kept):
    """Per point i: the median of ``y[a[i]:b[i]]`` over the kept points (all points of the
    window when none is kept), or with ``mad`` 1.4826 × their median absolute deviation
    (nan with fewer than ``min_kept`` kept points)."""
    n = y.size
    out = np.empty(n)
    buf = np.empty(n)
    for i in range(n):
        m = 0
        for j in range(a[i], b[i]):
            if keep[j]:
                buf[m] = y[j]
                m += 1
        if m == 0 and not mad:
            for j in range(a[i], b[i]):
                buf[m] = y[j]
                m += 1
        if m == 0 or m < min_kept:
            out[i] = np.nan
            continue
        med = np.median(buf[:m])
        if mad:
            for j in range(m):
                buf[j] = abs(buf[j] - med)
            out[i] = 1.4826 * np.median(buf[:m])
        else:
            out[i] = med
    return out


def _peak_background(x, y, keep, half, smooth_half):
    """Running median of ``y`` over the points ``keep`` within ±``half`` of each point
    (as many points on each side; all points of the window when none is kept there), then
    a running mean of that median over ±``smooth_half`` (Tukey's median-then-mean
    smoother: the median ignores narrow peaks and follows a monotonic trend exactly, the
    mean lets the bin-to-bin ripple of the curve show in the residual)."""
    a, b = _window_bounds(x, half, True)
    med = _window_stat(np.ascontiguousarray(y, np.float64), keep, a, b, False, 1)
    a, b = _window_bounds(x, smooth_half, True)
    cs = np.concatenate([[0.0], np.cumsum(med)])
    return (cs[b] - cs[a]) / (b - a)


def _peak_scatter(x, r, keep, half):
    """1.4826 × the median absolute deviation of the residual ``r`` over the kept points
    within ±``half`` (not shrunk near the ends; one standard deviation for Gaussian
    scatter); nan where fewer than 3 points are kept."""
    a, b = _window_bounds(x, half, False)
    return _window_stat(np.ascontiguousarray(r, np.float64), keep, a, b, True, 3)


def _extent(v, i, level, lo=0, hi=None):
    """First and last index of the contiguous run with ``v > level`` around ``i``, kept
    within [lo, hi]."""
    hi = v.size - 1 if hi is None else hi
    a = i
    while a > lo and v[a - 1] > level:
        a -= 1
    b = i
    while b < hi and v[b + 1] > level:
        b += 1
    return a, b


def _peak_scan(q, inten, sem_rel, significance, half, q_min=0.0):
    """Background (ln I), residual, significance of every bin and the indices of the
    peaks (local maxima of the residual at or above ``significance``), iterated: the top
    (above half its excess) of each peak found is left out of the background and the
    scatter, until the set of peaks no longer changes (at most 10 rounds)."""
    x = np.log10(q)
    y = np.log(inten)
    floor = np.maximum(sem_rel, PEAK_SIGMA_FLOOR)
    keep = np.ones(q.size, bool)
    # candidates: q >= q_min, and a background window at least PEAK_MIN_HALF wide each side
    room = np.minimum(x - x[0], x[-1] - x)
    cand = (q >= q_min) & (room >= min(PEAK_MIN_HALF_DECADES, half) - 1e-12)
    cand[0] = cand[-1] = False
    for _ in range(10):
        bg = _peak_background(x, y, keep, half, PEAK_SMOOTH_HALF_DECADES)
        r = y - bg
        rho = np.expm1(r)                     # I / I_bg - 1
        z = rho / np.fmax(_peak_scatter(x, rho, keep, half), floor)
        idx = np.flatnonzero((r[1:-1] > r[:-2]) & (r[1:-1] >= r[2:])
                             & (z[1:-1] >= significance) & cand[1:-1]) + 1
        new_keep = np.ones(q.size, bool)
        ex = inten - np.exp(bg)
        for i in idx:
            a, b = _extent(ex, i, 0.5 * ex[i])
            new_keep[a:b + 1] = False
        if np.array_equal(new_keep, keep):
            break
        keep = new_keep
    return bg, r, z, idx


def bragg_peaks(res: ScatteringResult, significance: float = PEAK_SIGNIFICANCE, q_range=None,
                background_half_decades: float = PEAK_BACKGROUND_HALF_DECADES,
                max_peaks: int = 10) -> BraggPeaks:
    r"""Peaks of I(q) that stand above a smooth background by ``significance`` σ.

    * Background: a running median of ln I over ±``background_half_decades`` (0.25) in
      log10 q, with as many bins on each side of the bin (so on a monotonic stretch the
      median is the bin's own value: a power law, a Guinier knee or any curvature is
      followed exactly, even where empty bins are missing at low q), then a running mean of
      that median over ±0.1 decade (Tukey's median-then-mean smoothing; the bin-to-bin
      ripple of the curve then shows in the residual). A peak narrower than half the window
      (relative FWHM under about 0.6: a stack of two or more repeats) does not move it.
    * Residual and scatter: the relative excess ρ = I / I_bg − 1, and
      σ = max(1.4826 × the median absolute deviation of ρ over ±0.25 decade, the bin's
      speckle scatter 1/√(n/2) (a mean of n/2 independent exponential intensities, n the
      bin's mode count), its measured standard error over its modes
      (:attr:`ScatteringResult.intensity_sem` / I), 0.05). Measured on ρ, not on ln I, so
      that the deep minima of a form factor (ρ ≥ −1) do not swamp the scale.
    * A peak is a local maximum of ρ with ρ / σ ≥ ``significance`` (5), at
      q ≥ 4 × 2π/L (four repeats in the box: lower q is the box's own fringes and a few
      modes), with at least 0.1 decade of curve on each side. The top of each peak (above
      half its excess) is then left out of the background and the scatter and the search is
      repeated until the set of peaks no longer changes, so that a dense series of orders
      does not inflate the scatter. The ``max_peaks`` most significant are kept, in
      increasing q.
    * Bins below the float32 roundoff level of the transform
      (:attr:`ScatteringResult.numerical_floor`) are taken at that level: a perfectly
      periodic stack has nothing but roundoff between its orders.

    Measured (tests/validation and the study behind them): a single ball of 10 to 40
    voxels radius at a random offset reaches 2.4 σ at most (its form-factor maxima are at
    most about twice the local mean); periodic random two-phase media (Boolean balls,
    level-cut Gaussian fields; about 40 realisations) 4.2 σ at most; a periodic lamellar stack's
    orders stand 1e6 σ and more above the roundoff; finite stacks of 3 to 15 sheets show
    their first and third orders at 10 σ and more. On a non-periodic grid whose structure
    is cut by the box faces, the box's own fringes (odd multiples of π/L, strongest at low
    q) can pass the test: the curve's notes say when the faces cut the structure, and
    ``window='hann'`` removes them.

    Position: the centroid (in linear q) of the excess intensity I − I_bg over the bins at
    or above half its maximum, each bin at its intensity-weighted mean |q|
    (:attr:`ScatteringResult.q_intensity`), so that a reflection narrower than a bin (a
    periodic stack) is placed at its mode exactly. FWHM: the width at half the excess
    maximum, interpolated between bins (no narrower than about one bin, 5.8 % of q at 40
    bins per decade). ``integrated``: ``(1/4π) Σ (I − I_bg) Δ³q`` over the contiguous bins
    with ρ > 0 around the peak, bounded by the lowest point towards the next maximum
    (cm⁻⁴; the peak's share of the invariant, proportional to the squared structure factor
    of the reflection, :math:`|F_n|^2`). ``height``: ln(I / I_bg) at the peak.
    d = 2π / q (Bragg). An explicit ``q_range`` drops the four-repeat limit.
    """
    if not (significance > 0 and background_half_decades > 0):
        raise OptionError("significance and background_half_decades must be positive",
                          field="bragg")
    m = _in_range(res, q_range)
    if res.numerical_floor > 0:             # empty-of-signal bins are at the roundoff level
        m |= _in_range(res, q_range, positive=False)
    q = res.q[m]
    empty = BraggPeaks(*(np.zeros(0) for _ in range(6)), float(significance),
                       float(background_half_decades))
    if q.size < 5:
        return empty
    inten = np.maximum(res.intensity[m], res.numerical_floor)
    # speckle: a mean of n/2 independent exponential intensities scatters by 1/sqrt(n/2)
    sem_rel = 1.0 / np.sqrt(np.maximum(np.asarray(res.counts[m], float) / 2.0, 1.0))
    if res.intensity_sem is not None:
        sem_rel = np.maximum(sem_rel, res.intensity_sem[m] / inten)
    q_min = PEAK_MIN_REPEATS * res.q_valid[0] if q_range is None else 0.0
    bg, r, z, idx = _peak_scan(q, inten, sem_rel, significance, background_half_decades, q_min)
    if idx.size == 0:
        return empty
    idx = np.sort(idx[np.argsort(-z[idx], kind="stable")][:int(max_peaks)])
    qw = res.q_intensity[m] if res.q_intensity is not None else q
    lo, hi = _bin_widths(res, m)
    ex = inten - np.exp(bg)
    per_mode = (res.mode_volume / (4 * np.pi) * 1e21
                if np.isfinite(res.mode_volume) else float("nan"))
    # every local maximum of r bounds its neighbours' extents (at the lowest r between)
    allmax = np.flatnonzero((r[1:-1] > r[:-2]) & (r[1:-1] >= r[2:])) + 1
    pos, fw, area = [], [], []
    for i in idx:
        k = int(np.searchsorted(allmax, i))
        lo_lim = (int(allmax[k - 1] + np.argmin(r[allmax[k - 1]:i + 1])) if k > 0 else 0)
        hi_lim = (int(i + np.argmin(r[i:allmax[k + 1] + 1])) if k + 1 < allmax.size
                  else q.size - 1)
        half = 0.5 * ex[i]
        a, b = _extent(ex, i, half * (1 - 1e-12), lo_lim, hi_lim)
        sl = slice(a, b + 1)
        wts = ex[sl] * (hi[sl] - lo[sl])
        pos.append(float(np.sum(wts * qw[sl]) / np.sum(wts)))
        # half-maximum crossings, linear in q between a bin and its outer neighbour
        left = (q[a] if a == 0 or ex[a - 1] >= half else
                q[a - 1] + (half - ex[a - 1]) / (ex[a] - ex[a - 1]) * (q[a] - q[a - 1]))
        right = (q[b] if b == q.size - 1 or ex[b + 1] >= half else
                 q[b] + (ex[b] - half) / (ex[b] - ex[b + 1]) * (q[b + 1] - q[b]))
        fw.append(float(right - left))
        a2, b2 = _extent(r, i, 0.0, lo_lim, hi_lim)
        sl2 = slice(a2, b2 + 1)
        area.append(float(np.sum(ex[sl2] * res.counts[m][sl2]) * per_mode))
    pos = np.asarray(pos)
    return BraggPeaks(pos, 2 * np.pi / pos, np.asarray(fw), r[idx].astype(float),
                      z[idx].astype(float), np.asarray(area), float(significance),
                      float(background_half_decades))


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
    highest half decade of the valid range (and over each ``ranges`` (qmin, qmax)), Porod
    (:func:`porod`: the Porod range found in the data, or ``status: "no_porod_range"`` and a
    reason), Guinier, the invariant (``phi``: solid volume fraction; its Porod tail from the
    same Porod range, none without one) and the peaks standing 5 σ above the background
    (:func:`bragg_peaks`). A feature that cannot be fitted holds ``{"error": ...}``
    instead."""
    lo, hi = res.q_valid
    out = {}
    po = {}

    def _porod():
        po["fit"] = porod(res)
        return po["fit"]

    todo = [("slope_low_q", lambda: power_law(res, (lo, lo * 10 ** 0.5))),
            ("slope_high_q", lambda: power_law(res, (hi / 10 ** 0.5, hi))),
            ("porod", _porod), ("guinier", lambda: guinier(res)),
            ("invariant", lambda: invariant(res, phi=phi, porod_fit=po.get("fit"))),
            ("bragg_peaks", lambda: bragg_peaks(res))]
    for a, b in ranges:
        todo.append((f"slope_{a:g}-{b:g}", lambda a=a, b=b: power_law(res, (a, b))))
    for name, fn in todo:
        try:
            out[name] = fn().to_dict()
        except OptionError as e:
            out[name] = {"error": e.detail}
    return out


@dataclass(repr=False)
class ScatteringMeasure(Result):
    """The ``scattering`` measure of ``sheetview measure``: a curve with fixed contrast
    (neutrons; the sheets with the layer SLD of the material model, water as pore fluid)
    and its features."""

    curve: ScatteringResult
    features: dict
    probe: str
    solid: str
    fluid: str

    def table(self) -> dict:
        return self.curve.table()

    def tables(self) -> dict:
        return {"scattering": self.curve.table()}

    def to_dict(self) -> dict:
        return {"probe": self.probe, "solid": self.solid, "fluid": self.fluid,
                "features": self.features, **self.curve.to_dict()}

    def brief(self) -> str:
        po = self.features.get("porod", {})
        porod = (f"Porod S/V {po['s_over_v_nm-1']:.4g} nm^-1" if po.get("s_over_v_nm-1")
                 else "no Porod range")
        n = len(self.features.get("bragg_peaks", {}).get("q_nm-1", []))
        lo, hi = self.curve.q_valid
        return f"{self.probe}s, q {lo:.3g}-{hi:.3g} nm^-1, {porod}, {n} peaks"


def describe_sheets(split) -> str:
    """How the sheets' SLD was obtained (material model), for figures and JSON."""
    h = split.hydrate
    return (f"sheets = {h.formula} at {h.density:g} g/cm3 less its interlayer water "
            f"({100 * split.interlayer_share:.1f} % of the C-S-H volume): layer density "
            f"{split.layer_density:.4g} g/cm3")


def scattering_measure(grid, *, hydrate: Hydrate | None = None, max_memory: int | None = None,
                       probe: str = "neutron", fluid: str = "h2o") -> ScatteringMeasure:
    """The predicted curve of a phase grid with its features, as ``sheetview measure``
    reports it: the sheets get the layer SLD of the material model (``hydrate``, default
    Allen, Thomas & Jennings 2007, less the interlayer water the grid resolves:
    :mod:`sheetview.material`), interlayer, gel pores and the outside the pore fluid
    (``fluid``: H2O by default); the invariant's φ is the solid fraction of the grid box
    (the volume the intensity is per)."""
    hydrate = Hydrate() if hydrate is None else hydrate
    counts = np.bincount(grid.labels.ravel(), minlength=256)
    split = hydrate.split(interlayer_share({"solid": counts[SOLID],
                                            "interlayer": counts[INTERLAYER]}))
    slds = phase_slds(split.layer_sld(probe), preset_sld(fluid, probe))
    res = scattering_curve(grid, slds, max_memory=max_memory)
    phi = float(counts[SOLID] / grid.labels.size)
    return ScatteringMeasure(res, curve_features(res, phi), probe, describe_sheets(split), fluid)
