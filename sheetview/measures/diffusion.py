"""Water that moves: a random-walk engine for NMR relaxation, pore-to-pore exchange and
transport in the pore space of a phase grid.

Walkers start uniformly in the water-filled phases (every code but OUTSIDE and SOLID, or
the phases given), diffuse with a diffusivity per pore class, are relaxed at each
solid–water interface with a surface relaxivity per interface, and carry a bulk T2.

Method
------
* **Steps.** Off-lattice walkers with a fixed time step ``dt``; each step moves a walker
  along x, then y, then z by ``±δ_c`` (independent random signs) with
  ``δ_c = sqrt(2 D_c dt)``: per axis a ±δ walk of variance ``2 D_c dt``, so
  ``<r²> = 6 D t`` in free space. The fastest class takes ``δ = step_fraction × voxel``
  (default 0.5). Walls are the faces of the non-water voxels (and the border of a closed
  grid); a walker is reflected specularly, so the normal motion at every face is exactly
  the one-dimensional ±δ walk.
* **Surface relaxation** (the Robin condition ``D ∂m/∂n = ρ m``, Brownstein & Tarr,
  Phys. Rev. A 19 (1979) 2446). Instead of killing walkers, each carries a weight,
  multiplied by ``1 − p`` at each wall hit (the expectation is that of the kill rule, the
  variance lower). For the ±δ walk, walkers within δ of a face that step towards it hit it
  at a rate ``c δ / (2 dt)`` per unit area, so ``p = ρ δ / D`` to first order (the 1D
  form of the rule ``p = (2/3) ρ δ / D`` of isotropic steps of length δ, Bergman, Dunn,
  Schwartz & Mitra, Phys. Rev. E 51 (1995) 3393; from memory). The finite-step
  correction used here, ``p = x / (1 + x/2)`` with ``x = ρ δ / D``, is derived from the
  flux balance of the discrete walk next to a wall (the absorbing limit ``p = 1``
  corresponds to a Dirichlet wall δ/2 behind the face); the Brownstein–Tarr series are
  matched to better than 1 % at the default step (docs/validation.md).
* **Walls as exact as the grid allows.** Voxel faces perpendicular to axis a cover
  ``∫|n_a| dA`` of a smooth surface (1.5 times its area on average for a sphere), so by
  default (``surface='smooth'``) each hit is weighted by ``1/|n|_1``, ``n`` the normal of
  the Gaussian-smoothed (σ = 1 voxel) wall indicator: flat axis-aligned walls keep their
  faces exactly, oblique and curved ones get their true area back to within about 1 %
  (a voxelised sphere). ``surface='voxel'`` takes the faces as they are (a voxel volume
  from tomography whose steps are real).
* **Classes of different diffusivity** meet at water–water faces. From the faster class a
  walker crosses with probability ``δ_slow / δ_fast`` (the remainder of its step scaled
  by the same ratio), from the slower always: the fluxes across the face balance at
  uniform density (the interface rule of Hoteit, Mose, Younes, Lehmann & Ackerer,
  Math. Geol. 34 (2002) 435; from memory), so water keeps a uniform density.
* **Bulk relaxation** is the exact factor ``exp(−t/T2,bulk)`` on every weight.
* **Random numbers.** Each walker has its own xorshift64* stream seeded from the user's
  ``seed`` and its index (splitmix64): results do not depend on the number of threads.

The magnetisation ``M(t)`` is the mean weight; its T2 spectrum comes from a non-negative
Tikhonov inversion (:func:`invert_t2`). What the numbers are: predictions for the
simulated structure with the stated relaxivities and diffusivities, not measurements.
Published ranges: ρ2 of white cement pastes a few 1e-3 nm/µs (McDonald, Korb, Mitchell &
Monteilhet, Phys. Rev. E 72 (2005) 011409, from memory); bulk water D = 2.299e-9 m²/s at
25 °C (Mills, J. Phys. Chem. 77 (1973) 685, from memory), lower in confinement; interlayer
water in C-S-H is much slower than bulk, but no value was verified here, so the default is
bulk water with a note (give ``diffusivity_nm2_per_us={'interlayer': ...}``).
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from ..errors import MemoryLimitError, OptionError
from ..grid import OUTSIDE, PHASE_ALIASES, SOLID, available_memory
from . import _walk
from .relaxation import DEFAULT_RHO2_NM_PER_US, DEFAULT_T2_BULK_S, relaxation_spectrum

#: Self-diffusion coefficient of bulk water at 25 °C, nm²/µs (2.299e-9 m²/s; Mills,
#: J. Phys. Chem. 77 (1973) 685; from memory, widely quoted).
D_BULK_WATER_NM2_PER_US = 2299.0
#: Per-axis step of the fastest class, in voxels (the smallest voxel edge).
DEFAULT_STEP_FRACTION = 0.5
#: Walkers of a relaxation or exchange run.
DEFAULT_WALKERS = 20_000
#: Walkers of a transport run.
DEFAULT_TRANSPORT_WALKERS = 10_000
#: A relaxation run stops when M(t) falls below this fraction.
DEFAULT_M_STOP = 0.01
#: Most time steps per walker of one run (about 4e9 walker steps with the default walkers).
DEFAULT_MAX_STEPS = 200_000
#: Records (time points) per decade of steps.
RECORDS_PER_DECADE = 40
#: Bytes per walker: voxel indices and places (48), class, start class (2), weight (8),
#: periodic images (24), generator (8), start position (24), with slack.
BYTES_PER_WALKER = 128
#: Batches of walkers for the standard errors of a transport run.
NBATCH = 20
#: Walker steps of one call below which the kernel runs on one thread.
SERIAL_BELOW = 2_000_000
#: Bytes per voxel added by the run: the uint8 surface-area factor.
BYTES_PER_VOXEL = 1

NOTE_PREDICTION = ("predictions for the simulated structure with the stated relaxivities and "
                   "diffusivities, not measurements")


# ============================================================== set-up
@dataclass
class _Engine:
    lab: np.ndarray          # flattened labels
    shape: np.ndarray        # int64 (3,)
    spacing: np.ndarray      # (3,) nm
    periodic: bool
    lut: np.ndarray          # int8 (256,), class of a code, -1 for walls
    classes: list            # class names
    codes: list              # code of each class
    diffusivity: np.ndarray  # (K,) nm²/us
    dt: float                # us
    step: np.ndarray         # (K, 3) voxels
    xtab: np.ndarray         # (K, 256) rho delta / D
    trans: np.ndarray        # (K, K)
    scale: np.ndarray        # (K, K)
    area: np.ndarray         # uint8 flat (or size-1 dummy)
    use_area: bool
    d0: float                # reference (bulk) diffusivity, nm²/us
    settings: dict
    notes: list


def _code_of(p, names) -> int:
    if isinstance(p, (int, np.integer)) and not isinstance(p, bool):
        if not 0 <= int(p) <= 255:
            raise OptionError(f"phase code {p} is out of range 0-255", param="water_phases")
        return int(p)
    key = str(p).strip().lower()
    for code, name in names.items():
        if str(name).lower() == key:
            return int(code)
    if key in PHASE_ALIASES:
        return PHASE_ALIASES[key]
    raise OptionError(f"unknown phase {p!r}: expected a code 0-255 or one of "
                      f"{sorted(str(n) for n in names.values())}", param="water_phases")


def _positive(v, what, param, unit, allow_zero=False):
    try:
        x = float(v)
    except (TypeError, ValueError):
        raise OptionError(f"{what} must be a number ({unit}), got {v!r}", param=param) from None
    if not math.isfinite(x) or x < 0 or (x == 0 and not allow_zero):
        kind = "non-negative" if allow_zero else "positive"
        raise OptionError(f"{what} must be a {kind} number ({unit}), got {v!r}", param=param)
    return x


def _build(grid, *, water_phases, diffusivity_nm2_per_us, d_bulk_nm2_per_us, rho2_nm_per_us,
           rho2_outside_nm_per_us, rho2_by_interface, step_fraction, surface, relax=True,
           n_walkers=0, extra_bytes_per_walker=0, max_memory=None) -> _Engine:
    labels = np.ascontiguousarray(grid.labels)
    names = dict(grid.names)
    present = np.flatnonzero(np.bincount(labels.ravel(), minlength=256))
    for c in present:
        names.setdefault(int(c), f"phase_{int(c)}")
    if water_phases is None:
        codes = [int(c) for c in present if c not in (OUTSIDE, SOLID)]
    else:
        codes = sorted({_code_of(p, names) for p in np.atleast_1d(np.asarray(water_phases,
                                                                             dtype=object))})
        if OUTSIDE in codes:
            raise OptionError("OUTSIDE (code 0) cannot hold water", param="water_phases")
        codes = [c for c in codes if c in present]
    if not codes:
        raise OptionError("the grid has no water-filled voxels (no phase other than outside "
                          "and solid): nothing to walk in", param="water_phases",
                          path=grid.source)
    classes = [str(names[c]) for c in codes]
    notes = [f"these are {NOTE_PREDICTION}"]
    d_bulk = _positive(d_bulk_nm2_per_us, "bulk water diffusivity", "d_bulk_nm2_per_us",
                       "nm²/µs")
    dmap = dict(diffusivity_nm2_per_us or {})
    for k in dmap:
        if str(k) not in classes:
            raise OptionError(f"diffusivity given for {k!r}, which is not a water class of "
                              f"this grid ({classes})", param="diffusivity_nm2_per_us")
    D = np.array([_positive(dmap.get(n, d_bulk), f"diffusivity of {n}",
                            "diffusivity_nm2_per_us", "nm²/µs") for n in classes])
    if "interlayer" in classes and "interlayer" not in dmap:
        notes.append("interlayer water diffuses at the bulk water rate here (no published "
                     "value was verified; water in C-S-H interlayers is much slower than "
                     "bulk): give diffusivity_nm2_per_us={'interlayer': ...}")
    frac = _positive(step_fraction, "step fraction", "step_fraction", "voxels")
    if frac > 0.9:
        raise OptionError(f"step fraction must be at most 0.9 voxel (a step crosses at most "
                          f"one face), got {frac}", param="step_fraction")
    sp = np.asarray(grid.spacing, float)
    delta_max = frac * float(sp.min())
    dt = delta_max ** 2 / (2.0 * float(D.max()))
    delta = np.sqrt(2.0 * D * dt)
    step = delta[:, None] / sp[None, :]
    K = len(classes)
    lut = np.full(256, -1, np.int8)
    for i, c in enumerate(codes):
        lut[c] = i
    rho = _positive(rho2_nm_per_us, "surface relaxivity", "rho2_nm_per_us", "nm/µs",
                    allow_zero=True)
    rho_out = rho if rho2_outside_nm_per_us is None else _positive(
        rho2_outside_nm_per_us, "relaxivity of the domain wall", "rho2_outside_nm_per_us",
        "nm/µs", allow_zero=True)
    rtab = np.zeros((K, 256))
    if relax:
        rtab[:, :] = rho
        rtab[:, OUTSIDE] = rho_out
        for key, val in dict(rho2_by_interface or {}).items():
            try:
                wname, sname = (str(key).split("/") if isinstance(key, str) else key)
            except ValueError:
                raise OptionError(f"interface {key!r}: expected 'water/wall', e.g. "
                                  f"'interlayer/solid'", param="rho2_by_interface") from None
            if str(wname) not in classes:
                raise OptionError(f"interface {key!r}: {wname!r} is not a water class "
                                  f"({classes})", param="rho2_by_interface")
            scode = _code_of(sname, names)
            if lut[scode] >= 0:
                raise OptionError(f"interface {key!r}: {sname!r} holds water, not a wall",
                                  param="rho2_by_interface")
            rtab[classes.index(str(wname)), scode] = _positive(
                val, f"relaxivity of {key}", "rho2_by_interface", "nm/µs", allow_zero=True)
    for i in range(K):
        rtab[i, codes] = 0.0
    xtab = rtab * (delta / D)[:, None]
    if xtab.max() > 1.0:
        fit = frac / xtab.max()
        raise OptionError(f"the step is too long for the relaxivity: ρδ/D = {xtab.max():.3g} "
                          f"(a wall hit would remove over 2/3 of a walker's weight); a step "
                          f"fraction of {fit:.3g} voxel or less fits", param="step_fraction")
    trans = np.minimum(1.0, delta[None, :] / delta[:, None])
    scale = delta[None, :] / delta[:, None]
    key = str(surface).lower()
    if key not in ("smooth", "voxel"):
        raise OptionError(f"surface must be 'smooth' or 'voxel', got {surface!r}",
                          param="surface")
    use_area = relax and key == "smooth" and xtab.max() > 0
    nvox = labels.size
    need = int(n_walkers) * (BYTES_PER_WALKER + int(extra_bytes_per_walker)) + \
        (nvox * BYTES_PER_VOXEL if use_area else 0)
    limit = available_memory() // 2 if max_memory is None else int(max_memory)
    if need > limit:
        per = BYTES_PER_WALKER + int(extra_bytes_per_walker)
        fit = max(0, (limit - (nvox * BYTES_PER_VOXEL if use_area else 0)) // per)
        raise MemoryLimitError(
            f"{n_walkers} walkers on a {labels.shape[0]} x {labels.shape[1]} x "
            f"{labels.shape[2]} grid need about {need / 2**30:.2f} GiB ({per} bytes per walker"
            f"{', 1 byte per voxel' if use_area else ''}), over the limit of "
            f"{limit / 2**30:.2f} GiB; {fit} walkers would fit", param="n_walkers")
    if use_area:
        ww = np.ones(256)
        ww[codes] = 0.0
        area = np.empty(labels.shape, np.uint8)
        _walk.area_factor(labels, lut, bool(grid.periodic), sp, ww, area)
        area = area.ravel()
    else:
        area = np.full(1, 255, np.uint8)
    settings = {"water_classes": classes, "water_codes": codes,
                "diffusivity_nm2_per_us": {n: float(d) for n, d in zip(classes, D)},
                "d_bulk_nm2_per_us": d_bulk, "step_fraction_voxel": frac,
                "step_nm": {n: float(d) for n, d in zip(classes, delta)},
                "dt_us": dt, "surface": key, "periodic": bool(grid.periodic),
                "spacing_nm": [float(v) for v in sp]}
    if relax:
        settings.update({"rho2_nm_per_us": rho, "rho2_outside_nm_per_us": rho_out,
                         "rho2_by_interface": {str(k): float(v) for k, v in
                                               dict(rho2_by_interface or {}).items()},
                         "kill_rule": "weight x (1 - p), p = x/(1 + x/2), x = rho delta/D "
                                      "x area factor"})
    return _Engine(labels.ravel(), np.asarray(labels.shape, np.int64), sp,
                   bool(grid.periodic), lut, classes, codes, D, dt, step, xtab, trans, scale,
                   area, use_area, d_bulk, settings, notes)


class _Walkers:
    """The state of ``n`` walkers, placed uniformly in the water."""

    def __init__(self, eng: _Engine, n: int, seed):
        try:
            n = int(n)
        except (TypeError, ValueError):
            raise OptionError(f"number of walkers must be an integer, got {n!r}",
                              param="n_walkers") from None
        if n < 1:
            raise OptionError(f"number of walkers must be at least 1, got {n}",
                              param="n_walkers")
        try:
            seed = int(seed)
        except (TypeError, ValueError):
            raise OptionError(f"seed must be an integer, got {seed!r}", param="seed") from None
        self.n = n
        self.rng = _walk.seed_states(np.uint64(seed % 2 ** 64), n)
        self.ix = np.empty(n, np.int64)
        self.iy = np.empty(n, np.int64)
        self.iz = np.empty(n, np.int64)
        self.fx = np.empty(n)
        self.fy = np.empty(n)
        self.fz = np.empty(n)
        self.cls = np.empty(n, np.int8)
        lab3 = eng.lab.reshape(tuple(eng.shape))
        water = eng.lut[eng.lab] >= 0 if eng.lab.size <= 1 << 22 else None
        frac = float(water.mean()) if water is not None else None
        if frac is None:
            # sample the water fraction cheaply to decide on rejection sampling
            sub = eng.lab[:: max(1, eng.lab.size // (1 << 20))]
            frac = float((eng.lut[sub] >= 0).mean())
        pool = np.empty(0, np.int64)
        if frac < 0.02:
            pool = np.flatnonzero(eng.lut[eng.lab] >= 0).astype(np.int64)
        _walk.place_uniform(lab3, eng.lut, self.rng, self.ix, self.iy, self.iz, self.fx,
                            self.fy, self.fz, self.cls, pool)
        self.start = self.cls.copy()
        self.wt = np.ones(n)
        self.img = np.zeros((n, 3), np.int64)
        self.x0 = np.stack([self.ix + self.fx, self.iy + self.fy, self.iz + self.fz], axis=1)

    def advance(self, eng: _Engine, nsteps: int):
        if nsteps > 0:
            fn = _walk.advance if nsteps * self.n >= SERIAL_BELOW else _walk.advance_serial
            fn(eng.lab, eng.shape, eng.periodic, eng.lut, eng.step, eng.xtab,
                          eng.area, eng.use_area, eng.trans, eng.scale, self.ix, self.iy,
                          self.iz, self.fx, self.fy, self.fz, self.cls, self.wt, self.img,
                          self.rng, int(nsteps))


def _record_steps(max_steps: int, per_decade: int = RECORDS_PER_DECADE) -> np.ndarray:
    n = max(2, int(math.ceil(per_decade * math.log10(max(max_steps, 10)))) + 1)
    return np.unique(np.rint(np.geomspace(1, max_steps, n)).astype(np.int64))


def _steps_of(eng, t_max_us, max_steps):
    ms = _positive(max_steps, "most steps per walker", "max_steps", "steps")
    ms = int(ms)
    if t_max_us is not None:
        t = _positive(t_max_us, "simulated time", "t_max_us", "µs")
        ms = min(ms, max(1, int(math.ceil(t / eng.dt))))
    return ms


def _face_rates(eng) -> np.ndarray:
    """Fast-diffusion relaxation rate (1/µs) of each class from its wall faces:
    rho × (area-weighted face area) / volume (an estimate for planning the run)."""
    K = len(eng.classes)
    delta = eng.step[:, 0] * eng.spacing[0]
    rtab = eng.xtab * (eng.diffusivity / delta)[:, None]
    s, cnt = _walk.face_sums(eng.lab.reshape(tuple(eng.shape)), eng.lut, eng.periodic, rtab,
                             eng.area, eng.use_area, eng.spacing, K)
    vol = cnt * float(np.prod(eng.spacing))
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(vol > 0, s / np.maximum(vol, 1e-300), 0.0)


# ============================================================== T2 inversion
@dataclass
class T2Inversion:
    """A T2 distribution from a decay by non-negative Tikhonov inversion.

    Attributes
    ----------
    t2_s : (n,) bin centres (geometric), seconds
    edges_s : (n + 1,) bin edges, seconds
    amplitude : (n,) signal fraction per bin (sums to the fitted M(0))
    amplitude_by_class : class -> (n,) the same for the decay of the walkers that started in
        that class (same regularisation)
    alpha : the regularisation weight chosen
    rule : how it was chosen (discrepancy principle, L-curve corner, or given)
    residual_rms : RMS misfit of the fit to the decay
    lcurve : (m, 3) array of alpha, residual norm, solution norm over the values tried
    """

    t2_s: np.ndarray
    edges_s: np.ndarray
    amplitude: np.ndarray
    amplitude_by_class: dict
    alpha: float
    rule: str
    residual_rms: float
    lcurve: np.ndarray

    def logmean_s(self, amp=None) -> float:
        """Geometric mean T2 (s) of a distribution (the total by default)."""
        w = self.amplitude if amp is None else amp
        s = float(np.sum(w))
        return float(np.exp(np.sum(w * np.log(self.t2_s)) / s)) if s > 0 else float("nan")

    def table(self) -> dict:
        d = {"t2_s": self.t2_s.tolist(), "t2_ms": (self.t2_s * 1e3).tolist(),
             "fraction": self.amplitude.tolist()}
        for k, v in self.amplitude_by_class.items():
            d[f"fraction_{k}"] = np.asarray(v).tolist()
        return d

    def to_dict(self) -> dict:
        lm = {k: _ms(self.logmean_s(v)) for k, v in self.amplitude_by_class.items()}
        return {"t2_logmean_ms": _ms(self.logmean_s()), "class_t2_logmean_ms": lm,
                "class_fraction": {k: float(np.sum(v)) for k, v in
                                   self.amplitude_by_class.items()},
                "alpha": float(self.alpha), "rule": self.rule,
                "residual_rms": float(self.residual_rms), **self.table()}

    def __repr__(self) -> str:
        return (f"T2Inversion({self.t2_s.size} bins, T2 logmean "
                f"{self.logmean_s() * 1e3:.4g} ms, alpha={self.alpha:.3g})")


def _ms(v):
    return float(v) * 1e3 if v is not None and math.isfinite(v) else None


def _nnls_tikhonov(Kmat, y, alpha):
    from scipy.optimize import nnls
    n = Kmat.shape[1]
    A = np.vstack([Kmat, alpha * np.eye(n)])
    b = np.concatenate([y, np.zeros(n)])
    f, _ = nnls(A, b, maxiter=50 * n)
    return f


def _lcurve_corner(res, sol):
    """Index of the point of maximum curvature of the L-curve (log residual norm, log
    solution norm) (Hansen, SIAM Rev. 34 (1992) 561; Hansen & O'Leary, SIAM J. Sci. Comput.
    14 (1993) 1487), by finite differences over the values tried."""
    x = np.log(np.maximum(res, 1e-300))
    y = np.log(np.maximum(sol, 1e-300))
    if x.size < 3:
        return 0
    s = np.r_[0.0, np.cumsum(np.hypot(np.diff(x), np.diff(y)))]
    if s[-1] <= 0:
        return 0
    # parametrise by arc length so uneven alpha spacing does not bias the curvature
    dx = np.gradient(x, s, edge_order=1)
    dy = np.gradient(y, s, edge_order=1)
    ddx = np.gradient(dx, s, edge_order=1)
    ddy = np.gradient(dy, s, edge_order=1)
    kappa = (dx * ddy - dy * ddx) / np.maximum((dx * dx + dy * dy) ** 1.5, 1e-300)
    kappa[0] = kappa[-1] = -np.inf
    return int(np.argmax(kappa))


def t2_bin_edges(t2_range_s=(1e-6, 10.0), per_decade: int = 20) -> np.ndarray:
    """T2 bin edges (s) as :func:`sheetview.measures.relaxation.relaxation_spectrum` makes
    them by default (log-spaced, ``per_decade`` bins per decade), so the spectra line up."""
    lo, hi = float(t2_range_s[0]), float(t2_range_s[1])
    if not 0 < lo < hi:
        raise OptionError(f"T2 range must satisfy 0 < min < max, got {t2_range_s!r}",
                          param="t2_range_s")
    return np.geomspace(lo, hi, int(round(per_decade * math.log10(hi / lo))) + 1)


def _aligned_edges(lo, hi, t2_range_s, per_decade):
    """Bin edges on the log grid of :func:`t2_bin_edges` (the same edges where they
    overlap) covering [lo, hi] (s)."""
    base = t2_bin_edges(t2_range_s, per_decade)
    ratio = base[1] / base[0]
    k0 = math.floor(math.log(lo / base[0]) / math.log(ratio))
    k1 = math.ceil(math.log(hi / base[0]) / math.log(ratio))
    return base[0] * ratio ** np.arange(k0, k1 + 1, dtype=float)


def invert_t2(t_s, m, *, sigma=None, m_by_class=None, edges_s=None, alpha=None,
              n_alpha: int = 30, t2_range_s=(1e-6, 10.0), per_decade: int = 20) -> T2Inversion:
    """T2 distribution of a decay ``m(t)`` by non-negative Tikhonov inversion.

    Solves ``min_f ||K f − m||² + α² ||f||²`` with ``f ≥ 0`` and
    ``K[i, j] = exp(−t_i / T2_j)`` (T2_j the geometric bin centres) as a non-negative least
    squares problem on the augmented system ``[K; α I] f = [m; 0]`` (scipy ``nnls``), the
    usual form of the regularised inversion of multi-exponential decays (e.g.
    Venkataramanan, Song & Hürlimann, IEEE Trans. Signal Process. 50 (2002) 1017). The
    weight α is taken from ``n_alpha`` values from 1e-7 to 1e-1 times the largest singular
    value of K by a stated rule:

    * with ``sigma`` (the standard errors of ``m``, as a walk gives them): the discrepancy
      principle (Morozov 1966): the largest α whose residual norm ``||K f − m||`` does not
      exceed ``||sigma||``;
    * without: the corner of the L-curve, the point of maximum curvature of log residual
      norm against log solution norm (Hansen, SIAM Rev. 34 (1992) 561);
    * or ``alpha`` given.

    Parameters
    ----------
    t_s : (n,) times, seconds
    m : (n,) decay (M(0) = 1 for a normalised decay)
    sigma : (n,) or float, optional, standard errors of ``m``
    m_by_class : dict, optional
        class -> (n,) partial decays, inverted with the same α
    edges_s : T2 bin edges (s); default the log grid of ``relaxation_spectrum`` (20 per
        decade, the same edges), over the span the decay can resolve (from a tenth of the
        first time point to ten times the last)
    alpha : float, optional
        Regularisation weight; None picks it by the rule above.
    """
    t = np.asarray(t_s, float)
    y = np.asarray(m, float)
    if t.ndim != 1 or t.shape != y.shape or t.size < 3:
        raise OptionError("the decay needs at least three points, times and values of the "
                          "same length", param="m")
    if edges_s is None:
        lo, hi = 0.1 * max(t[t > 0].min(), 1e-15), 10.0 * t.max()
        edges = _aligned_edges(lo, hi, t2_range_s, per_decade)
    else:
        edges = np.asarray(edges_s, float)
        if edges.ndim != 1 or edges.size < 2 or np.any(np.diff(edges) <= 0) or edges[0] <= 0:
            raise OptionError("T2 bin edges must be positive and increasing", param="edges_s")
    t2 = np.sqrt(edges[:-1] * edges[1:])
    Kmat = np.exp(-t[:, None] / t2[None, :])
    if alpha is None:
        smax = float(np.linalg.norm(Kmat, 2))
        alphas = np.geomspace(1e-7 * smax, 1e-1 * smax, int(n_alpha))[::-1]
        res, sol, fs = [], [], []
        for a in alphas:
            f = _nnls_tikhonov(Kmat, y, a)
            fs.append(f)
            res.append(float(np.linalg.norm(Kmat @ f - y)))
            sol.append(float(np.linalg.norm(f)))
        res = np.array(res)
        if sigma is not None:
            s = np.broadcast_to(np.asarray(sigma, float), y.shape)
            target = float(np.linalg.norm(s))
            ok = np.flatnonzero(res <= target)
            k = int(ok[0]) if ok.size else int(np.argmin(res))
            rule = "discrepancy principle (residual norm <= norm of the standard errors)"
        else:
            k = _lcurve_corner(res, np.array(sol))
            rule = "L-curve corner (maximum curvature)"
        a_best, f_best = float(alphas[k]), fs[k]
        lc = np.column_stack([alphas, res, sol])
    else:
        a_best = _positive(alpha, "regularisation weight", "alpha", "", allow_zero=True)
        f_best = _nnls_tikhonov(Kmat, y, a_best)
        rule = "given"
        lc = np.array([[a_best, float(np.linalg.norm(Kmat @ f_best - y)),
                        float(np.linalg.norm(f_best))]])
    by = {}
    for k, v in dict(m_by_class or {}).items():
        by[k] = _nnls_tikhonov(Kmat, np.asarray(v, float), a_best)
    rms = float(np.sqrt(np.mean((Kmat @ f_best - y) ** 2)))
    return T2Inversion(t2, edges, f_best, by, a_best, rule, rms, lc)


# ============================================================== relaxation walk
@dataclass
class ExchangeResult:
    """Where the walkers that started in each class are after time t.

    Attributes
    ----------
    t_us : (n,) times, µs
    classes : class names
    fraction : (n, K, K) ``fraction[t, i, j]`` = share of the walkers that started in class
        i found in class j at time t (rows sum to 1)
    start_fraction : (K,) share of the walkers that started in each class (the water volume
        fractions, to sampling error)
    n_walkers : walkers
    """

    t_us: np.ndarray
    classes: list
    fraction: np.ndarray
    start_fraction: np.ndarray
    n_walkers: int
    notes: list = field(default_factory=list)

    def table(self) -> dict:
        d = {"t_us": self.t_us.tolist(), "t_ms": (self.t_us * 1e-3).tolist()}
        for i, a in enumerate(self.classes):
            for j, b in enumerate(self.classes):
                d[f"from_{a}_in_{b}"] = self.fraction[:, i, j].tolist()
        return d

    def mixing_time_us(self, level: float = 0.5) -> dict:
        """Time (µs) when the share of walkers that left their start class first reaches
        ``level`` × its equilibrium value (1 − the class's water fraction), per class; None
        when not reached in the run."""
        out = {}
        for i, a in enumerate(self.classes):
            eq = 1.0 - float(self.start_fraction[i])
            left = 1.0 - self.fraction[:, i, i]
            hit = np.flatnonzero(left >= level * eq) if eq > 0 else np.array([], int)
            out[a] = float(self.t_us[hit[0]]) if hit.size else None
        return out

    def to_dict(self) -> dict:
        return {"classes": list(self.classes), "n_walkers": int(self.n_walkers),
                "start_fraction": {a: float(v) for a, v in zip(self.classes,
                                                                self.start_fraction)},
                "half_mixing_time_us": self.mixing_time_us(0.5), "notes": list(self.notes),
                **self.table()}

    def __repr__(self) -> str:
        return (f"ExchangeResult({len(self.classes)} classes, {self.t_us.size} times to "
                f"{self.t_us[-1]:.4g} µs)")


@dataclass
class RelaxationWalkResult:
    """Magnetisation decay of the water in a phase grid from a random walk.

    Attributes
    ----------
    t_us : (n,) times, µs (t = 0 first)
    m : (n,) M(t)/M(0), bulk relaxation included
    m_se : (n,) its standard error over the walkers
    m_by_class : class -> (n,) contribution of the walkers that started in the class
        (they add up to ``m``)
    spectrum : :class:`T2Inversion` of ``m`` (and of each class's contribution)
    exchange : :class:`ExchangeResult`
    fast : the fast-diffusion prediction of
        :func:`sheetview.measures.relaxation.relaxation_spectrum` on the same bins, or None
    settings, notes
    """

    t_us: np.ndarray
    m: np.ndarray
    m_se: np.ndarray
    m_by_class: dict
    spectrum: T2Inversion | None
    exchange: ExchangeResult
    fast: object
    n_walkers: int
    steps: int
    settings: dict
    notes: list = field(default_factory=list)

    @property
    def t_end_us(self) -> float:
        return float(self.t_us[-1])

    def table(self) -> dict:
        """The decay: t (µs, ms), M and the contribution of each start class."""
        d = {"t_us": self.t_us.tolist(), "t_ms": (self.t_us * 1e-3).tolist(),
             "m": self.m.tolist(), "m_se": self.m_se.tolist()}
        for k, v in self.m_by_class.items():
            d[f"m_{k}"] = np.asarray(v).tolist()
        return d

    def spectrum_table(self) -> dict:
        """The walk's T2 spectrum beside the fast-diffusion one of ``relax`` (same bins when
        both exist)."""
        if self.spectrum is None:
            return {}
        d = self.spectrum.table()
        if self.fast is not None and np.allclose(self.fast.edges, self.spectrum.edges_s):
            d["fast_diffusion_fraction"] = self.fast.total.tolist()
        return d

    def tables(self) -> dict:
        return {"decay": self.table(), "t2_spectrum": self.spectrum_table(),
                "exchange": self.exchange.table()}

    def comparison(self) -> dict:
        """Geometric-mean T2 (ms) per class from the walk and from the fast-diffusion model,
        and the shift log10(walk / fast) in decades."""
        out = {}
        if self.spectrum is None or self.fast is None:
            return out
        for k, amp in self.spectrum.amplitude_by_class.items():
            w = self.spectrum.logmean_s(amp)
            f = self.fast.class_t2_logmean.get(k, float("nan"))
            out[k] = {"walk_ms": _ms(w), "fast_diffusion_ms": _ms(f),
                      "shift_decades": (float(np.log10(w / f)) if w > 0 and f > 0 and
                                        math.isfinite(w) and math.isfinite(f) else None)}
        w, f = self.spectrum.logmean_s(), self.fast.logmean()
        out["all"] = {"walk_ms": _ms(w), "fast_diffusion_ms": _ms(f),
                      "shift_decades": (float(np.log10(w / f)) if w > 0 and f > 0 else None)}
        return out

    def to_dict(self) -> dict:
        return {"n_walkers": int(self.n_walkers), "steps_per_walker": int(self.steps),
                "t_end_us": self.t_end_us, "m_end": float(self.m[-1]),
                "t2_logmean_ms": (_ms(self.spectrum.logmean_s()) if self.spectrum else None),
                "comparison_with_fast_diffusion": self.comparison(),
                "spectrum": self.spectrum.to_dict() if self.spectrum else None,
                "exchange": self.exchange.to_dict(),
                "settings": dict(self.settings), "notes": list(self.notes),
                "decay": self.table()}

    def __repr__(self) -> str:
        lm = self.spectrum.logmean_s() * 1e3 if self.spectrum else float("nan")
        return (f"RelaxationWalkResult({self.n_walkers} walkers, t_end={self.t_end_us:.4g} µs, "
                f"M_end={self.m[-1]:.3g}, T2 logmean {lm:.4g} ms)")


def relaxation_walk(grid, *, n_walkers: int = DEFAULT_WALKERS, seed: int = 0,
                    rho2_nm_per_us: float = DEFAULT_RHO2_NM_PER_US,
                    rho2_outside_nm_per_us: float | None = None,
                    rho2_by_interface: dict | None = None,
                    t2_bulk_s: float | None = DEFAULT_T2_BULK_S,
                    diffusivity_nm2_per_us: dict | None = None,
                    d_bulk_nm2_per_us: float = D_BULK_WATER_NM2_PER_US,
                    water_phases=None, step_fraction: float = DEFAULT_STEP_FRACTION,
                    surface: str = "smooth", m_stop: float = DEFAULT_M_STOP,
                    t_max_us: float | None = None, max_steps: int = DEFAULT_MAX_STEPS,
                    invert: bool = True, alpha: float | None = None,
                    t2_range_s=(1e-6, 10.0), per_decade: int = 20,
                    compare_fast: bool = True, interlayer_width_nm: float | None = None,
                    max_memory: int | None = None, progress=None) -> RelaxationWalkResult:
    """Magnetisation decay M(t), its T2 spectrum, and the class-to-class exchange, from
    walkers in the water of ``grid`` (method and sources: module docstring).

    Parameters
    ----------
    grid : PhaseGrid
    n_walkers : walkers (default 20,000)
    seed : seed of the walkers' random streams (results repeat exactly for a seed)
    rho2_nm_per_us : surface relaxivity of every water–wall interface, nm/µs (default
        that of ``relax``, 3.7e-3, McDonald et al. 2005, from memory)
    rho2_outside_nm_per_us : relaxivity of the domain wall (OUTSIDE voxels and the border
        of a closed grid); None: the same as ``rho2_nm_per_us`` (the domain wall is taken to
        be a solid surface that relaxes, as ``relax``'s local thickness treats it); 0 makes
        it a mirror
    rho2_by_interface : {'water/wall': nm/µs}, e.g. ``{'interlayer/solid': 2e-3}``
    t2_bulk_s : bulk T2 (s), None for none (default 2.5 s, as ``relax``)
    diffusivity_nm2_per_us : {class: nm²/µs}; classes not given diffuse at
        ``d_bulk_nm2_per_us`` (bulk water, 2299 nm²/µs = 2.299e-9 m²/s at 25 °C, Mills
        1973, from memory)
    water_phases : the phases holding water (names or codes); default all but outside and
        solid
    step_fraction : per-axis step of the fastest class in voxels (default 0.5)
    surface : 'smooth' (hits weighted to the true area of oblique walls) or 'voxel'
    m_stop : stop when M(t) < m_stop (default 0.01)
    t_max_us : stop at this time (µs) at the latest
    max_steps : stop after this many steps per walker at the latest (default 200,000)
    invert, alpha, t2_range_s, per_decade : the T2 inversion (:func:`invert_t2`); the bins
        are those of ``relax``
    compare_fast : also compute ``relax``'s fast-diffusion spectrum on the same bins
    interlayer_width_nm : passed to ``relax`` as its interlayer width
    max_memory : bytes allowed (default half the available memory); over it
        :class:`~sheetview.errors.MemoryLimitError` names the walkers that would fit
    progress : callable ``progress(done_fraction, message)``, optional

    Returns
    -------
    RelaxationWalkResult

    Examples
    --------
    >>> import numpy as np
    >>> from sheetview.grid import PhaseGrid
    >>> lab = np.ones((8, 8, 12), np.uint8); lab[:, :, 1:11] = 3   # a 10-voxel slab pore
    >>> g = PhaseGrid(lab, 1.0, periodic=True)
    >>> r = relaxation_walk(g, n_walkers=2000, rho2_nm_per_us=50.0, t2_bulk_s=None,
    ...                     d_bulk_nm2_per_us=1000.0, compare_fast=False)
    >>> bool(r.m[-1] < 0.01)
    True
    """
    if t2_bulk_s is not None:
        t2_bulk_s = _positive(t2_bulk_s, "bulk T2", "t2_bulk_s", "s")
    m_stop = _positive(m_stop, "stopping magnetisation", "m_stop", "fraction of M(0)")
    eng = _build(grid, water_phases=water_phases, diffusivity_nm2_per_us=diffusivity_nm2_per_us,
                 d_bulk_nm2_per_us=d_bulk_nm2_per_us, rho2_nm_per_us=rho2_nm_per_us,
                 rho2_outside_nm_per_us=rho2_outside_nm_per_us,
                 rho2_by_interface=rho2_by_interface, step_fraction=step_fraction,
                 surface=surface, relax=True, n_walkers=n_walkers, max_memory=max_memory)
    ms = _steps_of(eng, t_max_us, max_steps)
    rates = _face_rates(eng)
    notes = list(eng.notes)
    bulk_rate = 0.0 if t2_bulk_s is None else 1e-6 / t2_bulk_s  # 1/us
    slow = float(np.min(rates[rates > 0])) if np.any(rates > 0) else 0.0
    if slow + bulk_rate > 0:
        need = math.log(1.0 / m_stop) / ((slow + bulk_rate) * eng.dt)
        if need > ms:
            notes.append(f"reaching M < {m_stop:g} would take about {need:.3g} steps per "
                         f"walker (fast-diffusion estimate of the slowest class), over the "
                         f"{ms} allowed: the run stops first and T2 beyond the simulated "
                         f"time are not resolved")
    W = _Walkers(eng, n_walkers, seed)
    K = len(eng.classes)
    rec = _record_steps(ms)
    ts, ms_tot, ms_cls, fr, se = [0.0], [1.0], [], [], [0.0]
    counts = np.zeros((K, K), np.int64)
    wsum = np.zeros((K, K))
    _walk.tally(W.cls, W.start, W.wt, K, counts, wsum)
    n_start = counts.sum(axis=1).astype(float)
    ms_cls.append(wsum.sum(axis=1) / W.n)
    fr.append(counts / np.maximum(n_start[:, None], 1))
    done = 0
    for r in rec:
        W.advance(eng, int(r) - done)
        done = int(r)
        t = done * eng.dt
        counts[:] = 0
        wsum[:] = 0
        _walk.tally(W.cls, W.start, W.wt, K, counts, wsum)
        decay = math.exp(-t * bulk_rate)
        ts.append(t)
        ms_cls.append(wsum.sum(axis=1) / W.n * decay)
        ms_tot.append(float(ms_cls[-1].sum()))
        se.append(float(np.std(W.wt)) * decay / math.sqrt(W.n))
        fr.append(counts / np.maximum(n_start[:, None], 1))
        if progress is not None:
            prog = max(done / ms, math.log(max(ms_tot[-1], 1e-300)) / math.log(m_stop))
            progress(min(1.0, prog), f"relaxation walk: t = {t:.4g} µs, M = {ms_tot[-1]:.4g}")
        if ms_tot[-1] < m_stop:
            break
    t_us = np.asarray(ts)
    m = np.asarray(ms_tot)
    mc = np.asarray(ms_cls)
    m_by = {c: mc[:, k] for k, c in enumerate(eng.classes)}
    if m[-1] >= m_stop:
        notes.append(f"the run stopped at t = {t_us[-1]:.4g} µs with M = {m[-1]:.3g} "
                     f"(above {m_stop:g})")
    exch = ExchangeResult(t_us, list(eng.classes), np.asarray(fr), n_start / W.n, W.n,
                          ["fractions of walkers, unweighted by relaxation"])
    spec = None
    if invert:
        if progress is not None:
            progress(1.0, "T2 inversion")
        spec = invert_t2(t_us * 1e-6, m, sigma=np.asarray(se), m_by_class=m_by, alpha=alpha, t2_range_s=t2_range_s,
                         per_decade=per_decade)
    fast = None
    if compare_fast:
        fast = relaxation_spectrum(grid, interlayer_width=interlayer_width_nm,
                                   rho2=rho2_nm_per_us if rho2_nm_per_us > 0 else 1e-12,
                                   t2_bulk=t2_bulk_s,
                                   bins=spec.edges_s if spec is not None else
                                   t2_bin_edges(t2_range_s, per_decade))
        if rho2_by_interface or (rho2_outside_nm_per_us is not None and
                                 rho2_outside_nm_per_us != rho2_nm_per_us):
            notes.append("the fast-diffusion spectrum uses the one relaxivity rho2_nm_per_us "
                         "on every wall")
        if water_phases is not None:
            notes.append("the fast-diffusion spectrum counts every pore class of the grid")
    settings = dict(eng.settings)
    settings.update({"t2_bulk_s": t2_bulk_s, "m_stop": m_stop, "max_steps": ms,
                     "seed": int(seed), "fast_diffusion_rate_per_us": {
                         c: float(r) for c, r in zip(eng.classes, rates)}})
    return RelaxationWalkResult(t_us, m, np.asarray(se), m_by, spec, exch, fast, W.n, done,
                                settings, notes)


def exchange_fractions(grid, *, t_max_us: float, n_walkers: int = DEFAULT_WALKERS,
                       seed: int = 0, diffusivity_nm2_per_us: dict | None = None,
                       d_bulk_nm2_per_us: float = D_BULK_WATER_NM2_PER_US, water_phases=None,
                       step_fraction: float = DEFAULT_STEP_FRACTION,
                       max_steps: int | None = None, max_memory: int | None = None,
                       progress=None) -> ExchangeResult:
    """Class-to-class exchange fractions against mixing time (no relaxation): where the
    walkers that started in each class are after time t, up to ``t_max_us`` (µs).

    ``max_steps`` (default: as many as ``t_max_us`` needs) caps the steps per walker.
    Parameters otherwise as :func:`relaxation_walk`.
    """
    eng = _build(grid, water_phases=water_phases, diffusivity_nm2_per_us=diffusivity_nm2_per_us,
                 d_bulk_nm2_per_us=d_bulk_nm2_per_us, rho2_nm_per_us=0.0,
                 rho2_outside_nm_per_us=None, rho2_by_interface=None,
                 step_fraction=step_fraction, surface="voxel", relax=False,
                 n_walkers=n_walkers, max_memory=max_memory)
    t = _positive(t_max_us, "simulated time", "t_max_us", "µs")
    ms = int(math.ceil(t / eng.dt))
    if max_steps is not None:
        ms = min(ms, int(_positive(max_steps, "most steps per walker", "max_steps", "steps")))
    W = _Walkers(eng, n_walkers, seed)
    K = len(eng.classes)
    counts = np.zeros((K, K), np.int64)
    wsum = np.zeros((K, K))
    _walk.tally(W.cls, W.start, W.wt, K, counts, wsum)
    n_start = counts.sum(axis=1).astype(float)
    ts, fr = [0.0], [counts / np.maximum(n_start[:, None], 1)]
    done = 0
    for r in _record_steps(ms):
        W.advance(eng, int(r) - done)
        done = int(r)
        counts[:] = 0
        _walk.tally(W.cls, W.start, W.wt, K, counts, wsum)
        ts.append(done * eng.dt)
        fr.append(counts / np.maximum(n_start[:, None], 1))
        if progress is not None:
            progress(done / ms, f"exchange walk: t = {ts[-1]:.4g} µs")
    notes = list(eng.notes) + ["fractions of walkers (no relaxation)"]
    return ExchangeResult(np.asarray(ts), list(eng.classes), np.asarray(fr), n_start / W.n,
                          W.n, notes)


# ============================================================== transport
@dataclass
class TransportResult:
    """Mean-square displacement and effective diffusivity of the water (no relaxation).

    Attributes
    ----------
    t_us : (n,) times, µs
    msd_nm2 : (n, 3, 3) ``<Δx_a Δx_b>`` (nm²) over the walkers
    d_eff_nm2_per_us : (3, 3) effective diffusivity tensor ``msd(t_end) / (2 t_end)``: the
        long-time value up to the MSD's intercept over ``t_end`` (pore size² / spread²)
    d_eff_se_nm2_per_us : (3,) standard errors of its diagonal (the spread over 20 batches
        of walkers)
    d_slope_nm2_per_us : (3,) half the slope of ``msd`` per axis over the last half of the
        run (no intercept, noisier): close to the diagonal of ``d_eff`` in the long-time
        regime
    d0_nm2_per_us : the free (bulk) diffusivity the ratios refer to
    porosity : water volume fraction of the domain (voxels not OUTSIDE)
    """

    t_us: np.ndarray
    msd_nm2: np.ndarray
    d_eff_nm2_per_us: np.ndarray
    d_eff_se_nm2_per_us: np.ndarray
    d_slope_nm2_per_us: np.ndarray
    d0_nm2_per_us: float
    porosity: float
    n_walkers: int
    steps: int
    settings: dict
    notes: list = field(default_factory=list)

    @property
    def tortuosity(self) -> np.ndarray:
        """D0 / Deff per axis (x, y, z); inf across a wall that blocks the axis."""
        d = np.diag(self.d_eff_nm2_per_us)
        with np.errstate(divide="ignore"):
            return np.where(d > 0, self.d0_nm2_per_us / np.where(d > 0, d, 1), np.inf)

    @property
    def formation_factor(self) -> np.ndarray:
        """F = D0 / (φ Deff) per axis, the ratio of the conductivity of the pore fluid to
        that of the saturated medium by the Nernst–Einstein relation (e.g. Schwartz & Banavar,
        Phys. Rev. B 39 (1989) 11965; from memory)."""
        return self.tortuosity / self.porosity

    @property
    def msd_total_nm2(self) -> np.ndarray:
        return np.trace(self.msd_nm2, axis1=1, axis2=2)

    def table(self) -> dict:
        d = {"t_us": self.t_us.tolist(), "msd_nm2": self.msd_total_nm2.tolist()}
        for a, ax in enumerate("xyz"):
            d[f"msd_{ax}{ax}_nm2"] = self.msd_nm2[:, a, a].tolist()
        d["msd_xy_nm2"] = self.msd_nm2[:, 0, 1].tolist()
        d["msd_xz_nm2"] = self.msd_nm2[:, 0, 2].tolist()
        d["msd_yz_nm2"] = self.msd_nm2[:, 1, 2].tolist()
        return d

    def to_dict(self) -> dict:
        diag = np.diag(self.d_eff_nm2_per_us)
        return {"n_walkers": int(self.n_walkers), "steps_per_walker": int(self.steps),
                "t_end_us": float(self.t_us[-1]),
                "d0_nm2_per_us": float(self.d0_nm2_per_us), "porosity": float(self.porosity),
                "d_eff_nm2_per_us": self.d_eff_nm2_per_us.tolist(),
                "d_eff_se_nm2_per_us": {ax: float(v) for ax, v in
                                        zip("xyz", self.d_eff_se_nm2_per_us)},
                "d_slope_nm2_per_us": {ax: float(v) for ax, v in
                                       zip("xyz", self.d_slope_nm2_per_us)},
                "d_eff_over_d0": {ax: float(v / self.d0_nm2_per_us) for ax, v in
                                  zip("xyz", diag)},
                "tortuosity": {ax: _finite(v) for ax, v in zip("xyz", self.tortuosity)},
                "formation_factor": {ax: _finite(v) for ax, v in
                                     zip("xyz", self.formation_factor)},
                "settings": dict(self.settings), "notes": list(self.notes),
                "msd": self.table()}

    def __repr__(self) -> str:
        d = np.diag(self.d_eff_nm2_per_us) / self.d0_nm2_per_us
        return (f"TransportResult({self.n_walkers} walkers, t_end={self.t_us[-1]:.4g} µs, "
                f"Deff/D0 = {d[0]:.3g}, {d[1]:.3g}, {d[2]:.3g})")


def _finite(v):
    return float(v) if math.isfinite(v) else None


def transport_walk(grid, *, n_walkers: int = DEFAULT_TRANSPORT_WALKERS, seed: int = 0,
                   t_max_us: float | None = None, max_steps: int = DEFAULT_MAX_STEPS,
                   diffusivity_nm2_per_us: dict | None = None,
                   d_bulk_nm2_per_us: float = D_BULK_WATER_NM2_PER_US, water_phases=None,
                   step_fraction: float = DEFAULT_STEP_FRACTION, n_records: int = 64,
                   max_memory: int | None = None, progress=None) -> TransportResult:
    """Mean-square displacement, long-time effective diffusivity tensor, tortuosity per axis
    (D0/Deff) and formation factor (D0/(φ Deff)) of the water in ``grid``, from walkers
    without relaxation (the engine of :func:`relaxation_walk`).

    Parameters
    ----------
    t_max_us : simulated time (µs); default the time the free walk needs to spread over
        the longest side of the grid (``<Δx²> = 2 D0 t = L²``), capped by ``max_steps``
    n_records : times at which the MSD is kept (evenly spaced)
    Others as :func:`relaxation_walk`.

    The effective diffusivity is ``MSD(t_end) / (2 t_end)``, the long-time value when the
    walkers have crossed many pores by then (the half-slope over the last half of the run
    is given beside it as a check); a closed domain gives a plateau (Deff → 0 as t grows).
    ``D0`` is ``d_bulk_nm2_per_us``.
    """
    eng = _build(grid, water_phases=water_phases, diffusivity_nm2_per_us=diffusivity_nm2_per_us,
                 d_bulk_nm2_per_us=d_bulk_nm2_per_us, rho2_nm_per_us=0.0,
                 rho2_outside_nm_per_us=None, rho2_by_interface=None,
                 step_fraction=step_fraction, surface="voxel", relax=False,
                 n_walkers=n_walkers, max_memory=max_memory)
    ext = float(np.max(np.asarray(grid.shape) * np.asarray(grid.spacing)))
    if t_max_us is None:
        t_max_us = ext ** 2 / (2.0 * eng.d0)
    ms = _steps_of(eng, t_max_us, max_steps)
    nrec = max(4, int(n_records))
    rec = np.unique(np.rint(np.linspace(0, ms, nrec + 1)[1:]).astype(np.int64))
    W = _Walkers(eng, n_walkers, seed)
    nb = int(min(NBATCH, W.n))
    batch = np.arange(W.n) % nb
    nx, ny, nz = (int(v) for v in eng.shape)
    ts, msd, bmsd = [0.0], [np.zeros((3, 3))], [np.zeros((nb, 3))]
    done = 0
    for r in rec:
        W.advance(eng, int(r) - done)
        done = int(r)
        d = np.stack([((W.ix + W.fx + W.img[:, 0] * nx) - W.x0[:, 0]) * eng.spacing[0],
                      ((W.iy + W.fy + W.img[:, 1] * ny) - W.x0[:, 1]) * eng.spacing[1],
                      ((W.iz + W.fz + W.img[:, 2] * nz) - W.x0[:, 2]) * eng.spacing[2]],
                     axis=1)
        ts.append(done * eng.dt)
        msd.append(d.T @ d / W.n)
        b = np.zeros((nb, 3))
        np.add.at(b, batch, d * d)
        bmsd.append(b / np.bincount(batch, minlength=nb)[:, None])
        if progress is not None:
            progress(done / ms, f"transport walk: t = {ts[-1]:.4g} µs")
    t = np.asarray(ts)
    msd = np.asarray(msd)
    bmsd = np.asarray(bmsd)
    # D_eff = <Δx_a Δx_b>(t_end) / (2 t_end): the long-time diffusivity up to the MSD's
    # intercept over t_end; the slope over the last half (no intercept, noisier) is kept as
    # a check of the long-time regime
    D = 0.5 * msd[-1] / max(t[-1], 1e-300)
    bD = 0.5 * bmsd[-1] / max(t[-1], 1e-300)
    se = np.std(bD, axis=0, ddof=1) / math.sqrt(nb) if nb > 1 else np.full(3, np.nan)
    half = t >= 0.5 * t[-1]
    tt = t[half]
    if tt.size >= 2:
        A = np.column_stack([tt, np.ones_like(tt)])
        coef = np.linalg.lstsq(A, np.stack([msd[half, a, a] for a in range(3)], 1),
                               rcond=None)[0]
        d_slope = 0.5 * coef[0]
    else:
        d_slope = np.diag(D).copy()
    lab = grid.labels
    dom = int(np.count_nonzero(lab != OUTSIDE))
    water = int(np.count_nonzero(eng.lut[lab] >= 0))
    phi = water / dom if dom else 0.0
    notes = list(eng.notes)
    free = math.sqrt(2 * eng.d0 * t[-1])
    if free < ext:
        notes.append(f"the free walk spreads over {free:.3g} nm per axis in the run, less than "
                     f"the grid ({ext:.3g} nm): the diffusivity may not be the long-time value")
    settings = dict(eng.settings)
    settings.update({"seed": int(seed), "t_max_us": float(t[-1]), "fit": "slope/2 of the "
                     "MSD over the last half of the run"})
    return TransportResult(t, msd, D, se, d_slope, eng.d0, phi, W.n, done, settings, notes)


# ============================================================== figures
def _axes(ax, size=(5.0, 3.6)):
    if ax is not None:
        return ax.figure, ax
    from matplotlib.figure import Figure
    fig = Figure(figsize=size, dpi=110)
    return fig, fig.add_subplot(1, 1, 1)


def plot_decay(result: RelaxationWalkResult, ax=None):
    """M(t) of a relaxation walk, total and by start class (log scale). Returns the Figure."""
    fig, ax = _axes(ax)
    t = result.t_us * 1e-3
    ax.semilogy(t, np.maximum(result.m, 1e-6), "k-", lw=1.6, label="all water")
    for k, v in result.m_by_class.items():
        ax.semilogy(t, np.maximum(v, 1e-6), lw=1.0, label=f"started in {k}")
    ax.set_xlabel("t (ms)")
    ax.set_ylabel("M(t) / M(0)")
    ax.set_title("Predicted decay (random walk)", fontsize=9)
    ax.legend(fontsize=7)
    fig.tight_layout()
    return fig


def plot_t2_spectrum(result: RelaxationWalkResult, ax=None):
    """The walk's T2 spectrum by start class beside the fast-diffusion one of ``relax``.
    Returns the Figure."""
    fig, ax = _axes(ax)
    sp = result.spectrum
    if sp is not None:
        x = sp.t2_s * 1e3
        ax.semilogx(x, sp.amplitude, "k-", lw=1.6, label="walk, all water")
        for k, v in sp.amplitude_by_class.items():
            ax.semilogx(x, v, lw=1.0, label=f"walk, started in {k}")
    if result.fast is not None:
        ax.semilogx(result.fast.t2 * 1e3, result.fast.total, "k--", lw=1.0,
                    label="fast diffusion (relax)")
    ax.set_xlabel("T2 (ms)")
    ax.set_ylabel("signal fraction per bin")
    ax.set_title("Predicted T2 spectra (not measurements)", fontsize=9)
    ax.legend(fontsize=7)
    fig.tight_layout()
    return fig


def plot_exchange(result, ax=None):
    """Share of the walkers of each start class found in another class against time
    (an :class:`ExchangeResult` or a :class:`RelaxationWalkResult`). Returns the Figure."""
    ex = result.exchange if isinstance(result, RelaxationWalkResult) else result
    fig, ax = _axes(ax)
    t = np.maximum(ex.t_us, 1e-12)
    for i, a in enumerate(ex.classes):
        for j, b in enumerate(ex.classes):
            if i != j:
                ax.semilogx(t[1:], ex.fraction[1:, i, j], lw=1.0, label=f"{a} → {b}")
    ax.set_xlabel("mixing time (µs)")
    ax.set_ylabel("fraction of the walkers of the start class")
    ax.set_title("Exchange between pore classes", fontsize=9)
    if len(ex.classes) > 1:
        ax.legend(fontsize=7)
    fig.tight_layout()
    return fig


def plot_msd(result: TransportResult, ax=None):
    """MSD per axis against time with the free-water line 2 D0 t. Returns the Figure."""
    fig, ax = _axes(ax)
    t = result.t_us
    for a, axn in enumerate("xyz"):
        ax.plot(t, result.msd_nm2[:, a, a], lw=1.2, label=f"<Δ{axn}²>")
    ax.plot(t, 2 * result.d0_nm2_per_us * t, "k:", lw=1.0, label="free water 2 D0 t")
    ax.set_xlabel("t (µs)")
    ax.set_ylabel("mean-square displacement (nm²)")
    ax.set_title("Transport (random walk)", fontsize=9)
    ax.legend(fontsize=7)
    fig.tight_layout()
    return fig
