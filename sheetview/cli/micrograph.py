"""``sheetview micrograph IMAGE``: segment a micrograph and measure its 2D descriptors.

Prints a short summary (or the JSON document with ``--json``); with ``-o FOLDER`` writes
``descriptors.json``, ``chords.csv``, ``thickness.csv``, ``s2.csv``, ``orientation.csv``
and ``overview.png`` (the image with the segmentation and a scale bar, and the
distributions). The folder is assembled under a temporary name beside it and renamed into
place when complete.
"""
from __future__ import annotations

import math
from pathlib import Path

import click
import numpy as np

from .._version import __version__
from ..errors import OptionError
from .common import dumps
from .conventions import (command, force_option, json_option, lines_option, output_option,
                          quiet_option, seed_option)
from ..io.images import read_micrograph
from ..io.output import atomic_path
from ..measures.planar import describe
from ..io.columns import with_units
from ..report import atomic_folder, check_folder, write_csv, write_json
from ..view import nice_length

#: Files of the output folder.
OUTPUT_FILES = ("descriptors.json", "chords.csv", "thickness.csv", "s2.csv",
                "orientation.csv", "overview.png")

SOLID_COLOUR = (0.93, 0.47, 0.20)
INVALID_COLOUR = (0.35, 0.55, 0.85)


def run_micrograph(path, *, pixel_size=None, threshold="otsu", solid=None, channel=None,
                   lines: int = 2000, seed: int = 0, crop=None, scale_bar: str = "auto"):
    """Read and segment the image, measure it. Returns (Micrograph, PlanarDescriptors,
    JSON document)."""

    if isinstance(lines, bool) or int(lines) != lines or not 1 <= lines <= 10_000_000:
        raise OptionError(f"must be between 1 and 10,000,000, got {lines}", param="lines")
    mg = read_micrograph(path, pixel_size=pixel_size, threshold=threshold, solid=solid,
                         channel=channel, crop=crop, scale_bar=scale_bar)
    desc = describe(mg.mask, mg.pixel, valid=None if mg.valid.all() else mg.valid,
                    seed=seed, n_lines=int(lines))
    doc = {"sheetview_version": __version__, "image": mg.to_dict(),
           "settings": {"lines": int(lines), "seed": seed},
           "descriptors": desc.to_dict()}
    return mg, desc, doc


# ====================================================================== summary
def summary_lines(mg, desc) -> list[str]:
    def f(x, unit=""):
        return "n/a" if x is None or not math.isfinite(x) else f"{x:.4g}{unit}"

    h = desc.headline()
    M, L = mg.shape
    thr = ("two-valued image, no threshold" if mg.threshold_method == "two-valued"
           else f"{mg.threshold:.6g} ({'Otsu' if mg.threshold_method == 'otsu' else 'given'})")
    hd = desc.chords.headline_direction() or "all directions"
    lines = [
        f"image        {mg.path}  ({L} x {M} pixels, {mg.dtype})",
        f"pixel        {mg.pixel:g} nm  (field of view {L * mg.pixel:.4g} x {M * mg.pixel:.4g} nm)",
        f"threshold    {thr}; solid = {mg.solid}",
    ]
    if mg.crop is not None and tuple(mg.crop) != (0, 0, L, M):
        lines.append(f"region       columns {mg.crop[0]} to {mg.crop[2] - 1}, rows {mg.crop[1]} "
                     f"to {mg.crop[3] - 1} of the file")
    lines += [f"note         {n}" for n in mg.notes]
    lines += [
        f"solid area   {h['area_fraction']:.4f}",
        f"chords       solid mean {f(h['mean_chord_solid_nm'], ' nm')}, pore mean "
        f"{f(h['mean_chord_pore_nm'], ' nm')}  ({hd} lines, edge-corrected)",
        f"thickness    solid mean {f(h['mean_thickness_solid_nm'], ' nm')}, pore mean "
        f"{f(h['mean_thickness_pore_nm'], ' nm')}  (area-weighted)",
        f"orientation  layers at {f(h['orientation_deg'], ' deg')}, order "
        f"{f(h['orientation_order'])}, coherence {f(h['coherence'])}",
    ]
    return lines


# ====================================================================== figure
def _nice_length(span: float) -> float:
    return nice_length(span)


