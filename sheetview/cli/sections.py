"""``sheetview section`` and ``sheetview project``: virtual micrographs of a structure."""
from __future__ import annotations

from pathlib import Path

import click
import numpy as np

from ..errors import OptionError
from .common import apply_at, at_options, dumps, echo_moment, load, parse_size, read_options
from .. import pictures
from ..app.run import phase_grid
from ..app.settings import Settings
from ..io.images import read_micrograph
from ..io.output import atomic_path, check_writable
from ..measures.compare import compare, virtual_images
from ..measures.planar import describe
from ..measures.sections import parse_axis_or_normal, projection, section, segment_projection
from ..pictures import grey_rgb
from ..report import write_csv
from ..structure import Structure
from ..style import BACKGROUND, PHASE_COLOURS, PHASE_LABELS, PHASE_ORDER, section_rgb

_PHASE_CHOICES = ("solid", "interlayer", "gel")


def _parse_phases(text):
    names = [t.strip().lower() for t in str(text).split(",") if t.strip()]
    bad = [n for n in names if n not in _PHASE_CHOICES]
    if not names or bad:
        raise OptionError(f"--solid-phases: expected names from {', '.join(_PHASE_CHOICES)}, "
                          f"got {text!r}", param="solid_phases")
    return tuple(names)


def _grid_of(obj, voxel, max_memory, *, needed=True):
    """The phase grid of ``obj`` with the measure settings (``sheetview.app.run.phase_grid``,
    the one builder); None when ``needed`` is False (prisms projected exactly)."""
    if not needed:
        return None
    return phase_grid(obj, Settings(voxel=voxel, max_memory=parse_size(max_memory)))


def _describe(mask, valid, pixel, lines, seed):
    return describe(mask, pixel, valid=valid, seed=seed, n_lines=lines)


def _open(path, out, force, read_kw, at_progress, at_time):
    """Check the output names (before any work), read the input and take the moment."""
    if out is not None:
        for p in pictures.outputs(out).values():
            check_writable(p, force)
    obj, moment = apply_at(load(path, **read_kw), at_progress, at_time)
    echo_moment(moment)
    return obj, moment


def _finish(doc, moment, notes, as_json, quiet, headline):
    """Print the result: JSON, or the headline, notes, descriptors and files written."""
    if moment is not None:
        doc["at"] = moment.to_dict()
    if as_json:
        click.echo(dumps(doc))
        return
    if quiet:
        return
    click.echo(headline)
    for note in notes:
        click.echo(f"  note: {note}")
    if "descriptors" in doc:
        _echo_descriptors(doc["descriptors"])
    if "files" in doc:
        click.echo("  wrote " + ", ".join(doc["files"].values()))


def _at(moment) -> dict:
    return {} if moment is None else {"at": moment.to_dict()}


def _threshold(text, unit_range=False):
    if str(text).lower() == "otsu":
        return None
    v = _number(text, "--threshold")
    if unit_range and not 0 < v < 1:
        raise OptionError(f"--threshold: a transmitted fraction between 0 and 1, got {text!r}")
    if not np.isfinite(v):
        raise OptionError(f"--threshold: must be finite, got {text!r}")
    return v


def _fmt_frac(d):
    return ", ".join(f"{k} {v:.3f}" for k, v in d.items())


def _common(f):
    f = click.option("-q", "--quiet", is_flag=True, help="Print nothing but errors (and --json).")(f)
    f = click.option("--seed", type=int, default=0, show_default=True,
                     help="Seed of the random lines of --describe.")(f)
    f = click.option("--lines", type=int, default=2000, show_default=True,
                     help="Random lines of the chord distributions of --describe.")(f)
    f = click.option("--describe", is_flag=True,
                     help="Add the 2D descriptors of the binary image (area fraction, chords, "
                          "local thickness, S2, orientation) to the output.")(f)
    f = click.option("--json", "as_json", is_flag=True, help="Print the result as JSON on stdout.")(f)
    f = click.option("--force", is_flag=True, help="Overwrite existing output files.")(f)
    f = click.option("-o", "--out", "out", default=None, metavar="STEM",
                     help="Write STEM.png and STEM.tif (picture with scale bar) and STEM_data.tif "
                          "(the numbers).")(f)
    f = click.option("--max-memory", default=None,
                     help="Refuse a phase grid needing more than this (e.g. 8G).")(f)
    f = click.option("--voxel", type=float, default=None,
                     help="Voxel edge (nm) of the phase grid (default as for measure).")(f)
    return f


