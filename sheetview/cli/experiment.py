"""``sheetview scatter`` and ``sheetview relax``: predicted SAS curves and NMR T2 spectra,
optionally held against an experimental curve (read by :mod:`sheetview.io.curves`).
"""
from __future__ import annotations

import math
from pathlib import Path

import click
import numpy as np

from ..errors import OptionError
from ..io.curves import read_experimental
from ..figures import plot_relaxation, plot_scattering
from ..report import atomic_folder, check_folder, save_figure, write_csv, write_json
from ..app.applies import check_option
from .common import apply_at, at_options, dumps, echo_moment, load, parse_size, read_options
from .conventions import (Command, deprecated_option, force_option, json_option,
                          max_memory_option, output_option, voxel_option, warn)
from .sections import legacy_png
from ..app.run import Run
from ..app.settings import Settings
from ..grid import INTERLAYER, PhaseGrid, SOLID
from ..io.output import atomic_path, check_writable
from ..material import DEFAULT_DENSITY, DEFAULT_FORMULA, Hydrate, interlayer_share
from ..measures.relaxation import DEFAULT_RHO2_NM_PER_US, DEFAULT_T2_BULK_S, compare_t2, relaxation_spectrum
from ..measures.scattering import compare_curve, curve_features, describe_sheets, phase_slds, scattering_curve
from ..sld import preset_sld
from ..structure import Structure


def _check_outputs(paths, force):
    seen = set()
    for q in paths:
        if q is None:
            continue
        if str(q) in seen:
            raise OptionError(f"output {q} is given twice", param="output")
        seen.add(str(q))
        check_writable(q, force)


def _write_csv(path, table: dict, force, header_note=None):
    cols = list(table)
    n = len(table[cols[0]])
    with atomic_path(path, force) as tmp:
        with open(tmp, "w", encoding="utf-8") as fh:
            if header_note:
                for line in header_note:
                    fh.write(f"# {line}\n")
            fh.write(",".join(cols) + "\n")
            for i in range(n):
                fh.write(",".join(_fmt(table[c][i]) for c in cols) + "\n")


def _fmt(v):
    if v is None or (isinstance(v, float) and not math.isfinite(v)):
        return "nan"
    return f"{v:.8g}" if isinstance(v, float) else str(v)


def _grid_of(obj, voxel, max_memory=None):
    """``(run, grid)``: the run that built the phase grid (None for a voxel volume, which
    is its own grid) and the grid."""
    if isinstance(obj, PhaseGrid):
        return None, obj
    run = Run(obj, Settings(voxel=voxel, max_memory=max_memory))
    return run, run.grid


def _solid_sld(formula, density, probe, grid, interlayer_contrast=True):
    """SLD of the sheets from the material model: the hydrate (default or given) less the
    interlayer water the grid resolves; the whole hydrate's SLD when the interlayer is not
    contrasted (sheets and interlayer water as one particle)."""
    given = formula is not None or density is not None
    h = Hydrate(DEFAULT_FORMULA if formula is None else formula,
                DEFAULT_DENSITY if density is None else density,
                source="given by the user" if given else
                "Allen, Thomas & Jennings, Nature Materials 6 (2007) 311")
    counts = np.bincount(grid.labels.ravel(), minlength=256)
    split = h.split(interlayer_share({"solid": counts[SOLID], "interlayer": counts[INTERLAYER]}))
    if not interlayer_contrast:
        return split.hydrate_sld(probe), f"sheets and interlayer water = {h.formula} at {h.density:g} g/cm3"
    return split.layer_sld(probe), describe_sheets(split)


def _grid_checked(obj, voxel, max_memory):
    """``(run, grid)`` of :func:`_grid_of`, refusing ``--voxel`` for a voxel volume (the one
    rule, :mod:`sheetview.app.applies`)."""
    if voxel is not None:
        check_option(not isinstance(obj, PhaseGrid), "voxel", obj,
                     "prisms and solid bodies, which are rasterized at it (a voxel volume is "
                     "its own grid)")
    return _grid_of(obj, voxel, max_memory)


