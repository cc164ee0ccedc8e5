"""Stacking graph, layers, stacks and stacking numbers on small hand-built structures.

Expected answers follow from the construction (a triangulated patch copied at the
1.4 nm repeat: the 1.40 nm basal spacing of 14 A tobermorite, Bonaccorsi, Merlino &
Kampf, J. Am. Ceram. Soc. 88 (2005) 505) and from the definitions in
sheetview/measures/stacking.py.
"""
import numpy as np
import pytest
from scipy.spatial.transform import Rotation

from sheetview import Box, OptionError, PhaseGrid, Sphere, Structure
from sheetview.errors import InputError
from sheetview.measures.stacking import StackingSettings, stacking, stacking_graph
from sheetview.structure import with_inferred_domain
from sheetview.synth import rhombus_patch

REPEAT = 1.4


def patch(n, edge=1.0):
    """n x n rhombus of 2 n^2 equilateral triangles in the z = 0 plane, centred."""
    return rhombus_patch(n, edge)


def make_stack(n_layers, n=4, center=(0, 0, 0), rot=None):
    v = np.concatenate([patch(n) + [0, 0, REPEAT * k] for k in range(n_layers)])
    v = v - [0, 0, REPEAT * (n_layers - 1) / 2]
    if rot is not None:
        v = rot.apply(v.reshape(-1, 3)).reshape(-1, 3, 3)
    return v + np.asarray(center, dtype=float)


def tilted_top(deg, n_base=3, n=4):
    """A stack of n_base layers with one more layer on top, tilted by ``deg`` about the
    x axis through its own centre."""
    top = Rotation.from_euler("x", deg, degrees=True).apply(patch(n).reshape(-1, 3))
    top = top.reshape(-1, 3, 3) + [0, 0, REPEAT * (n_base - 1) / 2 + REPEAT]
    return np.concatenate([make_stack(n_base, n), top])


BIG = Sphere((0, 0, 0), 60.0)


@pytest.mark.parametrize("n_layers", [1, 2, 5])
def test_perfect_stack(n_layers):
    """Every prism of a perfect n-layer stack has stacking number n (by construction)."""
    r = stacking(Structure(make_stack(n_layers), 0.7, BIG))
    assert np.all(r.stacking_number == n_layers)
    assert r.n_stacks == 1 and r.n_layers == n_layers
    assert r.histogram == {str(n_layers): 32 * n_layers}
    assert r.stacks["column"].tolist() == [n_layers]
    assert abs(r.stacks["thickness"][0] - n_layers * REPEAT) < 1e-12
    # 4 x 4 rhombus of unit edge: long diagonal 4 sqrt(3)
    assert r.stacks["lateral_diameter"][0] == pytest.approx(4 * np.sqrt(3), rel=2e-3)


def test_two_stacks_and_distributions():
    v = np.concatenate([make_stack(3), make_stack(5, center=(20, 0, 0))])
    thick = np.r_[np.full(96, 0.5), np.full(160, 0.7)]
    r = stacking(Structure(v, thick, BIG))
    assert r.n_stacks == 2 and r.n_layers == 8
    assert r.histogram == {"3": 96, "5": 160}
    assert r.mean == pytest.approx((3 * 96 + 5 * 160) / 256)
    v3, v5 = 96 * 0.5, 160 * 0.7
    assert r.histogram_volume["3"] == pytest.approx(v3 / (v3 + v5))
    assert r.mean_volume == pytest.approx((3 * v3 + 5 * v5) / (v3 + v5))
    assert r.histogram_stacks == {"3": 1, "5": 1}
    assert r.stacks["layers"].tolist() == [3, 5]
    np.testing.assert_allclose(r.stacks["centroid"][1], [20, 0, 0], atol=1e-9)
    np.testing.assert_allclose(r.stacks["wall_distance"], [60, 40], atol=1e-9)


def test_tilted_layer_is_a_defect():
    """A layer tilted by 15 deg on a 3-layer stack: the 3 keep 3, the tilted one gets 1,
    and the pair is a tilted contact at 15 deg."""
    r = stacking(Structure(tilted_top(15.0), 0.7, BIG))
    sn = r.stacking_number.reshape(4, -1)
    assert np.all(sn[:3] == 3) and np.all(sn[3] == 1)
    t = r.tilted_summary()
    assert t["pairs"] > 0 and t["layer_pairs"] == 1
    assert t["mean_angle"] == pytest.approx(15.0, abs=1e-6)
    k = int(np.floor(15.0 - r.settings["angle_tol"]))
    assert t["angle_counts"][k - 1] + t["angle_counts"][k] == t["pairs"]  # [14, 16) deg


