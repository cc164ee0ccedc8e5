"""Validation of predicted NMR T2 spectra against the fast-exchange closed form."""
import numpy as np
import pytest

from sheetview.grid import GEL, INTERLAYER, SOLID, PhaseGrid
from sheetview.measures.relaxation import relaxation_spectrum, t2_of_surface_ratio

RHO2 = 3.7e-3  # nm/us


def _slits(width_vox, h=0.1, code=GEL, n_solid=5):
    """Periodic stack of parallel slits of ``width_vox`` voxels between solid slabs."""
    lab = np.full((4, 4, width_vox + n_solid), SOLID, np.uint8)
    lab[:, :, :width_vox] = code
    return PhaseGrid(lab, h, periodic=True)


@pytest.mark.parametrize("m", [21, 41])
def test_slit_t2_without_bulk(m):
    """Slit of width w in the fast-exchange limit, bulk term off: T2 = w / (2 ρ2)
    (Brownstein & Tarr, Phys. Rev. A 19 (1979) 2446). The local thickness of an odd slit of
    m voxels is exactly m h (sheetview's local thickness convention); tolerance 0.5%."""
    h = 0.1
    g = _slits(m, h)
    r = relaxation_spectrum(g, rho2=RHO2, t2_bulk=None)
    w = m * h
    expected = w / (2 * RHO2) * 1e-6  # us -> s
    assert r.class_t2_logmean["gel"] == pytest.approx(expected, rel=0.005)
    # the histogram holds all the signal in the bin containing T2
    k = int(np.argmax(r.total))
    assert r.edges[k] <= expected <= r.edges[k + 1]
    assert r.total.sum() == pytest.approx(1.0)


@pytest.mark.parametrize("shape,factor", [("slit", 2), ("cylinder", 4), ("sphere", 6)])
def test_shape_factors(shape, factor):
    """S/V of a slit of width d: 2/d; of a cylinder of diameter d: 4/d; of a sphere of
    diameter d: 6/d (geometry; Brownstein & Tarr 1979 list the slit, cylinder and sphere
    forms), with the bulk term on: 1/T2 = 1/T2b + ρ2 S/V; tolerance 0.5%."""
    m, h = 31, 0.1
    g = _slits(m, h)
    r = relaxation_spectrum(g, rho2=RHO2, t2_bulk=2.5, shape=shape)
    d = m * h
    expected = 1.0 / (1 / 2.5 + RHO2 * 1e6 * factor / d)
    assert r.class_t2_logmean["gel"] == pytest.approx(expected, rel=0.005)


def test_interlayer_slit_given_and_measured():
    """Interlayer water as slits of gap w: T2 = w/(2 ρ2) without bulk (Brownstein & Tarr
    1979), with the gap given or measured as the local thickness of the interlayer phase
    (odd slit: exact); tolerance 0.5%. Signal fractions follow the voxel counts."""
    h = 0.1
    lab = np.full((4, 4, 40), SOLID, np.uint8)
    lab[:, :, 0:7] = INTERLAYER     # 0.7 nm gap
    lab[:, :, 10:31] = GEL          # 2.1 nm gel slit
    g = PhaseGrid(lab, h, periodic=True)
    for width in (0.7, None):
        r = relaxation_spectrum(g, interlayer_width=width, rho2=RHO2, t2_bulk=None)
        assert r.class_t2_logmean["interlayer"] == pytest.approx(0.7 / (2 * RHO2) * 1e-6,
                                                                 rel=0.005)
        assert r.class_t2_logmean["gel"] == pytest.approx(2.1 / (2 * RHO2) * 1e-6, rel=0.005)
        assert r.class_fraction["interlayer"] == pytest.approx(7 / 28)
        assert r.class_fraction["gel"] == pytest.approx(21 / 28)


def test_bulk_limit():
    """S/V -> 0 gives T2 -> T2,bulk (Brownstein & Tarr 1979)."""
    assert t2_of_surface_ratio(0.0, RHO2, 2.5) == pytest.approx(2.5)
    assert t2_of_surface_ratio(1e-12, RHO2, 2.5) == pytest.approx(2.5, rel=1e-6)
