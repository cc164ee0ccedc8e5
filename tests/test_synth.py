"""The demonstration-structure generator (sheetview.synth) and ``sheetview synth``.

The geometric checks here do not reuse the generator's own tests: prism normals come
from the cross product of the stored corners, clearances from a dense point sampling of
each prism solid searched with scipy's cKDTree (a general-purpose reference library), and
domain membership from the corners with the plain sphere/box inequalities.
"""
import math

import numpy as np
import pytest
from click.testing import CliRunner
from scipy.spatial import cKDTree

import sheetview as sv
from sheetview.cli import main
from sheetview.domain import Box, Sphere
from sheetview.errors import OptionError, OutputExistsError
from sheetview.synth import pack_stacks, parse_distribution, perfect_stack, write_truth


# ------------------------------------------------------------------ independent geometry
def unit_normals(v):
    n = np.cross(v[:, 1] - v[:, 0], v[:, 2] - v[:, 0])
    return n / np.linalg.norm(n, axis=1, keepdims=True)


def corners(v, t):
    h = 0.5 * np.asarray(t)[:, None, None] * unit_normals(v)[:, None, :]
    return np.concatenate([v - h, v + h], axis=1)


def solid_points(v, t, m=6, q=4):
    """Points filling each prism solid: a barycentric grid (m subdivisions, edges and
    corners included) at q heights from -t/2 to +t/2 (faces included). Returns (P, K, 3)."""
    ij = [(i, j) for i in range(m + 1) for j in range(m + 1 - i)]
    w = np.array([[i / m, j / m, 1 - (i + j) / m] for i, j in ij])          # (B, 3)
    base = np.einsum("bk,pkj->pbj", w, v)                                   # (P, B, 3)
    hs = np.linspace(-0.5, 0.5, q)
    n = unit_normals(v)
    pts = base[:, None, :, :] + (hs[None, :, None, None] * np.asarray(t)[:, None, None, None]
                                 * n[:, None, None, :])
    return pts.reshape(len(v), -1, 3)


def min_distance_between_groups(v, t, group, boxsize=None, lo=None, margin=1.0):
    """Smallest distance between sampled points of prisms in different groups.

    Candidate prism pairs come from a cKDTree over centroids: a prism lies inside the
    ball about its centroid through its farthest corner (radius rb), so prisms whose
    centroids are more than 2 rb + margin apart are at least ``margin`` apart and need
    no sampling. Sampling only ever over-estimates the distance between two solids by
    at most the sampling step (about 0.17 nm here), never under-estimates it.
    Returns (distance, number of cross-group prism pairs sampled)."""
    v = np.asarray(v)
    cent = v.mean(axis=1)
    c6 = corners(v, t)
    rb = np.linalg.norm(c6 - cent[:, None, :], axis=2).max()
    if boxsize is not None:
        ct = np.minimum(np.mod(cent - lo, boxsize), np.nextafter(boxsize, 0))
        tree = cKDTree(ct, boxsize=boxsize)
    else:
        tree = cKDTree(cent)
    pairs = tree.query_pairs(2 * rb + margin, output_type="ndarray")
    pairs = pairs[group[pairs[:, 0]] != group[pairs[:, 1]]]
    if len(pairs) == 0:
        return np.inf, 0
    pts = solid_points(v, t)
    best = np.inf
    for k in range(0, len(pairs), 64):
        pa, pb = pts[pairs[k:k + 64, 0]], pts[pairs[k:k + 64, 1]]
        d = pa[:, :, None, :] - pb[:, None, :, :]
        if boxsize is not None:
            d = d - boxsize * np.round(d / boxsize)
        best = min(best, float(np.sqrt(np.einsum("pabj,pabj->pab", d, d).min())))
    return best, len(pairs)


# ----------------------------------------------------------------------------- fixtures
@pytest.fixture(scope="module")
def box_tilted():
    return pack_stacks(Box((0, 0, 0), (18, 18, 18)), 25, layers="uniform:2,4",
                       lateral_size="uniform:3,5", tilt_probability=0.5, tilt_angle=15.0,
                       born=True, seed=3)


@pytest.fixture(scope="module")
def sphere_wall():
    return pack_stacks(Sphere((1, -2, 0.5), 11.0), 30, seeding="wall", orientation="wall",
                       kappa=20, layers="poisson:2.5", lateral_size="lognormal:4,0.2",
                       tilt_probability=0.3, tilt_angle=25.0, seed=11)


# Dense packings of the fill mode (target_fraction): targets these small domains cannot
# reach, so that each fills until nothing more fits (the densest case for the checks).
@pytest.fixture(scope="module")
def dense_box():
    return pack_stacks(Box((0, 0, 0), (18, 18, 18)), target_fraction=0.9, tilt_probability=0.3,
                       tilt_angle=15.0, born=True, seed=2)


