"""Rasterization of prisms checked against exact volumes and a general mesh-boolean library."""
from __future__ import annotations

import numpy as np
import pytest

from sheetview import Box, Sphere, Structure
from sheetview.grid import GEL, OUTSIDE, SOLID, rasterize

#: Faces of a prism from its 6 corners (bottom a, b, c; top a', b', c'), outward for a
#: bottom face wound against the normal (b - a) x (c - a).
PRISM_FACES = np.array([[0, 2, 1], [3, 4, 5],
                        [0, 1, 4], [0, 4, 3], [1, 2, 5], [1, 5, 4], [2, 0, 3], [2, 3, 5]],
                       dtype=np.uint64)


def union_volume_manifold3d(structure) -> float:
    """Exact volume of the union of the prisms, by manifold3d's batch boolean union."""
    import manifold3d as m3d

    corners = structure.prism_corners()
    parts = []
    for c in corners:
        man = m3d.Manifold(m3d.Mesh64(np.ascontiguousarray(c, dtype=np.float64), PRISM_FACES))
        assert man.volume() > 0, "prism mesh must be an outward oriented manifold"
        parts.append(man)
    return float(m3d.Manifold.batch_boolean(parts, m3d.OpType.Add).volume())


def random_prisms(n, seed, box=10.0, size=1.5, tmin=0.2, tmax=0.6, separated=False):
    """Random prisms (invented test data); ``separated`` puts each in its own cell so
    none overlap."""
    rng = np.random.default_rng(seed)
    if separated:
        k = int(np.ceil(n ** (1 / 3)))
        cell = box / k
        idx = np.stack(np.unravel_index(rng.permutation(k ** 3)[:n], (k, k, k)), axis=1)
        c = (idx + 0.5) * cell
        # corners on a sphere of radius < cell/2 - t/2 about the cell centre
        r = 0.5 * cell - tmax
        d = rng.normal(size=(n, 3, 3))
        d /= np.linalg.norm(d, axis=2, keepdims=True)
        v = c[:, None, :] + r * d
    else:
        c = rng.uniform(size, box - size, (n, 1, 3))
        v = c + rng.normal(0, size / 2, (n, 3, 3))
    t = rng.uniform(tmin, tmax, n)
    return Structure(v, t, Box((0, 0, 0), (box, box, box)), 1.4)


def test_single_prism_volume_converges():
    """Solid volume of one tilted prism tends to area x thickness (exact prism volume,
    elementary geometry) as the voxel shrinks; error within a few voxel-surface layers."""
    v = np.array([[[1.1, 1.3, 2.0], [4.2, 1.9, 2.8], [2.0, 4.6, 3.3]]])
    s = Structure(v, np.array([0.5]), Box((0, 0, 0), (6, 6, 6)), 1.4)
    exact = s.total_volume
    errs = []
    for h in (0.1, 0.05, 0.025):
        g = rasterize(s, h)
        vol = (g.labels == SOLID).sum() * g.voxel_volume
        errs.append(abs(vol - exact) / exact)
    assert errs[-1] < 0.01
    assert errs[-1] < errs[0]


def test_separated_prisms_volume():
    """Random non-overlapping prisms: solid volume = sum of area x thickness within 1 %
    at 0.03 nm (exact volume: elementary geometry)."""
    s = random_prisms(40, seed=3, box=12.0, separated=True)
    g = rasterize(s, 0.03)
    vol = (g.labels == SOLID).sum() * g.voxel_volume
    assert vol == pytest.approx(s.total_volume, rel=0.01)


def test_overlapping_union_vs_manifold3d():
    """Overlapping prisms: solid volume vs the exact union volume computed by manifold3d
    (Manifold library, a general-purpose mesh-boolean library) within 1 % at 0.025 nm."""
    s = random_prisms(12, seed=5, box=6.0, size=1.2)
    exact = union_volume_manifold3d(s)
    assert exact < s.total_volume  # they do overlap
    g = rasterize(s, 0.025)
    vol = (g.labels == SOLID).sum() * g.voxel_volume
    assert vol == pytest.approx(exact, rel=0.01)


def test_periodic_wrap_volume():
    """A prism crossing a periodic box face: the wrapped solid volume equals that of the
    same prism moved inside (translation invariance of the periodic cell, common practice)."""
    v = np.array([[[-0.8, 1.0, 1.0], [1.5, 1.4, 1.2], [0.2, 3.0, 1.6]]])
    per = Structure(v, np.array([0.4]), Box((0, 0, 0), (4, 4, 4), periodic=True), 1.4)
    inside = Structure(v + [1.0, 0, 0], np.array([0.4]), Box((0, 0, 0), (4, 4, 4)), 1.4)
    gp = rasterize(per, 0.05)
    gi = rasterize(inside, 0.05)
    assert gp.periodic
    n_p = (gp.labels == SOLID).sum()
    n_i = (gi.labels == SOLID).sum()
    # a shift by exactly 20 voxels maps centres onto centres: identical counts
    assert n_p == n_i
    np.testing.assert_array_equal(np.roll(gp.labels, 20, axis=0), gi.labels)
    assert n_p * gp.voxel_volume == pytest.approx(per.total_volume, rel=0.03)


def test_sphere_domain_volume():
    """Sphere domain: inside-voxel volume tends to 4 pi R^3 / 3 (Archimedes)."""
    s = random_prisms(3, seed=1, box=6.0)
    s = Structure(s.vertices, s.thickness, Sphere((3.0, 3.0, 3.0), 2.5), 1.4)
    g = rasterize(s, 0.05)
    vol = (g.labels != OUTSIDE).sum() * g.voxel_volume
    assert vol == pytest.approx(4 / 3 * np.pi * 2.5 ** 3, rel=0.005)
    assert (g.labels == GEL).any() and (g.labels == SOLID).any()
