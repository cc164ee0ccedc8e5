"""The opt-in measures `scattering` and `relaxation` of `measure` and `batch`: the same
numbers as `sheetview scatter` / `sheetview relax` with their defaults (one code path,
checked end to end), absent from the default selection, present in reports and batch pages."""
import json

import numpy as np
import pytest
from click.testing import CliRunner

from sheetview import Sphere, write
from sheetview.app.registry import applicable, select
from sheetview.cli import main
from sheetview.synth import pack_stacks


@pytest.fixture(scope="module")
def pore(tmp_path_factory):
    d = tmp_path_factory.mktemp("opt")
    res = pack_stacks(Sphere((0, 0, 0), 7.0), 15, seeding="wall", orientation="wall",
                      lateral_size="fixed:4", layers="fixed:3", seed=3)
    p = d / "pore.npz"
    write(res.structure, p)
    return p


def _run(args):
    return CliRunner().invoke(main, [str(a) for a in args])


def test_default_selection_leaves_them_out(pore):
    from sheetview import read
    s = read(pore)
    assert "scattering" not in applicable(s)
    assert "relaxation" not in applicable(s)
    assert select("default,relaxation", s) == applicable(s) + ["relaxation"]
    r = _run(["measure", pore, "--only", "nonsense"])
    assert r.exit_code == 2 and "'default'" in r.output


def test_measure_equals_scatter_and_relax(pore, tmp_path):
    out = tmp_path / "rep"
    r = _run(["measure", pore, "--voxel", "0.25", "--only", "scattering,relaxation", "--json",
              "-o", out])
    assert r.exit_code == 0, r.output
    doc = json.loads(r.stdout)
    r = _run(["scatter", pore, "--voxel", "0.25", "--csv", tmp_path / "q.csv",
              "--json", tmp_path / "q.json"])
    assert r.exit_code == 0, r.output
    sc = json.loads((tmp_path / "q.json").read_text())
    np.testing.assert_allclose(doc["scattering"]["intensity_cm-1"], sc["curve"]["intensity_cm-1"],
                               rtol=1e-12)
    assert doc["scattering"]["features"]["porod"] == sc["features"]["porod"]
    r = _run(["relax", pore, "--voxel", "0.25", "--csv", tmp_path / "t.csv",
              "--json", tmp_path / "t.json"])
    assert r.exit_code == 0, r.output
    rl = json.loads((tmp_path / "t.json").read_text())["relaxation"]
    assert doc["relaxation"]["class_fraction"] == pytest.approx(rl["class_fraction"], rel=1e-12)
    for f in ("scattering.csv", "scattering.png", "t2_distribution.csv", "t2_distribution.png"):
        assert (out / f).stat().st_size > 0, f


def test_batch_pages_show_them(pore, tmp_path):
    out = tmp_path / "b"
    r = _run(["batch", pore, "-o", out, "--voxel", "0.25", "--only", "phases,relaxation", "-q"])
    assert r.exit_code == 0, r.output
    html = next((out / "runs").glob("*/report.html")).read_text()
    assert "t2 distribution" in html
    head = (out / "summary.csv").read_text().splitlines()[0]
    assert "relaxation.t2_logmean_ms" in head