@pytest.fixture(scope="module")
def dense_periodic():
    return pack_stacks(Box((-3, 1, 2), (15, 19, 20), periodic=True), target_fraction=0.9,
                       layers="poisson:3", lateral_size="lognormal:4,0.3", tilt_probability=0.2,
                       tilt_angle=20.0, seed=4)


@pytest.fixture(scope="module")
def dense_sphere():
    return pack_stacks(Sphere((1, -2, 0.5), 9.0), target_fraction=0.9, orientation="wall",
                       kappa=5, tilt_probability=0.3, tilt_angle=12.0, seed=6)


@pytest.fixture(scope="module")
def dense_fixed():
    """Every stack parallel: the hardest case for telling stacks apart."""
    return pack_stacks(Box((0, 0, 0), (16, 16, 16)), target_fraction=0.9, orientation="fixed",
                       normal=(1, 2, 2), seed=8)


DENSE = ["dense_box", "dense_periodic", "dense_sphere", "dense_fixed"]


# -------------------------------------------------------------------------------- tests
def test_sampler_sees_a_known_gap():
    """The distance checker itself: two unit-edge prisms (t = 0.7) stacked 1.4 apart
    leave a gap of 1.4 - 0.7 = 0.7 nm (elementary geometry); the checker must return
    a value in [0.7, 0.7 + sampling step]."""
    tri = np.array([[0, 0, 0], [1, 0, 0], [0.5, math.sqrt(3) / 2, 0]], float)
    v = np.stack([tri, tri + [0, 0, 1.4]])
    d, n = min_distance_between_groups(v, np.full(2, 0.7), np.array([0, 1]))
    assert n == 1 and 0.7 - 1e-12 <= d <= 0.7 + 0.25


def test_deterministic_under_seed():
    """Every random choice takes a seed (design rule): same seed, same structure."""
    kw = dict(layers="poisson:3", lateral_size="lognormal:4,0.3", tilt_probability=0.4,
              tilt_angle=10)
    a = pack_stacks(Box((0, 0, 0), (15, 15, 15)), 12, seed=5, **kw)
    b = pack_stacks(Box((0, 0, 0), (15, 15, 15)), 12, seed=5, **kw)
    c = pack_stacks(Box((0, 0, 0), (15, 15, 15)), 12, seed=6, **kw)
    assert np.array_equal(a.structure.vertices, b.structure.vertices)
    assert np.array_equal(a.stack, b.stack) and np.array_equal(a.tilted, b.tilted)
    assert not (len(a.structure) == len(c.structure)
                and np.allclose(a.structure.vertices, c.structure.vertices))


@pytest.mark.parametrize("which", ["box_tilted", "sphere_wall"] + DENSE)
def test_stacks_keep_the_clearance(which, request):
    """No two stacks closer than the clearance (0.3 nm), by dense sampling + cKDTree
    (minimum image in the periodic box). The dense packings are tight: somewhere two
    stacks come within 0.25 nm of the clearance, so the check is not idle there."""
    r = request.getfixturevalue(which)
    assert r.n_stacks >= 5
    s = r.structure
    kw = {}
    if getattr(s.domain, "periodic", False):
        kw = dict(boxsize=s.domain.lengths, lo=np.asarray(s.domain.min))
    d, n_pairs = min_distance_between_groups(s.vertices, s.thickness, r.stack, margin=0.5, **kw)
    assert n_pairs > 0 and d >= 0.3
    if which.startswith("dense"):
        assert d < 0.55


@pytest.mark.parametrize("scenario", ["box", "sphere_wall"])
def test_clearance_option_is_honoured(scenario):
    """A 1 nm clearance holds by the sampling check, while the same packing with
    clearance 0 comes closer than 1 nm (control: the check can fail)."""
    def make(c):
        if scenario == "box":
            return pack_stacks(Box((0, 0, 0), (18, 18, 18)), 25, layers="uniform:2,4",
                               lateral_size="uniform:3,5", tilt_probability=0.5,
                               tilt_angle=15.0, clearance=c, seed=3)
        return pack_stacks(Sphere((1, -2, 0.5), 11.0), 30, seeding="wall", orientation="wall",
                           kappa=20, layers="poisson:2.5", lateral_size="lognormal:4,0.2",
                           clearance=c, seed=11)
    for c, ok in ((1.0, True), (0.0, False)):
        r = make(c)
        s = r.structure
        d, n_pairs = min_distance_between_groups(s.vertices, s.thickness, r.stack, margin=1.5)
        assert n_pairs > 0
        assert (d >= 1.0) == ok


