"""``sheetview waterwalk``: the random-walk command passes its parameters to the walks.

Closed forms: without any relaxation sink (zero surface relaxivity, no bulk term) the
magnetisation is conserved, M(t) = 1 (Bloch-Torrey equation with no sink, e.g. Grebenkov,
Rev. Mod. Phys. 79 (2007) 1077); between impermeable parallel layers the diffusivity is
D0 along the layers and zero across (the parallel and series bounds of a lamellar medium,
Torquato, Random Heterogeneous Materials, 2002).
"""
import json

import numpy as np
import pytest
from click.testing import CliRunner

import sheetview as sv
from sheetview.cli import main
from sheetview.grid import GEL, SOLID, PhaseGrid

D0 = 2299.0  # nm^2/us, bulk water at 25 C (the walk's default; Mills 1973)


@pytest.fixture(scope="module")
def lamellar(tmp_path_factory):
    lab = np.full((10, 10, 24), GEL, np.uint8)
    for z in (10, 22):
        lab[:, :, z:z + 2] = SOLID
    path = tmp_path_factory.mktemp("ww") / "lamellar.vti"
    sv.write(PhaseGrid(lab, 0.3, periodic=True), path)
    return path


def invoke(*args):
    return CliRunner().invoke(main, ["waterwalk", *map(str, args)])


def test_no_sink_conserves_magnetisation_and_lamellar_transport(lamellar):
    r = invoke(lamellar, "--rho2", 0, "--rho2-wall", 0, "--t2-bulk", 0, "--t-max", 0.05,
               "--n-walkers", 4000, "--transport", "--json")
    assert r.exit_code == 0, r.output
    doc = json.loads(r.output)
    w = doc["water_walk"]
    assert w["m_end"] == pytest.approx(1.0, abs=1e-12)
    assert w["t_end_us"] == pytest.approx(0.05, rel=0.05)
    t = doc["transport"]["d_eff_over_d0"]
    assert t["x"] == pytest.approx(1.0, abs=0.15) and t["y"] == pytest.approx(1.0, abs=0.15)
    assert t["z"] < 0.1
    assert "not measurements" in doc["caution"]


def test_relaxivity_reaches_the_walk(lamellar, tmp_path):
    """A relaxivity makes M fall below 1; the report folder holds the walk's tables."""
    r = invoke(lamellar, "--rho2", 0.05, "--t-max", 0.05, "--n-walkers", 2000, "-q",
               "-o", tmp_path / "rep")
    assert r.exit_code == 0, r.output
    doc = json.loads((tmp_path / "rep" / "summary.json").read_text())
    assert doc["water_walk"]["m_end"] < 0.999
    for name in ("walk_decay.csv", "walk_t2_spectrum.csv", "walk_exchange.csv"):
        assert (tmp_path / "rep" / name).is_file()


@pytest.mark.parametrize("args,what", [
    (["--rho2", "-1"], "--rho2"),
    (["--t2-bulk", "-2"], "--t2-bulk"),
    (["--t-max", "0"], "--t-max"),
    (["--diffusivity", "interlayer"], "--diffusivity"),
    (["--diffusivity", "gel=-3"], "--diffusivity"),
])
def test_bad_options(lamellar, args, what):
    r = invoke(lamellar, *args)
    assert r.exit_code == 2
    assert r.output.startswith("sheetview: error:") and what in r.output


def test_stage_progress_lines_and_bar(capsys):
    """Progress on stderr: a line per stage start and end; within a stage a line at each
    quarter in a log, a bar redrawn in place on a terminal (common practice of command-line
    tools)."""
    import io

    from sheetview.cli.common import StageProgress

    class Tty(io.StringIO):
        def isatty(self):
            return True

    log = StageProgress(io.StringIO())
    assert not log.tty
    for f in (0.0, 0.1, 0.3, 0.55, 0.8, 1.0):
        log("walk", False, None, fraction=f)
    log("walk", True, 1.5)
    text = capsys.readouterr().err
    assert text.splitlines() == ["  walk: 25%", "  walk: 50%", "  walk: 75%", "  walk: 1.50 s"]
    tty = StageProgress(Tty())
    tty("walk", False, None, fraction=0.5)
    assert tty.stream.getvalue() == "\r  walk [##########..........]  50%"
