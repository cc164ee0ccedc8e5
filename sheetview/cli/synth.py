"""``sheetview synth``: write an invented demonstration structure with known ground truth."""
from __future__ import annotations

import math
import time

import click

from ..errors import OptionError
from ..domain import Box, Sphere
from ..io import write
from ..io.output import check_writable
from ..synth import pack_stacks, write_truth
from ..app.applies import not_applicable
from .conventions import command, force_option, output_option, seed_option


def _parse_triple(value, option, positive=False):
    if value is None:
        return None
    try:
        parts = tuple(float(v) for v in value.replace(" ", "").split(","))
    except ValueError:
        raise OptionError(f"expected three numbers separated by commas, got {value!r}",
                          param=option) from None
    if len(parts) != 3 or not all(math.isfinite(p) for p in parts):
        raise OptionError(f"expected three finite numbers separated by commas, got {value!r}",
                          param=option)
    if positive and min(parts) <= 0:
        raise OptionError(f"lengths must be positive nm, got {value!r}", param=option)
    return parts


def _domain(sphere, box, periodic):

    if sphere is not None and box is not None:
        raise OptionError("give either <<sphere>> R or <<box>> LX,LY,LZ, not both", param="sphere")
    if sphere is None and box is None:
        raise OptionError("give a domain: <<sphere>> R (nm, centred at the origin) or <<box>> "
                          "LX,LY,LZ (nm, from the origin)", param="box")
    if sphere is not None:
        if periodic:
            raise not_applicable("periodic", "a sphere", "a box (<<box>>)")
        if not (math.isfinite(sphere) and sphere > 0):
            raise OptionError(f"the radius must be a positive number of nm, got {sphere}",
                              param="sphere")
        return Sphere((0.0, 0.0, 0.0), sphere)
    L = _parse_triple(box, "box", positive=True)
    return Box((0.0, 0.0, 0.0), L, periodic)


@command()
@output_option("file", "Prism table to write (.csv, .npz or .parquet).", required=True)
@click.option("--sphere", type=float, default=None, metavar="NM",
              help="Spherical pore of this radius in nm, centred at the origin.")
@click.option("--box", default=None, metavar="LX,LY,LZ",
              help="Box from the origin to (LX, LY, LZ), in nm.")
@click.option("--periodic", is_flag=True, help="Make the box periodic (no walls).")
@click.option("--stacks", "n_stacks", type=int, default=None, metavar="N",
              help="Stacks to place (fewer if the domain jams; see --max-attempts)  "
                   "[default: 100; with --target-fraction: no limit]")
@click.option("--target-fraction", type=float, default=None, metavar="FRACTION",
              help="Fill mode: place stacks into the remaining gaps, shrinking them to "
                   "fit, until the C-S-H volume (prisms + interlayer gaps) is this "
                   "fraction of the domain (0 < F < 1) or nothing more fits.")
@click.option("--fill-voxel", type=float, default=None, metavar="NM",
              help="Fill mode: voxel of the free-space map in nm  "
                   "[default: 0.4 x edge, coarser above a 63 nm box]")
@click.option("--fill-tries", type=int, default=32, show_default=True, metavar="N",
              help="Fill mode: proposals drawn per site; the one fitting the most volume "
                   "is kept (1: orientations and relative sizes as drawn).")
@click.option("--seeding", type=click.Choice(["volume", "wall"]), default="volume",
              show_default=True,
              help="Stack centres uniform in the volume, or next to the wall.")
@click.option("--orientation", type=click.Choice(["isotropic", "wall", "fixed"]),
              default="isotropic", show_default=True,
              help="Stack normals: uniform, Watson about the inward wall normal (--kappa), "
                   "or all equal to --normal.")
@click.option("--kappa", type=float, default=10.0, show_default=True, metavar="NUMBER",
              help="Watson concentration for --orientation wall (density ~ exp(kappa cos^2); "
                   "negative: girdle).")