def test_periodic_box_clearance_uses_minimum_image():
    """In a periodic box, stacks near opposite faces are neighbours across the boundary.
    A large clearance (1.5 nm) makes the check discriminating: the same packing in the
    non-periodic box violates it across the boundary (asserted as a control)."""
    lo, hi = np.array([-5.0, 0, 0]), np.array([9.0, 14, 14])
    kw = dict(lateral_size="fixed:3", layers="fixed:1", clearance=1.5, seed=0, max_attempts=3000)
    for periodic in (True, False):
        box = Box(tuple(lo), tuple(hi), periodic=periodic)
        r = pack_stacks(box, 60, **kw)
        s = r.structure
        d, n_pairs = min_distance_between_groups(s.vertices, s.thickness, r.stack,
                                                 boxsize=hi - lo, lo=lo, margin=2.0)
        if periodic:
            assert n_pairs > 0 and d >= 1.5
            c = corners(s.vertices, s.thickness).reshape(-1, 3)
            assert np.all((c >= lo) & (c <= hi))
        else:
            assert d < 1.5


@pytest.mark.parametrize("which", ["box_tilted", "sphere_wall"] + DENSE)
def test_all_prisms_inside_the_domain(which, request):
    r = request.getfixturevalue(which)
    s = r.structure
    c = corners(s.vertices, s.thickness).reshape(-1, 3)
    if isinstance(s.domain, Sphere):
        assert np.all(np.linalg.norm(c - np.asarray(s.domain.center), axis=1) <= s.domain.radius)
    else:
        lo, hi = s.domain.bounds
        assert np.all((c >= lo) & (c <= hi))


@pytest.mark.parametrize("which", ["box_tilted", "sphere_wall"] + DENSE)
def test_layers_are_parallel_copies_at_the_repeat(which, request):
    """Ground truth: layer j = layer 0 translated by j * repeat along the stack normal,
    triangles equilateral with the requested edge, stacking number = layer count."""
    r = request.getfixturevalue(which)
    s = r.structure
    rep = 1.4
    nrm = unit_normals(s.vertices)
    assert np.allclose(s.edge_lengths, 1.0, atol=1e-9)
    for k in range(r.n_stacks):
        n_layers = r.stacks.n_layers[k]
        mine = (r.stack == k) & ~r.tilted
        layers = r.layer[mine]
        assert set(layers.tolist()) == set(range(n_layers))
        v = s.vertices[mine]
        base = v[layers == 0]
        stack_n = r.stacks.normal[k]
        assert np.allclose(np.abs(nrm[mine] @ stack_n), 1.0, atol=1e-9)
        for j in range(1, n_layers):
            assert np.allclose(v[layers == j], base + j * rep * stack_n, atol=1e-9)
        assert np.all(r.stacking_number[mine] == n_layers)
        assert np.sum(layers == 0) == r.stacks.triangles_per_layer[k]
        # the centre lies midway between the bottom and top layers along the normal
        h = (v.reshape(-1, 3) - r.stacks.centre[k]) @ stack_n
        assert h.min() + h.max() == pytest.approx(0.0, abs=1e-9)
        assert h.max() == pytest.approx((n_layers - 1) / 2 * rep, abs=1e-9)
    assert np.all(r.stacking_number[r.tilted] == 1)


@pytest.mark.parametrize("which,angle", [("box_tilted", 15.0), ("sphere_wall", 25.0),
                                         ("dense_box", 15.0), ("dense_periodic", 20.0),
                                         ("dense_sphere", 12.0)])
def test_tilted_layers_at_the_requested_angle(which, angle, request):
    """The angle between a tilted layer's normal and its stack normal equals tilt_angle;
    the tilted layer sits above the top layer without touching the stack."""
    r = request.getfixturevalue(which)
    s = r.structure
    assert r.tilted.any()
    nrm = unit_normals(s.vertices)
    for k in np.flatnonzero(r.stacks.has_tilt):
        t = (r.stack == k) & r.tilted
        assert np.all(r.layer[t] == r.stacks.n_layers[k])
        cosang = np.clip(nrm[t] @ r.stacks.normal[k], -1, 1)
        assert np.allclose(np.degrees(np.arccos(cosang)), angle, atol=1e-7)
        # above the top layer: every tilted corner at least one repeat above the stack's top
        top = (r.stacks.n_layers[k] - 1) / 2 * 1.4
        h = (s.vertices[t].reshape(-1, 3) - r.stacks.centre[k]) @ r.stacks.normal[k]
        assert h.min() >= top + 1.4 - 1e-9
        mine = r.stack == k
        grp = r.tilted[mine].astype(int)
        d, n_pairs = min_distance_between_groups(s.vertices[mine], s.thickness[mine], grp)
        assert n_pairs > 0 and d >= 0.3


