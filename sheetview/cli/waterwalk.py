"""``sheetview waterwalk FILE``: random walkers in the water of a structure: the magnetisation
decay and T2 spectrum beyond fast exchange, the class-to-class exchange, and (``--transport``)
the effective diffusivity, with parameters of its own (relaxivities, diffusivities, time)."""
from __future__ import annotations

import click

from ..app.document import file_document
from ..app.run import Run
from ..app.settings import Settings
from ..errors import OptionError
from ..report import check_folder, write_report
from .common import StageProgress, at_options, dumps, echo_moment, load_input, read_options
from .conventions import command, force_option, json_option, output_option, quiet_option

#: What the numbers are (printed and kept in the JSON).
CAUTION = ("predictions for the simulated structure with the stated relaxivities and "
           "diffusivities, not measurements")


def _diffusivities(text):
    """``interlayer=50,gel=2299`` -> {class: nm^2/us}."""
    if not text:
        return None
    out = {}
    for part in text.split(","):
        name, sep, val = part.partition("=")
        try:
            d = float(val)
        except ValueError:
            d = float("nan")
        if not sep or not name.strip() or not d > 0:
            raise OptionError(f"expected CLASS=NM2_PER_US pairs such as interlayer=50,gel=2299 "
                              f"(positive numbers), got {part!r}", param="diffusivity")
        out[name.strip()] = d
    return out


@command("waterwalk")
@click.argument("file", metavar="FILE", type=click.Path(dir_okay=False))
@click.option("--voxel", type=float, default=None, metavar="NM",
              help="Voxel edge of the phase grid in nm (default from the structure).")
@click.option("--pore-split", default=None, metavar="NM,NM",
              help="Split the gel pores by local thickness at these diameters (nm) into size "
                   "classes, each then a class of its own for exchange, e.g. 5,20.")
@click.option("--max-memory", default=None, metavar="SIZE",
              help="Largest memory the grid and the walkers may use, e.g. 8G (default: half "
                   "the available memory).")
@click.option("--n-walkers", type=int, default=None, metavar="N",
              help="Walkers (default 20,000; 10,000 for --transport).")
@click.option("--seed", type=int, default=0, show_default=True, metavar="N",
              help="Seed of the walkers (a seed repeats a run exactly).")
@click.option("--rho2", type=float, default=None, metavar="NM/US",
              help="Surface relaxivity of every water-solid interface in nm/us (default "
                   "3.7e-3 as `relax`; published values for cement pastes span about 1e-3 to "
                   "1e-2 nm/us).")
@click.option("--rho2-wall", type=float, default=None, metavar="NM/US",
              help="Relaxivity of the domain wall in nm/us (default: as --rho2; 0 makes it a "
                   "mirror).")
@click.option("--t2-bulk", type=float, default=None, metavar="S",
              help="Bulk water T2 in s (default 2.5); 0 switches the bulk term off.")
@click.option("--diffusivity", default=None, metavar="CLASS=NM2/US,...",
              help="Diffusivity per water class in nm^2/us, e.g. interlayer=50 (default: bulk "
                   "water, 2299 nm^2/us at 25 C, for every class).")
@click.option("--t-max", type=float, default=None, metavar="US",
              help="Stop the relaxation walk at this time in us (default: when M(t) < 1 %).")
@click.option("--transport", is_flag=True,
              help="Also the transport walk (no relaxation): MSD, effective diffusivity, "
                   "tortuosity and formation factor.")
@output_option("folder", "Write a report folder: summary.json, CSV tables (M(t), T2 "
               "spectrum, exchange, MSD) and PNG figures.", dest="outdir")
