"""``sheetview measure FILE``: run named measures, print a summary or JSON, write a report."""
from __future__ import annotations

import hashlib
import math

import click

from .. import __version__
from ..errors import OptionError
from .common import dumps, load, parse_size, parse_split, read_options

_OPTION_OF = {"angle_tol": "--angle-tol", "gap_tol": "--gap-tol", "overlap": "--overlap",
              "tilt_limit": "--tilt-limit", "local_radius": "--local-radius", "frame": "--frame",
              "edge_tol": "--edge-tol", "voxel_size": "--voxel", "pore_split": "--pore-split"}


def _as_cli_error(e: OptionError, source=None) -> OptionError:
    opt = _OPTION_OF.get(e.field or "")
    if opt is None:
        return e
    return OptionError(f"{opt}: {e.detail}", path=source)


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
        echo(f"  wall order <P2(n.w)>: " + ("undefined (no walls)" if wall is None else f"{wall:.4f}"))
        for note in od["notes"]:
            echo(f"  note: {note}")
    if "voxel_size_nm" in doc:
        sh = " x ".join(str(v) for v in doc["grid_shape"])
        echo(f"  phase grid: {sh} voxels of {doc['voxel_size_nm']:.4g} nm")
    vf = doc.get("volume_fractions")
    if vf:
        echo("  volume fractions of the domain: "
             + ", ".join(f"{k} {100 * v:.2f}%" for k, v in vf.items()))
    if doc.get("specific_surface_nm-1") is not None:
        ssa = doc.get("specific_surface_m2_per_g")
        echo(f"  solid-void surface per domain volume: {doc['specific_surface_nm-1']:.4g} nm^-1"
             + (f"; per solid mass {ssa:.4g} m^2/g (density {doc['settings']['density']} g/cm^3)"
                if ssa is not None else ""))
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


@click.command("measure")
@click.argument("file", type=click.Path(dir_okay=False))
@click.option("--only", default=None, metavar="NAMES",
              help="Comma-separated measures to run (default: all that apply to the input). "
                   "Available: stacking, order, phases, surface, pores, chords, correlation.")
@click.option("--json", "as_json", is_flag=True, help="Print only the JSON summary to stdout.")
@click.option("-o", "--output", "outdir", type=click.Path(file_okay=False), default=None,
              help="Write a report folder: summary.json, CSV tables, PNG figures.")
@click.option("--force", is_flag=True, help="Write into an existing non-empty report folder.")
@click.option("--voxel", type=float, default=None, metavar="NM",
              help="Voxel edge of the phase grid (default: min(thickness, repeat - "
                   "thickness) / 6).")
@click.option("--max-memory", default=None, metavar="SIZE",
              help="Largest memory the phase grid may use, e.g. 8G (default: half the "
                   "available memory). A larger grid stops with the voxel size that fits.")
@click.option("--angle-tol", type=float, default=5.0, show_default=True, metavar="DEG",
              help="Largest angle between normals of stacked or in-plane neighbours.")
@click.option("--gap-tol", type=float, default=0.35, show_default=True, metavar="NM",
              help="Tolerance on the interlayer gap (stacked: |gap - spacing|; in-plane: gap).")
@click.option("--overlap", type=float, default=0.1, show_default=True, metavar="FRAC",
              help="Least projected overlap of stacked triangles, as a fraction of the smaller.")
@click.option("--tilt-limit", type=float, default=25.0, show_default=True, metavar="DEG",
              help="Pairs stacked but for an angle up to this are reported as tilted contacts.")
@click.option("--local-radius", type=float, default=5.0, show_default=True, metavar="NM",
              help="Radius of the neighbourhood of the local order parameter.")
@click.option("--frame", type=click.Choice(["z", "director"]), default="z", show_default=True,
              help="Reference axis of the orientation histogram and pole figure.")
@click.option("--density", type=float, default=2.73, show_default=True, metavar="G/CM3",
              help="Solid density for the specific surface per mass (C-S-H, Muller et al. 2013).")
@click.option("--pore-split", default=None, metavar="NM,NM",
              help="Split the gel pores by local thickness at these diameters into gel, "
                   "interhydrate, capillary classes (e.g. 5,20).")
@click.option("--intrusion/--no-intrusion", default=False, show_default=True,
              help="Also compute the simulated intrusion (ink-bottle) pore size distribution; "
                   "it costs several times the local thickness on large grids.")
@click.option("--lines", type=int, default=20000, show_default=True,
              help="Isotropic random lines for the exact chords.")
@click.option("--seed", type=int, default=0, show_default=True, help="Seed of the random lines.")
@click.option("--no-plots", is_flag=True, help="With -o: write tables only, no PNG figures.")
@click.option("-q", "--quiet", is_flag=True, help="No progress messages on stderr.")
@read_options
def measure(file, only, as_json, outdir, force, voxel, max_memory, angle_tol, gap_tol, overlap,
            tilt_limit, local_radius, frame, density, pore_split, intrusion, lines, seed,
            no_plots, quiet, **read_kw):
    """Measure FILE: stacks, orientation order, phase fractions, surfaces, pore sizes,
    chords and the two-point correlation.

    Lengths in nm, angles in degrees. Without --json a short summary is printed;
    -o DIR writes the full tables and figures. Prisms are rasterized to a phase grid
    (solid, interlayer, gel pore, outside) for the grid measures; voxel volumes are
    measured as they are.
    """
    from .. import measures
    from ..measures.stacking import StackingSettings

    settings = {"angle_tol": angle_tol, "gap_tol": gap_tol, "overlap": overlap,
                "tilt_limit": tilt_limit, "local_radius": local_radius, "frame": frame,
                "voxel": voxel, "max_memory": parse_size(max_memory), "density": density,
                "pore_split": parse_split(pore_split), "intrusion": intrusion,
                "lines": lines, "seed": seed}
    # check options before reading (the file's spacing is checked again below)
    try:
        StackingSettings(angle_tol, gap_tol, overlap, tilt_limit,
                         spacing=read_kw.get("spacing") or 1.4)
    except OptionError as e:
        raise _as_cli_error(e) from None
    if not local_radius > 0:
        raise OptionError(f"--local-radius: must be a positive number of nm, got {local_radius}")
    if voxel is not None and not (math.isfinite(voxel) and voxel >= 0.01):
        raise OptionError(f"--voxel: must be at least 0.01 nm, got {voxel}")
    if not (math.isfinite(density) and density > 0):
        raise OptionError(f"--density: must be a positive number of g/cm^3, got {density}")
    if lines < 1 or lines > 10_000_000:
        raise OptionError(f"--lines: must be between 1 and 10,000,000, got {lines}")
    if outdir is not None:
        from ..report import check_folder
        check_folder(outdir, force)
    obj = load(file, **read_kw)
    selected = measures.parse_only(only) if only is not None else measures.applicable(obj)
    measures.check_inputs(selected, obj, file)
    progress = None if quiet else _progress  # on stderr: stdout keeps only the summary
    try:
        ctx = measures.run(selected, obj, settings, progress=progress)
    except OptionError as e:
        raise _as_cli_error(e, file) from None
    doc = summary_document(file, obj, ctx, settings)
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
