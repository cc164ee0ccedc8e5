"""``sheetview measure FILE``: run named measures, print a summary or JSON, write a report."""
from __future__ import annotations

import hashlib
import math

import click

from .. import __version__
from ..errors import OptionError
from ..pipeline import DEFAULTS, SPLIT_NAMES
from .common import apply_at, at_options, dumps, echo_moment, load, parse_size, parse_split, read_options

_OPTION_OF = {"angle_tol": "--angle-tol", "gap_tol": "--gap-tol", "overlap": "--overlap",
              "tilt_limit": "--tilt-limit", "local_radius": "--local-radius", "frame": "--frame",
              "edge_tol": "--edge-tol", "voxel_size": "--voxel", "pore_split": "--pore-split"}


def _as_cli_error(e: OptionError, source=None) -> OptionError:
    opt = _OPTION_OF.get(e.field or "")
    if opt is None:
        return e
    return OptionError(f"{opt}: {e.detail}", path=source)


#: The settings of a measure run that ``measure`` and ``batch`` take on the command line,
#: in the order of :func:`measure_settings` (every one changes a number of the results,
#: except ``max_memory``, which only decides whether a grid may be built).
SETTINGS = ("voxel", "max_memory", "angle_tol", "gap_tol", "overlap", "tilt_limit",
            "local_radius", "frame", "composition", "density", "water_density", "pore_split",
            "intrusion", "lines", "seed")

#: Settings that change no number (only whether a run fits in memory): left out of the
#: batch result key, so a rerun with another limit keeps its finished results.
NO_NUMBER_SETTINGS = ("max_memory",)


def measure_options(f):
    """Decorator adding the measure settings options (the same for ``measure`` and
    ``batch``: same names, defaults and meaning). :func:`measure_settings` checks them and
    builds the settings dict."""
    d = DEFAULTS
    opts = [
        click.option("--voxel", type=float, default=None, metavar="NM",
                     help="Voxel edge of the phase grid (default: min(thickness, repeat - "
                          "thickness) / 6)."),
        click.option("--max-memory", default=None, metavar="SIZE",
                     help="Largest memory the phase grid may use (per structure), e.g. 8G "
                          "(default: half the available memory). A larger grid stops with the "
                          "voxel size that fits."),
        click.option("--angle-tol", type=float, default=d["angle_tol"], show_default=True,
                     metavar="DEG",
                     help="Largest angle between normals of stacked or in-plane neighbours."),
        click.option("--gap-tol", type=float, default=d["gap_tol"], show_default=True,
                     metavar="NM",
                     help="Tolerance on the interlayer gap (stacked: |gap - spacing|; "
                          "in-plane: gap)."),
        click.option("--overlap", type=float, default=d["overlap"], show_default=True,
                     metavar="FRAC",
                     help="Least projected overlap of stacked triangles, as a fraction of the "
                          "smaller."),
        click.option("--tilt-limit", type=float, default=d["tilt_limit"], show_default=True,
                     metavar="DEG",
                     help="Pairs stacked but for an angle up to this are reported as tilted "
                          "contacts."),
        click.option("--local-radius", type=float, default=d["local_radius"], show_default=True,
                     metavar="NM", help="Radius of the neighbourhood of the local order "
                                        "parameter."),
        click.option("--frame", type=click.Choice(["z", "director"]), default=d["frame"],
                     show_default=True,
                     help="Reference axis of the orientation histogram and pole figure."),
        click.option("--composition", default=d["composition"], show_default=True,
                     metavar="FORMULA",
                     help="C-S-H composition with its interlayer water (Allen, Thomas & "
                          "Jennings 2007): the material model that gives the mass of the "
                          "specific surface, the sheets' SLD and the water of each class."),
        click.option("--density", type=float, default=d["density"], show_default=True,
                     metavar="G/CM3",
                     help="Density of that composition with its interlayer water, without "
                          "gel water (2.604 Allen et al. 2007; Muller et al. 2013 give 2.73)."),
        click.option("--water-density", type=float, default=d["water_density"],
                     show_default=True, metavar="G/CM3",
                     help="Density of the interlayer and gel-pore water."),
        click.option("--pore-split", default=None, metavar="NM,NM",
                     help="Split the gel pores by local thickness at these diameters into gel, "
                          "interhydrate, capillary classes (e.g. 5,20)."),
        click.option("--intrusion/--no-intrusion", default=d["intrusion"], show_default=True,
                     help="Also compute the simulated intrusion (ink-bottle) pore size "
                          "distribution; it costs several times the local thickness on large "
                          "grids."),
        click.option("--lines", type=int, default=d["lines"], show_default=True,
                     help="Isotropic random lines for the exact chords."),
        click.option("--seed", type=int, default=d["seed"], show_default=True,
                     help="Seed of the random lines."),
    ]
    for o in reversed(opts):
        f = o(f)
    return f


