"""The project files agree with each other: LICENSE is the license pyproject.toml declares
(the BSD 3-Clause text as published by the Open Source Initiative: its three conditions and
disclaimer), CITATION.cff (Citation File Format 1.2.0 keys) carries the package's version
and license, and CHANGELOG.md has a section for the current version."""
from __future__ import annotations

import re
from pathlib import Path

import pytest

try:
    import tomllib
except ImportError:  # Python 3.10
    tomllib = pytest.importorskip("tomli")

from sheetview import __version__

ROOT = Path(__file__).resolve().parents[1]
PYPROJECT = tomllib.loads((ROOT / "pyproject.toml").read_text(encoding="utf-8"))


def test_license_file_is_the_declared_license():
    assert PYPROJECT["project"]["license"]["text"] == "BSD-3-Clause"
    text = " ".join((ROOT / "LICENSE").read_text(encoding="utf-8").split())
    assert text.startswith("BSD 3-Clause License")
    for clause in ("Redistributions of source code must retain the above copyright notice",
                   "Redistributions in binary form must reproduce the above copyright notice",
                   "Neither the name of the copyright holder nor the names of its contributors",
                   "THIS SOFTWARE IS PROVIDED BY THE COPYRIGHT HOLDERS AND CONTRIBUTORS \"AS IS\""):
        assert clause in text, clause
    assert any("BSD License" in c for c in PYPROJECT["project"]["classifiers"])


def test_citation_file_matches_the_package():
    yaml = pytest.importorskip("yaml")
    cff = yaml.safe_load((ROOT / "CITATION.cff").read_text(encoding="utf-8"))
    for key in ("cff-version", "message", "title", "authors"):
        assert key in cff
    assert cff["cff-version"] == "1.2.0"
    assert str(cff["version"]) == __version__
    assert cff["license"] == PYPROJECT["project"]["license"]["text"]


def test_changelog_has_the_current_version():
    text = (ROOT / "CHANGELOG.md").read_text(encoding="utf-8")
    versions = re.findall(r"^## (?:Unreleased \()?(\d+\.\d+\.\d+)", text, re.M)
    assert __version__ in versions


def test_classifiers_name_the_supported_pythons():
    req = PYPROJECT["project"]["requires-python"]
    low = tuple(int(x) for x in re.search(r">=\s*(\d+)\.(\d+)", req).groups())
    pys = [tuple(int(x) for x in c.rsplit(":: ", 1)[1].split("."))
           for c in PYPROJECT["project"]["classifiers"]
           if re.match(r"Programming Language :: Python :: 3\.\d+$", c)]
    assert pys and min(pys) == low
