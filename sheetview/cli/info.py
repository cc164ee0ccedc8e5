"""``sheetview info FILE``: what is in a file, and what looks wrong."""
from __future__ import annotations

import json

import click

from .common import dumps, load, read_options
from .conventions import command, json_option
from ..app.describe import describe


def _fmt_stats(d, unit):
    if d["min"] is None:
        return "-"
    return f"{d['min']:.4g} / {d['mean']:.4g} / {d['max']:.4g} {unit} (min / mean / max)"


def _fmt_vec(v):
    return "(" + ", ".join(f"{x:.4g}" for x in v) + ")"


def _fmt_domain(d):
    tag = "  [no domain in the file: padded bounding box]" if d["inferred"] else ""
    if d["shape"] == "sphere":
        text = f"sphere, centre {_fmt_vec(d['center'])} nm, radius {d['radius']:.4g} nm"
    else:
        text = f"box {_fmt_vec(d['min'])} to {_fmt_vec(d['max'])} nm"
        if d.get("periodic"):
            text += ", periodic"
    return f"{text}, volume {d['volume_nm3']:.6g} nm^3{tag}"


@command()
@click.argument("file", metavar="FILE", type=click.Path(dir_okay=False))
@read_options
@json_option("Print one JSON document on stdout instead of text.")
def info(file, as_json, **read_opts):
    """Describe FILE: counts, domain, bounds, sizes, orientation, and warnings.

    Warnings include prisms outside the domain, prisms crossing the wall, duplicated
    triangles and a missing domain.
    """

    obj = load(file, **read_opts)
    d = describe(obj)
    if as_json:
        click.echo(dumps(d))
        return
    lines = [f"file          {file}"]
    if d["kind"] == "prisms":
        lines += [
            f"content       {d['n_prisms']:,} prisms (sheet fragments)",
            f"domain        {_fmt_domain(d['domain'])}",
            f"bounds        {_fmt_vec(d['bounds_nm']['min'])} to {_fmt_vec(d['bounds_nm']['max'])} nm",
            f"repeat        {d['spacing_nm']:.4g} nm (nominal interlayer spacing)",
            f"thickness     {_fmt_stats(d['thickness_nm'], 'nm')}",
            f"area          {_fmt_stats(d['area_nm2'], 'nm^2')}",
            f"edge          {_fmt_stats(d['edge_nm'], 'nm')}",
            f"prism volume  {d['total_prism_volume_nm3']:.6g} nm^3 = "
            f"{100 * d['prism_volume_fraction_of_domain']:.3g}% of the domain (overlaps counted twice)",
        ]
        if d["orientation"]:
            o = d["orientation"]
            lines.append(f"orientation   S = {o['S']:.3f} (volume-weighted order of sheet normals), "
                         f"director {_fmt_vec(o['director'])}")
        for name, st in d["columns"].items():
            extra = f", {st['distinct']} distinct" if "distinct" in st else ""
            lines.append(f"column        {name}: {_fmt_stats(st, '').strip()}{extra}")
    elif d["kind"] == "solid body":
        lines += [
            f"content       closed surface read as a solid body: {d['n_faces']:,} triangles",
            f"domain        {_fmt_domain(d['domain'])}",
            f"volume        {d['volume_nm3']:.6g} nm^3, surface {d['area_nm2']:.6g} nm^2",
        ]
    elif d["kind"].startswith("particles"):
        lines += [
            f"content       {d['n_particles']:,} {d['kind']}",
            f"domain        {_fmt_domain(d['domain'])}",
            f"volume        {d['total_particle_volume_nm3']:.6g} nm^3 = "
            f"{100 * d['particle_volume_fraction_of_domain']:.3g}% of the domain, surface "
            f"{d['total_particle_surface_nm2']:.6g} nm^2 (overlaps counted twice)",
        ]
    else:
        sh = " x ".join(str(v) for v in d["shape"])
        vs = " x ".join(f"{v:.4g}" for v in d["voxel_size_nm"])
        lines += [
            f"content       voxel volume {sh}, voxel {vs} nm"
            + (", periodic" if d["periodic"] else ""),
            f"extent        {_fmt_vec(d['extent_nm'])} nm from origin {_fmt_vec(d['origin_nm'])} nm",
            "phases        " + ", ".join(f"{k} {100 * v:.3g}%" for k, v in d["phase_fractions"].items()),
        ]
    for k, v in (d.get("metadata") or {}).items():
        lines.append(f"metadata      {k}: {v if isinstance(v, str) else json.dumps(v)}")
    for w in d["warnings"]:
        lines.append(f"warning       {w}")
    click.echo("\n".join(lines))
