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

import numba
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


# ================================================================== dense filling
#: Prisms of different stacks whose normals lie within this angle (degrees) of each other
#: are kept from looking stacked in the fill mode (:func:`_looks_stacked`): the stacking
#: measure's default tilt limit, so that it finds neither stacked links nor tilted
#: contacts between different stacks.
GUARD_ANGLE = 25.0
#: Least in-plane separation (nm) of the projections of two such prisms closer than 1.5
#: repeats along their mean normal (above the stacking measure's default edge tolerance).
GUARD_GAP = 0.1
#: Failed tries at (or next to) a voxel of the free-space map before it is no longer a site.
MAX_STRIKES = 4
#: Default number of proposals (size and orientation drawn from their laws) per site.
FILL_TRIES = 32
#: Proposals per site passed from the map's ranking to the exact tests, best first.
FILL_KEEP = 3
#: Margin (in voxels) above the clearance that the free-space map must show over the body
#: of a proposed stack.
FILL_MARGIN = 0.5
#: Map tests per proposal in the search for its largest scale that fits the map.
FIT_STEPS = 10
#: Exact tests per proposal in the search for its largest scale that passes them.
PLACE_STEPS = 6


def _stack_guard(repeat: float, edge: float) -> float:
    """Centroid distance beyond which two near-parallel prisms of different stacks cannot
    look stacked (:func:`_looks_stacked`): ``sqrt((1.5 repeat)^2 + (2 edge / sqrt 3 +
    GUARD_GAP)^2)``. Closer than 1.5 repeats along their mean normal, they are then more
    than two circumradii plus :data:`GUARD_GAP` apart across it."""
    return math.hypot(1.5 * repeat, 2.0 * edge / math.sqrt(3.0) + GUARD_GAP)


@numba.njit(cache=True)
def _axis_gap(a, na, ha, b, nb, hb, u0, u1, u2):
    """Gap between the projections of two prisms on the axis (u0, u1, u2) (negative when
    they overlap), in nm; -inf for a null axis."""
    nrm = math.sqrt(u0 * u0 + u1 * u1 + u2 * u2)
    if nrm < 1e-12:
        return -np.inf
    amin = np.inf
    amax = -np.inf
    bmin = np.inf
    bmax = -np.inf
    for k in range(3):
        pa = a[k, 0] * u0 + a[k, 1] * u1 + a[k, 2] * u2
        pb = b[k, 0] * u0 + b[k, 1] * u1 + b[k, 2] * u2
        amin = min(amin, pa)
        amax = max(amax, pa)
        bmin = min(bmin, pb)
        bmax = max(bmax, pb)
    ra = ha * abs(na[0] * u0 + na[1] * u1 + na[2] * u2)
    rb = hb * abs(nb[0] * u0 + nb[1] * u1 + nb[2] * u2)
    return max(bmin - rb - amax - ra, amin - ra - bmax - rb) / nrm


@numba.njit(cache=True)
def _separated(a, na, ha, b, nb, hb, clear, ea, eb):
    """True when some separating axis puts the two prisms at least ``clear`` apart.

    Prism = mid-plane triangle ``a`` (3, 3) extruded by ``ha`` along the unit normal ``na``
    on both sides. Axes: the five face normals of each prism and the cross products of
    their edge directions (three triangle edges and the normal each), the candidate axes
    of the separating axis theorem for convex polyhedra (Gottschalk, Lin & Manocha,
    SIGGRAPH 1996, doi:10.1145/237170.237244). The gap along any axis is a lower bound of
    the true distance, so the test never accepts two prisms closer than ``clear``."""
    for k in range(3):
        for d in range(3):
            ea[k, d] = a[(k + 1) % 3, d] - a[k, d]
            eb[k, d] = b[(k + 1) % 3, d] - b[k, d]
    for d in range(3):
        ea[3, d] = na[d]
        eb[3, d] = nb[d]
    if _axis_gap(a, na, ha, b, nb, hb, na[0], na[1], na[2]) >= clear:
        return True
    if _axis_gap(a, na, ha, b, nb, hb, nb[0], nb[1], nb[2]) >= clear:
        return True
    for k in range(3):
        u0 = ea[k, 1] * na[2] - ea[k, 2] * na[1]
        u1 = ea[k, 2] * na[0] - ea[k, 0] * na[2]
        u2 = ea[k, 0] * na[1] - ea[k, 1] * na[0]
        if _axis_gap(a, na, ha, b, nb, hb, u0, u1, u2) >= clear:
            return True
        u0 = eb[k, 1] * nb[2] - eb[k, 2] * nb[1]
        u1 = eb[k, 2] * nb[0] - eb[k, 0] * nb[2]
        u2 = eb[k, 0] * nb[1] - eb[k, 1] * nb[0]
        if _axis_gap(a, na, ha, b, nb, hb, u0, u1, u2) >= clear:
            return True
    for i in range(4):
        for j in range(4):
            u0 = ea[i, 1] * eb[j, 2] - ea[i, 2] * eb[j, 1]
            u1 = ea[i, 2] * eb[j, 0] - ea[i, 0] * eb[j, 2]
            u2 = ea[i, 0] * eb[j, 1] - ea[i, 1] * eb[j, 0]
            if _axis_gap(a, na, ha, b, nb, hb, u0, u1, u2) >= clear:
                return True
    return False


@numba.njit(cache=True)
def _looks_stacked(a, na, b, nb, repeat, margin):
    """Whether two near-parallel prisms (mid-plane triangles ``a``, ``b`` relative to the
    first centroid, unit normals ``na``, ``nb``) could be linked by the stacking measure:
    closer than 1.5 repeats along their mean normal ``m`` (any gap tolerance it accepts
    is below half the repeat) and, projected on the plane normal to ``m``, closer than
    ``margin`` (2D separating axes over the six edge normals), so that their projections
    could overlap or share an edge."""
    s = 1.0 if na[0] * nb[0] + na[1] * nb[1] + na[2] * nb[2] >= 0.0 else -1.0
    m0 = na[0] + s * nb[0]
    m1 = na[1] + s * nb[1]
    m2 = na[2] + s * nb[2]
    mn = math.sqrt(m0 * m0 + m1 * m1 + m2 * m2)
    m0 /= mn
    m1 /= mn
    m2 /= mn
    ca0 = (a[0, 0] + a[1, 0] + a[2, 0]) / 3.0
    ca1 = (a[0, 1] + a[1, 1] + a[2, 1]) / 3.0
    ca2 = (a[0, 2] + a[1, 2] + a[2, 2]) / 3.0
    cb0 = (b[0, 0] + b[1, 0] + b[2, 0]) / 3.0
    cb1 = (b[0, 1] + b[1, 1] + b[2, 1]) / 3.0
    cb2 = (b[0, 2] + b[1, 2] + b[2, 2]) / 3.0
    if abs((cb0 - ca0) * m0 + (cb1 - ca1) * m1 + (cb2 - ca2) * m2) >= 1.5 * repeat:
        return False
    # in-plane basis (u, v) of the plane normal to m
    if abs(m0) < 0.9:
        u0, u1, u2 = 0.0, -m2, m1
    else:
        u0, u1, u2 = m2, 0.0, -m0
    un = math.sqrt(u0 * u0 + u1 * u1 + u2 * u2)
    u0 /= un
    u1 /= un
    u2 /= un
    v0 = m1 * u2 - m2 * u1
    v1 = m2 * u0 - m0 * u2
    v2 = m0 * u1 - m1 * u0
    px = np.empty((2, 3))
    py = np.empty((2, 3))
    for q in range(3):
        px[0, q] = a[q, 0] * u0 + a[q, 1] * u1 + a[q, 2] * u2
        py[0, q] = a[q, 0] * v0 + a[q, 1] * v1 + a[q, 2] * v2
        px[1, q] = b[q, 0] * u0 + b[q, 1] * u1 + b[q, 2] * u2
        py[1, q] = b[q, 0] * v0 + b[q, 1] * v1 + b[q, 2] * v2
    for t in range(2):
        for q in range(3):
            ex = px[t, (q + 1) % 3] - px[t, q]
            ey = py[t, (q + 1) % 3] - py[t, q]
            nx = -ey
            ny = ex
            nn = math.sqrt(nx * nx + ny * ny)
            if nn < 1e-12:
                continue
            amin = np.inf
            amax = -np.inf
            bmin = np.inf
            bmax = -np.inf
            for r in range(3):
                pa = px[0, r] * nx + py[0, r] * ny
                pb = px[1, r] * nx + py[1, r] * ny
                amin = min(amin, pa)
                amax = max(amax, pa)
                bmin = min(bmin, pb)
                bmax = max(bmax, pb)
            if max(bmin - amax, amin - bmax) / nn >= margin:
                return False
    return True


@numba.njit(cache=True)
def _cell_of(x, lo, cs, ncell, periodic):
    c = 0
    for d in range(3):
        i = int(math.floor((x[d] - lo[d]) / cs[d]))
        if periodic:
            i %= ncell[d]
        else:
            i = min(max(i, 0), ncell[d] - 1)
        c = c * ncell[d] + i
    return c


@numba.njit(cache=True)
def _build_one(V, N, C, x, nrm, e1, e2, k, n, tilt, uv, minu, edge, repeat, cos_a, sin_a):
    """The prisms of one stack into V, N, C (rows 0..P-1, P returned), exactly as
    :func:`_build` makes them."""
    p = 0
    u0 = -minu[k - 1] * edge
    for layer in range(n + (1 if tilt else 0)):
        tilted = layer == n
        hgt = (layer - 0.5 * (n - 1)) * repeat
        for t in range(k):
            for q in range(3):
                u = uv[t, q, 0] * edge
                v = uv[t, q, 1] * edge
                w = 0.0
                if tilted:
                    uu = u + u0
                    u = -u0 + uu * cos_a
                    w = uu * sin_a
                w += hgt
                for d in range(3):
                    V[p, q, d] = x[d] + u * e1[d] + v * e2[d] + w * nrm[d]
            for d in range(3):
                N[p, d] = cos_a * nrm[d] - sin_a * e1[d] if tilted else nrm[d]
                C[p, d] = (V[p, 0, d] + V[p, 1, d] + V[p, 2, d]) / 3.0
            p += 1
    return p


@numba.njit(cache=True)
def _inside_one(V, N, P, half, sphere, dc, dr, dlo, dhi):
    """Every corner of prisms 0..P-1 (mid-plane corners +- half the thickness along the
    normal) at least 1e-9 nm inside the sphere (centre dc, radius dr) or box (dlo, dhi)."""
    for p in range(P):
        for q in range(3):
            for sgn in (-1.0, 1.0):
                if sphere:
                    r2 = 0.0
                    for d in range(3):
                        z = V[p, q, d] + sgn * half * N[p, d] - dc[d]
                        r2 += z * z
                    if math.sqrt(r2) > dr - 1e-9:
                        return False
                else:
                    for d in range(3):
                        z = V[p, q, d] + sgn * half * N[p, d]
                        if z < dlo[d] + 1e-9 or z > dhi[d] - 1e-9:
                            return False
    return True


