"""Growth kinetics from the ``born`` column: progress alpha(t), rate, characteristic times,
an Avrami (JMAK) fit, and the structure as it stood at a given progress or time.

*Progress* is the fraction of the final solid volume born by time ``t``::

    alpha(t) = sum(V_i for born_i <= t) / sum(V_i)

with ``V_i`` the volume (area x thickness) of prism ``i``. Where prisms overlap, their
overlap counts twice; grown structures have none, and :func:`progress` notes the
overlap-free assumption. The curve is a step function of the distinct birth times and
is given exactly at them.

The *rate* d alpha / dt is the volume born per time bin (uniform bins over the birth
times), divided by the total volume and the bin width, then smoothed with a Gaussian of
``smooth`` bins (the smoothed rate still integrates to 1 over the bins).

``t10``, ``t50``, ``t90`` are the first birth times at which alpha reaches 0.1, 0.5, 0.9.

The Avrami form alpha = 1 - exp(-(k (t - t0))^n) (Avrami, J. Chem. Phys. 7 (1939) 1103;
8 (1940) 212; 9 (1941) 177; Johnson & Mehl, Trans. AIME 135 (1939) 416; Kolmogorov, Izv.
Akad. Nauk SSSR Ser. Mat. 1 (1937) 355; the last two from memory) is fitted by least
squares of ln(-ln(1 - alpha)) against ln(t - t0) over 0.05 <= alpha <= 0.95, with ``t0``
the first birth time unless given. It is a description of the curve's shape, not
evidence of a nucleation-and-growth mechanism.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from ..errors import InputError, OptionError

PROGRESS_MARKS = (0.1, 0.5, 0.9)


def _born(structure) -> np.ndarray:
    cols = getattr(structure, "columns", None)
    if cols is None or "born" not in cols:
        raise InputError("has no 'born' column (birth time of each prism); growth kinetics and "
                         "--at-progress / --at-time need one", path=getattr(structure, "source", None))
    b = np.asarray(cols["born"], dtype=float)
    if not np.all(np.isfinite(b)):
        raise InputError("column 'born' has non-finite values", path=structure.source, param="born")
    return b


def time_unit(structure) -> str:
    """The unit of the ``born`` column from the file's metadata (``time_unit``), or ''."""
    md = getattr(structure, "metadata", {}) or {}
    return str(md.get("time_unit", md.get("born_unit", "")) or "")


@dataclass
class AvramiFit:
    """alpha = 1 - exp(-(k (t - t0))^n), fitted over ``alpha_range``."""

    n: float
    k: float
    t0: float
    r2: float
    n_points: int
    alpha_range: tuple

    def to_dict(self) -> dict:
        return {"n": self.n, "k_per_time": self.k, "t0": self.t0, "r2": self.r2,
                "n_points": self.n_points, "alpha_range": list(self.alpha_range)}

    def alpha(self, t) -> np.ndarray:
        x = np.clip(np.asarray(t, float) - self.t0, 0.0, None)
        return 1.0 - np.exp(-(self.k * x) ** self.n)


@dataclass
class Kinetics:
    """Progress curve of a structure.

    ``times``/``alpha``: the exact step curve at the distinct birth times (alpha after
    all prisms born at that time). ``bin_centres``/``rate``: the smoothed rate on uniform
    bins (per time unit). ``marks``: {"t10": ..., "t50": ..., "t90": ...}.
    """

    times: np.ndarray
    alpha: np.ndarray
    bin_centres: np.ndarray
    rate: np.ndarray
    rate_raw: np.ndarray
    marks: dict
    total_volume_nm3: float
    n_prisms: int
    unit: str
    smooth_bins: float
    avrami: AvramiFit | None
    notes: list = field(default_factory=list)

    def alpha_at(self, t) -> np.ndarray:
        """alpha at time(s) ``t`` (the step curve: prisms born at or before ``t``)."""
        i = np.searchsorted(self.times, np.asarray(t, float), side="right") - 1
        return np.where(i >= 0, self.alpha[np.clip(i, 0, None)], 0.0)

    def to_dict(self) -> dict:
        peak = int(np.argmax(self.rate)) if len(self.rate) else None
        return {
            "n_prisms": self.n_prisms,
            "total_volume_nm3": self.total_volume_nm3,
            "time_unit": self.unit,
            "first_birth": float(self.times[0]),
            "last_birth": float(self.times[-1]),
            "n_birth_times": int(len(self.times)),
            **{k: v for k, v in self.marks.items()},
            "peak_rate_per_time": float(self.rate[peak]) if peak is not None else None,
            "peak_rate_time": float(self.bin_centres[peak]) if peak is not None else None,
            "rate_bins": int(len(self.rate)),
            "smooth_bins": self.smooth_bins,
            "avrami": self.avrami.to_dict() if self.avrami else None,
            "notes": list(self.notes),
        }

    def table(self) -> dict:
        """The exact step curve: columns time, alpha."""
        return {"time": self.times, "alpha": self.alpha}

    def rate_table(self) -> dict:
        return {"time": self.bin_centres, "rate_per_time": self.rate, "rate_raw_per_time": self.rate_raw}