def test_layer_patch_is_edge_connected():
    """In-plane neighbours share edges: the edge-adjacency graph of a layer is connected
    (union-find over triangles sharing a rounded edge)."""
    r = perfect_stack(1, 7.3, edge=1.3, normal=(1, 2, 3), center=(4, 5, 6))
    v = np.round(r.structure.vertices, 6)
    n = len(v)
    parent = list(range(n))

    def find(i):
        while parent[i] != i:
            parent[i] = parent[parent[i]]
            i = parent[i]
        return i

    owner = {}
    shared = 0
    for i in range(n):
        for a, b in ((0, 1), (1, 2), (2, 0)):
            key = tuple(sorted((tuple(v[i, a]), tuple(v[i, b]))))
            if key in owner:
                parent[find(i)] = find(owner[key])
                shared += 1
            else:
                owner[key] = i
    assert len({find(i) for i in range(n)}) == 1
    assert shared >= n - 1
    assert np.allclose(r.structure.edge_lengths, 1.3)
    # roughly a disc of diameter 7.3: area within 25% of pi D^2 / 4
    area = r.structure.areas.sum()
    assert abs(area / (math.pi * 7.3 ** 2 / 4) - 1) < 0.25


def test_perfect_stack_ground_truth():
    r = perfect_stack(5, 6.0, normal=(0, 1, 1), center=(1, 2, 3))
    s = r.structure
    assert len(s) == 5 * r.stacks.triangles_per_layer[0]
    assert np.allclose(unit_normals(s.vertices), np.array([0, 1, 1]) / math.sqrt(2))
    assert np.all(r.stacking_number == 5) and s.spacing == 1.4
    assert np.allclose(s.centroids.mean(axis=0), (1, 2, 3), atol=0.2)
    assert "invented" in s.metadata["scenario"]
    c = corners(s.vertices, s.thickness).reshape(-1, 3)
    lo, hi = s.domain.bounds
    assert np.all((c >= lo) & (c <= hi))


def test_born_and_sheet_columns(box_tilted):
    r = box_tilted
    born = r.structure.columns["born"]
    assert np.array_equal(born, r.stack + r.layer)
    sheet = r.structure.columns["sheet"]
    # one sheet id per (stack, layer)
    pairs = np.unique(np.stack([r.stack, r.layer], axis=1), axis=0)
    assert len(np.unique(sheet)) == len(pairs)


def test_fixed_orientation_and_wall_seeding_in_a_box():
    r = pack_stacks(Box((0, 0, 0), (20, 20, 20)), 20, seeding="wall", orientation="fixed",
                    normal=(0, 0, 2), layers="fixed:2", lateral_size="fixed:4", seed=1)
    assert r.n_stacks > 0
    assert np.allclose(np.abs(unit_normals(r.structure.vertices)[:, 2]), 1.0)
    c = corners(r.structure.vertices, r.structure.thickness).reshape(-1, 3)
    assert np.all((c >= 0) & (c <= 20))


def test_poisson_layers_mean():
    """poisson:M gives 1 + Poisson(M - 1): mean M (the Poisson mean; common practice),
    checked within 4 standard errors (variance M - 1)."""
    d = parse_distribution("poisson:3.5", name="--layers", integer=True)
    x = d.sample(np.random.default_rng(0), 20000)
    assert x.min() >= 1
    assert abs(x.mean() - 3.5) < 4 * math.sqrt(2.5 / 20000)


@pytest.mark.parametrize("spec,integer,fragment", [
    ("poisson", True, "no ':'"),
    ("gauss:3", True, "unknown kind"),
    ("lognormal:5,0.3", True, "does not apply"),
    ("poisson:3", False, "does not apply"),
    ("uniform:2", True, "takes 2 parameter"),
    ("uniform:6,2", True, "A <= B"),
    ("fixed:2.5", True, "whole numbers"),
    ("fixed:0", True, "at least 1"),
    ("fixed:-3", False, "positive"),
    ("lognormal:a,b", False, "not numbers"),
    ("lognormal:5,-1", False, "non-negative sigma"),
    ("fixed:nan", False, "finite"),
    ("", False, "expected KIND"),
])
def test_bad_specs(spec, integer, fragment):
    with pytest.raises(OptionError, match=fragment) as e:
        parse_distribution(spec, name="--layers" if integer else "--lateral", integer=integer)
    assert ("--layers" if integer else "--lateral") in str(e.value)


def test_good_specs():
    assert parse_distribution("fixed:4", name="x", integer=True).sample(
        np.random.default_rng(0), 3).tolist() == [4, 4, 4]
    assert parse_distribution(6, name="x").params == (6.0,)
    u = parse_distribution(" Uniform:2,6 ", name="x", integer=True).sample(np.random.default_rng(1), 500)
    assert u.min() == 2 and u.max() == 6


@pytest.mark.parametrize("kw,fragment", [
    (dict(seeding="wall"), "no walls"),
    (dict(orientation="wall"), "no walls"),
])
def test_periodic_box_refuses_walls(kw, fragment):
    with pytest.raises(OptionError, match=fragment):
        pack_stacks(Box((0, 0, 0), (10, 10, 10), periodic=True), 3, **kw)


