"""Invented demonstration structures: random sequential packing of layered sheet stacks.

This module is **not** a growth simulation and models no chemistry or kinetics. It places
ready-made stacks of flat triangulated sheets one after another at random positions and
orientations in a :class:`~sheetview.domain.Sphere` or :class:`~sheetview.domain.Box`,
rejecting any stack that would leave the domain or come closer than a clearance to a stack
already placed (random sequential addition; Widom, J. Chem. Phys. 44 (1966) 3888,
doi:10.1063/1.1726548, for the classic form with spheres). Its purpose is to give the
measures of sheetview structures whose answers are known exactly: every prism carries its
stack, its layer and whether it is a tilted defect layer, and every stack its layer count,
normal and centre.

Geometry of one stack
---------------------
A *layer* is a planar patch of equilateral triangles (edge ``triangle_edge`` nm) cut from
a triangular lattice: the triangles whose centroids lie closest to a lattice vertex, taken
in order of distance up to the disc of diameter ``lateral_size`` (at least one triangle).
Every such patch is edge-connected: in-plane neighbours share an edge. The layers of an
``n``-layer stack are exact copies of one patch translated by ``repeat`` nm along the
stack normal, centred on the stack centre: layer ``j`` (0..n-1) lies at
``(j - (n - 1)/2) * repeat`` along the normal. Each prism therefore has exactly ``n - 1``
stacked partners in its column, and its stacking number is ``n``.

A *tilt defect* (probability ``tilt_probability`` per stack) is one extra layer above the
top layer, rotated by ``tilt_angle`` degrees about an in-plane axis through the patch's
rim on the near side (a hinge one repeat above the top layer), so that it rises away from
the stack and never intersects it. Its prisms have ``tilted = True``, layer index ``n``,
and a ground-truth stacking number of 1 (a defect, not a continuation of the stack).
"""
from __future__ import annotations

import math
import re
import time
from dataclasses import dataclass, field
from functools import lru_cache

import numpy as np
from scipy.spatial import cKDTree

from .domain import Box, Sphere
from .errors import OptionError
from .structure import Structure

#: Packing stops early once this many candidates in a row have failed (the domain is full).
STALL_ATTEMPTS = 10_000

SCENARIO_NOTE = ("invented demonstration structure: random sequential packing of layered "
                 "sheet stacks (sheetview.synth), not a growth simulation")


# =============================================================================== specs
@dataclass(frozen=True)
class Distribution:
    """A distribution parsed from a spec such as ``"poisson:3"`` or ``"lognormal:5,0.3"``.

    Kinds:

    * ``fixed:V`` -- always ``V``;
    * ``uniform:A,B`` -- uniform on ``[A, B]`` (whole numbers ``A..B`` inclusive for layer
      counts);
    * ``poisson:M`` -- layer counts only: ``1 + Poisson(M - 1)``, so at least one layer and
      mean exactly ``M`` (``M >= 1``);
    * ``lognormal:MEDIAN,SIGMA`` -- sizes only: ``MEDIAN * exp(SIGMA * Z)``, Z standard normal.
    """

    kind: str
    params: tuple
    integer: bool
    name: str

    def sample(self, rng: np.random.Generator, n: int) -> np.ndarray:
        p = self.params
        if self.kind == "fixed":
            out = np.full(n, p[0], dtype=float)
        elif self.kind == "uniform":
            if self.integer:
                out = rng.integers(int(p[0]), int(p[1]) + 1, size=n).astype(float)
            else:
                out = rng.uniform(p[0], p[1], size=n)
        elif self.kind == "poisson":
            out = 1.0 + rng.poisson(p[0] - 1.0, size=n)
        else:  # lognormal
            out = p[0] * np.exp(p[1] * rng.standard_normal(n))
        return out.astype(np.int64) if self.integer else out

    @property
    def mean(self) -> float:
        p = self.params
        if self.kind == "fixed":
            return float(p[0])
        if self.kind == "uniform":
            return 0.5 * (p[0] + p[1])
        if self.kind == "poisson":
            return float(p[0])
        return float(p[0] * math.exp(0.5 * p[1] ** 2))

    def __str__(self) -> str:
        return f"{self.kind}:" + ",".join(f"{v:g}" for v in self.params)


_KINDS = {"fixed": 1, "uniform": 2, "poisson": 1, "lognormal": 2}


