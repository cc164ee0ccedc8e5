"""The conventions of the command line (docs/cli-conventions.md) in one place.

* :class:`Command`: every command's class. It turns the deprecated spellings of
  :data:`ALIASES` into the current ones (with one warning line on stderr) before click
  parses the arguments.
* The shared options (:func:`output_option`, :func:`json_option`, :func:`force_option`,
  :func:`quiet_option`, :func:`voxel_option`, :func:`max_memory_option`, :func:`lines_option`,
  :func:`seed_option`): same name, metavar, unit and meaning wherever they appear.
* :data:`METAVARS`: the metavars an option may show (the test of every ``--help`` checks
  them), with the unit each one implies (:data:`UNIT_OF`).
"""
from __future__ import annotations

import click

#: Deprecated spellings -> current ones, kept for one release (see CHANGELOG.md). An alias
#: applies to a command that has the current option.
ALIASES = {
    "--voxel-size": "--volume-voxel",
    "--spacing": "--repeat",
    "--pixel-size": "--pixel",
    "--solid-formula": "--composition",
    "--solid-density": "--density",
    "--slice-axis": "--axis",
    "--slice-at": "--at",
    "--slice-normal": "--normal",
    "--slice-origin": "--origin",
}

#: Metavars of the command line, with what they stand for (docs/cli-conventions.md).
METAVARS = {
    "NM": "a length in nanometres",
    "NM,NM": "lengths in nanometres, comma separated",
    "DEG": "an angle in degrees",
    "FRACTION": "a fraction between 0 and 1",
    "FRACTIONS": "fractions between 0 and 1, comma separated",
    "N": "a whole number (a count, a seed)",
    "NUMBER": "a plain number without unit",
    "SIZE": "an amount of memory: bytes, or with K, M, G, T (8G)",
    "G/CM3": "a density in g/cm3",
    "S": "a time in seconds",
    "NM/US": "a surface relaxivity in nm per microsecond",
    "TIME": "a time in the unit of the file's 'born' column",
    "BINS": "a width in histogram bins",
    "X,Y,Z": "three numbers: a direction, or a point in nm",
    "X0,Y0,X1,Y1": "a rectangle of an image in pixels",
    "US": "a time in microseconds",
    "CLASS=NM2/US,...": "a diffusivity in nm^2/us per water class",
    "LX,LY,LZ": "three lengths in nm",
    "NX,NY,NZ": "three whole numbers of voxels",
    "QMIN:QMAX": "a range of q in nm^-1",
    "WIDTHxHEIGHT": "a picture size in pixels",
    "FILE": "a file",
    "FOLDER": "a folder",
    "NAMES": "names, comma separated",
    "WORDS": "words, comma separated",
    "COLUMN": "a column name",
    "COLUMNS": "column numbers or names, comma separated",
    "UNIT": "a unit name",
    "FORMULA": "a chemical formula",
    "FLUID": "a pore fluid: h2o, d2o or a D2O fraction",
    "SPEC": "a distribution: fixed:V, uniform:A,B, ...",
    "ADDRESS": "a network address",
    "DTYPE": "a numpy dtype",
    "V=PHASE,...": "file values mapped to phases",
    "otsu|VALUE": "Otsu's threshold or a value",
}
#: The unit a metavar implies: an option showing it says the unit in its help.
UNIT_OF = {"NM": "nm", "NM,NM": "nm", "DEG": "deg", "G/CM3": "g/cm3", "S": " s", "US": "us",
           "CLASS=NM2/US,...": "nm^2/us",
           "NM/US": "nm/us", "LX,LY,LZ": "nm", "QMIN:QMAX": "nm^-1"}


def warn(message: str) -> None:
    """One warning line on stderr: ``sheetview: warning: ...``."""
    click.echo(f"sheetview: warning: {message}", err=True)


def rewrite_aliases(args: list[str], known: set[str], extra: dict | None = None) -> list[str]:
    """``args`` with every deprecated spelling (:data:`ALIASES`, and ``extra``) whose
    current spelling is among ``known`` replaced by it, warning once per spelling. Nothing
    after ``--`` is touched."""
    table = {**ALIASES, **(extra or {})}
    out, warned = [], set()
    for i, a in enumerate(args):
        if a == "--":
            out.extend(args[i:])
            break
        name, eq, value = a.partition("=")
        new = table.get(name)
        if new is not None and new in known:
            if name not in warned:
                warn(f"{name} is deprecated, use {new}")
                warned.add(name)
            a = new + eq + value
        out.append(a)
    return out


class Command(click.Command):
    """A sheetview command: deprecated spellings are rewritten before parsing
    (:func:`rewrite_aliases`); ``aliases`` adds command-specific ones."""

    def __init__(self, *args, aliases: dict | None = None, **kwargs):
        super().__init__(*args, **kwargs)
        self.aliases = dict(aliases or {})

    def parse_args(self, ctx, args):
        known = {o for p in self.params if isinstance(p, click.Option)
                 for o in (*p.opts, *p.secondary_opts)}
        return super().parse_args(ctx, rewrite_aliases(list(args), known, self.aliases))


def command(name=None, **kwargs):
    """``click.command`` with :class:`Command`."""
    return click.command(name, cls=Command, **kwargs)


def given(ctx, name: str) -> bool:
    """Whether the option ``name`` was given on the command line (not a default)."""
    src = ctx.get_parameter_source(name)
    return src is not None and src.name in ("COMMANDLINE", "ENVIRONMENT")


def deprecated_option(*decls, use: str, **kwargs):
    """A hidden option kept for one release; using it prints ``sheetview: warning: X is
    deprecated, use ...``."""
    def callback(ctx, param, value):
        if given(ctx, param.name):
            warn(f"{param.opts[0]} is deprecated, use {use}")
        return value
    return click.option(*decls, hidden=True, callback=callback, expose_value=True, **kwargs)


# ------------------------------------------------------------------ the shared options
def output_option(kind: str, help: str, *, required: bool = False, dest: str = "output"):
    """``-o, --output``: a FOLDER for commands that write several files (assembled under a
    temporary name and renamed when complete), the FILE of a command whose result is one
    file."""
    if kind not in ("folder", "file"):
        raise ValueError(kind)
    kw = {} if required else {"default": None}  # an explicit default satisfies `required`
    return click.option("-o", "--output", dest, metavar=kind.upper(), required=required,
                        type=click.Path(), help=help, **kw)


def json_option(help: str = "Print the result document as JSON on stdout (nothing else "
                            "goes to stdout)."):
    return click.option("--json", "as_json", is_flag=True, help=help)


def force_option(help: str = "Overwrite existing outputs (with -o FOLDER: write into an "
                             "existing folder)."):
    return click.option("--force", is_flag=True, help=help)


def quiet_option(help: str = "Print nothing but errors (and the JSON of --json)."):
    return click.option("-q", "--quiet", is_flag=True, help=help)


VOXEL_HELP = ("Voxel edge of the phase grid in nm, for prisms and solid bodies (default "
              "from the structure, as for `sheetview measure`).")


def voxel_option(help: str = VOXEL_HELP):
    return click.option("--voxel", type=float, default=None, metavar="NM", help=help)


def max_memory_option(help: str = "Largest memory the phase grid may use, e.g. 8G "
                                  "(default: half the available memory)."):
    return click.option("--max-memory", default=None, metavar="SIZE", help=help)


def lines_option(default: int, help: str):
    return click.option("--lines", type=int, default=default, show_default=True, metavar="N",
                        help=help)


def seed_option(help: str = "Seed of the random lines."):
    return click.option("--seed", type=int, default=0, show_default=True, metavar="N",
                        help=help)
