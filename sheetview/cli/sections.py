"""``sheetview section`` and ``sheetview project``: virtual micrographs of a structure."""
from __future__ import annotations

import click
import numpy as np

from ..errors import OptionError
from .common import apply_at, at_options, dumps, load, parse_size, read_options

_PHASE_CHOICES = ("solid", "interlayer", "gel")


def _parse_phases(text):
    names = [t.strip().lower() for t in str(text).split(",") if t.strip()]
    bad = [n for n in names if n not in _PHASE_CHOICES]
    if not names or bad:
        raise OptionError(f"--solid-phases: expected names from {', '.join(_PHASE_CHOICES)}, "
                          f"got {text!r}", field="solid_phases")
    return tuple(names)


def _grid_settings(voxel, max_memory):
    return {"voxel": voxel, "max_memory": parse_size(max_memory)}


def _describe(mask, valid, pixel, lines, seed):
    from ..measures.planar import describe
    return describe(mask, pixel, valid=valid, seed=seed, n_lines=lines)


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
    from .. import pictures
    from ..measures.sections import parse_axis_or_normal, section
    from ..view import BACKGROUND, PHASE_COLOURS, PHASE_LABELS, PHASE_ORDER, section_rgb

    phases = _parse_phases(solid_phases)
    n = parse_axis_or_normal(axis, normal)
    if out is not None:
        for p in pictures.outputs(out).values():
            from ..io.output import check_writable
            check_writable(p, force)
    obj = load(path, **read_kw)
    obj, moment = apply_at(obj, at_progress, at_time)
    img = section(obj, n, offset, pixel=pixel, settings=_grid_settings(voxel, max_memory))
    doc = {"file": str(path), **img.to_dict()}
    if moment is not None:
        doc["at"] = moment.to_dict()
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
                                        "off_grid": 255, "source": str(path)}, force=force)
        doc["files"] = {k: str(v) for k, v in files.items()}
    if as_json:
        click.echo(dumps(doc))
    elif not quiet:
        click.echo(f"{path}: section {doc['shape_rows_cols'][1]} x {doc['shape_rows_cols'][0]} px "
                   f"at {img.pixel:g} nm; {_fmt_frac(img.fractions())}")
        for note in img.notes:
            click.echo(f"  note: {note}")
        if describe:
            _echo_descriptors(doc["descriptors"])
        if out is not None:
            click.echo("  wrote " + ", ".join(doc["files"].values()))


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
@click.option("--mfp", type=float, default=100.0, show_default=True,
              help="Transmission length lambda (nm) of exp(-t / lambda); sets the contrast.")
@click.option("--resolution", type=float, default=0.0, show_default=True,
              help="Gaussian blur, full width at half maximum in nm (0: none).")
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
    from .. import pictures
    from ..measures.sections import projection, segment_projection

    if str(threshold).lower() == "otsu":
        thr = None
    else:
        try:
            thr = float(threshold)
        except ValueError:
            raise OptionError(f"--threshold: expected 'otsu' or a number, got {threshold!r}",
                              field="threshold") from None
    if out is not None:
        from ..io.output import check_writable
        for p in pictures.outputs(out).values():
            check_writable(p, force)
    obj = load(path, **read_kw)
    obj, moment = apply_at(obj, at_progress, at_time)
    img = projection(obj, axis, slab, offset=offset, pixel=pixel, mfp=mfp, resolution=resolution,
                     settings=_grid_settings(voxel, max_memory))
    doc = {"file": str(path), **img.to_dict()}
    if moment is not None:
        doc["at"] = moment.to_dict()
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
             "source": str(path)}, force=force)
        doc["files"] = {k: str(v) for k, v in files.items()}
    if as_json:
        click.echo(dumps(doc))
    elif not quiet:
        click.echo(f"{path}: projection along {img.axis}, {img.thickness.shape[1]} x "
                   f"{img.thickness.shape[0]} px at {img.pixel:g} nm; slab {img.slab[0]:.4g} to "
                   f"{img.slab[1]:.4g} nm; mean solid thickness {doc['mean_thickness_nm'] or 0:.3g} nm")
        for note in img.notes:
            click.echo(f"  note: {note}")
        if describe:
            _echo_descriptors(doc["descriptors"])
        if out is not None:
            click.echo("  wrote " + ", ".join(doc["files"].values()))


COMMANDS = [section_cmd, project_cmd]
