"""The settings of a measure run: one frozen, typed object, validated once.

:class:`Settings` holds every parameter the measures of ``sheetview measure`` take, under
the name the measure functions use (a parameter keeps its name from the option to the
kernel: ``voxel`` is ``voxel`` all the way). The command line builds its options from the
fields (:func:`fields_info`) and maps them to a :class:`Settings`; ``batch`` hashes
:meth:`Settings.key` into its result keys; ``sheetview.measure`` takes the same names as
keyword arguments.

Examples
--------
>>> from sheetview.app.settings import Settings
>>> s = Settings(voxel=0.2, pore_split="5,20")
>>> s.voxel, s.pore_split
(0.2, (5.0, 20.0))
>>> Settings(voxel=0.001)
Traceback (most recent call last):
...
sheetview.errors.OptionError: voxel: must be at least 0.01 nm, got 0.001
"""
from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass, field

from ..errors import OptionError
from ..material import DEFAULT_DENSITY, DEFAULT_FORMULA, DEFAULT_WATER_DENSITY, Hydrate
from ..measures.stacking import StackingSettings

#: Names of the pore classes made by ``pore_split`` (smallest first). After Muller et al.
#: (2013) and the review of Valori, McDonald & Scrivener, Cem. Concr. Res. 49 (2013) 65
#: (from memory): gel pores a few nm, interhydrate pores up to some tens of nm, capillary
#: pores beyond.
SPLIT_NAMES = ("gel", "interhydrate", "capillary", "coarse")


def _f(default, unit, help, *, metavar=None, number=True, group="", choices=None):
    """A settings field with its documentation: ``unit`` (shown in help and metavar),
    ``help``, ``number`` (whether it changes a number of the results; ``max_memory``
    does not), ``group`` (the measure family it steers)."""
    return field(default=default, metadata={"unit": unit, "help": help, "metavar": metavar,
                                            "number": number, "group": group,
                                            "choices": choices})


