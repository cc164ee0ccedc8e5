"""Prism geometry against a reference library and a closed form.

* Prism volume = mid-plane triangle area x thickness (a right prism; common geometry),
  checked against trimesh's volume of the closed prism mesh built from
  ``Structure.prism_corners()`` (trimesh, M. Dawson-Haggerty et al., https://trimesh.org;
  ``Trimesh.volume`` integrates over the closed surface by the divergence theorem).
* Area of an equilateral triangle of side L = sqrt(3)/4 L^2 (elementary closed form;
  common geometry: half base L times height sqrt(3)/2 L).
"""
import numpy as np
import pytest
import trimesh

from sheetview.domain import Box
from sheetview.io.meshes import prism_polydata, prism_surface_triangles
from sheetview.structure import Structure


def _random_structure(n, seed):
    rng = np.random.default_rng(seed)
    v = rng.normal(0.0, 2.0, (n, 3, 3)) + rng.uniform(-20, 20, (n, 1, 3))
    t = rng.uniform(0.05, 1.5, n)
    s = Structure(v, t, Box((-40, -40, -40), (40, 40, 40)))
    # keep clearly non-degenerate triangles (area not tiny against the longest edge squared)
    keep = s.areas > 1e-3 * s.edge_lengths.max(axis=1) ** 2
    return s.subset(keep)


def test_prism_volume_equals_trimesh_closed_mesh_volume():
    """Structure.volumes (area x thickness) vs trimesh volume of each closed 6-corner
    prism (8 outward triangles); reference library trimesh; rel. tolerance 1e-10."""
    s = _random_structure(200, seed=11)
    assert len(s) > 150
    corners = s.prism_corners()
    tri = prism_surface_triangles()
    ref = np.empty(len(s))
    for i in range(len(s)):
        m = trimesh.Trimesh(corners[i], tri, process=False)
        assert m.is_watertight
        ref[i] = m.volume
    assert np.all(ref > 0)  # outward winding
    np.testing.assert_allclose(s.volumes, ref, rtol=1e-10)


def test_exported_prism_mesh_volume_sums_to_total_volume():
    """The exported VTK prism solids (prism_polydata), triangulated and read by trimesh,
    enclose the sum of area x thickness; reference library trimesh; rel. tol. 1e-10."""
    s = _random_structure(50, seed=5)
    v = s.vertices + (np.arange(len(s)) * 100.0)[:, None, None]  # disjoint prisms
    s = Structure(v, s.thickness, Box((-1e4, -1e4, -1e4), (1e4, 1e4, 1e4)))
    poly = prism_polydata(s).triangulate()
    m = trimesh.Trimesh(np.asarray(poly.points), np.asarray(poly.regular_faces), process=False)
    assert m.volume == pytest.approx(s.total_volume, rel=1e-10)


@pytest.mark.parametrize("L", [0.3, 1.0, 7.25])
def test_equilateral_triangle_area(L):
    """Area of an equilateral triangle of side L is sqrt(3)/4 L^2 (closed form, common
    geometry); placed in a random orientation; rel. tolerance 1e-12."""
    rng = np.random.default_rng(int(L * 100))
    q, _ = np.linalg.qr(rng.normal(size=(3, 3)))
    tri = np.array([[0, 0, 0], [L, 0, 0], [L / 2, L * np.sqrt(3) / 2, 0]]) @ q.T
    s = Structure(tri[None] + 1.0, [0.5], Box((-20, -20, -20), (20, 20, 20)))
    assert s.areas[0] == pytest.approx(np.sqrt(3) / 4 * L ** 2, rel=1e-12)
    assert s.volumes[0] == pytest.approx(np.sqrt(3) / 4 * L ** 2 * 0.5, rel=1e-12)
