"""``sheetview section``, ``project`` and ``compare``: virtual micrographs of a structure,
and their comparison with a real micrograph."""
from __future__ import annotations

import math
from pathlib import Path

import click
import numpy as np

from ..errors import OptionError
from .common import apply_at, at_options, dumps, echo_moment, load, parse_size, read_options
from .conventions import (command, deprecated_option, force_option, json_option, lines_option,
                          max_memory_option, output_option, quiet_option, seed_option, voxel_option,
                          warn)
from .. import pictures
from ..app.applies import check_option
from ..app.run import phase_grid
from ..app.settings import Settings
from ..grid import PhaseGrid
from ..io.images import read_micrograph
from ..io.output import atomic_path, check_writable
from ..measures.compare import compare, virtual_images
from ..measures.planar import describe
from ..measures.sections import (centre_and_span, grid_centre_and_span, parse_axis_or_normal,
                                 parse_vector, projection, section, segment_projection)
from ..pictures import grey_rgb
from ..report import atomic_folder, check_folder, write_csv, write_json
from ..structure import Structure
from ..style import BACKGROUND, PHASE_COLOURS, PHASE_LABELS, PHASE_ORDER, section_rgb

_PHASE_CHOICES = ("solid", "interlayer", "gel")


def _parse_phases(text):
    names = [t.strip().lower() for t in str(text).split(",") if t.strip()]
    bad = [n for n in names if n not in _PHASE_CHOICES]
    if not names or bad:
        raise OptionError(f"expected names from {', '.join(_PHASE_CHOICES)}, got {text!r}",
                          param="solid_phases")
    return tuple(names)


def _grid_of(obj, voxel, max_memory, *, needed=True):
    """The phase grid of ``obj`` with the measure settings (``sheetview.app.run.phase_grid``,
    the one builder); None when ``needed`` is False (prisms projected exactly). ``--voxel``
    and ``--max-memory`` are refused where no grid is made (the one rule,
    :mod:`sheetview.app.applies`)."""
    for name, value in (("voxel", voxel), ("max_memory", max_memory)):
        if value is not None:
            check_option(needed and not isinstance(obj, PhaseGrid), name, obj,
                         "prisms and solid bodies, which are rasterized at it (a voxel volume "
                         "is its own grid)" if needed else
                         "solid bodies and the sections of prisms, which are rasterized at it "
                         "(prisms are projected exactly, without a grid)")
    if not needed:
        return None
    return phase_grid(obj, Settings(voxel=voxel, max_memory=parse_size(max_memory)))


def _describe(mask, valid, pixel, lines, seed):
    return describe(mask, pixel, valid=valid, seed=seed, n_lines=lines)


def _check_outputs(output, stem, force, kind):
    """Check the outputs before any work: the folder of ``-o`` or the names of the
    deprecated ``--out STEM``."""
    if output is not None and stem is not None:
        raise OptionError("give -o FOLDER (or the deprecated --out STEM), not both",
                          param="output")
    if output is not None:
        check_folder(output, force)
    if stem is not None:
        for p in pictures.outputs(stem).values():
            check_writable(p, force)


def _write_pictures(output, stem, force, kind, pic, pages, pixel, description, doc):
    """Write the picture files: into the folder ``output`` (``KIND.png``, ``KIND.tif``,
    ``KIND_data.tif``, ``KIND.json``), or the deprecated STEM files. Returns name -> path."""
    if stem is not None:
        files = pictures.write_picture(stem, pic, pages, pixel, description, force=force)
        return {k: str(v) for k, v in files.items()}
    with atomic_folder(output, force, kind=kind) as (tmp, final):
        files = pictures.write_picture(tmp / kind, pic, pages, pixel, description)
        out = {k: str(final / Path(v).name) for k, v in files.items()}
        out["json"] = str(final / f"{kind}.json")
        write_json(tmp / f"{kind}.json", {**doc, "files": out})
    return out


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
    v = _number(text, "threshold")
    if unit_range and not 0 < v < 1:
        raise OptionError(f"a transmitted fraction between 0 and 1, got {text!r}",
                          param="threshold")
    if not np.isfinite(v):
        raise OptionError(f"must be finite, got {text!r}", param="threshold")
    return v


