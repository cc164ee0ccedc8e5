"""Rasterization of prisms (sheetview.grid.rasterize) checked against exact volumes and a
general mesh-boolean library.

A voxel is solid when its centre lies inside a prism, so the voxel count times the voxel
volume is an unbiased estimate of the solid volume over uniformly random placements of
the structure relative to the lattice (the expected number of lattice points in a body
moved by a uniform random offset is its volume over the cell volume). The tests at the
default voxel therefore place the prisms in random orientations (scipy Rotation.random)
at random sub-voxel offsets and check the mean over placements within 4 standard errors
(plus 0.1 % for ties on faces) and every placement within a few per cent.
"""
from __future__ import annotations

import numpy as np
import pytest

from scipy.spatial.transform import Rotation

from sheetview import Box, Sphere, Structure
from sheetview.grid import GEL, OUTSIDE, SOLID, default_voxel_size, rasterize

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


def ball_of_prisms(seed, n_side=5, cell=2.4, tmin=0.45, tmax=0.6):
    """Non-overlapping random prisms (invented test data), one per lattice cell whose
    centre lies within 1.5 cells of the middle cell; corners on a sphere of radius
    cell/2 - tmax about the cell centre. Returns vertices centred on the origin and
    thicknesses."""
    rng = np.random.default_rng(seed)
    g = (np.arange(n_side) - (n_side - 1) / 2) * cell
    c = np.stack(np.meshgrid(g, g, g, indexing="ij"), -1).reshape(-1, 3)
    c = c[np.linalg.norm(c, axis=1) <= 2.01 * cell]
    d = rng.normal(size=(len(c), 3, 3))
    d /= np.linalg.norm(d, axis=2, keepdims=True)
    return c[:, None, :] + (0.5 * cell - tmax) * d, rng.uniform(tmin, tmax, len(c))


def placements(v, t, k, seed, box, shift=0.1):
    """k copies of the prisms (vertices centred on the origin) rotated at random about the
    box centre and moved by a random offset of up to ``shift`` nm on each axis."""
    rng = np.random.default_rng(seed)
    out = []
    for _ in range(k):
        w = Rotation.random(random_state=rng).apply(v.reshape(-1, 3)).reshape(-1, 3, 3)
        w = w + box / 2 + rng.uniform(-shift, shift, 3)
        assert w.min() > 0.3 and w.max() < box - 0.3  # nothing clipped by the box
        out.append(Structure(w, t, Box((0, 0, 0), (box, box, box)), 1.4))
    return out


def _unbiased(errors, each):
    e = np.asarray(errors)
    se = e.std(ddof=1) / np.sqrt(e.size)
    assert abs(e.mean()) < 4 * se + 1e-3, (e.mean(), se)
    assert np.max(np.abs(e)) < each, e


def test_separated_prisms_volume_at_the_default_voxel():
    """33 non-overlapping random prisms (thickness 0.45-0.6 nm) in 8 random orientations and
    offsets at the default voxel (min(t, d - t)/6 = 0.076 nm): solid volume = sum of area x
    thickness (elementary geometry), mean within 4 SE + 0.1 %, each placement within 1 %."""
    v, t = ball_of_prisms(seed=3)
    errs = []
    for s in placements(v, t, 8, seed=4, box=12.0):
        g = rasterize(s)
        assert g.metadata["voxel_size_nm"] == pytest.approx(default_voxel_size(s))
        errs.append((g.labels == SOLID).sum() * g.voxel_volume / s.total_volume - 1)
    _unbiased(errs, 0.01)


def test_overlapping_union_vs_manifold3d():
    """16 overlapping random prisms (thickness 0.2-0.6 nm) in 8 random orientations and
    offsets at the default voxel (0.033 nm): solid volume vs the exact union volume computed
    by manifold3d (Manifold library, a general-purpose mesh-boolean library; the union
    volume is invariant under the rigid motions; 7 % below the sum of the prism volumes),
    mean within 4 SE + 0.1 %, each within 2 %."""
    s0 = random_prisms(16, seed=5, box=4.0, size=1.0)
    exact = union_volume_manifold3d(s0)
    assert exact < 0.95 * s0.total_volume  # they do overlap
    v = s0.vertices - 2.0
    errs = []
    for s in placements(v, s0.thickness, 8, seed=6, box=7.5):
        g = rasterize(s)
        errs.append((g.labels == SOLID).sum() * g.voxel_volume / exact - 1)
    _unbiased(errs, 0.02)


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


@pytest.mark.parametrize("radius", [2.13, 2.5, 2.87])
def test_sphere_domain_volume(radius):
    """Sphere domain at the default voxel (0.05 nm for these prisms): inside-voxel volume
    = 4 pi R^3 / 3 (Archimedes) within 0.3 % (the grid is centred on the sphere, so the
    radius, not the offset, varies the digitisation)."""
    s = random_prisms(3, seed=1, box=6.0, tmin=0.3, tmax=0.35)
    s = Structure(s.vertices, s.thickness, Sphere((3.0, 3.0, 3.0), radius), 1.4)
    g = rasterize(s)
    assert g.metadata["voxel_size_nm"] == pytest.approx(0.05, rel=0.2)
    vol = (g.labels != OUTSIDE).sum() * g.voxel_volume
    assert vol == pytest.approx(4 / 3 * np.pi * radius ** 3, rel=0.003)
    assert (g.labels == GEL).any() and (g.labels == SOLID).any()
