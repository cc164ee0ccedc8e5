"""``sheetview kinetics``: growth progress alpha(t), rate and characteristic times from the
``born`` column, and descriptors against progress."""
from __future__ import annotations

import click
import numpy as np

from ..errors import OptionError
from .common import dumps, load, read_options
from .conventions import (command, deprecated_option, force_option, json_option, output_option,
                          quiet_option, voxel_option)
from .sections import legacy_png
from ..app.applies import check_option
from ..app.track import track as track_fn
from ..io.output import atomic_path, check_writable
from ..measures.kinetics import progress
from ..report import atomic_folder, check_folder, write_csv, write_json


def _floats(text, what):
    try:
        vals = [float(x) for x in str(text).split(",") if x.strip()]
    except ValueError:
        raise OptionError(f"expected numbers separated by commas, got {text!r}",
                          param=what) from None
    if not vals:
        raise OptionError("expected at least one number", param=what)
    return vals


@command("kinetics")
@click.argument("path", metavar="FILE", type=click.Path(dir_okay=False))
@click.option("--bins", type=int, default=None, metavar="N",
              help="Time bins of the rate (default about the square root of the number of birth "
                   "times, 10 to 200).")
@click.option("--smooth", type=float, default=2.0, show_default=True, metavar="BINS",
              help="Gaussian smoothing of the rate, in bins (0: none).")
@click.option("--no-fit", is_flag=True, help="Skip the Avrami fit.")
@click.option("--t0", type=float, default=None, metavar="TIME",
              help="Time origin of the Avrami fit, in the unit of the 'born' column (default: "
                   "the first birth).")
@click.option("--track", default=None, metavar="FRACTIONS",
              help="Run measures on the structure as it stood at these progress values "
                   "(fractions in (0, 1], comma separated).")
@click.option("--only", default="stacking,order", show_default=True, metavar="NAMES",
              help="Measures run at each --track progress (names as for measure --only).")
@click.option("--keys", default=None, metavar="WORDS",
              help="Keep only tracked columns whose names contain one of these (comma separated), "
                   "e.g. mean,order_parameter.")
@voxel_option("Voxel edge in nm of the phase grid of grid measures in --track (default as "
              "for `sheetview measure`).")
@output_option("folder", "Write progress.csv (time, alpha), rate.csv, track.csv (with "
                         "--track), kinetics.png and kinetics.json into FOLDER.")
@deprecated_option("--csv", "csv_out", type=click.Path(dir_okay=False), default=None,
                   metavar="FILE", use="-o FOLDER (writes progress.csv)",
                   help="Deprecated: write the progress curve to FILE.")
@deprecated_option("--rate-csv", type=click.Path(dir_okay=False), default=None, metavar="FILE",
                   use="-o FOLDER (writes rate.csv)", help="Deprecated: write the rate to FILE.")
@deprecated_option("--track-csv", type=click.Path(dir_okay=False), default=None, metavar="FILE",
                   use="-o FOLDER (writes track.csv)",
                   help="Deprecated: write the --track table to FILE.")
@json_option()
@force_option()
@quiet_option()
@read_options
def kinetics(path, bins, smooth, no_fit, t0, track, only, keys, voxel, output, csv_out, rate_csv,
             track_csv, as_json, force, quiet, **read_kw):
    """Growth kinetics of a structure from its 'born' column: progress alpha(t) (solid
    volume born by t over the final), the smoothed rate, t10/t50/t90 and an Avrami fit."""
    plot_out = output if legacy_png(output, "kinetics") else None
    folder = None if plot_out is not None else output
    outs = [p for p in (csv_out, rate_csv, track_csv, plot_out) if p]
    if len(set(map(str, outs))) != len(outs):
        raise OptionError("two outputs name the same file", param="output")
    for p in outs:
        check_writable(p, force)
    if folder is not None:
        check_folder(folder, force)
    for name, value in (("track_csv", track_csv), ("keys", keys), ("voxel", voxel)):
        if value is not None:
            check_option(bool(track), name, "a run without --track",
                         "the measures run at the --track progress values")
    if only != "stacking,order":
        check_option(bool(track), "only", "a run without --track",
                     "the measures run at the --track progress values")
    ps = _floats(track, "track") if track else []
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
    track_cols = None if table is None else {
        k: np.asarray([np.nan if v is None else v for v in vals], float)
        for k, vals in table.items()}
    if csv_out:
        write_csv(csv_out, kin.table(), force=force)
    if rate_csv:
        write_csv(rate_csv, kin.rate_table(), force=force)
    if track_csv:
        write_csv(track_csv, track_cols, force=force)
    if plot_out:
        _plot(kin, plot_out, force, str(path))
    if folder is not None:
        with atomic_folder(folder, force, kind="kinetics") as (tmp, final):
            write_csv(tmp / "progress.csv", kin.table())
            write_csv(tmp / "rate.csv", kin.rate_table())
            if track_cols is not None:
                write_csv(tmp / "track.csv", track_cols)
            _plot(kin, tmp / "kinetics.png", False, str(path))
            write_json(tmp / "kinetics.json", doc)
        outs.append(f"{folder}/")
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