@pytest.mark.parametrize("kw,fragment", [
    (dict(thickness=1.5), "smaller than --repeat"),
    (dict(tilt_probability=0.5, tilt_angle=0), "--tilt-angle"),
    (dict(tilt_probability=1.5, tilt_angle=10), "--tilt-probability"),
    (dict(seeding="floor"), "--seeding"),
    (dict(orientation="random"), "--orientation"),
    (dict(kappa=float("nan")), "--kappa"),
    (dict(clearance=-1), "--clearance"),
    (dict(normal=(0, 0, 0)), "zero vector"),
    (dict(triangle_edge=0), "--edge"),
])
def test_bad_options(kw, fragment):
    with pytest.raises(OptionError, match=fragment):
        pack_stacks(Box((0, 0, 0), (10, 10, 10)), 3, **kw)


def test_jammed_domain_places_fewer_and_says_so():
    r = pack_stacks(Sphere((0, 0, 0), 4.0), 50, lateral_size="fixed:4", layers="fixed:3",
                    max_attempts=300, seed=0)
    assert r.n_stacks < 50 and r.attempts <= 300
    assert r.to_dict()["placed_stacks"] == r.n_stacks


# --------------------------------------------------------------------------- fill mode
def csh_from_prisms(r):
    """C-S-H volume recomputed from the prism table alone (elementary geometry): every
    prism's area (half the cross product of its stored edges) times its thickness, plus,
    per stack, the area of its bottom layer times the repeat minus the thickness for each
    of the n - 1 gaps between its untilted layers."""
    s = r.structure
    v = s.vertices
    area = 0.5 * np.linalg.norm(np.cross(v[:, 1] - v[:, 0], v[:, 2] - v[:, 0]), axis=1)
    solid = float((area * s.thickness).sum())
    bottom = (~r.tilted) & (r.layer == 0)
    layer_area = np.bincount(r.stack[bottom], weights=area[bottom], minlength=r.n_stacks)
    gaps = (r.stacks.n_layers - 1) * (s.spacing - s.thickness[0])
    return solid, solid + float((layer_area * gaps).sum())


@pytest.mark.parametrize("domain", [Box((0, 0, 0), (20, 20, 20)),
                                    Box((0, 0, 0), (20, 20, 20), periodic=True),
                                    Sphere((0, 0, 0), 10.0)], ids=["box", "periodic", "sphere"])
def test_fill_reaches_the_target_fraction(domain):
    """The fill mode stops once the C-S-H volume (prisms + interlayer gaps, exact from the
    construction, recomputed here from the prism table) reaches the target, overshooting
    by less than one stack; the sequential mode with the same sizes stays far below it."""
    target = 0.25
    r = pack_stacks(domain, target_fraction=target, seed=1)
    solid, csh = csh_from_prisms(r)
    assert r.settings["stopped"] == "target"
    assert csh / domain.volume == pytest.approx(r.csh_fraction, rel=1e-9)
    assert solid / domain.volume == pytest.approx(r.solid_fraction, rel=1e-9)
    assert r.csh_fraction >= target * (1 - 1e-12)
    biggest = (r.stacks.triangles_per_layer * math.sqrt(3) / 4
               * ((r.stacks.n_layers - 1) * 1.4 + 0.7 * (1 + r.stacks.has_tilt))).max()
    assert (r.csh_fraction - target) * domain.volume < biggest
    seq = pack_stacks(domain, 2000, seed=1, max_attempts=20000)
    _, csh_seq = csh_from_prisms(seq)
    assert csh_seq / domain.volume < 0.7 * target


@pytest.mark.parametrize("which,voxel", [("dense_box", 0.1), ("dense_periodic", 0.1),
                                         ("dense_sphere", 0.1)])
def test_fill_fraction_matches_the_rasterized_phases(which, voxel, request):
    """The exact C-S-H fraction against the phase map (sheetview.grid.rasterize + the
    interlayer painted between the stacked pairs the stacking measure finds) at a 0.1 nm
    voxel: solid within 1 %, solid + interlayer within 2 % (the voxel-centre sampling of
    0.7 nm sheets and of the interlayer gaps' rims). Derived: the construction is exact."""
    from sheetview.grid import INTERLAYER, OUTSIDE, SOLID
    from sheetview.measures.phases import classify
    r = request.getfixturevalue(which)
    g = classify(r.structure, voxel)
    lab = g.labels
    inside = np.count_nonzero(lab != OUTSIDE)
    solid = np.count_nonzero(lab == SOLID) / inside
    csh = solid + np.count_nonzero(lab == INTERLAYER) / inside
    assert solid == pytest.approx(r.solid_fraction, rel=0.01)
    assert csh == pytest.approx(r.csh_fraction, rel=0.02)


