"""The material model (sheetview.material) against hand computations.

Sources: the composition (CaO)1.7(SiO2)(H2O)1.8 at 2.604 g/cm3 of Allen, Thomas & Jennings,
Nature Materials 6 (2007) 311 (published); bound coherent neutron scattering lengths of Sears,
Neutron News 3 (1992) 26 (published); IUPAC standard atomic weights and the classical
electron radius (CODATA); bulk water 0.997 g/cm3 at 25 C (handbook, from memory). The
arithmetic below is written out independently of the module (its own tables and formulas).
"""
from __future__ import annotations

import numpy as np
import pytest

from sheetview.grid import GEL, INTERLAYER, SOLID, PhaseGrid
from sheetview.material import Hydrate
from sheetview.measures.phases import volume_fractions
from sheetview.measures.surface import surfaces

# independent tables (IUPAC conventional atomic weights; Sears 1992 lengths in fm)
MASS = {"Ca": 40.078, "Si": 28.085, "O": 15.999, "H": 1.008}
B_FM = {"Ca": 4.70, "Si": 4.1491, "O": 5.803, "H": -3.7390}
Z = {"Ca": 20, "Si": 14, "O": 8, "H": 1}
NA = 6.02214076e23
RE_FM = 2.8179403


def _atoms(x_cao, y_h2o):
    return {"Ca": x_cao, "Si": 1.0, "O": x_cao + 2.0 + y_h2o, "H": 2.0 * y_h2o}


def _mass(atoms):
    return sum(MASS[k] * n for k, n in atoms.items())


def _sld(atoms, rho, table):
    """1e-6 A^-2: N_A rho / M * sum b, with b in fm (1 fm = 1e-5 A) and cm^3 -> A^3."""
    return NA * rho / _mass(atoms) * 1e-24 * sum(table[k] * n for k, n in atoms.items()) \
        * 1e-5 * 1e6


def test_hand_computed_stack():
    """Three sheets 0.7 nm thick at a 1.4 nm repeat: V_solid = 2.1 A, V_interlayer = 1.4 A
    (f_i = 0.4). Hand computation of the interlayer water per formula unit, the layer
    density, the layer's neutron and X-ray SLDs, and the mass basis of the specific surface."""
    h = Hydrate()  # (CaO)1.7(SiO2)(H2O)1.8 at 2.604, water 0.997
    f = 1.4 / 3.5
    m_h = _mass(_atoms(1.7, 1.8))
    vm = m_h / 2.604
    m_w = 2 * MASS["H"] + MASS["O"]
    y_i = f * vm * 0.997 / m_w
    layer = _atoms(1.7, 1.8 - y_i)
    rho_l = _mass(layer) / ((1 - f) * vm)
    sp = h.split(f)
    assert sp.interlayer_water_per_unit == pytest.approx(y_i, rel=1e-12)
    assert sp.layer_density == pytest.approx(rho_l, rel=1e-12)
    assert sp.consistent == (1.8 - y_i >= 0)
    assert sp.layer_sld("neutron") == pytest.approx(_sld(layer, rho_l, B_FM), rel=1e-9)
    re = {k: z * RE_FM for k, z in Z.items()}
    assert sp.layer_sld("xray") == pytest.approx(_sld(layer, rho_l, re), rel=1e-9)
    # the hydrate's own neutron SLD, about 2.55e-6 A^-2 (REFERENCES.md, derived)
    assert sp.hydrate_sld("neutron") == pytest.approx(_sld(_atoms(1.7, 1.8), 2.604, B_FM),
                                                      rel=1e-9)
    assert sp.hydrate_sld("neutron") == pytest.approx(2.55, abs=0.01)
    # mass of 2.1 + 1.4 nm^3 of C-S-H at 2.604 g/cm^3 (1 nm^3 = 1e-21 cm^3)
    assert sp.mass_g(2.1, 1.4) == pytest.approx(2.604 * 3.5e-21, rel=1e-12)


