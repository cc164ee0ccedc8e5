"""Virtual micrographs: projection and section of a large structure.

Usage::

    .venv/bin/python benchmarks/bench_sections.py [N_PRISMS]

Builds the invented structure of ``bench_view.py`` (default 400,000 prisms: stacks of 5
layers in a box) and times, after one warm-up run (numba compilation is cached on disk):

* ``project (exact)``: :func:`sheetview.measures.sections.projection` along z through the
  whole box at the default pixel (about 512 pixels across) and at a pixel of 0.2 nm: each
  pixel the exact solid volume of its column over the pixel area (faces of every prism
  clipped to the pixel; overlaps subtracted along the pixel's centre line);
* ``reference: rasterize + sum``: the same picture by rasterizing the prisms at the pixel
  edge (sheetview's own rasterizer, 2,900x trimesh) and counting solid voxels along z
  (what a voxel route would cost; it is less exact at sheet edges);
* ``section``: :func:`sheetview.measures.sections.section` of the classified phase grid at
  0.25 nm (grid build included, then one section alone).

The issue's target: a projection of a 400,000-prism structure in <= 5 s.
"""
from __future__ import annotations

import resource
import sys
import time

sys.path.insert(0, __file__.rsplit("/", 1)[0])
from bench_view import make_structure  # noqa: E402


def _t(fn, *a, **k):
    t0 = time.perf_counter()
    out = fn(*a, **k)
    return out, time.perf_counter() - t0


def main(argv):
    from sheetview.grid import SOLID, rasterize
    from sheetview.app.run import phase_grid
    from sheetview.app.settings import Settings
    from sheetview.measures.sections import projection, section

    n = int(argv[0]) if argv else 400_000
    s = make_structure(n)
    side = float(s.domain.bounds[1][0])
    print(f"{len(s):,} prisms in a {side:.1f} nm box")
    projection(make_structure(2000), "z")  # warm-up (compilation cache)
    rows = []
    for pixel in (None, 0.2):
        p, dt = _t(projection, s, "z", pixel=pixel)
        rows.append((f"project (exact), pixel {p.pixel:g} nm, {p.thickness.shape[1]}^2 px", dt))
        g, dtr = _t(rasterize, s, p.pixel)
        t0 = time.perf_counter()
        ref = (g.labels == SOLID).sum(axis=2) * p.pixel
        dtr += time.perf_counter() - t0
        rows.append((f"reference: rasterize + sum at {p.pixel:g} nm", dtr))
        rows.append((f"  ratio project / reference at {p.pixel:g} nm: {dt / dtr:.2f}", None))
        a = p.thickness.astype(float).sum() * p.pixel ** 2
        b = float(ref.sum()) * p.pixel ** 2
        print(f"  pixel {p.pixel:g}: integral exact {a:.1f} nm^3, voxel {b:.1f} nm^3, "
              f"prism volume {float(s.volumes.sum()):.1f} nm^3")
        del g, ref
    g, dt = _t(phase_grid, s, Settings(voxel=0.25))
    rows.append((f"phase grid at 0.25 nm ({'x'.join(map(str, g.shape))}), classified", dt))
    _, dt = _t(section, s, (1, 1, 1), 0.0, grid=g)
    rows.append(("section (1,1,1) through the centre, from the grid", dt))
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 2 ** 20
    w = max(len(r[0]) for r in rows)
    for name, dt in rows:
        print(name if dt is None else f"{name:<{w}}  {dt:7.2f} s")
    print(f"peak resident memory {peak:.2f} GiB")


if __name__ == "__main__":
    main(sys.argv[1:])
