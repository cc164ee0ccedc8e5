"""The worked example of docs/api.md runs headless from start to end (docs/examples/tour.py)."""
from __future__ import annotations

import runpy
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent


def test_tour_runs(tmp_path, monkeypatch, capsys):
    """The tour loads a bundled sample, measures it, makes a DataFrame, figures, scattering
    and T2 comparisons and a report folder; matplotlib's backend is not switched."""
    import matplotlib
    backend = matplotlib.get_backend()
    monkeypatch.chdir(tmp_path)
    ns = runpy.run_path(str(ROOT / "docs" / "examples" / "tour.py"), run_name="__main__")
    out = capsys.readouterr().out
    assert "Measurement" in out and "stacking number (mean): 5.0" in out
    assert (tmp_path / "tour_output" / "summary.json").is_file()
    assert ns["df"].shape[0] == 1
    assert matplotlib.get_backend() == backend
