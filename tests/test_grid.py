"""PhaseGrid helpers and rasterization: numba kernel vs a pure-numpy reference, options,
errors."""
from __future__ import annotations

import numpy as np
import pytest

from sheetview import Box, Sphere, Structure
from sheetview.errors import MemoryLimitError, OptionError
from sheetview.grid import (GEL, OUTSIDE, SOLID, PhaseGrid, default_voxel_size,
                            estimate_grid_bytes, rasterize, rasterize_fraction)


def reference_labels(structure, shape, spacing, origin, periodic=False):
    """Pure-numpy labels: centre inside a prism by |(p - a).n| <= t/2 and barycentric
    coordinates of the projection in [0, 1] (Ericson, Real-Time Collision Detection, 2005,
    3.4); box domains only."""
    axes = [origin[a] + (np.arange(shape[a]) + 0.5) * spacing[a] for a in range(3)]
    P = np.stack(np.meshgrid(*axes, indexing="ij"), axis=-1).reshape(-1, 3)
    solid = np.zeros(len(P), dtype=bool)
    L = np.asarray(shape) * np.asarray(spacing)
    shifts = [np.zeros(3)]
    if periodic:
        shifts = [np.array([a, b, c]) * L for a in (-1, 0, 1) for b in (-1, 0, 1)
                  for c in (-1, 0, 1)]
    for (a, b, c), t in zip(structure.vertices, structure.thickness):
        n = np.cross(b - a, c - a)
        n /= np.linalg.norm(n)
        for sh in shifts:
            q = P + sh - a
            d = q @ n
            q = q - d[:, None] * n
            v0, v1 = b - a, c - a
            d00, d01, d11 = v0 @ v0, v0 @ v1, v1 @ v1
            d20, d21 = q @ v0, q @ v1
            den = d00 * d11 - d01 * d01
            bv = (d11 * d20 - d01 * d21) / den
            bw = (d00 * d21 - d01 * d20) / den
            solid |= (np.abs(d) <= t / 2) & (bv >= 0) & (bw >= 0) & (bv + bw <= 1)
    lab = np.full(len(P), GEL, dtype=np.uint8)
    lab[solid] = SOLID
    return lab.reshape(shape)


def _random(n, seed, box=(5.0, 4.0, 4.5), periodic=False):
    rng = np.random.default_rng(seed)
    lo = np.zeros(3)
    hi = np.asarray(box)
    c = rng.uniform(lo + 0.5, hi - 0.5, (n, 1, 3))
    v = c + rng.normal(0, 0.9, (n, 3, 3))
    return Structure(v, rng.uniform(0.15, 0.6, n), Box(tuple(lo), tuple(hi), periodic), 1.4)


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_kernel_matches_numpy_reference(seed):
    """Identical labels to the numpy reference (exact centre test) on a small grid."""
    s = _random(15, seed)
    g = rasterize(s, 0.07)
    ref = reference_labels(s, g.shape, g.spacing, g.origin)
    assert (g.labels == SOLID).sum() > 100
    np.testing.assert_array_equal(g.labels, ref)


def test_kernel_matches_reference_periodic():
    """Periodic wrap agrees with the numpy reference over the 27 periodic images
    (a prism crossing a face lands on the other side; at most a few boundary ties differ)."""
    s = _random(12, 7, periodic=True)
    g = rasterize(s, 0.08)
    assert g.periodic
    ref = reference_labels(s, g.shape, g.spacing, g.origin, periodic=True)
    assert (g.labels != ref).sum() <= 2
    assert (g.labels == SOLID).sum() > 100


def test_axis_aligned_prism_exact_count():
    """A flat prism in a z-plane: the solid count is the number of centres in the triangle
    times the number of layers within t/2 (hand count)."""
    v = np.array([[[0.0, 0.0, 2.0], [4.0, 0.0, 2.0], [0.0, 4.0, 2.0]]])
    s = Structure(v, np.array([0.45]), Box((0, 0, 0), (4, 4, 4)), 1.4)
    g = rasterize(s, 0.1)
    # centres at (i+0.5)*0.1: in-triangle iff x + y <= 4 -> i + j <= 39 (820 columns);
    # layers with |z - 2| <= 0.225: z = 1.85..2.15 -> 4 layers
    assert (g.labels == SOLID).sum() == 820 * 4


def test_default_voxel_size():
    s = _random(5, 0)
    t = s.thickness
    assert default_voxel_size(s) == pytest.approx(max(min(t.min(), 1.4 - t.max()) / 6, 0.01))
    thick = Structure(s.vertices, np.full(5, 2.0), s.domain, 1.4)
    assert default_voxel_size(thick) == pytest.approx(2.0 / 6)


def test_errors():
    s = _random(5, 0)
    with pytest.raises(OptionError, match="below"):
        rasterize(s, 0.001)
    with pytest.raises(OptionError, match="larger than"):
        rasterize(s, 100.0)
    with pytest.raises(OptionError, match="no prisms"):
        rasterize(s.subset(np.zeros(5, bool)), 0.1)
    with pytest.raises(MemoryLimitError, match=r"voxel size of [0-9.]+ nm would fit") as e:
        rasterize(s, 0.02, max_memory=10_000_000)
    fit = float(str(e.value).split("voxel size of ")[1].split(" nm")[0])
    assert estimate_grid_bytes(rasterize(s, fit, max_memory=10_000_000).labels.size) <= 10_000_000
    with pytest.raises(OptionError, match="supersample"):
        rasterize(s, 0.1, supersample=0)
    with pytest.raises(OptionError, match="out must"):
        rasterize(s, 0.1, out=np.zeros((3, 3, 3), np.uint8))