@pytest.mark.parametrize("which", DENSE)
def test_fill_ground_truth_is_what_the_stacking_measure_finds(which, request):
    """On the dense packings, sheetview.measures.stacking at its default tolerances finds
    exactly the generated stacks: stacking numbers identical to the truth for every prism
    (tilted defect layers 1), the same layers and the same stacks (untilted prisms); its
    tilted contacts join a tilt-defect layer to the top layer of its own stack only."""
    from sheetview.measures.stacking import stacking
    g = request.getfixturevalue(which)
    r = stacking(g.structure)
    np.testing.assert_array_equal(r.stacking_number, g.stacking_number)
    untilted = ~g.tilted
    assert _same_partition(r.stack[untilted], g.stack[untilted])
    assert _same_partition(r.layer, g.stack * 1000 + g.layer)
    assert r.stacking_number.max() >= 4
    t = r.graph.tilted
    assert np.array_equal(g.stack[t[:, 0]], g.stack[t[:, 1]])
    assert np.all(g.tilted[t[:, 0]] != g.tilted[t[:, 1]])
    top = g.stacks.n_layers[g.stack[t]] - 1
    assert np.all(np.where(g.tilted[t], g.layer[t] == top + 1, g.layer[t] == top))
    if g.stacks.has_tilt.any():
        assert len(t) > 0
        assert set(np.unique(g.stack[t[:, 0]])) == set(np.flatnonzero(g.stacks.has_tilt))


def _same_partition(a, b):
    pairs = np.unique(np.stack([a, b], 1), axis=0)
    return len(pairs) == len(np.unique(a)) == len(np.unique(b))


def test_fill_is_reproducible_for_a_seed():
    """Every random choice takes a seed (design rule): same seed, same dense structure."""
    dom = Box((0, 0, 0), (14, 14, 14), periodic=True)
    kw = dict(target_fraction=0.3, tilt_probability=0.3, tilt_angle=10.0)
    a = pack_stacks(dom, seed=5, **kw)
    b = pack_stacks(dom, seed=5, **kw)
    c = pack_stacks(dom, seed=6, **kw)
    assert np.array_equal(a.structure.vertices, b.structure.vertices)
    assert np.array_equal(a.stacking_number, b.stacking_number)
    assert not (len(a.structure) == len(c.structure)
                and np.allclose(a.structure.vertices, c.structure.vertices))


def test_fill_sizes_shrink_as_the_space_fills(dense_box):
    """Polydisperse filling: stacks placed later (the born order) are smaller; the first
    quarter holds stacks of the drawn size, the last quarter the small gap fillers."""
    r = dense_box
    vol = r.stacks.triangles_per_layer * r.stacks.n_layers
    q = len(vol) // 4
    assert vol[:q].mean() > 5 * vol[-q:].mean()
    assert r.stacks.lateral_size.max() > 4.0 and r.stacks.triangles_per_layer.min() == 1


def test_fill_stops_when_nothing_more_fits():
    r = pack_stacks(Sphere((0, 0, 0), 5.0), target_fraction=0.9, seed=1)
    assert r.settings["stopped"] == "full"
    assert 0.05 < r.csh_fraction < 0.9 and r.n_stacks > 0
    assert r.to_dict()["csh_fraction"] == pytest.approx(r.csh_fraction)


def test_fill_limits_stacks_and_attempts():
    dom = Box((0, 0, 0), (16, 16, 16))
    r = pack_stacks(dom, 7, target_fraction=0.5, seed=0)
    assert r.n_stacks == 7 and r.settings["stopped"] == "stacks"
    r = pack_stacks(dom, target_fraction=0.5, max_attempts=30, seed=0)
    assert r.attempts <= 30 and r.settings["stopped"] == "attempts"


@pytest.mark.parametrize("kw,fragment", [
    (dict(target_fraction=0.0), "--target-fraction"),
    (dict(target_fraction=1.0), "--target-fraction"),
    (dict(target_fraction="x"), "--target-fraction"),
    (dict(target_fraction=0.3, seeding="wall"), "--seeding wall"),
    (dict(target_fraction=0.3, fill_tries=0), "--fill-tries"),
    (dict(target_fraction=0.3, fill_voxel=-1), "--fill-voxel"),
    (dict(n_stacks=3, fill_voxel=0.3), "fill mode only"),
    (dict(n_stacks=3, fill_tries=4), "fill mode only"),
    (dict(), "--stacks"),
])
def test_fill_bad_options(kw, fragment):
    with pytest.raises(OptionError, match=fragment):
        pack_stacks(Box((0, 0, 0), (10, 10, 10)), **kw)


def test_fill_refuses_a_periodic_box_too_small():
    with pytest.raises(OptionError, match="periodic box must be at least"):
        pack_stacks(Box((0, 0, 0), (4, 10, 10), periodic=True), target_fraction=0.2)