def _gauss_smooth(y: np.ndarray, sigma: float) -> np.ndarray:
    """Gaussian smoothing with reflecting ends (keeps the sum: the kernel is normalised and
    reflection returns what would leave the range)."""
    if sigma <= 0 or len(y) < 3:
        return y.copy()
    from scipy.ndimage import gaussian_filter1d
    return gaussian_filter1d(y, sigma, mode="reflect")


def _curve(born, vol):
    """Distinct birth times and alpha after each (cumulative volume in time order)."""
    order = np.argsort(born, kind="stable")
    tb = born[order]
    times, start = np.unique(tb, return_index=True)
    cum = np.cumsum(vol[order])
    last = np.r_[start[1:], len(tb)] - 1
    alpha = cum[last] / cum[-1]
    alpha[-1] = 1.0
    return times, alpha


def _time_at(times, alpha, p: float) -> float:
    """The first birth time at which alpha reaches ``p`` (the last one for p >= 1)."""
    if p >= 1:
        return float(times[-1])
    i = int(np.searchsorted(alpha, p - 1e-12, side="left"))
    return float(times[min(i, len(times) - 1)])


def fit_avrami(times, alpha, *, t0: float | None = None, alpha_range=(0.05, 0.95)) -> AvramiFit | None:
    """Least-squares Avrami fit of a progress curve (see the module docstring).

    Returns None when fewer than 3 points fall in ``alpha_range`` after ``t0``.
    """
    t = np.asarray(times, float)
    a = np.asarray(alpha, float)
    if t0 is None:
        t0 = float(t[0]) if len(t) else 0.0
    lo, hi = alpha_range
    keep = (a >= lo) & (a <= hi) & (t > t0)
    if keep.sum() < 3:
        return None
    x = np.log(t[keep] - t0)
    y = np.log(-np.log1p(-a[keep]))
    if not (np.all(np.isfinite(x)) and np.ptp(x) > 1e-9 * max(1.0, float(np.abs(x).max()))):
        return None
    n, c = np.polyfit(x, y, 1)
    pred = n * x + c
    ss = float(((y - y.mean()) ** 2).sum())
    r2 = 1.0 - float(((y - pred) ** 2).sum()) / ss if ss > 0 else float("nan")
    k = math.exp(c / n) if n != 0 else float("nan")
    return AvramiFit(float(n), float(k), float(t0), r2, int(keep.sum()), (float(lo), float(hi)))