def _outputs(output, csv_out, json_file, force, command_name):
    """``(folder, legacy plot file)`` of ``-o`` (a folder; ``-o PLOT.png`` is the deprecated
    plot file), the deprecated ``--csv`` and ``--json FILE`` checked before any work."""
    plot_out = output if legacy_png(output, command_name) else None
    folder = None if plot_out is not None else output
    _check_outputs([csv_out, plot_out, json_file], force)
    if folder is not None:
        check_folder(folder, force)
    return folder, plot_out


def _experiment_options(f):
    """The output options shared by ``scatter`` and ``relax``, and their deprecated forms."""
    for o in reversed([
        json_option(),
        deprecated_option("--json-file", "json_file", type=click.Path(dir_okay=False),
                          default=None, metavar="FILE", use="--json (stdout) or -o FOLDER",
                          help="Deprecated (--json FILE): write the JSON document to FILE."),
        deprecated_option("--csv", "csv_out", type=click.Path(dir_okay=False), default=None,
                          metavar="FILE", use="-o FOLDER",
                          help="Deprecated: write the table to FILE."),
        force_option(),
    ]):
        f = o(f)
    return f


#: ``--json FILE`` of the release before (``--json`` is a flag now): rewritten to the
#: hidden ``--json-file FILE`` with a warning when the word after ``--json`` ends in .json.
class _JsonFileCommand(Command):
    def parse_args(self, ctx, args):
        out, i = [], 0
        args = list(args)
        while i < len(args):
            a = args[i]
            if a == "--json" and i + 1 < len(args) and args[i + 1].lower().endswith(".json"):
                warn("--json FILE is deprecated, use --json (stdout) or -o FOLDER")
                out += ["--json-file", args[i + 1]]
                i += 2
                continue
            if a.startswith("--json=") and len(a) > 7:
                warn("--json FILE is deprecated, use --json (stdout) or -o FOLDER")
                out += ["--json-file", a[7:]]
                i += 1
                continue
            out.append(a)
            i += 1
        return super().parse_args(ctx, out)


@click.command(cls=_JsonFileCommand)
@click.argument("file", metavar="FILE", type=click.Path(exists=True, dir_okay=False))
@read_options
@voxel_option()
@click.option("--probe", type=click.Choice(["neutron", "xray"]), default="neutron",
              show_default=True, help="Radiation: neutrons or X-rays (sets the SLDs).")
@click.option("--fluid", default="h2o", show_default=True, metavar="FLUID",
              help="Pore fluid: h2o, d2o, or a D2O volume fraction (0.3 or 30%).")
@click.option("--composition", "solid_formula", default=None, metavar="FORMULA",
              help="C-S-H composition with its interlayer water, e.g. '(CaO)1.7(SiO2)(H2O)1.8' "
                   "(the default, Allen et al. 2007); the sheets get it less the interlayer "
                   "water the grid resolves.")
@click.option("--density", "solid_density", type=float, default=None, metavar="G/CM3",
              help="Density in g/cm3 of that composition (default 2.604, Allen et al. 2007).")
@click.option("--no-interlayer-contrast", is_flag=True,
              help="Give the interlayer the solid's SLD (sheets and interlayer as one particle).")
@click.option("--pad", type=int, default=2, show_default=True, metavar="N",
              help="Zero-padding factor of the transform (non-periodic grids).")
@click.option("--window", type=click.Choice(["none", "hann"]), default="none", show_default=True,
              help="Window applied to the grid before the transform (non-periodic grids).")
@output_option("folder", "Write scattering.csv (q_nm-1, intensity_cm-1, modes), "
                         "scattering.png and scattering.json into FOLDER.")
@_experiment_options
@click.option("--slope", "slopes", multiple=True, metavar="QMIN:QMAX",
              help="Power-law slope over this q range in nm^-1; repeatable. Default: the "
                   "lowest and highest half decade of the valid range.")
@click.option("--compare", type=click.Path(exists=True, dir_okay=False), default=None,
              metavar="FILE",
              help="Measured curve to fit scale and background to: columns q, I[, error] "
                   "(text), canSAS XML (.xml) or NXcanSAS (.h5, .nxs).")