def _look(f):
    """The contrast options of a virtual transmission micrograph."""
    f = click.option("--resolution", type=float, default=0.0, show_default=True,
                     help="Projections: Gaussian blur, full width at half maximum in nm "
                          "(0: none).")(f)
    f = click.option("--mfp", type=float, default=100.0, show_default=True,
                     help="Projections: transmission length lambda (nm) of exp(-t / lambda); "
                          "sets the contrast.")(f)
    return f


@click.command("section")
@click.argument("path", type=click.Path(dir_okay=False))
@click.option("--axis", default=None, type=click.Choice(["x", "y", "z"], case_sensitive=False),
              help="Plane perpendicular to this axis (default z).")
@click.option("--normal", default=None, metavar="NX,NY,NZ", help="Plane normal (instead of --axis).")
@click.option("--offset", type=float, default=0.0, show_default=True,
              help="Signed distance (nm) of the plane from the domain's centre along the normal.")
@click.option("--pixel", type=float, default=None, help="Pixel edge in nm (default: the voxel edge).")
@click.option("--solid-phases", default="solid,interlayer", show_default=True,
              help="Phases counted as solid in the binary image of --describe (a micrograph "
                   "rarely resolves interlayer water from the sheets).")
@_common
@at_options
@read_options
def section_cmd(path, axis, normal, offset, pixel, solid_phases, voxel, max_memory, out, force,
                as_json, describe, lines, seed, quiet, at_progress, at_time, **read_kw):
    """A virtual section: the phase image (solid, interlayer, gel pore) of any plane of a
    structure or volume, as PNG/TIFF with a scale bar."""

    phases = _parse_phases(solid_phases)
    n = parse_axis_or_normal(axis, normal)
    obj, moment = _open(path, out, force, read_kw, at_progress, at_time)
    img = section(obj, n, offset, pixel=pixel, grid=_grid_of(obj, voxel, max_memory))
    doc = {"file": str(path), **img.to_dict()}
    if describe:
        mask = img.mask(phases) & img.valid
        doc["solid_phases"] = list(phases)
        doc["descriptors"] = _describe(mask, img.valid, img.pixel, lines, seed).to_dict()
    if out is not None:
        present = set(np.unique(img.labels).tolist())
        legend = [(PHASE_COLOURS[c], PHASE_LABELS[c]) for c in PHASE_ORDER
                  if c in present and c != 0]
        cap = (f"{'xyz'[int(np.argmax(np.abs(n)))]} = {float(img.origin[int(np.argmax(np.abs(n)))]):.3g} nm"
               if np.max(np.abs(n)) > 1 - 1e-12 else
               f"n = ({n[0]:.2f}, {n[1]:.2f}, {n[2]:.2f}), offset {offset:g} nm")
        pic = pictures.render(section_rgb(img.labels, background=BACKGROUND), img.pixel,
                              caption=cap, legend=legend)
        files = pictures.write_picture(out, pic, {"phase": img.labels}, img.pixel,
                                       {"kind": "section", "codes": {str(k): v for k, v in img.names.items()},
                                        "off_grid": 255, "source": str(path),
                                        **_at(moment)}, force=force)
        doc["files"] = {k: str(v) for k, v in files.items()}
    _finish(doc, moment, img.notes, as_json, quiet,
            f"{path}: section {doc['shape_rows_cols'][1]} x {doc['shape_rows_cols'][0]} px "
            f"at {img.pixel:g} nm; {_fmt_frac(img.fractions())}")