@pytest.mark.parametrize("f", [0.0, 0.1, 0.33, 0.47, 0.8])
def test_mass_and_sld_balance_close(f):
    """Mass balance: layer mass + interlayer water mass = the hydrate's formula-unit mass;
    volume balance: layer volume + water volume = the hydrate's molar volume; the SLD of a
    whole particle (volume average of layer and H2O interlayer) is the hydrate's SLD, for
    neutrons and X-rays (SLD is linear in the atom counts per volume)."""
    h = Hydrate()
    sp = h.split(f)
    m_w = 2 * MASS["H"] + MASS["O"]
    m_h = _mass(_atoms(1.7, 1.8))
    vm = m_h / 2.604
    assert sp.layer_molar_mass + sp.interlayer_water_per_unit * m_w == pytest.approx(m_h, rel=1e-12)
    v_layer = sp.layer_molar_mass / sp.layer_density
    v_water = sp.interlayer_water_per_unit * m_w / 0.997
    assert v_layer + v_water == pytest.approx(vm, rel=1e-12)
    for probe, table in (("neutron", B_FM), ("xray", {k: z * RE_FM for k, z in Z.items()})):
        water = _sld({"H": 2.0, "O": 1.0}, 0.997, table)
        avg = (1 - f) * sp.layer_sld(probe) + f * water
        assert avg == pytest.approx(_sld(_atoms(1.7, 1.8), 2.604, table), rel=1e-9)


def test_inconsistent_geometry_is_said():
    """An interlayer share that holds more water than the composition (f_i = 0.6 gives
    about 2.4 H2O per formula unit at 0.997 g/cm3, over 1.8) is flagged, not hidden."""
    sp = Hydrate().split(0.6)
    assert not sp.consistent
    assert sp.layer_water_per_unit < 0
    assert "negative water" in sp.to_dict()["notes"][0]


def test_surface_and_water_of_a_hand_built_grid():
    """A periodic grid: 4 voxels of solid, 2 of interlayer, 10 of gel per column (0.2 nm
    voxels). The specific surface per mass divides the solid-pore area by
    2.604 g/cm3 x (V_solid + V_interlayer); the water of each class is the interlayer and
    gel volume at 0.997 g/cm3 plus the layers' structural water (1.8 - y_i per formula unit)."""
    lab = np.full((6, 6, 16), GEL, np.uint8)
    lab[:, :, 0:4] = SOLID
    lab[:, :, 4:6] = INTERLAYER
    g = PhaseGrid(lab, spacing=0.2, periodic=True)
    r = surfaces(g)
    v = 0.2 ** 3
    vs, vi, vg = 6 * 6 * 4 * v, 6 * 6 * 2 * v, 6 * 6 * 10 * v
    area = r.areas["solid-interlayer"] + r.areas["solid-gel"]
    assert r.pore_area == pytest.approx(area, rel=1e-12)
    assert r.mass_g == pytest.approx(2.604 * (vs + vi) * 1e-21, rel=1e-12)
    assert r.specific_surface_m2_per_g == pytest.approx(area * 1e-18 / (2.604 * (vs + vi) * 1e-21),
                                                        rel=1e-12)
    ph = volume_fractions(g)
    w = ph.water
    assert w["interlayer"]["mass_g"] == pytest.approx(0.997 * vi * 1e-21, rel=1e-12)
    assert w["gel"]["mass_g"] == pytest.approx(0.997 * vg * 1e-21, rel=1e-12)
    f = vi / (vs + vi)
    m_h = _mass(_atoms(1.7, 1.8))
    m_w = 2 * MASS["H"] + MASS["O"]
    y_i = f * m_h / 2.604 * 0.997 / m_w
    units = 2.604 * (vs + vi) * 1e-21 / m_h  # mol of formula units in the C-S-H
    assert w["layers (structural)"]["mass_g"] == pytest.approx(units * (1.8 - y_i) * m_w,
                                                               rel=1e-9)
    assert sum(x["fraction_of_water"] for x in w.values()) == pytest.approx(1.0, rel=1e-12)


def test_user_composition_and_bad_input():
    """A user composition and density are used as given; bad ones are refused by name."""
    from sheetview.errors import OptionError
    h = Hydrate("(CaO)1.2(SiO2)(H2O)2.0", 2.45, source="user")
    assert h.split(0.2).hydrate_sld("neutron") == pytest.approx(
        _sld(_atoms(1.2, 2.0), 2.45, B_FM), rel=1e-9)
    with pytest.raises(OptionError, match="water"):
        Hydrate("(CaO)1.7(SiO2)", 2.6)
    with pytest.raises(OptionError, match="density"):
        Hydrate(density=-1)
    with pytest.raises(OptionError, match="interlayer share"):
        Hydrate().split(1.0)
