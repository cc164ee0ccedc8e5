"""Regenerate every file in sample_structures/ (all invented demonstration data).

    python sample_structures/make_samples.py [--force]

The prism tables are made by the ``sheetview synth`` commands listed in README.md (run
here through the same click command, so the files hold exactly what those commands
write; NPZ/Parquet containers may differ in byte-level details such as timestamps). The PLY mesh and the TIFF volume are made from structures of the same generator
(:func:`sheetview.synth.pack_stacks`) by the two small functions below.
"""
from __future__ import annotations

import argparse
import shlex
import sys
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent

#: (file, ground-truth file or None, sheetview synth arguments)
COMMANDS = [
    ("single_stack.csv", None,
     "--box 12,12,12 --stacks 1 --layers fixed:5 --lateral fixed:6 --orientation fixed "
     "--normal 0,0,1 --seed 1"),
    ("wall_stacks_sphere40.npz", "wall_stacks_sphere40_truth.csv",
     "--sphere 20 --stacks 100 --seeding wall --orientation wall --kappa 10 "
     "--layers poisson:3 --lateral lognormal:5,0.3 --born --seed 40"),
    ("isotropic_box.parquet", None,
     "--box 30,30,30 --stacks 110 --layers poisson:3 --lateral lognormal:5,0.3 --seed 30"),
    ("tilted_defects_box.npz", "tilted_defects_box_truth.csv",
     "--box 30,30,30 --stacks 100 --layers poisson:3 --lateral lognormal:5,0.3 "
     "--tilt-probability 0.4 --tilt-angle 20 --seed 31"),
]

PLY_ARGS = dict(n_stacks=6, layers="uniform:1,2", lateral_size="uniform:5,8", seed=7)
TIF_ARGS = dict(n_stacks=120, layers="poisson:3", lateral_size="lognormal:5,0.3", seed=64)
TIF_VOXEL_NM = 0.5
TIF_SHAPE = 64


def synth_args(name, truth, args):
    out = ["synth", *shlex.split(args), "-o", str(HERE / name)]
    if truth:
        out += ["--truth", str(HERE / truth)]
    return out


def make_open_sheets_ply(path: Path, force: bool) -> int:
    """A few open sheet patches (single layers and two-layer stacks) in a 20 nm box,
    written as one PLY triangle mesh with shared vertices (nm). Returns the face count."""
    import trimesh

    from sheetview.domain import Box
    from sheetview.io.output import atomic_path
    from sheetview.synth import pack_stacks

    r = pack_stacks(Box((0, 0, 0), (20, 20, 20)), **PLY_ARGS)
    v = r.structure.vertices.reshape(-1, 3)
    faces = np.arange(len(v)).reshape(-1, 3)
    mesh = trimesh.Trimesh(v, faces, process=False)
    mesh.merge_vertices(digits_vertex=6)
    with atomic_path(path, force) as tmp:
        mesh.export(tmp, file_type="ply")
    return len(mesh.faces)


def voxelize(structure, shape: int, voxel: float) -> np.ndarray:
    """Label voxels whose centre lies inside any prism (1 = solid, 0 = gel pore).

    Exact point-in-prism test for the voxel centres in each prism's bounding box:
    |(p - a) . n| <= t/2 and the projection of p inside the triangle (barycentric).
    Returns labels indexed [i, j, k] = x, y, z.
    """
    v = structure.vertices
    t = structure.thickness
    n = structure.normals
    lab = np.zeros((shape,) * 3, dtype=np.uint8)
    lo_c, hi_c = structure.prism_corners().min(axis=1), structure.prism_corners().max(axis=1)
    i0 = np.clip(np.floor(lo_c / voxel - 0.5).astype(int), 0, shape - 1)
    i1 = np.clip(np.ceil(hi_c / voxel - 0.5).astype(int), 0, shape - 1)
    span = (i1 - i0 + 1).max(axis=0)
    offs = np.stack(np.meshgrid(*(np.arange(s) for s in span), indexing="ij"), -1).reshape(-1, 3)
    for chunk in range(0, len(v), 4000):
        sl = slice(chunk, chunk + 4000)
        idx = i0[sl, None, :] + offs[None]                        # (P, K, 3)
        valid = np.all(idx <= i1[sl, None, :], axis=2)
        p = (idx + 0.5) * voxel
        a, b, c = v[sl, 0], v[sl, 1], v[sl, 2]
        ap = p - a[:, None]
        h = np.einsum("pkj,pj->pk", ap, n[sl])
        ok = valid & (np.abs(h) <= 0.5 * t[sl, None])
        q = ap - h[..., None] * n[sl, None, :]
        e0, e1 = b - a, c - a
        d00 = np.einsum("pj,pj->p", e0, e0)[:, None]
        d01 = np.einsum("pj,pj->p", e0, e1)[:, None]
        d11 = np.einsum("pj,pj->p", e1, e1)[:, None]
        d20 = np.einsum("pkj,pj->pk", q, e0)
        d21 = np.einsum("pkj,pj->pk", q, e1)
        den = d00 * d11 - d01 * d01
        bv = (d11 * d20 - d01 * d21) / den
        bw = (d00 * d21 - d01 * d20) / den
        ok &= (bv >= 0) & (bw >= 0) & (bv + bw <= 1)
        hit = idx[ok]
        lab[hit[:, 0], hit[:, 1], hit[:, 2]] = 1
    return lab


def make_small_volume_tif(path: Path, force: bool) -> float:
    """A 64^3 two-phase uint8 TIFF (0 = gel pore, 1 = solid), voxel 0.5 nm, from an
    isotropic packing in a 32 nm box. Pages along z (array stored z, y, x), written in the
    widely used hyperstack convention that other programs write (description keys
    ``unit = nm``, ``spacing`` = z voxel size, X/Y resolution 2 pixels per nm): the sample
    of a volume made elsewhere.
    Returns the solid fraction."""
    import tifffile

    from sheetview.domain import Box
    from sheetview.io.output import atomic_path
    from sheetview.synth import pack_stacks

    L = TIF_SHAPE * TIF_VOXEL_NM
    r = pack_stacks(Box((0, 0, 0), (L, L, L)), **TIF_ARGS)
    lab = voxelize(r.structure, TIF_SHAPE, TIF_VOXEL_NM)
    with atomic_path(path, force) as tmp:
        tifffile.imwrite(tmp, np.ascontiguousarray(lab.transpose(2, 1, 0)), imagej=True,
                         resolution=(1 / TIF_VOXEL_NM, 1 / TIF_VOXEL_NM),
                         metadata={"spacing": TIF_VOXEL_NM, "unit": "nm", "axes": "ZYX"})
    return float(lab.mean())


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--force", action="store_true", help="overwrite existing files")
    opts = ap.parse_args(argv)
    from sheetview.cli import main as cli

    for name, truth, args in COMMANDS:
        argv_ = synth_args(name, truth, args) + (["--force"] if opts.force else [])
        try:
            cli(argv_, standalone_mode=False)
        except SystemExit as e:
            if e.code:
                sys.exit(e.code)
    n = make_open_sheets_ply(HERE / "open_sheets.ply", opts.force)
    print(f"open_sheets.ply: {n} faces", file=sys.stderr)
    phi = make_small_volume_tif(HERE / "small_volume.tif", opts.force)
    print(f"small_volume.tif: solid fraction {phi:.3f}", file=sys.stderr)


if __name__ == "__main__":
    main()