@json_option("Print only the JSON summary on stdout (progress goes to stderr).")
@force_option("Write into an existing non-empty folder.")
@click.option("--no-plots", is_flag=True, help="With -o: tables only, no figures.")
@quiet_option("No progress messages on stderr.")
@at_options
@read_options
def waterwalk(file, voxel, pore_split, max_memory, n_walkers, seed, rho2, rho2_wall, t2_bulk,
              diffusivity, t_max, transport, outdir, as_json, force, no_plots, quiet,
              at_progress, at_time, **kw):
    """Random walkers in the water of FILE: the magnetisation decay M(t) and its T2
    spectrum beyond fast exchange (by starting class, beside the fast-diffusion spectrum of
    `relax`), where the water of each class is after a mixing time, and with --transport
    the effective diffusivity.

    The walkers diffuse in the water-filled phases of the phase grid, are relaxed at the
    walls with a kill probability for the step length and carry a bulk T2; see
    docs/diffusion.md for the method, its sources and its limits. The results are
    predictions for the simulated structure, not measurements.
    """
    settings = Settings.of(voxel=voxel, pore_split=pore_split, max_memory=max_memory,
                           n_walkers=n_walkers, seed=seed)
    opts = {}
    if rho2 is not None:
        if not rho2 >= 0:
            raise OptionError(f"must be 0 or more, got {rho2}", param="rho2")
        opts["rho2_nm_per_us"] = rho2
    if rho2_wall is not None:
        if not rho2_wall >= 0:
            raise OptionError(f"must be 0 or more, got {rho2_wall}", param="rho2_wall")
        opts["rho2_outside_nm_per_us"] = rho2_wall
    if t2_bulk is not None:
        if t2_bulk < 0 or t2_bulk != t2_bulk:
            raise OptionError(f"must be positive (or 0 for no bulk term), got {t2_bulk}",
                              param="t2_bulk")
        opts["t2_bulk_s"] = t2_bulk if t2_bulk > 0 else None
    if t_max is not None:
        if not t_max > 0:
            raise OptionError(f"must be positive, got {t_max}", param="t_max")
        opts["t_max_us"] = t_max
    dif = _diffusivities(diffusivity)
    if dif is not None:
        opts["diffusivity_nm2_per_us"] = dif
    if outdir is not None:
        check_folder(outdir, force)
    obj, moment = load_input(file, kw, at_progress, at_time)
    echo_moment(moment, quiet or as_json)
    options = {"water_walk": opts}
    if transport:
        options["transport"] = {k: v for k, v in opts.items()
                                if k in ("diffusivity_nm2_per_us",)}
    selected = ["water_walk"] + (["transport"] if transport else [])
    stage = None if (quiet or as_json) else StageProgress()  # hears the walks' progress too
    run = Run(obj, settings, stage, options=options).run(selected)
    doc = file_document(file, run)
    doc["caution"] = CAUTION
    if moment is not None:
        doc["at"] = moment.to_dict()
    if outdir is not None:
        write_report(outdir, doc, run.results, force=force, plots=not no_plots, protect=[file],
                     grid=run.__dict__.get("grid"))
    if as_json:
        click.echo(dumps(doc))
        return
    _print(doc, run)
    if outdir is not None:
        click.echo(f"  report written to {outdir}")


def _print(doc, run):
    click.echo(f"{doc['file']}: phase grid {' x '.join(map(str, doc['grid_shape']))} voxels of "
               f"{doc['voxel_size_nm']:.4g} nm")
    w = doc.get("water_walk") or {}
    head = run.results["water_walk"].headline()["water_walk"]
    walk, fast = head.get("t2_logmean_ms"), head.get("fast_diffusion_t2_logmean_ms")
    click.echo(f"  relaxation walk: M = {head['m_end']:.3g} at t = {head['t_end_us']:.4g} us"
               + (f"; T2 logarithmic mean {walk:.4g} ms" if walk else "")
               + (f" (fast diffusion {fast:.4g} ms, shift {head['shift_decades']:+.3f} decades)"
                  if fast else ""))
    for note in w.get("notes", []) if isinstance(w, dict) else []:
        click.echo(f"  note: {note}")
    if "transport" in run.results:
        t = run.results["transport"].headline()["transport"]
        click.echo("  transport: Deff/D0 " + ", ".join(f"{k} {v:.3g}" for k, v in
                                                      t["d_eff_over_d0"].items())
                   + "; tortuosity " + ", ".join(f"{k} {_f(v)}" for k, v in
                                                  t["tortuosity"].items()))
    click.echo(f"  these are {CAUTION}")


def _f(v):
    return "-" if v is None else f"{v:.3g}"