@numba.njit(cache=True)
def _conflict(V, N, C, P, half, SV, SN, SC, SH, nxt, head, count0, lo, cs, ncell, L,
              periodic, clear, ball2, guard2, cos_guard, repeat, a, b, ea, eb, dv):
    """0 when prisms 0..P-1 keep clear of every stored prism, else 1 (a conflict with a
    prism stored before index ``count0``) or 2 (only with later ones).

    Centroids closer than ``sqrt(ball2)`` must be separated by ``clear``
    (:func:`_separated`); near-parallel prisms (``|n.n'| >= cos_guard``) with centroids
    closer than ``sqrt(guard2)`` (:func:`_stack_guard`) must not look stacked
    (:func:`_looks_stacked`), so that the stacking measure cannot join two stacks."""
    for p in range(P):
        ci0 = int(math.floor((C[p, 0] - lo[0]) / cs[0]))
        ci1 = int(math.floor((C[p, 1] - lo[1]) / cs[1]))
        ci2 = int(math.floor((C[p, 2] - lo[2]) / cs[2]))
        if periodic:
            ci0 %= ncell[0]
            ci1 %= ncell[1]
            ci2 %= ncell[2]
        else:
            ci0 = min(max(ci0, 0), ncell[0] - 1)
            ci1 = min(max(ci1, 0), ncell[1] - 1)
            ci2 = min(max(ci2, 0), ncell[2] - 1)
        l0 = 0 if (periodic and ncell[0] < 3) else 1
        l1 = 0 if (periodic and ncell[1] < 3) else 1
        l2 = 0 if (periodic and ncell[2] < 3) else 1
        for ox in range(-l0, l0 + 1):
            jx = ci0 + ox
            if periodic:
                jx %= ncell[0]
            elif jx < 0 or jx >= ncell[0]:
                continue
            for oy in range(-l1, l1 + 1):
                jy = ci1 + oy
                if periodic:
                    jy %= ncell[1]
                elif jy < 0 or jy >= ncell[1]:
                    continue
                for oz in range(-l2, l2 + 1):
                    jz = ci2 + oz
                    if periodic:
                        jz %= ncell[2]
                    elif jz < 0 or jz >= ncell[2]:
                        continue
                    j = head[(jx * ncell[1] + jy) * ncell[2] + jz]
                    while j >= 0:
                        d2 = 0.0
                        for d in range(3):
                            dk = SC[j, d] - C[p, d]
                            if periodic:
                                dk -= L[d] * np.round(dk / L[d])
                            dv[d] = dk
                            d2 += dk * dk
                        if d2 >= guard2 and d2 >= ball2:
                            j = nxt[j]
                            continue
                        for q in range(3):
                            for d in range(3):
                                a[q, d] = V[p, q, d] - C[p, d]
                                b[q, d] = SV[j, q, d] - SC[j, d] + dv[d]
                        bad = False
                        if d2 < guard2:
                            cn = abs(N[p, 0] * SN[j, 0] + N[p, 1] * SN[j, 1] + N[p, 2] * SN[j, 2])
                            bad = cn >= cos_guard and _looks_stacked(a, N[p], b, SN[j], repeat,
                                                                     GUARD_GAP)
                        if not bad and d2 < ball2:
                            bad = not _separated(a, N[p], half, b, SN[j], SH[j], clear, ea, eb)
                        if bad:
                            return 1 if j < count0 else 2
                        j = nxt[j]
    return 0


@numba.njit(cache=True)
def _place_fit(centre, nrm, e1, e2, n0, lat0, tilt, s_map, keep, tpl_dist, uv, minu, edge,
               repeat, thickness, cos_a, sin_a, vol0, vol_target, max_new, SV, SN, SC, SH, nxt,
               head, count0, lo, cs, ncell, L, periodic, sphere, dc, dr, dlo, dhi, clear, ball2,
               guard2, cos_guard, steps, maxp):
    """Place one stack per site, site by site in order, from the site's ``keep`` proposals
    (rows ``site * keep + r``, best first; ``s_map`` < 0 marks none): the first proposal
    that fits is kept, at the largest scale that passes the exact tests (inside the
    domain, :func:`_conflict`), searched by bisection below the map's estimate ``s_map``
    (at most ``steps`` tests, then the smallest stack). A kept stack's prisms join the cell
    list at once. Stops once the C-S-H volume reaches ``vol_target`` or ``max_new`` stacks
    are kept.

    Returns (per site: state 1 kept, 0 not tried, -1 nothing fits because of a stack
    placed before this call, -2 only because of one placed in this call, -3 nothing fits
    inside the domain; the proposal kept (0..keep-1); its layers, triangles per layer and
    scale; then the prisms stored and the volume)."""
    M = centre.shape[0] // keep
    state = np.zeros(M, np.int8)
    r_out = np.zeros(M, np.int64)
    n_out = np.zeros(M, np.int64)
    k_out = np.zeros(M, np.int64)
    s_out = np.zeros(M)
    V = np.empty((maxp, 3, 3))
    N = np.empty((maxp, 3))
    C = np.empty((maxp, 3))
    a = np.empty((3, 3))
    b = np.empty((3, 3))
    ea = np.empty((4, 3))
    eb = np.empty((4, 3))
    dv = np.empty(3)
    half = 0.5 * thickness
    area = math.sqrt(3.0) / 4.0 * edge * edge
    count = count0
    vol = vol0
    n_new = 0
    for m in range(M):
        if vol >= vol_target or n_new >= max_new:
            break
        worst = 0
        for r in range(keep):
            q = m * keep + r
            if s_map[q] < 0.0:
                continue
            best = -1.0
            lo_s = 0.0
            hi_s = s_map[q]
            s = hi_s
            code0 = 0
            tested0 = False
            for step in range(steps + 1):
                if step == steps:
                    if best >= 0.0 or tested0:
                        break
                    s = 0.0
                n = 1 + int(math.floor(s * (n0[q] - 1) + 0.5))
                kk = max(1, np.searchsorted(tpl_dist, 0.5 * s * lat0[q] / edge + 1e-9,
                                            side="right"))
                P = _build_one(V, N, C, centre[q], nrm[q], e1[q], e2[q], kk, n, tilt[q], uv,
                               minu, edge, repeat, cos_a, sin_a)
                if not _inside_one(V, N, P, half, sphere, dc, dr, dlo, dhi):
                    code = 3
                else:
                    code = _conflict(V, N, C, P, half, SV, SN, SC, SH, nxt, head, count0, lo,
                                     cs, ncell, L, periodic, clear, ball2, guard2, cos_guard,
                                     repeat, a, b, ea, eb, dv)
                if s == 0.0:
                    tested0 = True
                    code0 = code
                if code == 0:
                    best = s
                    lo_s = s
                    if step == 0:
                        break
                else:
                    hi_s = s
                    if s == 0.0:
                        break
                s = 0.5 * (lo_s + hi_s)
                if hi_s - lo_s < 1e-3 and best >= 0.0:
                    break
            if best < 0.0:
                # remember the most lasting reason: outside or an older stack beat a newer one
                c = 3 if code0 == 3 else (1 if code0 == 1 else 2)
                if worst == 0 or c != 2:
                    worst = c
                continue
            n = 1 + int(math.floor(best * (n0[q] - 1) + 0.5))
            kk = max(1, np.searchsorted(tpl_dist, 0.5 * best * lat0[q] / edge + 1e-9,
                                        side="right"))
            P = _build_one(V, N, C, centre[q], nrm[q], e1[q], e2[q], kk, n, tilt[q], uv, minu,
                           edge, repeat, cos_a, sin_a)
            for p in range(P):
                SV[count] = V[p]
                SN[count] = N[p]
                SC[count] = C[p]
                SH[count] = half
                cell = _cell_of(C[p], lo, cs, ncell, periodic)
                nxt[count] = head[cell]
                head[cell] = count
                count += 1
            vol += area * kk * (n * thickness + (n - 1) * (repeat - thickness)
                                + (thickness if tilt[q] else 0.0))
            state[m] = 1
            r_out[m] = r
            n_out[m] = n
            k_out[m] = kk
            s_out[m] = best
            n_new += 1
            break
        if state[m] == 0 and worst != 0:
            state[m] = -3 if worst == 3 else (-1 if worst == 1 else -2)
    return state, r_out, n_out, k_out, s_out, count, vol


@lru_cache(maxsize=8)
def _rank_table(reach: int):
    """Rank of each lattice triangle in the template ``_template(reach)`` (its position in
    the order of centroid distance; a large number for triangles outside the template),
    indexed ``[i + off, j + off, down]`` for the triangle of lattice cell (i, j) (``down``
    0 for the triangle (i, j), (i+1, j), (i, j+1), 1 for the other). A point of a patch of
    ``k`` triangles is inside it when the rank of its triangle is below ``k``."""
    tpl = _template(reach)
    c = tpl.uv.mean(axis=1)
    beta = c[:, 1] / (math.sqrt(3.0) / 2.0)
    alpha = c[:, 0] - 0.5 * beta
    i = np.floor(alpha + 1e-9).astype(np.int64)
    j = np.floor(beta + 1e-9).astype(np.int64)
    down = ((alpha - i) + (beta - j) > 1.0).astype(np.int64)
    off = int(max(np.abs(i).max(), np.abs(j).max())) + 2
    rank = np.full((2 * off + 1, 2 * off + 1, 2), np.iinfo(np.int64).max, np.int64)
    rank[i + off, j + off, down] = np.arange(len(c))
    return rank, off


@numba.njit(cache=True)
def _in_patch(u, v, k, rank, off):
    """Whether the in-plane point (u, v) (units of the triangle edge, lattice vertex at the
    origin) lies in the patch of the first ``k`` template triangles."""
    beta = v / (math.sqrt(3.0) / 2.0)
    alpha = u - 0.5 * beta
    fi = math.floor(alpha)
    fj = math.floor(beta)
    down = 1 if (alpha - fi) + (beta - fj) > 1.0 else 0
    i = int(fi) + off
    j = int(fj) + off
    if i < 0 or j < 0 or i >= rank.shape[0] or j >= rank.shape[1]:
        return False
    return rank[i, j, down] < k