def _fmt_frac(d):
    return ", ".join(f"{k} {v:.3f}" for k, v in d.items())


def _common(f):
    f = quiet_option()(f)
    f = seed_option("Seed of the random lines of --describe.")(f)
    f = lines_option(2000, "Random lines of the chord distributions of --describe.")(f)
    f = click.option("--describe", is_flag=True,
                     help="Add the 2D descriptors of the binary image (area fraction, chords, "
                          "local thickness, S2, orientation) to the output.")(f)
    f = json_option()(f)
    f = force_option()(f)
    f = deprecated_option("--out", "stem", default=None, metavar="STEM", use="-o FOLDER",
                          help="Deprecated: write STEM.png, STEM.tif and STEM_data.tif.")(f)
    f = output_option("folder", "Write KIND.png and KIND.tif (the picture with a scale bar), "
                                "KIND_data.tif (the numbers, pixel size in the resolution "
                                "tags) and KIND.json into FOLDER (KIND: section or "
                                "projection).")(f)
    f = max_memory_option()(f)
    f = voxel_option()(f)
    return f


def _look(f):
    """The contrast options of a virtual transmission micrograph."""
    f = click.option("--resolution", type=float, default=0.0, show_default=True, metavar="NM",
                     help="Projections: Gaussian blur, full width at half maximum in nm "
                          "(0: none).")(f)
    f = click.option("--mfp", type=float, default=100.0, show_default=True, metavar="NM",
                     help="Projections: transmission length lambda in nm of exp(-t / lambda); "
                          "sets the contrast.")(f)
    return f


def _finite(value, param):
    v = float(value)
    if not math.isfinite(v):
        raise OptionError(f"must be a finite number of nm, got {value!r}", param=param)
    return v


def _section_offset(obj, grid, n, by_normal, at, origin, legacy_offset):
    """The plane's signed distance from the sample's centre along ``n`` (what
    :func:`sheetview.measures.sections.section` takes) from the absolute position: ``--at``
    (a coordinate along ``--axis``) or ``--origin`` (a point of the plane), default the
    centre; the deprecated ``--offset`` is that distance itself. Refuses a plane outside
    the sample."""
    given = [k for k, v in (("at", at), ("origin", origin), ("offset", legacy_offset))
             if v is not None]
    if len(given) > 1:
        raise OptionError(f"give the plane's position once (got {', '.join('<<' + g + '>>' for g in given)})",
                          param=given[0])
    centre, span = centre_and_span(obj, grid)
    if at is not None:
        check_option(not by_normal, "at", "a plane given by --normal",
                     "a plane across --axis (the coordinate along it, in nm); a plane given "
                     "by --normal takes <<origin>>")
        off = _finite(at, "at") - float(centre @ n)
        param = "at"
    elif origin is not None:
        check_option(by_normal, "origin", "a plane across --axis",
                     "a plane given by --normal (a point of it, X,Y,Z in nm); across --axis "
                     "the plane's coordinate is <<at>>")
        off = float((parse_vector(origin, "<<origin>>") - centre) @ n)
        param = "origin"
    elif legacy_offset is not None:
        off, param = _finite(legacy_offset, "offset"), "offset"
    else:
        return 0.0
    half = 0.5 * float(np.abs(span) @ np.abs(n))
    if abs(off) > half:
        lo, hi = float(centre @ n) - half, float(centre @ n) + half
        raise OptionError(f"puts the plane outside the sample (it spans {lo:.4g} to {hi:.4g} nm "
                          f"along the normal)", param=param)
    return off


@command("section")
@click.argument("path", metavar="FILE", type=click.Path(dir_okay=False))
@click.option("--axis", default=None, type=click.Choice(["x", "y", "z"], case_sensitive=False),
              help="Plane across this axis (default z).")
