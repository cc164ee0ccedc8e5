"""T2 spectra, their comparison with experimental files, and the `relax` command."""
import json

import numpy as np
import pytest
from click.testing import CliRunner

from sheetview.cli import main
from sheetview.io.curves import read_experimental
from sheetview.errors import InputError, OptionError
from sheetview.grid import GEL, INTERLAYER, SOLID, PhaseGrid
from sheetview.measures.relaxation import compare_t2, relaxation_spectrum

SAMPLE = "sample_structures/single_stack.csv"


def _grid():
    lab = np.full((4, 4, 40), SOLID, np.uint8)
    lab[:, :, 0:7] = INTERLAYER
    lab[:, :, 10:31] = GEL
    return PhaseGrid(lab, 0.1, periodic=True)


def test_fractions_sum_to_one_and_table_columns():
    r = relaxation_spectrum(_grid())
    t = r.table()
    assert set(t) == {"t2_s", "t2_ms", "fraction", "fraction_interlayer", "fraction_gel"}
    assert sum(t["fraction"]) == pytest.approx(1.0)
    assert np.allclose(np.asarray(t["t2_ms"]), np.asarray(t["t2_s"]) * 1e3)
    json.dumps(r.to_dict())


def test_bulk_shortens_and_rho2_scales():
    """1/T2 = 1/T2b + ρ2 S/V (Brownstein & Tarr 1979): doubling ρ2 halves the surface term;
    the bulk term only shortens T2."""
    g = _grid()
    a = relaxation_spectrum(g, rho2=3.7e-3, t2_bulk=None, interlayer_width=0.7)
    b = relaxation_spectrum(g, rho2=7.4e-3, t2_bulk=None, interlayer_width=0.7)
    c = relaxation_spectrum(g, rho2=3.7e-3, t2_bulk=2.5, interlayer_width=0.7)
    for k in ("interlayer", "gel"):
        assert b.class_t2_logmean[k] == pytest.approx(a.class_t2_logmean[k] / 2)
        assert c.class_t2_logmean[k] < a.class_t2_logmean[k]


def test_bad_options():
    g = _grid()
    for kw in ({"shape": "cube"}, {"rho2": -1}, {"t2_bulk": 0}, {"interlayer_width": 0},
               {"bins": [1, 0.5]}):
        with pytest.raises(OptionError):
            relaxation_spectrum(g, **kw)
    empty = PhaseGrid(np.full((3, 3, 3), SOLID, np.uint8), 0.1)
    with pytest.raises(OptionError, match="no pore voxels"):
        relaxation_spectrum(empty)


def test_compare_identical_and_shifted():
    """A distribution compared with itself: overlap 1, shift 0; shifted by a decade: shift
    1 decade, overlap near 0 (definitions)."""
    r = relaxation_spectrum(_grid(), t2_bulk=None, interlayer_width=0.7)
    t = np.geomspace(1e-6, 1, 300)
    dens = np.interp(np.log(t), np.log(r.t2), r.total / np.diff(np.log(r.edges)))
    c = compare_t2(r, t, dens)
    assert c.overlap == pytest.approx(1.0, abs=0.02)
    assert c.shift_decades == pytest.approx(0.0, abs=0.02)
    c10 = compare_t2(r, t * 10, dens)
    assert c10.shift_decades == pytest.approx(-1.0, abs=0.02)
    assert c10.overlap < 0.05


def test_t2_reader_units(tmp_path):
    p = tmp_path / "t2.csv"
    p.write_text("T2 (ms),amplitude\n0.1,1\n0.3,2\n1,1\n")
    c = read_experimental(p, "t2")
    assert np.allclose(c.x, [1e-4, 3e-4, 1e-3]) and c.unit_found == "ms"
    p.write_text("T2_s amplitude\n0.001 1\n0.0003 2\n0.0001 1\n")
    c = read_experimental(p, "t2")
    assert np.allclose(c.x, [1e-4, 3e-4, 1e-3]) and c.warnings  # sorted, with a warning
    p.write_text("T2,amplitude\n0.1,1\n0.3,2\n1,1\n")
    with pytest.raises(InputError, match="T2 unit"):
        read_experimental(p, "t2")
    assert np.allclose(read_experimental(p, "t2", unit="ms").x, [1e-4, 3e-4, 1e-3])


def test_relax_cli(tmp_path):
    exp = tmp_path / "exp.csv"
    t = np.geomspace(0.01, 10, 40)
    exp.write_text("T2 (ms),amplitude\n" + "".join(
        f"{a},{np.exp(-np.log(a / 0.4) ** 2)}\n" for a in t))
    r = CliRunner().invoke(main, ["relax", SAMPLE, "--voxel", "0.25", "--csv",
                                  str(tmp_path / "r.csv"), "-o", str(tmp_path / "r.png"),
                                  "--json", str(tmp_path / "r.json"), "--compare", str(exp),
                                  "--pore-shape", "cylinder", "--t2-bulk", "0"])
    assert r.exit_code == 0, r.output
    d = json.loads((tmp_path / "r.json").read_text())
    assert d["relaxation"]["settings"]["shape"] == "cylinder"
    assert d["relaxation"]["settings"]["t2_bulk_s"] is None
    # prism file: interlayer gap = repeat - thickness = 1.4 - 0.7 nm
    assert d["relaxation"]["settings"]["interlayer_width"].startswith("given: 0.7")
    assert 0 <= d["comparison"]["overlap"] <= 1
    assert (tmp_path / "r.png").stat().st_size > 1000
    r = CliRunner().invoke(main, ["relax", SAMPLE, "--csv", str(tmp_path / "x.csv"),
                                  "--rho2", "-1", "--voxel", "0.25"])
    assert r.exit_code == 2 and "rho2" in r.output and not (tmp_path / "x.csv").exists()