def overview_figure(mg, desc):
    """The overview figure (matplotlib Agg Figure, no pyplot state): the image with the
    solid tinted, its outline and a scale bar; chord, thickness, S2 and orientation
    distributions."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    M, L = mg.shape
    k = max(1, int(math.ceil(max(M, L) / 1200)))  # display stride for large images
    grey = mg.grey[::k, ::k]
    mask = mg.mask[::k, ::k]
    valid = mg.valid[::k, ::k]
    fig = Figure(figsize=(13.0, 6.4), dpi=100)
    FigureCanvasAgg(fig)
    gs = fig.add_gridspec(2, 4, width_ratios=[1.25, 1.25, 1, 1], wspace=0.38, hspace=0.42,
                          left=0.03, right=0.98, top=0.9, bottom=0.1)
    ax = fig.add_subplot(gs[:, :2])
    ext = (0.0, L * mg.pixel, M * mg.pixel, 0.0)
    g = np.where(valid, grey, np.nan)
    finite = g[np.isfinite(g)]
    lo, hi = (np.percentile(finite, [0.5, 99.5]) if finite.size else (0.0, 1.0))
    if not hi > lo:
        lo, hi = float(np.nanmin(g)), float(np.nanmax(g)) + 1e-12
    ax.imshow(g, cmap="gray", vmin=lo, vmax=hi, extent=ext, interpolation="nearest")
    ov = np.zeros(mask.shape + (4,))
    ov[mask] = SOLID_COLOUR + (0.35,)
    ov[~valid] = INVALID_COLOUR + (0.55,)
    ax.imshow(ov, extent=ext, interpolation="nearest")
    if mask.any() and (~mask).any() and min(mask.shape) >= 2:
        yy = (np.arange(mask.shape[0]) + 0.5) * k * mg.pixel
        xx = (np.arange(mask.shape[1]) + 0.5) * k * mg.pixel
        ax.contour(xx, yy, mask.astype(float), levels=[0.5], colors=[SOLID_COLOUR],
                   linewidths=0.6)
    ax.set_xlim(0, L * mg.pixel)
    ax.set_ylim(M * mg.pixel, 0)
    ax.set_xticks([])
    ax.set_yticks([])
    bar = _nice_length(L * mg.pixel)
    x0 = 0.04 * L * mg.pixel
    y0 = 0.95 * M * mg.pixel
    ax.plot([x0, x0 + bar], [y0, y0], color="white", lw=5, solid_capstyle="butt")
    ax.plot([x0, x0 + bar], [y0, y0], color="black", lw=2.5, solid_capstyle="butt")
    ax.text(x0 + bar / 2, y0 - 0.02 * M * mg.pixel, f"{bar:g} nm", ha="center", va="bottom",
            color="white", fontsize=10, fontweight="bold")
    thr = ("two-valued" if mg.threshold_method == "two-valued" else
           f"threshold {mg.threshold:.4g} ({mg.threshold_method})")
    ax.set_title(f"{Path(mg.path).name}: solid ({mg.solid}) tinted, {thr}; solid area "
                 f"{desc.area.area_fraction:.3f}", fontsize=10)
    colours = {"solid": SOLID_COLOUR, "pore": (0.2, 0.4, 0.7)}
    # chords
    ax1 = fig.add_subplot(gs[0, 2])
    ch = desc.chords
    hd = ch.headline_direction()
    for ph in ("solid", "pore"):
        x = ch.chords(ph, hd)
        w = ch.weights(ph, hd)
        if x.size and w.sum() > 0:
            top = np.quantile(x, 0.99)
            ax1.hist(x, bins=40, range=(0, max(top, mg.pixel)), weights=w, density=True,
                     histtype="step", color=colours[ph], lw=1.5,
                     label=f"{ph} (mean {ch.mean(ph, hd):.3g} nm)")
    ax1.set_xlabel("chord length (nm)")
    ax1.set_ylabel("density (1/nm)")
    ax1.set_title(f"chords, {hd or 'all'} lines", fontsize=9)
    ax1.legend(fontsize=7, frameon=False)
    # thickness
    ax2 = fig.add_subplot(gs[0, 3])
    th = desc.thickness
    vals = {ph: th.values(ph) for ph in ("solid", "pore") if ph in th.maps}
    top = max([float(np.quantile(v, 0.995)) for v in vals.values() if v.size] + [mg.pixel])
    edges = np.linspace(0.0, top * 1.02, 31)
    for ph, v in vals.items():
        if v.size:
            c, _ = np.histogram(v, bins=edges)
            ax2.stairs(c / v.size / np.diff(edges), edges, color=colours[ph], lw=1.5,
                       label=f"{ph} (mean {th.mean[ph]:.3g} nm)")
    ax2.set_xlabel("local thickness (nm)")
    ax2.set_ylabel("area density (1/nm)")
    ax2.set_title("local thickness", fontsize=9)
    ax2.legend(fontsize=7, frameon=False)
    # S2
    ax3 = fig.add_subplot(gs[1, 2])
    s2 = desc.s2
    ax3.plot(s2.r, s2.s2, color=colours["solid"], lw=1.5)
    ax3.axhline(s2.phi ** 2, color="grey", lw=0.8, ls="--", label="φ²")
    ax3.set_xlabel("r (nm)")
    ax3.set_ylabel("S₂(r), solid")
    ax3.set_title("two-point probability", fontsize=9)
    ax3.legend(fontsize=7, frameon=False)
    # orientation
    ax4 = fig.add_subplot(gs[1, 3])
    o = desc.orientation
    e = o.bin_edges
    ax4.stairs(o.histogram, e, color="k", lw=1.5)
    if math.isfinite(o.angle):
        ax4.axvline(o.angle, color=colours["solid"], lw=1.0)
    ax4.set_xlim(0, 180)
    ax4.set_xticks([0, 45, 90, 135, 180])
    ax4.set_xlabel("layer angle (deg from +x)")
    ax4.set_ylabel("fraction (squared-gradient weighted)")
    ax4.set_title(f"orientation: order {o.order:.2f}, coherence {o.coherence:.2f}",
                  fontsize=9)
    fig.suptitle(f"sheetview micrograph  |  pixel {mg.pixel:g} nm, {L} x {M} pixels",
                 fontsize=11)
    return fig


# ======================================================================= folder
def write_folder(outdir, mg, desc, doc, *, force: bool = False) -> list[Path]:
    """Write the output folder: assembled under a temporary name beside ``outdir`` and
    renamed into place when complete (with ``force`` into an existing folder:
    :func:`sheetview.report.atomic_folder`). Every file goes through ``atomic_path``."""

    with atomic_folder(outdir, force, kind="micrograph") as (tmp, final):
        write_json(tmp / "descriptors.json", doc)
        write_csv(tmp / "chords.csv", with_units("chords", desc.chords.table()))
        write_csv(tmp / "thickness.csv", with_units("thickness", desc.thickness.table()))
        write_csv(tmp / "s2.csv", with_units("s2", desc.s2.table()))
        write_csv(tmp / "orientation.csv", with_units("orientation", desc.orientation.table()))
        fig = overview_figure(mg, desc)
        with atomic_path(tmp / "overview.png") as p:
            fig.savefig(str(p), format="png", dpi=100)
    return [final / n for n in OUTPUT_FILES]


# ====================================================================== command
@command("micrograph")
@click.argument("image", metavar="IMAGE", type=click.Path(dir_okay=False))
@click.option("--pixel", "pixel_size", type=float, default=None, metavar="NM",
              help="Edge of one pixel in nm (required unless the file gives it: TIFF "
                   "resolution tags, PNG pHYs, or a sheetview description).")
@click.option("--threshold", default="otsu", show_default=True, metavar="otsu|VALUE",
              help="Grey value separating solid from pore, in the image's own scale, or otsu.")
@click.option("--solid", type=click.Choice(["bright", "dark"]), default=None,
              help="Which side of the threshold is solid (default bright; dark for a "
                   "projection written by sheetview).")
@click.option("--crop", default=None, metavar="X0,Y0,X1,Y1",
              help="Measure only columns X0..X1-1 and rows Y0..Y1-1 (pixels, from the top "
                   "left corner).")
@click.option("--scale-bar", "scale_bar", type=click.Choice(["auto", "exclude", "keep"]),
              default="auto", show_default=True,
              help="A burned-in scale bar or information strip at the top or bottom edge: auto "
                   "leaves it out when found in a grey image, exclude looks in every image, "
                   "keep measures every pixel.")
@click.option("--channel", default=None, type=click.Choice(["r", "g", "b"]),
              help="Colour images: use one channel instead of the BT.709 luma.")
@lines_option(2000, "Isotropic random lines for the chord lengths.")
@seed_option()
@json_option()
@output_option("folder", "Write descriptors.json, CSV tables and overview.png into FOLDER.")
@force_option("Write into an existing output folder.")
@quiet_option("Print no summary.")
def micrograph(image, pixel_size, threshold, solid, crop, scale_bar, channel, lines, seed,
               as_json, output, force, quiet):
    """Segment a micrograph (PNG, TIFF, JPEG) into solid and pore and measure it: area
    fraction, chord lengths (rows, columns, isotropic random lines), local thickness,
    two-point probability S2 and layer orientation. Lengths are nm."""
    outdir = output
    if outdir is not None:
        check_folder(outdir, force)  # refuse before the work
    mg, desc, doc = run_micrograph(image, pixel_size=pixel_size, threshold=threshold,
                                   solid=solid, channel=channel, lines=lines, seed=seed,
                                   crop=crop, scale_bar=scale_bar)
    for w in mg.warnings:
        click.echo(f"sheetview: warning: {w}", err=True)
    written = []
    if outdir is not None:
        written = write_folder(outdir, mg, desc, doc, force=force)
    if as_json:
        click.echo(dumps(doc))
    elif not quiet:
        for line in summary_lines(mg, desc):
            click.echo(line)
        if written:
            click.echo(f"written      {Path(outdir)}/ ({', '.join(p.name for p in written)})")


COMMANDS = [micrograph]
