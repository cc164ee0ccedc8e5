"""Phase classes (sheetview.measures.phases) against the closed form of parallel slabs.

A perfect stack of n layers that are exact copies of one triangulated patch (area A per
layer), repeat d and sheet thickness t has solid volume n A t and interlayer volume
(n - 1) A (d - t) (elementary geometry of parallel slabs; common practice). The phase map
labels a voxel by where its centre lies, so over uniformly random placements of the
structure relative to the lattice the expected voxel count times the voxel volume is the
exact volume (the expected number of lattice points in a body moved by a uniform random
offset is its volume over the cell volume): each test places the stack in a random
orientation (scipy Rotation.random) at a random sub-voxel offset, at the default voxel
(min(t, d - t) / 6), and checks the mean over placements within 4 standard errors (plus
0.1 % for ties on faces) and every placement within a few per cent.
"""
import numpy as np
import pytest
from scipy.spatial.transform import Rotation

import sheetview as sv
from sheetview.grid import GEL, INTERLAYER, SOLID
from sheetview.measures.phases import classify, volume_fractions
from sheetview.measures.stacking import stacking_graph

REPEAT, THICK = 1.4, 0.7
DEFAULT_VOXEL = min(THICK, REPEAT - THICK) / 6


def patch(m, edge=1.0):
    """m x m rhombus of 2 m^2 equilateral triangles (edge ``edge``) in the z = 0 plane,
    centred on the origin (plain numpy)."""
    a1, a2 = np.array([edge, 0.0, 0.0]), np.array([edge / 2, edge * np.sqrt(3) / 2, 0.0])
    tri = []
    for i in range(m):
        for j in range(m):
            o = i * a1 + j * a2
            tri += [[o, o + a1, o + a2], [o + a1, o + a1 + a2, o + a2]]
    tri = np.array(tri)
    return tri - tri.reshape(-1, 3).mean(axis=0)


def perfect_stack(n, rotation, centre, m=4):
    """Vertices of n exact copies of the patch at j * REPEAT along the normal, rotated and
    centred; and the area of one layer."""
    p = patch(m)
    v = np.concatenate([p + [0, 0, REPEAT * k] for k in range(n)]) - [0, 0, REPEAT * (n - 1) / 2]
    v = rotation.apply(v.reshape(-1, 3)).reshape(-1, 3, 3) + np.asarray(centre, float)
    area = 0.5 * np.linalg.norm(np.cross(p[:, 1] - p[:, 0], p[:, 2] - p[:, 0]), axis=1).sum()
    return v, area


def _placements(k, seed, box=12.0):
    """k random rotations and centres near the box centre (random sub-voxel offsets)."""
    rng = np.random.default_rng(seed)
    return [(Rotation.random(random_state=rng), box / 2 + rng.uniform(-0.5, 0.5, 3))
            for _ in range(k)]


def _within(errors, each):
    e = np.asarray(errors)
    se = e.std(ddof=1) / np.sqrt(e.size)
    assert abs(e.mean()) < 4 * se + 1e-3, (e.mean(), se)
    assert np.max(np.abs(e)) < each, e


@pytest.mark.parametrize("n", [2, 3, 5])
def test_perfect_stack_interlayer_and_solid_volume(n):
    """Perfect stack of n layers in 10 random orientations and offsets at the default voxel:
    interlayer volume (n - 1) A (d - t) and solid n A t (closed form for parallel slabs);
    mean within 4 SE (+0.1 %), every placement within 2 % (measured at most 0.6 %)."""
    e_int, e_sol = [], []
    for rot, c in _placements(10, seed=n):
        v, area = perfect_stack(n, rot, c)
        s = sv.Structure(v, THICK, sv.Box((0, 0, 0), (12, 12, 12)), REPEAT)
        g = classify(s)
        assert g.metadata["voxel_size_nm"] == pytest.approx(DEFAULT_VOXEL)
        f = volume_fractions(g)
        e_int.append(f.volumes_nm3["interlayer"] / ((n - 1) * area * (REPEAT - THICK)) - 1)
        e_sol.append(f.volumes_nm3["solid"] / (n * area * THICK) - 1)
        assert sum(f.fractions.values()) == pytest.approx(1.0, abs=1e-12)
    _within(e_int, 0.02)
    _within(e_sol, 0.02)


