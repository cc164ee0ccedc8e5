"""The Python face: sheetview.measure gives the same document as the command line, results
can be reproduced from each measure's own public function, reprs stay short, errors are
ValueErrors naming the parameter, and no global state changes."""
from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner

import sheetview as sv
from sheetview.app.registry import REGISTRY
from sheetview.cli import main

ROOT = Path(__file__).resolve().parent.parent
SAMPLE = ROOT / "sample_structures" / "single_stack.csv"
FAST = dict(voxel=0.25, lines=1500)


@pytest.fixture(scope="module")
def measured():
    return sv.measure(SAMPLE, **FAST)


def test_summary_equals_the_cli_document(measured, tmp_path):
    """`.summary()` is `summary.json` of `sheetview measure` with the same settings, less the
    file's provenance (file, input_sha256, provenance) and the run-specific timings."""
    out = tmp_path / "rep"
    r = CliRunner().invoke(main, ["measure", str(SAMPLE), "--voxel", "0.25", "--lines", "1500",
                                  "-o", str(out), "-q"])
    assert r.exit_code == 0, r.output
    cli = json.loads((out / "summary.json").read_text())
    mine = json.loads(json.dumps(measured.summary(), default=float))
    for d in (cli, mine):
        for k in ("file", "input_sha256", "timings_s", "provenance"):
            d.pop(k, None)
    from sheetview.app.document import dumps
    assert json.loads(dumps(mine)) == cli


def test_every_number_comes_from_the_measures_own_function(measured):
    """Each result of `measure` equals a direct call of the public function the registry
    names, with the same subject and settings (no science in the glue)."""
    from sheetview.app.run import phase_grid
    s = measured.input
    st = measured.settings
    grid = measured.grid
    assert np.array_equal(grid.labels, phase_grid(s, st).labels)
    direct = {
        "stacking": lambda f: f(s, **st.stacking_kwargs(), spacing=s.spacing),
        "order": lambda f: f(s, local_radius=st.local_radius, frame=st.frame),
        "phases": lambda f: f(grid, float(s.domain.volume), hydrate=st.hydrate),
        "surface": lambda f: f(grid, hydrate=st.hydrate),
        "chords": lambda f: f(grid, geometry=s, lines=st.lines, seed=st.seed),
        "correlation": lambda f: f(grid),
    }
    for name, call in direct.items():
        res = call(REGISTRY[name].function)
        a = json.dumps(res.to_dict(), default=str, sort_keys=True)
        b = json.dumps(measured[name].to_dict(), default=str, sort_keys=True)
        assert a == b, name


def test_repr_is_short_in_a_fresh_interpreter():
    """The overview of a measurement fits in 20 lines, and no result prints arrays."""
    code = ("import sheetview as sv; m = sv.measure(%r, voxel=0.25, lines=1000); "
            "print(repr(m)); print('@@'); print(max(len(repr(r)) for r in m.results.values()))"
            % str(SAMPLE))
    r = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, cwd=ROOT,
                       timeout=600)
    assert r.returncode == 0, r.stderr[-2000:]
    overview, longest = r.stdout.split("@@")
    assert len(overview.strip().splitlines()) <= 20
    assert int(longest) <= 120
    assert "array(" not in overview


def test_frame_and_attributes(measured):
    df = measured.to_frame()
    assert df.shape[0] == 1
    assert df["volume_fractions.solid"].iloc[0] == pytest.approx(
        measured.phases.fractions["solid"])
    assert "stacking" in dir(measured)
    with pytest.raises(AttributeError, match="did not run"):
        sv.measure(SAMPLE, only="stacking").phases


def test_errors_are_value_errors_naming_the_parameter():
    with pytest.raises(ValueError) as e:
        sv.measure(SAMPLE, voxel=-1)
    assert e.value.param == "voxel" and "--" not in str(e.value)
    with pytest.raises(ValueError) as e:
        sv.measure(SAMPLE, only="nonsense")
    assert e.value.param == "only"
    with pytest.raises(sv.OptionError, match="unknown setting"):
        sv.measure(SAMPLE, voxels=0.2)


def test_no_global_state_changes():
    """Figures and renders change neither matplotlib's backend nor pyvista's off-screen flag
    (run in a fresh interpreter where both are at their defaults)."""
    code = f"""
import matplotlib, pyvista as pv
backend = matplotlib.get_backend(); off = pv.OFF_SCREEN
import sheetview as sv
from sheetview import view
m = sv.measure({str(SAMPLE)!r}, only="stacking,order,phases", voxel=0.25)
m.plot("stacking"); m.plot("sections")
view.render(m.input, size=(64, 48))
assert matplotlib.get_backend() == backend, (matplotlib.get_backend(), backend)
assert pv.OFF_SCREEN == off
print("ok")
"""
    r = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, cwd=ROOT,
                       timeout=600)
    assert r.returncode == 0 and r.stdout.strip().endswith("ok"), r.stderr[-3000:]


def test_progress_reaches_the_python_api():
    seen = []
    sv.measure(SAMPLE, only="stacking,phases", voxel=0.25,
               progress=lambda stage, done, seconds=None: seen.append((stage, done)))
    assert ("stacking", False) in seen and ("stacking", True) in seen
    assert ("phases", True) in seen


def test_first_run_says_it_compiles(tmp_path):
    """With an empty kernel cache the run tells its progress callback that it compiles the
    kernels (first run only); once a kernel is cached it does not."""
    code = ("from sheetview.app.run import kernels_cold; import sheetview.measures.phases; "
            "print(kernels_cold())")
    env = {**os.environ, "NUMBA_CACHE_DIR": str(tmp_path / "cache")}
    out = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True, text=True)
    assert out.stdout.strip() == "True", out.stderr
    from sheetview.app.run import COMPILING, kernels_cold
    told = []
    sv.measure("sample_structures/single_stack.csv", only="stacking",
               progress=lambda stage, done, seconds=None: told.append(stage))
    assert not kernels_cold()
    told.clear()
    sv.measure("sample_structures/single_stack.csv", only="stacking",
               progress=lambda stage, done, seconds=None: told.append(stage))
    assert COMPILING not in told and "stacking" in told


def test_progress_within_long_stages():
    """A progress callback that takes ``fraction`` hears the progress within a long stage
    (the random walk) between its start and end; one without it hears only the stages."""
    from sheetview.grid import GEL, SOLID, PhaseGrid
    lab = np.full((16, 16, 16), GEL, np.uint8)
    lab[:, :, 6:8] = SOLID
    g = PhaseGrid(lab, 0.3, periodic=True)
    heard = []
    sv.measure(g, only="water_walk", n_walkers=200,
               progress=lambda stage, done, seconds=None, fraction=None:
               heard.append((stage, done, fraction)))
    walk = [h for h in heard if h[0] == "water_walk"]
    assert walk[0] == ("water_walk", False, None) and walk[-1][1] is True
    inner = [f for _, d, f in walk if not d and f is not None]
    assert len(inner) >= 2 and all(0.0 <= f <= 1.0 for f in inner) and inner[-1] == 1.0
    plain = []
    sv.measure(g, only="water_walk", n_walkers=200,
               progress=lambda stage, done, seconds=None: plain.append((stage, done)))
    assert ("water_walk", False) in plain and ("water_walk", True) in plain
    assert len([p for p in plain if p[0] == "water_walk"]) == 2
