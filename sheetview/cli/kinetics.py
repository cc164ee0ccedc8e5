"""``sheetview kinetics``: growth progress alpha(t), rate and characteristic times from the
``born`` column, and descriptors against progress."""
from __future__ import annotations

import click
import numpy as np

from ..errors import OptionError
from .common import dumps, load, read_options
from ..app.track import track as track_fn
from ..io.output import atomic_path, check_writable
from ..measures.kinetics import progress
from ..report import write_csv


def _floats(text, what):
    try:
        vals = [float(x) for x in str(text).split(",") if x.strip()]
    except ValueError:
        raise OptionError(f"{what}: expected numbers separated by commas, got {text!r}") from None
    if not vals:
        raise OptionError(f"{what}: expected at least one number")
    return vals


@click.command("kinetics")
@click.argument("path", type=click.Path(dir_okay=False))
@click.option("--bins", type=int, default=None,
              help="Time bins of the rate (default about the square root of the number of birth "
                   "times, 10 to 200).")
@click.option("--smooth", type=float, default=2.0, show_default=True,
              help="Gaussian smoothing of the rate, in bins (0: none).")
@click.option("--no-fit", is_flag=True, help="Skip the Avrami fit.")
@click.option("--t0", type=float, default=None, help="Time origin of the Avrami fit (default: "
                                                       "the first birth).")
@click.option("--track", default=None, metavar="P1,P2,...",
              help="Run measures on the structure as it stood at these progress values.")
@click.option("--only", default="stacking,order", show_default=True,
              help="Measures run at each --track progress (names as for measure --only).")
@click.option("--keys", default=None,
              help="Keep only tracked columns whose names contain one of these (comma separated), "
                   "e.g. mean,order_parameter.")
@click.option("--voxel", type=float, default=None, help="Voxel edge (nm) of grid measures in --track.")
@click.option("--csv", "csv_out", type=click.Path(dir_okay=False), default=None,
              help="Write the progress curve: columns time, alpha.")
@click.option("--rate-csv", type=click.Path(dir_okay=False), default=None,
              help="Write the rate: columns time, rate_per_time, rate_raw_per_time.")
@click.option("--track-csv", type=click.Path(dir_okay=False), default=None,
              help="Write the --track table.")
@click.option("-o", "--output", "plot_out", type=click.Path(dir_okay=False), default=None,
              help="Plot of alpha(t) and the rate (PNG).")
@click.option("--json", "as_json", is_flag=True, help="Print the result as JSON on stdout.")
@click.option("--force", is_flag=True, help="Overwrite existing outputs.")
@click.option("-q", "--quiet", is_flag=True, help="Print nothing but errors (and --json).")
@read_options
def kinetics(path, bins, smooth, no_fit, t0, track, only, keys, voxel, csv_out, rate_csv,
             track_csv, plot_out, as_json, force, quiet, **read_kw):
    """Growth kinetics of a structure from its 'born' column: progress alpha(t) (solid
    volume born by t over the final), the smoothed rate, t10/t50/t90 and an Avrami fit."""
    outs = [p for p in (csv_out, rate_csv, track_csv, plot_out) if p]
    if len(set(map(str, outs))) != len(outs):
        raise OptionError("two outputs name the same file")
    for p in outs:
        check_writable(p, force)
    if track_csv and not track:
        raise OptionError("--track-csv needs --track")
    ps = _floats(track, "--track") if track else []
    obj = load(path, **read_kw)
    kin = progress(obj, bins=bins, smooth=smooth, avrami=not no_fit, t0=t0)
    doc = {"file": str(path), **kin.to_dict()}
    table = None
    if ps:
        keylist = [k.strip() for k in keys.split(",")] if keys else None
        cb = None if (quiet or as_json) else (
            lambda p, m: click.echo(f"  progress {p:g}: time {m.time:g}, {m.n_prisms} prisms", err=True))
        table = track_fn(obj, ps, only=only, settings={"voxel": voxel}, keys=keylist, progress_cb=cb)
        doc["track"] = table
    if csv_out:
        write_csv(csv_out, kin.table(), force=force)
    if rate_csv:
        write_csv(rate_csv, kin.rate_table(), force=force)
    if track_csv:
        write_csv(track_csv, {k: np.asarray([np.nan if v is None else v for v in vals], float)
                                 for k, vals in table.items()}, force=force)
    if plot_out:
        _plot(kin, plot_out, force, str(path))
    if as_json:
        click.echo(dumps(doc))
    elif not quiet:
        u = f" {kin.unit}" if kin.unit else ""
        click.echo(f"{path}: {kin.n_prisms} prisms born from {kin.times[0]:g} to {kin.times[-1]:g}{u}")
        click.echo("  " + ", ".join(f"{k} = {v:g}{u}" for k, v in kin.marks.items()))
        if kin.avrami is not None:
            a = kin.avrami
            click.echo(f"  Avrami: n = {a.n:.3g}, k = {a.k:.4g} per time{u and ' unit'}, "
                       f"R^2 = {a.r2:.4f} ({a.n_points} points)")
        if table is not None:
            cols = list(table)
            click.echo("  " + "  ".join(cols))
            for i in range(len(table[cols[0]])):
                click.echo("  " + "  ".join(_cell(table[c][i]) for c in cols))
        for p in outs:
            click.echo(f"  wrote {p}")


def _cell(v):
    if v is None:
        return "-"
    return f"{v:.4g}" if isinstance(v, float) else str(v)


def _plot(kin, path, force, title):
    from ..figures import plot_kinetics

    fig = plot_kinetics(kin, title=title)
    with atomic_path(path, force) as tmp:
        fig.savefig(str(tmp), format="png", dpi=110)


COMMANDS = [kinetics]
