"""Unit tests of sheetview.measures.surface (configuration counts, interfaces, errors)."""
import numpy as np
import pytest

from sheetview.errors import OptionError
from sheetview.material import Hydrate
from sheetview.grid import GEL, INTERLAYER, OUTSIDE, SOLID, PhaseGrid
from sheetview.measures.surface import (configuration_histogram, direction_weights,
                                        euler_characteristic, interface_area,
                                        minkowski_functionals, surfaces)


def _pair_count_numpy(m, d):
    """Independent count of x in phase, x+d not in phase, on a background-padded grid."""
    p = np.pad(m, 1)
    q = np.roll(p, tuple(-c for c in d), axis=(0, 1, 2))
    return int(np.count_nonzero(p & ~q))


def test_histogram_totals_and_volume():
    rng = np.random.default_rng(1)
    m = rng.random((9, 10, 11)) < 0.4
    h = configuration_histogram(m)
    assert h.sum() == 10 * 11 * 12
    hp = configuration_histogram(m, periodic=True)
    assert hp.sum() == m.size
    # each voxel appears at every one of the 8 cell vertices once
    bits = (np.arange(256)[:, None] >> np.arange(8)) & 1
    assert np.all(bits.T @ h == m.sum())
    assert np.all(bits.T @ hp == m.sum())


def test_crofton_surface_matches_direct_pair_counts():
    """Surface from configuration counts equals the same Crofton sum from direct
    neighbour-pair counting (independent numpy path)."""
    rng = np.random.default_rng(2)
    m = rng.random((12, 13, 14)) < 0.5
    sp = (0.5, 0.7, 0.9)
    vec, w = direction_weights(sp)
    from sheetview.measures.surface import DIRECTIONS_13
    v = np.prod(sp)
    direct = 2 * sum(wv * 2 * _pair_count_numpy(m, d) * v / np.linalg.norm(dv)
                     for d, dv, wv in zip(DIRECTIONS_13, vec, w))
    assert minkowski_functionals(m, sp).surface == pytest.approx(direct, rel=1e-12)


def test_weights_sum_to_one_and_are_symmetric():
    vec, w = direction_weights((1, 1, 1))
    assert w.sum() == pytest.approx(1.0, abs=1e-12)
    assert np.allclose(w[:3], w[0]) and np.allclose(w[3:9], w[3]) and np.allclose(w[9:], w[9])
    _, w2 = direction_weights((1.0, 1.0, 3.0))
    assert w2.sum() == pytest.approx(1.0, abs=1e-12)


def test_interface_area_two_phase_equals_phase_surface_periodic():
    rng = np.random.default_rng(3)
    m = rng.random((10, 10, 10)) < 0.5
    lab = np.where(m, SOLID, GEL).astype(np.uint8)
    g = PhaseGrid(lab, spacing=0.5, periodic=True)
    a = interface_area(g, SOLID, GEL)
    assert a == pytest.approx(minkowski_functionals(m, 0.5, periodic=True).surface, rel=1e-12)


def test_surfaces_units_and_slit():
    """A periodic slit of width d between solid plates: S/V = 2/d (Brownstein & Tarr,
    Phys. Rev. A 19 (1979) 2446: slit S/V = 2/d); the Crofton estimator is exact in the
    isotropic mean but for an axis-aligned plane gives 2 sum w |u.n| = 0.9266 (derived
    from the Voronoi weights), so compare with that factor."""
    lab = np.full((8, 8, 20), SOLID, np.uint8)
    lab[:, :, 5:15] = GEL  # 10 voxels of 0.2 nm = 2 nm slit
    lab[:, :, 0:2] = INTERLAYER
    g = PhaseGrid(lab, spacing=0.2, periodic=True)
    vec, w = direction_weights(0.2)
    u = vec / np.linalg.norm(vec, axis=1, keepdims=True)
    factor = 2 * np.sum(w * np.abs(u[:, 2]))
    r = surfaces(g)
    assert r.s_over_v["gel"] == pytest.approx(factor * 2 / 2.0, rel=1e-9)
    assert r.s_over_v["interlayer"] == pytest.approx(factor * 2 / 0.4, rel=1e-9)
    area = r.areas["solid-gel"] + r.areas["solid-interlayer"]
    assert r.pore_area == pytest.approx(area, rel=1e-12)
    vs, vi = r.volumes["solid"], r.volumes["interlayer"]
    # mass of sheets + interlayer water at the hydrate density (Allen et al. 2007: 2.604)
    assert r.specific_surface_m2_per_g == pytest.approx(1e3 * area / (2.604 * (vs + vi)),
                                                        rel=1e-12)
    d = r.to_dict()
    assert d["areas_nm2"]["solid-outside"] == 0.0
    assert set(r.table()) == {"interface", "area_nm2"}