def test_tilted_layer_gap_is_gel_not_interlayer():
    """A layer tilted by 15 degrees on a 2-layer stack is not stacked (a defect), so its gap
    stays gel pore: the interlayer volume is that of the one stacked gap, A (d - t), over 6
    random orientations and offsets at the default voxel (mean within 4 SE + 0.1 %, each
    within 3 %)."""
    errs = []
    for rot, c in _placements(6, seed=15):
        base, area = perfect_stack(2, Rotation.identity(), (0, 0, 0))
        top = patch(2)
        top = Rotation.from_euler("x", 15, degrees=True).apply(top.reshape(-1, 3)).reshape(-1, 3, 3)
        # one repeat (+0.1 nm) above the upper base layer, so it would be stacked but for
        # its tilt; its lowest edge stays clear of the base layer
        top = top + [0, 0, 0.7 + 1.5]
        v = np.concatenate([base, top])
        v = rot.apply(v.reshape(-1, 3)).reshape(-1, 3, 3) + c
        s = sv.Structure(v, THICK, sv.Box((0, 0, 0), (12, 12, 12)), REPEAT)
        graph = stacking_graph(s)
        assert len(graph.tilted) > 0  # a tilted contact, not a stacked one
        f = volume_fractions(classify(s, graph=graph))
        errs.append(f.volumes_nm3["interlayer"] / (area * (REPEAT - THICK)) - 1)
    _within(errs, 0.03)


def test_periodic_stack_crossing_the_boundary():
    """A 3-layer stack cut by the faces of a periodic box (random orientation, centre at a
    random point of the box): the same interlayer and solid volume as the closed form
    (minimum image; common practice for periodic cells), mean within 4 SE + 0.1 %, each
    placement within 2 %."""
    rng = np.random.default_rng(8)
    e_int, e_sol = [], []
    for _ in range(6):
        v, area = perfect_stack(3, Rotation.random(random_state=rng), rng.uniform(-2, 2, 3))
        s = sv.Structure(v, THICK, sv.Box((0, 0, 0), (12, 12, 12), periodic=True), REPEAT)
        assert (v.min() < 0) and (v.max() > 0)  # it crosses the faces at the origin corner
        f = volume_fractions(classify(s))
        e_int.append(f.volumes_nm3["interlayer"] / (2 * area * (REPEAT - THICK)) - 1)
        e_sol.append(f.volumes_nm3["solid"] / (3 * area * THICK) - 1)
    _within(e_int, 0.02)
    _within(e_sol, 0.02)


def test_gap_kernel_equals_numpy_half_space_reference():
    """The numba gap kernel labels, voxel for voxel, the voxels a plain numpy test puts in
    the gaps: in the frame of the stack (voxel centres rotated back), between the top face
    of one layer and the bottom face of the next and inside the patch, whose 2 m^2
    triangles tile the rhombus spanned by m a1 and m a2 (a1, a2 the lattice vectors).
    3-layer stacks in 4 random orientations and offsets at the default voxel; at most
    0.1 % of the gap voxels differ (ties on faces)."""
    m = 4
    a1, a2 = np.array([1.0, 0.0]), np.array([0.5, np.sqrt(3) / 2])
    for rot, c in _placements(4, seed=33):
        v, _ = perfect_stack(3, rot, c, m=m)
        s = sv.Structure(v, THICK, sv.Box((0, 0, 0), (12, 12, 12)), REPEAT)
        g = classify(s)
        lab = g.labels.reshape(-1)
        idx = np.indices(g.labels.shape).reshape(3, -1).T
        p = np.asarray(g.origin) + (idx + 0.5) * np.asarray(g.spacing)
        q = rot.inv().apply(p - c) + [0, 0, REPEAT]  # stack frame, layer 0 at z = 0
        lo = patch(m).reshape(-1, 3)
        origin2 = lo[np.argmin(lo[:, 0] + 10 * lo[:, 1])][:2]  # the rhombus corner o = 0
        st = np.linalg.solve(np.array([a1, a2]).T, (q[:, :2] - origin2).T).T
        foot = (st >= 0).all(axis=1) & (st <= m).all(axis=1)
        z, h = q[:, 2], THICK / 2
        gap = foot & (((z > h) & (z < REPEAT - h)) | ((z > REPEAT + h) & (z < 2 * REPEAT - h)))
        got = lab == INTERLAYER
        assert not (got & (lab == SOLID)).any()
        assert gap.sum() > 10000
        assert np.count_nonzero(got != gap) <= 0.001 * gap.sum()
    assert (g.labels == GEL).any()
