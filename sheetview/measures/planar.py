"""Descriptors of a 2D binary image: area fraction, chords, local thickness, S2, orientation.

Applied to virtual sections of a structure and to a user's own micrograph alike, so that
the two can be put side by side.

Conventions
-----------
* ``mask``: 2D bool array indexed ``[row, col]`` (row = image y, downwards; col = x),
  True = solid (the phase of interest), False = pore (everything else in the sample).
* ``pixel``: pixel edge in nm (square pixels).
* ``valid``: optional 2D bool array of the same shape; False marks pixels that are not
  part of the sample (outside a spherical pore in a section, transparent pixels of an
  image). Default: every pixel is valid. Invalid pixels belong to neither phase.
* Angles (orientation): degrees in ``[0, 180)``, counter-clockwise from the +x (column)
  axis as the image is shown on screen (y up = towards row 0).

Every function returns a dataclass with ``to_dict()`` (JSON-ready, small) and, where
tabular, ``table()`` (dict of column name -> 1D array). :func:`describe` runs them all.
Nothing here reads files, prints or plots.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field

import numba
import numpy as np

from ..errors import OptionError, positive
from ..threads import budget
from .pores import prefix_max

PHASES = ("solid", "pore")
DIRECTIONS = ("rows", "cols", "random")
#: Sample step along random lines, pixels.
LINE_STEP_PX = 0.25
#: Depth (pixels, signed-distance units) a random line must reach into the other phase
#: before a phase change counts (hysteresis against the staircase of digitised edges).
HYSTERESIS_PX = 0.3
#: Orientation histogram bins over [0, 180) degrees.
ORIENTATION_BINS = 36


# ======================================================================= checks
def _check_pixel(pixel) -> float:
    return positive(pixel, "pixel size", param="pixel")


def _check_mask(mask, valid=None, name="mask"):
    m = np.asarray(mask)
    if m.ndim != 2:
        raise OptionError(f"the {name} must be a 2D array (rows, columns), not {m.ndim}D",
                          param=name)
    if min(m.shape) < 1:
        raise OptionError(f"the {name} is empty (shape {m.shape})", param=name)
    if m.dtype != bool:
        if m.dtype.kind not in "biuf":
            raise OptionError(f"the {name} must be a bool array, not {m.dtype}", param=name)
        if m.dtype.kind == "f" and not np.all(np.isfinite(m)):
            raise OptionError(f"the {name} holds NaN or infinite values", param=name)
        m = m != 0
    if valid is None:
        v = np.ones(m.shape, dtype=bool)
    else:
        v = np.asarray(valid)
        if v.shape != m.shape:
            raise OptionError(f"valid has shape {v.shape}, the {name} {m.shape}",
                              param="valid")
        v = v.astype(bool, copy=False)
        if not v.any():
            raise OptionError("valid marks no pixel as part of the sample", param="valid")
    return np.ascontiguousarray(m), np.ascontiguousarray(v)


def _fnone(x):
    x = float(x)
    return x if math.isfinite(x) else None


def _weighted_median(x, w):
    if x.size == 0 or not np.sum(w) > 0:
        return float("nan")
    o = np.argsort(x, kind="stable")
    c = np.cumsum(w[o])
    return float(x[o][np.searchsorted(c, 0.5 * c[-1])])


# ================================================================ area fraction
@dataclass
class AreaFraction:
    """Fraction of the valid pixels that are solid.

    Attributes
    ----------
    area_fraction : n_solid / n_valid
    n_solid, n_valid, n_pixels : pixel counts
    """

    area_fraction: float
    n_solid: int
    n_valid: int
    n_pixels: int

    def to_dict(self) -> dict:
        return {"area_fraction": float(self.area_fraction), "n_solid": int(self.n_solid),
                "n_valid": int(self.n_valid), "n_pixels": int(self.n_pixels)}


def area_fraction(mask, valid=None) -> AreaFraction:
    """Area fraction of the solid among the valid pixels (point counting on the pixel
    centres: each pixel centre is a test point, common practice in stereology)."""
    m, v = _check_mask(mask, valid)
    ns = int(np.count_nonzero(m & v))
    nv = int(np.count_nonzero(v))
    return AreaFraction(ns / nv, ns, nv, int(m.size))


# ======================================================================= chords
@dataclass
class Chords2D:
    """Chords of both phases of a 2D image.

    A chord is a maximal segment of a line inside one phase. Chords touching the image
    edge or an invalid pixel are *cut* (truncated by the field of view, not by the
    phase): they are kept but reported apart.

    Attributes
    ----------
    pixel : pixel edge (nm)
    lengths, cut, direction, weight : dict phase -> (n,) arrays. ``direction`` indexes
        :data:`DIRECTIONS` (0 rows, 1 cols, 2 random). ``weight`` (1/nm) is the
        edge-correction weight of an uncut chord, ``1 / (T - l)`` with ``T`` the length
        of the valid stretch of its line (rows and columns: ``1 / (N - n - 1)`` pixels,
        the exact number of positions of an n-pixel run strictly inside N pixels); 0 for
        cut chords.
    directions : the directions scanned
    n_lines : dict direction -> number of lines (rows, columns, random lines)
    line_length : dict direction -> total valid line length (nm)
    seed, line_step, hysteresis : random-line settings (pixels for the last two)
    """

    pixel: float
    lengths: dict = field(repr=False)
    cut: dict = field(repr=False)
    direction: dict = field(repr=False)
    weight: dict = field(repr=False)
    directions: tuple = DIRECTIONS
    n_lines: dict = field(default_factory=dict)
    line_length: dict = field(default_factory=dict)
    seed: object = None
    line_step: float = LINE_STEP_PX
    hysteresis: float = HYSTERESIS_PX

    def _sel(self, phase, direction=None, include_cut=False):
        if phase not in self.lengths:
            raise OptionError(f"unknown phase {phase!r}; expected one of {PHASES}",
                              param="phase")
        s = np.ones(self.lengths[phase].size, dtype=bool)
        if not include_cut:
            s &= ~self.cut[phase]
        if direction is not None:
            if direction not in DIRECTIONS:
                raise OptionError(f"unknown direction {direction!r}; expected one of "
                                  f"{DIRECTIONS}", param="direction")
            s &= self.direction[phase] == DIRECTIONS.index(direction)
        return s

    def chords(self, phase: str, direction: str | None = None,
               include_cut: bool = False) -> np.ndarray:
        """Chord lengths (nm) of a phase: uncut ones by default; one direction or all."""
        sel = self._sel(phase, direction, include_cut)
        return self.lengths[phase][sel]

    def weights(self, phase: str, direction: str | None = None) -> np.ndarray:
        """Edge-correction weights of the uncut chords returned by :meth:`chords`."""
        sel = self._sel(phase, direction, False)
        return self.weight[phase][sel]

    def mean(self, phase: str, direction: str | None = None, corrected: bool = True) -> float:
        """Mean uncut chord (nm). ``corrected``: weighted by :attr:`weight` (unbiased for
        a statistically homogeneous texture seen through the window); otherwise the plain
        mean (right for objects lying wholly inside the window)."""
        L = self.chords(phase, direction)
        if L.size == 0:
            return float("nan")
        if not corrected:
            return float(L.mean())
        w = self.weights(phase, direction)
        return float(np.sum(w * L) / np.sum(w)) if np.sum(w) > 0 else float("nan")

    def median(self, phase: str, direction: str | None = None, corrected: bool = True) -> float:
        L = self.chords(phase, direction)
        if L.size == 0:
            return float("nan")
        if not corrected:
            return float(np.median(L))
        return _weighted_median(L, self.weights(phase, direction))

    def headline_direction(self):
        """The direction the headline means use: random lines when scanned (isotropic),
        else all directions pooled (None)."""
        return "random" if "random" in self.directions else None

    def to_dict(self) -> dict:
        out = {"pixel_nm": float(self.pixel), "directions": list(self.directions),
               "n_lines": {k: int(v) for k, v in self.n_lines.items()},
               "line_length_nm": {k: float(v) for k, v in self.line_length.items()},
               "seed": self.seed if isinstance(self.seed, (int, type(None))) else str(self.seed),
               "line_step_px": float(self.line_step), "hysteresis_px": float(self.hysteresis),
               "headline_direction": self.headline_direction() or "pooled", "phases": {}}
        hd = self.headline_direction()
        for ph in self.lengths:
            d = {"n_chords": int(self.lengths[ph].size), "n_cut": int(self.cut[ph].sum()),
                 "mean_nm": _fnone(self.mean(ph, hd)),
                 "mean_uncorrected_nm": _fnone(self.mean(ph, hd, corrected=False)),
                 "median_nm": _fnone(self.median(ph, hd)),
                 "mean_cut_nm": _fnone(self.lengths[ph][self.cut[ph]].mean()
                                       if self.cut[ph].any() else float("nan")),
                 "by_direction": {}}
            for dn in self.directions:
                d["by_direction"][dn] = {
                    "n_uncut": int(self._sel(ph, dn).sum()),
                    "n_cut": int(self._sel(ph, dn, True).sum() - self._sel(ph, dn).sum()),
                    "mean_nm": _fnone(self.mean(ph, dn)),
                    "mean_uncorrected_nm": _fnone(self.mean(ph, dn, corrected=False)),
                    "median_nm": _fnone(self.median(ph, dn))}
            out["phases"][ph] = d
        return out

    def table(self) -> dict:
        """One row per chord: phase, direction, length_nm, cut, weight_per_nm."""
        ph, dn, ln, ct, wt = [], [], [], [], []
        for p in self.lengths:
            n = self.lengths[p].size
            ph.append(np.full(n, p, dtype=object))
            dn.append(np.asarray(DIRECTIONS, dtype=object)[self.direction[p]])
            ln.append(self.lengths[p])
            ct.append(self.cut[p])
            wt.append(self.weight[p])
        cat = (lambda a, dt: np.concatenate(a) if a else np.zeros(0, dt))
        return {"phase": cat(ph, object), "direction": cat(dn, object),
                "length_nm": cat(ln, float), "cut": cat(ct, bool).astype(np.int8),
                "weight_per_nm": cat(wt, float)}


def _axis_runs(code):
    """Runs of equal value along the rows of an int8 array ``code`` (-1 = invalid).

    Returns (row, start, length, value) of every run, value in {-1, 0, 1}, and for the
    valid runs the start and length of the valid stretch (run of ``code >= 0``) holding
    them."""
    M, L = code.shape
    p = np.full((M, L + 2), -2, dtype=np.int8)
    p[:, 1:-1] = code
    ch = p[:, 1:] != p[:, :-1]  # (M, L + 1): a run starts at k when ch[:, k]
    r, k = np.nonzero(ch)
    # consecutive change points of a row delimit a run; every row has one at k = 0 and
    # its last at k = L, so the change point after one with k < L is in the same row
    nxt_k = np.roll(k, -1)
    sel = k < L
    rows, st = r[sel], k[sel]
    ln = nxt_k[sel] - st
    val = code[rows, st]
    # valid stretches
    vp = np.zeros((M, L + 2), dtype=np.int8)
    vp[:, 1:-1] = code >= 0
    dv = np.diff(vp, axis=1)
    vr, vs = np.nonzero(dv == 1)
    _, ve = np.nonzero(dv == -1)
    ok = val >= 0
    if vs.size == 0:  # no valid pixel on any row
        z = np.zeros(rows.size, dtype=np.int64)
        return rows, st, ln, val, z, z
    key_v = vr.astype(np.int64) * (L + 1) + vs
    key = rows.astype(np.int64) * (L + 1) + st
    idx = np.searchsorted(key_v, key, side="right") - 1
    seg_s = np.where(ok, vs[np.maximum(idx, 0)], 0)
    seg_n = np.where(ok, (ve - vs)[np.maximum(idx, 0)], 0)
    return rows, st, ln, val, seg_s, seg_n


def _grid_chords(code, pixel, axis_code):
    rows, st, ln, val, seg_s, seg_n = _axis_runs(code)
    ok = val >= 0
    st, ln, val, seg_s, seg_n = st[ok], ln[ok], val[ok], seg_s[ok], seg_n[ok]
    cut = (st == seg_s) | (st + ln == seg_s + seg_n)
    npos = seg_n - ln - 1
    w = np.where(cut, 0.0, 1.0 / (np.maximum(npos, 1) * pixel))
    out = {}
    for code_v, ph in ((1, "solid"), (0, "pore")):
        s = val == code_v
        out[ph] = (ln[s] * pixel, cut[s], np.full(int(s.sum()), axis_code, np.int8), w[s])
    n_lines = code.shape[0]
    length = float(np.count_nonzero(code >= 0)) * pixel
    return out, n_lines, length


@numba.njit(cache=True, inline="always")
def _bilinear(F, x, y):
    M, L = F.shape
    x0 = math.floor(x)
    y0 = math.floor(y)
    fx = x - x0
    fy = y - y0
    xa = min(max(int(x0), 0), L - 1)
    xb = min(max(int(x0) + 1, 0), L - 1)
    ya = min(max(int(y0), 0), M - 1)
    yb = min(max(int(y0) + 1, 0), M - 1)
    return ((F[ya, xa] * (1.0 - fx) + F[ya, xb] * fx) * (1.0 - fy)
            + (F[yb, xa] * (1.0 - fx) + F[yb, xb] * fx) * fy)


@numba.njit(cache=True, inline="always")
def _end_segment(tend, cstart, state, seg0, seg_first, i, base, o_len, o_ph, o_cut, o_seg):
    """Close a valid segment of a line at ``tend``: its last chord (index ``i``), cut by the
    segment's end, and the segment's length for each of its chords (from ``seg_first``)."""
    o_len[i] = tend - cstart
    o_ph[i] = state
    o_cut[i] = True
    for q in range(base + seg_first, i + 1):
        o_seg[q] = tend - seg0


@numba.njit(cache=True)
def _trace_line(F, V, ox, oy, ux, uy, t0, t1, step, tau, write, o_len, o_ph, o_cut, o_seg,
                base):
    """Chords of one line ``(ox, oy) + t (ux, uy)``, ``t0 <= t <= t1`` (pixel units; x =
    column, y = row). Samples every ``<= step``; a sample is valid when its nearest pixel
    is; the phase field is the bilinear interpolation of the signed distance ``F``
    (> 0 solid). A phase change is accepted once the line is ``tau`` deep in the other
    phase and placed at the last zero crossing of ``F`` (linear interpolation between
    samples). Returns the number of chords; writes them from ``base`` when ``write``."""
    M, L = V.shape
    n = max(1, int(math.ceil((t1 - t0) / step)))
    h = (t1 - t0) / n
    nout = 0
    in_valid = False
    seg0 = t0
    seg_first = 0
    state = 0
    cstart = t0
    ccut = True
    zero = t0
    pv = 0.0
    pt = t0
    for k in range(n + 1):
        t = t0 + k * h if k < n else t1
        x = ox + t * ux
        y = oy + t * uy
        ix = min(max(int(math.floor(x + 0.5)), 0), L - 1)
        iy = min(max(int(math.floor(y + 0.5)), 0), M - 1)
        ok = V[iy, ix]
        if not ok:
            if in_valid:
                if write:
                    _end_segment(0.5 * (pt + t), cstart, state, seg0, seg_first,
                                 base + nout, base, o_len, o_ph, o_cut, o_seg)
                nout += 1
                in_valid = False
            pt = t
            continue
        fn = F[iy, ix]
        # far from a boundary (|F| >= 2.5 at the nearest pixel: the four interpolation
        # corners lie within sqrt 2 and keep the sign, with |F| > tau) the exact value is
        # not needed: no zero crossing can lie within a step of such a sample
        v = fn if (fn >= 2.5 or fn <= -2.5) else _bilinear(F, x, y)
        if not in_valid:
            in_valid = True
            seg0 = t0 if k == 0 else 0.5 * (pt + t)
            seg_first = nout
            state = 1 if v > 0 else 0
            cstart = seg0
            ccut = True
            zero = seg0
        else:
            if (v > 0) != (pv > 0):
                zero = pt + (t - pt) * pv / (pv - v)
            if (state == 1 and v < -tau) or (state == 0 and v > tau):
                if write:
                    o_len[base + nout] = zero - cstart
                    o_ph[base + nout] = state
                    o_cut[base + nout] = ccut
                nout += 1
                cstart = zero
                ccut = False
                state = 1 - state
        pv = v
        pt = t
    if in_valid:
        if write:
            _end_segment(t1, cstart, state, seg0, seg_first, base + nout, base, o_len, o_ph,
                         o_cut, o_seg)
        nout += 1
    return nout


def _trace_lines_impl(F, V, ox, oy, ux, uy, t0, t1, step, tau):
    nl = ox.size
    cnt = np.zeros(nl + 1, dtype=np.int64)
    d0 = np.zeros(0)
    d1 = np.zeros(0, dtype=np.int8)
    d2 = np.zeros(0, dtype=np.bool_)
    for i in numba.prange(nl):
        cnt[i + 1] = _trace_line(F, V, ox[i], oy[i], ux[i], uy[i], t0[i], t1[i], step, tau,
                                 False, d0, d1, d2, d0, 0)
    for i in range(nl):
        cnt[i + 1] += cnt[i]
    tot = cnt[nl]
    o_len = np.empty(tot)
    o_ph = np.empty(tot, dtype=np.int8)
    o_cut = np.empty(tot, dtype=np.bool_)
    o_seg = np.empty(tot)
    for i in numba.prange(nl):
        _trace_line(F, V, ox[i], oy[i], ux[i], uy[i], t0[i], t1[i], step, tau, True, o_len,
                    o_ph, o_cut, o_seg, cnt[i])
    return o_len, o_ph, o_cut, o_seg


_trace_lines_par = numba.njit(cache=True, parallel=True)(_trace_lines_impl)
_trace_lines_ser = numba.njit(cache=True)(_trace_lines_impl)


def _trace_lines(F, V, ox, oy, ux, uy, t0, t1, step, tau):
    """All chords of all lines (two passes: count, then fill), threaded over the lines
    when there is enough work to pay for the threads."""
    work = float(np.sum(t1 - t0)) / step
    fn = _trace_lines_par if work > 2e5 else _trace_lines_ser
    return fn(F, V, ox, oy, ux, uy, t0, t1, float(step), float(tau))


def signed_distance(mask) -> np.ndarray:
    """Signed distance (pixels, float64) used to place phase boundaries between pixel
    centres: ``d - 1/2`` on solid pixels (``d``: distance to the nearest pore pixel
    centre), ``-(d - 1/2)`` on pore pixels; 0 on the pixel edge between a solid and a pore
    pixel. A phase absent from the image gives a large constant."""
    import edt

    m = np.ascontiguousarray(mask, dtype=np.uint8)
    if m.all():
        return np.full(m.shape, 1e6)
    if not m.any():
        return np.full(m.shape, -1e6)
    din = edt.edt(m, black_border=False, parallel=budget())
    dout = edt.edt(1 - m, black_border=False, parallel=budget())
    return np.where(m.astype(bool), din - 0.5, 0.5 - dout).astype(np.float64)


def iur_lines_2d(n: int, shape, seed=None):
    """``n`` isotropic uniform random lines meeting the image rectangle.

    Direction uniform on the circle (angle uniform in [0, pi)), signed distance from the
    image centre uniform on ``[-R, R]`` (R = half the diagonal); lines missing the
    rectangle ``[-1/2, L - 1/2] x [-1/2, M - 1/2]`` (pixel units, x = column, y = row)
    are drawn again. This is the motion-invariant line measure restricted to the lines
    hitting the image (Santaló, *Integral Geometry and Geometric Probability*,
    Addison-Wesley 1976). Returns origins (ox, oy), unit directions (ux, uy)
    and the parameter interval [t0, t1] inside the rectangle."""
    M, L = shape
    rng = np.random.default_rng(seed)
    cx, cy = 0.5 * (L - 1), 0.5 * (M - 1)
    R = 0.5 * math.hypot(L, M)
    out = [[] for _ in range(6)]
    have = 0
    while have < n:
        k = max(64, int(1.25 * (n - have)))
        th = rng.random(k) * math.pi
        p = (2.0 * rng.random(k) - 1.0) * R
        ux, uy = np.cos(th), np.sin(th)
        ox, oy = cx - p * uy, cy + p * ux
        lo = np.full(k, -np.inf)
        hi = np.full(k, np.inf)
        with np.errstate(divide="ignore", invalid="ignore"):
            for o, u, a, b in ((ox, ux, -0.5, L - 0.5), (oy, uy, -0.5, M - 0.5)):
                ta, tb = (a - o) / u, (b - o) / u
                par = np.abs(u) < 1e-12
                inside = (o >= a) & (o <= b)
                tmin = np.where(par, np.where(inside, -np.inf, np.inf), np.minimum(ta, tb))
                tmax = np.where(par, np.where(inside, np.inf, -np.inf), np.maximum(ta, tb))
                lo = np.maximum(lo, tmin)
                hi = np.minimum(hi, tmax)
        hit = hi > lo + 1e-9
        take = np.flatnonzero(hit)[:n - have]
        for lst, a in zip(out, (ox, oy, ux, uy, lo, hi)):
            lst.append(a[take])
        have += take.size
    return tuple(np.concatenate(a) for a in out)


def chords_2d(mask, pixel, *, valid=None, directions=DIRECTIONS, n_lines: int = 2000,
              seed=None, line_step: float = LINE_STEP_PX,
              hysteresis: float = HYSTERESIS_PX) -> Chords2D:
    """Chord lengths (nm) of the solid and pore phases along rows, columns and isotropic
    uniform random lines.

    Rows and columns: runs of equal pixels (exact on the pixel grid; a run of ``n``
    pixels is ``n * pixel`` long). Random lines (:func:`iur_lines_2d`): each line is
    sampled every ``line_step`` pixels; the phase boundary is the zero line of the
    bilinear interpolation of the signed distance (:func:`signed_distance`), i.e. the
    pixel edge between a solid and a pore pixel, smoothed across the staircase of a
    digitised curve; a phase change counts once the line is ``hysteresis`` pixels deep in
    the other phase, and its position is the zero crossing, interpolated linearly between
    samples. (Reading the staircase itself would add the spurious slivers a line grazing
    a digitised boundary cuts: with nearest-pixel sampling the mean chord of a digitised
    disc of radius 40 px comes out 5-20 % short, depending on the step.) Chords thinner
    than about ``2 hysteresis`` pixels are not resolved along random lines; rows and
    columns resolve every pixel.

    A chord touching the image edge or an invalid pixel is ``cut``. Uncut chords carry
    the edge-correction weight ``1 / (T - l)`` (see :class:`Chords2D`): a chord of length
    ``l`` lies wholly inside a valid stretch of length ``T`` on ``T - l`` of the line
    positions, so the weighted distribution of uncut chords is free of the window's bias
    against long chords (minus-sampling with Horvitz-Thompson weights; common practice).

    Under isotropic uniform random lines the mean chord of a phase of area ``A`` and
    boundary length ``P`` is ``pi A / P`` (Cauchy-Crofton; Santaló, *Integral Geometry
    and Geometric Probability*, Addison-Wesley 1976).
    """
    px = _check_pixel(pixel)
    m, v = _check_mask(mask, valid)
    if isinstance(directions, str):
        directions = (directions,)
    directions = tuple(directions)
    bad = [d for d in directions if d not in DIRECTIONS]
    if bad or not directions:
        raise OptionError(f"directions must be among {DIRECTIONS}, got {directions!r}",
                          param="directions")
    directions = tuple(d for d in DIRECTIONS if d in directions)
    parts = {ph: [] for ph in PHASES}
    n_l, l_l = {}, {}
    code = np.where(v, m.astype(np.int8), np.int8(-1))
    if "rows" in directions:
        res, n_l["rows"], l_l["rows"] = _grid_chords(code, px, 0)
        for ph in PHASES:
            parts[ph].append(res[ph])
    if "cols" in directions:
        res, n_l["cols"], l_l["cols"] = _grid_chords(np.ascontiguousarray(code.T), px, 1)
        for ph in PHASES:
            parts[ph].append(res[ph])
    if "random" in directions:
        try:
            n_lines = int(n_lines)
        except (TypeError, ValueError):
            raise OptionError(f"number of lines must be a whole number, not {n_lines!r}",
                              param="n_lines") from None
        if n_lines < 1:
            raise OptionError(f"number of lines must be at least 1, not {n_lines}",
                              param="n_lines")
        step = float(line_step)
        tau = float(hysteresis)
        if not (0 < step <= 1):
            raise OptionError(f"line_step must be in (0, 1] pixel, not {line_step!r}",
                              param="line_step")
        if not (0 <= tau < 0.5):
            raise OptionError(f"hysteresis must be in [0, 0.5) pixel, not {hysteresis!r}",
                              param="hysteresis")
        F = signed_distance(m)
        ox, oy, ux, uy, t0, t1 = iur_lines_2d(n_lines, m.shape, seed)
        ln, ph, cut, seg = _trace_lines(F, v, ox, oy, ux, uy, t0, t1, step, tau)
        # a chord strictly inside its valid stretch: T - l positions (clamped away
        # from 0: a chord cannot be uncut without a sample of the other phase beside it)
        w = np.where(cut, 0.0, 1.0 / (np.maximum(seg - ln, step) * px))
        n_l["random"] = n_lines
        l_l["random"] = float(_valid_length(v, ox, oy, ux, uy, t0, t1, step) * px)
        keep = ln > 0
        for c, p in ((1, "solid"), (0, "pore")):
            s = (ph == c) & keep
            parts[p].append((ln[s] * px, cut[s], np.full(int(s.sum()), 2, np.int8), w[s]))
    cat = (lambda lst, k, dt: np.concatenate([x[k] for x in lst]) if lst
           else np.zeros(0, dt))
    return Chords2D(
        pixel=px,
        lengths={p: cat(parts[p], 0, float) for p in PHASES},
        cut={p: cat(parts[p], 1, bool) for p in PHASES},
        direction={p: cat(parts[p], 2, np.int8) for p in PHASES},
        weight={p: cat(parts[p], 3, float) for p in PHASES},
        directions=directions, n_lines=n_l, line_length=l_l,
        seed=seed, line_step=float(line_step), hysteresis=float(hysteresis))


@numba.njit(cache=True)
def _valid_length(V, ox, oy, ux, uy, t0, t1, step):
    M, L = V.shape
    tot = 0.0
    for i in range(ox.size):
        n = max(1, int(math.ceil((t1[i] - t0[i]) / step)))
        h = (t1[i] - t0[i]) / n
        for k in range(n + 1):
            t = t0[i] + k * h
            ix = min(max(int(math.floor(ox[i] + t * ux[i] + 0.5)), 0), L - 1)
            iy = min(max(int(math.floor(oy[i] + t * uy[i] + 0.5)), 0), M - 1)
            if V[iy, ix]:
                tot += h if 0 < k < n else 0.5 * h
    return tot


# ============================================================== local thickness
@dataclass
class Thickness2D:
    """Local thickness of both phases (area-weighted).

    Attributes
    ----------
    pixel : nm
    maps : dict phase -> (rows, cols) float32 map of the local thickness (nm), NaN off
        the phase
    mean : dict phase -> area-weighted mean (nm)
    bin_edges : (nb + 1,) nm, one pixel wide from 0
    fraction : dict phase -> (nb,) area fraction of the phase in each bin
    """

    pixel: float
    maps: dict = field(repr=False)
    mean: dict = field(default_factory=dict)
    bin_edges: np.ndarray = field(default=None, repr=False)
    fraction: dict = field(default_factory=dict, repr=False)

    def values(self, phase: str) -> np.ndarray:
        """Per-pixel thickness of the phase (nm): the area-weighted samples."""
        if phase not in self.maps:
            raise OptionError(f"unknown phase {phase!r}; expected one of {PHASES}",
                              param="phase")
        mp = self.maps[phase]
        return mp[np.isfinite(mp)].astype(np.float64)

    def quantiles(self, phase: str, q=(0.1, 0.5, 0.9)) -> np.ndarray:
        x = self.values(phase)
        if x.size == 0:
            return np.full(len(q), np.nan)
        return np.quantile(x, q, method="inverted_cdf")

    def to_dict(self) -> dict:
        out = {"pixel_nm": float(self.pixel), "phases": {}}
        for ph in self.maps:
            q = self.quantiles(ph)
            x = self.values(ph)
            out["phases"][ph] = {"mean_nm": _fnone(self.mean[ph]),
                                 "d10_nm": _fnone(q[0]), "d50_nm": _fnone(q[1]),
                                 "d90_nm": _fnone(q[2]),
                                 "max_nm": _fnone(x.max() if x.size else float("nan")),
                                 "n_pixels": int(x.size)}
        return out

    def table(self) -> dict:
        e = self.bin_edges
        cols = {"d_lower_nm": e[:-1], "d_upper_nm": e[1:]}
        for ph in self.maps:
            cols[f"area_fraction_{ph}"] = self.fraction[ph]
        return cols


@numba.njit(cache=True)
def _containment_table_2d(kmax):
    """``M[t, K] = max |p - e_t|^2`` over 2D lattice points ``p`` with ``|p|^2 < K``, for
    ``e_0 = (1, 0)`` and ``e_1 = (1, 1)`` (the two neighbour types of the 8-neighbourhood;
    by symmetry one offset per type covers all). The lattice disc of squared radius ``K``
    about ``x`` lies in that of ``K'`` about ``x + e`` iff ``M[type(e), K] < K'``. Rows
    2..8 (the 3D neighbour types of :mod:`.pores`, never met on a one-voxel-thick grid)
    are set so that they never report containment."""
    r = int(math.sqrt(kmax)) + 1
    A = np.full((2, kmax + 2), -1, dtype=np.int64)
    for a in range(-r, r + 1):
        for b in range(-r, r + 1):
            q = a * a + b * b
            if q > kmax:
                continue
            v0 = (a - 1) ** 2 + b * b
            v1 = (a - 1) ** 2 + (b - 1) ** 2
            if v0 > A[0, q]:
                A[0, q] = v0
            if v1 > A[1, q]:
                A[1, q] = v1
    M = np.full((9, kmax + 2), np.iinfo(np.int64).max, dtype=np.int64)
    prefix_max(A, M[:2])
    return M


#: Largest squared radius (pixels^2) of the exact 2D containment table; larger discs use
#: the continuous containment test (never wrong, only less pruning).
TABLE_2D_MAX_K = 1 << 22


def thickness_map(phase, pixel=1.0) -> np.ndarray:
    """Local thickness (nm) of one phase of a 2D image; NaN off the phase.

    Pixels off the phase and the image border are walls. ``d(x)``: distance from the
    centre of phase pixel ``x`` to the nearest wall pixel centre (``edt``); disc ``x``
    holds the pixels ``q`` with ``|q - x| < d(x)``; every pixel takes the largest
    ``2 d(x) - h`` (``h`` the pixel edge) of the discs holding it -- the conventions of
    :func:`sheetview.measures.pores.local_thickness`, whose ball-painting kernels run
    here unchanged on a ``(1, rows, cols)`` grid with an exact 2D disc-containment table.
    A strip ``w`` pixels wide gives ``w`` (odd ``w``) or ``w - 1`` (even), a disc of
    radius ``R`` about ``2R``.
    """
    import edt

    from . import pores as P

    m = np.ascontiguousarray(phase, dtype=bool)
    px = _check_pixel(pixel)
    out = np.full(m.shape, np.nan, dtype=np.float32)
    if not m.any():
        return out
    d2 = edt.edtsq(m.astype(np.uint8), black_border=True, parallel=budget())
    # one plane of a 3D grid, (1, rows, cols): the painting bit sets run along the rows
    K = np.ascontiguousarray(d2, dtype=np.float32)[None]
    m3 = m[None]
    nch = 1
    top = P._int_max(K, nch)
    res = np.zeros(K.shape, dtype=np.float32)
    rel = np.ones(3)
    if top >= 0:
        kmax = int(min(max(top, 1), TABLE_2D_MAX_K))
        MT = np.ascontiguousarray(_containment_table_2d(kmax).T)
        flag, hist = P._ridge_grid(K, MT, P._offset_types(), False, nch)
        kk = np.arange(hist.shape[1], dtype=np.float64)
        vk = ((2.0 * np.sqrt(kk) - 1.0) * px).astype(np.float32)
        isq = P._isqrt_table(hist.shape[1])
        ci, cj, ck, rr, vals, pmask = P._gather_ridge(K, flag, hist, vk, nch, False, isq)
        del flag
        P._paint_sorted(ci, cj, ck, rr, vals, rel, False, m3, res, True, pmask)
    else:  # distances beyond 4096 pixels: the general path of pores.py
        flat = K.reshape(-1).copy()
        idx = np.flatnonzero(flat)
        r2 = flat[idx]
        vals = ((2.0 * np.sqrt(r2.astype(np.float64)) - 1.0) * px).astype(np.float32)
        res, _ = P._paint_balls(K.shape, idx, r2, vals, rel, False, flat, res, m3)
    out[m] = res[0][m]
    return out


def local_thickness_2d(mask, pixel, *, valid=None, phases=PHASES) -> Thickness2D:
    """Local thickness of the solid and the pore phase (Hildebrand & Rüegsegger 1997, in
    2D): at a pixel ``p`` of phase ``X``, the diameter of the largest disc inside ``X``
    that covers ``p``,

    .. math:: \\tau(p) = 2 \\max\\{ r : p \\in D(x, r) \\subseteq X \\}.

    Discretisation as in :func:`thickness_map`. Invalid pixels and the image border are
    walls of both phases. The distribution is area-weighted: each pixel is one sample.

    References
    ----------
    T. Hildebrand, P. Rüegsegger, "A new method for the model-independent assessment of
    thickness in three-dimensional images", J. Microsc. 185 (1997) 67-75.
    """
    px = _check_pixel(pixel)
    m, v = _check_mask(mask, valid)
    if isinstance(phases, str):
        phases = (phases,)
    bad = [p for p in phases if p not in PHASES]
    if bad or not phases:
        raise OptionError(f"phases must be among {PHASES}, got {phases!r}", param="phases")
    maps, mean = {}, {}
    for ph in PHASES:
        if ph not in phases:
            continue
        sel = (m if ph == "solid" else ~m) & v
        maps[ph] = thickness_map(sel, px)
        x = maps[ph][sel]
        mean[ph] = float(x.mean(dtype=np.float64)) if x.size else float("nan")
    top = max([float(np.nanmax(mp)) if np.isfinite(mp).any() else 0.0 for mp in maps.values()]
              + [px])
    nb = int(math.ceil(top / px + 1e-9)) + 1
    edges = np.arange(nb + 1) * px
    frac = {}
    for ph, mp in maps.items():
        x = mp[np.isfinite(mp)]
        c, _ = np.histogram(x, bins=edges)
        frac[ph] = c / max(x.size, 1)
    return Thickness2D(px, maps, mean, edges, frac)


# ========================================================================== S2
@dataclass
class S2Result:
    """Radially averaged two-point probability of the solid.

    Attributes
    ----------
    r : (n,) pair-weighted mean distance in each bin (nm); the first bin is r = 0
    s2 : (n,) probability that two valid pixels at that distance are both solid
    pairs : (n,) number of valid pixel pairs in each bin
    phi : S2(0), the area fraction
    pixel : nm
    """

    r: np.ndarray
    s2: np.ndarray
    pairs: np.ndarray
    phi: float
    pixel: float

    def to_dict(self) -> dict:
        return {"phi": float(self.phi), "pixel_nm": float(self.pixel),
                "r_max_nm": float(self.r[-1]) if self.r.size else 0.0,
                "n_bins": int(self.r.size)}

    def table(self) -> dict:
        return {"r_nm": self.r, "s2": self.s2, "pairs": self.pairs}


def s2_2d(mask, pixel, *, valid=None, r_max=None) -> S2Result:
    """Two-point probability ``S2(r)`` of the solid, radially averaged on bins one pixel
    wide: bin 0 is ``r = 0``, bin ``k`` holds the displacements with
    ``k - 1 < |d| / pixel <= k``.

    By FFT without wrap-around: the indicator ``I = mask & valid`` and the window ``W =
    valid`` are zero-padded (by at least ``r_max``), and at each displacement ``d``
    ``S2(d) = C_II(d) / C_WW(d)``, the fraction of the valid pixel pairs at ``d`` that are
    both solid; each bin averages ``S2(d)`` weighted by ``C_WW(d)``. ``S2(0)`` is the area
    fraction (Torquato, *Random Heterogeneous Materials*, Springer 2002, ch. 2; chapter
    from memory).

    ``r_max`` (nm): default half the smaller image side.
    """
    from scipy import fft as sfft

    px = _check_pixel(pixel)
    m, v = _check_mask(mask, valid)
    M, L = m.shape
    if r_max is None:
        rpx = max(1, (min(M, L) - 1) // 2)
    else:
        rr = positive(r_max, "r_max", param="r_max")
        rpx = int(min(math.floor(rr / px + 1e-9), max(M, L) - 1))
        rpx = max(rpx, 1)
    shape = (sfft.next_fast_len(M + rpx, real=True), sfft.next_fast_len(L + rpx, real=True))
    I = (m & v).astype(np.float64)
    W = v.astype(np.float64)
    FI = sfft.rfft2(I, s=shape, workers=budget())
    cI = sfft.irfft2(FI * np.conj(FI), s=shape, workers=budget())
    del FI
    if v.all():
        # C_WW of a full rectangle: (M - |dy|) (L - |dx|)
        cW = None
    else:
        FW = sfft.rfft2(W, s=shape, workers=budget())
        cW = sfft.irfft2(FW * np.conj(FW), s=shape, workers=budget())
        del FW
    ry = min(rpx, M - 1)
    rx = min(rpx, L - 1)
    iy = np.arange(-ry, ry + 1)
    ix = np.arange(-rx, rx + 1)
    sub = np.ix_(iy % shape[0], ix % shape[1])
    cI = cI[sub]
    if cW is None:
        cW = (M - np.abs(iy))[:, None] * (L - np.abs(ix))[None, :].astype(np.float64)
    else:
        cW = np.rint(cW[sub])
    R = np.sqrt(iy[:, None].astype(float) ** 2 + ix[None, :].astype(float) ** 2)
    ok = (cW > 0.5) & (R <= rpx + 1e-9)
    b = np.ceil(R[ok] - 1e-9).astype(np.int64)
    s = cI[ok] / cW[ok]
    w = cW[ok]
    nb = int(b.max()) + 1
    wsum = np.bincount(b, weights=w, minlength=nb)
    ssum = np.bincount(b, weights=s * w, minlength=nb)
    rsum = np.bincount(b, weights=R[ok] * w, minlength=nb)
    good = wsum > 0
    r = rsum[good] / wsum[good] * px
    S2 = np.clip(ssum[good] / wsum[good], 0.0, 1.0)
    return S2Result(r, S2, wsum[good], float(S2[0]), px)


# ================================================================= orientation
@dataclass
class Orientation2D:
    """Orientation of layered texture from the structure tensor.

    Attributes
    ----------
    angle : dominant orientation of the layers (degrees in [0, 180), counter-clockwise
        from +x as shown on screen); NaN when the image has no gradient
    coherence : weighted mean of the local coherence ``(l1 - l2) / (l1 + l2)``, each pixel
        weighted by its tensor trace ``w = l1 + l2`` (the smoothed squared gradient)
    order : nematic order ``<cos 2 (theta - angle)>`` of the local orientations,
        weighted by ``w`` (1: all layers parallel, 0: isotropic)
    sigma : integration scale (nm)
    bin_edges : (nb + 1,) degrees
    histogram : (nb,) fraction of the total weight ``w`` whose local orientation falls
        in each bin
    angle_map, coherence_map, weight_map : per-pixel local values (NaN where invalid)
    """

    angle: float
    coherence: float
    order: float
    sigma: float
    pixel: float
    bin_edges: np.ndarray = field(repr=False)
    histogram: np.ndarray = field(repr=False)
    angle_map: np.ndarray = field(default=None, repr=False)
    coherence_map: np.ndarray = field(default=None, repr=False)
    weight_map: np.ndarray = field(default=None, repr=False)

    def to_dict(self) -> dict:
        return {"angle_deg": _fnone(self.angle), "coherence": _fnone(self.coherence),
                "order": _fnone(self.order), "sigma_nm": float(self.sigma),
                "pixel_nm": float(self.pixel), "angle_convention":
                "degrees counter-clockwise from +x (columns), y up as shown on screen"}

    def table(self) -> dict:
        e = self.bin_edges
        width = np.diff(e)
        return {"angle_lower_deg": e[:-1], "angle_upper_deg": e[1:],
                "fraction": self.histogram,
                "density_per_deg": self.histogram / width}


#: Derivative scale of the default (Gaussian) gradient, pixels.
DERIVATIVE_PX = 1.0


def _gradients(g, derivative, derivative_px, mode="reflect"):
    """(d/drow, d/dcol) of a float image: Sobel / 8 or Gaussian derivatives."""
    from scipy import ndimage as ndi

    if derivative == "sobel":
        return (ndi.sobel(g, axis=0, mode=mode) / 8.0, ndi.sobel(g, axis=1, mode=mode) / 8.0)
    if derivative == "gaussian":
        s = positive(derivative_px, "derivative_px", param="derivative_px", unit="pixels")
        return (ndi.gaussian_filter(g, s, order=(1, 0), mode=mode, truncate=4.0),
                ndi.gaussian_filter(g, s, order=(0, 1), mode=mode, truncate=4.0))
    raise OptionError(f'derivative must be "gaussian" or "sobel", not {derivative!r}',
                      param="derivative")


def structure_tensor_2d(image, sigma_px: float, *, derivative: str = "gaussian",
                        derivative_px: float = DERIVATIVE_PX, mode: str = "reflect"):
    """Structure tensor ``(J_rr, J_rc, J_cc)`` of a 2D image: products of the derivatives
    along rows and columns, smoothed by a Gaussian of ``sigma_px`` pixels (the integration
    scale; Jähne, *Digital Image Processing*, Springer, ch. "Simple neighbourhoods").

    ``derivative="gaussian"`` (default): derivatives of a Gaussian of ``derivative_px``
    pixels, nearly isotropic, so the staircase of a digitised edge does not pull the
    orientation towards the image axes. ``derivative="sobel"``: the Sobel operator divided
    by 8 (a unit ramp has derivative 1); the construction of
    ``skimage.feature.structure_tensor``, which omits the 1/8.
    """
    from scipy import ndimage as ndi

    g = np.asarray(image, dtype=np.float64)
    dr, dc = _gradients(g, derivative, derivative_px, mode)
    out = []
    for a, b in ((dr, dr), (dr, dc), (dc, dc)):
        out.append(ndi.gaussian_filter(a * b, sigma_px, mode=mode, truncate=4.0)
                   if sigma_px > 0 else a * b)
    return tuple(out)


def orientation_2d(grey_or_mask, pixel, *, valid=None, sigma_nm=None,
                   bins: int = ORIENTATION_BINS, derivative: str = "gaussian",
                   derivative_px: float = DERIVATIVE_PX) -> Orientation2D:
    """Dominant layer orientation, coherence and nematic order of a 2D image from the
    structure tensor (Bigün & Granlund, Optimal orientation detection of linear symmetry,
    Proc. 1st Int. Conf. Computer Vision, London, 1987, 433-438; Jähne, *Digital Image
    Processing*, Springer; venue, pages and edition from memory).

    At each pixel the tensor ``J = G_sigma * (grad g grad g^T)`` (:func:`structure_tensor_2d`)
    has eigenvalues ``l1 >= l2``; the gradient lies along the first eigenvector and the
    layers run perpendicular to it. With ``x = column`` and ``y = -row`` (y up):

    * local layer angle ``theta = (1/2) atan2(2 J_xy, J_xx - J_yy) + 90 deg``;
    * local coherence ``(l1 - l2) / (l1 + l2)`` and weight ``w = l1 + l2`` (the trace:
      the squared gradient magnitude smoothed over the integration scale);
    * dominant angle ``theta_0`` from the unsmoothed tensor summed over the valid pixels
      (the ``w``-weighted mean of the doubled gradient angles);
    * ``order = sum w cos 2(theta - theta_0) / sum w``, ``coherence = sum w c / sum w``.

    ``sigma_nm``: integration scale (default 2 pixels). A bool mask is read as 0/1.
    Pixels whose derivative stencil reaches an invalid pixel are left out.
    """
    from scipy import ndimage as ndi

    px = _check_pixel(pixel)
    g = np.asarray(grey_or_mask)
    if g.ndim != 2:
        raise OptionError(f"the image must be 2D, not {g.ndim}D", param="image")
    if g.dtype.kind not in "biuf":
        raise OptionError(f"the image must be numeric, not {g.dtype}", param="image")
    g = g.astype(np.float64)
    if valid is None:
        v = np.ones(g.shape, dtype=bool)
    else:
        v = np.asarray(valid, dtype=bool)
        if v.shape != g.shape:
            raise OptionError(f"valid has shape {v.shape}, the image {g.shape}", param="valid")
    fin = np.isfinite(g)
    v = v & fin
    if not v.any():
        raise OptionError("no valid pixel to measure the orientation on", param="valid")
    sig = 2.0 if sigma_nm is None else float(sigma_nm) / px
    if not (math.isfinite(sig) and sig >= 0):
        raise OptionError(f"sigma_nm must be a non-negative length, not {sigma_nm!r}",
                          param="sigma_nm")
    try:
        nb = int(bins)
    except (TypeError, ValueError):
        raise OptionError(f"bins must be a whole number, not {bins!r}", param="bins") from None
    if nb < 1:
        raise OptionError(f"bins must be at least 1, not {bins!r}", param="bins")
    if v.all():
        w = np.ones(g.shape)
    else:
        # fill invalid pixels with the mean of the valid ones, and leave out the pixels
        # whose derivative stencil reaches them
        g = np.where(v, g, g[v].mean())
        reach = 1 if derivative == "sobel" else int(math.ceil(2.0 * float(derivative_px)))
        yy, xx = np.mgrid[-reach:reach + 1, -reach:reach + 1]
        w = ndi.binary_erosion(v, structure=(yy ** 2 + xx ** 2 <= reach * reach + reach),
                               border_value=1).astype(np.float64)
    dr, dc = _gradients(g, derivative, derivative_px)
    gx, gy = dc, -dr  # x = column, y = up = -row
    prods = (gx * gx * w, gx * gy * w, gy * gy * w)
    Jxx_t, Jxy_t, Jyy_t = (float(p.sum()) for p in prods)
    if sig > 0:
        Jxx, Jxy, Jyy = (ndi.gaussian_filter(p, sig, mode="reflect", truncate=4.0)
                         for p in prods)
    else:
        Jxx, Jxy, Jyy = prods
    E = Jxx + Jyy
    disc = np.sqrt((Jxx - Jyy) ** 2 + 4.0 * Jxy ** 2)
    sel = (w > 0) & (E > 1e-12 * max(float(E.max()), 1e-300))
    with np.errstate(invalid="ignore", divide="ignore"):
        coh = np.where(sel, disc / np.where(E > 0, E, 1.0), np.nan)
    th = np.mod(np.degrees(0.5 * np.arctan2(2.0 * Jxy, Jxx - Jyy)) + 90.0, 180.0)
    Et = Jxx_t + Jyy_t
    edges = np.linspace(0.0, 180.0, nb + 1)
    amap = np.where(sel, th, np.nan)
    emap = np.where(w > 0, E, np.nan)
    if not (Et > 0) or not sel.any():
        return Orientation2D(float("nan"), float("nan"), float("nan"), sig * px, px, edges,
                             np.zeros(nb), amap, coh, emap)
    th0 = float(np.mod(np.degrees(0.5 * math.atan2(2.0 * Jxy_t, Jxx_t - Jyy_t)) + 90.0,
                       180.0))
    We = E[sel]
    tw = We.sum()
    order = float(np.sum(We * np.cos(np.radians(2.0 * (th[sel] - th0)))) / tw)
    coherence = float(np.sum(We * coh[sel]) / tw)
    hist, _ = np.histogram(th[sel], bins=edges, weights=We)
    return Orientation2D(th0, coherence, order, sig * px, px, edges, hist / tw, amap, coh,
                         emap)


# ==================================================================== describe
@dataclass
class PlanarDescriptors:
    """All 2D descriptors of one binary image (:func:`describe`)."""

    pixel: float
    shape: tuple
    area: AreaFraction
    chords: Chords2D
    thickness: Thickness2D
    s2: S2Result
    orientation: Orientation2D
    seed: object = None

    def headline(self) -> dict:
        hd = self.chords.headline_direction()
        return {
            "area_fraction": float(self.area.area_fraction),
            "mean_chord_solid_nm": _fnone(self.chords.mean("solid", hd)),
            "mean_chord_pore_nm": _fnone(self.chords.mean("pore", hd)),
            "mean_thickness_solid_nm": _fnone(self.thickness.mean.get("solid", np.nan)),
            "mean_thickness_pore_nm": _fnone(self.thickness.mean.get("pore", np.nan)),
            "orientation_deg": _fnone(self.orientation.angle),
            "orientation_order": _fnone(self.orientation.order),
            "coherence": _fnone(self.orientation.coherence),
        }

    def to_dict(self) -> dict:
        d = self.headline()
        d.update({"pixel_nm": float(self.pixel), "shape": [int(s) for s in self.shape],
                  "area": self.area.to_dict(), "chords": self.chords.to_dict(),
                  "thickness": self.thickness.to_dict(), "s2": self.s2.to_dict(),
                  "orientation": self.orientation.to_dict()})
        return d

    def distributions(self, direction: str | None = None) -> dict:
        """{name: 1D array of nm values}: uncut chords of all directions pooled (or of one
        ``direction``: "rows", "cols", "random"), and the per-pixel local thickness
        (area-weighted samples)."""
        return {"chord_solid": self.chords.chords("solid", direction),
                "chord_pore": self.chords.chords("pore", direction),
                "thickness_solid": self.thickness.values("solid"),
                "thickness_pore": self.thickness.values("pore")}

    def weights(self, direction: str | None = None) -> dict:
        """Sample weights matching :meth:`distributions`: the chords' edge-correction
        weights (:class:`Chords2D`), ones for the thickness samples. Usable as
        ``u_weights``/``v_weights`` of ``scipy.stats.wasserstein_distance``."""
        d = self.distributions(direction)
        return {"chord_solid": self.chords.weights("solid", direction),
                "chord_pore": self.chords.weights("pore", direction),
                "thickness_solid": np.ones(d["thickness_solid"].size),
                "thickness_pore": np.ones(d["thickness_pore"].size)}


def describe(mask, pixel, *, valid=None, seed=None, n_lines: int = 2000,
             sigma_nm=None) -> PlanarDescriptors:
    """All descriptors of a binary image: :func:`area_fraction`, :func:`chords_2d`
    (rows, columns and ``n_lines`` random lines drawn with ``seed``),
    :func:`local_thickness_2d`, :func:`s2_2d` and :func:`orientation_2d` (of the mask)."""
    px = _check_pixel(pixel)
    m, v = _check_mask(mask, valid)
    vv = None if v.all() else v
    return PlanarDescriptors(
        pixel=px, shape=m.shape,
        area=area_fraction(m, vv),
        chords=chords_2d(m, px, valid=vv, n_lines=n_lines, seed=seed),
        thickness=local_thickness_2d(m, px, valid=vv),
        s2=s2_2d(m, px, valid=vv),
        orientation=orientation_2d(m, px, valid=vv, sigma_nm=sigma_nm),
        seed=seed)