@click.option("--q-unit", type=click.Choice(["nm", "A"]), default=None,
              help="Unit of q in --compare (nm^-1 or A^-1) when the file does not say.")
@click.option("--columns", default=None, metavar="COLUMNS",
              help="Columns of a text --compare: Q,I[,ERR] (numbers or names).")
@max_memory_option("Memory allowed for the grid and transform, e.g. 8G (default half the "
                   "available memory).")
@at_options
def scatter(file, voxel, probe, fluid, solid_formula, solid_density, no_interlayer_contrast, pad,
            window, output, as_json, json_file, csv_out, force, slopes, compare, q_unit, columns,
            max_memory, at_progress, at_time, **read_kw):
    """Predicted small-angle scattering curve I(q) (cm^-1) of FILE; with --compare, fitted
    to a measured curve."""
    folder, plot_out = _outputs(output, csv_out, json_file, force, "scatter")
    ranges = [_parse_range(t) for t in slopes]
    exp = read_experimental(compare, "scattering", q_unit, columns) if compare else None
    for w in (exp.warnings if exp else []):
        warn(w)
    mem = parse_size(max_memory)
    obj, moment = apply_at(load(file, **read_kw), at_progress, at_time)
    echo_moment(moment)
    _, grid = _grid_checked(obj, voxel, mem)
    s_sld, s_desc = _solid_sld(solid_formula, solid_density, probe, grid,
                               not no_interlayer_contrast)
    f_sld = preset_sld(fluid, probe)
    slds = phase_slds(s_sld, f_sld, interlayer_contrast=not no_interlayer_contrast)
    res = scattering_curve(grid, slds, pad=pad, window=None if window == "none" else window,
                           max_memory=mem)
    doc = {"file": str(file), "probe": probe, "solid": s_desc, "fluid": fluid,
           "interlayer_contrast": not no_interlayer_contrast, "curve": res.to_dict()}
    if moment is not None:
        doc["at"] = moment.to_dict()
    lo, hi = res.q_valid
    doc["features"] = curve_features(res, _solid_fraction(grid), ranges)
    cmp_ = compare_curve(res, exp.x, exp.y, exp.sigma, source=compare) if exp else None
    if cmp_ is not None:
        doc["comparison"] = {**cmp_.to_dict(), "file": str(compare), "q_unit": exp.unit_found,
                             "format": exp.format}
    notes = [f"probe {probe}; solid {s_desc}: SLD {s_sld:.3g}e-6 A^-2; fluid {fluid}: "
             f"{f_sld:.3g}e-6 A^-2; interlayer {'fluid' if not no_interlayer_contrast else 'solid'} "
             f"SLD; outside = fluid",
             f"valid q {lo:.4g} to {hi:.4g} nm^-1; I(q) = |FT(delta rho)|^2 / V in cm^-1",
             "a model's predicted curve, not a measurement"]
    doc["notes"] = notes
    figure = lambda: plot_scattering(  # noqa: E731
        res, comparison=cmp_, notes=notes, features=doc["features"],
        experiment=(exp.x, exp.y, exp.sigma) if exp else None)
    written = _write_outputs(folder, "scattering", res.table(), doc, figure, force,
                             csv_out, plot_out, json_file, notes)
    if as_json:
        click.echo(dumps(doc))
        return
    click.echo(f"I(q): {res.q.size} bins, valid q {lo:.4g}-{hi:.4g} nm^-1"
               + (f" -> {', '.join(written)}" if written else ""))
    for line in _feature_lines(doc["features"]):
        click.echo(line)
    for note in res.notes:
        click.echo(f"note: {note}")
    if cmp_ is not None:
        click.echo(f"fit to {compare}: scale {cmp_.scale:.4g}, background {cmp_.background:.4g} "
                   f"cm^-1, reduced chi2 {cmp_.chi2_reduced:.4g} ({cmp_.weighting})")


