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
    assert not any(n.startswith(".") and n != ".sheetview-files" for n in names)  # no temporary files
    manifest = (out / ".sheetview-files").read_text().splitlines()
    assert manifest == ["# sheetview report"] + sorted(names - {".sheetview-files"})
    rows = (out / "prisms.csv").read_text().splitlines()
    assert rows[0].startswith("prism,layer,stack,stacking_number") and len(rows) == 145
    stacks = (out / "stacks.csv").read_text().splitlines()
    assert len(stacks) == 3
    r = run(two_stacks, "-o", out, "--only", "stacking,order")
    assert r.exit_code == 2 and "--force" in r.output
    assert run(two_stacks, "-o", out, "--force", "--only", "stacking,order").exit_code == 0
    # --force with fewer measures: the files only the earlier report wrote go, the user's stay
    (out / "notes.txt").write_text("mine")
    assert run(two_stacks, "-o", out, "--force", "--only", "stacking").exit_code == 0
    now = {p.name for p in out.iterdir()}
    assert {"summary.json", "prisms.csv", "stacks.csv", "notes.txt"} <= now
    assert not now & {"pole_figure.png", "pole_figure.csv", "order.png"}
    assert "notes.txt" not in (out / ".sheetview-files").read_text().split()


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
    empty = sv.Structure(np.zeros((0, 3, 3)), np.zeros(0), sv.Sphere((0, 0, 0), 5))
    sv.write(empty, p)
    # a table of no prisms is refused on reading, in every form (docs/reliability.md) ...
    r = run(p, "--json", "--only", "stacking,order")
    assert r.exit_code == 2 and "no prisms" in r.output and "Traceback" not in r.output
    assert not (tmp_path / "rep").exists()
    # ... while the structure measures take an empty structure from Python
    ctx = sv.measure(empty, only="stacking,order")
    assert ctx.results["stacking"].to_dict()["n_prisms"] == 0
    assert np.isnan(ctx.results["order"].to_dict()["S"])
    r = run(p, "--json")  # the grid measures have nothing to work on: a clear refusal
    assert r.exit_code == 2 and "no prisms" in r.output and "Traceback" not in r.output
    assert not (tmp_path / "rep2").exists()


def test_volume_input_refused(tmp_path):
    pytest.importorskip("sheetview.io.volumes")
    p = tmp_path / "v.npy"
    np.save(p, np.zeros((4, 4, 4), np.uint8))
    r = run(p, "--volume-voxel", "1", "--phases", "0=gel", "--only", "stacking")
    assert r.exit_code == 2 and "need prisms" in r.output


def test_measure_settings_builder():
    """The one settings builder of ``measure`` and ``batch``: without options it gives
    the defaults of Settings (derived) for every setting; option texts are parsed (sizes in
    binary units, common practice: 1G = 2^30 bytes); bad values are refused naming the
    parameter, which the command line shows as its option."""
    from sheetview.app.settings import Settings
    from sheetview.cli.measure import SETTINGS, measure_settings
    s = measure_settings()
    assert tuple(s.to_dict()) == SETTINGS
    assert s == Settings()
    s = measure_settings(max_memory="1.5G", pore_split="5,20", lines=300)
    assert s.max_memory == 3 * 2 ** 29 and s.pore_split == (5.0, 20.0)
    assert measure_settings(pore_split=[5, 20]).pore_split == (5.0, 20.0)
    for kw, param in (({"pore_split": "20,5"}, "pore_split"), ({"pore_split": "1,2,3,4"},
                      "pore_split"), ({"lines": 0}, "lines"), ({"voxel": 0.001}, "voxel"),
                      ({"density": 0}, "density"), ({"frame": "x"}, "frame"),
                      ({"gap_tol": 0.8}, "gap_tol"), ({"seed": -1}, "seed")):
        with pytest.raises(sv.OptionError, match=param) as e:
            measure_settings(**kw)
        assert e.value.param == param and isinstance(e.value, ValueError)
    # the gap tolerance is checked against the repeat given for reading
    assert measure_settings(gap_tol=0.8, spacing=1.9).gap_tol == 0.8


@pytest.mark.parametrize("args,msg", [
    (["--pore-split", "20,5"], "--pore-split"),
    (["--frame", "x"], "--frame"),
])
def test_more_option_errors(two_stacks, args, msg):
    r = run(two_stacks, *args)
    assert r.exit_code == 2 and msg in r.output and "Traceback" not in r.output


def _reference_csv(path, columns):
    """The cell rule of the report tables written cell by cell with Python's ``csv``
    module (standard library reference): integers and booleans as integers, floats as
    ``repr`` when a whole number below 1e15, else 9 significant digits; text as is."""
    import csv
    import math

    def cell(x, kind):
        if kind == "i":
            return str(int(x))
        if kind == "s":
            return str(x)
        v = float(x)
        if math.isnan(v) or math.isinf(v):
            return format(v, ".9g")
        return repr(v) if v == int(v) and abs(v) < 1e15 else f"{v:.9g}"
    cols = [np.asarray(c) for c in columns.values()]
    kinds = ["i" if c.dtype.kind in "iub" else "s" if c.dtype.kind in "USO" else "f"
             for c in cols]
    with open(path, "w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(list(columns))
        for r in zip(*[c.tolist() for c in cols]):
            w.writerow([cell(x, k) for x, k in zip(r, kinds)])


def test_report_csv_cells_match_the_csv_module(tmp_path):
    """The column-wise CSV writer of the report gives byte for byte the file Python's
    csv module writes with the documented cell rule (reference: the standard library),
    over more rows than one block, with NaN, infinities, -0.0, whole numbers around 1e15,
    booleans, small and large integers, and a text column with commas and quotes."""
    from sheetview.report import write_csv
    rng = np.random.default_rng(7)
    n = 70_000
    f = rng.normal(0, 10, n) * 10.0 ** rng.integers(-12, 17, n)
    f[rng.integers(0, n, 500)] = np.round(f[rng.integers(0, n, 500)])
    f[:8] = [np.nan, np.inf, -np.inf, -0.0, 1e15, 1e15 - 1, 2.0, -3.5]
    num = {"f": f, "f32": f.astype(np.float32), "i8": rng.integers(-128, 127, n).astype(np.int8),
           "u": rng.integers(0, 2 ** 63, n, dtype=np.uint64), "b": rng.random(n) < 0.5,
           "i": rng.integers(-10 ** 12, 10 ** 12, n)}
    text = {"name": np.array(["a,b", 'say "x"', "plain", ""] * 3, dtype=object),
            "x": np.array([0.1, np.nan, 3.0, 1e20] * 3)}
    empty = {"a": np.zeros(0), "b": np.zeros(0, int)}
    for i, cols in enumerate((num, text, empty)):
        got, ref = tmp_path / f"got{i}.csv", tmp_path / f"ref{i}.csv"
        write_csv(got, cols)
        _reference_csv(ref, cols)
        assert got.read_bytes() == ref.read_bytes()