def _echo_descriptors(d):
    keys = [k for k, v in d.items() if isinstance(v, (int, float)) and not isinstance(v, bool)]
    for k in keys:
        v = d[k]
        click.echo(f"  {k}: {v:.4g}" if isinstance(v, float) else f"  {k}: {v}")


@click.command("project")
@click.argument("path", type=click.Path(dir_okay=False))
@click.option("--axis", default="z", show_default=True,
              type=click.Choice(["x", "y", "z"], case_sensitive=False), help="Viewing direction.")
@click.option("--slab", type=float, default=None,
              help="Slab thickness in nm (default: the whole domain).")
@click.option("--offset", type=float, default=0.0, show_default=True,
              help="Slab centre: signed distance (nm) from the domain's centre along the axis.")
@click.option("--pixel", type=float, default=None,
              help="Pixel edge in nm (default: about 512 pixels across).")
@_look
@click.option("--threshold", default="otsu", show_default=True,
              help="Segmentation of --describe: 'otsu' or an intensity in 0..1 below which a "
                   "pixel is solid.")
@_common
@at_options
@read_options
def project_cmd(path, axis, slab, offset, pixel, mfp, resolution, threshold, voxel, max_memory,
                out, force, as_json, describe, lines, seed, quiet, at_progress, at_time, **read_kw):
    """A virtual transmission micrograph: solid thickness through a slab projected along an
    axis, shown as exp(-t / lambda), as PNG/TIFF with a scale bar."""

    thr = _threshold(threshold, unit_range=True)
    obj, moment = _open(path, out, force, read_kw, at_progress, at_time)
    img = projection(obj, axis, slab, offset=offset, pixel=pixel, mfp=mfp, resolution=resolution,
                     grid=_grid_of(obj, voxel, max_memory, needed=not isinstance(obj, Structure)))
    doc = {"file": str(path), **img.to_dict()}
    if describe:
        mask, used = segment_projection(img, thr)
        doc["threshold"] = used
        doc["descriptors"] = _describe(mask, img.valid, img.pixel, lines, seed).to_dict()
    if out is not None:
        rgb = pictures.grey_rgb(img.intensity, img.valid)
        cap = f"{img.axis} {img.slab[0]:.3g} to {img.slab[1]:.3g} nm, lambda {img.mfp:g} nm"
        pic = pictures.render(rgb, img.pixel, caption=cap)
        files = pictures.write_picture(
            out, pic, {"intensity": img.intensity, "thickness_nm": img.thickness,
                       "valid": img.valid.astype(np.uint8)}, img.pixel,
            {"kind": "projection", "axis": img.axis, "slab_nm": list(img.slab), "mfp_nm": img.mfp,
             "resolution_fwhm_nm": img.resolution, "right": img.right, "up": img.up,
             "source": str(path), **_at(moment)}, force=force)
        doc["files"] = {k: str(v) for k, v in files.items()}
    _finish(doc, moment, img.notes, as_json, quiet,
            f"{path}: projection along {img.axis}, {img.thickness.shape[1]} x "
            f"{img.thickness.shape[0]} px at {img.pixel:g} nm; slab {img.slab[0]:.4g} to "
            f"{img.slab[1]:.4g} nm; mean solid thickness {doc['mean_thickness_nm'] or 0:.3g} nm")


@click.command("compare")
@click.argument("path", type=click.Path(dir_okay=False))
@click.argument("image", type=click.Path(dir_okay=False))
@click.option("--pixel-size", type=float, default=None,
              help="Pixel edge of IMAGE in nm (needed unless its TIFF resolution tags say).")
@click.option("--threshold", default="otsu", show_default=True,
              help="Segmentation of IMAGE: 'otsu' or a value in the image's own scale.")
@click.option("--solid", "solid_is", type=click.Choice(["bright", "dark"]), default="bright",
              show_default=True, help="Whether the solid is the bright or the dark phase of IMAGE "
                                      "(as for `sheetview micrograph`; bright-field TEM: dark).")