def test_out_buffer_reused():
    s = _random(8, 3)
    g1 = rasterize(s, 0.1)
    buf = np.full(g1.shape, 7, dtype=np.uint8)
    g2 = rasterize(s, 0.1, out=buf)
    assert g2.labels is buf
    np.testing.assert_array_equal(g1.labels, g2.labels)


def test_supersample_fraction():
    """The solid fraction sums to the prism volume (sub-point estimate) and is 1 only where
    the voxel is deep inside; it agrees with a 4x finer centre rasterization block-summed."""
    v = np.array([[[0.3, 0.4, 1.1], [3.6, 0.8, 2.0], [1.0, 3.5, 2.6]]])
    s = Structure(v, np.array([0.5]), Box((0, 0, 0), (4, 4, 4)), 1.4)
    frac = rasterize_fraction(s, 0.2, supersample=4)
    fine = rasterize(s, 0.05).labels == SOLID
    blocks = fine.reshape(20, 4, 20, 4, 20, 4).mean(axis=(1, 3, 5))
    np.testing.assert_allclose(frac, blocks, atol=1e-6)
    assert frac.sum() * 0.2 ** 3 == pytest.approx(s.total_volume, rel=0.02)
    assert frac.max() <= 1.0 and frac.min() >= 0.0


def test_sphere_outside_and_clipping():
    s = _random(6, 4, box=(6, 6, 6))
    sph = Structure(s.vertices, s.thickness, Sphere((3, 3, 3), 2.0), 1.4)
    g = rasterize(sph, 0.1)
    c = g.voxel_centers()
    inside = np.linalg.norm(c - 3.0, axis=-1) <= 2.0
    np.testing.assert_array_equal(g.labels != OUTSIDE, inside)
    assert g.shape == (40, 40, 40)


def test_phasegrid_helpers():
    g = PhaseGrid(np.array([[[0, 1], [2, 3]]], dtype=np.uint8), spacing=(0.5, 1, 2),
                  origin=(1, 0, 0))
    np.testing.assert_allclose(g.voxel_centers()[0, 1, 1], [1.25, 1.5, 3.0])
    np.testing.assert_allclose(g.voxel_centers(np.array([[0, 1, 1]])), [[1.25, 1.5, 3.0]])
    assert g.mask(["gel", "interlayer"]).sum() == 2
    assert g.mask(SOLID).sum() == 1
    with pytest.raises(OptionError):
        g.mask("lava")


def test_default_voxel_of_a_closed_body_comes_from_its_own_scales():
    """A 30 x 30 x 1.4 nm slab body: the default voxel puts about 6 voxels across the
    thickness (mean chord of a slab = 2t, Cauchy/Santaló 1976; 12 voxels across it), not the
    domain's smallest extent / 128 (a 1000 x 1000 x 128 grid), and says how it was chosen."""
    import trimesh
    from sheetview.grid import rasterize_body
    from sheetview.structure import SurfaceBody
    from sheetview.domain import Box
    m = trimesh.creation.box(extents=(30, 30, 1.4))
    body = SurfaceBody(m.vertices, m.faces, Box((-16.4, -16.4, -2.1), (16.4, 16.4, 2.1)))
    g = rasterize_body(body)
    v = g.metadata["voxel_size_nm"]
    assert 1.4 / v == pytest.approx(6.6, abs=0.7)  # 4V/S = 2.56 nm (edges count) / 12
    assert np.prod(g.shape) < 1e6
    assert "mean chord" in g.metadata["voxel_default"]["rule"]
    assert g.metadata["voxel_default"]["note"] is None


def test_default_voxel_is_coarsened_to_fit_the_memory_limit_and_says_so():
    """The prism default (6 voxels across the thinner of sheet and gap) becomes the finest
    voxel that fits the memory limit, with a note; an explicit voxel still stops instead."""
    from sheetview.synth import perfect_stack
    s = perfect_stack(3, 6.0, repeat=1.4, thickness=0.7).structure
    g = rasterize(s)
    assert g.metadata["voxel_default"]["note"] is None
    small = estimate_grid_bytes(int(np.prod(g.shape) * 3 / 8))
    g2 = rasterize(s, max_memory=small)
    assert g2.metadata["voxel_size_nm"] > g.metadata["voxel_size_nm"]
    assert estimate_grid_bytes(int(np.prod(g2.shape))) <= small
    assert "memory limit" in g2.metadata["voxel_default"]["note"]
    with pytest.raises(MemoryLimitError):
        rasterize(s, g.metadata["voxel_size_nm"], max_memory=small)
    # a default that would need more than doubling the voxel stops instead, naming the fit
    with pytest.raises(MemoryLimitError, match="would fit"):
        rasterize(s, max_memory=int(np.prod(g.shape) * 6 / 20))
