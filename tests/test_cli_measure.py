"""The ``sheetview measure`` command: JSON document, report folder, option errors.

Expected stacking numbers follow from the construction (perfect stacks of 3 and 5
layers at the 1.4 nm repeat)."""
import json

import numpy as np
import pytest
from click.testing import CliRunner

import sheetview as sv
from sheetview.cli import main
from sheetview.synth import rhombus_patch


def patch(n, edge=1.0):
    """n x n rhombus of 2 n^2 equilateral triangles in the z = 0 plane, centred."""
    return rhombus_patch(n, edge)


def make_stack(n_layers, center):
    v = np.concatenate([patch(3) + [0, 0, 1.4 * k] for k in range(n_layers)])
    return v + np.asarray(center, float)


@pytest.fixture
def two_stacks(tmp_path):
    v = np.concatenate([make_stack(3, (0, 0, 0)), make_stack(5, (12, 0, 0))])
    p = tmp_path / "two.csv"
    sv.write(sv.Structure(v, 0.7, sv.Sphere((5, 0, 3), 30)), p)
    return p


def run(*args):
    return CliRunner().invoke(main, ["measure", *map(str, args)])


def test_json_document(two_stacks):
    r = run(two_stacks, "--json", "--only", "stacking,order")
    assert r.exit_code == 0, r.output
    doc = json.loads(r.stdout)
    assert doc["n_prisms"] == 18 * 8
    assert doc["stacking"]["histogram"] == {"3": 54, "5": 90}
    assert doc["stacking"]["mean"] == pytest.approx((3 * 54 + 5 * 90) / 144)
    assert doc["order"]["S"] == pytest.approx(1.0)
    assert doc["order"]["director"] == pytest.approx([0, 0, 1])
    assert doc["order"]["wall"] is not None
    assert doc["settings"]["angle_tol"] == 5.0 and "sheetview_version" in doc


def test_only_one_measure_and_summary(two_stacks):
    r = run(two_stacks, "--json", "--only", "order")
    doc = json.loads(r.stdout)
    assert "order" in doc and "stacking" not in doc
    r = run(two_stacks, "--only", "stacking,order")
    assert r.exit_code == 0 and "stacking" in r.output and "S = 1.0000" in r.output


def test_report_folder(two_stacks, tmp_path):
    out = tmp_path / "rep"
    r = run(two_stacks, "-o", out, "--only", "stacking,order")
    assert r.exit_code == 0, r.output
    names = {p.name for p in out.iterdir()}
    assert {"summary.json", "prisms.csv", "stacks.csv", "tilted_contacts.csv",
            "stacking_histogram.png", "pole_figure.png", "pole_figure.csv",
            "orientation_distribution.csv", "order.png"} <= names
    assert not any(n.startswith(".") for n in names)  # no temporary files left
    rows = (out / "prisms.csv").read_text().splitlines()
    assert rows[0].startswith("prism,layer,stack,stacking_number") and len(rows) == 145
    stacks = (out / "stacks.csv").read_text().splitlines()
    assert len(stacks) == 3
    r = run(two_stacks, "-o", out, "--only", "stacking,order")
    assert r.exit_code == 2 and "--force" in r.output
    assert run(two_stacks, "-o", out, "--force", "--only", "stacking,order").exit_code == 0


@pytest.mark.parametrize("args,msg", [
    (["--only", "stacking,foo"], "valid names: stacking, order, phases"),
    (["--angle-tol", "120"], "--angle-tol"),
    (["--gap-tol", "0.9"], "--gap-tol"),
    (["--overlap", "0"], "--overlap"),
    (["--tilt-limit", "2"], "--tilt-limit"),
    (["--local-radius", "-1"], "--local-radius"),
])
def test_option_errors(two_stacks, args, msg):
    r = run(two_stacks, *args)
    assert r.exit_code == 2 and msg in r.output and "Traceback" not in r.output


def test_zero_prisms(tmp_path):
    p = tmp_path / "empty.npz"
    sv.write(sv.Structure(np.zeros((0, 3, 3)), np.zeros(0), sv.Sphere((0, 0, 0), 5)), p)
    r = run(p, "--json", "--only", "stacking,order")
    assert r.exit_code == 0, r.output
    doc = json.loads(r.stdout)
    assert doc["n_prisms"] == 0 and doc["stacking"]["mean"] is None and doc["order"]["S"] is None
    assert run(p, "-o", tmp_path / "rep", "--only", "stacking,order").exit_code == 0
    r = run(p, "--json")  # the grid measures have nothing to work on: a clear refusal
    assert r.exit_code == 2 and "no prisms" in r.output and "Traceback" not in r.output
    assert not (tmp_path / "rep2").exists()


def test_volume_input_refused(tmp_path):
    pytest.importorskip("sheetview.io.volumes")
    p = tmp_path / "v.npy"
    np.save(p, np.zeros((4, 4, 4), np.uint8))
    r = run(p, "--voxel-size", "1", "--phases", "0=gel", "--only", "stacking")
    assert r.exit_code == 2 and "need prisms" in r.output
