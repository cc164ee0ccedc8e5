"""One material model of C-S-H: sheets (layers) plus interlayer water, by mass balance.

Published compositions and densities of C-S-H describe the hydrate **with** the water held
between its layers and **without** the gel-pore water around its particles:

* (CaO)1.7(SiO2)(H2O)1.8 at 2.604 g/cm³, nanoscale C-S-H from small-angle neutron and
  X-ray scattering with H2O/D2O contrast variation (A. J. Allen, J. J. Thomas,
  H. M. Jennings, Nature Materials 6 (2007) 311, doi:10.1038/nmat1871). This is the default.
* a C-S-H "solid" density of 2.73 g/cm³ at low degree of hydration, falling to about
  2.65 g/cm³ later, from ¹H NMR relaxometry (A. C. A. Muller, K. L. Scrivener,
  A. M. Gajewicz, P. J. McDonald, J. Phys. Chem. C 117 (2013) 403, doi:10.1021/jp3102964);
  give it with ``density=2.73``.

A sheet structure resolves what these numbers lump together: its SOLID phase is the layers
alone and its INTERLAYER phase the water-filled gaps between stacked layers. Given the
structure's interlayer share of the C-S-H volume,

.. math:: f_i = \\frac{V_{\\text{interlayer}}}{V_{\\text{solid}} + V_{\\text{interlayer}}},

and the density :math:`\\rho_w` of the interlayer water, one formula unit of the hydrate
(molar mass :math:`M`, molar volume :math:`V_m = M / \\rho`) splits into

* interlayer water :math:`y_i = f_i V_m \\rho_w / M_{H_2O}` molecules of H2O per formula
  unit, filling the volume :math:`f_i V_m`;
* the layer: the rest of the formula unit, :math:`(\\text{CaO})_x(\\text{SiO}_2)(\\text{H}_2
  \\text{O})_{y - y_i}`, of mass :math:`M - y_i M_{H_2O}` in the volume :math:`(1 - f_i)
  V_m`, hence the layer density :math:`\\rho_l = (M - y_i M_{H_2O}) / ((1 - f_i) V_m)`.

Everything else follows from this one split (a mass balance that closes exactly):

* the mass the published density refers to, for a specific surface per mass:
  :math:`m = \\rho (V_\\text{solid} + V_\\text{interlayer}) = \\rho_l V_\\text{solid} +
  \\rho_w V_\\text{interlayer}`;
* scattering length densities: the sheets get the SLD of the layer composition at
  :math:`\\rho_l`, the interlayer the SLD of its water (the pore fluid, when H2O/D2O
  exchange is assumed), and the volume average of the two over a whole particle is the SLD
  of the published composition at :math:`\\rho` when the interlayer holds H2O;
* the water of each class: structural (layer) water :math:`y - y_i` per formula unit,
  interlayer water :math:`\\rho_w V_\\text{interlayer}`, gel-pore water
  :math:`\\rho_w V_\\text{gel}` (saturated pores).

When the structure's interlayer holds more water than the composition provides
(:math:`y_i > y`), the split is still computed (the layer then carries negative water and
the layer density is what the mass balance gives) but the result says the composition and
the geometry disagree. For a structure without interlayer (a segmented volume, isolated
sheets), :math:`f_i = 0` and the sheets are the published hydrate itself.

The water density of 0.997 g/cm³ is bulk water at 25 °C (handbook value, from memory);
water confined to sub-nanometre gaps may differ, which is why it is a parameter.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

from .errors import OptionError
from .sld import PRESETS, molar_mass, parse_formula, sld

#: Default hydrate: Allen, Thomas & Jennings, Nature Materials 6 (2007) 311 (published).
DEFAULT_FORMULA = PRESETS["csh"][0]
DEFAULT_DENSITY = PRESETS["csh"][1]
#: Bulk water density at 25 °C (g/cm³; handbook value, from memory).
DEFAULT_WATER_DENSITY = PRESETS["h2o"][1]
DEFAULT_SOURCE = "Allen, Thomas & Jennings, Nature Materials 6 (2007) 311"
WATER = "H2O"
#: What the mass of a specific surface per mass is.
MASS_BASIS = ("mass of the sheets plus their interlayer water (the C-S-H the hydrate density "
              "refers to), without gel-pore water")


def _positive(v, name, unit):
    try:
        x = float(v)
    except (TypeError, ValueError):
        raise OptionError(f"{name} must be a positive number of {unit}, got {v!r}",
                          param=name) from None
    if not (math.isfinite(x) and x > 0):
        raise OptionError(f"{name} must be a positive number of {unit}, got {v!r}", param=name)
    return x


@dataclass(frozen=True)
class Hydrate:
    """A C-S-H composition and density that include the interlayer water (not gel water).

    Parameters
    ----------
    formula : chemical formula of one formula unit, e.g. ``"(CaO)1.7(SiO2)(H2O)1.8"``;
        it must contain H and O (its water).
    density : g/cm³ of the hydrate with its interlayer water.
    water_density : g/cm³ of the interlayer (and gel) water.
    source : where the composition and density come from (printed with results).
    """

    formula: str = DEFAULT_FORMULA
    density: float = DEFAULT_DENSITY
    water_density: float = DEFAULT_WATER_DENSITY
    source: str = DEFAULT_SOURCE

    def __post_init__(self):
        atoms = parse_formula(self.formula)
        object.__setattr__(self, "density", _positive(self.density, "density", "g/cm3"))
        object.__setattr__(self, "water_density",
                           _positive(self.water_density, "water_density", "g/cm3"))
        if atoms.get("H", 0.0) <= 0 or atoms.get("O", 0.0) <= 0:
            raise OptionError(f"composition {self.formula!r} holds no water (H and O): the "
                              "interlayer water cannot be taken from it", param="composition")

    @property
    def molar_mass(self) -> float:
        """g/mol of one formula unit."""
        return molar_mass(self.formula)

    @property
    def water_per_unit(self) -> float:
        """H2O per formula unit (half the H atoms)."""
        return 0.5 * parse_formula(self.formula)["H"]

    def split(self, interlayer_share: float) -> "MaterialSplit":
        """The layer / interlayer-water split for an interlayer share ``f_i`` of the C-S-H
        volume (0 <= f_i < 1)."""
        f = float(interlayer_share)
        if not (math.isfinite(f) and 0.0 <= f < 1.0):
            raise OptionError(f"the interlayer share of the C-S-H volume must lie in [0, 1), "
                              f"got {interlayer_share!r}", param="interlayer_share")
        m_w = molar_mass(WATER)
        M = self.molar_mass
        vm = M / self.density  # cm^3 per mol of formula units
        y = self.water_per_unit
        y_i = f * vm * self.water_density / m_w
        layer_mass = M - y_i * m_w
        layer_density = layer_mass / ((1.0 - f) * vm)
        return MaterialSplit(self, f, y, y_i, layer_mass, layer_density)

    def to_dict(self) -> dict:
        return {"formula": self.formula, "density_g_cm3": self.density,
                "water_density_g_cm3": self.water_density, "source": self.source,
                "basis": "hydrate with its interlayer water, without gel-pore water"}


@dataclass(frozen=True)
class MaterialSplit:
    """A :class:`Hydrate` split into layers and interlayer water for one structure."""

    hydrate: Hydrate
    interlayer_share: float      # f_i
    water_per_unit: float        # y
    interlayer_water_per_unit: float  # y_i
    layer_molar_mass: float      # g/mol of the layer part of one formula unit
    layer_density: float         # g/cm^3

    @property
    def layer_water_per_unit(self) -> float:
        """Structural water left in the layers (H2O per formula unit); negative when the
        geometry holds more interlayer water than the composition provides."""
        return self.water_per_unit - self.interlayer_water_per_unit

    @property
    def consistent(self) -> bool:
        return self.layer_water_per_unit >= 0.0

    @property
    def layer_formula(self) -> str:
        """The layer composition as a formula with the same atoms as the hydrate less the
        interlayer water (H and O counts reduced)."""
        atoms = dict(parse_formula(self.hydrate.formula))
        yi = self.interlayer_water_per_unit
        atoms["H"] = atoms.get("H", 0.0) - 2.0 * yi
        atoms["O"] = atoms.get("O", 0.0) - yi
        return "".join(f"{el}{_num(n)}" for el, n in atoms.items())

    def layer_sld(self, probe: str = "neutron") -> float:
        """SLD (1e-6 Å⁻²) of the layers: by linearity of the SLD in the atom counts,
        ``(SLD_hydrate - f_i SLD_water) / (1 - f_i)`` with the water at ``water_density``,
        which equals the SLD of :attr:`layer_formula` at :attr:`layer_density` whenever that
        formula has non-negative counts."""
        h = self.hydrate
        f = self.interlayer_share
        s_h = sld(h.formula, h.density, probe=probe)
        s_w = sld(WATER, h.water_density, probe=probe)
        return (s_h - f * s_w) / (1.0 - f)

    def hydrate_sld(self, probe: str = "neutron") -> float:
        """SLD of the whole hydrate (layers and H2O interlayer water as one particle)."""
        return sld(self.hydrate.formula, self.hydrate.density, probe=probe)

    def mass_g(self, v_solid_nm3: float, v_interlayer_nm3: float) -> float:
        """Mass (g) of layers plus interlayer water: ``rho_l V_solid + rho_w V_interlayer``
        (= ``rho (V_solid + V_interlayer)`` when the volumes are in the ratio ``f_i``)."""
        cm3 = 1e-21
        return (self.layer_density * v_solid_nm3
                + self.hydrate.water_density * v_interlayer_nm3) * cm3

    def water(self, volumes_nm3: dict) -> dict:
        """Water per class (g and fraction of all water) for the phase volumes given
        (``solid``, ``interlayer`` and the gel-pore classes, saturated): structural water
        in the layers from the composition, interlayer and gel water at ``water_density``."""
        h = self.hydrate
        m_w = molar_mass(WATER)
        v_s = float(volumes_nm3.get("solid", 0.0))
        units = self.layer_density * v_s * 1e-21 / self.layer_molar_mass  # mol of formula units
        out = {"layers (structural)": units * self.layer_water_per_unit * m_w}
        for name, v in volumes_nm3.items():
            if name in ("solid", "outside"):
                continue
            out[name] = h.water_density * float(v) * 1e-21
        total = sum(out.values())
        return {k: {"mass_g": v, "fraction_of_water": (v / total) if total > 0 else None}
                for k, v in out.items()}

    def to_dict(self, probe: str = "neutron") -> dict:
        return {"hydrate": self.hydrate.to_dict(),
                "interlayer_share_of_csh_volume": self.interlayer_share,
                "water_per_formula_unit": self.water_per_unit,
                "interlayer_water_per_formula_unit": self.interlayer_water_per_unit,
                "layer_water_per_formula_unit": self.layer_water_per_unit,
                "layer_formula": self.layer_formula,
                "layer_density_g_cm3": self.layer_density,
                "consistent": self.consistent,
                f"layer_sld_{probe}_1e-6_A-2": self.layer_sld(probe),
                f"hydrate_sld_{probe}_1e-6_A-2": self.hydrate_sld(probe),
                "notes": [] if self.consistent else [self.inconsistency()]}

    def inconsistency(self) -> str:
        h = self.hydrate
        return (f"the structure's interlayer ({100 * self.interlayer_share:.1f} % of the C-S-H "
                f"volume) holds {self.interlayer_water_per_unit:.3g} H2O per formula unit at "
                f"{h.water_density:g} g/cm3, more than the {self.water_per_unit:.3g} of "
                f"{h.formula}: the layers would carry negative water. Give a composition with "
                f"more water, a lower density or a lower interlayer water density")


def _num(n: float) -> str:
    return "" if abs(n - 1.0) < 1e-12 else f"{n:.6g}"


def interlayer_share(volumes_nm3: dict) -> float:
    """``V_interlayer / (V_solid + V_interlayer)`` from phase volumes (0 without solid)."""
    vs = float(volumes_nm3.get("solid", 0.0))
    vi = float(volumes_nm3.get("interlayer", 0.0))
    return vi / (vs + vi) if vs + vi > 0 else 0.0

