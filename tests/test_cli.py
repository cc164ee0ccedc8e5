"""The command line: info, convert, errors without tracebacks, exit status 2."""
import json
import subprocess
import sys

import numpy as np
import pytest
from click.testing import CliRunner

import sheetview as sv
from sheetview.cli import main
from tests.conftest import random_structure


def run(*args):
    return CliRunner().invoke(main, [str(a) for a in args], catch_exceptions=False)


def test_version_and_help():
    r = run("--version")
    assert r.exit_code == 0 and sv.__version__ in r.output
    r = run("--help")
    assert r.exit_code == 0 and "info" in r.output and "convert" in r.output


def test_python_dash_m_entry_point(sample_csv):
    r = subprocess.run([sys.executable, "-m", "sheetview", "info", str(sample_csv), "--json"],
                       capture_output=True, text=True)
    assert r.returncode == 0, r.stderr
    assert json.loads(r.stdout)["n_prisms"] == 1


def test_info_text_and_json(sample_csv):
    r = run("info", sample_csv)
    assert r.exit_code == 0
    assert "1 prisms" in r.output and "box" in r.output and "S = 1.000" in r.output
    d = json.loads(run("info", sample_csv, "--json").output)
    assert d["n_prisms"] == 1
    assert d["total_prism_volume_nm3"] == pytest.approx(2 * 1.732051 / 2 * 0.7)
    assert d["domain"]["volume_nm3"] == 27000
    assert d["orientation"]["S"] == pytest.approx(1.0)


def test_info_warns_about_prisms_outside_the_domain(tmp_path):
    s = random_structure(30, seed=1, domain=sv.Sphere((15, 15, 15), 6.0))
    p = tmp_path / "s.csv"
    sv.write(s, p)
    expected = s.outside_counts()["wholly_outside"]
    assert expected > 0
    r = run("info", p)
    assert f"warning       {expected} prism(s) lie wholly outside the domain" in r.output


def test_info_says_when_the_domain_is_inferred(tmp_path):
    p = tmp_path / "s.csv"
    p.write_text("# thickness: 0.5\nax,ay,az,bx,by,bz,cx,cy,cz\n0,0,0,1,0,0,0,1,0\n")
    r = run("info", p)
    assert "padded bounding box" in r.output


@pytest.mark.parametrize("suffix", [".npz", ".parquet", ".csv"])
def test_convert_round_trip(tmp_path, suffix):
    s = random_structure(40, seed=2)
    src = tmp_path / "a.csv"
    sv.write(s, src)
    out = tmp_path / f"b{suffix}"
    r = run("convert", src, out)
    assert r.exit_code == 0, r.output
    assert np.array_equal(sv.read(out).vertices, s.vertices)


def test_convert_refuses_existing_output_without_force(tmp_path, sample_csv):
    out = tmp_path / "b.npz"
    out.write_bytes(b"keep me")
    r = CliRunner().invoke(main, ["convert", str(sample_csv), str(out)])
    assert r.exit_code == 2
    assert "already exists" in r.output and "--force" in r.output
    assert out.read_bytes() == b"keep me"
    r = CliRunner().invoke(main, ["convert", str(sample_csv), str(out), "--force"])
    assert r.exit_code == 0
    assert len(sv.read(out)) == 1


@pytest.mark.parametrize("content", ["", "ax,ay\n1,2\n", "# units: \"parsec\"\n# thickness: 1\n"
                                     "ax,ay,az,bx,by,bz,cx,cy,cz\n0,0,0,1,0,0,0,1,0\n"])
def test_bad_input_exits_2_without_traceback(tmp_path, content):
    p = tmp_path / "bad.csv"
    p.write_text(content)
    r = subprocess.run([sys.executable, "-m", "sheetview", "info", str(p)],
                       capture_output=True, text=True)
    assert r.returncode == 2
    assert "Traceback" not in r.stderr
    assert str(p) in r.stderr and r.stderr.startswith("sheetview: error:")


def test_option_that_does_not_apply(tmp_path, sample_csv):
    r = CliRunner().invoke(main, ["info", str(sample_csv), "--volume-voxel", "1"])
    assert r.exit_code == 2
    assert "--volume-voxel does not apply to a prism table; it applies to voxel volumes" in r.output
    assert "made at --voxel" in r.output


def test_thickness_option_fills_a_plain_csv(tmp_path):
    p = tmp_path / "plain.csv"
    p.write_text("ax,ay,az,bx,by,bz,cx,cy,cz\n0,0,0,1,0,0,0,1,0\n")
    r = CliRunner().invoke(main, ["info", str(p)])
    assert r.exit_code == 2 and "--thickness" in r.output
    r = CliRunner().invoke(main, ["info", str(p), "--thickness", "0.5", "--json"])
    assert json.loads(r.stdout)["thickness_nm"]["mean"] == 0.5
    r = CliRunner().invoke(main, ["info", str(p), "--thickness", "-1"])
    assert r.exit_code == 2 and "--thickness: must be a positive" in r.output