def progress(structure, *, bins: int | None = None, smooth: float = 2.0,
             avrami: bool = True, t0: float | None = None) -> Kinetics:
    """Progress alpha(t), smoothed rate, t10/t50/t90 and an Avrami fit from ``born``.

    Parameters
    ----------
    structure : Structure with a ``born`` column
    bins : number of uniform time bins for the rate (default: about sqrt of the number of
        distinct birth times, 10 to 200)
    smooth : Gaussian smoothing of the rate, in bins (0: none)
    avrami : fit the Avrami form
    t0 : the Avrami time origin (default: the first birth time)
    """
    born = _born(structure)
    if len(born) == 0:
        raise InputError("holds no prisms; there is no growth to describe", path=structure.source)
    vol = np.asarray(structure.volumes, float)
    total = float(vol.sum())
    times, alpha = _curve(born, vol)
    marks = {f"t{int(round(100 * p))}": _time_at(times, alpha, p) for p in PROGRESS_MARKS}
    if bins is None:
        bins = int(np.clip(round(math.sqrt(len(times))), 10, 200))
    bins = int(bins)
    if not 1 <= bins <= 100_000:
        raise OptionError(f"--bins must be 1 to 100000, got {bins}", param="bins")
    if not (math.isfinite(smooth) and 0 <= smooth <= bins):
        raise OptionError(f"--smooth must be 0 to the number of bins ({bins}), got {smooth}"
                          + (" (with --bins 1 use --smooth 0 or 1)" if bins == 1 else ""),
                          param="smooth")
    if t0 is not None and not (math.isfinite(float(t0)) and float(t0) < float(born.max())):
        raise OptionError(f"--t0 must be a finite time before the last birth "
                          f"({float(born.max()):g}), got {t0!r}", param="t0")
    t_lo, t_hi = float(times[0]), float(times[-1])
    notes = ["alpha counts prism volumes; overlapping prisms would count twice "
             "(grown structures have no overlaps)"]
    if t_hi > t_lo:
        edges = np.linspace(t_lo, t_hi, bins + 1)
        w = edges[1] - edges[0]
        hist, _ = np.histogram(born, bins=edges, weights=vol)
        raw = hist / total / w
        rate = _gauss_smooth(raw, smooth)
        centres = 0.5 * (edges[1:] + edges[:-1])
    else:
        notes.append("all prisms share one birth time: no rate")
        raw = rate = centres = np.zeros(0)
    fit = fit_avrami(times, alpha, t0=t0) if avrami else None
    if avrami and fit is None:
        notes.append("Avrami fit skipped: fewer than 3 birth times with 0.05 <= alpha <= 0.95")
    return Kinetics(times, alpha, centres, rate, raw, marks, total, len(born), time_unit(structure),
                    float(smooth), fit, notes)


@dataclass
class Moment:
    """Which part of a structure :func:`structure_at` kept."""

    time: float
    progress: float
    requested: str
    n_prisms: int
    n_total: int

    def to_dict(self) -> dict:
        return {"time": self.time, "progress": self.progress, "requested": self.requested,
                "n_prisms": self.n_prisms, "n_total": self.n_total}


def check_moment(progress: float | None = None, time: float | None = None) -> None:
    """Refuse (OptionError) anything but exactly one of a progress in (0, 1] and a finite
    time; what :func:`structure_at` accepts, checked before any structure is read."""
    if (progress is None) == (time is None):
        raise OptionError("give either --at-progress or --at-time, not both", param="at")
    if progress is not None:
        p = float(progress)
        if not (math.isfinite(p) and 0 < p <= 1):
            raise OptionError(f"--at-progress must be a fraction in (0, 1], got {progress!r} "
                              f"(for a percentage divide by 100)", param="at_progress")
    elif not math.isfinite(float(time)):
        raise OptionError(f"--at-time must be a finite number, got {time!r}", param="at_time")


def structure_at(structure, *, progress: float | None = None, time: float | None = None):
    """The structure as it stood when its progress reached ``progress`` (0 < P <= 1) or at
    time ``time``: the prisms born at or before that moment.

    Returns ``(structure, Moment)``. The moment's time for a progress ``P`` is the first
    birth time at which alpha >= P (so the kept volume fraction is P or just above it).
    """
    check_moment(progress, time)
    born = _born(structure)
    if len(born) == 0:
        raise InputError("holds no prisms", path=structure.source)
    vol = np.asarray(structure.volumes, float)
    times, alpha = _curve(born, vol)
    if progress is not None:
        p = float(progress)
        t = _time_at(times, alpha, p)
        req = f"progress {p:g}"
    else:
        t = float(time)
        req = f"time {t:g}"
    keep = born <= t
    n = int(keep.sum())
    if n == 0:
        raise OptionError(f"no prism is born by time {t:g} (the first birth is at "
                          f"{float(born.min()):g}{' ' + time_unit(structure) if time_unit(structure) else ''})",
                          param="at_time")
    sub = structure.subset(keep) if n < len(born) else structure
    a = float(alpha[int(np.searchsorted(times, t, side="right")) - 1])
    return sub, Moment(t, a, req, n, len(born))
