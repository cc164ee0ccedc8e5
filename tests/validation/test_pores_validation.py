"""Pore sizes checked against closed forms of simple shapes (Hildebrand & Rüegsegger,
J. Microsc. 185 (1997) 67; Münch & Holzer, J. Am. Ceram. Soc. 91 (2008) 4059; both from
memory for the citation details)."""
from __future__ import annotations

import numpy as np
import pytest

from sheetview.grid import GEL, OUTSIDE, SOLID, PhaseGrid
from sheetview.measures.pores import (intrusion_diameter, local_thickness,
                                      pore_size_distribution)

H = 0.1  # nm per voxel


def test_ball_gives_2R():
    """Ball of radius R: local thickness 2R everywhere (Hildebrand & Rüegsegger 1997).
    Tolerance one voxel: a lattice ball's wall lies between voxel centres."""
    R = 1.2
    n = 31
    x = (np.indices((n, n, n)) - 15) * H
    m = (x ** 2).sum(0) <= R ** 2
    lt = local_thickness(m, H)
    assert np.nanmax(np.abs(lt[m] - 2 * R)) <= H + 1e-6
    # interior (the central ball) is exactly one value
    core = (x ** 2).sum(0) <= (0.5 * R) ** 2
    assert np.ptp(lt[core]) == 0


def test_cylinder_gives_2R():
    """Infinite cylinder of radius R (periodic along its axis): 2R within one voxel."""
    R = 0.8
    n = 25
    x, y = (np.indices((n, n)) - 12) * H
    disc = x ** 2 + y ** 2 <= R ** 2
    m = np.repeat(disc[:, :, None], 10, axis=2)
    lt = local_thickness(m, H, periodic=True)
    assert np.nanmax(np.abs(lt[m] - 2 * R)) <= H + 1e-6


@pytest.mark.parametrize("w", [5, 9, 12])
def test_slab_gives_width(w):
    """Slab of width w (periodic in-plane): local thickness w; exact for an odd number of
    voxels, one voxel less for an even number (ball centres on voxel centres)."""
    m = np.zeros((w + 6, 8, 8), bool)
    m[3:3 + w] = True
    lt = local_thickness(m, H, periodic=True)
    expect = w * H if w % 2 else (w - 1) * H
    np.testing.assert_allclose(lt[m], expect, atol=1e-6)


def test_slit_between_sheets_in_grid():
    """A slit pore between two parallel solid sheets in a PhaseGrid: the pore-size
    distribution is a single peak at the slit width (d10 = d50 = d90 = w)."""
    lab = np.full((8, 20, 20), SOLID, np.uint8)
    lab[:, :, 7:14] = GEL  # 7 voxels = 0.7 nm
    g = PhaseGrid(lab, spacing=H, periodic=True)
    r = pore_size_distribution(g)
    assert r.d10 == pytest.approx(0.7, abs=1e-6)
    assert r.d90 == pytest.approx(0.7, abs=1e-6)


def test_intrusion_equals_local_thickness_when_open():
    """Every pore open to the reservoir: intrusion = local thickness (Münch & Holzer 2008:
    the two distributions differ only by pore access)."""
    m = np.zeros((30, 16, 21), bool)
    m[:, 3:10, :] = True  # slab pore 7 voxels wide, open at x = 0 and x = end
    m[:, 10:13, 5:9] = True  # a side pocket, also reachable
    lt = local_thickness(m, H)
    it = intrusion_diameter(m, H)
    np.testing.assert_allclose(it[m], lt[m], atol=1e-6)


def test_ink_bottle():
    """Ink bottle: a spherical cavity (diameter 2.1 nm) reached only through a narrow throat
    (width 0.5 nm). Local thickness sees the cavity at its own size; intrusion fills it at
    the throat size (Münch & Holzer 2008)."""
    n = 40
    lab = np.full((n, n, n), SOLID, np.uint8)
    x = np.indices((n, n, n)) * H
    c = np.array([2.0, 2.0, 2.5])
    cav = ((x - c[:, None, None, None]) ** 2).sum(0) <= 1.05 ** 2
    lab[cav] = GEL
    lab[17:22, 17:22, 0:16] = GEL  # square throat 5 voxels wide from the z = 0 face
    lab[:, :, 0] = np.where(lab[:, :, 0] == GEL, GEL, OUTSIDE)
    g = PhaseGrid(lab, spacing=H)
    lt = pore_size_distribution(g, method="local_thickness").diameter
    it = pore_size_distribution(g, method="intrusion").diameter
    centre = tuple(np.round(c / H).astype(int))
    assert lt[centre] == pytest.approx(2.1, abs=H)
    assert it[centre] == pytest.approx(0.5, abs=1e-6)
    throat = (20, 20, 5)
    assert it[throat] == pytest.approx(0.5, abs=1e-6)


def test_periodic_slab_across_boundary():
    """A slab pore crossing the periodic boundary has the same local thickness as the
    same slab inside the cell (periodic translation invariance, common practice)."""
    m = np.zeros((20, 9, 9), bool)
    m[7:14] = True
    inside = local_thickness(m, H, periodic=True)
    shifted = local_thickness(np.roll(m, 10, axis=0), H, periodic=True)
    np.testing.assert_allclose(np.roll(inside, 10, axis=0), shifted)
    np.testing.assert_allclose(shifted[np.roll(m, 10, axis=0)], 0.7, atol=1e-6)
