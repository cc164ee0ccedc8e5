"""Orientation order: Q tensor, local and wall order, equal-area histogram, pole figure.

Reference answers: the definitions of the nematic order tensor (de Gennes & Prost, The
Physics of Liquid Crystals, 1993) and a brute-force numpy path for the local order.
"""
import math

import numpy as np
import pytest

from sheetview import Box, OptionError, Sphere, Structure
from sheetview.measures.orientation import (local_order, orientation, pole_figure,
                                            q_summary, q_tensor)


def prisms_with_normals(normals, centers, size=0.5):
    """One small triangle per normal, centred at ``centers``."""
    n = np.asarray(normals, float)
    n = n / np.linalg.norm(n, axis=1, keepdims=True)
    e = np.where(np.abs(n[:, :1]) < 0.9, [[1.0, 0, 0]], [[0, 1.0, 0]])
    u = np.cross(n, e)
    u /= np.linalg.norm(u, axis=1, keepdims=True)
    v = np.cross(n, u)
    ang = 2 * np.pi * np.arange(3) / 3
    tri = size * (np.cos(ang)[None, :, None] * u[:, None] + np.sin(ang)[None, :, None] * v[:, None])
    return tri + np.asarray(centers, float)[:, None, :]


def random_unit(n, rng):
    x = rng.normal(size=(n, 3))
    return x / np.linalg.norm(x, axis=1, keepdims=True)


def test_single_and_aligned():
    """S of one prism is 1 (Q = (3 n n^T - I)/2 has eigenvalues 1, -1/2, -1/2)."""
    s = Structure(prisms_with_normals([[0, 0, 1]], [[0, 0, 0]]), 0.7, Sphere((0, 0, 0), 10))
    r = orientation(s)
    assert r.S == pytest.approx(1.0) and r.biaxiality == pytest.approx(0.0, abs=1e-12)
    np.testing.assert_allclose(r.director, [0, 0, 1], atol=1e-12)
    assert any("single prism" in n for n in r.notes)
    assert r.local_S.tolist() == pytest.approx([1.0])


def test_planar_normals_and_biaxiality():
    """Normals spread evenly in the xy plane: Q eigenvalues 1/4, 1/4, -1/2 (derived)."""
    t = np.linspace(0, np.pi, 12, endpoint=False)
    n = np.stack([np.cos(t), np.sin(t), 0 * t], 1)
    S, d, b, ev = q_summary(q_tensor(n))
    assert ev == pytest.approx([0.25, 0.25, -0.5])
    assert S == pytest.approx(0.25) and b == pytest.approx(0.75)  # not uniaxial about d
    # normals along x and y only, equal weight: eigenvalues 1/4, 1/4, -1/2 as well;
    # x with weight 3, y with weight 1: 5/8, -1/8, -1/2
    S, d, b, ev = q_summary(q_tensor([[1, 0, 0], [0, 1, 0]], [3, 1]))
    assert ev == pytest.approx([0.625, -0.125, -0.5]) and b == pytest.approx(0.375)


def test_empty_structure():
    r = orientation(Structure(np.zeros((0, 3, 3)), np.zeros(0), Sphere((0, 0, 0), 5)))
    assert math.isnan(r.S) and r.director is None and any("no prisms" in n for n in r.notes)
    r.to_dict()


@pytest.mark.parametrize("periodic,radius", [(False, 2.7), (True, 2.7), (True, 4.0)])
def test_local_order_matches_brute_force(periodic, radius):
    """Local order parameter of every prism (numba cell-list kernel) against a brute-force
    numpy evaluation of the definition over all pairs (minimum image when periodic)."""
    rng = np.random.default_rng(3)
    n = 400
    L = 10.0
    P = rng.uniform(0, L, (n, 3))
    nrm = random_unit(n, rng)
    w = rng.uniform(0.2, 1.0, n)
    dom = Box((0, 0, 0), (L, L, L), periodic=periodic)
    S = local_order(P, nrm, w, radius, dom)
    d = P[:, None] - P[None]
    if periodic:
        d -= L * np.round(d / L)
    nb = (d ** 2).sum(-1) <= radius ** 2
    # plain numpy, not the module's q_tensor: Q = sum w (3 n n^T - I)/2 / sum w, S = its
    # largest eigenvalue
    ref = np.empty(n)
    for i in range(n):
        u, wi = nrm[nb[i]], w[nb[i]]
        Q = (1.5 * np.einsum("k,ki,kj->ij", wi, u, u) / wi.sum()) - 0.5 * np.eye(3)
        ref[i] = np.linalg.eigvalsh(Q)[-1]
    np.testing.assert_allclose(S, ref, atol=1e-12)


def test_wall_order_sphere_and_periodic():
    """Sheets lying flat on a sphere wall (normals radial) give <P2> = 1; standing on edge
    (normals tangent) give -1/2 (P2(0) = -1/2)."""
    rng = np.random.default_rng(4)
    u = random_unit(50, rng)
    centers = 8.0 * u
    r = orientation(Structure(prisms_with_normals(u, centers), 0.5, Sphere((0, 0, 0), 10)))
    assert r.wall == pytest.approx(1.0)
    tang = np.cross(u, random_unit(50, rng))
    r = orientation(Structure(prisms_with_normals(tang, centers), 0.5, Sphere((0, 0, 0), 10)))
    assert r.wall == pytest.approx(-0.5)
    per = Box((-10, -10, -10), (10, 10, 10), periodic=True)
    r = orientation(Structure(prisms_with_normals(u, centers), 0.5, per))
    assert r.wall is None and any("periodic" in n for n in r.notes)
    assert r.to_dict()["wall"] is None


def test_pole_figure_normalised_and_aligned():
    """The density (multiples of uniform) integrates to 1 over the Lambert disc of area
    2 pi; normals along z fall in the centre cell."""
    rng = np.random.default_rng(5)
    n = random_unit(5000, rng)
    dens, e = pole_figure(n, np.ones(len(n)), bins=31)
    cell = (e[1] - e[0]) ** 2
    assert np.nansum(dens) * cell / (2 * np.pi) == pytest.approx(1.0, abs=0.02)
    dens, e = pole_figure(np.tile([0, 0, 1.0], (10, 1)), np.ones(10), bins=31)
    assert np.nanargmax(dens) == np.ravel_multi_index((15, 15), dens.shape)


def test_frame_director_and_bad_options():
    rng = np.random.default_rng(6)
    n = np.tile([1.0, 0, 0], (20, 1)) + 0.01 * rng.normal(size=(20, 3))
    s = Structure(prisms_with_normals(n, rng.uniform(-5, 5, (20, 3))), 0.5, Sphere((0, 0, 0), 20))
    r = orientation(s, frame="director")
    assert r.hist[-1].sum() == pytest.approx(1.0)  # all within the top cos(theta) bin
    r = orientation(s, frame="z")
    assert r.hist[0].sum() == pytest.approx(1.0)
    for kw in ({"local_radius": 0}, {"local_radius": -2}, {"frame": "y"}, {"n_cos": 0}):
        with pytest.raises(OptionError):
            orientation(s, **kw)