def test_separating_axes_never_overstate_the_gap():
    """The clearance kernel against dense point sampling + cKDTree (reference library):
    for 1500 random pairs of unit prisms (0.7 nm thick) at random orientations and
    distances, a pair reported at least 0.3 nm apart is at least 0.3 nm apart (sampling
    overstates distances, never understates them), and pairs sampled more than 0.45 nm
    apart are mostly reported apart (the test is not idle)."""
    from scipy.spatial.transform import Rotation

    from sheetview.synth import _separated
    rng = np.random.default_rng(1)
    tri = np.array([[0, 0, 0], [1, 0, 0], [0.5, math.sqrt(3) / 2, 0]])
    tri = tri - tri.mean(axis=0)
    ea, eb = np.empty((4, 3)), np.empty((4, 3))
    far = apart = 0
    for _ in range(1500):
        ra, rb = Rotation.random(2, random_state=rng.integers(1 << 30)).as_matrix()
        a, b = tri @ ra.T, tri @ rb.T
        d = rng.normal(size=3)
        b = b + d / np.linalg.norm(d) * rng.uniform(0.6, 1.8)
        sep = _separated(a, ra[:, 2], 0.35, b, rb[:, 2], 0.35, 0.3, ea, eb)
        dist = cKDTree(solid_points(a[None], [0.7], m=14, q=6)[0]).query(
            solid_points(b[None], [0.7], m=14, q=6)[0])[0].min()
        if sep:
            assert dist >= 0.3 - 1e-9
        if dist > 0.45:
            far += 1
            apart += sep
    assert far > 250 and apart > 0.9 * far


def test_fill_tests_the_prisms_it_writes():
    """The fill mode's exact tests build each stack in a numba kernel; the written
    structure comes from the vectorised builder. Both must give the same prisms (random
    stacks, tilt defects included), or the clearance would be checked on other geometry."""
    from sheetview.synth import _build, _build_one, _patch_sizes, _perp_basis, _Stacks, _watson
    rng = np.random.default_rng(3)
    m = 40
    lat = rng.uniform(0.5, 9.0, m)
    tpl, k = _patch_sizes(lat, 1.0)
    nrm = _watson(rng, m, 0.0, np.array([0.0, 0.0, 1.0]))
    e1, e2 = _perp_basis(nrm)
    st = _Stacks(rng.integers(1, 6, m), k, lat, rng.uniform(-5, 5, (m, 3)), nrm, e1, e2,
                 rng.random(m) < 0.5)
    tilt = math.radians(17.0)
    verts, pn, owner, _, _ = _build(st, tpl, 1.0, 1.4, tilt)
    V, N, C = np.empty((4000, 3, 3)), np.empty((4000, 3)), np.empty((4000, 3))
    for i in range(m):
        P = _build_one(V, N, C, st.centre[i], nrm[i], e1[i], e2[i], int(k[i]),
                       int(st.n_layers[i]), bool(st.tilt[i]), tpl.uv, tpl.min_u, 1.0, 1.4,
                       math.cos(tilt), math.sin(tilt))
        mine = owner == i
        assert P == mine.sum()
        np.testing.assert_allclose(V[:P], verts[mine], rtol=0, atol=1e-12)
        np.testing.assert_allclose(N[:P], pn[mine], rtol=0, atol=1e-12)


def test_cli_fill_mode(tmp_path):
    out, truth = tmp_path / "d.npz", tmp_path / "t.csv"
    r = run("synth", "--box", "14,14,14", "--periodic", "--target-fraction", "0.25",
            "--seed", "3", "-o", out, "--truth", truth)
    assert r.exit_code == 0, r.output
    assert "target reached" in r.output and "C-S-H 0.2" in r.output
    s = sv.read(out)
    meta = s.metadata["synth"]
    assert meta["mode"] == "fill" and meta["target_fraction"] == 0.25
    assert meta["csh_fraction"] >= 0.25 * (1 - 1e-12) and "invented" in s.metadata["scenario"]
    t = np.loadtxt(truth, delimiter=",", skiprows=2, dtype=np.int64, ndmin=2)
    assert t.shape == (len(s), 7)
    r = run("synth", "--sphere", "4", "--target-fraction", "0.9", "-o", tmp_path / "f.npz")
    assert r.exit_code == 0 and "target NOT reached" in r.output
    r = run("synth", "--box", "10,10,10", "--target-fraction", "1.5", "-o", tmp_path / "x.npz")
    assert r.exit_code == 2 and "--target-fraction" in r.output


# --------------------------------------------------------------------------------- CLI
def run(*args):
    return CliRunner().invoke(main, [str(a) for a in args], catch_exceptions=False)


