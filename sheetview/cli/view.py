"""``sheetview view``, ``render`` and ``slices``: look at a structure in a window, draw it
off-screen, or draw a contact sheet of sections."""
from __future__ import annotations

import click

from pathlib import Path

from ..app.applies import check_option, kind_words
from ..app.run import phase_grid as phase_grid_of
from ..app.settings import Settings
from ..errors import OptionError
from .common import apply_at, at_options, echo_moment, load, read_options
from .conventions import command, force_option, output_option, voxel_option
from ..grid import PhaseGrid
from ..io.output import check_writable
from ..structure import Structure
from ..view import Scene, check_display, export, open_window, parse_size, phase_grid, render as draw, slice_plane
from ..view import contact_sheet

_COLOURINGS = ["stacking", "stack", "order", "director", "wall", "born", "tag"]
_CAMERAS = ["iso", "cut", "+x", "-x", "+y", "-y", "+z", "-z"]


def _plane_options(f):
    opts = [
        click.option("--axis", type=click.Choice(["x", "y", "z"]), default=None,
                     help="Cut at a plane across this axis (position: --at)."),
        click.option("--at", type=float, default=None, metavar="NM",
                     help="Position of the cut: its coordinate along --axis in nm (default: the "
                          "domain's centre)."),
        click.option("--normal", default=None, metavar="X,Y,Z",
                     help="Cut at a plane of any orientation: its normal."),
        click.option("--origin", default=None, metavar="X,Y,Z",
                     help="A point of the plane given by --normal, in nm (default: the "
                          "domain's centre)."),
        voxel_option("Voxel edge in nm of the phase grid shown on the cut and exported "
                     "(default: chosen from the sheet thickness and repeat)."),
        click.option("--colour-by", "colour_by", type=click.Choice(_COLOURINGS),
                     default="stacking", show_default=True,
                     help="What the prism colours show: stacking number, stack, local order, "
                          "angle to the director or to the wall (deg), birth time, tag."),
        click.option("--export", "export_dir", type=click.Path(file_okay=False), default=None,
                     metavar="FOLDER",
                     help="Also write FOLDER/NAME_prisms.vtp (prisms with every per-prism "
                          "array, computed ones included) and FOLDER/NAME_phases.vti (the "
                          "phase grid) for general-purpose viewers."),
    ]
    for o in reversed(opts):
        f = o(f)
    return f


def _check_export(structure, export_dir, force):
    """Check the folder and the files of ``--export`` before anything is written."""
    if export_dir is None:
        return
    folder = Path(export_dir)
    if not folder.is_dir():
        raise OptionError(f"the folder {str(folder)!r} does not exist", param="export_dir")
    stem = Path(structure.source).stem if structure.source else "structure"
    for name in (f"{stem}_prisms.vtp", f"{stem}_phases.vti"):
        check_writable(folder / name, force)


def _structure(file, read_opts, what, at_progress=None, at_time=None, with_moment=False):

    obj = load(file, **read_opts)
    if not isinstance(obj, Structure):
        kind = type(obj).__name__
        hint = ("use `sheetview slices` to look at a voxel volume" if kind == "PhaseGrid"
                else "read it as sheets (--as sheets), or look at its phases with "
                     "`sheetview slices`")
        raise OptionError(f"`sheetview {what}` draws prisms, but this file holds "
                          f"{kind_words(obj)}; {hint}", path=file)
    obj, moment = apply_at(obj, at_progress, at_time)
    echo_moment(moment)
    return (obj, moment) if with_moment else obj


def moment_caption(moment) -> str | None:
    """The moment of growth drawn, in words (None for the whole structure)."""
    if moment is None:
        return None
    return (f"as it stood at {moment.requested}: time {moment.time:g}, progress "
            f"{moment.progress:.3f}, {moment.n_prisms:,} of {moment.n_total:,} prisms")


def _plane(structure, axis, at, normal, origin):
    return slice_plane(structure.domain, axis=axis, at=at, normal=normal, origin=origin)


def _export(structure, export_dir, grid, voxel, force, cache):
    paths = export(structure, export_dir, grid=grid, voxel_size=voxel, force=force, cache=cache)
    for p in paths:
        click.echo(f"wrote {p}", err=True)


@command()
@click.argument("file", metavar="FILE", type=click.Path(dir_okay=False))
@read_options
@_plane_options
@click.option("--step", type=float, default=None, metavar="NM",
              help="Distance in nm the cut moves per key press (default: the repeat).")