@click.option("--virtual", "kind", type=click.Choice(["section", "projection"]), default="section",
              show_default=True, help="Virtual micrographs to compare with: phase sections or "
                                      "transmission projections of slabs.")
@click.option("--axis", default="z", show_default=True,
              type=click.Choice(["x", "y", "z"], case_sensitive=False),
              help="Sections across, or projections along, this axis.")
@click.option("--count", type=int, default=5, show_default=True,
              help="Virtual micrographs, evenly spread through the middle 80 %% of the domain.")
@click.option("--slab", type=float, default=None,
              help="Projections: slab thickness in nm (default: the domain split in --count).")
@_look
@click.option("--solid-phases", default="solid,interlayer", show_default=True,
              help="Sections: phases counted as solid.")
@click.option("--csv", "csv_out", type=click.Path(dir_okay=False), default=None,
              help="Write the distances: one row per distribution.")
@click.option("-o", "--output", "plot_out", type=click.Path(dir_okay=False), default=None,
              help="Figure (PNG): the images side by side and the overlaid distributions.")
@click.option("--voxel", type=float, default=None, help="Voxel edge (nm) of the phase grid.")
@click.option("--max-memory", default=None, help="Refuse a phase grid needing more than this.")
@click.option("--lines", type=int, default=2000, show_default=True,
              help="Random lines per image for the chord distributions.")
@click.option("--seed", type=int, default=0, show_default=True)
@click.option("--json", "as_json", is_flag=True, help="Print the result as JSON on stdout.")
@click.option("--force", is_flag=True, help="Overwrite existing outputs.")
@click.option("-q", "--quiet", is_flag=True, help="Print nothing but errors (and --json).")
@at_options
@read_options
def compare_cmd(path, image, pixel_size, threshold, solid_is, kind, axis, count, slab, mfp,
                resolution, solid_phases, csv_out, plot_out, voxel, max_memory, lines, seed,
                as_json, force, quiet, at_progress, at_time, **read_kw):
    """Put a structure's virtual micrographs beside a real micrograph IMAGE: the same 2D
    descriptors for both, and the Kolmogorov-Smirnov and Wasserstein distances between
    their chord and local-thickness distributions."""

    outs = [p for p in (csv_out, plot_out) if p]
    if len(set(map(str, outs))) != len(outs):
        raise OptionError("--csv and --output name the same file")
    for p in outs:
        check_writable(p, force)
    phases = _parse_phases(solid_phases)
    thr = _threshold(threshold)
    thr = "otsu" if thr is None else thr
    mg = read_micrograph(image, pixel_size=pixel_size, threshold=thr, solid=solid_is)
    obj, moment = apply_at(load(path, **read_kw), at_progress, at_time)
    echo_moment(moment, quiet)
    grid = _grid_of(obj, voxel, max_memory,
                    needed=kind == "section" or not isinstance(obj, Structure))
    vis = virtual_images(obj, kind, axis=axis, count=count, pixel=mg.pixel, slab=slab,
                         grid=grid, mfp=mfp, resolution=resolution, solid_phases=phases)
    vds = [describe(v.mask, v.pixel, valid=v.valid, seed=seed + i, n_lines=lines)
           for i, v in enumerate(vis)]
    ods = describe(mg.mask, mg.pixel, valid=mg.valid, seed=seed, n_lines=lines)
    cmp_ = compare(vds, ods, kind)
    doc = {"file": str(path), "image": str(image), "pixel_nm": mg.pixel,
           "threshold": getattr(mg, "threshold", None), "image_notes": list(getattr(mg, "notes", [])),
           "virtual": [v.label for v in vis], **cmp_.to_dict()}
    if moment is not None:
        doc["at"] = moment.to_dict()
    if csv_out:
        write_csv(csv_out, cmp_.table(), force=force)
    if plot_out:
        _plot_compare(mg, vis[0], cmp_, plot_out, force, str(path), str(image))
    if as_json:
        click.echo(dumps(doc))
    elif not quiet:
        click.echo(f"{path} ({len(vis)} virtual {kind}s at {mg.pixel:g} nm) against {image}:")
        for name, d in cmp_.distances.items():
            if d["ks_statistic"] is None:
                click.echo(f"  {name}: no sample on one side")
                continue
            click.echo(f"  {name}: mean {d['mean_virtual_nm']:.3g} vs {d['mean_observed_nm']:.3g} nm, "
                       f"KS D {d['ks_statistic']:.3f}, Wasserstein {d['wasserstein_nm']:.3g} nm")
        for k, v in cmp_.scalars.items():
            if v["virtual_mean"] is not None and v["observed"] is not None:
                click.echo(f"  {k}: {v['virtual_mean']:.4g} vs {v['observed']:.4g}")
        for p in outs:
            click.echo(f"  wrote {p}")


