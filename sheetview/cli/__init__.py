"""The ``sheetview`` command line: thin click commands over the library.

Each command lives in its own module here and is registered below. Errors the user can
cause (:class:`~sheetview.errors.SheetviewError`) are printed as one line on stderr and
the command exits with status 2, without a traceback.
"""
from __future__ import annotations

import os
import re
import signal
import sys
import warnings

import click

from .._version import __version__
from ..errors import SheetviewError
from .conventions import ALIASES
from .convert import convert
from .info import info
from .view import render, slices, view


def option_names(command) -> dict:
    """Parameter name -> the option that sets it (its first long form, ``--voxel``), for
    the parameters of a click command: how an error's parameter is shown to the user."""
    out = {}
    for p in getattr(command, "params", []):
        if isinstance(p, click.Option):
            longs = [o for o in p.opts if o.startswith("--")] or list(p.opts)
            out[p.name] = longs[0]
        elif isinstance(p, click.Argument):
            out[p.name] = p.human_readable_name
    return out


def _option_style(p: str) -> str:
    return "--" + p.rstrip("_").replace("_", "-")


#: ``field`` values the measures give for a setting (not a column of a file): the setting.
_FIELD_SETTINGS = {"voxel_size": "voxel", "pixel_size": "pixel_size"}


def shown_error(e: SheetviewError, command=None) -> str:
    """The one line the command line prints for ``e``: parameters shown as the options of
    ``command`` (:func:`option_names`); a parameter the command has no option for is shown
    in option style (``--max-memory``). An error whose ``field`` is one of the command's
    parameters (and names no file) is about that option and shown as such."""
    names = option_names(command)
    if e.param is None and e.field in _FIELD_SETTINGS:  # the grid's voxel, not a file column
        e.param, e.field = _FIELD_SETTINGS[e.field], None
    if e.param is None and e.path is None and e.field in names:
        e.param, e.field = e.field, None
    current = set(names.values())
    for old, new in ALIASES.items():  # a message written with a deprecated spelling
        if new in current:
            e.detail = re.sub(rf"(?<![\w-]){re.escape(old)}(?![\w-])", new, e.detail)
    return e.format(lambda p: names.get(p) or _option_style(p))


def _sigterm(signum, frame):
    """SIGTERM ends a run like Ctrl-C: temporary folders are removed on the way out."""
    raise KeyboardInterrupt


def _show_warning(message, category, filename, lineno, file=None, line=None):
    """Warnings meant for the user (sheetview's own) as one ``sheetview: warning:`` line;
    library warnings are not shown."""
    if category.__module__.startswith("sheetview"):
        click.echo(f"sheetview: warning: {message}", err=True)


class _Group(click.Group):
    def main(self, *args, **kwargs):
        kwargs.pop("standalone_mode", None)
        try:
            return super().main(*args, standalone_mode=False, **kwargs)
        except click.exceptions.Exit as e:
            sys.exit(e.exit_code)
        except click.exceptions.Abort:
            click.echo("sheetview: interrupted", err=True)
            sys.exit(130)
        except click.ClickException as e:
            _usage_error(e)
        except SheetviewError as e:
            click.echo(f"sheetview: error: {shown_error(e)}", err=True)
            sys.exit(e.exit_code)

    def invoke(self, ctx):
        try:
            signal.signal(signal.SIGTERM, _sigterm)
        except ValueError:  # not the main thread (a test runner's worker)
            pass
        warnings.showwarning = _show_warning
        try:
            return super().invoke(ctx)
        except SheetviewError as e:
            cmd = self.get_command(ctx, ctx.invoked_subcommand) if ctx.invoked_subcommand else None
            click.echo(f"sheetview: error: {shown_error(e, cmd)}", err=True)
            sys.exit(e.exit_code)
        except click.ClickException as e:
            _usage_error(e)
        except MemoryError:
            click.echo("sheetview: error: out of memory; use a coarser voxel size (--voxel) or "
                       "a lower --max-memory", err=True)
            sys.exit(2)
        except KeyboardInterrupt:
            click.echo("sheetview: interrupted", err=True)
            sys.exit(130)


def _usage_error(e: click.ClickException):
    """A usage error of click (unknown option, bad value, missing argument) in the same
    one-line form as every other error, with where to look. The program called without a
    command prints its help (on stderr, status 2)."""
    if type(e).__name__ == "NoArgsIsHelpError":
        click.echo(e.format_message(), err=True)
        sys.exit(2)
    msg = " ".join(e.format_message().split())
    ctx = getattr(e, "ctx", None)
    hint = f" (see `{ctx.command_path} --help`)" if ctx is not None else ""
    click.echo(f"sheetview: error: {msg}{hint}", err=True)
    sys.exit(e.exit_code if e.exit_code else 2)


@click.group(cls=_Group, context_settings={"help_option_names": ["-h", "--help"],
                                           "max_content_width": 100})
@click.version_option(__version__, "-V", "--version", prog_name="sheetview")
def main():
    """sheetview: look inside simulated cement-hydrate sheet structures and measure them.

    Reads prism tables (CSV, NPZ, Parquet), triangle meshes (STL, PLY, OBJ, OFF, GLB, VTK)
    and voxel volumes (TIFF, NPY, raw, VTI). Lengths are nanometres throughout.
    Run `sheetview COMMAND --help` for each command.
    """


#: Command modules registered when present; each defines its commands and a list
#: ``COMMANDS`` (or a command named like the module).
_MODULES = ("synth", "measure", "batch", "experiment", "sections", "micrograph", "kinetics",
            "beside", "waterwalk")


def _register():
    for cmd in (info, convert, view, render, slices):
        main.add_command(cmd)
    for modname in _MODULES:
        try:
            mod = __import__(f"{__name__}.{modname}", fromlist=["COMMANDS"])
        except ModuleNotFoundError as e:
            if e.name != f"{__name__}.{modname}":
                raise
            continue
        for cmd in getattr(mod, "COMMANDS", None) or [getattr(mod, modname)]:
            main.add_command(cmd)


_register()


def run() -> None:
    """The ``sheetview`` program: :data:`main`, then the process ends at once with its exit
    status once the output is flushed. (A library's worker threads still alive at
    interpreter exit, such as Apache Arrow's pool, can otherwise abort the process with
    status 134 after a run that succeeded.)"""
    try:
        code = main.main(standalone_mode=False)
        code = 0 if code is None else int(code)
    except SystemExit as e:
        code = e.code if isinstance(e.code, int) else (0 if e.code is None else 1)
    except click.ClickException as e:
        e.show()
        code = e.exit_code
    except click.exceptions.Abort:
        click.echo("sheetview: interrupted", err=True)
        code = 130
    sys.stdout.flush()
    sys.stderr.flush()
    os._exit(code)