@force_option("Overwrite files written by --export.")
@at_options
def view(file, axis, at, normal, origin, voxel, colour_by, export_dir, step, force, at_progress,
         at_time, **read_opts):
    """Open a window on the prisms of FILE, cut by a movable plane showing the phases.

    \b
    Keys:  . ,      move the cut one step forward / back
           n        next colouring
           1 2 3 4  show or hide solid, interlayer, gel pore, outside on the cut
           x y z    turn the cut to face an axis
           h        cut on / off
           o        domain outline on / off
           i        save a picture (NAME_view_001.png, ...)
    Right click on a prism: figures of its stack (layers, extent, orientation).
    Drag the plane's arrow or outline to move or turn the cut.

    Needs a display; without one use `sheetview render` or `sheetview slices`.
    """
    from pathlib import Path


    check_display()
    s = _structure(file, read_opts, "view", at_progress, at_time)
    _check_export(s, export_dir, force)
    plane = _plane(s, axis, at, normal, origin)
    click.echo(f"preparing {len(s):,} prisms (stacking, phase grid) ...", err=True)
    cache = {}
    scene = Scene(s, colour_by=colour_by, voxel_size=voxel, plane=plane, step=step,
                  screenshot_stem=Path(file).stem, cache=cache)
    if export_dir:
        _export(s, export_dir, scene.grid, voxel, force, cache)
    open_window(scene, title=f"sheetview: {Path(file).name}")
    for p in scene.saved:
        click.echo(f"saved {p}", err=True)


@command()
@click.argument("file", metavar="FILE", type=click.Path(dir_okay=False))
@output_option("file", "The picture to write (PNG).", required=True)
@read_options
@_plane_options
@click.option("--camera", type=click.Choice(_CAMERAS), default=None,
              help="Viewpoint: iso, cut (facing the cut), or from a side such as +x or -z "
                   "[default: cut with a cut, iso without].")
@click.option("--size", default="1200", show_default=True, metavar="WIDTHxHEIGHT",
              help="Picture size in pixels, or WIDTH alone: the height then follows the shape "
                   "of the structure seen from the camera.")
@click.option("--flat", is_flag=True,
              help="Unshaded colours (each prism exactly its colormap colour).")
@force_option("Overwrite the picture (and exported files).")
@at_options
def render(file, output, axis, at, normal, origin, voxel, colour_by, export_dir, camera, size,
           flat, force, at_progress, at_time, **read_opts):
    """Draw the prisms of FILE to a PNG without a window (for batch use and documents).

    With --axis/--at or --normal/--origin the prisms are cut at
    that plane and the phases (solid, interlayer, gel pore, outside) are drawn on it.
    """

    check_writable(output, force)
    wh = parse_size(size)
    s, moment = _structure(file, read_opts, "render", at_progress, at_time, with_moment=True)
    _check_export(s, export_dir, force)
    plane = _plane(s, axis, at, normal, origin)
    if voxel is not None:
        check_option(bool(export_dir) or plane is not None, "voxel", "a picture without a cut",
                     "the phase grid drawn on a cut (--axis or --normal) or written by --export")
    cache = {}
    grid = None
    if export_dir or plane is not None:
        grid = phase_grid(s, voxel, cache)
    draw(s, output, colour_by=colour_by, plane=plane, grid=grid, camera=camera, size=wh,
         force=force, lighting=not flat, cache=cache, caption=moment_caption(moment))
    click.echo(f"wrote {output}", err=True)
    if export_dir:
        _export(s, export_dir, grid, voxel, force, cache)


@command()
@click.argument("file", metavar="FILE", type=click.Path(dir_okay=False))
@output_option("file", "The contact sheet to write (PNG).", required=True)
@read_options
@click.option("--axis", type=click.Choice(["x", "y", "z"]), default="z", show_default=True,
              help="Sections across this axis.")
@click.option("--count", type=int, default=9, show_default=True, metavar="N",
              help="Number of sections, evenly spread through the grid.")
@voxel_option()
@force_option("Overwrite the picture.")
def slices(file, output, axis, count, voxel, force, **read_opts):
    """Draw a contact sheet of sections of FILE: the phases voxel layer by voxel layer.

    Prisms are rasterized first (--voxel); voxel volumes are drawn as they are. Each
    panel is labelled with its position in nm; a scale bar and a phase legend are drawn.
    """
    from pathlib import Path


    check_writable(output, force)
    obj = load(file, **read_opts)
    if isinstance(obj, Structure):
        grid = phase_grid(obj, voxel)
    elif isinstance(obj, PhaseGrid):
        if voxel is not None:
            check_option(False, "voxel", obj, "prisms and solid bodies, which are rasterized "
                         "at it (a voxel volume is its own grid; one whose file gives no voxel "
                         "size takes <<voxel_size>>)", path=file)
        grid = obj
    else:
        grid = phase_grid_of(obj, Settings(voxel=voxel))
    contact_sheet(grid, output, axis=axis, count=count, force=force,
                  title=f"{Path(file).name}: sections across {axis}")
    click.echo(f"wrote {output}", err=True)