@numba.njit(cache=True)
def _paint(O, g_lo, h, periodic, L, centre, nrm, e1, e2, k, n, tilt, u0, rho, rank, off,
           edge, repeat, thickness, cos_a, sin_a):
    """Mark (O = 1) the voxels whose centres lie in the C-S-H body of each stack: its
    patch extruded over its untilted layers and the interlayer gaps between them
    (|height| <= (n - 1) repeat / 2 + thickness / 2), and a tilt-defect layer's patch
    extruded by its thickness in the layer's own frame (hinge as in :func:`_build`)."""
    shape = O.shape
    for s in range(centre.shape[0]):
        c0 = centre[s, 0]
        c1 = centre[s, 1]
        c2 = centre[s, 2]
        Hb = 0.5 * (n[s] - 1) * repeat + 0.5 * thickness
        ht = 0.5 * (n[s] + 1) * repeat
        rr = np.empty((3, 2), np.int64)
        cc = (c0, c1, c2)
        for d in range(3):
            i0 = int(math.floor((cc[d] - rho[s] - g_lo[d]) / h[d]))
            i1 = int(math.floor((cc[d] + rho[s] - g_lo[d]) / h[d]))
            if periodic:
                if i1 - i0 + 1 > shape[d]:
                    i1 = i0 + shape[d] - 1
            else:
                i0 = max(i0, 0)
                i1 = min(i1, shape[d] - 1)
            rr[d, 0] = i0
            rr[d, 1] = i1
        for i in range(rr[0, 0], rr[0, 1] + 1):
            ii = i % shape[0]
            dx = g_lo[0] + (ii + 0.5) * h[0] - c0
            if periodic:
                dx -= L[0] * np.round(dx / L[0])
            for j in range(rr[1, 0], rr[1, 1] + 1):
                jj = j % shape[1]
                dy = g_lo[1] + (jj + 0.5) * h[1] - c1
                if periodic:
                    dy -= L[1] * np.round(dy / L[1])
                for kk_ in range(rr[2, 0], rr[2, 1] + 1):
                    kk = kk_ % shape[2]
                    if O[ii, jj, kk]:
                        continue
                    dz = g_lo[2] + (kk + 0.5) * h[2] - c2
                    if periodic:
                        dz -= L[2] * np.round(dz / L[2])
                    t = dx * nrm[s, 0] + dy * nrm[s, 1] + dz * nrm[s, 2]
                    u = dx * e1[s, 0] + dy * e1[s, 1] + dz * e1[s, 2]
                    v = dx * e2[s, 0] + dy * e2[s, 1] + dz * e2[s, 2]
                    if abs(t) <= Hb and _in_patch(u / edge, v / edge, k[s], rank, off):
                        O[ii, jj, kk] = 1
                    elif tilt[s]:
                        # frame of the tilted layer: origin at the hinge
                        a = u + u0[s]
                        b = t - ht
                        s1 = a * cos_a + b * sin_a
                        w = b * cos_a - a * sin_a
                        if abs(w) <= 0.5 * thickness and _in_patch((s1 - u0[s]) / edge,
                                                                   v / edge, k[s], rank, off):
                            O[ii, jj, kk] = 1


@numba.njit(cache=True)
def _body_clear(E, g_lo, h, periodic, x, nrm, e1, e2, k, n, tilt, u0, R, rank, off, edge,
                repeat, thickness, cos_a, sin_a, need, delta):
    """True when every sample point of the C-S-H body of a stack (as painted by
    :func:`_paint`; in-plane points ``delta`` apart over the patch, levels at most
    ``delta`` apart) lies on a voxel of the free-space map with ``E >= need``."""
    nx, ny, nz = E.shape
    Hb = 0.5 * (n - 1) * repeat + 0.5 * thickness
    ht = 0.5 * (n + 1) * repeat
    nlev = max(2, int(math.ceil(2.0 * Hb / delta)) + 1)
    ng = int(math.ceil(R / delta))
    for iu in range(-ng, ng + 1):
        u = iu * delta
        for iv in range(-ng, ng + 1):
            v = iv * delta
            if not _in_patch(u / edge, v / edge, k, rank, off):
                continue
            nl = nlev
            if tilt:
                nl += 3
            for il in range(nl):
                if il < nlev:
                    z = -Hb + 2.0 * Hb * il / (nlev - 1)
                    px = x[0] + z * nrm[0] + u * e1[0] + v * e2[0]
                    py = x[1] + z * nrm[1] + u * e1[1] + v * e2[1]
                    pz = x[2] + z * nrm[2] + u * e1[2] + v * e2[2]
                else:
                    w = 0.5 * thickness * (il - nlev - 1)
                    a = u + u0
                    uu = -u0 + a * cos_a - w * sin_a
                    zz = ht + a * sin_a + w * cos_a
                    px = x[0] + zz * nrm[0] + uu * e1[0] + v * e2[0]
                    py = x[1] + zz * nrm[1] + uu * e1[1] + v * e2[1]
                    pz = x[2] + zz * nrm[2] + uu * e1[2] + v * e2[2]
                i = int(math.floor((px - g_lo[0]) / h[0]))
                j = int(math.floor((py - g_lo[1]) / h[1]))
                kk = int(math.floor((pz - g_lo[2]) / h[2]))
                if periodic:
                    i %= nx
                    j %= ny
                    kk %= nz
                elif i < 0 or j < 0 or kk < 0 or i >= nx or j >= ny or kk >= nz:
                    return False
                if E[i, j, kk] < need:
                    return False
    return True


@numba.njit(cache=True, parallel=True)
def _fit(E, g_lo, h, periodic, centre, nrm, e1, e2, n0, lat0, tilt, tries, keep, tpl_dist,
         tpl_maxr, tpl_minu, rank, off, edge, repeat, thickness, cos_a, sin_a, need, delta,
         steps):
    """For each site (``tries`` consecutive proposals), the ``keep`` proposals that fit the
    most C-S-H volume into the free space of the map, best first, and their scales.

    A proposal (``n0`` layers, lateral size ``lat0``) scaled by ``s`` in [0, 1] has
    ``1 + round(s (n0 - 1))`` layers of lateral size ``s lat0``; the largest ``s`` at which
    its body clears the map (:func:`_body_clear`) is found by bisection (at most ``steps``
    tests), skipping scales that could not enter the site's best so far. Returns (indices
    of the chosen proposals, -1 where fewer fit; their scales), each (sites, keep)."""
    m_sites = centre.shape[0] // tries
    best_i = np.full((m_sites, keep), -1, np.int64)
    best_s = np.full((m_sites, keep), -1.0)
    area = math.sqrt(3.0) / 4.0 * edge * edge
    for site in numba.prange(m_sites):
        top_v = np.full(keep, -1.0)
        best_v = -1.0       # the volume to beat: the keep-th best so far
        for q in range(site * tries, (site + 1) * tries):
            lo_s = -1.0         # largest scale known to fit
            lo_b = 0.0          # lower end of the bisection
            hi_s = 1.0
            s = 1.0
            for step in range(steps + 1):
                if step == steps:
                    # last resort, while the site has nothing: the smallest stack
                    if lo_s >= 0.0 or best_v >= 0.0:
                        break
                    s = 0.0
                n = 1 + int(math.floor(s * (n0[q] - 1) + 0.5))
                kk = max(1, np.searchsorted(tpl_dist, 0.5 * s * lat0[q] / edge + 1e-9,
                                            side="right"))
                v = area * kk * ((n - 1) * repeat + thickness + (thickness if tilt[q] else 0.0))
                if v <= best_v:
                    # cannot beat the site's best proposal: look only at larger scales
                    if step == 0:
                        break
                    lo_b = s
                else:
                    u0 = -tpl_minu[kk - 1] * edge
                    if _body_clear(E, g_lo, h, periodic, centre[q], nrm[q], e1[q], e2[q], kk,
                                   n, tilt[q], u0, tpl_maxr[kk - 1] * edge, rank, off, edge,
                                   repeat, thickness, cos_a, sin_a, need, delta):
                        lo_s = s
                        lo_b = s
                        if step == 0:
                            break
                    else:
                        hi_s = s
                if step == steps:
                    break
                s = 0.5 * (lo_b + hi_s)
            if lo_s >= 0.0:
                n = 1 + int(math.floor(lo_s * (n0[q] - 1) + 0.5))
                kk = max(1, np.searchsorted(tpl_dist, 0.5 * lo_s * lat0[q] / edge + 1e-9,
                                            side="right"))
                v = area * kk * ((n - 1) * repeat + thickness + (thickness if tilt[q] else 0.0))
                if v > best_v:
                    r = keep - 1
                    while r > 0 and top_v[r - 1] < v:
                        top_v[r] = top_v[r - 1]
                        best_i[site, r] = best_i[site, r - 1]
                        best_s[site, r] = best_s[site, r - 1]
                        r -= 1
                    top_v[r] = v
                    best_i[site, r] = q
                    best_s[site, r] = lo_s
                    best_v = top_v[keep - 1]
    return best_i, best_s


@numba.njit(cache=True)
def _local_maxima(E, strikes, max_strikes, emin, periodic):
    """Flat indices of the voxels with ``E >= emin`` and fewer than ``max_strikes`` failed
    tries that no neighbour (26) exceeds."""
    nx, ny, nz = E.shape
    out = np.empty(E.size, np.int64)
    m = 0
    for i in range(nx):
        for j in range(ny):
            for k in range(nz):
                e = E[i, j, k]
                if e < emin or strikes[i, j, k] >= max_strikes:
                    continue
                top = True
                for a in range(-1, 2):
                    ia = i + a
                    if periodic:
                        ia %= nx
                    elif ia < 0 or ia >= nx:
                        continue
                    for b in range(-1, 2):
                        jb = j + b
                        if periodic:
                            jb %= ny
                        elif jb < 0 or jb >= ny:
                            continue
                        for c in range(-1, 2):
                            kc = k + c
                            if periodic:
                                kc %= nz
                            elif kc < 0 or kc >= nz:
                                continue
                            if E[ia, jb, kc] > e:
                                top = False
                                break
                        if not top:
                            break
                    if not top:
                        break
                if top:
                    out[m] = (i * ny + j) * nz + k
                    m += 1
    return out[:m]