@click.option("--at", type=float, default=None, metavar="NM",
              help="Position of the plane along --axis: its coordinate in nm (default: the "
                   "domain's centre).")
@click.option("--normal", default=None, metavar="X,Y,Z",
              help="Plane normal (instead of --axis).")
@click.option("--origin", default=None, metavar="X,Y,Z",
              help="A point of the plane given by --normal, in nm (default: the domain's "
                   "centre).")
@deprecated_option("--offset", "legacy_offset", type=float, default=None, metavar="NM",
                   use="--at (a coordinate) or --origin (a point)",
                   help="Deprecated: distance of the plane from the domain's centre, nm.")
@click.option("--pixel", type=float, default=None, metavar="NM",
              help="Pixel edge of the picture in nm (default: the voxel edge).")
@click.option("--solid-phases", default="solid,interlayer", show_default=True, metavar="NAMES",
              help="Phases counted as solid in the binary image of --describe (a micrograph "
                   "rarely resolves interlayer water from the sheets).")
@_common
@at_options
@read_options
def section_cmd(path, axis, at, normal, origin, legacy_offset, pixel, solid_phases, voxel,
                max_memory, output, stem, force, as_json, describe, lines, seed, quiet,
                at_progress, at_time, **read_kw):
    """A virtual section: the phase image (solid, interlayer, gel pore) of any plane of a
    structure or volume, as PNG/TIFF with a scale bar. Positions are coordinates in nm."""

    phases = _parse_phases(solid_phases)
    n = parse_axis_or_normal(axis, normal)
    _check_outputs(output, stem, force, "section")
    obj, moment = apply_at(load(path, **read_kw), at_progress, at_time)
    echo_moment(moment)
    grid = _grid_of(obj, voxel, max_memory)
    offset = _section_offset(obj, grid, n, normal is not None, at, origin, legacy_offset)
    img = section(obj, n, offset, pixel=pixel, grid=grid)
    doc = {"file": str(path), **img.to_dict()}
    if describe:
        mask = img.mask(phases) & img.valid
        doc["solid_phases"] = list(phases)
        doc["descriptors"] = _describe(mask, img.valid, img.pixel, lines, seed).to_dict()
    if output is not None or stem is not None:
        present = set(np.unique(img.labels).tolist())
        legend = [(PHASE_COLOURS[c], PHASE_LABELS[c]) for c in PHASE_ORDER
                  if c in present and c != 0]
        a = int(np.argmax(np.abs(n)))
        cap = (f"{'xyz'[a]} = {float(img.origin[a]):.3g} nm" if np.max(np.abs(n)) > 1 - 1e-12
               else f"n = ({n[0]:.2f}, {n[1]:.2f}, {n[2]:.2f}) through "
                    f"({img.origin[0]:.3g}, {img.origin[1]:.3g}, {img.origin[2]:.3g}) nm")
        pic = pictures.render(section_rgb(img.labels, background=BACKGROUND), img.pixel,
                              caption=cap, legend=legend)
        doc["files"] = _write_pictures(
            output, stem, force, "section", pic, {"phase": img.labels}, img.pixel,
            {"kind": "section", "codes": {str(k): v for k, v in img.names.items()},
             "off_grid": 255, "source": str(path), **_at(moment)}, doc)
    _finish(doc, moment, img.notes, as_json, quiet,
            f"{path}: section {doc['shape_rows_cols'][1]} x {doc['shape_rows_cols'][0]} px "
            f"at {img.pixel:g} nm; {_fmt_frac(img.fractions())}")


def _echo_descriptors(d):
    keys = [k for k, v in d.items() if isinstance(v, (int, float)) and not isinstance(v, bool)]
    for k in keys:
        v = d[k]
        click.echo(f"  {k}: {v:.4g}" if isinstance(v, float) else f"  {k}: {v}")


