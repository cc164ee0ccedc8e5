"""``sheetview convert SOURCE TARGET``: between prism tables, VTK for general viewers,
volumes, and the phase grid of a structure."""
from __future__ import annotations

from pathlib import Path

import click

from ..app.applies import check_option
from ..app.run import phase_grid
from ..app.settings import Settings
from ..grid import PhaseGrid
from ..io import VOLUME_SUFFIXES, write
from .common import load, read_options
from .conventions import command, force_option, max_memory_option, voxel_option


@command()
@click.argument("source", metavar="SOURCE", type=click.Path(dir_okay=False))
@click.argument("target", metavar="TARGET", type=click.Path(dir_okay=False))
@read_options
@voxel_option("Voxel edge in nm of the phase grid written when prisms or a solid body go "
              "to a volume (.tif, .vti, .npy); default as for `sheetview measure`.")
@max_memory_option()
@force_option("Overwrite TARGET if it exists.")
def convert(source, target, voxel, max_memory, force, **read_opts):
    """Convert SOURCE to TARGET, the format chosen by TARGET's suffix.

    \b
    prisms       -> .csv .npz .parquet (native table), .vtp .vtk (closed prisms
                    with every per-prism array), .vtu (prisms as wedge cells of
                    exact volume), or a volume (.tif .vti .npy): their phase grid
                    (solid, interlayer, gel pore, outside) at --voxel
    volumes      -> .vti .npy .tif
    solid bodies -> .stl .ply .obj .off .vtp .vtk, or a volume: its phase grid
    """
    obj = load(source, **read_opts)
    to_volume = Path(target).suffix.lower() in VOLUME_SUFFIXES
    for name, value in (("voxel", voxel), ("max_memory", max_memory)):
        if value is not None:
            check_option(to_volume and not isinstance(obj, PhaseGrid), name,
                         "a volume" if isinstance(obj, PhaseGrid) else
                         f"a {Path(target).suffix or 'target without suffix'} target",
                         "prisms or a solid body written to a volume (.tif, .vti, .npy): the "
                         "phase grid is made at it", path=source)
    if to_volume and not isinstance(obj, PhaseGrid):
        obj = phase_grid(obj, Settings(voxel=voxel, max_memory=max_memory))
    write(obj, target, force=force)
    click.echo(f"wrote {target}", err=True)