@click.option("--normal", default="0,0,1", show_default=True, metavar="X,Y,Z",
              help="Stack normal for --orientation fixed.")
@click.option("--layers", default="poisson:3", show_default=True, metavar="SPEC",
              help="Layers per stack: fixed:N, uniform:A,B or poisson:M (1 + Poisson(M-1)).")
@click.option("--lateral", default="lognormal:5,0.3", show_default=True, metavar="SPEC",
              help="Layer diameter in nm: fixed:D, uniform:A,B or lognormal:MEDIAN,SIGMA.")
@click.option("--edge", type=float, default=1.0, show_default=True, metavar="NM",
              help="Edge of the equilateral triangles in nm.")
@click.option("--repeat", type=float, default=1.4, show_default=True, metavar="NM",
              help="Interlayer repeat in nm: the distance between layer mid-planes in a stack.")
@click.option("--thickness", type=float, default=0.7, show_default=True, metavar="NM",
              help="Prism thickness in nm (below --repeat).")
@click.option("--clearance", type=float, default=0.3, show_default=True, metavar="NM",
              help="Least distance between prisms of different stacks, in nm.")
@click.option("--wall-gap", type=float, default=0.3, show_default=True, metavar="NM",
              help="Extra distance between wall-seeded stacks and the wall, in nm.")
@click.option("--tilt-angle", type=float, default=0.0, show_default=True, metavar="DEG",
              help="Tilt of a defect layer about an in-plane axis, in deg.")
@click.option("--tilt-probability", type=float, default=0.0, show_default=True,
              metavar="FRACTION",
              help="Probability that a stack gets one tilted defect layer on top.")
@click.option("--born/--no-born", default=False, show_default=True,
              help="Add a 'born' column (stacks in placement order, one layer per step).")
@click.option("--max-attempts", type=int, default=None, metavar="N",
              help="Candidate stacks to try at most  [default: 100 x stacks + 1000]")
@seed_option("Seed of every random choice.")
@click.option("--truth", type=click.Path(dir_okay=False), default=None, metavar="FILE",
              help="Also write the per-prism ground truth (stack, layer, tilted, "
                   "stacking number) as CSV.")
@click.option("--particles", type=click.Choice(["spheres", "layered"]), default=None,
              help="Write a particle packing instead of sheet stacks: polydisperse spheres "
                   "(--radius) or layered particles (--layers, --lateral, --repeat, "
                   "--thickness), packed to --target-fraction [default 0.55] of the domain.")
@click.option("--radius", default="lognormal:1.5,0.2", show_default=True, metavar="SPEC",
              help="With --particles spheres: sphere radius in nm (fixed:R, uniform:A,B or "
                   "lognormal:MEDIAN,SIGMA).")
