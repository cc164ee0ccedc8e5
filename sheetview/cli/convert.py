"""``sheetview convert IN OUT``: between prism tables, VTK for general viewers, volumes."""
from __future__ import annotations

import click

from .common import load, read_options
from ..io import write


@click.command()
@click.argument("source", type=click.Path(dir_okay=False))
@click.argument("target", type=click.Path(dir_okay=False))
@read_options
@click.option("--force", is_flag=True, help="Overwrite TARGET if it exists.")
def convert(source, target, force, **read_opts):
    """Convert SOURCE to TARGET, the format chosen by TARGET's suffix.

    \b
    prisms  -> .csv .npz .parquet (native table), .vtp .vtk (closed prisms with
               every per-prism array, for general-purpose viewers)
    volumes -> .vti .npy .tif
    solid bodies -> .stl .ply .obj .off .vtp
    """

    obj = load(source, **read_opts)
    write(obj, target, force=force)
    click.echo(f"wrote {target}", err=True)