@pytest.mark.parametrize("deg,stacked", [(3.0, True), (10.0, False), (12.0, False)])
def test_default_angle_tolerance(deg, stacked):
    """Defaults: 10 deg or more of tilt is not stacked."""
    r = stacking(Structure(tilted_top(deg), 0.7, BIG))
    assert bool(r.stacking_number.max() == 4) is stacked


def test_periodic_box_wrapped_stack():
    """A stack cut by the periodic boundary gives the same answer as unwrapped."""
    v = make_stack(4, center=(19.6, 0.3, 19.8))
    box = Box((0, -10, 0), (20, 10, 20), periodic=True)
    c = v.mean(1)
    w = v + (box.wrap(c) - c)[:, None, :]
    assert np.any(box.wrap(c) != c)
    r0 = stacking(Structure(v, 0.7, Box((-30, -30, -30), (50, 50, 50))))
    r1 = stacking(Structure(w, 0.7, box))
    np.testing.assert_array_equal(r0.stacking_number, r1.stacking_number)
    assert r1.n_stacks == 1 and r1.n_layers == 4
    np.testing.assert_allclose(r1.stacks["lateral_diameter"], r0.stacks["lateral_diameter"])
    np.testing.assert_allclose(r1.stacks["centroid"], box.wrap(r0.stacks["centroid"]), atol=1e-9)
    assert np.isnan(r1.stacks["wall_angle"][0]) and np.isinf(r1.stacks["wall_distance"][0])


def test_order_and_winding_do_not_matter():
    rng = np.random.default_rng(1)
    v = np.concatenate([make_stack(3), tilted_top(15.0) + [12, 0, 0]])
    r0 = stacking(Structure(v, 0.7, BIG))
    perm = rng.permutation(len(v))
    w = v[perm].copy()
    flip = rng.random(len(w)) < 0.5
    w[flip] = w[flip][:, ::-1]  # reversed winding: normal -n
    r1 = stacking(Structure(w, 0.7, BIG))
    np.testing.assert_array_equal(r0.stacking_number[perm], r1.stacking_number)
    assert r1.n_stacks == r0.n_stacks and r1.n_layers == r0.n_layers


def test_offset_layers_overlap_fraction():
    """Layers shifted by half a triangle still stack (overlap >= 10 %); with the overlap
    fraction set to 1 only exact cover counts."""
    a = patch(4)
    b = patch(4) + [0.5, 0.0, REPEAT]
    s = Structure(np.concatenate([a, b]), 0.7, BIG)
    assert stacking(s).stacking_number.max() == 2
    assert stacking(s, overlap=1.0).stacking_number.max() == 1


def test_bad_and_degenerate_inputs():
    empty = Structure(np.zeros((0, 3, 3)), np.zeros(0), BIG)
    r = stacking(empty)
    assert r.n_prisms == 0 and np.isnan(r.mean) and r.histogram == {}
    assert any("no prisms" in n for n in r.notes)
    r.to_dict()
    one = Structure(patch(1)[:1], 0.7, BIG)
    r = stacking(one)
    assert r.stacking_number.tolist() == [1] and r.n_stacks == 1
    flat = patch(5)
    r = stacking(Structure(flat, 0.7, with_inferred_domain(flat, np.full(len(flat), 0.7))))
    assert r.n_layers == 1 and np.all(r.stacking_number == 1)
    assert any("coplanar" in n for n in r.notes) and any("bounding box" in n for n in r.notes)
    for kw in ({"angle_tol": 0}, {"angle_tol": 95}, {"gap_tol": 0.8}, {"gap_tol": -1},
               {"overlap": 0}, {"overlap": 1.5}, {"tilt_limit": 2}, {"angle_tol": float("nan")}):
        with pytest.raises(OptionError):
            stacking(one, **kw)
    with pytest.raises(OptionError, match="prisms"):
        stacking(PhaseGrid(np.zeros((2, 2, 2), np.uint8)))
    bad = patch(2).copy()
    bad[1, 2] = bad[1, 1]
    with pytest.raises(InputError, match="row 2"):
        stacking(Structure(bad, 0.7, BIG))


def test_graph_links_counts():
    """A 4 x 4 rhombus has 40 shared interior edges per layer, and 32 stacked pairs per
    pair of adjacent layers (by construction)."""
    g = stacking_graph(Structure(make_stack(3), 0.7, BIG), StackingSettings())
    assert len(g.inplane) == 3 * 40 and len(g.stacked) == 2 * 32 and len(g.tilted) == 0


