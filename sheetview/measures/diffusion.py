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
* **First-passage jumps** (``accelerate=True``, the default). Where a walker is at least
  ``JUMP_MIN_VOXELS`` (2) voxels from any voxel of another class (walls and water of
  another diffusivity class), it jumps to a uniform point on the largest sphere around it
  that touches no other class (a lower bound from the Euclidean distance map, ``edt`` with
  the voxel spacing, of the distance to the nearest voxel of another class), and its
  clock advances by the exit time of Brownian motion from that ball, drawn exactly from
  its distribution ``1 − 2 Σ (−1)^(n+1) exp(−n²π² D t/r²)`` (mean ``r²/(6D)``) by
  inversion of a tabulated CDF: the walk-on-spheres / first-passage method (Müller, Ann.
  Math. Stat. 27 (1956) 569; Zheng & Chiew, J. Chem. Phys. 90 (1989) 322; Torquato & Kim,
  Appl. Phys. Lett. 55 (1989) 1847; from memory). No wall is touched inside the ball, so
  the weight and class do not change; near walls the fixed-step walk and its kill rule
  apply unchanged. Walkers keep their own clocks; a jump that would end after a
  recording time is cut there, the walker being put at its position at that time drawn
  from the law of Brownian motion in the ball conditioned on not having left it (the
  Dirichlet heat kernel of the ball), so M(t), the classes and the positions at every
  recording time are exact (no truncation bias). Periodic grids: the distance map is
  computed on the grid wrapped by the largest jump, and jumps wrap around.
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
#: periodic images (24), generator (8), start position (24), clock and move counters (24),
#: with slack.
BYTES_PER_WALKER = 160
#: Batches of walkers for the standard errors of a transport run.
NBATCH = 20
#: Walkers of one call below which the kernel runs on one thread.
SERIAL_BELOW = 2_000
#: Bytes per voxel added by the run: the uint8 neighbour mask, surface-area factor and jump
#: map (the last two when used).
BYTES_PER_VOXEL = 3
#: Bytes per (padded) voxel held while the jump map is made (labels and float32 distances).
BYTES_PER_VOXEL_EDT = 5
#: Smallest first-passage jump, in voxels (the smallest edge): closer to a wall or to
#: another water class the walker takes fixed steps.
JUMP_MIN_VOXELS = 2.0
#: Resolution of the jump map: the distance is stored in steps of this fraction of the
#: smallest voxel edge, as uint8 (so jumps are at most 255/4 = 63.75 voxels).
JUMP_QUANTUM = 0.25

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
    mask: np.ndarray = None  # uint8 flat: same-class neighbours (bit 2 axis + (dir > 0))
    jmap: np.ndarray = None  # uint8 flat: jump radius bound / jq (or size-1 dummy)
    accel: bool = False
    jq: float = 1.0          # nm per jmap unit
    jthr: int = 256          # jmap value from which a walker jumps
    margin: float = 0.0      # nm taken off every jump radius
    fpt: np.ndarray = None
    trunc: np.ndarray = None


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
           n_walkers=0, extra_bytes_per_walker=0, max_memory=None,
           accelerate=True) -> _Engine:
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
    accel = bool(accelerate)
    periodic = bool(grid.periodic)
    nvox = labels.size
    hmin = float(sp.min())
    jq = JUMP_QUANTUM * hmin
    hdiag = 0.5 * float(np.sqrt(np.sum(sp * sp)))
    reach = 255 * jq + hdiag
    pad = [int(math.ceil(reach / h)) + 1 if periodic else 0 for h in sp]
    per_vox = 1 + (1 if use_area else 0) + (1 if accel else 0)
    transient = (BYTES_PER_VOXEL_EDT * int(np.prod([n + 2 * q for n, q in
                                                     zip(labels.shape, pad)]))
                 if accel else 0)
    fixed = nvox * per_vox + transient
    per = BYTES_PER_WALKER + int(extra_bytes_per_walker)
    need = int(n_walkers) * per + fixed
    limit = available_memory() // 2 if max_memory is None else int(max_memory)
    if need > limit:
        fit = max(0, (limit - fixed) // per)
        raise MemoryLimitError(
            f"{n_walkers} walkers on a {labels.shape[0]} x {labels.shape[1]} x "
            f"{labels.shape[2]} grid need about {need / 2**30:.2f} GiB ({per} bytes per walker"
            f", {per_vox} bytes per voxel{' and the distance map made once' if accel else ''}"
            f"), over the limit of {limit / 2**30:.2f} GiB; {fit} walkers would fit",
            param="n_walkers")
    if use_area:
        ww = np.ones(256)
        ww[codes] = 0.0
        area = np.empty(labels.shape, np.uint8)
        _walk.area_factor(labels, lut, bool(grid.periodic), sp, ww, area)
        area = area.ravel()
    else:
        area = np.full(1, 255, np.uint8)
    mask = np.empty(labels.shape, np.uint8)
    _walk.neighbour_mask(labels, lut, periodic, mask)
    rmin = JUMP_MIN_VOXELS * hmin
    margin = 1e-9 * hmin
    jthr = int(math.ceil((rmin + hdiag + margin) / jq))
    if accel and jthr <= 255:
        jmap = _jump_map(labels, lut, sp, periodic, jq, hdiag, pad)
    else:
        accel = False
        jmap = np.zeros(1, np.uint8)
    settings = {"water_classes": classes, "water_codes": codes,
                "diffusivity_nm2_per_us": {n: float(d) for n, d in zip(classes, D)},
                "d_bulk_nm2_per_us": d_bulk, "step_fraction_voxel": frac,
                "step_nm": {n: float(d) for n, d in zip(classes, delta)},
                "dt_us": dt, "surface": key, "periodic": bool(grid.periodic),
                "spacing_nm": [float(v) for v in sp], "accelerate": accel,
                "jump_min_nm": rmin if accel else None}
    if relax:
        settings.update({"rho2_nm_per_us": rho, "rho2_outside_nm_per_us": rho_out,
                         "rho2_by_interface": {str(k): float(v) for k, v in
                                               dict(rho2_by_interface or {}).items()},
                         "kill_rule": "weight x (1 - p), p = x/(1 + x/2), x = rho delta/D "
                                      "x area factor"})
    return _Engine(labels.ravel(), np.asarray(labels.shape, np.int64), sp,
                   bool(grid.periodic), lut, classes, codes, D, dt, step, xtab, trans, scale,
                   area, use_area, d_bulk, settings, notes, mask.ravel(), jmap.ravel(), accel,
                   jq, jthr, margin, _tables()[0], _tables()[1])


_TABLES = []


def _tables():
    """The first-passage tables (made once per process)."""
    if not _TABLES:
        _TABLES.extend([_walk.fpt_table(), _walk.trunc_table()])
    return _TABLES


def _jump_map(labels, lut, sp, periodic, jq, hdiag, pad) -> np.ndarray:
    """uint8 map of ``floor((d - hdiag) / jq)``, ``d`` the distance (nm) from each water
    voxel's centre to the nearest centre of a voxel of another class (walls, water of
    another class, the border of a closed grid), from the exact Euclidean distance
    transform (``edt``, with the voxel spacing; a periodic grid is wrapped by ``pad`` voxels
    per side first). For a point ``p`` of the voxel, ``d - hdiag - |p - centre|`` is a lower
    bound of its distance to any other class (``hdiag`` = half the voxel diagonal bounds
    the distance from a voxel's centre to its surface). 0 on walls."""
    import edt

    from .. import threads
    cl = (lut.astype(np.int16)[labels] + 1).astype(np.uint8)
    if periodic:
        cl = np.pad(cl, [(q, q) for q in pad], mode="wrap")
    d = edt.edt(cl, anisotropy=tuple(float(v) for v in sp), black_border=not periodic,
                parallel=threads.budget())
    if periodic:
        d = d[pad[0]:pad[0] + labels.shape[0], pad[1]:pad[1] + labels.shape[1],
              pad[2]:pad[2] + labels.shape[2]]
        cl = cl[pad[0]:pad[0] + labels.shape[0], pad[1]:pad[1] + labels.shape[1],
                pad[2]:pad[2] + labels.shape[2]]
    with np.errstate(invalid="ignore"):
        q = np.floor((d - hdiag) / jq)
    q = np.clip(np.nan_to_num(q, nan=0.0, posinf=255.0), 0, 255).astype(np.uint8)
    q[cl == 0] = 0
    return np.ascontiguousarray(q)


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
        self.tw = np.zeros(n)
        self.nfix = np.zeros(n, np.int64)
        self.njump = np.zeros(n, np.int64)

    def advance_to(self, eng: _Engine, t_us: float, cut: bool = True):
        """Advance every walker to time ``t_us`` (each walker keeps its own clock). With
        ``cut``, a jump in flight at ``t_us`` is cut there (exact positions); without, it
        is completed (the walker's clock passes ``t_us``; its weight and class, constant
        during a jump, are still those at ``t_us``)."""
        fn = _walk.advance_to if self.n >= SERIAL_BELOW else _walk.advance_to_serial
        fn(eng.lab, eng.mask, eng.jmap, eng.accel, eng.jq, eng.jthr, eng.margin, eng.shape,
           eng.periodic, eng.lut, eng.step, eng.xtab, eng.area, eng.use_area, eng.trans,
           eng.scale, eng.spacing, eng.diffusivity, eng.dt, eng.fpt, eng.trunc, bool(cut),
           self.ix,
           self.iy, self.iz, self.fx, self.fy, self.fz, self.cls, self.wt, self.img, self.rng,
           self.tw, self.nfix, self.njump, float(t_us))

    def advance(self, eng: _Engine, nsteps: int):
        """Advance every walker by ``nsteps`` time steps ``dt`` (from the latest clock)."""
        if nsteps > 0:
            self.advance_to(eng, float(np.max(self.tw)) + nsteps * eng.dt)

    def copy(self) -> "_Walkers":
        """An independent copy of the walkers' state (same random streams)."""
        c = object.__new__(_Walkers)
        for k, v in self.__dict__.items():
            c.__dict__[k] = v.copy() if isinstance(v, np.ndarray) else v
        return c

    @property
    def moves(self) -> float:
        """Mean moves per walker so far (fixed steps and jumps, each counted once)."""
        return float(self.nfix.sum() + self.njump.sum()) / self.n

    def move_counts(self) -> dict:
        return {"fixed_steps_per_walker": float(self.nfix.mean()),
                "jumps_per_walker": float(self.njump.mean())}


def _record_times(dt, t_end=None, per_decade: int = RECORDS_PER_DECADE):
    """Recording times (µs): whole multiples of ``dt`` spaced ``per_decade`` per decade,
    without end or up to ``t_end`` (its multiple of dt rounded up, recorded last)."""
    last = None if t_end is None else max(1, int(math.ceil(t_end / dt - 1e-9)))
    prev = 0
    k = 0
    while True:
        n = int(round(10.0 ** (k / per_decade)))
        k += 1
        if n <= prev:
            continue
        if last is not None and n >= last:
            yield last * dt
            return
        prev = n
        yield n * dt


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
        return {"walk_decay": self.table(), "walk_t2_spectrum": self.spectrum_table(),
                "walk_exchange": self.exchange.table()}

    def headline(self) -> dict:
        c = self.comparison().get("all", {})
        return {"water_walk": {"t2_logmean_ms": c.get("walk_ms"),
                               "fast_diffusion_t2_logmean_ms": c.get("fast_diffusion_ms"),
                               "shift_decades": c.get("shift_decades"),
                               "m_end": float(self.m[-1]), "t_end_us": self.t_end_us}}

    def basis(self) -> dict:
        return {"water_walk": "random-walk prediction of the water's T2 for the stated "
                              "relaxivity and diffusivities, beside the fast-diffusion one; a "
                              "prediction for the simulated structure, not a measurement"}

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
                    compare_fast: bool = True, interlayer_width: float | None = None,
                    thickness=None,
                    accelerate: bool = True, max_memory: int | None = None,
                    progress=None) -> RelaxationWalkResult:
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
    max_steps : stop after this many moves per walker on average (fixed steps and jumps,
        each counted once; default 200,000); without acceleration, after this many steps
    accelerate : first-passage jumps far from walls (default True); False gives the
        fixed-step walk everywhere
    invert, alpha, t2_range_s, per_decade : the T2 inversion (:func:`invert_t2`); the bins
        are those of ``relax``
    compare_fast : also compute ``relax``'s fast-diffusion spectrum on the same bins
    interlayer_width : passed to ``relax`` as its interlayer width (nm)
    thickness : local thickness map of the gel pores passed to ``relax`` (as the
        ``relaxation`` measure gets it), computed there when None
    max_memory : bytes allowed (default half the available memory); over it
        :class:`~sheetview.errors.MemoryLimitError` names the walkers that would fit
    progress : callable ``progress(done_fraction, message)``, optional

    Returns
    -------
    RelaxationWalkResult (``steps``: the mean moves per walker; the settings give the fixed
    steps and jumps per walker)

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
                 surface=surface, relax=True, n_walkers=n_walkers, max_memory=max_memory,
                 accelerate=accelerate)
    ms = int(_positive(max_steps, "most moves per walker", "max_steps", "moves"))
    t_end = None if t_max_us is None else _positive(t_max_us, "simulated time", "t_max_us",
                                                     "µs")
    if not eng.accel:          # fixed steps only: max_steps caps the time as before
        t_end = ms * eng.dt if t_end is None else min(t_end, ms * eng.dt)
    rates = _face_rates(eng)
    notes = list(eng.notes)
    bulk_rate = 0.0 if t2_bulk_s is None else 1e-6 / t2_bulk_s  # 1/us
    slow = float(np.min(rates[rates > 0])) if np.any(rates > 0) else 0.0
    if slow + bulk_rate > 0:
        need_t = math.log(1.0 / m_stop) / (slow + bulk_rate)
        need = need_t / eng.dt
        if not eng.accel and need > ms:
            notes.append(f"reaching M < {m_stop:g} would take about {need:.3g} steps per "
                         f"walker (fast-diffusion estimate of the slowest class), over the "
                         f"{ms} allowed: the run stops first and T2 beyond the simulated "
                         f"time are not resolved")
        elif eng.accel and need > ms:
            notes.append(f"reaching M < {m_stop:g} takes about {need_t:.3g} µs (fast-diffusion "
                         f"estimate of the slowest class), {need:.3g} fixed steps; the "
                         f"first-passage jumps cover part of it, and the run stops when the "
                         f"walkers have made {ms} moves each on average")
    W = _Walkers(eng, n_walkers, seed)
    K = len(eng.classes)
    ts, ms_tot, ms_cls, fr, se = [0.0], [1.0], [], [], [0.0]
    counts = np.zeros((K, K), np.int64)
    wsum = np.zeros((K, K))
    _walk.tally(W.cls, W.start, W.wt, K, counts, wsum)
    n_start = counts.sum(axis=1).astype(float)
    ms_cls.append(wsum.sum(axis=1) / W.n)
    fr.append(counts / np.maximum(n_start[:, None], 1))
    stopped_by_work = False
    for t in _record_times(eng.dt, t_end):
        W.advance_to(eng, t, cut=False)
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
            prog = max(W.moves / ms, math.log(max(ms_tot[-1], 1e-300)) / math.log(m_stop),
                       t / t_end if t_end else 0.0)
            progress(min(1.0, prog), f"relaxation walk: t = {t:.4g} µs, M = {ms_tot[-1]:.4g}")
        if ms_tot[-1] < m_stop:
            break
        if eng.accel and W.moves >= ms:
            stopped_by_work = True
            break
    t_us = np.asarray(ts)
    m = np.asarray(ms_tot)
    mc = np.asarray(ms_cls)
    m_by = {c: mc[:, k] for k, c in enumerate(eng.classes)}
    if m[-1] >= m_stop:
        why = (f" after {W.moves:.4g} moves per walker (max_steps)" if stopped_by_work
               else "")
        notes.append(f"the run stopped at t = {t_us[-1]:.4g} µs with M = {m[-1]:.3g} "
                     f"(above {m_stop:g}){why}")
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
        fast = relaxation_spectrum(grid, thickness, interlayer_width=interlayer_width,
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
                         c: float(r) for c, r in zip(eng.classes, rates)},
                     **W.move_counts()})
    return RelaxationWalkResult(t_us, m, np.asarray(se), m_by, spec, exch, fast, W.n,
                                int(round(W.moves)), settings, notes)