@numba.njit(cache=True)
def _spread(pos, rad, lo, cs, ncell, max_keep):
    """Greedy choice, in the given order, of centres whose balls (radius ``rad``) do not
    overlap those already chosen (a coarse grid of cells ``cs`` at least twice the largest
    radius finds the neighbours). Returns the chosen row indices."""
    n = pos.shape[0]
    head = -np.ones(ncell[0] * ncell[1] * ncell[2], np.int64)
    nxt = -np.ones(n, np.int64)
    keep = np.empty(n, np.int64)
    m = 0
    for p in range(n):
        if m >= max_keep:
            break
        ci = np.empty(3, np.int64)
        for k in range(3):
            ci[k] = min(max(int(math.floor((pos[p, k] - lo[k]) / cs[k])), 0), ncell[k] - 1)
        free = True
        for ox in range(-1, 2):
            jx = ci[0] + ox
            if jx < 0 or jx >= ncell[0]:
                continue
            for oy in range(-1, 2):
                jy = ci[1] + oy
                if jy < 0 or jy >= ncell[1]:
                    continue
                for oz in range(-1, 2):
                    jz = ci[2] + oz
                    if jz < 0 or jz >= ncell[2]:
                        continue
                    q = head[(jx * ncell[1] + jy) * ncell[2] + jz]
                    while q >= 0:
                        d2 = 0.0
                        for k in range(3):
                            dk = pos[q, k] - pos[p, k]
                            d2 += dk * dk
                        r = rad[q] + rad[p]
                        if d2 < r * r:
                            free = False
                            break
                        q = nxt[q]
                    if not free:
                        break
                if not free:
                    break
            if not free:
                break
        if free:
            cell = (ci[0] * ncell[1] + ci[1]) * ncell[2] + ci[2]
            nxt[p] = head[cell]
            head[cell] = p
            keep[m] = p
            m += 1
    return keep[:m]


class _PrismStore:
    """Placed prisms in a growing linked cell list (cells at least ``cutoff`` wide)."""

    def __init__(self, domain, cutoff):
        lo, hi = (np.asarray(b, dtype=float) for b in domain.bounds)
        self.periodic = bool(getattr(domain, "periodic", False))
        L = hi - lo
        n = np.maximum(1, np.floor(L / cutoff)).astype(np.int64)
        if self.periodic:
            n = np.where(n < 3, 1, n)
        self.lo, self.L, self.ncell = lo, L, n
        self.cs = L / n
        self.head = -np.ones(int(np.prod(n)), np.int64)
        self.count = 0
        self._alloc(4096)

    def _alloc(self, cap):
        old = getattr(self, "SV", None)
        SV, SN = np.zeros((cap, 3, 3)), np.zeros((cap, 3))
        SC, SH = np.zeros((cap, 3)), np.zeros(cap)
        nxt = -np.ones(cap, np.int64)
        if old is not None:
            c = self.count
            SV[:c], SN[:c], SC[:c], SH[:c], nxt[:c] = (self.SV[:c], self.SN[:c], self.SC[:c],
                                                       self.SH[:c], self.nxt[:c])
        self.SV, self.SN, self.SC, self.SH, self.nxt = SV, SN, SC, SH, nxt

    def reserve(self, extra):
        if self.count + extra > len(self.SH):
            self._alloc(max(2 * len(self.SH), self.count + extra))


def _stack_radius(tpl, k, n, tilt, edge, repeat, thickness, tilt_rad):
    """Radius of a ball about the stack centre holding the whole stack (corners of the
    prisms, a tilt-defect layer included): the stack's untilted layers lie in the cylinder
    of radius R (largest corner radius of the patch) and half-height
    ``(n - 1) repeat / 2 + thickness / 2``; a tilt-defect layer lies above, below
    ``(n - 1) repeat / 2 + repeat + 2 R sin(tilt) + thickness / 2``."""
    R = tpl.max_r[np.asarray(k) - 1] * edge
    top = 0.5 * (np.asarray(n) - 1) * repeat
    rho = np.hypot(R, top + 0.5 * thickness)
    rho_t = np.hypot(R, top + repeat + 2.0 * R * math.sin(tilt_rad) + 0.5 * thickness)
    return np.where(tilt, np.maximum(rho, rho_t), rho)


def _csh_volume(k, n, tilt, edge, repeat, thickness):
    """C-S-H volume of stacks from their construction: every layer's prisms
    (``k`` triangles of area sqrt(3)/4 edge^2, thickness ``thickness``) plus the ``n - 1``
    interlayer gaps (the same area, ``repeat - thickness`` high); a tilt-defect layer adds
    its prisms only (its wedge is no interlayer)."""
    area = math.sqrt(3.0) / 4.0 * edge * edge * np.asarray(k, dtype=float)
    n = np.asarray(n, dtype=float)
    return area * (n * thickness + (n - 1.0) * (repeat - thickness)
                   + np.asarray(tilt, dtype=float) * thickness)


def _fill_grid(domain, voxel):
    lo, hi = (np.asarray(b, dtype=float) for b in domain.bounds)
    L = hi - lo
    shape = np.maximum(1, np.round(L / voxel)).astype(np.int64)
    h = L / shape
    return lo, h, shape


def _fill(domain, *, rng, orientation, kappa, fixed_normal, ldist, sdist, edge, repeat,
          thickness, clearance, tilt_rad, tilt_probability, target, max_stacks, max_attempts,
          voxel, tries):
    """The fill mode of :func:`pack_stacks`: stacks into the remaining gaps, with
    decreasing size, until the C-S-H volume reaches ``target`` of the domain or nothing
    more fits.

    Method (our own construction; invented demonstration data, no physics):

    1. A *free-space map* on a voxel grid: ``occupied`` holds the C-S-H bodies placed so
       far (each stack's patch extruded through its layers and interlayer gaps, and its
       tilt-defect layer; :func:`_paint`); ``E`` is the distance from each voxel centre
       to the nearest occupied one (Euclidean distance transform), and to the wall plus
       one clearance (prisms may touch the wall), capped at ``cap`` (the median radius of
       a drawn stack plus the clearance and one voxel).
    2. Each round, the *sites* are the local maxima of ``E`` (the centres of the largest
       free balls), ordered by their free radius (times a random factor in [0.75, 1]),
       and thinned so that their free balls do not overlap (:func:`_spread`).
    3. At each site, ``tries`` proposals: layer count, lateral size and tilt defect drawn
       from their distributions, the centre at a random point of the site's voxel, the
       normal from the orientation law. Each is *sized to the gap*: scaled by the largest
       ``s`` in [0, 1] (``1 + round(s (n - 1))`` layers of lateral size ``s D``) at which
       its body clears the map by the clearance plus half a voxel (:func:`_fit`). The
       proposals that fit the most C-S-H volume go on, best first.
    4. The *exact tests* decide (:func:`_place_fit`): every prism inside the domain, and
       every prism at least the clearance from every prism of another stack (separating
       axes, :func:`_separated`, on the pairs a cell list of placed prisms finds), and
       near-parallel prisms of different stacks far enough apart that the stacking measure
       cannot join them (:func:`_stack_guard`). The largest scale below the map's estimate
       that passes is searched by bisection; the first proposal of the site that passes is
       kept and joins the cell list at once, so the next sites see it.
    5. The new bodies are painted and the map updated (only around them when they are
       few, :func:`_update_map`). A site where nothing fits, for a reason other than a
       stack of the same round, counts a strike on its voxel and the 26 around it;
       :data:`MAX_STRIKES` strikes and a voxel is no longer a site. The fill ends at the
       target, at ``max_stacks`` or ``max_attempts`` (sites tried), or when no site is left
       (the domain is full at this clearance).

    Returns (stacks or None, template, attempts, rounds, reason, C-S-H volume)."""
    from .threads import budget

    periodic = bool(getattr(domain, "periodic", False))
    lo, hi = (np.asarray(b, dtype=float) for b in domain.bounds)
    Lbox = hi - lo
    vol_target = target * domain.volume
    r_prism = math.sqrt(edge * edge / 3.0 + 0.25 * thickness * thickness)
    ball = 2.0 * r_prism + clearance
    guard = _stack_guard(repeat, edge)
    store = _PrismStore(domain, max(ball, guard))
    cos_guard = math.cos(math.radians(GUARD_ANGLE))
    L_arr = Lbox if periodic else np.ones(3)
    cos_a, sin_a = math.cos(tilt_rad), math.sin(tilt_rad)
    sphere = isinstance(domain, Sphere)
    dom_c = np.asarray(domain.center, dtype=float) if sphere else np.zeros(3)
    dom_r = float(domain.radius) if sphere else 0.0
    # ---------------------------------------------------------------- free-space map
    g_lo, h, shape = _fill_grid(domain, voxel)
    hmax = float(h.max())
    probe_l = sdist.sample(rng, 4096)
    tpl, probe_k = _patch_sizes(probe_l, edge)
    probe_n = np.maximum(ldist.sample(rng, 4096), 1)
    rho_probe = _stack_radius(tpl, probe_k, probe_n, np.zeros(4096, bool), edge, repeat,
                              thickness, tilt_rad)
    # distances are kept up to `cap`: it spreads the sites of one round (sizes are checked
    # point by point over each stack's body, not by this radius)
    cap = float(np.quantile(rho_probe, 0.5)) + clearance + hmax
    axes = [g_lo[d] + (np.arange(shape[d]) + 0.5) * h[d] for d in range(3)]
    X, Y, Z = np.meshgrid(*axes, indexing="ij", sparse=True)
    if isinstance(domain, Sphere):
        c = np.asarray(domain.center)
        wall = domain.radius - np.sqrt((X - c[0]) ** 2 + (Y - c[1]) ** 2 + (Z - c[2]) ** 2)
    else:   # a periodic box too: every prism stays inside the primary cell
        wall = np.full(tuple(shape), np.inf)
        for d, A in enumerate((X, Y, Z)):
            wall = np.minimum(wall, np.minimum(A - lo[d], hi[d] - A))
    # walls count as bodies one clearance further out (prisms may touch the wall)
    wall = np.minimum(wall + clearance, cap).astype(np.float32)
    del X, Y, Z
    occupied = np.zeros(tuple(shape), np.uint8)
    E = np.maximum(wall, np.float32(0.0))
    strikes = np.zeros(tuple(shape), np.int8)
    need = clearance + FILL_MARGIN * hmax   # map value a stack's sample points must reach
    e_min = need + 0.5 * thickness          # a site must hold at least half a prism
    pad = int(math.ceil(cap / float(h.min()))) + 1
    spread_cs = np.full(3, 2.0 * cap)
    spread_n = np.maximum(1, np.ceil(Lbox / spread_cs)).astype(np.int64)
    placed: list[_Stacks] = []
    tpl_all = tpl
    vol = 0.0
    n_placed = attempts = rounds = 0
    reason = "full"
    while True:
        if vol >= vol_target:
            reason = "target"
            break
        if max_stacks is not None and n_placed >= max_stacks:
            reason = "stacks"
            break
        if max_attempts is not None and attempts >= max_attempts:
            reason = "attempts"
            break
        sites = _local_maxima(E, strikes, MAX_STRIKES, e_min, periodic)
        if len(sites) == 0:
            break
        rounds += 1
        e_c = E.ravel()[sites]
        key = e_c * (0.75 + 0.25 * rng.random(len(sites)))
        order = np.argsort(-key, kind="stable")
        sites, e_c = sites[order], e_c[order]
        ijk = np.stack(np.unravel_index(sites, tuple(shape)), axis=1)
        pos = g_lo + (ijk + 0.5) * h
        budget_ = 4000 if max_attempts is None else max(1, min(4000, max_attempts - attempts))
        sel = _spread(pos, e_c, g_lo, spread_cs, spread_n, budget_)
        ijk, pos = ijk[sel], pos[sel]
        m = len(sel)
        # -------------------------------- `tries` proposals per site, sized to the gap
        mt = m * tries
        nl0 = np.maximum(ldist.sample(rng, mt), 1)
        lat0 = sdist.sample(rng, mt)
        tilt = rng.random(mt) < tilt_probability
        tpl, _ = _patch_sizes(lat0, edge)
        if len(tpl.dist) > len(tpl_all.dist):
            tpl_all = tpl
        reach = _template_reach(tpl)
        rank, off = _rank_table(reach)
        centre = np.repeat(pos, tries, axis=0) + (rng.random((mt, 3)) - 0.5) * h
        nrm = _orientations(rng, domain, orientation, kappa, fixed_normal, centre)
        e1, e2 = _perp_basis(nrm)
        psi = rng.uniform(0.0, 2.0 * math.pi, mt)
        cs_, sn_ = np.cos(psi)[:, None], np.sin(psi)[:, None]
        e1, e2 = cs_ * e1 + sn_ * e2, -sn_ * e1 + cs_ * e2
        best, s_b = _fit(E, g_lo, h, periodic, centre, nrm, e1, e2, nl0.astype(np.float64),
                         lat0, tilt, tries, FILL_KEEP, tpl.dist, tpl.max_r, tpl.min_u, rank,
                         off, edge, repeat, thickness, cos_a, sin_a, need, hmax, FIT_STEPS)
        feasible = best[:, 0] >= 0
        s_b = np.where(feasible[:, None], s_b, -1.0).ravel()
        best = np.where(best >= 0, best, tries * np.arange(m)[:, None]).ravel()
        k1 = np.maximum(np.searchsorted(tpl.dist, 0.5 * lat0[best] / edge + 1e-9,
                                        side="right"), 1)
        nprism = (nl0[best] + tilt[best]) * k1
        maxp = int(nprism.max(initial=1))
        store.reserve(int(nprism.reshape(m, FILL_KEEP).max(axis=1, initial=0)[feasible].sum()))
        max_new = (1 << 62) if max_stacks is None else max_stacks - n_placed
        state, r_u, n_u, k_u, s_u, count, vol = _place_fit(
            centre[best], nrm[best], e1[best], e2[best], nl0[best].astype(np.float64),
            lat0[best], tilt[best], s_b, FILL_KEEP, tpl.dist, tpl.uv, tpl.min_u, edge, repeat,
            thickness, cos_a, sin_a, vol, vol_target, max_new, store.SV, store.SN, store.SC,
            store.SH, store.nxt, store.head, store.count, store.lo, store.cs, store.ncell,
            L_arr, periodic, sphere, dom_c, dom_r, lo, hi, clearance, ball * ball,
            guard * guard, cos_guard, PLACE_STEPS, maxp)
        store.count = int(count)
        acc = np.flatnonzero(state == 1)
        stopped = vol >= vol_target or (max_stacks is not None
                                        and n_placed + len(acc) >= max_stacks)
        tried = int(acc[-1]) + 1 if (stopped and len(acc)) else m
        if len(acc):
            bi = best[acc * FILL_KEEP + r_u[acc]]
            a = _Stacks(n_u[acc], k_u[acc], s_u[acc] * lat0[bi], centre[bi], nrm[bi], e1[bi],
                        e2[bi], tilt[bi])
            placed.append(a)
            n_placed += len(a)
            R = tpl.max_r[a.k - 1] * edge
            top = 0.5 * (a.n_layers - 1) * repeat
            rho = np.where(a.tilt, np.hypot(math.sqrt(2.0) * R + thickness,
                                            top + repeat + 2.0 * R * sin_a + thickness),
                           np.hypot(R, top + thickness)) + hmax
            _paint(occupied, g_lo, h, periodic, L_arr, a.centre, a.normal, a.e1, a.e2,
                   a.k, a.n_layers, a.tilt, -tpl.min_u[a.k - 1] * edge, rho, rank, off,
                   edge, repeat, thickness, cos_a, sin_a)
            E = _update_map(E, occupied, wall, a.centre, rho, cap, g_lo, h, periodic, pad,
                            budget())
        attempts += tried
        # -------- strikes where a try failed for a reason other than a stack of this round
        failed = ~feasible
        failed[(state == -1) | (state == -3)] = True
        if failed.any():
            _strike(strikes, ijk[failed], periodic)
    st = _Stacks.concat(placed) if placed else None
    return st, tpl_all, attempts, rounds, reason, vol