@pytest.mark.parametrize("periodic", [False, True])
@pytest.mark.parametrize("seed", [0, 1])
def test_cell_list_pairs_match_kdtree(periodic, seed):
    """The numba cell-list neighbour search returns exactly the pair set of
    scipy.spatial.cKDTree.query_pairs (general-purpose reference library; Maneewongvatana
    & Mount, "Analysis of approximate nearest neighbor searching with clustered point
    sets", 1999, for its sliding-midpoint tree), with the minimum image (``boxsize``)
    in a periodic box; each pair once, ``i < j``."""
    from scipy.spatial import cKDTree

    from sheetview.measures.stacking import candidate_pairs
    rng = np.random.default_rng(seed)
    L = np.array([9.0, 12.0, 7.5])
    # clustered points plus points on the box faces, so that wrapping matters
    c = np.concatenate([rng.random((2500, 3)) * L,
                        rng.normal(0, 0.3, (300, 3)) % L,
                        rng.random((50, 3)) * L * [1, 1, 0]])
    box = Box((0, 0, 0), tuple(L), periodic=periodic)
    r = 1.1
    i, j = candidate_pairs(c, r, box)
    assert np.all(i < j)
    mine = np.sort(i * len(c) + j)
    assert np.all(np.diff(mine) > 0)  # no pair twice
    tree = cKDTree(c, boxsize=L if periodic else None)
    ref = tree.query_pairs(r, output_type="ndarray")
    np.testing.assert_array_equal(mine, np.sort(ref[:, 0] * len(c) + ref[:, 1]))
    # a box thinner than 3 cells along an axis falls back to the k-d tree
    thin = Box((0, 0, 0), (9.0, 12.0, 2.5), periodic=True)
    c2 = rng.random((800, 3)) * [9.0, 12.0, 2.5]
    i2, j2 = candidate_pairs(c2, r, thin)
    ref2 = cKDTree(c2, boxsize=[9.0, 12.0, 2.5]).query_pairs(r, output_type="ndarray")
    np.testing.assert_array_equal(np.sort(i2 * 800 + j2), np.sort(ref2[:, 0] * 800 + ref2[:, 1]))


@pytest.mark.parametrize("periodic,jitter", [(False, 0.05), (True, 0.05), (True, 0.0)])
def test_fused_graph_matches_kdtree_and_pairwise_classification(periodic, jitter):
    """The fused cell-list pass (search + lateral and separating-axis pretests +
    classification) links exactly the pairs found by classifying every cKDTree
    candidate pair one by one (scipy cKDTree as the general-purpose reference for the
    search), with bit-identical angles. Without jitter, rotated stacks put centroids on
    one normal up to rounding (the degenerate case of the axis pretest)."""
    import math

    from sheetview.measures.stacking import (_box_lengths, _candidate_pairs_kdtree,
                                             _classify_pairs, candidate_radius)
    rng = np.random.default_rng(3)
    parts = []
    for k in range(27):
        rot = Rotation.from_rotvec(rng.normal(0, 0.08, 3)) if k % 2 else Rotation.random(random_state=k)
        parts.append(make_stack(3 + k % 3, n=3, center=(np.array([k % 3, k // 3 % 3, k // 9]) + 0.5) * 7.0,
                                rot=rot))
    v = np.concatenate(parts)
    v = v + rng.normal(0, jitter, v.shape)  # jitter: some pairs fail, some tilted
    dom = Box((0, 0, 0), (21, 21, 21), periodic=periodic)
    s = Structure(v, 0.7, dom)
    st = StackingSettings(angle_tol=3.0)
    g = stacking_graph(s, st)
    r = candidate_radius(s, st)
    C = np.ascontiguousarray(s.centroids)
    pi, pj = _candidate_pairs_kdtree(C, r, dom)
    per, L = _box_lengths(dom)
    code = np.empty(len(pi), np.int8)
    ang = np.empty(len(pi))
    _classify_pairs(0, len(pi), pi, pj, np.ascontiguousarray(s.vertices), C, np.ascontiguousarray(s.normals),
                    L, per, math.cos(math.radians(st.angle_tol)), math.cos(math.radians(st.tilt_limit)),
                    st.gap_tol, st.spacing, st.overlap, st.edge_tol, code, ang)
    assert g.n_candidates == len(pi)
    for c, got in ((1, g.inplane), (2, g.stacked), (3, g.tilted)):
        k = code == c
        assert len(got) == k.sum()
        np.testing.assert_array_equal(np.sort(got[:, 0] * len(s) + got[:, 1]),
                                      np.sort(pi[k] * len(s) + pj[k]))
    assert len(g.stacked) > 0 and len(g.inplane) > 0 and (jitter == 0 or len(g.tilted) > 0)
    k = np.flatnonzero(code == 3)
    ref = dict(zip((pi[k] * len(s) + pj[k]).tolist(), ang[k].tolist()))
    assert [ref[a * len(s) + b] for a, b in g.tilted.tolist()] == g.tilted_angle.tolist()
