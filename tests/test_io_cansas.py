"""Measured scattering curves in the canSAS 1D formats, written independently here: canSAS
XML built with xml.etree (element names and unit attributes of the canSAS 1D XML standard,
SASroot v1.1) and NXcanSAS built with h5py (NXentry/NXdata groups with the signal, I_axes,
uncertainties and units attributes of the NXcanSAS application definition)."""
from __future__ import annotations

import xml.etree.ElementTree as ET
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner

from sheetview.cli import main
from sheetview.errors import InputError, OptionError
from sheetview.io.curves import read_experimental

h5py = pytest.importorskip("h5py")

ROOT = Path(__file__).resolve().parents[1]
SAMPLE = ROOT / "sample_structures" / "single_stack.csv"
NS = "urn:cansas1d:1.1"


def _curve(n=30, seed=3):
    """q in 1/A at irregular spacing, a Porod-like I(q) in 1/cm, 3% uncertainties."""
    rng = np.random.default_rng(seed)
    q = np.sort(rng.uniform(0.005, 0.5, n))
    i = 2e-4 * q ** -4 * (1 + 0.02 * rng.normal(size=n)) + 0.05
    return q, i, 0.03 * i


def write_cansas_xml(path, q, i, dev, q_unit="1/A", i_unit="1/cm", entries=1):
    ET.register_namespace("", NS)
    root = ET.Element(f"{{{NS}}}SASroot", {"version": "1.1"})
    for _ in range(entries):
        entry = ET.SubElement(root, f"{{{NS}}}SASentry", {"name": "sample"})
        ET.SubElement(entry, f"{{{NS}}}Title").text = "test curve"
        ET.SubElement(entry, f"{{{NS}}}Run").text = "1"
        data = ET.SubElement(entry, f"{{{NS}}}SASdata")
        for a, b, c in zip(q, i, dev):
            pt = ET.SubElement(data, f"{{{NS}}}Idata")
            ET.SubElement(pt, f"{{{NS}}}Q", {"unit": q_unit}).text = repr(float(a))
            ET.SubElement(pt, f"{{{NS}}}I", {"unit": i_unit}).text = repr(float(b))
            ET.SubElement(pt, f"{{{NS}}}Idev", {"unit": i_unit}).text = repr(float(c))
    ET.ElementTree(root).write(path, xml_declaration=True, encoding="utf-8")


def write_nxcansas(path, q, i, dev, q_unit="1/angstrom", i_unit="1/cm"):
    with h5py.File(path, "w") as f:
        e = f.create_group("sasentry01")
        e.attrs["NX_class"] = "NXentry"
        e.attrs["canSAS_class"] = "SASentry"
        e.attrs["version"] = "1.0"
        e["definition"] = "NXcanSAS"
        d = e.create_group("sasdata01")
        d.attrs["NX_class"] = "NXdata"
        d.attrs["canSAS_class"] = "SASdata"
        d.attrs["signal"] = "I"
        d.attrs["I_axes"] = "Q"
        d.attrs["Q_indices"] = 0
        dq = d.create_dataset("Q", data=q)
        dq.attrs["units"] = q_unit
        di = d.create_dataset("I", data=i)
        di.attrs["units"] = i_unit
        di.attrs["uncertainties"] = "Idev"
        dd = d.create_dataset("Idev", data=dev)
        dd.attrs["units"] = i_unit


def test_cansas_xml_reads_q_in_nm_with_uncertainties(tmp_path):
    """Q in 1/A becomes nm^-1 (x10, 1 A = 0.1 nm); I and Idev in 1/cm are kept; the
    format and unit source are recorded."""
    q, i, dev = _curve()
    p = tmp_path / "c.xml"
    write_cansas_xml(p, q, i, dev)
    c = read_experimental(p, "scattering")
    np.testing.assert_allclose(c.x, 10 * q, rtol=1e-15)
    np.testing.assert_allclose(c.y, i, rtol=1e-15)
    np.testing.assert_allclose(c.sigma, dev, rtol=1e-15)
    assert c.unit_found == "Å^-1" and c.format == "canSAS XML" and not c.warnings