@dataclass(frozen=True)
class Settings:
    """Every setting of a measure run (lengths nm, angles degrees).

    Built once and validated in ``__post_init__``; an invalid value raises
    :class:`~sheetview.errors.OptionError` (a ``ValueError``) naming the parameter.
    Texts are accepted where the command line gives them (``max_memory="8G"``,
    ``pore_split="5,20"``).
    """

    # stacking graph (sheetview.measures.stacking)
    angle_tol: float = _f(5.0, "deg", "Largest angle between the normals of stacked or "
                          "in-plane neighbours.", group="stacking")
    gap_tol: float = _f(0.35, "nm", "Tolerance on the interlayer gap (stacked: |gap - repeat|; "
                        "in-plane: gap).", group="stacking")
    overlap: float = _f(0.1, "", "Least projected overlap of stacked triangles, as a fraction "
                        "of the smaller.", metavar="FRACTION", group="stacking")
    tilt_limit: float = _f(25.0, "deg", "Pairs stacked but for an angle up to this are "
                           "reported as tilted contacts.", group="stacking")
    edge_tol: float = _f(0.05, "nm", "Collinearity tolerance of shared in-plane edges.",
                         group="stacking")
    # orientation (sheetview.measures.orientation)
    local_radius: float = _f(5.0, "nm", "Radius of the neighbourhood of the local order "
                             "parameter.", group="order")
    frame: str = _f("z", "", "Reference axis of the orientation histogram and pole figure.",
                    metavar="AXIS", group="order", choices=("z", "director"))
    # phase grid (sheetview.grid, sheetview.measures.phases)
    voxel: float | None = _f(None, "nm", "Voxel edge of the phase grid (default from the "
                             "structure: 6 voxels across the thinner of sheet and gap, or of a "
                             "closed body and its pores).", group="grid")
    max_memory: int | None = _f(None, "bytes", "Largest memory the phase grid may use, e.g. 8G "
                                "(default: half the available memory).", metavar="SIZE",
                                number=False, group="grid")
    # the material model (sheetview.material)
    composition: str = _f(DEFAULT_FORMULA, "", "C-S-H composition with its interlayer water "
                          "(Allen, Thomas & Jennings 2007): the mass of the specific surface, "
                          "the sheets' SLD and the water of each class follow from it.",
                          metavar="FORMULA", group="material")
    density: float = _f(DEFAULT_DENSITY, "g/cm3", "Density of that composition with its "
                        "interlayer water, without gel water (Allen et al. 2007: 2.604; Muller "
                        "et al. 2013: 2.73).", group="material")
    water_density: float = _f(DEFAULT_WATER_DENSITY, "g/cm3", "Density of the interlayer and "
                              "gel-pore water.", group="material")
    # pore classes and sizes (sheetview.measures.phases, pores)
    pore_split: tuple = _f((), "nm", "Split the gel pores by local thickness at these "
                           "diameters into gel, interhydrate, capillary (and coarse) classes, "
                           "e.g. 5,20.", metavar="NM,NM", group="pores")
    pore_method: str = _f("centres", "", "Local thickness of the pores: 'centres' (balls "
                          "centred on voxel centres; fast, reads curved pores up to about 2 "
                          "voxels small), 'subvoxel' (refined ball centres and wall planes, "
                          "within 0.3 voxel; about 4-8 times slower) or, for prisms and meshes, "
                          "'exact' (distances to the exact geometry; about 7 times slower).",
                          metavar="METHOD", group="pores",
                          choices=("centres", "subvoxel", "exact"))
    intrusion: bool = _f(False, "", "Also compute the simulated intrusion (ink-bottle) pore "
                         "size distribution.", group="pores")
    # chords (sheetview.measures.chords)
    lines: int = _f(20000, "", "Isotropic random lines of the chord measure.", metavar="N",
                    group="chords")
    seed: int = _f(0, "", "Seed of the random lines.", metavar="N", group="chords")
    # random walkers (sheetview.measures.diffusion; the opt-in water_walk and transport)
    n_walkers: int | None = _f(None, "", "Walkers of the opt-in random-walk measures (default "
                               "20,000 for water_walk, 10,000 for transport).", metavar="N",
                               group="walk")
    # two-point correlation (sheetview.measures.correlation)
    s2_block: int | None = _f(None, "voxels", "Compute the two-point correlation on the "
                              "central block of this many voxels per side instead of the whole "
                              "domain (default: the whole domain while its transform fits).",
                              metavar="N", group="correlation")
    s2_rmax: float | None = _f(None, "nm", "Largest distance of the two-point correlation "
                               "(default half the smallest extent, at most 80 voxels).",
                               group="correlation")

    def __post_init__(self):
        set_ = lambda k, v: object.__setattr__(self, k, v)  # noqa: E731
        for k in ("angle_tol", "gap_tol", "overlap", "tilt_limit", "edge_tol", "local_radius",
                  "density", "water_density"):
            set_(k, _number(k, getattr(self, k)))
        # the tolerances' own ranges; the gap tolerance is checked against a structure's
        # repeat when its stacking is measured (the repeat here only lets every valid
        # tolerance pass)
        StackingSettings(self.angle_tol, self.gap_tol, self.overlap, self.tilt_limit,
                         self.edge_tol, spacing=max(1.4, 2.0 * self.gap_tol + 1e-6))
        if not (math.isfinite(self.local_radius) and self.local_radius > 0):
            raise OptionError(f"must be a positive number of nm, got {self.local_radius}",
                              param="local_radius")
        if self.frame not in ("z", "director"):
            raise OptionError(f"must be z or director, got {self.frame!r}", param="frame")
        if self.pore_method not in ("centres", "subvoxel", "exact"):
            raise OptionError(f"must be centres, subvoxel or exact, got {self.pore_method!r}",
                              param="pore_method")
        if self.voxel is not None:
            v = _number("voxel", self.voxel)
            if not (math.isfinite(v) and v >= 0.01):
                raise OptionError(f"must be at least 0.01 nm, got {v:g}", param="voxel")
            set_("voxel", v)
        set_("max_memory", parse_size(self.max_memory))
        for k in ("density", "water_density"):
            v = getattr(self, k)
            if not (math.isfinite(v) and v > 0):
                raise OptionError(f"must be a positive number of g/cm3, got {v:g}", param=k)
        set_("composition", str(self.composition))
        try:
            Hydrate(self.composition, self.density, self.water_density)
        except OptionError as e:
            raise OptionError(e.detail, param="composition") from None
        set_("pore_split", parse_split(self.pore_split))
        if not isinstance(self.intrusion, (bool, int)) or isinstance(self.intrusion, float):
            raise OptionError(f"must be true or false, got {self.intrusion!r}", param="intrusion")
        set_("intrusion", bool(self.intrusion))
        set_("lines", _whole("lines", self.lines))
        if not 1 <= self.lines <= 10_000_000:
            raise OptionError(f"must be between 1 and 10,000,000, got {self.lines}", param="lines")
        set_("seed", _whole("seed", self.seed))
        if not 0 <= self.seed < 2 ** 63:
            raise OptionError(f"must be a whole number from 0 to 2**63 - 1, got {self.seed}",
                              param="seed")
        if self.s2_block is not None:
            set_("s2_block", _whole("s2_block", self.s2_block))
            if not 8 <= self.s2_block <= 4096:
                raise OptionError(f"must be between 8 and 4096 voxels, got {self.s2_block}",
                                  param="s2_block")
        if self.n_walkers is not None:
            set_("n_walkers", _whole("n_walkers", self.n_walkers))
            if not 1 <= self.n_walkers <= 100_000_000:
                raise OptionError(f"must be between 1 and 100,000,000, got {self.n_walkers}",
                                  param="n_walkers")
        if self.s2_rmax is not None:
            r = _number("s2_rmax", self.s2_rmax)
            if not r > 0:
                raise OptionError(f"must be a positive number of nm, got {r:g}", param="s2_rmax")
            set_("s2_rmax", r)

    # ---------------------------------------------------------------- conveniences
    @classmethod
    def of(cls, settings=None, **kw) -> "Settings":
        """``settings`` (a Settings, a dict or None) updated with ``kw``; unknown names
        raise :class:`OptionError` listing the known ones; ``None`` values keep the default."""
        if isinstance(settings, Settings):
            base = settings.to_dict()
        else:
            base = {}
            for k, v in dict(settings or {}).items():
                base[k] = v
        base.update(kw)
        known = {f.name for f in dataclasses.fields(cls)}
        unknown = sorted(set(base) - known)
        if unknown:
            raise OptionError(f"unknown setting(s) {', '.join(unknown)}; known: "
                              f"{', '.join(sorted(known))}", param="settings")
        return cls(**{k: v for k, v in base.items() if v is not None})

    def replace(self, **kw) -> "Settings":
        return Settings.of(self, **kw)

    def to_dict(self) -> dict:
        """Plain Python values, JSON-ready (``pore_split`` as a list)."""
        d = {f.name: getattr(self, f.name) for f in dataclasses.fields(self)}
        d["pore_split"] = list(self.pore_split)
        return d

    def key(self) -> dict:
        """The settings that change a number of the results (the batch result key)."""
        return {k: v for k, v in self.to_dict().items()
                if self.__dataclass_fields__[k].metadata["number"]}

    @property
    def hydrate(self) -> Hydrate:
        """The material model these settings describe."""
        default = (self.composition, self.density) == (DEFAULT_FORMULA, DEFAULT_DENSITY)
        return Hydrate(self.composition, self.density, self.water_density,
                       "Allen, Thomas & Jennings, Nature Materials 6 (2007) 311" if default
                       else "given by the user")

    def stacking_kwargs(self) -> dict:
        return {k: getattr(self, k) for k in ("angle_tol", "gap_tol", "overlap", "tilt_limit",
                                              "edge_tol")}

    def __repr__(self) -> str:
        changed = {f.name: getattr(self, f.name) for f in dataclasses.fields(self)
                   if getattr(self, f.name) != f.default}
        inner = ", ".join(f"{k}={v!r}" for k, v in changed.items())
        return f"Settings({inner})"