def _update_map(E, occupied, wall, centres, rho, cap, g_lo, h, periodic, pad, threads):
    """The free-space map after new bodies were painted into ``occupied`` (their centres
    and bounding radii ``rho``): the distance from each voxel centre to the nearest
    occupied one (edt, Felzenszwalb & Huttenlocher's algorithm; a periodic grid is padded by
    wrapping), no more than ``wall``. With few new bodies, only the boxes within ``cap``
    of each are recomputed and lowered: the map never exceeds ``cap`` (``wall`` is capped
    there), so farther voxels cannot change, and within the box the new body lies whole,
    so min(old map, distance inside the box) is exact."""
    import edt

    shape = np.asarray(E.shape)
    anis = tuple(float(x) for x in h)
    half = np.ceil((rho[:, None] + cap) / h[None, :]).astype(np.int64) + 1
    ctr = np.floor((centres - g_lo) / h).astype(np.int64)
    if np.prod(2 * half + 1, axis=1).sum() < 0.25 * E.size:
        for c, w in zip(ctr, half):
            idx = []
            for d in range(3):
                r = np.arange(c[d] - w[d], c[d] + w[d] + 1)
                idx.append(np.mod(r, shape[d]) if periodic
                           else r[(r >= 0) & (r < shape[d])])
            if periodic and any(len(np.unique(i)) < len(i) for i in idx):
                break       # a box wider than the grid: recompute everything below
            ix = np.ix_(*idx)
            sub = edt.edt(occupied[ix] == 0, anisotropy=anis, black_border=False,
                          parallel=1)
            E[ix] = np.minimum(E[ix], sub.astype(np.float32, copy=False))
        else:
            return E
    free = occupied == 0
    if periodic:
        free = np.pad(free, pad, mode="wrap")
    dist = edt.edt(free, anisotropy=anis, black_border=False, parallel=threads)
    if periodic:
        dist = dist[pad:-pad, pad:-pad, pad:-pad]
    E = np.minimum(dist.astype(np.float32, copy=False), wall)
    np.maximum(E, np.float32(0.0), out=E)
    return E


def _template_reach(tpl) -> int:
    """The ``reach`` a cached template was made with (its cache key)."""
    for reach in (4, 8, 16, 32, 64, 128, 256, 512, 1024):
        if _template(reach) is tpl:
            return reach
    raise AssertionError("template not from the cache")


def _orientations(rng, domain, orientation, kappa, fixed_normal, centre):
    """Stack normals at ``centre`` by the orientation law (as in the sequential mode)."""
    m = len(centre)
    if orientation == "isotropic":
        return _watson(rng, m, 0.0, np.array([0.0, 0.0, 1.0]))
    if orientation == "wall":
        mu = domain.inward_normal(centre)
        bad = ~np.all(np.isfinite(mu), axis=1)
        mu[bad] = fixed_normal
        nrm = _watson(rng, m, kappa, mu)
        flip = np.einsum("ij,ij->i", nrm, mu) < 0
        nrm[flip] *= -1.0
        return nrm
    return np.broadcast_to(fixed_normal, (m, 3)).copy()


