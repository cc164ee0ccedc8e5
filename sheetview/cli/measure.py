"""``sheetview measure FILE``: run named measures, print a summary or JSON, write a report."""
from __future__ import annotations

import click

from ..app.applies import check_settings
from ..app.document import file_document
from ..app.registry import DEFAULT_WORD, check_inputs, names, select
from ..app.run import Run
from ..app.settings import Settings, fields_info
from .common import StageProgress, at_options, dumps, echo_moment, load_input, read_options
from .conventions import command, force_option, json_option, output_option, quiet_option
from ..measures.stacking import StackingSettings
from ..report import check_folder, write_report

#: The settings of a measure run that ``measure`` and ``batch`` take on the command line:
#: every field of :class:`~sheetview.app.settings.Settings`, option ``--name-with-dashes``.
SETTINGS = tuple(name for name, _, _ in fields_info())

#: Settings that change no number (only whether a run fits in memory): left out of the
#: batch result key, so a rerun with another limit keeps its finished results.
NO_NUMBER_SETTINGS = tuple(name for name, _, meta in fields_info() if not meta["number"])


def option_name(param: str) -> str:
    """The command-line option of a setting: ``angle_tol`` -> ``--angle-tol``."""
    return "--" + param.replace("_", "-")


def _option(name, default, meta):
    unit = meta["unit"]
    helptext = meta["help"] + (f" Unit: {unit}." if unit and unit != "bytes" else "")
    metavar = meta["metavar"] or (unit.upper() if unit else None)
    opt = option_name(name)
    if isinstance(default, bool):
        return click.option(f"{opt}/--no-{opt[2:]}", default=default, show_default=True,
                            help=helptext)
    if meta["choices"]:
        return click.option(opt, type=click.Choice(meta["choices"]), default=default,
                            show_default=True, help=helptext)
    if name in ("pore_split", "max_memory", "composition"):
        return click.option(opt, default=None if name != "composition" else default,
                            show_default=name == "composition", metavar=metavar, help=helptext)
    typ = int if isinstance(default, int) else float
    return click.option(opt, type=typ, default=default, show_default=default is not None,
                        metavar=metavar or ("N" if typ is int else "NUMBER"), help=helptext)


def measure_options(f):
    """Decorator adding the measure settings options (the same for ``measure`` and
    ``batch``: one per field of :class:`~sheetview.app.settings.Settings`, same names,
    defaults and meaning). :func:`measure_settings` builds the Settings."""
    for name, default, meta in reversed(fields_info()):
        f = _option(name, default, meta)(f)
    return f


def measure_settings(*, spacing=None, **opts) -> Settings:
    """The :class:`~sheetview.app.settings.Settings` of the measure options (keyword names
    as the settings; ``None`` keeps a default). ``spacing`` is the interlayer repeat the gap
    tolerance is checked against before any file is read (default 1.4 nm; a file's own
    repeat is checked again when it is measured)."""
    s = Settings.of(**opts)
    StackingSettings(**s.stacking_kwargs(), spacing=spacing or 1.4)
    return s


def summary_document(path, run) -> dict:
    """The JSON document of a measure run (also written as summary.json)."""
    return file_document(path, run)