def test_nxcansas_reads_q_in_nm_with_uncertainties(tmp_path):
    """NXcanSAS with Q in 1/nm and I in 1/m: q kept, I and its uncertainties to 1/cm
    (1/m = 0.01/cm)."""
    q, i, dev = _curve()
    p = tmp_path / "c.h5"
    write_nxcansas(p, q, i, dev, q_unit="1/nm", i_unit="1/m")
    c = read_experimental(p, "scattering")
    np.testing.assert_allclose(c.x, q, rtol=1e-15)
    np.testing.assert_allclose(c.y, 0.01 * i, rtol=1e-15)
    np.testing.assert_allclose(c.sigma, 0.01 * dev, rtol=1e-15)
    assert c.unit_found == "nm^-1" and c.format == "NXcanSAS"


def test_the_same_curve_reads_alike_from_text_xml_and_hdf5(tmp_path):
    """One curve written as text columns, canSAS XML and NXcanSAS reads back the same."""
    q, i, dev = _curve(seed=5)
    write_cansas_xml(tmp_path / "c.xml", q, i, dev)
    write_nxcansas(tmp_path / "c.nxs", q, i, dev)
    (tmp_path / "c.csv").write_text("q (1/A),I,err\n" + "".join(
        f"{float(a)!r},{float(b)!r},{float(c)!r}\n" for a, b, c in zip(q, i, dev)))
    curves = [read_experimental(tmp_path / n, "scattering") for n in ("c.csv", "c.xml", "c.nxs")]
    for c in curves[1:]:
        np.testing.assert_allclose(c.x, curves[0].x, rtol=1e-14)
        np.testing.assert_allclose(c.y, curves[0].y, rtol=1e-14)
        np.testing.assert_allclose(c.sigma, curves[0].sigma, rtol=1e-14)


def test_relative_intensity_unit_is_said(tmp_path):
    q, i, dev = _curve()
    p = tmp_path / "c.xml"
    write_cansas_xml(p, q, i, dev, i_unit="none")
    c = read_experimental(p, "scattering")
    assert any("not an absolute scale" in w for w in c.warnings)


@pytest.mark.parametrize("case", ["unit", "doctype", "not_cansas", "t2", "columns", "no_data"])
def test_bad_cansas_files_are_refused_naming_the_file(tmp_path, case):
    q, i, dev = _curve()
    p = tmp_path / ("c.xml" if case != "no_data" else "c.h5")
    kind, cols = "scattering", None
    if case == "unit":
        write_cansas_xml(p, q, i, dev, q_unit="furlong")
    elif case == "doctype":
        p.write_text('<?xml version="1.0"?><!DOCTYPE x [<!ENTITY a "b">]><SASroot/>')
    elif case == "not_cansas":
        p.write_text("<root><a>1</a></root>")
    elif case == "t2":
        write_cansas_xml(p, q, i, dev)
        kind = "t2"
    elif case == "columns":
        write_cansas_xml(p, q, i, dev)
        cols = "1,2"
    else:
        with h5py.File(p, "w") as f:
            f.create_group("entry")
    err = OptionError if case == "columns" else InputError
    with pytest.raises(err) as e:
        read_experimental(p, kind, None, cols)
    assert str(p) in str(e.value)


def test_scatter_compare_fits_a_cansas_curve(tmp_path):
    """`scatter --compare` takes a canSAS XML file and records its format and q unit."""
    q, i, dev = _curve()
    p = tmp_path / "m.xml"
    write_cansas_xml(p, q, i, dev)
    r = CliRunner().invoke(main, ["scatter", str(SAMPLE), "--voxel", "0.3", "--compare", str(p),
                                  "--json"])
    assert r.exit_code == 0, r.output
    import json
    doc = json.loads(r.stdout)
    assert doc["comparison"]["format"] == "canSAS XML" and doc["comparison"]["q_unit"] == "Å^-1"