@numba.njit(cache=True)
def _strike(strikes, ijk, periodic):
    """Count a failed try at each voxel ``ijk`` and its 26 neighbours (a voxel with
    :data:`MAX_STRIKES` failures is no longer a site)."""
    nx, ny, nz = strikes.shape
    for p in range(ijk.shape[0]):
        for a in range(-1, 2):
            i = ijk[p, 0] + a
            if periodic:
                i %= nx
            elif i < 0 or i >= nx:
                continue
            for b in range(-1, 2):
                j = ijk[p, 1] + b
                if periodic:
                    j %= ny
                elif j < 0 or j >= ny:
                    continue
                for c in range(-1, 2):
                    k = ijk[p, 2] + c
                    if periodic:
                        k %= nz
                    elif k < 0 or k >= nz:
                        continue
                    if strikes[i, j, k] < 127:
                        strikes[i, j, k] += 1



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
    requested : int or None
        Stacks asked for (None: no limit, the fill mode).
    attempts : int
        Candidate stacks tried (in the fill mode: sites tried).
    elapsed : float
        Seconds spent generating.
    """

    structure: Structure
    stack: np.ndarray
    layer: np.ndarray
    tilted: np.ndarray
    stacking_number: np.ndarray
    stacks: StackTruth
    requested: int | None
    attempts: int
    elapsed: float = 0.0
    settings: dict = field(default_factory=dict)

    @property
    def n_stacks(self) -> int:
        return len(self.stacks.n_layers)

    @property
    def csh_volume(self) -> float:
        """C-S-H volume, nm^3, exact from the construction: per stack, ``n`` layers of its
        patch's area times the thickness plus the ``n - 1`` interlayer gaps (area times
        ``repeat - thickness``); a tilt-defect layer adds its prisms only."""
        s = self.settings
        return float(_csh_volume(self.stacks.triangles_per_layer, self.stacks.n_layers,
                                 self.stacks.has_tilt, s["triangle_edge"], s["repeat"],
                                 s["thickness"]).sum())

    @property
    def csh_fraction(self) -> float:
        """:attr:`csh_volume` over the domain's volume."""
        return self.csh_volume / self.structure.domain.volume

    @property
    def solid_fraction(self) -> float:
        """Volume of the prisms (area times thickness) over the domain's volume."""
        return float(self.structure.volumes.sum()) / self.structure.domain.volume

    def table(self) -> dict:
        """Per-prism ground truth as equal-length columns (row i = prism i)."""
        return {"prism": np.arange(len(self.stack)), "stack": self.stack, "layer": self.layer,
                "tilted": self.tilted.astype(np.int64), "stacking_number": self.stacking_number,
                "sheet": self.structure.columns["sheet"],
                "stack_layers": self.stacks.n_layers[self.stack] if len(self.stack)
                else np.zeros(0, np.int64)}

    def to_dict(self) -> dict:
        return {"requested_stacks": None if self.requested is None else int(self.requested),
                "placed_stacks": int(self.n_stacks),
                "prisms": int(len(self.stack)), "attempts": int(self.attempts),
                "tilted_layers": int(self.stacks.has_tilt.sum()),
                "mean_layers": float(self.stacks.n_layers.mean()) if self.n_stacks else 0.0,
                "csh_fraction": self.csh_fraction, "solid_fraction": self.solid_fraction,
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


def pack_stacks(domain, n_stacks: int | None = None, *, seeding: str = "volume",
                orientation: str = "isotropic",
                kappa: float = 10.0, normal=(0.0, 0.0, 1.0), layers="poisson:3",
                lateral_size="lognormal:5,0.3", triangle_edge: float = 1.0, repeat: float = 1.4,
                thickness: float = 0.7, clearance: float = 0.3, wall_gap: float = 0.3,
                tilt_angle: float = 0.0, tilt_probability: float = 0.0, born: bool = False,
                max_attempts: int | None = None, seed: int = 0,
                target_fraction: float | None = None, fill_voxel: float | None = None,
                fill_tries: int = FILL_TRIES) -> SynthResult:
    """Pack layered sheet stacks into a domain by random sequential placement.

    An invented demonstration scenario, **not** a growth simulation: finished stacks are
    proposed one after another and kept if they fit (see the module docstring for the
    geometry of a stack and of a tilt defect).

    Two modes. *Sequential* (the default): ``n_stacks`` stacks drawn from the
    distributions are proposed at random places and kept if they fit, until ``n_stacks``
    are placed or the domain is full (about 15 % C-S-H by volume, 10 % solid, with the
    default sizes). *Fill* (``target_fraction`` given): stacks are placed into the remaining gaps
    with decreasing size until the C-S-H volume (the prisms plus the gaps between the
    stacked layers of each stack) reaches ``target_fraction`` of the domain or nothing more
    fits; see :func:`_fill` for the method and ``docs/synth.md`` for what it reaches.

    Parameters
    ----------
    domain : Sphere or Box
        Where to pack. A periodic box has no walls (``seeding="wall"`` and
        ``orientation="wall"`` are refused); prisms are kept inside the primary cell and
        clearances are measured with the minimum-image convention.
    n_stacks : int, optional
        Stacks to place. Fewer are placed if ``max_attempts`` candidates are used up
        (``result.n_stacks`` says how many). Required in the sequential mode; in the fill
        mode an upper limit (default none).
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
    target_fraction : float, optional
        Turns on the fill mode: the C-S-H volume fraction of the domain to reach,
        ``0 < F < 1`` (exact from the construction, see :attr:`SynthResult.csh_fraction`).
        The fill mode uses ``seeding="volume"`` only.
    fill_voxel : float, optional
        Fill mode: voxel of the free-space map, nm (default ``max(0.4 * triangle_edge,
        (box volume / 4e6)^(1/3))``, about 0.4 nm up to a 63 nm box). Finer packs a little
        denser and is slower; it never affects the clearance, which is tested exactly.
    fill_tries : int
        Fill mode: proposals (size and orientation drawn from their laws) tried at each
        site, of which the one fitting the most C-S-H volume is kept (default 32). More
        packs denser; 1 keeps every stack's orientation and relative size as drawn (the
        scale still shrinks to the gap), at a lower reachable fraction.

    Returns
    -------
    SynthResult
        The structure (metadata: settings and the note that it is invented) and the
        ground truth.
    """
    t0 = time.perf_counter()
    if not isinstance(domain, (Sphere, Box)):
        raise OptionError("domain must be a sheetview Sphere or Box")
    fill = target_fraction is not None
    if fill:
        try:
            target_fraction = float(target_fraction)
        except (TypeError, ValueError):
            raise OptionError(f"--target-fraction must be a number between 0 and 1, got "
                              f"{target_fraction!r}") from None
        if not (0.0 < target_fraction < 1.0):
            raise OptionError(f"--target-fraction must be between 0 and 1 (exclusive), got "
                              f"{target_fraction}")
    if n_stacks is None and not fill:
        raise OptionError("give --stacks (n_stacks), the number of stacks to place, or "
                          "--target-fraction (target_fraction) to fill the domain")
    if not ((fill and n_stacks is None)
            or (isinstance(n_stacks, (int, np.integer)) and not isinstance(n_stacks, bool)
                and n_stacks >= 0)):
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
    if max_attempts is None and not fill:
        max_attempts = 100 * int(n_stacks) + 1000
    if not (max_attempts is None
            or (isinstance(max_attempts, (int, np.integer)) and max_attempts >= 1)):
        raise OptionError(f"--max-attempts must be a whole number >= 1, got {max_attempts!r}")
    tilt_rad = math.radians(tilt_angle)
    if fill:
        return _pack_fill(domain, n_stacks, target_fraction, fill_voxel, fill_tries,
                          seeding=seeding,
                          orientation=orientation, kappa=kappa, fixed_normal=fixed_normal,
                          ldist=ldist, sdist=sdist, edge=edge, repeat=repeat,
                          thickness=thickness, clearance=clearance, tilt_angle=tilt_angle,
                          tilt_probability=tilt_probability, born=born,
                          max_attempts=max_attempts, seed=seed, t0=t0)
    if fill_voxel is not None or fill_tries != FILL_TRIES:
        raise OptionError("--fill-voxel and --fill-tries apply to the fill mode only "
                          "(give --target-fraction)")

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


def _pack_fill(domain, n_stacks, target, voxel, tries, *, seeding, orientation, kappa, fixed_normal,
               ldist, sdist, edge, repeat, thickness, clearance, tilt_angle, tilt_probability,
               born, max_attempts, seed, t0) -> SynthResult:
    """The fill mode of :func:`pack_stacks` (``target_fraction`` given)."""
    if seeding != "volume":
        raise OptionError("--seeding wall does not combine with --target-fraction: the fill "
                          "mode places stacks wherever the free space allows (use --seeding "
                          "volume, with --orientation wall for wall-aligned stacks)")
    if not (isinstance(tries, (int, np.integer)) and not isinstance(tries, bool)
            and 1 <= tries <= 1024):
        raise OptionError(f"--fill-tries (fill_tries) must be a whole number from 1 to 1024, "
                          f"got {tries!r}")
    if voxel is None:
        lo, hi = domain.bounds
        voxel = max(0.4 * edge, (float(np.prod(np.asarray(hi) - np.asarray(lo))) / 4e6) ** (1 / 3))
    voxel = _check_positive(voxel, "--fill-voxel (fill_voxel)")
    lo, hi = (np.asarray(b, dtype=float) for b in domain.bounds)
    if np.prod(np.maximum(1, np.round((hi - lo) / voxel))) > 64e6:
        raise OptionError(f"--fill-voxel {voxel:g} nm makes a free-space map of more than "
                          f"64 million voxels: give a coarser voxel")
    periodic = bool(getattr(domain, "periodic", False))
    r_prism = math.sqrt(edge * edge / 3.0 + 0.25 * thickness * thickness)
    reach = max(2.0 * r_prism + clearance, _stack_guard(repeat, edge))
    if periodic and np.any(hi - lo < 2.0 * reach):
        raise OptionError(f"the periodic box must be at least {2 * reach:.2f} nm on every side "
                          f"for --target-fraction (twice the reach of the clearance tests)")
    tilt_rad = math.radians(tilt_angle)
    rng = np.random.default_rng(seed)
    st, tpl, attempts, rounds, reason, vol = _fill(
        domain, rng=rng, orientation=orientation, kappa=kappa, fixed_normal=fixed_normal,
        ldist=ldist, sdist=sdist, edge=edge, repeat=repeat, thickness=thickness,
        clearance=clearance, tilt_rad=tilt_rad, tilt_probability=tilt_probability,
        target=target, max_stacks=None if n_stacks is None else int(n_stacks),
        max_attempts=max_attempts, voxel=voxel, tries=int(tries))
    if st is None:
        z = np.zeros(0)
        st = _Stacks(z.astype(np.int64), z.astype(np.int64), z, np.zeros((0, 3)),
                     np.zeros((0, 3)), np.zeros((0, 3)), np.zeros((0, 3)), z.astype(bool))
    settings = {"kind": "pack_stacks", "mode": "fill", "domain": domain.to_dict(),
                "n_stacks": None if n_stacks is None else int(n_stacks),
                "target_fraction": target, "seeding": seeding, "orientation": orientation,
                "kappa": kappa, "normal": fixed_normal.tolist(), "layers": str(ldist),
                "lateral_size": str(sdist), "triangle_edge": edge, "repeat": repeat,
                "thickness": thickness, "clearance": clearance, "tilt_angle": tilt_angle,
                "tilt_probability": tilt_probability, "born": bool(born),
                "max_attempts": None if max_attempts is None else int(max_attempts),
                "fill_voxel": float(voxel), "fill_tries": int(tries), "seed": int(seed),
                "placed_stacks": int(len(st)), "csh_fraction": None,
                "stopped": reason, "rounds": int(rounds)}
    res = _assemble(st, tpl, domain=domain, edge=edge, repeat=repeat, thickness=thickness,
                    tilt_rad=tilt_rad, born=born, settings=settings,
                    requested=None if n_stacks is None else int(n_stacks),
                    attempts=int(attempts), t0=t0)
    res.settings["csh_fraction"] = res.csh_fraction
    return res


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


# ====================================================================== particle packings
#: Packing fraction of the spheres at which the growth starts (random positions; any
#: overlap is removed by the relaxation).
PACK_START_FRACTION = 0.25
#: Growth stages from the start fraction to the target (radii grow by equal volume steps).
PACK_STAGES = 40
#: Relaxation sweeps allowed per growth stage, and after the last one.
PACK_SWEEPS = 2000
#: Largest overlap (relative to r_i + r_j) at which a stage counts as relaxed.
PACK_TOL = 1e-3
#: Particle kinds of :func:`pack_particles`.
PARTICLE_KINDS = ("spheres", "layered")


@numba.njit(cache=True)
def _cell_index(v, lo, L, nc):
    k = int((v - lo) / L * nc)
    return min(max(k, 0), nc - 1)


@numba.njit(cache=True)
def _relax_overlaps(x, r, lo, L, periodic, sphere_c, sphere_r, clear, sweeps, tol):
    """Push overlapping spheres apart (and inside the walls) until no pair overlaps by more
    than ``tol`` (r_i + r_j + clear) or ``sweeps`` have run; returns (largest relative
    overlap, sweeps run). Each sweep moves every overlapping pair apart along the line of
    centres by its overlap (times 1.05), shared by volume (Jacobi sum over a cell list of
    cells at least 2 r_max + clear wide); walls: a centre too close to a wall is moved in (a
    relaxation of the overlap energy sum(max(0, r_i + r_j - d)^2); the growth between calls
    is a Lubachevsky-Stillinger-like compression without dynamics)."""
    n = x.shape[0]
    rmax = 0.0
    for i in range(n):
        rmax = max(rmax, r[i])
    cs = 2.0 * rmax + clear
    n0 = max(1, int(L[0] / cs))
    n1 = max(1, int(L[1] / cs))
    n2 = max(1, int(L[2] / cs))
    if periodic:  # fewer than 3 cells: one cell (a neighbour would be met twice)
        n0 = n0 if n0 >= 3 else 1
        n1 = n1 if n1 >= 3 else 1
        n2 = n2 if n2 >= 3 else 1
    head = np.empty(n0 * n1 * n2, np.int64)
    nxt = np.empty(n, np.int64)
    cell = np.empty((n, 3), np.int64)
    dx = np.zeros((n, 3))
    w3 = r ** 3
    worst = 0.0
    s = 0
    for s in range(sweeps):
        head[:] = -1
        for i in range(n):
            if periodic:
                for a in range(3):
                    x[i, a] = lo[a] + (x[i, a] - lo[a]) % L[a]
            c0 = _cell_index(x[i, 0], lo[0], L[0], n0)
            c1 = _cell_index(x[i, 1], lo[1], L[1], n1)
            c2 = _cell_index(x[i, 2], lo[2], L[2], n2)
            cell[i, 0] = c0
            cell[i, 1] = c1
            cell[i, 2] = c2
            c = (c0 * n1 + c1) * n2 + c2
            nxt[i] = head[c]
            head[c] = i
        dx[:] = 0.0
        worst = 0.0
        for i in range(n):
            for oa in range(-1 if n0 > 1 else 0, 2 if n0 > 1 else 1):
                a0 = cell[i, 0] + oa
                if a0 < 0 or a0 >= n0:
                    if not periodic:
                        continue
                    a0 %= n0
                for ob in range(-1 if n1 > 1 else 0, 2 if n1 > 1 else 1):
                    a1 = cell[i, 1] + ob
                    if a1 < 0 or a1 >= n1:
                        if not periodic:
                            continue
                        a1 %= n1
                    for oc in range(-1 if n2 > 1 else 0, 2 if n2 > 1 else 1):
                        a2 = cell[i, 2] + oc
                        if a2 < 0 or a2 >= n2:
                            if not periodic:
                                continue
                            a2 %= n2
                        j = head[(a0 * n1 + a1) * n2 + a2]
                        while j >= 0:
                            if j > i:
                                d0 = x[j, 0] - x[i, 0]
                                d1 = x[j, 1] - x[i, 1]
                                d2 = x[j, 2] - x[i, 2]
                                if periodic:
                                    d0 -= L[0] * round(d0 / L[0])
                                    d1 -= L[1] * round(d1 / L[1])
                                    d2 -= L[2] * round(d2 / L[2])
                                want = r[i] + r[j] + clear
                                dd = d0 * d0 + d1 * d1 + d2 * d2
                                if dd < want * want:
                                    d = math.sqrt(dd)
                                    ov = want - d
                                    worst = max(worst, ov / want)
                                    if d < 1e-12:
                                        d0, d1, d2, d = 1.0, 0.0, 0.0, 1.0
                                    wi = w3[j] / (w3[i] + w3[j])
                                    f = 1.05 * ov / d
                                    dx[i, 0] -= wi * f * d0
                                    dx[i, 1] -= wi * f * d1
                                    dx[i, 2] -= wi * f * d2
                                    dx[j, 0] += (1 - wi) * f * d0
                                    dx[j, 1] += (1 - wi) * f * d1
                                    dx[j, 2] += (1 - wi) * f * d2
                            j = nxt[j]
        for i in range(n):
            for a in range(3):
                x[i, a] += dx[i, a]
            if not periodic:
                if sphere_r > 0.0:
                    e0 = x[i, 0] - sphere_c[0]
                    e1 = x[i, 1] - sphere_c[1]
                    e2 = x[i, 2] - sphere_c[2]
                    dd = math.sqrt(e0 * e0 + e1 * e1 + e2 * e2)
                    lim = sphere_r - r[i]
                    if dd > lim:
                        worst = max(worst, (dd - lim) / (r[i] + clear))
                        g = lim / dd
                        x[i, 0] = sphere_c[0] + e0 * g
                        x[i, 1] = sphere_c[1] + e1 * g
                        x[i, 2] = sphere_c[2] + e2 * g
                else:
                    for a in range(3):
                        if x[i, a] < lo[a] + r[i]:
                            worst = max(worst, (lo[a] + r[i] - x[i, a]) / (r[i] + clear))
                            x[i, a] = lo[a] + r[i]
                        elif x[i, a] > lo[a] + L[a] - r[i]:
                            worst = max(worst, (x[i, a] - lo[a] - L[a] + r[i]) / (r[i] + clear))
                            x[i, a] = lo[a] + L[a] - r[i]
        if worst <= tol:
            break
    return worst, s + 1


def _min_gap_ratio(x, r, domain, clear):
    """Smallest ``d / (r_i + r_j + clear)`` over pairs within reach, and the smallest
    ``(wall distance) / r_i`` of centres (inf for a periodic box): exact, by a k-d tree."""
    periodic = isinstance(domain, Box) and domain.periodic
    lo = np.asarray(domain.bounds[0])
    if periodic:
        tree = cKDTree(x - lo, boxsize=domain.lengths)
    else:
        tree = cKDTree(x)
    pairs = tree.query_pairs(2 * float(r.max()) + clear, output_type="ndarray")
    ratio = np.inf
    if len(pairs):
        d = x[pairs[:, 1]] - x[pairs[:, 0]]
        if periodic:
            d = domain.minimum_image(d)
        ratio = float((np.linalg.norm(d, axis=1) / (r[pairs[:, 0]] + r[pairs[:, 1]] + clear)).min())
    wall = np.inf
    if not periodic:
        wall = float((domain.wall_distance(x) / r).min())
    return ratio, wall


@dataclass
class ParticlePacking:
    """A generated particle packing with its exact ground truth.

    Attributes
    ----------
    kind : "spheres" or "layered"
    particles : ParticleSet of the spheres (for layered particles: their bounding spheres,
        the packed shapes)
    structure : Structure of the prisms of layered particles (None for spheres)
    table : the particle table's columns (nm) as written by :meth:`write`
    header : the particle table's header
    settings : the generator's settings, the stop reason and the sweeps run
    """

    kind: str
    particles: object
    structure: Structure | None
    table: dict
    header: dict
    settings: dict
    elapsed: float = 0.0

    @property
    def n_particles(self) -> int:
        return len(self.particles)

    @property
    def sphere_fraction(self) -> float:
        """Volume of the (non-overlapping) spheres over the domain's volume, exact."""
        return self.particles.volume / self.particles.domain.volume

    @property
    def solid_volume(self) -> float:
        """Exact solid volume (nm^3): the spheres, or the prisms of layered particles."""
        if self.structure is None:
            return self.particles.volume
        return float(self.structure.volumes.sum())

    @property
    def solid_fraction(self) -> float:
        return self.solid_volume / self.particles.domain.volume

    @property
    def surface(self) -> float:
        """Exact solid surface (nm^2) of spheres (4 pi r^2 each; they do not touch); None for
        layered particles (prism faces, see the structure)."""
        return self.particles.area if self.structure is None else None

    @property
    def interlayer_volume(self) -> float:
        """Exact interlayer volume of layered particles (nm^3): per particle, its layers'
        area times the gap ``repeat - thickness`` between consecutive layers (the smaller
        layer's area for the ellipsoid outline); 0 for spheres."""
        if self.structure is None:
            return 0.0
        s = self.structure
        gap = s.spacing - float(s.thickness[0])
        per = np.bincount(s.columns["sheet"], weights=s.areas)
        pid = np.zeros(len(per), np.int64)
        pid[s.columns["sheet"]] = s.columns["particle"]
        same = pid[1:] == pid[:-1]
        return float(gap * np.minimum(per[1:], per[:-1])[same].sum())

    def to_dict(self) -> dict:
        return {"kind": self.kind, "particles": int(self.n_particles),
                "sphere_fraction": self.sphere_fraction, "solid_fraction": self.solid_fraction,
                "surface_nm2": self.surface, "interlayer_volume_nm3": self.interlayer_volume,
                "elapsed_s": float(self.elapsed), "settings": dict(self.settings)}

    def write(self, path, *, force: bool = False):
        """Write the particle table (spheres, or layered particles with their layers)."""
        from .io.particles import write_table
        truth = {k: v for k, v in self.to_dict().items() if k not in ("settings", "elapsed_s")}
        return write_table(self.table, dict(self.header, truth=truth), path, force=force)


def pack_particles(domain, target_fraction: float = 0.55, *, kind: str = "spheres",
                   radius="lognormal:1.5,0.2", layers="uniform:3,5", lateral="fixed:5",
                   repeat: float = 1.4, thickness: float = 0.7, outline: str = "ellipsoid",
                   clearance: float = 0.0, n_particles: int | None = None, seed=0,
                   max_sweeps: int = PACK_SWEEPS) -> ParticlePacking:
    """A random dense packing of non-overlapping polydisperse spheres, or of layered
    particles inside non-overlapping bounding spheres, in a box (periodic or walled) or a
    sphere, with exact ground truth.

    Method: the sphere radii are drawn (``radius``; for layered particles each particle's
    layer count from ``layers`` and layer diameter from ``lateral`` give its bounding
    sphere), the count chosen so that the spheres fill ``target_fraction`` of the domain
    (or ``n_particles`` given, radii then scaled to the target), centres uniform at random;
    the radii start at :data:`PACK_START_FRACTION` and grow in :data:`PACK_STAGES` equal
    volume steps to their full size, overlaps removed after each step by relaxation
    (:func:`_relax_overlaps`, a cell list; an overlap-removal compression in the spirit of
    Lubachevsky & Stillinger, J. Stat. Phys. 60 (1990) 561, without its event-driven
    dynamics, as in Jodrey & Tory, Phys. Rev. A 32 (1985) 2347). Finally every radius is
    scaled by the one factor that removes the last residual overlap exactly, so the
    spheres never overlap and the reached fraction (reported, exact) can lie slightly below
    the target. Random close packing of monodisperse spheres is about 0.64 (Scott & Kilgour
    1969); targets above 0.62 are refused, since the relaxation jams before them.

    Layered particles (``kind="layered"``): ``N`` layers of ``thickness`` at ``repeat``,
    diameter ``D`` (``outline="ellipsoid"``: layers are the cross-sections of a spheroid
    of semi-axes D/2, D/2, N repeat / 2; ``"disc"``: equal discs), random orientation, each
    inside its bounding sphere (radius ``sqrt((D/2)^2 + (N repeat/2)^2)`` for discs, the
    larger of D/2 and N repeat/2 for the spheroid outline); ``target_fraction`` is then the
    fraction of these spheres, and the C-S-H (solid + interlayer) fraction is smaller
    (reported exactly).
    """
    from .particles import ParticleSet, layered_structure, random_quaternions

    t0 = time.perf_counter()
    if kind not in PARTICLE_KINDS:
        raise OptionError(f"particles must be one of {', '.join(PARTICLE_KINDS)}, not {kind!r}",
                          param="particles")
    try:
        target = float(target_fraction)
    except (TypeError, ValueError):
        target = float("nan")
    if not 0 < target <= 0.62:
        raise OptionError(f"a particle packing's target fraction must lie in (0, 0.62] (random "
                          f"close packing is about 0.64), got {target_fraction!r}",
                          param="target_fraction")
    if not (math.isfinite(clearance) and clearance >= 0):
        raise OptionError(f"clearance must be a non-negative number of nm, got {clearance!r}",
                          param="clearance")
    rng = np.random.default_rng(seed)
    V = float(domain.volume)
    lo, hi = (np.asarray(b, float) for b in domain.bounds)
    L = hi - lo
    periodic = isinstance(domain, Box) and domain.periodic
    if kind == "spheres":
        rdist = parse_distribution(radius, name="radius")
        mean_v = 4 / 3 * math.pi * float(np.mean(rdist.sample(np.random.default_rng(12345),
                                                              20000) ** 3))
    else:
        ldist = parse_distribution(layers, name="layers", integer=True)
        ddist = parse_distribution(lateral, name="lateral")
        if not 0 < thickness < repeat:
            raise OptionError(f"the sheet thickness ({thickness:g} nm) must be less than the "
                              f"repeat ({repeat:g} nm)", param="thickness")
        rs = np.random.default_rng(12345)
        mean_v = 4 / 3 * math.pi * float(np.mean(layered_extent(
            0.5 * ddist.sample(rs, 20000), ldist.sample(rs, 20000), repeat, thickness,
            outline) ** 3))
    n = int(round(target * V / mean_v)) if n_particles is None else int(n_particles)
    n_draw = n if n_particles is not None else int(1.5 * n + 20)
    if n < 1:
        raise OptionError(f"the domain ({V:.4g} nm^3) holds no particle at this size and target",
                          param="target_fraction")
    if n > 5_000_000:
        raise OptionError(f"{n:,} particles is more than the generator makes (5,000,000); use a "
                          f"smaller domain or larger particles", param="target_fraction")
    if kind == "spheres":
        r_full = rdist.sample(rng, n_draw)
        nl = dd = None
    else:
        nl = ldist.sample(rng, n_draw)
        dd = ddist.sample(rng, n_draw)
        r_full = layered_extent(0.5 * dd, nl, repeat, thickness, outline) * (1 + 1e-6)
    if n_particles is None:  # as many as fill the target (the last one within it or past it)
        cum = np.cumsum(4 / 3 * math.pi * r_full ** 3)
        n = min(int(np.searchsorted(cum, target * V)) + 1, n_draw)
        r_full = r_full[:n]
        if nl is not None:
            nl, dd = nl[:n], dd[:n]
    scale = (target * V / (4 / 3 * math.pi * float(np.sum(r_full ** 3)))) ** (1 / 3)
    if kind == "spheres":
        r_full = r_full * scale  # exact target for the drawn count
    elif n_particles is not None:
        dd = dd * scale
        r_full = layered_extent(0.5 * dd, nl, repeat, thickness, outline) * (1 + 1e-6)
    if float(r_full.max()) * 2 + clearance >= float(L.min()) / (1 if not periodic else 2):
        raise OptionError(f"the largest particle ({2 * r_full.max():.4g} nm across) does not fit "
                          f"the domain ({float(L.min()):.4g} nm)", param="radius")
    if isinstance(domain, Sphere):
        u = rng.normal(size=(n, 3))
        u /= np.linalg.norm(u, axis=1, keepdims=True)
        x = np.asarray(domain.center) + u * (domain.radius * rng.random(n) ** (1 / 3))[:, None]
        sc, sr = np.asarray(domain.center, float), float(domain.radius)
    else:
        x = lo + rng.random((n, 3)) * L
        sc, sr = np.zeros(3), 0.0
    f0 = min(PACK_START_FRACTION, target)
    worst, sweeps = 0.0, 0
    stages = max(1, PACK_STAGES if target > f0 else 1)
    good_x, good_frac = None, 0.0
    for k in range(1, stages + 1):
        frac = f0 + (target - f0) * k / stages
        r = r_full * (frac / target) ** (1 / 3)
        worst, s = _relax_overlaps(x, r, lo, L, periodic, sc, sr, float(clearance),
                                   int(max_sweeps), PACK_TOL)
        sweeps += s
        if worst <= PACK_TOL:
            good_x, good_frac = x.copy(), frac
    worst, s = _relax_overlaps(x, r_full, lo, L, periodic, sc, sr, float(clearance),
                               int(max_sweeps) * 5, PACK_TOL)
    sweeps += s
    stopped, reached = "target", target
    if worst > PACK_TOL and good_x is not None:  # jammed: back to the last relaxed stage
        x, stopped, reached = good_x, "jammed", good_frac
    elif worst > PACK_TOL:
        stopped = "jammed"
    r_stage = r_full * (reached / target) ** (1 / 3)
    worst, s = _relax_overlaps(x, r_stage, lo, L, periodic, sc, sr, float(clearance),
                               int(max_sweeps) * 5, 1e-9)
    sweeps += s
    if periodic:
        x = domain.wrap(x)
    # one factor that removes the last overlap exactly: d >= f (r_i + r_j + c) for all pairs
    ratio, wall = _min_gap_ratio(x, r_stage, domain, float(clearance))
    f = min(1.0, ratio, wall) * (1 - 1e-12)
    r = r_stage * f
    ratio2, wall2 = _min_gap_ratio(x, r, domain, float(clearance) * f)
    assert ratio2 >= 1.0 and wall2 >= 1.0  # the construction: no overlap, inside the walls
    dom_header = domain.to_dict()
    settings = {"kind": kind, "target_fraction": target, "seed": seed, "clearance": clearance,
                "stopped": stopped, "sweeps": int(sweeps),
                "final_overlap_before_scaling": float(worst),
                "radius_scale": float(f * (reached / target) ** (1 / 3)), "note": PARTICLE_NOTE}
    if kind == "spheres":
        ps = ParticleSet(x, r, [1.0, 0.0, 0.0, 0.0], domain, "spheres",
                         metadata={"generator": dict(settings)})
        table = {"x": x[:, 0], "y": x[:, 1], "z": x[:, 2], "radius": r}
        header = {"units": "nm", "domain": dom_header, "generator": settings}
        return ParticlePacking("spheres", ps, None, table, header, settings,
                               time.perf_counter() - t0)
    # each layered particle inside its final sphere: unchanged when the target was reached
    # (the spheres were packed 1e-6 larger than the particles), else shrunk to fit
    a_fit, nl_fit = fit_layered(0.5 * dd, nl, r, repeat, thickness, outline)
    settings["reshaped"] = int(np.count_nonzero((a_fit < 0.5 * dd * (1 - 1e-6)) | (nl_fit < nl)))
    nl = nl_fit
    q = random_quaternions(n, rng.integers(2**63))
    ab = np.repeat(a_fit[:, None], 2, axis=1)
    s = layered_structure(x, ab, nl, q, domain, spacing=repeat, thickness=thickness,
                          outline=outline, metadata={"generator": dict(settings)})
    ps = ParticleSet(x, r, [1.0, 0.0, 0.0, 0.0], domain, "spheres")
    settings.update(repeat=repeat, thickness=thickness, outline=outline)
    table = {"x": x[:, 0], "y": x[:, 1], "z": x[:, 2], "a": ab[:, 0], "layers": nl,
             "qw": q[:, 0], "qx": q[:, 1], "qy": q[:, 2], "qz": q[:, 3]}
    header = {"units": "nm", "domain": dom_header, "spacing": repeat, "thickness": thickness,
              "outline": outline, "generator": settings}
    return ParticlePacking("layered", ps, s, table, header, settings, time.perf_counter() - t0)


PARTICLE_NOTE = ("invented demonstration structure: random dense packing of particles "
                 "(sheetview.synth.pack_particles), not a simulation of any material")


def layered_extent(a, n_layers, repeat, thickness, outline="ellipsoid",
                   segments=None) -> np.ndarray:
    """Exact radius of the smallest sphere about a layered particle's centre that holds
    its prisms (as built by :func:`sheetview.particles.layered_structure`): the largest
    distance of a prism corner, ``max_k sqrt((a g f_k)^2 + (|z_k| + t/2)^2)`` with ``g`` the
    polygon's area scaling and ``f_k`` the layer's outline factor."""
    from .particles import DEFAULT_SEGMENTS
    m = DEFAULT_SEGMENTS if segments is None else int(segments)
    g = math.sqrt(2 * math.pi / (m * math.sin(2 * math.pi / m)))
    a = np.asarray(a, float)
    n = np.asarray(n_layers).astype(np.int64)
    k = np.arange(int(n.max()) if n.size else 1)
    z = (k[None, :] - 0.5 * (n[:, None] - 1)) * repeat
    f = np.ones_like(z)
    if outline == "ellipsoid":
        f = np.sqrt(np.clip(1 - (z / (0.5 * n[:, None] * repeat)) ** 2, 0, None))
    ext = np.sqrt((a[:, None] * g * f) ** 2 + (np.abs(z) + 0.5 * thickness) ** 2)
    return np.where(k[None, :] < n[:, None], ext, 0.0).max(axis=1)


def fit_layered(a, n_layers, radius, repeat, thickness, outline="ellipsoid"):
    """The largest semi-axis ``a' <= a`` and layer count ``n' <= n`` (fewer only when even
    a' = 0 would not fit) whose particle lies within ``radius`` (:func:`layered_extent`)."""
    a = np.asarray(a, float).copy()
    n = np.asarray(n_layers).astype(np.int64).copy()
    r = np.asarray(radius, float)
    while True:
        axial = 0.5 * ((n - 1) * repeat + thickness)
        tall = (axial > r) & (n > 1)
        if not tall.any():
            break
        n[tall] -= 1
    ext = layered_extent(a, n, repeat, thickness, outline)
    over = ext > r
    if over.any():
        lo = np.zeros(over.sum())
        hi = a[over]
        for _ in range(60):  # bisection: the extent grows with a
            mid = 0.5 * (lo + hi)
            ok = layered_extent(mid, n[over], repeat, thickness, outline) <= r[over]
            lo = np.where(ok, mid, lo)
            hi = np.where(ok, hi, mid)
        a[over] = lo
    return a, n
