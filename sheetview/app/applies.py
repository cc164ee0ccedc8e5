"""Which option acts on which input: one rule for every command.

An option that cannot act on the input it is given with is refused before any work, with
a message of one form: ``--X does not apply to <the input>; it applies to <what it
applies to>`` (naming, where there is one, the option that does the job for this input).
Nothing is silently ignored. Parameters are named as the Python API names them and written
``<<name>>`` in the message, so that the command line shows its options
(:meth:`sheetview.errors.SheetviewError.format`).

Examples
--------
>>> from sheetview.app.applies import not_applicable
>>> str(not_applicable("voxel", "a voxel volume", "prisms and solid bodies"))
'voxel does not apply to a voxel volume; it applies to prisms and solid bodies'
"""
from __future__ import annotations

import dataclasses

from ..errors import OptionError
from ..grid import PhaseGrid
from ..particles import ParticleSet
from ..structure import Structure, SurfaceBody
from .settings import Settings

#: The words for an input in messages, by its type.
KIND_WORDS = {Structure: "prisms", SurfaceBody: "a solid body (a closed mesh)",
              PhaseGrid: "a voxel volume", ParticleSet: "a particle packing"}


def kind_words(obj) -> str:
    """How a message speaks of ``obj`` (no class names)."""
    for cls, words in KIND_WORDS.items():
        if isinstance(obj, cls):
            if cls is Structure or cls is PhaseGrid:
                return ("a periodic box of " + words if _periodic(obj) else words)
            return words
    return "this input"


def not_applicable(param: str, what: str, applies: str, *, path=None) -> OptionError:
    """The one refusal: ``<<param>> does not apply to {what}; it applies to {applies}``."""
    return OptionError(f"<<{param}>> does not apply to {what}; it applies to {applies}",
                       param=param, path=path)


def _periodic(obj) -> bool:
    if isinstance(obj, PhaseGrid):
        return bool(obj.periodic)
    dom = getattr(obj, "domain", None)
    return bool(getattr(dom, "periodic", False))


_PRISMS = "prisms (a prism table, or a mesh read as sheets)"

#: Settings (by name, or by their group) that act on some inputs only:
#: ``(acts_on(obj) -> bool, what they apply to)``.
SETTING_RULES = {
    "stacking": (lambda o: isinstance(o, Structure), _PRISMS),
    "order": (lambda o: isinstance(o, Structure), _PRISMS),
    "voxel": (lambda o: not isinstance(o, PhaseGrid),
              "prisms and solid bodies, which are rasterized at it (a voxel volume is measured "
              "at its own voxel; one whose file gives none takes <<voxel_size>>)"),
    "intrusion": (lambda o: not _periodic(o),
                  "inputs with a boundary for the intrusion to enter from (a periodic box has "
                  "none; its local-thickness pore sizes are measured without it)"),
}


def check_settings(obj, settings: Settings, *, path=None) -> None:
    """Refuse a setting that differs from its default but cannot act on ``obj``
    (:data:`SETTING_RULES`); a setting left at its default is never refused."""
    for f in dataclasses.fields(Settings):
        value = getattr(settings, f.name)
        default = f.default
        if value == default or (f.name == "pore_split" and not value):
            continue
        rule = SETTING_RULES.get(f.name) or SETTING_RULES.get(f.metadata.get("group"))
        if rule is not None and not rule[0](obj):
            raise not_applicable(f.name, kind_words(obj), rule[1], path=path)
        if f.name == "pore_method" and value == "exact" and not isinstance(
                obj, (Structure, SurfaceBody)):
            raise not_applicable("pore_method", f"{kind_words(obj)} as 'exact'",
                                 "prisms and meshes as 'exact' (their exact geometry), and to "
                                 "every input as 'centres' or 'subvoxel'", path=path)


def check_option(acts: bool, param: str, obj_or_what, applies: str, *, path=None) -> None:
    """Refuse ``param`` unless ``acts`` (the one rule, for options outside the settings);
    ``obj_or_what`` is the input (described by :func:`kind_words`) or the words for it."""
    if not acts:
        what = obj_or_what if isinstance(obj_or_what, str) else kind_words(obj_or_what)
        raise not_applicable(param, what, applies, path=path)