@force_option()
def synth(output, sphere, box, periodic, n_stacks, target_fraction, fill_voxel, fill_tries,
          seeding, orientation, kappa, normal, layers, lateral, edge, repeat, thickness,
          clearance, wall_gap, tilt_angle, tilt_probability, born, max_attempts, seed, truth,
          particles, radius, force):
    """Write an invented demonstration structure: stacks of triangulated sheets packed at
    random into a sphere or box, with known ground truth.

    Not a growth simulation: finished stacks (layers REPEAT nm apart, exact copies) are
    placed one after another and kept if they stay inside the domain and at least
    CLEARANCE nm from every other stack. With --target-fraction, stacks go on into the
    remaining gaps, shrunk to fit, up to a gel-like packing. Lengths in nm.

    \b
    Examples:
      sheetview synth --sphere 20 --stacks 150 --seeding wall --orientation wall \\
          --kappa 10 -o pore.npz --truth pore_truth.csv
      sheetview synth --box 40,40,40 --periodic --target-fraction 0.35 -o dense.npz
    """
    from pathlib import Path


    dom = _domain(sphere, box, periodic)
    nrm = _parse_triple(normal, "normal")
    suffix = Path(output).suffix.lower()
    if suffix not in {".csv", ".npz", ".parquet", ".pq"}:
        raise OptionError(f"write the structure as .csv, .npz or .parquet, not "
                          f"{suffix or '(no suffix)'!r}", path=output, param="output")
    if truth is not None:
        if Path(truth).suffix.lower() != ".csv":
            raise OptionError("the ground-truth table is written as .csv", path=truth,
                              param="truth")
        if Path(truth).resolve() == Path(output).resolve():
            raise OptionError("<<truth>> must differ from <<output>>", path=truth, param="truth")
        check_writable(truth, force)
    check_writable(output, force)
    if particles is not None:
        _particles(particles, dom, output, target_fraction, radius, layers, lateral, repeat,
                   thickness, clearance, n_stacks, seed, truth, force)
        return
    if n_stacks is None and target_fraction is None:
        n_stacks = 100
    t0 = time.perf_counter()
    res = pack_stacks(dom, n_stacks, seeding=seeding, orientation=orientation, kappa=kappa,
                      normal=nrm, layers=layers, lateral_size=lateral, triangle_edge=edge,
                      repeat=repeat, thickness=thickness, clearance=clearance, wall_gap=wall_gap,
                      tilt_angle=tilt_angle, tilt_probability=tilt_probability, born=born,
                      max_attempts=max_attempts, seed=seed, target_fraction=target_fraction,
                      fill_voxel=fill_voxel, fill_tries=fill_tries)
    write(res.structure, output, force=force)
    if truth is not None:
        write_truth(res, truth, force=force)
    if target_fraction is None:
        short = "" if res.n_stacks == n_stacks else (
            f" (of {n_stacks} requested: the domain is full at this clearance; "
            f"{res.attempts} candidates tried)")
    else:
        why = {"target": "target reached",
               "full": "nothing more fits at this clearance: target NOT reached",
               "stacks": "--stacks reached", "attempts": "--max-attempts reached"}
        short = (f", C-S-H {res.csh_fraction:.4f} of the domain (target {target_fraction:g}; "
                 f"{why[res.settings['stopped']]})")
    click.echo(f"sheetview synth: {res.n_stacks} stacks{short}, {len(res.structure)} prisms, "
               f"{int(res.stacks.has_tilt.sum())} tilted layers, {time.perf_counter() - t0:.2f} s "
               f"-> {output}", err=True)


def _particles(kind, dom, output, target_fraction, radius, layers, lateral, repeat, thickness,
               clearance, n_stacks, seed, truth, force):
    """``--particles``: a random dense packing (sheetview.synth.pack_particles)."""
    from ..synth import pack_particles
    ctx = click.get_current_context()
    if truth is not None or n_stacks is not None:
        raise OptionError("--truth and --stacks apply to sheet stacks; a particle table carries "
                          "its ground truth in its header ('generator')")
    given = ctx.get_parameter_source("clearance") != click.core.ParameterSource.DEFAULT
    t0 = time.perf_counter()
    res = pack_particles(dom, 0.55 if target_fraction is None else target_fraction, kind=kind,
                         radius=radius, layers=layers, lateral=lateral, repeat=repeat,
                         thickness=thickness, clearance=clearance if given else 0.0, seed=seed)
    res.write(output, force=force)
    extra = ("" if res.structure is None else
             f", solid {res.solid_fraction:.4f}, interlayer "
             f"{res.interlayer_volume / dom.volume:.4f} of the domain, {len(res.structure)} prisms")
    what = "spheres" if kind == "spheres" else "layered particles in spheres"
    click.echo(f"sheetview synth: {res.n_particles} {what}, spheres "
               f"{res.sphere_fraction:.4f} of the domain (target "
               f"{res.settings['target_fraction']:g}"
               f"{'' if res.settings['stopped'] == 'target' else ': jammed before it'})"
               f"{extra}, {time.perf_counter() - t0:.2f} s -> {output}", err=True)