def measure_settings(voxel=None, max_memory=None, angle_tol=DEFAULTS["angle_tol"],
                     gap_tol=DEFAULTS["gap_tol"], overlap=DEFAULTS["overlap"],
                     tilt_limit=DEFAULTS["tilt_limit"], local_radius=DEFAULTS["local_radius"],
                     frame=DEFAULTS["frame"], composition=DEFAULTS["composition"],
                     density=DEFAULTS["density"], water_density=DEFAULTS["water_density"],
                     pore_split=None,
                     intrusion=DEFAULTS["intrusion"], lines=DEFAULTS["lines"],
                     seed=DEFAULTS["seed"], *, spacing=None) -> dict:
    """Check the measure options and build the settings of a measure run.

    The one builder of ``sheetview measure`` and ``sheetview batch`` (and of the batch
    result key): keyword names are the option names (``--angle-tol`` -> ``angle_tol``);
    ``max_memory`` may be a size text (``"8G"``) or bytes, ``pore_split`` a text
    (``"5,20"``) or a sequence. ``spacing`` is the interlayer repeat the gap tolerance is
    checked against before any file is read (default 1.4 nm; a file's own repeat is
    checked again when it is measured). Raises :class:`OptionError` naming the option.
    Returns a dict with the keys of :data:`SETTINGS` (plain Python values).
    """
    from ..measures.stacking import StackingSettings
    try:
        StackingSettings(angle_tol, gap_tol, overlap, tilt_limit, spacing=spacing or 1.4)
    except OptionError as e:
        raise _as_cli_error(e) from None
    local_radius = _number("--local-radius", local_radius)
    density = _number("--density", density)
    voxel = None if voxel is None else _number("--voxel", voxel)
    lines = _number("--lines", lines, whole=True)
    seed = _number("--seed", seed, whole=True)
    if not local_radius > 0:
        raise OptionError(f"--local-radius: must be a positive number of nm, got {local_radius}")
    if frame not in ("z", "director"):
        raise OptionError(f"--frame: must be z or director, got {frame!r}")
    if voxel is not None and not (math.isfinite(voxel) and voxel >= 0.01):
        raise OptionError(f"--voxel: must be at least 0.01 nm, got {voxel}")
    water_density = _number("--water-density", water_density)
    for opt, v in (("--density", density), ("--water-density", water_density)):
        if not (math.isfinite(v) and v > 0):
            raise OptionError(f"{opt}: must be a positive number of g/cm^3, got {v}")
    from ..material import Hydrate
    try:
        Hydrate(composition, density, water_density)
    except OptionError as e:
        raise OptionError(f"--composition: {e.detail}") from None
    if not 1 <= lines <= 10_000_000:
        raise OptionError(f"--lines: must be between 1 and 10,000,000, got {lines}")
    if pore_split is None or isinstance(pore_split, str):
        split = parse_split(pore_split)
    else:
        try:
            split = tuple(float(x) for x in pore_split)
        except (TypeError, ValueError):
            raise OptionError(f"--pore-split: expected diameters in nm, got {pore_split!r}") \
                from None
    if (any(not (math.isfinite(x) and x > 0) for x in split)
            or any(b <= a for a, b in zip(split, split[1:]))):
        raise OptionError(f"--pore-split: diameters must be increasing positive numbers of nm, "
                          f"got {','.join(f'{x:g}' for x in split)}")
    if len(split) >= len(SPLIT_NAMES):
        raise OptionError(f"--pore-split: at most {len(SPLIT_NAMES) - 1} diameters, got "
                          f"{len(split)}")
    return {"voxel": None if voxel is None else float(voxel),
            "max_memory": parse_size(max_memory),
            "angle_tol": float(angle_tol), "gap_tol": float(gap_tol), "overlap": float(overlap),
            "tilt_limit": float(tilt_limit), "local_radius": float(local_radius),
            "frame": frame, "composition": str(composition), "density": float(density),
            "water_density": float(water_density), "pore_split": split,
            "intrusion": bool(intrusion), "lines": int(lines), "seed": int(seed)}