def parse_distribution(spec, *, name: str, integer: bool = False) -> Distribution:
    """Parse a distribution spec (see :class:`Distribution`); a bare number means ``fixed``.

    ``name`` is the option the spec belongs to (for messages). ``integer`` marks layer
    counts: whole numbers >= 1. Raises :class:`~sheetview.errors.OptionError`.
    """
    allowed = ("fixed", "uniform", "poisson") if integer else ("fixed", "uniform", "lognormal")
    examples = ('"fixed:4", "uniform:2,6", "poisson:3"' if integer
                else '"fixed:6", "uniform:4,8", "lognormal:5,0.3"')

    def bad(msg):
        raise OptionError(f"{name}: {msg}; expected KIND:PARAMS with KIND one of "
                          f"{', '.join(allowed)}, e.g. {examples}")

    if isinstance(spec, Distribution):
        return spec
    if isinstance(spec, (int, float, np.integer, np.floating)) and not isinstance(spec, bool):
        spec = f"fixed:{spec}"
    if not isinstance(spec, str) or not spec.strip():
        bad(f"got {spec!r}")
    text = spec.strip().lower()
    if re.fullmatch(r"[+-]?[\d.eE+-]+", text):
        text = "fixed:" + text
    kind, sep, rest = text.partition(":")
    kind = kind.strip()
    if not sep:
        bad(f"{spec!r} has no ':'")
    if kind not in allowed:
        if kind in _KINDS:
            bad(f"kind {kind!r} does not apply here")
        bad(f"unknown kind {kind!r}")
    try:
        params = tuple(float(v) for v in rest.split(","))
    except ValueError:
        bad(f"parameters {rest!r} are not numbers")
    if len(params) != _KINDS[kind]:
        bad(f"{kind} takes {_KINDS[kind]} parameter(s), got {len(params)} in {spec!r}")
    if not all(math.isfinite(v) for v in params):
        bad(f"parameters must be finite, got {spec!r}")
    if integer:
        if kind in ("fixed", "uniform"):
            if any(v != round(v) for v in params):
                bad(f"layer counts must be whole numbers, got {spec!r}")
            if min(params) < 1:
                bad(f"layer counts must be at least 1, got {spec!r}")
        if kind == "poisson" and params[0] < 1:
            bad(f"poisson mean must be at least 1 (counts are 1 + Poisson(M - 1)), got {spec!r}")
    else:
        if kind in ("fixed", "uniform") and min(params) <= 0:
            bad(f"sizes must be positive nm, got {spec!r}")
        if kind == "lognormal" and (params[0] <= 0 or params[1] < 0):
            bad(f"lognormal needs a positive median (nm) and a non-negative sigma, got {spec!r}")
    if kind == "uniform" and params[1] < params[0]:
        bad(f"uniform:A,B needs A <= B, got {spec!r}")
    return Distribution(kind, params, integer, name)


