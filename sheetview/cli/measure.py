"""``sheetview measure FILE``: run named measures, print a summary or JSON, write a report."""
from __future__ import annotations

import click

from .. import __version__
from ..errors import OptionError
from .common import dumps, load, read_options

_OPTION_OF = {"angle_tol": "--angle-tol", "gap_tol": "--gap-tol", "overlap": "--overlap",
              "tilt_limit": "--tilt-limit", "local_radius": "--local-radius", "frame": "--frame",
              "edge_tol": "--edge-tol"}


def _as_cli_error(e: OptionError, source=None) -> OptionError:
    opt = _OPTION_OF.get(e.field or "")
    if opt is None:
        return e
    return OptionError(f"{opt}: {e.detail}", path=source)


def summary_document(path, obj, results: dict, settings: dict) -> dict:
    """The JSON document of a measure run (also written as summary.json)."""
    doc = {"sheetview_version": __version__, "file": str(path),
           "n_prisms": len(obj) if hasattr(obj, "vertices") and hasattr(obj, "thickness") else None,
           "domain": obj.domain.to_dict() if hasattr(obj, "domain") else None,
           "domain_inferred": bool(getattr(getattr(obj, "domain", None), "inferred", False)),
           "spacing": getattr(obj, "spacing", None),
           "measures": list(results), "settings": dict(settings)}
    for name, res in results.items():
        doc[name] = res.to_dict()
    return doc


def _print_summary(doc):
    echo = click.echo
    echo(f"{doc['file']}: {doc['n_prisms']} prisms")
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


@click.command("measure")
@click.argument("file", type=click.Path(dir_okay=False))
@click.option("--only", default=None, metavar="NAMES",
              help="Comma-separated measures to run (default: all). "
                   "Available: stacking, order.")
@click.option("--json", "as_json", is_flag=True, help="Print one JSON document to stdout.")
@click.option("-o", "--output", "outdir", type=click.Path(file_okay=False), default=None,
              help="Write a report folder: summary.json, CSV tables, PNG figures.")
@click.option("--force", is_flag=True, help="Write into an existing non-empty report folder.")
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
@click.option("--no-plots", is_flag=True, help="With -o: write tables only, no PNG figures.")
@read_options
def measure(file, only, as_json, outdir, force, angle_tol, gap_tol, overlap, tilt_limit,
            local_radius, frame, no_plots, **read_kw):
    """Measure the sheets in FILE: stacking numbers, stacks and orientation order.

    Lengths in nm, angles in degrees. Without --json a short summary is printed;
    -o DIR writes the full tables and figures.
    """
    from .. import measures
    from ..measures.stacking import StackingSettings

    selected = measures.parse_only(only)
    settings = {"angle_tol": angle_tol, "gap_tol": gap_tol, "overlap": overlap,
                "tilt_limit": tilt_limit, "local_radius": local_radius, "frame": frame}
    # check tolerances before reading (the file's spacing is checked again below)
    try:
        StackingSettings(angle_tol, gap_tol, overlap, tilt_limit,
                         spacing=read_kw.get("spacing") or 1.4)
    except OptionError as e:
        raise _as_cli_error(e) from None
    if not local_radius > 0:
        raise OptionError(f"--local-radius: must be a positive number of nm, got {local_radius}")
    if outdir is not None:
        from ..report import check_folder
        check_folder(outdir, force)
    obj = load(file, **read_kw)
    measures.check_inputs(selected, obj, file)
    try:
        results = measures.run(selected, obj, settings)
    except OptionError as e:
        raise _as_cli_error(e, file) from None
    doc = summary_document(file, obj, results, settings)
    if outdir is not None:
        from ..report import write_report
        write_report(outdir, doc, results, force=force, plots=not no_plots)
    if as_json:
        click.echo(dumps(doc))
    else:
        _print_summary(doc)
        if outdir is not None:
            click.echo(f"  report written to {outdir}")
