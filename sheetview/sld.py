"""Scattering length densities (SLD) for neutrons and X-rays, with bundled element data.

Neutron SLD of a compound of mass density :math:`\\rho` (g/cm³) and molar mass :math:`M`
(g/mol) whose formula unit holds atoms with bound coherent scattering lengths :math:`b_i`:

.. math:: \\mathrm{SLD}_n = \\frac{N_A \\rho}{M} \\sum_i b_i

X-ray SLD (forward scattering, away from absorption edges): electron density times the
classical electron radius :math:`r_e = 2.8179403` fm,

.. math:: \\mathrm{SLD}_x = \\frac{N_A \\rho}{M} \\sum_i Z_i \\, r_e

Values are returned in 1e-6 Å⁻² (the usual unit) by :func:`neutron_sld` / :func:`xray_sld`;
:func:`to_nm2` and :func:`to_cm2` convert.

References
----------
V. F. Sears, "Neutron scattering lengths and cross sections", Neutron News 3 (1992) 26-37,
doi:10.1080/10448639208218770 (scattering lengths).
International Tables for Crystallography Vol. C, 6.1.1 (classical electron radius).
A. J. Allen, J. J. Thomas, H. M. Jennings, "Composition and density of nanoscale
calcium-silicate-hydrate in cement", Nature Materials 6 (2007) 311, doi:10.1038/nmat1871.
"""
from __future__ import annotations

import re

from .errors import OptionError

#: Avogadro constant (1/mol), exact since the 2019 SI.
AVOGADRO = 6.02214076e23
#: Classical electron radius (fm), CODATA.
R_E_FM = 2.8179403

#: Bound coherent neutron scattering lengths (fm), natural isotopic abundance except D.
#: Sears, Neutron News 3 (1992) 26: H, D, O, Si, Ca checked against the reference table of
#: the project (published). Al, Na, K, C, N, Fe, Mg, S are from memory of the same table.
SCATTERING_LENGTH_FM = {
    "H": -3.7390, "D": 6.671, "O": 5.803, "Si": 4.1491, "Ca": 4.70,
    # from memory (Sears 1992), not checked against the table:
    "Al": 3.449, "Na": 3.63, "K": 3.67, "C": 6.6460, "N": 9.36, "Fe": 9.45, "Mg": 5.375,
    "S": 2.847,
}
#: Standard atomic weights (g/mol; IUPAC conventional values, from memory), D = 2H.
ATOMIC_MASS = {
    "H": 1.008, "D": 2.0141, "O": 15.999, "Si": 28.085, "Ca": 40.078, "Al": 26.982,
    "Na": 22.990, "K": 39.098, "C": 12.011, "N": 14.007, "Fe": 55.845, "Mg": 24.305,
    "S": 32.06,
}
#: Atomic numbers (electrons per neutral atom).
ATOMIC_NUMBER = {"H": 1, "D": 1, "O": 8, "Si": 14, "Ca": 20, "Al": 13, "Na": 11, "K": 19,
                 "C": 6, "N": 7, "Fe": 26, "Mg": 12, "S": 16}

#: Densities (g/cm³) near room temperature: water 0.997, heavy water 1.104 (handbook
#: values, from memory); C-S-H nanoparticle (CaO)1.7(SiO2)(H2O)1.8 at 2.604 g/cm³
#: (Allen, Thomas & Jennings, Nature Materials 6 (2007) 311, published).
PRESETS = {
    "h2o": ("H2O", 0.997),
    "d2o": ("D2O", 1.104),
    "csh": ("(CaO)1.7(SiO2)(H2O)1.8", 2.604),
}

_TOKEN = re.compile(r"\s*(?:([A-Z][a-z]?)|(\()|(\))|(\d+(?:\.\d*)?|\.\d+))")


def parse_formula(formula: str) -> dict:
    """Atom counts of a chemical formula: ``"(CaO)1.7(SiO2)(H2O)1.8"`` ->
    ``{'Ca': 1.7, 'O': 5.5, 'Si': 1.0, 'H': 3.6}``.

    Elements are a capital letter and an optional small letter; a number (integer or
    decimal) after an element or a closing parenthesis multiplies it; parentheses nest.
    Only the elements of :data:`ATOMIC_MASS` are known.

    Raises
    ------
    OptionError
        Unknown element, unbalanced parentheses or a stray character.
    """
    if not isinstance(formula, str) or not formula.strip():
        raise OptionError("empty chemical formula", param="formula")
    s = formula.strip()
    stack: list[dict] = [{}]
    pos = 0
    last: dict | None = None  # the counts the next number multiplies
    while pos < len(s):
        m = _TOKEN.match(s, pos)
        if m is None or m.end() == pos:
            raise OptionError(f"chemical formula {formula!r}: unexpected character "
                              f"{s[pos]!r} at position {pos + 1}", param="formula")
        pos = m.end()
        el, op, cl, num = m.groups()
        if el is not None:
            if el not in ATOMIC_MASS:
                raise OptionError(f"chemical formula {formula!r}: unknown element {el!r} "
                                  f"(known: {', '.join(sorted(ATOMIC_MASS))})", param="formula")
            last = {el: 1.0}
            stack[-1][el] = stack[-1].get(el, 0.0) + 1.0
        elif op is not None:
            stack.append({})
            last = None
        elif cl is not None:
            if len(stack) == 1:
                raise OptionError(f"chemical formula {formula!r}: unbalanced ')'",
                                  param="formula")
            group = stack.pop()
            for k, v in group.items():
                stack[-1][k] = stack[-1].get(k, 0.0) + v
            last = group
        else:
            if last is None:
                raise OptionError(f"chemical formula {formula!r}: number {num!r} does not "
                                  f"follow an element or ')'", param="formula")
            f = float(num)
            for k, v in last.items():
                stack[-1][k] += v * (f - 1.0)
            last = None
    if len(stack) != 1:
        raise OptionError(f"chemical formula {formula!r}: unbalanced '('", param="formula")
    out = {k: v for k, v in stack[0].items() if v != 0}
    if not out:
        raise OptionError(f"chemical formula {formula!r} has no atoms", param="formula")
    return out


