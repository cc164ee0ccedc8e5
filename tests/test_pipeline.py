"""The main job end to end: `sheetview measure` on prisms, volumes and closed bodies."""
import dataclasses
import json

import numpy as np
import pytest
from click.testing import CliRunner

import sheetview as sv
from sheetview.cli import main
from sheetview.synth import perfect_stack

REQUIRED = ["n_prisms", "voxel_size_nm", "volume_fractions", "specific_surface_nm-1",
            "chords", "pore_size", "stacking", "order", "input_sha256", "sheetview_version",
            "settings"]


def run(*args):
    return CliRunner().invoke(main, ["measure", *map(str, args)])


@pytest.fixture
def stack_file(tmp_path):
    s = perfect_stack(3, 6.0, repeat=1.4, thickness=0.7).structure
    s = dataclasses.replace(s, domain=sv.Box((-5, -5, -3.013), (5, 5, 2.987)))
    p = tmp_path / "stack.csv"
    sv.write(s, p)
    return p, s


def test_summary_keys_and_values(stack_file):
    """The headline keys of the issue, and values checked against the slab closed form:
    interlayer = 2 x area x (1.4 - 0.7), solid = 3 x area x 0.7 (common practice)."""
    p, s = stack_file
    r = run(p, "--json", "--voxel", "0.1", "--lines", "3000")
    assert r.exit_code == 0, r.output
    doc = json.loads(r.stdout)
    for k in REQUIRED:
        assert k in doc, k
    area = s.areas.sum() / 3
    vf = doc["volume_fractions"]
    assert vf["interlayer"] * 600 == pytest.approx(2 * area * 0.7, rel=0.05)
    assert vf["solid"] * 600 == pytest.approx(3 * area * 0.7, rel=0.05)
    assert vf["solid"] + vf["interlayer"] + vf["gel"] == pytest.approx(1.0)
    assert doc["voxel_size_nm"] == pytest.approx(0.1)
    # solid-void surface: both faces of each sheet (edges add a little) per domain volume
    assert doc["specific_surface_nm-1"] == pytest.approx(6 * area / 600, rel=0.25)
    assert doc["chords"]["solid_mean_nm"] > 0 and doc["chords"]["pore_mean_nm"] > 0
    assert doc["pore_size"]["d50_nm"] > 0
    assert doc["stacking"]["histogram"] == {"3": len(s)}
    assert doc["order"]["S"] == pytest.approx(1.0)


def test_report_folder_has_every_figure(stack_file, tmp_path):
    p, _ = stack_file
    out = tmp_path / "report"
    r = run(p, "-o", out, "--voxel", "0.15", "--lines", "2000", "-q", "--intrusion")
    assert r.exit_code == 0, r.output
    names = {q.name for q in out.iterdir()}
    for f in ("summary.json", "sections.png", "pore_sizes.png", "chords.png", "s2_solid.png",
              "phase_fractions.csv", "interfaces.csv", "minkowski.csv",
              "pore_sizes_local_thickness.csv", "pore_sizes_intrusion.csv",
              "chords_solid.csv", "chords_pore.csv", "s2_solid.csv", "prisms.csv"):
        assert f in names, f
    assert not any(n.startswith(".") and n != ".sheetview-files" for n in names)
    assert not any(q.name.endswith(".part") for q in tmp_path.iterdir())
    doc = json.loads((out / "summary.json").read_text())
    assert doc["settings"]["voxel"] == 0.15


def test_identical_when_run_twice(stack_file):
    p, _ = stack_file
    a = json.loads(run(p, "--json", "--voxel", "0.2", "--lines", "500", "-q").stdout)
    b = json.loads(run(p, "--json", "--voxel", "0.2", "--lines", "500", "-q").stdout)
    for d in (a, b):  # run-specific: the timings and when the run was made
        d.pop("timings_s")
        d.pop("provenance")
    assert a == b


def test_pore_split_makes_named_classes(stack_file):
    """--pore-split keeps every class apart in every table: fractions, interfaces (which add
    up to the whole solid-pore surface that m2/g uses), surface per class, water and T2."""
    p, _ = stack_file
    doc = json.loads(run(p, "--json", "--voxel", "0.2", "--pore-split", "1,3", "--lines", "200",
                         "-q", "--no-intrusion", "--only", "default,relaxation").stdout)
    classes = {"gel", "interhydrate", "capillary"}
    vf = doc["volume_fractions"]
    assert classes <= set(vf)
    assert sum(vf.values()) == pytest.approx(1.0)
    itf = doc["surface"]["interfaces"]
    areas = itf["areas_nm2"]
    assert {f"solid-{c}" for c in classes | {"interlayer"}} <= set(areas)
    pore_total = sum(v for k, v in areas.items() if k != "solid-outside")
    assert itf["solid_pore_area_nm2"] == pytest.approx(pore_total, rel=1e-12)
    # every solid face of the stack faces some pore class: the Minkowski surface of the
    # solid (a body in the grid, wall contact 0 here) is the same Crofton sum
    assert doc["surface"]["minkowski_solid"]["surface_nm2"] == pytest.approx(
        pore_total + areas["solid-outside"], rel=1e-9)
    assert doc["specific_surface_m2_per_g"] == pytest.approx(
        1e-18 * pore_total / itf["mass_g"], rel=1e-12)
    assert classes <= set(itf["s_over_v_per_nm"]) and classes <= set(doc["phases"]["water"])
    present = {c for c in classes if vf[c] > 0}
    assert len(present) >= 2
    assert set(doc["relaxation"]["class_fraction"]) - {"interlayer"} == present