def _slab_offset(obj, grid, axis, at, legacy_offset, slab):
    """The slab centre's distance from the sample's centre along ``axis`` (what
    :func:`sheetview.measures.sections.projection` takes) from ``--at`` (the coordinate of
    the slab's centre) or the deprecated ``--offset``; refuses a slab that misses the
    sample."""
    if at is not None and legacy_offset is not None:
        raise OptionError("give the slab's position once (--at)", param="at")
    if at is None and legacy_offset is None:
        return 0.0
    param = "at" if at is not None else "offset"
    check_option(slab is not None, param, "a projection of the whole sample",
                 "a slab: give its thickness with <<slab>>")
    a = "xyz".index(str(axis).lower())
    if isinstance(obj, Structure):
        centre, span = centre_and_span(obj)
    else:
        centre, span = grid_centre_and_span(grid)
    off = (_finite(at, "at") - float(centre[a])) if at is not None else _finite(legacy_offset,
                                                                              "offset")
    lo, hi = float(centre[a] - 0.5 * span[a]), float(centre[a] + 0.5 * span[a])
    z0, z1 = float(centre[a]) + off - 0.5 * slab, float(centre[a]) + off + 0.5 * slab
    if not slab > 0 or z1 <= lo or z0 >= hi:
        raise OptionError(f"the slab {z0:.4g} to {z1:.4g} nm along {axis} misses the sample "
                          f"({lo:.4g} to {hi:.4g} nm)", param=param)
    return off


@command("project")
@click.argument("path", metavar="FILE", type=click.Path(dir_okay=False))
@click.option("--axis", default="z", show_default=True,
              type=click.Choice(["x", "y", "z"], case_sensitive=False),
              help="Viewing direction: the slab lies across this axis.")
@click.option("--slab", type=float, default=None, metavar="NM",
              help="Slab thickness in nm (default: the whole domain).")
@click.option("--at", type=float, default=None, metavar="NM",
              help="Centre of the slab: its coordinate along --axis in nm (default: the "
                   "domain's centre).")
@deprecated_option("--offset", "legacy_offset", type=float, default=None, metavar="NM",
                   use="--at (the coordinate of the slab's centre)",
                   help="Deprecated: slab centre from the domain's centre, nm.")
@click.option("--pixel", type=float, default=None, metavar="NM",
              help="Pixel edge of the picture in nm (default: about 512 pixels across).")
@_look
@click.option("--threshold", default="otsu", show_default=True, metavar="otsu|VALUE",
              help="Segmentation of --describe: 'otsu' or an intensity in 0..1 below which a "
                   "pixel is solid.")
@_common
@at_options
@read_options
def project_cmd(path, axis, slab, at, legacy_offset, pixel, mfp, resolution, threshold, voxel,
                max_memory, output, stem, force, as_json, describe, lines, seed, quiet,
                at_progress, at_time, **read_kw):
    """A virtual transmission micrograph: solid thickness through a slab projected along an
    axis, shown as exp(-t / lambda), as PNG/TIFF with a scale bar."""

    thr = _threshold(threshold, unit_range=True)
    _check_outputs(output, stem, force, "projection")
    obj, moment = apply_at(load(path, **read_kw), at_progress, at_time)
    echo_moment(moment)
    grid = _grid_of(obj, voxel, max_memory, needed=not isinstance(obj, Structure))
    offset = _slab_offset(obj, grid, axis, at, legacy_offset, slab)
    img = projection(obj, axis, slab, offset=offset, pixel=pixel, mfp=mfp,
                     resolution=resolution, grid=grid)
    doc = {"file": str(path), **img.to_dict()}
    if describe:
        mask, used = segment_projection(img, thr)
        doc["threshold"] = used
        doc["descriptors"] = _describe(mask, img.valid, img.pixel, lines, seed).to_dict()
    if output is not None or stem is not None:
        rgb = pictures.grey_rgb(img.intensity, img.valid)
        cap = f"{img.axis} {img.slab[0]:.3g} to {img.slab[1]:.3g} nm, lambda {img.mfp:g} nm"
        pic = pictures.render(rgb, img.pixel, caption=cap)
        doc["files"] = _write_pictures(
            output, stem, force, "projection", pic,
            {"intensity": img.intensity, "thickness_nm": img.thickness,
             "valid": img.valid.astype(np.uint8)}, img.pixel,
            {"kind": "projection", "axis": img.axis, "slab_nm": list(img.slab), "mfp_nm": img.mfp,
             "resolution_fwhm_nm": img.resolution, "right": img.right, "up": img.up,
             "source": str(path), **_at(moment)}, doc)
    _finish(doc, moment, img.notes, as_json, quiet,
            f"{path}: projection along {img.axis}, {img.thickness.shape[1]} x "
            f"{img.thickness.shape[0]} px at {img.pixel:g} nm; slab {img.slab[0]:.4g} to "
            f"{img.slab[1]:.4g} nm; mean solid thickness {doc['mean_thickness_nm'] or 0:.3g} nm")