def _number(text, what):
    try:
        return float(text)
    except ValueError:
        raise OptionError(f"{what}: expected 'otsu' or a number, got {text!r}") from None


def _plot_compare(mg, vi, cmp_, path, force, name_v, name_o):
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(10, 7.0), dpi=100)
    FigureCanvasAgg(fig)
    gs = fig.add_gridspec(2, 4, height_ratios=[1.5, 1], hspace=0.45, wspace=0.35,
                          left=0.07, right=0.98, top=0.95, bottom=0.1)
    ax = fig.add_subplot(gs[0, 0:2])
    ax.imshow(grey_rgb(mg.grey, mg.valid), interpolation="nearest",
              extent=(0, mg.grey.shape[1] * mg.pixel, 0, mg.grey.shape[0] * mg.pixel))
    ax.contour(np.linspace(0, mg.grey.shape[1] * mg.pixel, mg.grey.shape[1]),
               np.linspace(mg.grey.shape[0] * mg.pixel, 0, mg.grey.shape[0]),
               mg.mask.astype(float), levels=[0.5], colors=["#e07b00"], linewidths=0.6)
    ax.set_title(f"observed: {Path(name_o).name}", fontsize=8)
    ax.set_xlabel("nm", fontsize=8)
    ax2 = fig.add_subplot(gs[0, 2:4])
    picture = (section_rgb(vi.image, background=BACKGROUND) if vi.kind == "section"
               else grey_rgb(vi.image, vi.valid))
    ax2.imshow(picture, interpolation="nearest",
               extent=(0, vi.mask.shape[1] * vi.pixel, 0, vi.mask.shape[0] * vi.pixel))
    ax2.set_title(f"virtual: {vi.label}", fontsize=8)
    ax2.set_xlabel("nm", fontsize=8)
    for k, name in enumerate(cmp_.distances):
        a = fig.add_subplot(gs[1, k])
        for which, colour in (("virtual", "#2f5d8a"), ("observed", "#d08a2f")):
            x, F = cmp_.ecdf(name, which)
            if x.size:
                a.step(x, F, where="post", color=colour, lw=1.2, label=which)
        d = cmp_.distances[name]
        ttl = name.replace("_", " ")
        if d["ks_statistic"] is not None:
            ttl += f"\nD {d['ks_statistic']:.2f}, W1 {d['wasserstein_nm']:.2g} nm"
        a.set_title(ttl, fontsize=8)
        a.set_xlabel("nm", fontsize=8)
        a.tick_params(labelsize=7)
        if k == 0:
            a.set_ylabel("cumulative fraction", fontsize=8)
            a.legend(fontsize=7)
    fig.text(0.01, 0.01, f"{Path(name_v).name}: {cmp_.n_virtual} virtual {cmp_.kind}s (invented or simulated "
             "structure) against a micrograph; distances, not a verdict", fontsize=7)
    with atomic_path(path, force) as tmp:
        fig.savefig(str(tmp), format="png")


COMMANDS = [section_cmd, project_cmd, compare_cmd]