def _write_outputs(folder, name, table, doc, figure, force, csv_out, plot_out, json_file, notes,
                   table_name=None):
    """Write the folder (``TABLE_NAME.csv``, default ``NAME.csv``; ``NAME.png``,
    ``NAME.json``) and the deprecated single files; returns what was written."""
    written = []
    if csv_out:
        _write_csv(csv_out, table, force, notes)
        written.append(str(csv_out))
    if json_file:
        with atomic_path(json_file, force) as tmp:
            Path(tmp).write_text(dumps(doc), encoding="utf-8")
        written.append(str(json_file))
    if plot_out:
        save_figure(figure(), plot_out, force)
        written.append(str(plot_out))
    if folder is not None:
        with atomic_folder(folder, force, kind=name) as (tmp, final):
            write_csv(tmp / f"{table_name or name}.csv", table)
            save_figure(figure(), tmp / f"{name}.png")
            write_json(tmp / f"{name}.json", doc)
        written.append(f"{folder}/")
    return written


def _feature_lines(feats):
    """The Porod range (or why there is none) and the peaks, in words."""
    out = []
    po = feats.get("porod", {})
    if "error" in po:
        out.append(f"Porod: {po['error']}")
    elif po.get("status") == "ok":
        a, b = po["q_range_nm-1"]
        out.append(f"Porod: S/V {po['s_over_v_nm-1']:.4g} nm^-1 "
                   f"(K {po['porod_constant_cm-1_nm-4']:.4g} cm^-1 nm^-4) over q {a:.4g}-{b:.4g} nm^-1; q^4 I flat there: log-slope "
                   f"{po['log_slope_q4I']:+.3f}, trend within {100 * po['trend_departure']:.1f} % "
                   f"(aliasing divided out, at most {100 * po['alias_correction_max']:.0f} %)")
    else:
        out.append(f"Porod: no Porod range: {po.get('reason')}")
    bp = feats.get("bragg_peaks", {})
    if "error" in bp:
        out.append(f"peaks: {bp['error']}")
    elif not bp.get("n_peaks"):
        out.append(f"peaks: none {bp.get('significance_min_sigma', 5):g} sigma above the "
                   f"background ({bp.get('background', '')})")
    else:
        out.append(f"peaks {bp['significance_min_sigma']:g} sigma or more above the background "
                   f"({bp['background']}):")
        for q, d, w, h, z in zip(bp["q_nm-1"], bp["d_nm"], bp["fwhm_nm-1"], bp["height_ln"],
                                 bp["significance_sigma"]):
            out.append(f"  q {q:.4g} nm^-1, d = 2pi/q {d:.4g} nm, FWHM {w:.3g} nm^-1, "
                       f"{math.exp(h):.3g} x the background, {z:.3g} sigma")
    return out


def _parse_range(text):
    try:
        a, b = (float(x) for x in str(text).split(":"))
    except ValueError:
        raise OptionError(f"expected QMIN:QMAX in nm^-1, got {text!r}", param="slopes") from None
    if not (0 < a < b and math.isfinite(b)):
        raise OptionError(f"need 0 < QMIN < QMAX, got {text!r}", param="slopes")
    return a, b


def _solid_fraction(grid):
    return float(np.count_nonzero(grid.labels == SOLID) / grid.labels.size)


@click.command(cls=_JsonFileCommand)
@click.argument("file", metavar="FILE", type=click.Path(exists=True, dir_okay=False))
@read_options
@voxel_option()
@click.option("--rho2", type=float, default=None, metavar="NM/US",
              help="Surface relaxivity in nm/us (default 3.7e-3; McDonald et al. 2005, from "
                   "memory, low confidence).")
@click.option("--t2-bulk", type=float, default=None, metavar="S",
              help="Bulk water T2 in s (default 2.5, from memory); 0 switches the bulk term off.")
@click.option("--pore-shape", "shape", type=click.Choice(["slit", "cylinder", "sphere"]), default="slit",
              show_default=True, help="Gel pores of local thickness d: S/V = 2/d, 4/d, 6/d.")
@click.option("--interlayer-width", type=float, default=None, metavar="NM",
              help="Interlayer gap in nm. Default: repeat - median sheet thickness for prism "
                   "files, the measured local thickness of the interlayer for volumes.")
