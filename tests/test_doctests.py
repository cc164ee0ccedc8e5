"""The runnable ``Examples`` sections of the public functions' docstrings (doctest), run
from the project root so that the bundled samples are found."""
from __future__ import annotations

import doctest
import importlib
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent

#: Modules whose docstrings carry runnable examples.
MODULES = ["sheetview.api", "sheetview.app.settings", "sheetview.app.load"]


@pytest.mark.parametrize("name", MODULES)
def test_docstring_examples(name, monkeypatch):
    monkeypatch.chdir(ROOT)
    mod = importlib.import_module(name)
    res = doctest.testmod(mod, optionflags=doctest.ELLIPSIS | doctest.NORMALIZE_WHITESPACE)
    assert res.attempted > 0, f"{name} has no examples"
    assert res.failed == 0