def molar_mass(formula: str) -> float:
    """Molar mass (g/mol) of a formula unit."""
    return sum(ATOMIC_MASS[k] * n for k, n in parse_formula(formula).items())


def _number_density(formula: str, density: float) -> float:
    """Formula units per Å³."""
    density = float(density)
    if not density > 0:
        raise OptionError(f"mass density must be positive (g/cm3), got {density!r}",
                          param="density")
    return AVOGADRO * density / molar_mass(formula) * 1e-24  # cm^-3 -> Å^-3


def neutron_sld(formula: str, density: float) -> float:
    """Neutron SLD in 1e-6 Å⁻² of ``formula`` at ``density`` g/cm³ (N_A ρ/M Σ b_i)."""
    atoms = parse_formula(formula)
    missing = [k for k in atoms if k not in SCATTERING_LENGTH_FM]
    if missing:
        raise OptionError(f"no neutron scattering length for {missing}", param="formula")
    b = sum(SCATTERING_LENGTH_FM[k] * n for k, n in atoms.items()) * 1e-5  # fm -> Å
    return _number_density(formula, density) * b * 1e6


def xray_sld(formula: str, density: float) -> float:
    """X-ray SLD in 1e-6 Å⁻² of ``formula`` at ``density`` g/cm³ (electron density × r_e)."""
    atoms = parse_formula(formula)
    z = sum(ATOMIC_NUMBER[k] * n for k, n in atoms.items())
    return _number_density(formula, density) * z * R_E_FM * 1e-5 * 1e6


def sld(formula: str, density: float, probe: str = "neutron") -> float:
    """SLD in 1e-6 Å⁻² for ``probe`` 'neutron' or 'xray'."""
    p = str(probe).lower().replace("-", "")
    if p == "neutron":
        return neutron_sld(formula, density)
    if p in ("xray", "x"):
        return xray_sld(formula, density)
    raise OptionError(f"probe must be 'neutron' or 'xray', got {probe!r}", param="probe")


def water_sld(d2o_fraction: float = 0.0, probe: str = "neutron") -> float:
    """SLD (1e-6 Å⁻²) of an H2O/D2O mixture with D2O volume fraction ``d2o_fraction``.

    Ideal mixing by volume: ``(1 - x) SLD(H2O) + x SLD(D2O)`` (common practice in contrast
    variation; ignores the small excess volume of mixing and H/D exchange with the solid).
    """
    x = float(d2o_fraction)
    if not 0.0 <= x <= 1.0:
        raise OptionError(f"D2O volume fraction must lie in [0, 1], got {d2o_fraction!r}",
                          param="fluid")
    h = sld(*PRESETS["h2o"], probe=probe)
    d = sld(*PRESETS["d2o"], probe=probe)
    return (1.0 - x) * h + x * d


def preset_sld(name: str, probe: str = "neutron") -> float:
    """SLD (1e-6 Å⁻²) of a preset: 'h2o', 'd2o', 'csh', or a D2O volume fraction such as
    '0.3' or '30%' (an H2O/D2O mixture)."""
    key = str(name).strip().lower()
    if key in PRESETS:
        return sld(*PRESETS[key], probe=probe)
    try:
        x = float(key[:-1]) / 100.0 if key.endswith("%") else float(key)
    except ValueError:
        raise OptionError(f"fluid must be h2o, d2o or a D2O volume fraction (0-1 or a "
                          f"percentage), got {name!r}", param="fluid") from None
    return water_sld(x, probe)


def to_nm2(sld_1e6_a2: float) -> float:
    """1e-6 Å⁻² -> nm⁻² (1 Å⁻² = 100 nm⁻²)."""
    return float(sld_1e6_a2) * 1e-6 * 100.0


def to_cm2(sld_1e6_a2: float) -> float:
    """1e-6 Å⁻² -> cm⁻² (1 Å⁻² = 1e16 cm⁻²)."""
    return float(sld_1e6_a2) * 1e-6 * 1e16