@output_option("folder", "Write t2_distribution.csv (T2 in s and ms, fractions per class), "
                         "relaxation.png and relaxation.json into FOLDER.")
@_experiment_options
@click.option("--compare", type=click.Path(exists=True, dir_okay=False), default=None,
              metavar="FILE", help="Measured T2 distribution: columns T2, amplitude.")
@click.option("--t2-unit", type=click.Choice(["s", "ms", "us"]), default=None,
              help="Unit of T2 in --compare when its header does not say.")
@click.option("--columns", default=None, metavar="COLUMNS",
              help="Columns of --compare: T2,AMPLITUDE (numbers or names).")
@max_memory_option("Memory allowed for the grid and transform, e.g. 8G (default half the "
                   "available memory).")
@at_options
def relax(file, voxel, rho2, t2_bulk, shape, interlayer_width, output, as_json, json_file,
          csv_out, force, compare, t2_unit, columns, max_memory, at_progress, at_time, **read_kw):
    """Predicted NMR T2 distribution of the pore water of FILE (fast exchange)."""
    folder, plot_out = _outputs(output, csv_out, json_file, force, "relax")
    exp = read_experimental(compare, "t2", t2_unit, columns) if compare else None
    for w in (exp.warnings if exp else []):
        warn(w)
    rho2 = DEFAULT_RHO2_NM_PER_US if rho2 is None else rho2
    if t2_bulk is None:
        t2_bulk = DEFAULT_T2_BULK_S
    elif t2_bulk == 0:
        t2_bulk = None
    elif t2_bulk < 0:
        raise OptionError(f"must be positive (or 0 for no bulk term), got {t2_bulk}",
                          param="t2_bulk")
    obj, moment = apply_at(load(file, **read_kw), at_progress, at_time)
    echo_moment(moment)
    ctx, grid = _grid_checked(obj, voxel, parse_size(max_memory))
    if interlayer_width is None and isinstance(obj, Structure):
        gap = float(obj.spacing) - float(np.median(obj.thickness))
        if gap > 0:
            interlayer_width = gap
    gel = ctx.thickness if ctx is not None else None
    res = relaxation_spectrum(grid, gel, interlayer_width=interlayer_width, rho2=rho2,
                              t2_bulk=t2_bulk, shape=shape)
    cmp_ = compare_t2(res, exp.x, exp.y, source=compare) if exp else None
    doc = {"file": str(file), "relaxation": res.to_dict()}
    if moment is not None:
        doc["at"] = moment.to_dict()
    if cmp_ is not None:
        doc["comparison"] = {**cmp_.to_dict(), "file": str(compare), "t2_unit": exp.unit_found}
    notes = [f"fast exchange 1/T2 = 1/T2b + rho2 S/V; rho2 {rho2:g} nm/us; T2b "
             f"{'off' if t2_bulk is None else f'{t2_bulk:g} s'}; gel pores as {shape}s; "
             f"interlayer: {res.settings['interlayer_width']}",
             "a model's predicted distribution, not a measurement"]
    doc["notes"] = notes
    figure = lambda: plot_relaxation(res, comparison=cmp_, notes=notes)  # noqa: E731
    # the table keeps the name it has in a measure report
    written = _write_outputs(folder, "relaxation", res.table(), doc, figure, force, csv_out,
                             plot_out, json_file, notes, table_name="t2_distribution")
    if as_json:
        click.echo(dumps(doc))
        return
    fr = ", ".join(f"{k} {v:.3f} (T2 {res.class_t2_logmean[k] * 1e3:.3g} ms)"
                   for k, v in res.class_fraction.items())
    click.echo(f"T2 distribution: {fr}" + (f" -> {', '.join(written)}" if written else ""))
    if cmp_ is not None:
        click.echo(f"against {compare}: log-mean T2 model {cmp_.logmean_model_s * 1e3:.4g} ms, "
                   f"experiment {cmp_.logmean_experiment_s * 1e3:.4g} ms, shift "
                   f"{cmp_.shift_decades:+.3f} decades, overlap {cmp_.overlap:.3f}")


COMMANDS = [scatter, relax]
