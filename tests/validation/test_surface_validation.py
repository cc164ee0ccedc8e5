"""Validation of surface, mean curvature and Euler characteristic estimates against
closed forms and a reference library (scikit-image)."""
import numpy as np
import pytest
from skimage.measure import euler_number

from sheetview.measures.surface import direction_weights, euler_characteristic, minkowski_functionals


def _coords(n):
    x = np.arange(n) - n / 2 + 0.5
    return np.meshgrid(x, x, x, indexing="ij")


def _ball(n, r, c=(0, 0, 0)):
    X, Y, Z = _coords(n)
    return (X - c[0]) ** 2 + (Y - c[1]) ** 2 + (Z - c[2]) ** 2 <= r * r


def test_ball_surface_within_2_percent():
    """Sphere area 4 pi R^2 at R = 20 voxels, within 2 % (closed form; estimator of
    Ohser & Mücklich, Statistical Analysis of Microstructures in Materials Science, 2000)."""
    sp = 0.25
    r = minkowski_functionals(_ball(48, 20), spacing=sp)
    R = 20 * sp
    assert r.surface == pytest.approx(4 * np.pi * R ** 2, rel=0.02)
    assert r.volume == pytest.approx(4 / 3 * np.pi * R ** 3, rel=0.01)


def test_ball_mean_curvature():
    """Integral of mean curvature of a ball M = 4 pi R (Steiner formula; Santaló,
    Integral Geometry and Geometric Probability, 1976), within 2 % at R = 20 voxels."""
    r = minkowski_functionals(_ball(48, 20))
    assert r.mean_curvature == pytest.approx(4 * np.pi * 20, rel=0.02)


def test_torus_functionals():
    """Solid torus (major R, minor r): S = 4 pi^2 R r, M = 2 pi^2 R (derived from the
    torus curvatures), chi = 0 (Euler-Poincaré); tolerances 2 % and 5 %."""
    X, Y, Z = _coords(48)
    Rm, rm = 14.0, 6.0
    tor = (np.sqrt(X ** 2 + Y ** 2) - Rm) ** 2 + Z ** 2 <= rm ** 2
    r = minkowski_functionals(tor)
    assert r.surface == pytest.approx(4 * np.pi ** 2 * Rm * rm, rel=0.02)
    assert r.mean_curvature == pytest.approx(2 * np.pi ** 2 * Rm, rel=0.05)
    assert r.euler == 0 == euler_number(tor, connectivity=3)


@pytest.mark.parametrize("case,expected", [("ball", 1), ("torus", 0), ("two_balls", 2),
                                           ("hollow_ball", 2)])
def test_euler_characteristic_shapes(case, expected):
    """chi = components - tunnels + cavities: ball 1, solid torus 0, two balls 2, hollow
    ball 2 (Euler-Poincaré, published), and equal to skimage.measure.euler_number
    (scikit-image, van der Walt et al., PeerJ 2 (2014) e453) with 26/6 connectivity."""
    X, Y, Z = _coords(40)
    if case == "ball":
        m = _ball(40, 12)
    elif case == "torus":
        m = (np.sqrt(X ** 2 + Y ** 2) - 11) ** 2 + Z ** 2 <= 16
    elif case == "two_balls":
        m = _ball(40, 7, (-9, 0, 0)) | _ball(40, 7, (9, 0, 0))
    else:
        m = _ball(40, 15) & ~_ball(40, 8)
    assert euler_characteristic(m) == expected == euler_number(m, connectivity=3)


def test_euler_random_sets_match_skimage():
    """Random sets: chi (26 and 6 connectivity) equals scikit-image's euler_number
    (reference library) exactly."""
    rng = np.random.default_rng(5)
    for p in (0.2, 0.5, 0.8):
        m = rng.random((15, 16, 17)) < p
        r = minkowski_functionals(m)
        assert r.euler == euler_number(m, connectivity=3)
        assert r.euler_6 == euler_number(m, connectivity=1)


def test_weights_match_published_values():
    """Voronoi direction weights of the cubic lattice: 0.04577789, 0.03698063, 0.03519564
    per direction (x2 for +-), Ohser & Mücklich (2000), from memory."""
    _, w = direction_weights(1.0)
    assert w[0] / 2 == pytest.approx(0.04577789120476, abs=1e-8)
    assert w[3] / 2 == pytest.approx(0.03698062787608, abs=1e-8)
    assert w[9] / 2 == pytest.approx(0.03519563978232, abs=1e-8)


def test_anisotropic_spacing_ball():
    """An ellipsoid of voxels that is a ball in nm (spacing 1, 1, 2): area 4 pi R^2 within
    3 % (closed form)."""
    x = np.arange(48) - 23.5
    z = (np.arange(24) - 11.5) * 2
    X, Y, Z = np.meshgrid(x, x, z, indexing="ij")
    m = X ** 2 + Y ** 2 + Z ** 2 <= 20 ** 2
    r = minkowski_functionals(m, spacing=(1, 1, 2))
    assert r.surface == pytest.approx(4 * np.pi * 400, rel=0.03)