def _number(opt: str, v, whole: bool = False):
    """``v`` as a float (or a whole int with ``whole``), else an OptionError naming ``opt``
    (the range is checked by the caller)."""
    ok = not isinstance(v, (bool, str))
    try:
        ok = ok and (not whole or int(v) == v) and float(v) is not None
    except (TypeError, ValueError, OverflowError):
        ok = False
    if not ok:
        raise OptionError(f"{opt}: expected a {'whole number' if whole else 'number'}, "
                          f"got {v!r}")
    return int(v) if whole else float(v)


def _content_hash(path) -> str:
    """SHA-256 of the input file's bytes (provenance; identifies the exact input)."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 22), b""):
            h.update(block)
    return h.hexdigest()


def summary_document(path, obj, ctx, settings: dict) -> dict:
    """The JSON document of a measure run (also written as summary.json)."""
    from ..pipeline import summary
    results = ctx.results
    doc = {"sheetview_version": __version__, "file": str(path),
           "input_sha256": _content_hash(path),
           "input_kind": type(obj).__name__,
           "domain": obj.domain.to_dict() if hasattr(obj, "domain") else None,
           "domain_inferred": bool(getattr(getattr(obj, "domain", None), "inferred", False)),
           "spacing": getattr(obj, "spacing", None),
           "measures": list(results), "settings": {k: v for k, v in ctx.settings.items()}}
    doc.update(summary(ctx))
    for name, res in results.items():
        d = res.to_dict()
        if name in doc and isinstance(doc[name], dict):
            d = {**d, **doc[name]}
        doc[name] = d
    doc["timings_s"] = {k: round(v, 3) for k, v in ctx.timings.items()}
    doc["note"] = ("numbers describe the simulated structure only; see docs/measures.md for "
                   "what each one is and is not")
    return doc


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


@click.command("measure")
@click.argument("file", type=click.Path(dir_okay=False))
@click.option("--only", default=None, metavar="NAMES",
              help="Comma-separated measures to run (default: all that apply to the input). "
                   "Available: stacking, order, phases, surface, pores, chords, correlation.")
@click.option("--json", "as_json", is_flag=True, help="Print only the JSON summary to stdout.")
@click.option("-o", "--output", "outdir", type=click.Path(file_okay=False), default=None,
              help="Write a report folder: summary.json, CSV tables, PNG figures.")
@click.option("--force", is_flag=True, help="Write into an existing non-empty report folder.")
@measure_options
@click.option("--no-plots", is_flag=True, help="With -o: write tables only, no PNG figures.")
@click.option("-q", "--quiet", is_flag=True, help="No progress messages on stderr.")
@at_options
@read_options
def measure(file, only, as_json, outdir, force, no_plots, quiet, at_progress, at_time, **kw):
    """Measure FILE: stacks, orientation order, phase fractions, surfaces, pore sizes,
    chords and the two-point correlation.

    Lengths in nm, angles in degrees. Without --json a short summary is printed;
    -o DIR writes the full tables and figures. Prisms are rasterized to a phase grid
    (solid, interlayer, gel pore, outside) for the grid measures; voxel volumes are
    measured as they are.
    """
    from .. import measures

    # check options before reading (the file's spacing is checked again below)
    opts = {k: kw.pop(k) for k in SETTINGS}
    read_kw = kw
    settings = measure_settings(**opts, spacing=read_kw.get("spacing"))
    if outdir is not None:
        from ..report import check_folder
        check_folder(outdir, force)
    obj, moment = apply_at(load(file, **read_kw), at_progress, at_time)
    echo_moment(moment, quiet)
    selected = measures.select(only, obj)
    measures.check_inputs(selected, obj, file)
    progress = None if quiet else _progress  # on stderr: stdout keeps only the summary
    try:
        ctx = measures.run(selected, obj, settings, progress=progress)
    except OptionError as e:
        raise _as_cli_error(e, file) from None
    doc = summary_document(file, obj, ctx, settings)
    if moment is not None:
        doc["at"] = moment.to_dict()
    if outdir is not None:
        from ..report import write_report
        if progress:
            progress("report", False)
        write_report(outdir, doc, ctx.results, force=force, plots=not no_plots,
                     grid=ctx.__dict__.get("grid"))
    if as_json:
        click.echo(dumps(doc))
    else:
        _print_summary(doc)
        if outdir is not None:
            click.echo(f"  report written to {outdir}")


def _progress(stage, done, seconds=None):
    if done:
        click.echo(f"  {stage}: {seconds:.2f} s", err=True)
    else:
        click.echo(f"sheetview: {stage} ...", err=True)
