"""`sheetview render` fills its picture and carries a scale bar: the structure (the
coloured pixels below the colour bar) spans most of the picture's height or width, and a
dark bar lies in the bottom strip. Measured on the PNG with numpy (pixel counts)."""
from __future__ import annotations

import numpy as np
import pytest
from click.testing import CliRunner
from PIL import Image

pytest.importorskip("pyvista")


def test_render_fills_the_picture_and_has_a_scale_bar(tmp_path):
    from sheetview.cli import main

    out = tmp_path / "r.png"
    r = CliRunner().invoke(main, ["render", "sample_structures/wall_stacks_sphere40.npz", "-o",
                                  str(out), "--size", "900x600"])
    assert r.exit_code == 0, r.output
    a = np.asarray(Image.open(out).convert("RGB")).astype(int)
    H, W, _ = a.shape
    assert (H, W) == (600, 900)
    coloured = (a.max(axis=2) - a.min(axis=2)) > 40       # the prisms (viridis colours)
    coloured[:int(0.15 * H)] = False                      # the colour bar above them
    ys, xs = np.nonzero(coloured)
    fill = max((ys.max() - ys.min()) / H, (xs.max() - xs.min()) / W)
    assert fill >= 0.6, fill                              # measured 0.72 (height)
    dark = a.max(axis=2) < 80
    runs = []
    for row in dark[int(0.9 * H):]:
        edges = np.flatnonzero(np.diff(np.r_[0, row.astype(int), 0]))
        runs.append(int((edges[1::2] - edges[::2]).max()) if edges.size else 0)
    assert 0.05 * W <= max(runs) <= 0.4 * W               # the bar (measured 113 px)
