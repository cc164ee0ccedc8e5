"""Faults and concurrency (docs/reliability.md): a report never replaces its own input, two
batches never share a folder, a stale lock or temporary folder of a dead process is
recovered, SIGTERM cleans up like Ctrl-C, and a FIFO among a batch's inputs cannot hang it."""
from __future__ import annotations

import json
import os
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest
from click.testing import CliRunner

from sheetview.batch import LOCK, run_batch
from sheetview.cli import main

ROOT = Path(__file__).resolve().parent.parent
SAMPLE = ROOT / "sample_structures" / "single_stack.csv"
FAST = ["--voxel", "0.3", "--lines", "300", "--only", "stacking,phases", "-q"]


def _dead_pid() -> int:
    p = subprocess.Popen([sys.executable, "-c", "pass"])
    p.wait()
    return p.pid


def test_report_never_replaces_its_input(tmp_path):
    """`measure data/prisms.csv -o data --force` would replace the input with the report's
    own prisms.csv: refused before anything in the folder changes (exit 2, input intact)."""
    data = tmp_path / "data"
    data.mkdir()
    inp = data / "prisms.csv"
    shutil.copy(SAMPLE, inp)
    before = inp.read_bytes()
    r = CliRunner().invoke(main, ["measure", str(inp), "-o", str(data), "--force", *FAST])
    assert r.exit_code == 2, r.output
    assert "its own input" in r.output and r.output.count("\n") == 1
    assert inp.read_bytes() == before
    assert sorted(p.name for p in data.iterdir()) == ["prisms.csv"]


def test_second_batch_on_a_folder_is_refused_naming_the_holder(tmp_path):
    out = tmp_path / "out"
    out.mkdir()
    (out / LOCK).write_text(json.dumps({"host": os.uname().nodename, "pid": os.getpid(),
                                        "started": "2026-12-03 10:00:00"}))
    r = CliRunner().invoke(main, ["batch", str(SAMPLE), "-o", str(out), *FAST])
    assert r.exit_code == 2
    assert f"batch process {os.getpid()}" in r.output and "in use" in r.output
    assert not (out / "runs").exists()  # nothing touched


def test_stale_lock_of_a_dead_process_is_taken_over(tmp_path):
    out = tmp_path / "out"
    out.mkdir()
    (out / LOCK).write_text(json.dumps({"host": os.uname().nodename, "pid": _dead_pid(),
                                        "started": "x"}))
    from sheetview.app.settings import Settings
    res = run_batch([str(SAMPLE)], out, Settings(voxel=0.3, lines=300), only="stacking",
                    quiet=True, html_pages=False, plots=False)
    assert res.n_done == 1
    assert not (out / LOCK).exists()  # released at the end


def test_stale_part_folder_of_a_dead_process_is_removed(tmp_path):
    out = tmp_path / "rep"
    stale = tmp_path / f".rep.{_dead_pid()}.abcd.part"
    stale.mkdir()
    (stale / "summary.json").write_text("{}")
    alive = tmp_path / f".rep.{os.getpid()}.efgh.part"
    alive.mkdir()
    r = CliRunner().invoke(main, ["measure", str(SAMPLE), "-o", str(out), *FAST])
    assert r.exit_code == 0, r.output
    assert not stale.exists() and alive.exists()


def test_sigterm_leaves_no_temporary_folder(tmp_path):
    """SIGTERM during a run ends it like Ctrl-C (status 130) and removes its temporary
    folder; a run that finished first is complete. Either way no `.part` is left."""
    out = tmp_path / "rep"
    p = subprocess.Popen([sys.executable, "-m", "sheetview", "measure", str(SAMPLE), "-o",
                          str(out), "--voxel", "0.12", "-q"], cwd=ROOT,
                         stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    deadline = time.time() + 120
    while time.time() < deadline and not list(tmp_path.glob(".rep.*.part")) and p.poll() is None:
        time.sleep(0.05)
    p.send_signal(signal.SIGTERM)
    _, err = p.communicate(timeout=300)
    assert p.returncode in (0, 130), err[-2000:]
    if p.returncode == 130:
        assert b"interrupted" in err and b"Traceback" not in err
        assert not out.exists()
    assert not list(tmp_path.glob(".rep.*.part"))


@pytest.mark.skipif(not hasattr(os, "mkfifo"), reason="no FIFOs on this system")
def test_batch_with_a_fifo_among_its_inputs_does_not_hang(tmp_path):
    fifo = tmp_path / "pipe.csv"
    os.mkfifo(fifo)
    p = subprocess.run([sys.executable, "-m", "sheetview", "batch", str(SAMPLE), str(fifo),
                        "-o", str(tmp_path / "out"), *FAST], cwd=ROOT, capture_output=True,
                       text=True, timeout=300)
    assert p.returncode == 1, p.stderr[-2000:]  # one input failed, the other measured
    assert "not a regular file" in p.stdout + p.stderr or "FIFO" in p.stdout + p.stderr