def test_solid_wall_interface():
    lab = np.full((6, 6, 6), OUTSIDE, np.uint8)
    lab[1:5, 1:5, 1:5] = SOLID
    g = PhaseGrid(lab)
    assert interface_area(g, SOLID, OUTSIDE) > 0
    assert interface_area(g, SOLID, GEL) == 0


def test_bad_inputs():
    with pytest.raises(OptionError, match="3D"):
        minkowski_functionals(np.zeros((3, 3)))
    with pytest.raises(OptionError, match="spacing"):
        minkowski_functionals(np.zeros((3, 3, 3)), spacing=-1)
    g = PhaseGrid(np.zeros((3, 3, 3), np.uint8))
    with pytest.raises(OptionError, match="overlap"):
        interface_area(g, [SOLID, GEL], GEL)
    with pytest.raises(OptionError, match="density"):
        surfaces(g, Hydrate(density=0))
    with pytest.raises(OptionError, match="PhaseGrid"):
        surfaces(np.zeros((3, 3, 3)))
    with pytest.raises(OptionError, match="connectivity"):
        euler_characteristic(np.zeros((3, 3, 3)), connectivity=8)


def test_empty_grid_notes():
    g = PhaseGrid(np.full((4, 4, 4), SOLID, np.uint8))
    r = surfaces(g)
    assert any("gel" in n for n in r.notes)
    assert np.isnan(r.s_over_v["gel"])


@pytest.mark.parametrize("periodic", [False, True])
@pytest.mark.parametrize("seed", [0, 1])
def test_numba_kernels_equal_the_numpy_forms(periodic, seed):
    """The parallel configuration-histogram and pair-count kernels give exactly the counts of
    the plain numpy forms (padding / np.roll), on random label volumes."""
    from sheetview.grid import PhaseGrid
    from sheetview.measures import surface as sf
    rng = np.random.default_rng(seed)
    lab = rng.integers(0, 4, (13, 11, 9)).astype(np.uint8)
    m = lab == 1
    assert np.array_equal(sf.configuration_histogram(m, periodic),
                          sf._configuration_histogram_numpy(m, periodic))
    g = PhaseGrid(lab, (0.5, 0.6, 0.7), periodic=periodic)
    ma, mb = lab == 1, np.isin(lab, [2, 3])
    vec, w = sf.direction_weights(g.spacing)
    ref = 2.0 * sum(wv * (sf._pair_count(ma, mb, d, periodic) + sf._pair_count(mb, ma, d, periodic))
                    * g.voxel_volume / np.linalg.norm(dv)
                    for d, dv, wv in zip(sf.DIRECTIONS_13, vec, w))
    assert sf.interface_area(g, [1], [2, 3]) == pytest.approx(ref, rel=1e-12)


@pytest.mark.parametrize("periodic", [False, True])
def test_one_pass_interface_table_equals_pairwise_areas(periodic):
    """interface_areas_with(a) gives, for every label, exactly interface_area(grid, [a], [L])."""
    from sheetview.grid import PhaseGrid
    from sheetview.measures import surface as sf
    rng = np.random.default_rng(3)
    g = PhaseGrid(rng.integers(0, 5, (9, 10, 11)).astype(np.uint8), (0.4, 0.5, 0.45),
                  periodic=periodic)
    table = sf.interface_areas_with(g, 1)
    for L in (0, 2, 3, 4):
        assert table[L] == pytest.approx(sf.interface_area(g, [1], [L]), rel=1e-12)
    assert table[1] == 0.0