def fields_info() -> list[tuple[str, object, dict]]:
    """``(name, default, metadata)`` of every setting, in declaration order."""
    return [(f.name, f.default, dict(f.metadata)) for f in dataclasses.fields(Settings)]


def _number(name, v) -> float:
    if isinstance(v, (bool, str)) or v is None:
        raise OptionError(f"expected a number, got {v!r}", param=name)
    try:
        return float(v)
    except (TypeError, ValueError, OverflowError):
        raise OptionError(f"expected a number, got {v!r}", param=name) from None


def _whole(name, v) -> int:
    if isinstance(v, (bool, str)) or v is None:
        raise OptionError(f"expected a whole number, got {v!r}", param=name)
    try:
        iv = int(v)
        ok = iv == v
    except (TypeError, ValueError, OverflowError):
        ok = False
    if not ok:
        raise OptionError(f"expected a whole number, got {v!r}", param=name)
    return iv


def parse_size(text) -> int | None:
    """'8G', '500M', '2.5GB', '123456789' or a number of bytes -> bytes (None stays None)."""
    if text is None:
        return None
    if isinstance(text, bool):
        raise OptionError(f"expected a size such as 8G or 500M, got {text!r}", param="max_memory")
    if isinstance(text, (int, float)):
        v = float(text)
    else:
        t = str(text).strip().upper().rstrip("B")
        mult = {"K": 2 ** 10, "M": 2 ** 20, "G": 2 ** 30, "T": 2 ** 40}
        try:
            v = float(t[:-1]) * mult[t[-1]] if t and t[-1] in mult else float(t)
        except (ValueError, OverflowError):
            raise OptionError(f"expected a size such as 8G or 500M, got {text!r}",
                              param="max_memory") from None
    if not (v > 0 and math.isfinite(v)) or v >= 2 ** 63:
        raise OptionError(f"must be a positive size below 8 EiB, got {text!r}", param="max_memory")
    return int(v)


def parse_split(value) -> tuple:
    """Pore-split diameters from ``"5,20"`` or a sequence: increasing positive nm, at most
    ``len(SPLIT_NAMES) - 1`` of them."""
    if value is None:
        return ()
    if isinstance(value, str):
        parts = [x for x in value.split(",") if x.strip()]
    else:
        try:
            parts = list(value)
        except TypeError:
            raise OptionError(f"expected diameters in nm such as 5,20, got {value!r}",
                              param="pore_split") from None
    try:
        split = tuple(float(x) for x in parts)
    except (TypeError, ValueError):
        raise OptionError(f"expected diameters in nm such as 5,20, got {value!r}",
                          param="pore_split") from None
    if (any(not (math.isfinite(x) and x > 0) for x in split)
            or any(b <= a for a, b in zip(split, split[1:]))):
        raise OptionError("diameters must be increasing positive numbers of nm, got "
                          + ",".join(f"{x:g}" for x in split), param="pore_split")
    if len(split) >= len(SPLIT_NAMES):
        raise OptionError(f"at most {len(SPLIT_NAMES) - 1} diameters, got {len(split)}",
                          param="pore_split")
    return split