def exchange_fractions(grid, *, t_max_us: float, n_walkers: int = DEFAULT_WALKERS,
                       seed: int = 0, diffusivity_nm2_per_us: dict | None = None,
                       d_bulk_nm2_per_us: float = D_BULK_WATER_NM2_PER_US, water_phases=None,
                       step_fraction: float = DEFAULT_STEP_FRACTION,
                       max_steps: int | None = None, accelerate: bool = True,
                       max_memory: int | None = None, progress=None) -> ExchangeResult:
    """Class-to-class exchange fractions against mixing time (no relaxation): where the
    walkers that started in each class are after time t, up to ``t_max_us`` (µs).

    ``max_steps`` (default: no cap) caps the moves per walker (fixed steps and jumps, on
    average; without acceleration, the steps). Parameters otherwise as
    :func:`relaxation_walk`.
    """
    eng = _build(grid, water_phases=water_phases, diffusivity_nm2_per_us=diffusivity_nm2_per_us,
                 d_bulk_nm2_per_us=d_bulk_nm2_per_us, rho2_nm_per_us=0.0,
                 rho2_outside_nm_per_us=None, rho2_by_interface=None,
                 step_fraction=step_fraction, surface="voxel", relax=False,
                 n_walkers=n_walkers, max_memory=max_memory, accelerate=accelerate)
    t_end = _positive(t_max_us, "simulated time", "t_max_us", "µs")
    cap = None
    if max_steps is not None:
        cap = int(_positive(max_steps, "most moves per walker", "max_steps", "moves"))
        if not eng.accel:
            t_end = min(t_end, cap * eng.dt)
    W = _Walkers(eng, n_walkers, seed)
    K = len(eng.classes)
    counts = np.zeros((K, K), np.int64)
    wsum = np.zeros((K, K))
    _walk.tally(W.cls, W.start, W.wt, K, counts, wsum)
    n_start = counts.sum(axis=1).astype(float)
    ts, fr = [0.0], [counts / np.maximum(n_start[:, None], 1)]
    notes = list(eng.notes) + ["fractions of walkers (no relaxation)"]
    for t in _record_times(eng.dt, t_end):
        W.advance_to(eng, t, cut=False)
        counts[:] = 0
        _walk.tally(W.cls, W.start, W.wt, K, counts, wsum)
        ts.append(t)
        fr.append(counts / np.maximum(n_start[:, None], 1))
        if progress is not None:
            progress(min(1.0, t / t_end), f"exchange walk: t = {ts[-1]:.4g} µs")
        if cap is not None and eng.accel and W.moves >= cap and t < t_end:
            notes.append(f"stopped at t = {t:.4g} µs after {W.moves:.4g} moves per walker "
                         f"(max_steps)")
            break
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

    def tables(self) -> dict:
        return {"transport_msd": self.table()}

    def headline(self) -> dict:
        d = np.diag(self.d_eff_nm2_per_us) / self.d0_nm2_per_us
        return {"transport": {"d_eff_over_d0": {ax: float(v) for ax, v in zip("xyz", d)},
                              "tortuosity": {ax: _finite(v) for ax, v in
                                             zip("xyz", self.tortuosity)}}}

    def basis(self) -> dict:
        return {"transport": "long-time effective diffusivity of the water from walkers "
                             "without relaxation, per axis, over the free diffusivity D0; "
                             "tortuosity D0/Deff"}

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
                   accelerate: bool = True, max_memory: int | None = None,
                   progress=None) -> TransportResult:
    """Mean-square displacement, long-time effective diffusivity tensor, tortuosity per axis
    (D0/Deff) and formation factor (D0/(φ Deff)) of the water in ``grid``, from walkers
    without relaxation (the engine of :func:`relaxation_walk`).

    Parameters
    ----------
    t_max_us : simulated time (µs); default the time the free walk needs to spread over
        the longest side of the grid (``<Δx²> = 2 D0 t = L²``)
    max_steps : the run stops at the record where the walkers have made this many moves
        each on average (with acceleration); without it, ``t_max_us`` is capped at
        ``max_steps`` time steps
    n_records : times at which the MSD is kept (evenly spaced; jumps in flight are cut
        there exactly, see the module docstring)
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
                 n_walkers=n_walkers, max_memory=max_memory, accelerate=accelerate)
    ext = float(np.max(np.asarray(grid.shape) * np.asarray(grid.spacing)))
    if t_max_us is None:
        t_max_us = ext ** 2 / (2.0 * eng.d0)
    cap = int(_positive(max_steps, "most moves per walker", "max_steps", "moves"))
    ms = _steps_of(eng, t_max_us, max_steps if not eng.accel else 2 ** 62)
    nrec = max(4, int(n_records))
    rec = np.unique(np.rint(np.linspace(0, ms, nrec + 1)[1:]).astype(np.int64))
    W = _Walkers(eng, n_walkers, seed)
    nb = int(min(NBATCH, W.n))
    batch = np.arange(W.n) % nb
    nx, ny, nz = (int(v) for v in eng.shape)
    ts, msd, bmsd = [0.0], [np.zeros((3, 3))], [np.zeros((nb, 3))]
    done = 0
    capped = False
    for r in rec:
        if eng.accel and W.moves >= cap:
            capped = True
            break
        W.advance_to(eng, int(r) * eng.dt)
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
    if capped:
        notes.append(f"stopped at t = {t[-1]:.4g} µs after {W.moves:.4g} moves per walker "
                     f"(max_steps)")
    free = math.sqrt(2 * eng.d0 * t[-1])
    if free < ext:
        notes.append(f"the free walk spreads over {free:.3g} nm per axis in the run, less than "
                     f"the grid ({ext:.3g} nm): the diffusivity may not be the long-time value")
    settings = dict(eng.settings)
    settings.update({"seed": int(seed), "t_max_us": float(t[-1]), "fit": "slope/2 of the "
                     "MSD over the last half of the run", **W.move_counts()})
    return TransportResult(t, msd, D, se, d_slope, eng.d0, phi, W.n, int(round(W.moves)),
                           settings, notes)


# ============================================================== T2-T2 exchange
#: Singular values of each 1D kernel kept in the compressed 2D inversion (relative to the
#: largest): data noise far above 1e-4 cannot resolve the rest.
SVD_KEEP = 1e-4


def _brd(Kc, mc, alpha2, c0=None, tol=1e-8, maxiter=100):
    """min ||Kc f - mc||² + alpha2 ||f||², f >= 0, by the dual Newton iteration of Butler,
    Reeds & Dawson (SIAM J. Numer. Anal. 18 (1981) 381) as Venkataramanan, Song &
    Hürlimann use it on the SVD-compressed problem: f = max(0, Kcᵀ c) with c minimising the
    convex ``½||max(0, Kcᵀ c)||² + ½ alpha2 ||c||² − cᵀ mc`` (Newton steps with
    backtracking; stops when the gradient is below ``tol`` of ``||mc||``)."""
    n = Kc.shape[0]
    c = np.zeros(n) if c0 is None else c0.copy()
    eye = np.eye(n)
    scale = max(float(np.linalg.norm(mc)), 1e-300)

    def chi(cc):
        f = np.maximum(0.0, Kc.T @ cc)
        return 0.5 * f @ f + 0.5 * alpha2 * cc @ cc - cc @ mc, f

    val, f = chi(c)
    for _ in range(maxiter):
        grad = Kc @ f + alpha2 * c - mc
        if np.linalg.norm(grad) <= tol * scale:
            break
        Ka = Kc[:, f > 0]
        step = np.linalg.solve(Ka @ Ka.T + alpha2 * eye, grad)
        lam, gs = 1.0, float(grad @ step)
        while True:
            cn = c - lam * step
            vn, fn = chi(cn)
            if vn <= val - 1e-4 * lam * gs or lam < 1e-8:
                break
            lam *= 0.5
        c, val, f = cn, vn, fn
    return f, c


def invert_t2_t2(t1_s, t2_s, signal, *, sigma=None, edges_s=None, alpha=None,
                 n_alpha: int = 16, per_decade: int = 10,
                 t2_range_s=(1e-6, 10.0)) -> dict:
    """Two-dimensional T2 distribution ``F`` of a relaxation–exchange–relaxation signal
    ``S(t1, t2) = sum_ij F[i, j] exp(−t1/T2_i) exp(−t2/T2_j)`` (T2_i during the encoding,
    T2_j during the detection) by non-negative Tikhonov inversion:
    ``min ||K1 F K2ᵀ − S||² + α² ||F||², F ≥ 0``, compressed by the singular value
    decompositions of K1 and K2 (the 2D kernel is their Kronecker product) and solved by
    the Butler–Reeds–Dawson iteration, the method of Venkataramanan, Song & Hürlimann,
    IEEE Trans. Signal Process. 50 (2002) 1017. α: the discrepancy principle with the
    standard errors ``sigma`` (the largest α whose residual norm stays within
    ``||sigma||``), the L-curve corner without them, or given.

    Returns a dict: ``t2_s`` (bin centres), ``edges_s``, ``amplitude`` (N, N), ``alpha``,
    ``rule``, ``residual_rms``.
    """
    t1 = np.asarray(t1_s, float)
    t2 = np.asarray(t2_s, float)
    S = np.asarray(signal, float)
    if S.shape != (t1.size, t2.size) or t1.size < 3 or t2.size < 3:
        raise OptionError("the signal must be (len(t1), len(t2)) with at least three times "
                          "on each axis", param="signal")
    if edges_s is None:
        tt = np.concatenate([t1, t2])
        lo, hi = 0.5 * max(tt[tt > 0].min(), 1e-15), 3.0 * tt.max()
        edges = _aligned_edges(lo, hi, t2_range_s, per_decade)
    else:
        edges = np.asarray(edges_s, float)
        if edges.ndim != 1 or edges.size < 2 or np.any(np.diff(edges) <= 0) or edges[0] <= 0:
            raise OptionError("T2 bin edges must be positive and increasing", param="edges_s")
    T = np.sqrt(edges[:-1] * edges[1:])
    K1 = np.exp(-t1[:, None] / T[None, :])
    K2 = np.exp(-t2[:, None] / T[None, :])
    U1, s1, V1t = np.linalg.svd(K1, full_matrices=False)
    U2, s2, V2t = np.linalg.svd(K2, full_matrices=False)
    r1 = int(np.sum(s1 > SVD_KEEP * s1[0]))
    r2 = int(np.sum(s2 > SVD_KEEP * s2[0]))
    A1 = s1[:r1, None] * V1t[:r1]
    A2 = s2[:r2, None] * V2t[:r2]
    Kc = np.kron(A1, A2)                     # (r1 r2, N²), F raveled row-major
    mc = (U1[:, :r1].T @ S @ U2[:, :r2]).ravel()
    N = T.size

    def solve(a, c0=None):
        f, c = _brd(Kc, mc, a * a, c0)
        F = f.reshape(N, N)
        res = float(np.linalg.norm(K1 @ F @ K2.T - S))
        return F, c, res

    if alpha is None:
        smax = float(s1[0] * s2[0])
        alphas = np.geomspace(1e-1 * smax, 1e-6 * smax, int(n_alpha))
        out, c = [], None
        for a in alphas:
            F, c, res = solve(a, c)
            out.append((a, F, res, float(np.linalg.norm(F))))
        res = np.array([o[2] for o in out])
        if sigma is not None:
            target = float(np.linalg.norm(np.broadcast_to(np.asarray(sigma, float), S.shape)))
            ok = np.flatnonzero(res <= target)
            k = int(ok[0]) if ok.size else int(np.argmin(res))
            rule = "discrepancy principle (residual norm <= norm of the standard errors)"
        else:
            k = _lcurve_corner(res[::-1], np.array([o[3] for o in out])[::-1])
            k = len(out) - 1 - k
            rule = "L-curve corner (maximum curvature)"
        a_best, F, res_best = out[k][0], out[k][1], out[k][2]
    else:
        a_best = _positive(alpha, "regularisation weight", "alpha", "", allow_zero=True)
        F, _, res_best = solve(a_best)
        rule = "given"
    return {"t2_s": T, "edges_s": edges, "amplitude": F, "alpha": float(a_best),
            "rule": rule, "residual_rms": float(res_best / math.sqrt(S.size))}


@dataclass
class T2T2Result:
    """A simulated T2–T2 relaxation-exchange map at one mixing time.

    The pulse sequence simulated: T2 encoding for ``t1`` (surface relaxation on), storage
    for the mixing time (no T2 relaxation; T1 relaxation during the storage is not
    modelled), T2 detection for ``t2``. Attributes
    ----------
    mixing_time_us : µs
    t1_us, t2_us : (n1,), (n2,) encoding and detection times, µs
    signal : (n1, n2) S(t1, t2) / S(0, 0), bulk relaxation included
    signal_se : (n1, n2) its standard errors over the walkers
    t2_s : (N,) T2 bin centres (s), both axes; ``edges_s``
    amplitude : (N, N) ``F[i, j]``: signal of water with T2_i during encoding and T2_j
        during detection (sums to about 1); off-diagonal weight is exchange during mixing
    alpha, rule, residual_rms : the inversion (:func:`invert_t2_t2`)
    classes : water classes; ``class_transfer`` (K, K): share of the walkers in class a at
        the start of the mixing period and in class b at its end (unweighted)
    """

    mixing_time_us: float
    t1_us: np.ndarray
    t2_us: np.ndarray
    signal: np.ndarray
    signal_se: np.ndarray
    t2_s: np.ndarray
    edges_s: np.ndarray
    amplitude: np.ndarray
    alpha: float
    rule: str
    residual_rms: float
    classes: list
    class_transfer: np.ndarray
    n_walkers: int
    settings: dict
    notes: list = field(default_factory=list)

    def cross_fraction(self, t2_split_s: float) -> float:
        """Share of the map's amplitude off the diagonal blocks: T2 below ``t2_split_s``
        in one period and above it in the other (exchange between the two populations
        during the mixing time)."""
        lo = self.t2_s < float(t2_split_s)
        F = self.amplitude
        tot = float(F.sum())
        off = float(F[np.ix_(lo, ~lo)].sum() + F[np.ix_(~lo, lo)].sum())
        return off / tot if tot > 0 else float("nan")

    def table(self) -> dict:
        """The map as long-form columns (T2 encoding, T2 detection, amplitude)."""
        i, j = np.meshgrid(np.arange(self.t2_s.size), np.arange(self.t2_s.size),
                           indexing="ij")
        return {"t2_encoding_ms": (self.t2_s[i.ravel()] * 1e3).tolist(),
                "t2_detection_ms": (self.t2_s[j.ravel()] * 1e3).tolist(),
                "amplitude": self.amplitude.ravel().tolist()}

    def to_dict(self) -> dict:
        return {"mixing_time_us": float(self.mixing_time_us), "n_walkers": int(self.n_walkers),
                "t1_us": self.t1_us.tolist(), "t2_us": self.t2_us.tolist(),
                "signal": self.signal.tolist(), "signal_se": self.signal_se.tolist(),
                "t2_ms": (self.t2_s * 1e3).tolist(), "amplitude": self.amplitude.tolist(),
                "alpha": float(self.alpha), "rule": self.rule,
                "residual_rms": float(self.residual_rms), "classes": list(self.classes),
                "class_transfer": self.class_transfer.tolist(),
                "settings": dict(self.settings), "notes": list(self.notes)}

    def __repr__(self) -> str:
        return (f"T2T2Result(mixing {self.mixing_time_us:.4g} µs, {self.n_walkers} walkers, "
                f"{self.t2_s.size}x{self.t2_s.size} bins)")


def t2_t2_map(grid, *, mixing_time_us, n_walkers: int = DEFAULT_WALKERS, seed: int = 0,
              rho2_nm_per_us: float = DEFAULT_RHO2_NM_PER_US,
              rho2_outside_nm_per_us: float | None = None,
              rho2_by_interface: dict | None = None,
              t2_bulk_s: float | None = DEFAULT_T2_BULK_S,
              diffusivity_nm2_per_us: dict | None = None,
              d_bulk_nm2_per_us: float = D_BULK_WATER_NM2_PER_US, water_phases=None,
              step_fraction: float = DEFAULT_STEP_FRACTION, surface: str = "smooth",
              t_max_us: float | None = None, n_times: int = 32, invert: bool = True,
              alpha: float | None = None, per_decade: int = 10, accelerate: bool = True,
              max_memory: int | None = None, progress=None):
    """Simulated T2–T2 relaxation-exchange map(s) at the given mixing time(s).

    The experiment (the relaxation-exchange-relaxation sequence used on cement pastes,
    e.g. McDonald, Korb, Mitchell & Monteilhet, Phys. Rev. E 72 (2005) 011409; Monteilhet
    et al., Phys. Rev. E 74 (2006) 061404; citations from memory): T2 encoding for t1,
    storage for the mixing time tm, T2 detection for t2. Each walker's path is run once:
    encoding over [A − t1, A] (A = the longest t1), mixing over [A, A + tm] with no
    surface relaxation, detection over [A + tm, A + tm + t2]. With the multiplicative
    weights, the encoding factor of every t1 is ``W(A) / W(A − t1)`` (the walkers are
    uniformly spread at every time, so an encoding that starts at A − t1 is the experiment
    for that t1 exactly), the detection factor ``W(A + tm + t2) / W(A + tm)``, and
    ``S(t1, t2)`` the mean of their product times the bulk factor ``exp(−(t1 + t2)/T2b)``.
    The map is the 2D inversion of S (:func:`invert_t2_t2`).

    Parameters
    ----------
    mixing_time_us : a mixing time (µs) or a sequence of them (the encoding is shared; the
        walkers are copied for each mixing time); returns one :class:`T2T2Result` or a list
    t_max_us : longest encoding and detection time (µs); default the fast-diffusion time of
        the slowest class to decay to 1 %
    n_times : encoding and detection times per axis (0 and log-spaced over three decades
        up to ``t_max_us``)
    per_decade : T2 bins per decade on both axes (on the log grid of ``relax``)
    Others as :func:`relaxation_walk`.
    """
    single = np.ndim(mixing_time_us) == 0
    tms = [_positive(v, "mixing time", "mixing_time_us", "µs", allow_zero=True)
           for v in np.atleast_1d(np.asarray(mixing_time_us, dtype=float))]
    if t2_bulk_s is not None:
        t2_bulk_s = _positive(t2_bulk_s, "bulk T2", "t2_bulk_s", "s")
    eng = _build(grid, water_phases=water_phases, diffusivity_nm2_per_us=diffusivity_nm2_per_us,
                 d_bulk_nm2_per_us=d_bulk_nm2_per_us, rho2_nm_per_us=rho2_nm_per_us,
                 rho2_outside_nm_per_us=rho2_outside_nm_per_us,
                 rho2_by_interface=rho2_by_interface, step_fraction=step_fraction,
                 surface=surface, relax=True, n_walkers=n_walkers, max_memory=max_memory,
                 extra_bytes_per_walker=16 * int(n_times) + 8, accelerate=accelerate)
    bulk_rate = 0.0 if t2_bulk_s is None else 1e-6 / t2_bulk_s
    if t_max_us is None:
        rates = _face_rates(eng)
        slow = float(np.min(rates[rates > 0])) if np.any(rates > 0) else 0.0
        if slow + bulk_rate <= 0:
            raise OptionError("nothing relaxes (zero relaxivity, no bulk T2): give t_max_us",
                              param="t_max_us")
        t_max_us = math.log(100.0) / (slow + bulk_rate)
    A = _positive(t_max_us, "longest encoding time", "t_max_us", "µs")
    nt = int(n_times)
    if nt < 4:
        raise OptionError(f"n_times must be at least 4, got {n_times}", param="n_times")
    times = np.concatenate([[0.0], np.geomspace(A * 1e-3, A, nt - 1)])
    W = _Walkers(eng, n_walkers, seed)
    K = len(eng.classes)
    # encoding: W at A - t1 (ascending times), then at A
    enc_t = np.sort(A - times)
    wenc = np.empty((W.n, nt))
    for k, t in enumerate(enc_t):
        W.advance_to(eng, t, cut=False)
        wenc[:, k] = W.wt
        if progress is not None:
            progress(0.3 * (k + 1) / nt, f"T2-T2 encoding: t = {t:.4g} µs")
    enc = W.wt[:, None] / wenc[:, ::-1]          # column k: W(A) / W(A - times[k])
    del wenc
    c_start = W.cls.copy()
    noxtab = _replace_xtab(eng)
    notes = list(eng.notes) + ["no relaxation during the mixing period (T1 relaxation during "
                               "the storage is not modelled)"]
    results = []
    for q, tm in enumerate(tms):
        V = W.copy() if q < len(tms) - 1 else W
        if tm > 0:
            V.advance_to(noxtab, A + tm, cut=False)
        transfer = np.zeros((K, K))
        np.add.at(transfer, (c_start, V.cls), 1.0)
        transfer /= V.n
        w0 = V.wt.copy()
        det = np.empty((V.n, nt))
        for k, t in enumerate(times):
            V.advance_to(eng, A + tm + t, cut=False)
            det[:, k] = V.wt / w0
            if progress is not None:
                progress(0.3 + 0.7 * (q + (k + 1) / nt) / len(tms),
                         f"T2-T2 detection (mixing {tm:.4g} µs): t = {t:.4g} µs")
        bulk = np.exp(-times * bulk_rate)
        S = (enc.T @ det) / V.n
        S2 = ((enc * enc).T @ (det * det)) / V.n
        se = np.sqrt(np.maximum(S2 - S * S, 0.0) / V.n)
        S = S * bulk[:, None] * bulk[None, :]
        se = se * bulk[:, None] * bulk[None, :]
        settings = dict(eng.settings)
        settings.update({"t2_bulk_s": t2_bulk_s, "seed": int(seed), "t_max_us": A,
                         "n_times": nt, **V.move_counts()})
        if invert:
            inv = invert_t2_t2(times * 1e-6, times * 1e-6, S, sigma=se, alpha=alpha,
                               per_decade=per_decade)
        else:
            e = _aligned_edges(0.5e-6 * times[1], 3e-6 * A, (1e-6, 10.0), per_decade)
            inv = {"t2_s": np.sqrt(e[:-1] * e[1:]), "edges_s": e,
                   "amplitude": np.zeros((e.size - 1, e.size - 1)), "alpha": float("nan"),
                   "rule": "not inverted", "residual_rms": float("nan")}
        results.append(T2T2Result(tm, times.copy(), times.copy(), S, se, inv["t2_s"],
                                  inv["edges_s"], inv["amplitude"], inv["alpha"], inv["rule"],
                                  inv["residual_rms"], list(eng.classes), transfer, V.n,
                                  settings, list(notes)))
    return results[0] if single else results


def _replace_xtab(eng):
    from dataclasses import replace
    return replace(eng, xtab=np.zeros_like(eng.xtab), use_area=False)


# ============================================================== figures