def legacy_png(output, command_name: str):
    """``-o PLOT.png`` of the release before, when ``-o`` named the plot: True (with a
    deprecation warning) when ``output`` ends in .png."""
    if output is not None and str(output).lower().endswith(".png"):
        warn(f"-o PLOT.png is deprecated for `sheetview {command_name}` (-o names a folder "
             f"now); the plot is written to {output}")
        return True
    return False


@command("compare")
@click.argument("path", metavar="FILE", type=click.Path(dir_okay=False))
@click.argument("image", metavar="IMAGE", type=click.Path(dir_okay=False))
@click.option("--pixel", "pixel_size", type=float, default=None, metavar="NM",
              help="Pixel edge of IMAGE in nm (needed unless its TIFF resolution tags say).")
@click.option("--threshold", default="otsu", show_default=True, metavar="otsu|VALUE",
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
@click.option("--count", type=int, default=5, show_default=True, metavar="N",
              help="Virtual micrographs, evenly spread through the middle 80 %% of the domain.")
@click.option("--slab", type=float, default=None, metavar="NM",
              help="Projections: slab thickness in nm (default: the domain split in --count).")
@_look
@click.option("--solid-phases", default="solid,interlayer", show_default=True, metavar="NAMES",
              help="Sections: phases counted as solid.")
@output_option("folder", "Write distances.csv (one row per distribution), compare.png (the "
                         "images side by side and the overlaid distributions) and "
                         "compare.json into FOLDER.")
@deprecated_option("--csv", "csv_out", type=click.Path(dir_okay=False), default=None,
                   metavar="FILE", use="-o FOLDER (writes distances.csv)",
                   help="Deprecated: write the distances to FILE.")
@voxel_option()
@max_memory_option()
@lines_option(2000, "Random lines per image for the chord distributions.")
@seed_option()
@json_option()
@force_option()
@quiet_option()
@at_options
@read_options
def compare_cmd(path, image, pixel_size, threshold, solid_is, kind, axis, count, slab, mfp,
                resolution, solid_phases, output, csv_out, voxel, max_memory, lines, seed,
                as_json, force, quiet, at_progress, at_time, **read_kw):
    """Put a structure's virtual micrographs beside a real micrograph IMAGE: the same 2D
    descriptors for both, and the Kolmogorov-Smirnov and Wasserstein distances between
    their chord and local-thickness distributions."""

    plot_out = output if legacy_png(output, "compare") else None
    folder = None if plot_out is not None else output
    outs = [p for p in (csv_out, plot_out) if p]
    if len(set(map(str, outs))) != len(outs):
        raise OptionError("--csv and -o name the same file", param="output")
    for p in outs:
        check_writable(p, force)
    if folder is not None:
        check_folder(folder, force)
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
    if folder is not None:
        with atomic_folder(folder, force, kind="compare") as (tmp, final):
            write_csv(tmp / "distances.csv", cmp_.table())
            _plot_compare(mg, vis[0], cmp_, tmp / "compare.png", False, str(path), str(image))
            write_json(tmp / "compare.json", doc)
        outs.append(str(folder))
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


def _number(text, param):
    try:
        return float(text)
    except ValueError:
        raise OptionError(f"expected 'otsu' or a number, got {text!r}", param=param) from None


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
