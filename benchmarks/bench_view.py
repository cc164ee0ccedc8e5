"""Viewer speed: building the merged prism mesh and rendering it off-screen.

Usage::

    .venv/bin/python benchmarks/bench_view.py [N_PRISMS] [--size 1200x900]

Builds an invented structure of N prisms (default 400,000: stacks of 5 layers of a
72-triangle patch at random positions and orientations in a box), then times, each in a
fresh process so that peak memory is its own:

* ``scene``: :func:`sheetview.view.prism_mesh` + colouring by birth time (mesh and arrays);
* ``render``: :func:`sheetview.view.render` to a PNG (plotter, upload, draw, read back);
* ``render+stacking``: the same coloured by stacking number (the stacking measure included);
* ``render+cut``: coloured by birth time, cut across z through the centre with the phase
  section (rasterization at 0.5 nm included);

beside two references:

* ``pyvista merge (extrapolated)``: one PolyData per prism merged with ``pyvista.merge``,
  timed on a subset and scaled linearly to N;
* ``plain screenshot``: one ``Plotter.screenshot`` of a same-size mesh with a single colour
  and anti-aliasing off as in sheetview's render (the floor set by VTK and the software
  OpenGL driver; with pyvista's default anti-aliasing the same screenshot took 90 s here).
"""
from __future__ import annotations

import json
import math
import resource
import subprocess
import sys
import time

import numpy as np


def make_structure(n_prisms: int, seed: int = 0):
    from sheetview import Box, Structure

    rng = np.random.default_rng(seed)
    edge, half, layers = 1.0, 3, 5
    h = edge * math.sqrt(3) / 2
    tris = []
    for i in range(-half, half):
        for j in range(-half, half):
            o = np.array([i * edge + j * edge / 2, j * h, 0.0])
            tris.append([o, o + [edge, 0, 0], o + [edge / 2, h, 0]])
            tris.append([o + [edge, 0, 0], o + [1.5 * edge, h, 0], o + [edge / 2, h, 0]])
    t = np.array(tris)
    t[..., :2] -= t[..., :2].reshape(-1, 2).mean(axis=0)
    stack = np.concatenate([t + [0, 0, (k - 2) * 1.4] for k in range(layers)])  # (360, 3, 3)
    per = len(stack)
    n_stacks = int(math.ceil(n_prisms / per))
    side = 14.0 * n_stacks ** (1 / 3)
    q = rng.normal(size=(n_stacks, 4))
    q /= np.linalg.norm(q, axis=1, keepdims=True)
    w, x, y, z = q.T
    R = np.stack([np.stack([1 - 2 * (y * y + z * z), 2 * (x * y - w * z), 2 * (x * z + w * y)], -1),
                  np.stack([2 * (x * y + w * z), 1 - 2 * (x * x + z * z), 2 * (y * z - w * x)], -1),
                  np.stack([2 * (x * z - w * y), 2 * (y * z + w * x), 1 - 2 * (x * x + y * y)], -1)],
                 axis=1)
    centres = rng.uniform(8, side - 8, (n_stacks, 3))
    v = np.einsum("sab,pkb->spka", R, stack) + centres[:, None, None, :]
    v = v.reshape(-1, 3, 3)[:n_prisms]
    born = np.repeat(np.arange(n_stacks, dtype=float), per)[:n_prisms]
    return Structure(v, np.full(len(v), 0.7), Box((0, 0, 0), (side, side, side)), 1.4,
                     {"born": born})


def _peak_gib():
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 2 ** 20


def child(task, n, size):
    import pyvista as pv

    from sheetview import view as V

    s = make_structure(n)
    base = _peak_gib()
    t0 = time.perf_counter()
    if task == "scene":
        col = V.scalars_for(s, "born")
        dsp = V.display_of(col, "born")
        mesh = V.prism_mesh(s, dsp.scalars)
        assert mesh.n_cells == 5 * n
    elif task == "render":
        V.render(s, None, colour_by="born", size=size)
    elif task == "render+stacking":
        V.render(s, None, colour_by="stacking", size=size)
    elif task == "render+cut":
        lo, hi = (np.asarray(b) for b in s.domain.bounds)
        V.render(s, None, colour_by="born", size=size, voxel_size=0.5,
                 plane=(0.5 * (lo + hi), (0.0, 0.0, 1.0)))
    elif task == "merge":
        m = min(n, 2000)
        corners = s.prism_corners()[:m]
        faces = V.prism_faces(1)
        pv.merge([pv.PolyData(corners[i], faces=faces) for i in range(m)], merge_points=False)
        dt = (time.perf_counter() - t0) * n / m
        print(json.dumps({"task": task, "seconds": dt, "peak_gib": None, "extrapolated_from": m}))
        return
    elif task == "plain":
        mesh = V.prism_mesh(s)
        t0 = time.perf_counter()
        pv.OFF_SCREEN = True
        p = pv.Plotter(off_screen=True, window_size=size)
        p.disable_anti_aliasing()  # as sheetview's render
        p.add_mesh(mesh, color="tan")
        p.screenshot(return_img=True)
        p.close()
    dt = time.perf_counter() - t0
    print(json.dumps({"task": task, "seconds": dt, "peak_gib": _peak_gib(),
                      "baseline_gib": base}))


def main(argv):
    n = 400_000
    size = (1200, 900)
    args = list(argv)
    if "--child" in args:
        i = args.index("--child")
        task, n, w, h = args[i + 1], int(args[i + 2]), int(args[i + 3]), int(args[i + 4])
        child(task, n, (w, h))
        return
    if "--size" in args:
        i = args.index("--size")
        size = tuple(int(v) for v in args[i + 1].split("x"))
        del args[i:i + 2]
    if args:
        n = int(args[0])
    rows = []
    for task in ("scene", "render", "render+stacking", "render+cut", "merge", "plain"):
        out = subprocess.run([sys.executable, __file__, "--child", task, str(n), str(size[0]),
                              str(size[1])], capture_output=True, text=True)
        line = [ln for ln in out.stdout.splitlines() if ln.startswith("{")]
        if out.returncode or not line:
            print(out.stderr[-2000:])
            raise SystemExit(f"{task} failed")
        rows.append(json.loads(line[-1]))
    print(f"\n{n:,} prisms, picture {size[0]}x{size[1]}, software OpenGL (EGL/llvmpipe)\n")
    print(f"{'task':<38}{'seconds':>10}{'peak GiB':>10}")
    names = {"scene": "sheetview scene (mesh + arrays)",
             "render": "sheetview render (birth time)",
             "render+stacking": "sheetview render (stacking number)",
             "render+cut": "sheetview render (cut, voxel 0.5 nm)",
             "merge": "ref: pyvista merge, extrapolated",
             "plain": "ref: plain Plotter.screenshot"}
    for r in rows:
        pk = "-" if r["peak_gib"] is None else f"{r['peak_gib']:.2f}"
        print(f"{names[r['task']]:<38}{r['seconds']:>10.2f}{pk:>10}")
    t = {r["task"]: r["seconds"] for r in rows}
    print(f"\nscene vs pyvista merge: {t['merge'] / t['scene']:.0f}x faster; "
          f"render vs plain screenshot: {t['render'] / t['plain']:.2f}x the time")


if __name__ == "__main__":
    main(sys.argv[1:])