def test_split_classes_have_their_own_colours_and_legend(stack_file, tmp_path):
    """The section figure gives each size class a colour and a legend entry of its own."""
    from sheetview.style import PHASE_COLOURS, phase_label
    names = {3: "gel", 4: "interhydrate", 5: "capillary"}
    cols = [PHASE_COLOURS[c] for c in (1, 2, 3, 4, 5, 6, 0)]
    assert len(set(cols)) == len(cols)
    assert phase_label(4, names) == "interhydrate pore"
    assert phase_label(3, names) == "gel pore"


def test_volume_input_runs_the_grid_measures(tmp_path):
    """A segmented volume (no prisms): a solid slab between pores; its chords along the
    slab normal equal its thickness and S/V of the pores is 2/width (common practice)."""
    lab = np.zeros((40, 40, 40), np.uint8)
    lab[:, :, 15:25] = 1
    p = tmp_path / "vol.npy"
    np.save(p, lab)
    r = run(p, "--json", "--volume-voxel", "0.5", "-q")
    assert r.exit_code == 0, r.output
    doc = json.loads(r.stdout)
    assert doc["n_prisms"] is None and "stacking" not in doc
    assert doc["volume_fractions"]["solid"] == pytest.approx(0.25)
    assert doc["chords"]["source"].startswith("voxel")
    assert doc["pore_size"]["d50_nm"] > 0


def test_closed_body_input(tmp_path):
    """A closed mesh (solid body): the rasterized volume of a ball matches 4/3 pi R^3."""
    import trimesh
    m = trimesh.creation.icosphere(subdivisions=3, radius=3.0)
    p = tmp_path / "ball.stl"
    m.export(p)
    r = run(p, "--json", "--voxel", "0.1", "-q", "--lines", "2000", "--no-intrusion")
    assert r.exit_code == 0, r.output
    doc = json.loads(r.stdout)
    dom = doc["domain"]
    vol = np.prod(np.subtract(dom["max"], dom["min"]))
    assert doc["volume_fractions"]["solid"] * vol == pytest.approx(m.volume, rel=0.02)
    # exact chords of the mesh ball: mean 4R/3 (Santaló 1976) for the solid
    assert doc["chords"]["solid_mean_nm"] == pytest.approx(4.0, rel=0.05)


@pytest.mark.parametrize("args,msg", [
    (["--voxel", "0.001"], "--voxel"),
    (["--voxel", "50"], "larger than the domain"),
    (["--max-memory", "1K"], "would fit"),
    (["--max-memory", "lots"], "--max-memory"),
    (["--pore-split", "3,1"], "increasing"),
    (["--density", "-2"], "--density"),
    (["--lines", "0"], "--lines"),
])
def test_bad_options_exit_2_and_write_nothing(stack_file, tmp_path, args, msg):
    p, _ = stack_file
    out = tmp_path / "never"
    r = run(p, "-o", out, "-q", *args)
    assert r.exit_code == 2, r.output
    assert msg in r.output and "Traceback" not in r.output
    assert not out.exists()
    assert not any(q.name.startswith(".never") for q in tmp_path.iterdir())


@pytest.mark.parametrize("value,phase,msg", [(0, "gel", "all void"), (1, "solid", "all solid")])
def test_all_void_or_all_solid_is_refused(tmp_path, value, phase, msg):
    p = tmp_path / "flat.npy"
    np.save(p, np.full((10, 10, 10), value, np.uint8))
    out = tmp_path / "rep"
    r = run(p, "--volume-voxel", "1", "--phases", f"{value}={phase}", "-o", out, "-q")
    assert r.exit_code == 2 and msg in r.output and "Traceback" not in r.output
    assert not out.exists()


def test_python_api_measure(stack_file):
    """sheetview.measure gives the same volume fractions as the command line."""
    p, s = stack_file
    ctx = sv.measure(s, only=["phases"], voxel=0.2)
    doc = json.loads(run(p, "--json", "--voxel", "0.2", "--only", "phases", "-q").stdout)
    assert ctx.results["phases"].fractions == pytest.approx(doc["volume_fractions"])
    with pytest.raises(sv.OptionError, match="unknown setting"):
        sv.measure(s, voxels=0.2)
