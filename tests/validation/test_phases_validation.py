"""Phase classes: interlayer volume of perfect stacks, tilted layers, periodic wrap."""
import dataclasses

import numpy as np
import pytest

import sheetview as sv
from sheetview.grid import GEL, INTERLAYER, SOLID
from sheetview.measures.phases import classify, volume_fractions
from sheetview.synth import perfect_stack


def _stack(n, box, shift=(0.0, 0.0, 0.0), normal=(0, 0, 1)):
    r = perfect_stack(n, 6.0, repeat=1.4, thickness=0.7, normal=normal, center=shift)
    return dataclasses.replace(r.structure, domain=box)


@pytest.mark.parametrize("n", [2, 3, 5])
def test_perfect_stack_interlayer_volume(n):
    """Perfect stack of n layers: interlayer volume = (n - 1) x layer area x (repeat - thickness).

    Closed form from the geometry of parallel slabs (common practice); tolerance 2% at a
    0.05 nm voxel (about one voxel layer on a 0.7 nm gap spread over the footprint edge).
    """
    half = 0.7 * (n - 1)  # perfect_stack centres the stack on the origin
    s = _stack(n, sv.Box((-5, -5, -half - 1.513), (5, 5, half + 1.487)))
    f = volume_fractions(classify(s, 0.05))
    layer_area = s.areas.sum() / n
    expected = (n - 1) * layer_area * (1.4 - 0.7)
    assert f.volumes_nm3["interlayer"] == pytest.approx(expected, rel=0.02)
    assert f.volumes_nm3["solid"] == pytest.approx(n * layer_area * 0.7, rel=0.02)
    total = sum(f.fractions.values())
    assert total == pytest.approx(1.0, abs=1e-12)


def test_interlayer_converges_with_voxel_size():
    """The rasterized gap volume converges to the exact slab volume as the voxel shrinks."""
    s = _stack(3, sv.Box((-5, -5, -2.013), (5, 5, 5.987)))
    exact = 2 * s.areas.sum() / 3 * 0.7
    errs = [abs(volume_fractions(classify(s, v)).volumes_nm3["interlayer"] - exact) / exact
            for v in (0.1, 0.05, 0.025)]
    assert errs[2] < errs[0] and errs[2] < 0.01


def test_tilted_layer_gap_is_gel_not_interlayer():
    """A layer tilted by 15 degrees is not stacked (defect), so its gap stays gel pore."""
    from scipy.spatial.transform import Rotation
    base = perfect_stack(2, 6.0, repeat=1.4, thickness=0.7).structure
    top = perfect_stack(1, 3.0, thickness=0.7).structure
    rot = Rotation.from_euler("x", 15, degrees=True)
    # one repeat (+0.1 nm) above the upper base layer at z = 0.7, so it would be stacked
    # but for its tilt; its lowest edge stays clear of the base layer
    vt = rot.apply(np.array(top.vertices).reshape(-1, 3)).reshape(-1, 3, 3) + [0, 0, 2.2]
    v = np.concatenate([base.vertices, vt])
    s = sv.Structure(v, 0.7, sv.Box((-5, -5, -2.013), (5, 5, 6.987)), 1.4)
    from sheetview.measures.stacking import stacking_graph
    assert len(stacking_graph(s).tilted) > 0  # it is a tilted contact, not a stacked one
    f = volume_fractions(classify(s, 0.05))
    layer_area = base.areas.sum() / 2
    assert f.volumes_nm3["interlayer"] == pytest.approx(layer_area * 0.7, rel=0.03)


def test_periodic_stack_crossing_the_boundary():
    """A stack cut by a periodic boundary gets the same interlayer volume as an unwrapped one
    (minimum image; common practice for periodic cells)."""
    box = sv.Box((-5, -5, -2.013), (5, 5, 5.987), periodic=True)
    s = _stack(3, box)
    shifted = dataclasses.replace(s, vertices=s.vertices + [4.0, 0.0, 3.0])
    v0 = volume_fractions(classify(s, 0.05)).volumes_nm3
    v1 = volume_fractions(classify(shifted, 0.05)).volumes_nm3
    assert v1["interlayer"] == pytest.approx(v0["interlayer"], rel=0.02)
    assert v1["solid"] == pytest.approx(v0["solid"], rel=0.02)


def test_codes_and_pure_numpy_reference():
    """The numba gap kernel agrees voxel for voxel with a plain numpy half-space test for a
    stack whose layers are exact copies (footprint = the triangle itself)."""
    s = _stack(2, sv.Box((-4, -4, -1.013), (4, 4, 2.487)))
    g = classify(s, 0.1)
    lab = g.labels
    idx = np.indices(lab.shape).reshape(3, -1).T
    p = np.asarray(g.origin) + (idx + 0.5) * np.asarray(g.spacing)
    inter = np.zeros(len(p), bool)
    n_per_layer = len(s) // 2
    for t in range(n_per_layer):
        a, b, c = s.vertices[t]
        n = s.normals[t]
        z = (p - a) @ n
        inz = (z > 0.35) & (z < 1.4 - 0.35)
        ins = np.ones(len(p), bool)
        for e0, e1 in ((a, b), (b, c), (c, a)):
            ins &= (p - e0) @ np.cross(n, e1 - e0) >= 0
        inter |= inz & ins
    got = (lab.reshape(-1) == INTERLAYER)
    solid = lab.reshape(-1) == SOLID
    assert not (got & solid).any()
    mismatch = np.count_nonzero(got != (inter & ~solid))
    assert mismatch <= 0.001 * got.sum()
    assert (lab.reshape(-1)[~got & ~solid] != INTERLAYER).all()
    assert (lab == GEL).any()