# ============================================================================= Watson
def _perp_basis(n: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Two unit vectors completing each unit row of ``n`` (M, 3) to a right-handed basis
    ``(e1, e2, n)``, e1 x e2 = n."""
    n = np.asarray(n, dtype=float)
    helper = np.where((np.abs(n[:, 0]) < 0.9)[:, None], [[1.0, 0.0, 0.0]], [[0.0, 1.0, 0.0]])
    e1 = np.cross(helper, n)
    e1 /= np.linalg.norm(e1, axis=1, keepdims=True)
    e2 = np.cross(n, e1)
    return e1, e2


def _unit_rows(v, n_rows: int, what: str) -> np.ndarray:
    v = np.asarray(v, dtype=float)
    if v.shape == (3,):
        v = np.broadcast_to(v, (n_rows, 3))
    if v.shape != (n_rows, 3) or not np.all(np.isfinite(v)):
        raise OptionError(f"{what} must be three finite numbers (or an ({n_rows}, 3) array)")
    norm = np.linalg.norm(v, axis=1, keepdims=True)
    if np.any(norm == 0):
        raise OptionError(f"{what} must not be the zero vector")
    return v / norm


def _watson_abs_t(rng: np.random.Generator, n: int, kappa: float) -> np.ndarray:
    """Exact draws of s = |mu . x| in [0, 1] with density proportional to exp(kappa s^2)."""
    if n == 0:
        return np.empty(0)
    if kappa == 0:
        return rng.random(n)
    if kappa < 0:
        # inverse CDF: F(s) = erf(sqrt(-kappa) s) / erf(sqrt(-kappa))
        from scipy.special import erf, erfinv
        r = math.sqrt(-kappa)
        return np.clip(erfinv(rng.random(n) * erf(r)) / r, 0.0, 1.0)
    # kappa > 0: rejection from the truncated exponential exp(kappa (s - 1)) >= exp(kappa (s^2 - 1))
    # (s^2 <= s on [0, 1]); acceptance probability exp(-kappa s (1 - s)), about 1/2 or more.
    out = np.empty(n)
    filled = 0
    em = math.expm1(-kappa)
    while filled < n:
        m = int((n - filled) * 2.2) + 16
        u = rng.random(m)
        s = 1.0 + np.log1p((1.0 - u) * em) / kappa
        s = np.clip(s, 0.0, 1.0)
        keep = s[rng.random(m) < np.exp(-kappa * s * (1.0 - s))]
        take = min(len(keep), n - filled)
        out[filled:filled + take] = keep[:take]
        filled += take
    return out


def _watson(rng: np.random.Generator, n: int, kappa: float, mu: np.ndarray) -> np.ndarray:
    mu = _unit_rows(mu, n, "mu")
    s = _watson_abs_t(rng, n, kappa)
    t = np.where(rng.random(n) < 0.5, -s, s)
    phi = rng.uniform(0.0, 2.0 * math.pi, n)
    e1, e2 = _perp_basis(mu)
    r = np.sqrt(np.maximum(0.0, 1.0 - t * t))
    return (t[:, None] * mu + (r * np.cos(phi))[:, None] * e1 + (r * np.sin(phi))[:, None] * e2)


def watson_sample(n: int, kappa: float, mu=(0.0, 0.0, 1.0), seed=0) -> np.ndarray:
    """Draw ``n`` unit vectors from the Watson distribution about axis ``mu``.

    The density on the unit sphere is

    .. math:: f(x) \\propto \\exp(\\kappa (\\mu \\cdot x)^2),

    bipolar (concentrated along +-mu) for kappa > 0, a girdle about the plane normal to mu for
    kappa < 0, and uniform for kappa = 0. Sampling is exact: ``t = mu . x`` is drawn from its
    marginal density proportional to ``exp(kappa t^2)`` on [-1, 1] (by rejection from a
    truncated exponential for kappa > 0, by the inverse CDF ``erfinv`` for kappa < 0), and
    the azimuth about mu uniformly.

    Parameters
    ----------
    n : int
        Number of vectors.
    kappa : float
        Concentration (any finite value).
    mu : (3,) or (n, 3) array
        Axis (normalised here); one axis per draw is allowed.
    seed : int or numpy.random.Generator

    Returns
    -------
    (n, 3) array of unit vectors.

    References
    ----------
    Watson, G. S., Equatorial distributions on a sphere, Biometrika 52 (1965) 193,
    doi:10.1093/biomet/52.1-2.193. Mardia, K. V. & Jupp, P. E., Directional Statistics,
    Wiley (2000), section 9.4.2 (section number from memory).
    """
    if not (isinstance(n, (int, np.integer)) and n >= 0):
        raise OptionError(f"n must be a non-negative whole number, got {n!r}")
    if not math.isfinite(kappa):
        raise OptionError(f"kappa must be a finite number, got {kappa!r}")
    rng = seed if isinstance(seed, np.random.Generator) else np.random.default_rng(seed)
    return _watson(rng, int(n), float(kappa), mu)


# =========================================================================== template
@dataclass(frozen=True)
class _Template:
    """Triangles of a triangular lattice (edge 1) sorted by centroid distance from a vertex."""

    uv: np.ndarray          # (T, 3, 2) corners, counter-clockwise
    dist: np.ndarray        # (T,) centroid distance, ascending
    max_r: np.ndarray       # (T,) max corner radius of the first k+1 triangles
    min_u: np.ndarray       # (T,) min corner u of the first k+1 triangles


@lru_cache(maxsize=8)
def _template(reach: int) -> _Template:
    """Lattice triangles (unit edge) with centroids within ``reach`` of the origin."""
    m = 2 * reach + 2
    i, j = np.meshgrid(np.arange(-m, m + 1), np.arange(-m, m + 1), indexing="ij")
    i, j = i.ravel().astype(float), j.ravel().astype(float)
    a1 = np.array([1.0, 0.0])
    a2 = np.array([0.5, math.sqrt(3.0) / 2.0])

    def pt(ii, jj):
        return ii[:, None] * a1 + jj[:, None] * a2

    up = np.stack([pt(i, j), pt(i + 1, j), pt(i, j + 1)], axis=1)
    down = np.stack([pt(i + 1, j), pt(i + 1, j + 1), pt(i, j + 1)], axis=1)
    tri = np.concatenate([up, down])
    c = tri.mean(axis=1)
    d = np.hypot(c[:, 0], c[:, 1])
    keep = d <= reach
    tri, c, d = tri[keep], c[keep], d[keep]
    ang = np.mod(np.arctan2(c[:, 1], c[:, 0]), 2 * math.pi)
    order = np.lexsort((np.round(ang, 9), np.round(d, 9)))
    tri, d = tri[order], d[order]
    r = np.hypot(tri[..., 0], tri[..., 1]).max(axis=1)
    return _Template(tri, d, np.maximum.accumulate(r), np.minimum.accumulate(tri[..., 0].min(axis=1)))


def _patch_sizes(lateral: np.ndarray, edge: float) -> tuple[_Template, np.ndarray]:
    """Template (unit edge) and the number of triangles per layer for each lateral size."""
    radius = 0.5 * np.asarray(lateral, dtype=float) / edge
    reach = int(math.ceil(float(radius.max(initial=1.0)))) + 1
    reach = max(4, 1 << (reach - 1).bit_length())  # few distinct cached templates
    tpl = _template(reach)
    k = np.searchsorted(tpl.dist, radius + 1e-9, side="right")
    return tpl, np.maximum(k, 1)


# ============================================================================ building
@dataclass
class _Stacks:
    """Struct of arrays describing candidate (or placed) stacks."""

    n_layers: np.ndarray
    k: np.ndarray
    lateral: np.ndarray
    centre: np.ndarray
    normal: np.ndarray
    e1: np.ndarray
    e2: np.ndarray
    tilt: np.ndarray

    def take(self, idx) -> "_Stacks":
        return _Stacks(*(getattr(self, f)[idx] for f in self.__dataclass_fields__))

    @staticmethod
    def concat(parts) -> "_Stacks":
        return _Stacks(*(np.concatenate([getattr(p, f) for p in parts])
                         for f in _Stacks.__dataclass_fields__))

    def __len__(self):
        return len(self.n_layers)


def _build(st: _Stacks, tpl: _Template, edge: float, repeat: float, tilt_rad: float,
           stride: int = 1):
    """Prisms of the stacks ``st``: vertices (P, 3, 3), unit normals (P, 3), owner stack (P,),
    layer index (P,), tilted flag (P,). Fully vectorised. ``stride > 1`` builds only every
    stride-th triangle of each layer (a cheap probe)."""
    m = len(st)
    n_inst = st.n_layers + st.tilt.astype(np.int64)
    inst_stack = np.repeat(np.arange(m), n_inst)
    inst_start = np.cumsum(n_inst) - n_inst
    inst_layer = np.arange(len(inst_stack)) - np.repeat(inst_start, n_inst)
    inst_tilted = inst_layer == st.n_layers[inst_stack]
    inst_k = (st.k[inst_stack] + stride - 1) // stride
    pr_inst = np.repeat(np.arange(len(inst_stack)), inst_k)
    pr_start = np.cumsum(inst_k) - inst_k
    pr_tri = (np.arange(len(pr_inst)) - np.repeat(pr_start, inst_k)) * stride
    owner = inst_stack[pr_inst]
    layer = inst_layer[pr_inst]
    tilted = inst_tilted[pr_inst]
    uv = tpl.uv[pr_tri] * edge
    u = uv[..., 0].copy()
    v = uv[..., 1]
    w = np.zeros_like(u)
    nrm = st.normal[owner]
    e1 = st.e1[owner]
    if tilted.any():
        u0 = -tpl.min_u[st.k - 1] * edge      # hinge at the patch's rim on the -e1 side
        uu = u[tilted] + u0[owner[tilted], None]
        u[tilted] = -u0[owner[tilted], None] + uu * math.cos(tilt_rad)
        w[tilted] = uu * math.sin(tilt_rad)
        nrm = nrm.copy()
        nrm[tilted] = (math.cos(tilt_rad) * st.normal[owner[tilted]]
                       - math.sin(tilt_rad) * st.e1[owner[tilted]])
    h = (layer - 0.5 * (st.n_layers[owner] - 1)) * repeat
    w += h[:, None]
    verts = (st.centre[owner][:, None, :] + u[..., None] * e1[:, None, :]
             + v[..., None] * st.e2[owner][:, None, :] + w[..., None] * st.normal[owner][:, None, :])
    return verts, nrm, owner, layer, tilted


def _corners(verts, nrm, thickness):
    off = 0.5 * thickness * nrm[:, None, :]
    return np.concatenate([verts - off, verts + off], axis=1)


class _CentroidIndex:
    """Centroids of placed prisms for clearance queries: a main KD-tree rebuilt only when
    the points added since its last build (kept in a small second tree) grow large."""

    def __init__(self, transform, boxsize):
        self.transform = transform
        self.boxsize = boxsize
        self.main_pts = np.zeros((0, 3))
        self.main = None
        self.recent: list[np.ndarray] = []
        self.recent_tree = None

    @property
    def size(self) -> int:
        return len(self.main_pts) + sum(len(r) for r in self.recent)

    def add(self, pts: np.ndarray) -> None:
        self.recent.append(self.transform(pts))
        self.recent_tree = None
        n_recent = sum(len(r) for r in self.recent)
        if n_recent > max(20000, len(self.main_pts) // 2):
            self.main_pts = np.concatenate([self.main_pts] + self.recent)
            self.main = cKDTree(self.main_pts, boxsize=self.boxsize)
            self.recent = []

    def hits(self, q: np.ndarray, thr: float) -> np.ndarray:
        """True where a query point has a placed centroid closer than ``thr``."""
        q = self.transform(q)
        out = np.zeros(len(q), bool)
        if len(q) == 0:
            return out
        if self.main is not None:
            d, _ = self.main.query(q, k=1, distance_upper_bound=thr)
            out |= d < thr
        if self.recent:
            if self.recent_tree is None:
                self.recent_tree = cKDTree(np.concatenate(self.recent), boxsize=self.boxsize)
            d, _ = self.recent_tree.query(q, k=1, distance_upper_bound=thr)
            out |= d < thr
        return out


# ============================================================================== result
@dataclass
class StackTruth:
    """Per-stack ground truth (arrays of length S, stack id = index)."""

    n_layers: np.ndarray        # untilted layers in the stack
    normal: np.ndarray          # (S, 3) unit normal of the untilted layers
    centre: np.ndarray          # (S, 3) nm, midpoint of the untilted layers
    lateral_size: np.ndarray    # drawn lateral size (disc diameter), nm
    triangles_per_layer: np.ndarray
    has_tilt: np.ndarray        # bool: an extra tilted layer on top

    def table(self) -> dict:
        return {"stack": np.arange(len(self.n_layers)), "n_layers": self.n_layers,
                "nx": self.normal[:, 0], "ny": self.normal[:, 1], "nz": self.normal[:, 2],
                "cx": self.centre[:, 0], "cy": self.centre[:, 1], "cz": self.centre[:, 2],
                "lateral_size": self.lateral_size, "triangles_per_layer": self.triangles_per_layer,
                "has_tilt": self.has_tilt.astype(np.int64)}


@dataclass
class SynthResult:
    """A generated structure with its ground truth.

    Attributes
    ----------
    structure : Structure
        The prisms (columns ``sheet``: one id per layer, and ``born`` if requested).
    stack, layer : (N,) int arrays
        Stack id and layer index (0..n-1 bottom to top; ``n`` for a tilted defect layer).
    tilted : (N,) bool array
        Prism belongs to a tilted defect layer.
    stacking_number : (N,) int array
        Ground-truth stacking number: the stack's ``n_layers`` for untilted prisms, 1 for
        tilted ones.
    stacks : StackTruth
        Per-stack truth.
    requested, attempts : int
        Stacks asked for and candidate stacks tried.
    elapsed : float
        Seconds spent generating.
    """

    structure: Structure
    stack: np.ndarray
    layer: np.ndarray
    tilted: np.ndarray
    stacking_number: np.ndarray
    stacks: StackTruth
    requested: int
    attempts: int
    elapsed: float = 0.0
    settings: dict = field(default_factory=dict)

    @property
    def n_stacks(self) -> int:
        return len(self.stacks.n_layers)

    def table(self) -> dict:
        """Per-prism ground truth as equal-length columns (row i = prism i)."""
        return {"prism": np.arange(len(self.stack)), "stack": self.stack, "layer": self.layer,
                "tilted": self.tilted.astype(np.int64), "stacking_number": self.stacking_number,
                "sheet": self.structure.columns["sheet"],
                "stack_layers": self.stacks.n_layers[self.stack] if len(self.stack)
                else np.zeros(0, np.int64)}

    def to_dict(self) -> dict:
        return {"requested_stacks": int(self.requested), "placed_stacks": int(self.n_stacks),
                "prisms": int(len(self.stack)), "attempts": int(self.attempts),
                "tilted_layers": int(self.stacks.has_tilt.sum()),
                "mean_layers": float(self.stacks.n_layers.mean()) if self.n_stacks else 0.0,
                "elapsed_s": float(self.elapsed), "settings": dict(self.settings)}


def _assemble(st: _Stacks, tpl, *, domain, edge, repeat, thickness, tilt_rad, born,
              settings, requested, attempts, t0) -> SynthResult:
    if len(st):
        verts, _, owner, layer, tilted = _build(st, tpl, edge, repeat, tilt_rad)
    else:
        verts = np.zeros((0, 3, 3))
        owner = layer = np.zeros(0, np.int64)
        tilted = np.zeros(0, bool)
    n_inst = st.n_layers + st.tilt.astype(np.int64)
    first_sheet = np.cumsum(n_inst) - n_inst
    sheet = first_sheet[owner] + layer if len(owner) else np.zeros(0, np.int64)
    cols = {"sheet": sheet.astype(np.int64)}
    if born:
        cols["born"] = (owner + layer).astype(float)
    meta = {"generator": "sheetview.synth", "scenario": SCENARIO_NOTE, "synth": settings}
    s = Structure(verts, np.full(len(verts), float(thickness)), domain, repeat, cols, meta,
                  "sheetview.synth")
    sn = np.where(tilted, 1, st.n_layers[owner] if len(owner) else 0).astype(np.int64)
    truth = StackTruth(st.n_layers.astype(np.int64), st.normal, st.centre, st.lateral,
                       st.k.astype(np.int64), st.tilt.astype(bool))
    return SynthResult(s, owner.astype(np.int64), layer.astype(np.int64), tilted, sn, truth,
                       requested, attempts, time.perf_counter() - t0, settings)


# ================================================================================ API
def _check_positive(value, what):
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise OptionError(f"{what} must be a number, got {value!r}") from None
    if not (math.isfinite(v) and v > 0):
        raise OptionError(f"{what} must be a positive number of nm, got {value!r}")
    return v


def perfect_stack(n_layers: int, lateral_size: float, repeat: float = 1.4, thickness: float = 0.7,
                  normal=(0.0, 0.0, 1.0), center=(0.0, 0.0, 0.0), edge: float = 1.0,
                  *, born: bool = False) -> SynthResult:
    """One stack of ``n_layers`` identical layers, no randomness (for tests and examples).

    The domain is the box around the stack padded by two repeats on every side.
    Parameters as in :func:`pack_stacks`; ``lateral_size`` is the disc diameter (nm).
    """
    t0 = time.perf_counter()
    if not (isinstance(n_layers, (int, np.integer)) and n_layers >= 1):
        raise OptionError(f"n_layers must be a whole number >= 1, got {n_layers!r}")
    lateral_size = _check_positive(lateral_size, "lateral_size")
    repeat = _check_positive(repeat, "repeat")
    thickness = _check_positive(thickness, "thickness")
    edge = _check_positive(edge, "edge")
    nrm = _unit_rows(normal, 1, "normal")
    c = np.asarray(center, dtype=float).reshape(1, 3)
    tpl, k = _patch_sizes(np.array([lateral_size]), edge)
    e1, e2 = _perp_basis(nrm)
    st = _Stacks(np.array([int(n_layers)]), k, np.array([lateral_size]), c, nrm, e1, e2,
                 np.zeros(1, bool))
    verts, nn, _, _, _ = _build(st, tpl, edge, repeat, 0.0)
    corners = _corners(verts, nn, thickness).reshape(-1, 3)
    pad = 2.0 * repeat
    dom = Box(tuple(corners.min(axis=0) - pad), tuple(corners.max(axis=0) + pad))
    settings = {"kind": "perfect_stack", "n_layers": int(n_layers), "lateral_size": lateral_size,
                "repeat": repeat, "thickness": thickness, "normal": nrm[0].tolist(),
                "center": c[0].tolist(), "triangle_edge": edge}
    return _assemble(st, tpl, domain=dom, edge=edge, repeat=repeat, thickness=thickness,
                     tilt_rad=0.0, born=born, settings=settings, requested=1, attempts=1, t0=t0)


def _inside(domain, pts):
    """Corner-wise membership (an explicit hook: a domain is convex, so corners suffice)."""
    return domain.contains(pts)


def pack_stacks(domain, n_stacks: int, *, seeding: str = "volume", orientation: str = "isotropic",
                kappa: float = 10.0, normal=(0.0, 0.0, 1.0), layers="poisson:3",
                lateral_size="lognormal:5,0.3", triangle_edge: float = 1.0, repeat: float = 1.4,
                thickness: float = 0.7, clearance: float = 0.3, wall_gap: float = 0.3,
                tilt_angle: float = 0.0, tilt_probability: float = 0.0, born: bool = False,
                max_attempts: int | None = None, seed: int = 0) -> SynthResult:
    """Pack layered sheet stacks into a domain by random sequential placement.

    An invented demonstration scenario, **not** a growth simulation: finished stacks are
    proposed one after another and kept if they fit (see the module docstring for the
    geometry of a stack and of a tilt defect).

    Parameters
    ----------
    domain : Sphere or Box
        Where to pack. A periodic box has no walls (``seeding="wall"`` and
        ``orientation="wall"`` are refused); prisms are kept inside the primary cell and
        clearances are measured with the minimum-image convention.
    n_stacks : int
        Stacks to place. Fewer are placed if ``max_attempts`` candidates are used up
        (``result.n_stacks`` says how many).
    seeding : {"volume", "wall"}
        ``volume``: centres uniform in the domain. ``wall``: a uniform point on the wall
        (area-weighted over the faces of a box), the stack centre moved inwards along the
        wall normal by the stack's exact extent towards the wall (the largest projection
        of its prism corners), plus ``wall_gap``, plus for a sphere the wall's sag
        ``R - sqrt(R^2 - rho^2)`` over the stack's radius ``rho`` about the wall normal.
    orientation : {"isotropic", "wall", "fixed"}
        Stack normals: uniform on the sphere; Watson-distributed with concentration
        ``kappa`` about the inward wall normal at the centre (``Domain.inward_normal``;
        density proportional to ``exp(kappa (mu . n)^2)``, see :func:`watson_sample`); or
        all equal to ``normal``.
    kappa : float
        Watson concentration (negative: girdle about the wall plane).
    normal : (3,) array
        The normal for ``orientation="fixed"``.
    layers : str
        Layer-count distribution spec (``"poisson:3"``, ``"uniform:2,6"``, ``"fixed:4"``).
    lateral_size : str
        Layer diameter distribution spec in nm (``"lognormal:5,0.3"``, ``"fixed:6"``,
        ``"uniform:4,8"``).
    triangle_edge : float
        Edge of the equilateral triangles, nm.
    repeat : float
        Distance between layer mid-planes along the stack normal, nm (also the
        Structure's ``spacing``).
    thickness : float
        Prism thickness, nm (must be below ``repeat``).
    clearance : float
        Minimum distance between prisms of different stacks, nm. Tested conservatively
        with the bounding spheres of the prisms (centroid distance at least
        ``2 r + clearance``, r the prism's circumradius), so real gaps are often larger.
    wall_gap : float
        Extra distance between wall-seeded stacks and the wall, nm.
    tilt_angle : float
        Rotation of a tilt-defect layer about an in-plane axis, degrees (0 < angle < 90).
    tilt_probability : float
        Probability that a stack gets a tilt-defect layer on top.
    born : bool
        Add a ``born`` column: stacks are "born" in placement order and their layers
        appended one per step, so layer ``j`` of stack ``s`` (0-based, in placement order)
        has ``born = s + j`` (a tilt-defect layer ``s + n``). Arbitrary time units; no
        kinetics is modelled.
    max_attempts : int, optional
        Candidate stacks to try at most (default ``100 * n_stacks + 1000``). Packing
        also stops once :data:`STALL_ATTEMPTS` (10,000) candidates in a row have failed.
    seed : int
        Random seed; the same inputs and seed give the same structure.

    Returns
    -------
    SynthResult
        The structure (metadata: settings and the note that it is invented) and the
        ground truth.
    """
    t0 = time.perf_counter()
    if not isinstance(domain, (Sphere, Box)):
        raise OptionError("domain must be a sheetview Sphere or Box")
    if not (isinstance(n_stacks, (int, np.integer)) and not isinstance(n_stacks, bool)
            and n_stacks >= 0):
        raise OptionError(f"--stacks (n_stacks) must be a whole number >= 0, got {n_stacks!r}")
    if seeding not in ("volume", "wall"):
        raise OptionError(f"--seeding must be 'volume' or 'wall', not {seeding!r}")
    if orientation not in ("isotropic", "wall", "fixed"):
        raise OptionError(f"--orientation must be 'isotropic', 'wall' or 'fixed', not {orientation!r}")
    periodic = isinstance(domain, Box) and domain.periodic
    if periodic and (seeding == "wall" or orientation == "wall"):
        raise OptionError("a periodic box has no walls: use --seeding volume and "
                          "--orientation isotropic or fixed (or drop --periodic)")
    try:
        kappa = float(kappa)
    except (TypeError, ValueError):
        raise OptionError(f"--kappa must be a number, got {kappa!r}") from None
    if not math.isfinite(kappa) or abs(kappa) > 1e6:
        raise OptionError(f"--kappa must be a finite number of magnitude at most 1e6, got {kappa}")
    fixed_normal = _unit_rows(normal, 1, "--normal")[0]
    ldist = parse_distribution(layers, name="--layers", integer=True)
    sdist = parse_distribution(lateral_size, name="--lateral", integer=False)
    edge = _check_positive(triangle_edge, "--edge (triangle_edge)")
    repeat = _check_positive(repeat, "--repeat")
    thickness = _check_positive(thickness, "--thickness")
    if thickness >= repeat:
        raise OptionError(f"--thickness ({thickness} nm) must be smaller than --repeat "
                          f"({repeat} nm), or the layers of a stack would overlap")
    try:
        clearance, wall_gap = float(clearance), float(wall_gap)
        tilt_angle, tilt_probability = float(tilt_angle), float(tilt_probability)
    except (TypeError, ValueError):
        raise OptionError("clearance, wall_gap, tilt_angle and tilt_probability must be numbers") from None
    if not (math.isfinite(clearance) and clearance >= 0):
        raise OptionError(f"--clearance must be a number of nm >= 0, got {clearance}")
    if not (math.isfinite(wall_gap) and wall_gap >= 0):
        raise OptionError(f"--wall-gap must be a number of nm >= 0, got {wall_gap}")
    if not (0.0 <= tilt_probability <= 1.0):
        raise OptionError(f"--tilt-probability must be between 0 and 1, got {tilt_probability}")
    if tilt_probability > 0 and not (0.0 < tilt_angle < 90.0):
        raise OptionError(f"--tilt-angle must be between 0 and 90 degrees (exclusive) when "
                          f"--tilt-probability > 0, got {tilt_angle}")
    if max_attempts is None:
        max_attempts = 100 * int(n_stacks) + 1000
    if not (isinstance(max_attempts, (int, np.integer)) and max_attempts >= 1):
        raise OptionError(f"--max-attempts must be a whole number >= 1, got {max_attempts!r}")
    tilt_rad = math.radians(tilt_angle)

    settings = {"kind": "pack_stacks", "domain": domain.to_dict(), "n_stacks": int(n_stacks),
                "seeding": seeding, "orientation": orientation, "kappa": kappa,
                "normal": fixed_normal.tolist(), "layers": str(ldist), "lateral_size": str(sdist),
                "triangle_edge": edge, "repeat": repeat, "thickness": thickness,
                "clearance": clearance, "wall_gap": wall_gap, "tilt_angle": tilt_angle,
                "tilt_probability": tilt_probability, "born": bool(born),
                "max_attempts": int(max_attempts), "seed": int(seed)}

    rng = np.random.default_rng(seed)
    # every prism is an equilateral triangle of edge `edge`, extruded by `thickness`
    r_prism = math.sqrt(edge * edge / 3.0 + 0.25 * thickness * thickness)
    thr = 2.0 * r_prism + clearance
    lo, hi = (np.asarray(b, dtype=float) for b in domain.bounds)
    boxsize = (hi - lo) if periodic else None

    def tree_points(c):
        if not periodic:
            return c
        p = np.mod(c - lo, boxsize)
        return np.minimum(p, np.nextafter(boxsize, 0))

    placed: list[_Stacks] = []
    index = _CentroidIndex(tree_points, boxsize)
    n_placed = 0
    attempts = 0
    rate = 1.0
    per_cand = max(1.0, ldist.mean * (1 + tilt_probability)
                   * max(1.0, 3.6 * (sdist.mean / edge) ** 2))
    tpl_all = None
    failed_run = 0  # candidates tried since the last accepted one (counted per batch)
    while n_placed < n_stacks and attempts < max_attempts and failed_run < STALL_ATTEMPTS:
        remaining = n_stacks - n_placed
        budget = max(8, int(40000 / per_cand))
        m = int(min(max(8, math.ceil(1.3 * remaining / max(rate, 0.01))), budget,
                    max_attempts - attempts))
        attempts += m
        # ---------------------------------------------------------------- proposals
        nl = np.maximum(ldist.sample(rng, m), 1)
        lat = sdist.sample(rng, m)
        tpl, k = _patch_sizes(lat, edge)
        if tpl_all is None or len(tpl.dist) > len(tpl_all.dist):
            tpl_all = tpl
        tilt = rng.random(m) < tilt_probability
        if seeding == "wall":
            if isinstance(domain, Sphere):
                d = rng.standard_normal((m, 3))
                d /= np.linalg.norm(d, axis=1, keepdims=True)
                wall_pt = np.asarray(domain.center) + domain.radius * d
                mu = -d
            else:
                L = hi - lo
                areas = np.array([L[1] * L[2], L[0] * L[2], L[0] * L[1]] * 2)
                face = rng.choice(6, size=m, p=areas / areas.sum())
                wall_pt = lo + rng.random((m, 3)) * L
                ax = face % 3
                wall_pt[np.arange(m), ax] = np.where(face < 3, lo[ax], hi[ax])
                mu = np.zeros((m, 3))
                mu[np.arange(m), ax] = np.where(face < 3, 1.0, -1.0)
        else:
            if isinstance(domain, Sphere):
                d = rng.standard_normal((m, 3))
                d /= np.linalg.norm(d, axis=1, keepdims=True)
                r = domain.radius * rng.random(m) ** (1.0 / 3.0)
                centre = np.asarray(domain.center) + r[:, None] * d
            else:
                centre = lo + rng.random((m, 3)) * (hi - lo)
            mu = None
            if orientation == "wall":
                mu = domain.inward_normal(centre)
                bad = ~np.all(np.isfinite(mu), axis=1)
                mu[bad] = fixed_normal
        if orientation == "isotropic":
            nrm = _watson(rng, m, 0.0, np.array([0.0, 0.0, 1.0]))
        elif orientation == "wall":
            nrm = _watson(rng, m, kappa, mu)
        else:
            nrm = np.broadcast_to(fixed_normal, (m, 3)).copy()
        if mu is not None and orientation != "fixed":
            # stacks grow away from the wall: the top (tilt-defect side) faces inwards
            flip = np.einsum("ij,ij->i", nrm, mu) < 0
            nrm[flip] *= -1.0
        e1, e2 = _perp_basis(nrm)
        psi = rng.uniform(0.0, 2.0 * math.pi, m)
        c, s = np.cos(psi)[:, None], np.sin(psi)[:, None]
        e1, e2 = c * e1 + s * e2, -s * e1 + c * e2
        if seeding == "wall":
            # extent of each stack towards the wall along -mu, bounded by cylinders about
            # the stack axis (the untilted layers, and the tilt-defect layer above them)
            cw = np.einsum("ij,ij->i", nrm, -mu)
            sw = np.sqrt(np.maximum(0.0, 1.0 - cw * cw))
            rho = tpl.max_r[k - 1] * edge + 0.5 * thickness
            hh = 0.5 * (nl - 1) * repeat + 0.5 * thickness
            reach_w = rho * sw + hh * np.abs(cw)
            w_max = hh.copy()
            if tilt.any():
                w_lo = hh + repeat - thickness
                w_hi = w_lo + 2.0 * rho * math.sin(tilt_rad) + thickness
                rho_t = rho + 2.0 * (rho - 0.5 * thickness) * (1.0 - math.cos(tilt_rad))
                tilt_reach = rho_t * sw + np.maximum(cw * w_lo, cw * w_hi)
                reach_w = np.where(tilt, np.maximum(reach_w, tilt_reach), reach_w)
                w_max = np.where(tilt, w_hi, w_max)
                rho = np.where(tilt, rho_t, rho)
            dist = reach_w + wall_gap
            if isinstance(domain, Sphere):
                R = domain.radius
                rho_w = np.minimum(rho + w_max * sw, R)
                dist += R - np.sqrt(R * R - rho_w * rho_w)
            centre = wall_pt + dist[:, None] * mu
        cand = _Stacks(nl.astype(np.int64), k.astype(np.int64), lat, centre, nrm, e1, e2, tilt)
        alive = np.arange(m)
        if index.size:
            # cheap probe with every 5th triangle: most failing candidates fail here
            verts, pn, owner, _, _ = _build(cand, tpl, edge, repeat, tilt_rad, stride=5)
            bad = ~np.all(_inside(domain, _corners(verts, pn, thickness)), axis=1)
            good = ~bad
            bad[good] = index.hits(verts[good].mean(axis=1), thr)
            alive = np.flatnonzero(np.bincount(owner, weights=bad, minlength=m) == 0)
            cand = cand.take(alive)
        mc = len(cand)
        verts, pn, owner, _, _ = _build(cand, tpl, edge, repeat, tilt_rad)
        corners = _corners(verts, pn, thickness)
        # ------------------------------------------------------------- inside test
        prism_ok = np.all(_inside(domain, corners), axis=1)
        ok = np.bincount(owner, weights=~prism_ok, minlength=mc) == 0
        # ------------------------------------------------- clearance to placed stacks
        cent = verts.mean(axis=1)
        if index.size:
            sel = ok[owner]
            hit = np.zeros(len(owner), bool)
            hit[sel] = index.hits(cent[sel], thr)
            ok &= np.bincount(owner, weights=hit, minlength=mc) == 0
        # ----------------------------------------- clearance among this batch (greedy)
        sel = ok[owner]
        idx = np.flatnonzero(sel)
        conflicts: dict[int, list[int]] = {}
        if len(idx) > 1:
            bt = cKDTree(tree_points(cent[idx]), boxsize=boxsize)
            pairs = bt.query_pairs(thr, output_type="ndarray")
            if len(pairs):
                a, b = owner[idx[pairs[:, 0]]], owner[idx[pairs[:, 1]]]
                diff = a != b
                a, b = a[diff], b[diff]
                lo_, hi_ = np.minimum(a, b), np.maximum(a, b)
                uniq = np.unique(lo_ * mc + hi_)
                for key in uniq.tolist():
                    conflicts.setdefault(key % mc, []).append(key // mc)
        accepted = []
        acc_set = set()
        for i in np.flatnonzero(ok).tolist():
            if n_placed + len(accepted) >= n_stacks:
                break
            if any(j in acc_set for j in conflicts.get(i, ())):
                continue
            accepted.append(i)
            acc_set.add(i)
        rate = max(len(accepted) / m, 0.0)
        failed_run = 0 if accepted else failed_run + m
        per_cand = max(1.0, len(owner) / max(mc, 1))
        if accepted:
            acc = np.asarray(accepted)
            placed.append(cand.take(acc))
            keep = np.zeros(mc, bool)
            keep[acc] = True
            index.add(cent[keep[owner]])
            n_placed += len(acc)

    if placed:
        st = _Stacks.concat(placed)
    else:
        z = np.zeros(0)
        st = _Stacks(z.astype(np.int64), z.astype(np.int64), z, np.zeros((0, 3)),
                     np.zeros((0, 3)), np.zeros((0, 3)), np.zeros((0, 3)), z.astype(bool))
    if tpl_all is None or (len(st) and st.k.max() > len(tpl_all.dist)):
        tpl_all = _patch_sizes(st.lateral if len(st) else np.array([1.0]), edge)[0]
    settings["placed_stacks"] = int(len(st))
    return _assemble(st, tpl_all, domain=domain, edge=edge, repeat=repeat, thickness=thickness,
                     tilt_rad=tilt_rad, born=born, settings=settings, requested=int(n_stacks),
                     attempts=int(attempts), t0=t0)


def write_truth(result: SynthResult, path, *, force: bool = False):
    """Write the per-prism ground truth of ``result`` as CSV (one row per prism, in the
    order of the prism table), through :func:`sheetview.io.output.atomic_path`.

    Columns: ``prism`` (0-based row in the prism table), ``stack``, ``layer``, ``tilted``
    (0/1), ``stacking_number``, ``sheet``, ``stack_layers`` (untilted layers of the stack).
    """
    from pathlib import Path

    from .io.output import atomic_path

    cols = result.table()
    names = list(cols)
    data = np.column_stack([np.asarray(cols[n], dtype=np.int64) for n in names]) \
        if len(result.stack) else np.zeros((0, len(names)), np.int64)
    with atomic_path(path, force) as tmp:
        with open(tmp, "w", encoding="utf-8") as fh:
            fh.write(f"# ground truth for an {SCENARIO_NOTE}\n")
            fh.write(",".join(names) + "\n")
            np.savetxt(fh, data, fmt="%d", delimiter=",")
    return Path(path)


def rhombus_patch(n: int, edge: float = 1.0) -> np.ndarray:
    """An ``n x n`` rhombus of ``2 n^2`` equilateral triangles (edge ``edge`` nm) in the
    z = 0 plane, centred on the origin, as (2 n^2, 3, 3) corners; neighbours share edges.
    A small fixed layer for tests and benchmarks (invented geometry)."""
    a1 = np.array([edge, 0, 0.0])
    a2 = np.array([edge / 2, edge * np.sqrt(3) / 2, 0.0])
    i, j = np.meshgrid(np.arange(n), np.arange(n), indexing="ij")
    i = i.ravel()[:, None]
    j = j.ravel()[:, None]

    def corner(di, dj):
        return (i + di) * a1 + (j + dj) * a2
    v = np.concatenate([np.stack([corner(0, 0), corner(1, 0), corner(0, 1)], 1),
                        np.stack([corner(1, 0), corner(1, 1), corner(0, 1)], 1)])
    return v - v.reshape(-1, 3).mean(0)
