"""``sheetview beside A B [C...]``: several structures through the same definitions, side by
side (a headline table with differences, curves on shared axes, optional measured curves)."""
from __future__ import annotations

import click

from ..app.sidebyside import DEFAULT_ONLY, profiles_of, side_by_side
from ..app.document import dumps
from ..errors import OptionError
from ..report import check_folder, write_comparison
from .common import StageProgress, read_kwargs, read_options
from .conventions import command, force_option, json_option, output_option, quiet_option
from .measure import SETTINGS, measure_options, measure_settings


@command("beside")
@click.argument("inputs", nargs=-1, required=True,
                type=click.Path(exists=True, dir_okay=True), metavar="STRUCTURE_OR_REPORT...")
@click.option("--labels", default=None, metavar="NAMES",
              help="Comma-separated names of the structures in tables and legends "
                   "(default: the file or folder names).")
@click.option("--only", default=None, metavar="NAMES",
              help=f"Measures to run on the structures measured here (default: "
                   f"{DEFAULT_ONLY}; report folders are read as they are).")
@click.option("--measured-scattering", type=click.Path(exists=True, dir_okay=False),
              default=None, metavar="FILE",
              help="A measured scattering curve (q, I[, sigma]) to fit every structure to, "
                   "as `scatter --compare` does.")
@click.option("--q-unit", type=click.Choice(["nm", "A"]), default=None,
              help="Unit of q in --measured-scattering when its header does not say "
                   "(nm: nm^-1, A: 1/angstrom).")
@click.option("--measured-t2", type=click.Path(exists=True, dir_okay=False), default=None,
              metavar="FILE",
              help="A measured T2 distribution (T2, amplitude) to compare every structure "
                   "with, as `relax --compare` does.")
@click.option("--t2-unit", type=click.Choice(["s", "ms", "us"]), default=None,
              help="Unit of T2 in --measured-t2 when its header does not say.")
@output_option("folder", "Write a comparison folder: comparison.json, headline.csv, "
               "curve_*.csv, side_by_side.png.", dest="outdir")
@json_option("Print only the comparison as JSON on stdout.")
@force_option("Write into an existing non-empty folder.")
@click.option("--no-plots", is_flag=True, help="With -o: tables only, no figure.")
@quiet_option("No progress messages on stderr.")
@measure_options
@read_options
def beside(inputs, labels, only, measured_scattering, q_unit, measured_t2, t2_unit, outdir,
           as_json, force, no_plots, quiet, **kw):
    """Put two or more structures side by side: each STRUCTURE (any format sheetview reads)
    is measured here with the same settings and voxel (without --voxel, the first input's
    voxel serves for all); a REPORT folder written by `measure -o` is read as it is.

    Prints a table of the headline numbers with the difference and the ratio of each to
    the first (the reference); -o writes it with the curves of every structure on shared
    axes (stacking numbers, pore sizes, chords, S2, I(q), T2). Settings that differ between
    report folders are listed: those numbers do not share one definition.
    """
    opts = {k: kw.pop(k) for k in SETTINGS}
    settings = measure_settings(**opts, spacing=kw.get("spacing"))
    if outdir is not None:
        check_folder(outdir, force)
    if len(inputs) < 2:
        raise OptionError(f"give at least two structures or report folders, got "
                          f"{len(inputs)}", param="inputs")
    progress = None if (quiet or as_json) else StageProgress()
    profiles = profiles_of(inputs, labels=labels, only=only, settings=settings,
                           progress=progress, read_options=read_kwargs(kw))
    cmp_ = side_by_side(profiles, measured_scattering=measured_scattering,
                        measured_t2=measured_t2, q_unit=q_unit, t2_unit=t2_unit)
    if outdir is not None:
        write_comparison(outdir, cmp_, force=force, plots=not no_plots,
                         protect=[p.source for p in profiles if p.source])
    if as_json:
        click.echo(dumps(cmp_.to_dict()))
        return
    _print(cmp_)
    if outdir is not None:
        click.echo(f"  comparison written to {outdir}")


def _print(cmp_):
    labs = cmp_.labels
    ref = labs[0]
    click.echo(f"{len(labs)} structures; reference {ref}")
    width = max(len(r["quantity"]) + len(r["unit"]) + 3 for r in cmp_.rows) if cmp_.rows else 10
    head = f"  {'quantity [unit]':<{width}}" + "".join(f"{lab[:14]:>15}" for lab in labs)
    click.echo(head + "".join(f"{('/ ' + ref)[:14]:>15}" for _ in labs[1:]))
    for r in cmp_.rows:
        name = f"{r['quantity']} [{r['unit']}]"
        vals = "".join(f"{_num(r.get(lab)):>15}" for lab in labs)
        ratios = "".join(f"{_num(r.get(f'{lab} / {ref}')):>15}" for lab in labs[1:])
        click.echo(f"  {name:<{width}}{vals}{ratios}")
    for k, v in cmp_.settings_differ.items():
        click.echo(f"  note: setting {k} differs: " + ", ".join(f"{a} {b}" for a, b in v.items()))
    for name, m in cmp_.measured.items():
        for lab, fit in m["fits"].items():
            if name == "scattering":
                click.echo(f"  {lab} against {m['file']}: scale {_num(fit['scale'])}, "
                           f"reduced chi2 {_num(fit['chi2_reduced'])}")
            else:
                click.echo(f"  {lab} against {m['file']}: T2 overlap {_num(fit['overlap'])}, "
                           f"shift {_num(fit['shift_decades'])} decades")


def _num(v) -> str:
    if v is None:
        return "-"
    if isinstance(v, float):
        return f"{v:.4g}"
    return str(v)
