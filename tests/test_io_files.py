"""Files that travel: unit-carrying column names, angles in degrees, counts as integers,
summary.json valid against its published JSON Schema (docs/summary.schema.json, checked
with the general-purpose ``jsonschema`` validator), summary.parquet's schema metadata, and
folders made with the user's umask."""
from __future__ import annotations

import csv
import datetime
import json
import os
from pathlib import Path

import jsonschema
import numpy as np
import pytest
from click.testing import CliRunner

from sheetview.cli import main

ROOT = Path(__file__).resolve().parents[1]
SAMPLE = ROOT / "sample_structures" / "single_stack.csv"
SCHEMA = json.loads((ROOT / "docs" / "summary.schema.json").read_text(encoding="utf-8"))

#: Columns that are counts, fractions, ratios, indices, components of unit vectors, codes or
#: text: no unit (docs/formats.md, "Report tables").
UNITLESS = {"phase", "interface", "stack", "prism", "prisms", "layers", "layer", "column",
            "stacking_number", "normal_x", "normal_y", "normal_z", "aspect_ratio", "local_S",
            "wall_P2", "cos_theta_lo", "cos_theta_hi", "fraction", "fraction_of_domain",
            "density_multiples_of_uniform", "x", "y", "volume_fraction", "cumulative_finer",
            "cumulative_coarser", "s2", "pairs", "cut", "line", "axis", "euler", "euler_6",
            "prism_a", "prism_b", "layer_a", "layer_b", "V_V_per_domain_volume",
            "V_V_per_solid_volume"}
UNIT_SUFFIXES = ("_nm", "_nm2", "_nm3", "_nm-1", "_nm-2", "_nm-3", "_deg", "_per_ln_nm",
                 "_per_nm")


@pytest.fixture(scope="module")
def report(tmp_path_factory):
    out = tmp_path_factory.mktemp("r") / "rep"
    old = os.umask(0o027)
    try:
        r = CliRunner().invoke(main, ["measure", str(SAMPLE), "--voxel", "0.25", "--lines", "500",
                                      "-o", str(out), "-q", "--no-plots"])
    finally:
        os.umask(old)
    assert r.exit_code == 0, r.output
    return out


def _read(path):
    rows = [r for r in csv.reader(open(path, newline="")) if r and not r[0].startswith("#")]
    return rows[0], rows[1:]


def test_every_report_column_states_its_unit(report):
    """Every column of every report table either carries its unit in its name or is a
    count, fraction, ratio, index or text."""
    bad = []
    for f in sorted(report.glob("*.csv")):
        head, _ = _read(f)
        for h in head:
            if h not in UNITLESS and not h.endswith(UNIT_SUFFIXES):
                bad.append(f"{f.name}: {h}")
    assert not bad, bad


def test_angles_in_degrees_and_counts_as_integers(report):
    """The orientation histogram's azimuth bins cover -180 to 180 degrees (not -pi to pi
    radians); counts (S2 pairs, Euler characteristics, prisms per stack) are written as
    integers."""
    head, rows = _read(report / "orientation_distribution.csv")
    lo = np.array([float(r[head.index("phi_lo_deg")]) for r in rows])
    hi = np.array([float(r[head.index("phi_hi_deg")]) for r in rows])
    assert lo.min() == pytest.approx(-180.0) and hi.max() == pytest.approx(180.0)
    for name, cols in (("s2_solid", ("pairs",)), ("minkowski", ("euler", "euler_6")),
                       ("stacks", ("prisms", "layers"))):
        head, rows = _read(report / f"{name}.csv")
        for c in cols:
            cells = [r[head.index(c)] for r in rows]
            assert cells and all(x.lstrip("-").isdigit() for x in cells), (name, c, cells[:3])


def test_summary_validates_against_the_published_schema(report):
    """summary.json is valid under docs/summary.schema.json (Draft 2020-12, with format
    checks), and its provenance is this run: a UTC time within the last hour, the command
    line, the installed numpy's version."""
    doc = json.loads((report / "summary.json").read_text())
    jsonschema.Draft202012Validator.check_schema(SCHEMA)
    jsonschema.Draft202012Validator(SCHEMA, format_checker=jsonschema.FormatChecker()).validate(doc)
    prov = doc["provenance"]
    t = datetime.datetime.fromisoformat(prov["created"])
    assert t.tzinfo is not None
    age = datetime.datetime.now(datetime.timezone.utc) - t
    assert datetime.timedelta(0) <= age < datetime.timedelta(hours=1)
    assert prov["libraries"]["numpy"] == np.__version__
    bad = dict(doc, input_sha256="xyz")
    with pytest.raises(jsonschema.ValidationError):
        jsonschema.validate(bad, SCHEMA)


def test_report_folder_follows_the_umask(report):
    """The report folder and its files get the user's umask (0o027 here: 0750 and 0640),
    not the 0700 of a temporary folder."""
    assert report.stat().st_mode & 0o777 == 0o750
    assert (report / "summary.json").stat().st_mode & 0o777 == 0o640


def test_summary_parquet_carries_units_and_provenance(tmp_path):
    """summary.parquet's schema metadata (read with pyarrow) names the unit of every
    unit-carrying column and the run's provenance; the rows leave provenance out."""
    import pyarrow.parquet as pq
    out = tmp_path / "b"
    r = CliRunner().invoke(main, ["batch", str(SAMPLE), "-o", str(out), "--only", "stacking",
                                  "--no-plots", "--no-html", "-q"])
    assert r.exit_code == 0, r.output
    schema = pq.read_schema(out / "summary.parquet")
    meta = json.loads(schema.metadata[b"sheetview"])
    assert "numpy" in meta["provenance"]["libraries"]
    names = set(schema.names)
    assert not any(n.startswith("provenance.") for n in names)
    units = meta["units"]
    assert units["spacing"] == "nm" and units["settings.angle_tol"] == "deg"
    assert units["stacking.stacks.mean_lateral_diameter"] == "nm"
    assert "stacking.mean" not in units and "n_prisms" not in units