def _print_summary(doc):
    echo = click.echo
    what = f"{doc['n_prisms']} prisms" if doc.get("n_prisms") is not None else doc["input_kind"]
    echo(f"{doc['file']}: {what}")
    st = doc.get("stacking")
    if st is not None:
        mean = st["mean"]
        echo(f"  stacking: {st['n_layers']} layers in {st['n_stacks']} stacks; mean stacking "
             f"number {mean:.3f} (prisms), {st['mean_volume']:.3f} (volume), max {st['max']}"
             if mean is not None and mean == mean else "  stacking: no prisms")
        if st["histogram"]:
            echo("  stacking histogram (layers: prisms): "
                 + ", ".join(f"{k}: {v}" for k, v in st["histogram"].items()))
        tc = st["tilted_contacts"]
        echo(f"  tilted contacts: {tc['pairs']} prism pairs between {tc['layer_pairs']} layer pairs")
        for note in st["notes"]:
            echo(f"  note: {note}")
    od = doc.get("order")
    if od is not None:
        S = od["S"]
        if od["director"] is not None:
            d = ", ".join(f"{v:.3f}" for v in od["director"])
            echo(f"  order: S = {S:.4f}, director ({d}), biaxiality {od['biaxiality']:.4f}")
            echo(f"  local S (radius {od['local']['radius']:g} nm): mean {od['local']['mean']:.4f}")
        else:
            echo("  order: undefined (no prisms)")
        wall = od["wall"]
        echo("  wall order <P2(n.w)>: " + ("undefined (no walls)" if wall is None else f"{wall:.4f}"))
        for note in od["notes"]:
            echo(f"  note: {note}")
    if "voxel_size_nm" in doc:
        sh = " x ".join(str(v) for v in doc["grid_shape"])
        vd = doc.get("voxel_default")
        echo(f"  phase grid: {sh} voxels of {doc['voxel_size_nm']:.4g} nm"
             + (f" (default voxel: {vd['rule']})" if vd else ""))
        if vd and vd.get("note"):
            echo(f"  note: {vd['note']}")
    vf = doc.get("volume_fractions")
    if vf:
        echo("  volume fractions of the domain: "
             + ", ".join(f"{k} {100 * v:.2f}%" for k, v in vf.items()))
    if doc.get("specific_surface_nm-1") is not None:
        ssa = doc.get("specific_surface_m2_per_g")
        st = doc["settings"]
        echo(f"  solid-pore surface per domain volume: {doc['specific_surface_nm-1']:.4g} nm^-1"
             + (f"; {ssa:.4g} m^2/g of C-S-H (sheets + interlayer water as "
                f"{st['composition']} at {st['density']:g} g/cm^3)" if ssa is not None else ""))
        mat = (doc.get("surface") or {}).get("interfaces", {}).get("material", {})
        for note in mat.get("notes", []):
            echo(f"  note: {note}")
    ps = doc.get("pore_size")
    if ps and ps.get("d50_nm") is not None:
        line = (f"  gel pore size (local thickness): d10 {ps['d10_nm']:.3g}, d50 {ps['d50_nm']:.3g}, "
                f"d90 {ps['d90_nm']:.3g} nm")
        if ps.get("intrusion_d50_nm") is not None:
            line += f"; intrusion d50 {ps['intrusion_d50_nm']:.3g} nm"
        echo(line)
    ch = doc.get("chords")
    if ch and ch.get("solid_mean_nm") is not None:
        echo(f"  mean chords ({ch['source']}): solid {ch['solid_mean_nm']:.3g} nm, pore "
             f"{ch['pore_mean_nm']:.3g} nm" if ch.get("pore_mean_nm") is not None else
             f"  mean solid chord ({ch['source']}): {ch['solid_mean_nm']:.3g} nm")
    sc = doc.get("scattering")
    if sc:
        po = sc["features"].get("porod", {})
        sl = sc["features"].get("slope_high_q", {})
        lo, hi = sc["q_valid_nm-1"]
        echo(f"  scattering ({sc['probe']}s, {sc['fluid']}): valid q {lo:.3g}-{hi:.3g} nm^-1"
             + (f"; Porod S/V {po['s_over_v_nm-1']:.4g} nm^-1" if po.get("s_over_v_nm-1") else "")
             + (f"; high-q slope {sl['slope']:.3g}" if isinstance(sl.get("slope"), float) else ""))
    rx = doc.get("relaxation")
    if rx:
        echo("  T2 (fast exchange): " + ", ".join(
            f"{k} {v:.3f} of the water at {rx['class_t2_logmean_ms'][k]:.3g} ms"
            for k, v in rx["class_fraction"].items() if rx["class_t2_logmean_ms"].get(k)))


def only_help(first: str = "Comma-separated measures to run (default: all that apply to "
                             "the input).") -> str:
    """The help of ``--only``: the default measures and the opt-in ones, from the registry."""
    default = names(optional=False)
    optin = [n for n in names() if n not in default]
    return (f"{first} Default: {', '.join(default)}; opt-in: {', '.join(optin) or 'none'}; "
            f"'{DEFAULT_WORD}' stands for the default set (--only {DEFAULT_WORD},"
            f"{optin[0] if optin else default[0]}).")


@command("measure")
@click.argument("file", metavar="FILE", type=click.Path(dir_okay=False))
@click.option("--only", default=None, metavar="NAMES", help=only_help())
@json_option("Print only the JSON summary on stdout (progress goes to stderr).")
@output_option("folder", "Write a report folder: summary.json, CSV tables, PNG figures.")
@force_option("Write into an existing non-empty report folder.")
@measure_options
@click.option("--no-plots", is_flag=True, help="With -o: write tables only, no PNG figures.")
@quiet_option("No progress messages on stderr.")
@at_options
@read_options
def measure(file, only, as_json, output, force, no_plots, quiet, at_progress, at_time, **kw):
    """Measure FILE: stacks, orientation order, phase fractions, surfaces, pore sizes,
    chords and the two-point correlation.

    Lengths in nm, angles in degrees. Without --json a short summary is printed;
    -o FOLDER writes the full tables and figures. Opt-in measures (listed under
    --only) run when named in --only. Prisms are rasterized to a phase grid
    (solid, interlayer, gel pore, outside) for the grid measures; voxel volumes are
    measured as they are.
    """
    # check options before reading (the file's spacing is checked again below)
    opts = {k: kw.pop(k) for k in SETTINGS}
    settings = measure_settings(**opts, spacing=kw.get("spacing"))
    outdir = output
    if outdir is not None:
        check_folder(outdir, force)
    obj, moment = load_input(file, kw, at_progress, at_time)
    check_settings(obj, settings, path=file)
    echo_moment(moment, quiet)
    selected = select(only, obj)
    check_inputs(selected, obj, file)
    progress = None if (quiet or as_json) else StageProgress()  # on stderr: stdout keeps only the summary
    run = Run(obj, settings, progress).run(selected)
    doc = summary_document(file, run)
    if moment is not None:
        doc["at"] = moment.to_dict()
    if outdir is not None:
        if progress:
            progress("report", False)
        write_report(outdir, doc, run.results, force=force, plots=not no_plots, protect=[file],
                     grid=run.__dict__.get("grid"))
    if as_json:
        click.echo(dumps(doc))
    else:
        _print_summary(doc)
        if outdir is not None:
            click.echo(f"  report written to {outdir}")


