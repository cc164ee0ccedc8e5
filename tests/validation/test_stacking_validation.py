"""Stacking against general-purpose references: exact triangle clipping against shapely
(a test dependency), invariance under rigid motions, and the ground truth of the
demonstration generator."""
import numpy as np
import pytest
from hypothesis import given, settings, strategies as st
from scipy.spatial.transform import Rotation

from sheetview import Box, Sphere, Structure
from sheetview.measures.orientation import orientation
from sheetview.measures.stacking import stacking, triangle_intersection_area
from sheetview.synth import rhombus_patch

REPEAT = 1.4


def patch(n, edge=1.0):
    """n x n rhombus of 2 n^2 equilateral triangles in the z = 0 plane, centred."""
    return rhombus_patch(n, edge)


def make_stack(n_layers, n=3, center=(0, 0, 0)):
    v = np.concatenate([patch(n) + [0, 0, REPEAT * k] for k in range(n_layers)])
    return v - [0, 0, REPEAT * (n_layers - 1) / 2] + np.asarray(center, float)


def _reference_area(a, b):
    """Intersection area by shapely (GEOS), a general-purpose reference library."""
    from shapely.geometry import Polygon
    return Polygon(a).intersection(Polygon(b)).area


def test_clipping_against_reference():
    """Intersection area of random triangle pairs (any winding, including containment,
    identical and edge-sharing pairs) against shapely's polygon intersection (GEOS), a
    general-purpose reference library; tolerance 1e-9 nm^2. Random triangles in random
    positions and windings; 125 of the pairs overlap."""
    rng = np.random.default_rng(21)
    cases = [(rng.normal(size=(3, 2)), rng.normal(size=(3, 2)) * s + o)
             for s, o in zip(rng.uniform(0.2, 2, 300), rng.normal(scale=0.7, size=(300, 2)))]
    t = rng.normal(size=(3, 2))
    cases += [(t, t), (t, t[::-1]), (t, 0.5 * (t - t.mean(0)) + t.mean(0)),
              (t, np.array([t[0], t[1], 2 * t[0] + 0 * t[2] - t[2] + t[1] - t[0]]))]
    refs = np.array([_reference_area(a, b) for a, b in cases])
    assert np.count_nonzero(refs > 0) > 100  # not only empty intersections (125 of 304 overlap)
    for (a, b), ref in zip(cases, refs):
        assert triangle_intersection_area(a, b) == pytest.approx(ref, abs=1e-9)


def _structure():
    base = make_stack(3)
    top = Rotation.from_euler("x", 15, degrees=True).apply(patch(3).reshape(-1, 3))
    top = top.reshape(-1, 3, 3) + [0, 0, 2 * REPEAT]
    return np.concatenate([base, top, make_stack(2, center=(9, 0, 0))])


@settings(max_examples=5, deadline=None)
@given(seed=st.integers(0, 2 ** 31 - 1), shift=st.tuples(*[st.floats(-50, 50)] * 3))
def test_rigid_motion_invariance(seed, shift):
    """Rotating (uniform random rotation, scipy Rotation.random) and translating the
    whole structure leaves stacking numbers, stacks and S unchanged (common practice:
    the measures are defined from relative geometry only)."""
    v = _structure()
    r0 = stacking(Structure(v, 0.7, Sphere((0, 0, 0), 100)))
    o0 = orientation(Structure(v, 0.7, Sphere((0, 0, 0), 100)))
    R = Rotation.random(random_state=seed)
    w = R.apply(v.reshape(-1, 3).copy()).reshape(-1, 3, 3) + np.asarray(shift)
    s1 = Structure(w, 0.7, Sphere(tuple(shift), 100))
    r1 = stacking(s1)
    np.testing.assert_array_equal(r0.stacking_number, r1.stacking_number)
    assert r1.n_stacks == r0.n_stacks and r1.n_layers == r0.n_layers
    assert len(r1.graph.tilted) == len(r0.graph.tilted)
    assert orientation(s1).S == pytest.approx(o0.S, abs=1e-9)


def _same_partition(a, b):
    pairs = np.unique(np.stack([a, b], 1), axis=0)
    return len(pairs) == len(np.unique(a)) == len(np.unique(b))


@pytest.mark.parametrize("domain", [Sphere((0, 0, 0), 22.0),
                                    Box((0, 0, 0), (36, 36, 36), periodic=True)])
def test_generator_ground_truth(domain):
    """Stacks packed by sheetview.synth (an invented demonstration scenario with known
    stacks, layers and tilted defect layers): stacks that touch no other stack are
    recovered exactly: same stacks, same layers, the ground-truth stacking numbers
    (tilted defect layers 1)."""
    synth = pytest.importorskip("sheetview.synth")
    g = synth.pack_stacks(domain, 14, layers="poisson:3", lateral_size="lognormal:4,0.2",
                          tilt_angle=15.0, tilt_probability=0.4, seed=7)
    s = g.structure
    r = stacking(s)
    # stacks of the truth that our links join to another truth stack "touch": leave out
    links = np.concatenate([r.graph.inplane, r.graph.stacked, r.graph.tilted])
    cross = g.stack[links[:, 0]] != g.stack[links[:, 1]]
    touching = np.unique(g.stack[links[cross].ravel()])
    keep = ~np.isin(g.stack, touching)
    assert keep.mean() > 0.5
    np.testing.assert_array_equal(r.stacking_number[keep], g.stacking_number[keep])
    untilted = keep & ~g.tilted
    assert _same_partition(r.stack[untilted], g.stack[untilted])
    assert _same_partition(r.layer[keep], (g.stack * 1000 + g.layer)[keep])
    assert np.all(r.stacking_number[g.tilted & keep] == 1)