def test_cli_writes_structure_and_truth(tmp_path):
    out, truth = tmp_path / "s.npz", tmp_path / "t.csv"
    args = ["synth", "--box", "16,16,16", "--stacks", "8", "--layers", "fixed:3",
            "--lateral", "fixed:4", "--tilt-probability", "0.5", "--tilt-angle", "12",
            "--seed", "4", "-o", out, "--truth", truth]
    r = run(*args)
    assert r.exit_code == 0, r.output
    assert "stacks" in r.output and "prisms" in r.output
    s = sv.read(out)
    assert "invented" in s.metadata["scenario"]
    assert s.metadata["synth"]["seed"] == 4
    t = np.loadtxt(truth, delimiter=",", skiprows=2, dtype=np.int64, ndmin=2)
    assert t.shape == (len(s), 7)
    assert np.array_equal(t[:, 0], np.arange(len(s)))
    assert np.array_equal(t[:, 5], s.columns["sheet"])
    assert set(t[t[:, 3] == 1, 4].tolist()) <= {1} and set(t[t[:, 3] == 0, 4].tolist()) == {3}
    # refuses to overwrite without --force, keeps the old file
    before = out.read_bytes()
    r = run(*args)
    assert r.exit_code == 2 and "already exists" in r.output
    assert out.read_bytes() == before
    assert run(*args, "--force").exit_code == 0


@pytest.mark.parametrize("args,fragment", [
    (["--box", "1,2", "-o", "x.csv"], "--box"),
    (["--sphere", "5", "--box", "3,3,3", "-o", "x.csv"], "not both"),
    (["-o", "x.csv"], "give a domain"),
    (["--sphere", "5", "--periodic", "-o", "x.csv"], "--periodic"),
    (["--sphere", "5", "-o", "x.ply"], ".csv, .npz or .parquet"),
    (["--sphere", "5", "--layers", "poisson:0", "-o", "x.csv"], "--layers"),
    (["--sphere", "5", "--normal", "1,0", "-o", "x.csv"], "--normal"),
    (["--sphere", "5", "--truth", "t.txt", "-o", "x.csv"], "--truth"),
])
def test_cli_option_errors(args, fragment, tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    r = run("synth", *args)
    assert r.exit_code == 2
    assert fragment in r.output and "Traceback" not in r.output
    assert not (tmp_path / "x.csv").exists()


def test_write_truth_refuses_existing(tmp_path, box_tilted):
    p = tmp_path / "t.csv"
    write_truth(box_tilted, p)
    with pytest.raises(OutputExistsError):
        write_truth(box_tilted, p)


# ------------------------------------------------------------------------ sample files
def _samples_module():
    import importlib.util
    from pathlib import Path
    path = Path(__file__).resolve().parents[1] / "sample_structures" / "make_samples.py"
    spec = importlib.util.spec_from_file_location("make_samples", path)
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    return mod


@pytest.mark.parametrize("name", ["single_stack.csv", "tilted_defects_box.npz"])
def test_sample_files_match_their_commands(name, tmp_path):
    """The README's command regenerates the stored sample (same prisms), and the README
    lists it as invented."""
    mod = _samples_module()
    stored = mod.HERE / name
    if not stored.exists():
        pytest.skip("sample file not present")
    _, truth, args = next(c for c in mod.COMMANDS if c[0] == name)
    out = tmp_path / name
    r = run("synth", *args.split(), "-o", out)
    assert r.exit_code == 0, r.output
    a, b = sv.read(stored), sv.read(out)
    assert np.array_equal(a.vertices, b.vertices)
    assert np.array_equal(a.columns["sheet"], b.columns["sheet"])
    readme = (mod.HERE / "README.md").read_text()
    assert name in readme and args.split()[0] in readme and "invented" in readme


def test_voxelize_matches_point_in_prism_by_sampling():
    """The sample volume's voxelizer against a brute-force test with the exact
    half-space description of a prism (elementary geometry), on a single stack."""
    mod = _samples_module()
    r = perfect_stack(2, 4.0, normal=(1, 1, 2), center=(4, 4, 4))
    lab = mod.voxelize(r.structure, 16, 0.5)
    s = r.structure
    g = (np.stack(np.meshgrid(*(np.arange(16),) * 3, indexing="ij"), -1).reshape(-1, 3) + 0.5) * 0.5
    inside = np.zeros(len(g), bool)
    for v, t, n in zip(s.vertices, s.thickness, s.normals):
        h = (g - v[0]) @ n
        ok = np.abs(h) <= t / 2
        for k in range(3):      # inside the three side planes
            e = v[(k + 1) % 3] - v[k]
            side = np.cross(n, e)
            ok &= (g - v[k]) @ side >= -1e-12
        inside |= ok
    assert lab.sum() > 0
    assert np.array_equal(lab.reshape(-1).astype(bool), inside)
