"""The conventions of the command line (docs/cli-conventions.md), checked on every command.

The checks walk the commands click knows (so a new command is checked without being
listed here) and read the table of metavars from the document itself: an option whose
metavar is not in the document, or whose help lacks the unit its metavar implies, fails.
"""
from __future__ import annotations

import re
import subprocess
import sys
from pathlib import Path

import click
import numpy as np
import pytest
from click.testing import CliRunner

from sheetview.cli import main
from sheetview.cli.conventions import ALIASES, Command

ROOT = Path(__file__).resolve().parents[1]
DOC = ROOT / "docs" / "cli-conventions.md"
PRISMS = str(ROOT / "sample_structures" / "single_stack.csv")
VOLUME = str(ROOT / "sample_structures" / "small_volume.tif")


def _commands():
    ctx = click.Context(main)
    return {name: main.get_command(ctx, name) for name in main.list_commands(ctx)}


def _doc_metavars() -> dict:
    """metavar -> unit, from the table of docs/cli-conventions.md (``| `NM` | nm | ...``)."""
    out = {}
    for line in DOC.read_text(encoding="utf-8").splitlines():
        m = re.match(r"\|\s*`([^`]+)`\s*\|\s*([^|]*)\|", line)
        if m and m.group(1) not in ("metavar",):
            out[m.group(1).replace("\\|", "|")] = m.group(2).strip()
    return out


COMMANDS = _commands()


def test_the_document_lists_the_metavars_of_the_code():
    """docs/cli-conventions.md and sheetview.cli.conventions.METAVARS list the same metavars."""
    from sheetview.cli.conventions import METAVARS
    assert set(_doc_metavars()) >= set(METAVARS)


@pytest.mark.parametrize("name", sorted(COMMANDS))
def test_every_help_follows_the_conventions(name):
    """Every visible option has help, a metavar from the table (a flag or a choice shows
    none of its own), and names in its help the unit its metavar implies; -o is a FOLDER
    or a FILE; --json is a flag; positions are upper-case words; the command is a
    sheetview Command (deprecated spellings rewritten) and its --help runs."""
    cmd = COMMANDS[name]
    table = _doc_metavars()
    assert isinstance(cmd, Command), f"{name} is not built with sheetview.cli.conventions.command"
    bad = []
    for p in cmd.params:
        if isinstance(p, click.Argument):
            mv = p.make_metavar(click.Context(cmd)) if p.metavar is None else p.metavar
            if mv.rstrip(".").upper() != mv.rstrip("."):
                bad.append(f"position {mv!r} is not upper case")
            continue
        if p.hidden:
            continue
        opt = p.opts[-1]
        if not p.help:
            bad.append(f"{opt} has no help")
        if "--json" in p.opts and not p.is_flag:
            bad.append("--json takes a value")
        if "-o" in p.opts and p.metavar not in ("FOLDER", "FILE"):
            bad.append(f"-o shows {p.metavar!r}, not FOLDER or FILE")
        if p.is_flag or isinstance(p.type, click.Choice):
            continue
        if p.metavar not in table:
            bad.append(f"{opt} shows metavar {p.metavar!r}, not one of docs/cli-conventions.md")
            continue
        unit = table[p.metavar]
        if unit and unit != "-" and unit not in (p.help or ""):
            bad.append(f"{opt} ({p.metavar}) does not say its unit {unit!r} in its help")
    assert not bad, f"{name}: " + "; ".join(bad)
    r = CliRunner().invoke(main, [name, "--help"])
    assert r.exit_code == 0 and "Usage:" in r.output


@pytest.mark.parametrize("name", sorted(COMMANDS))
def test_usage_errors_are_one_line(name):
    """A usage error of any command (an unknown option) is one line ``sheetview: error:``
    naming the option, exit status 2."""
    r = CliRunner().invoke(main, [name, "--no-such-option"])
    assert r.exit_code == 2
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("sheetview: error:"), r.stderr
    assert "--no-such-option" in lines[0]


def test_usage_error_of_the_program_is_one_line():
    """The installed program (not the test runner) prints one line for a folder given as a
    file, and exit status 2."""
    r = subprocess.run([sys.executable, "-m", "sheetview", "info", str(ROOT / "sample_structures")],
                       capture_output=True, text=True, cwd=ROOT)
    assert r.returncode == 2
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("sheetview: error:") and "directory" in lines[0]


@pytest.mark.parametrize("old,new", sorted(ALIASES.items()))
def test_old_spellings_still_work_with_one_warning(old, new, tmp_path):
    """Each deprecated spelling is rewritten for a command that has the current option,
    with one warning line naming the replacement, and the option then acts (checked by
    the message of a value the current option refuses, or by success)."""
    name = next(n for n, c in sorted(COMMANDS.items())
                if any(new in p.opts for p in c.params if isinstance(p, click.Option)))
    r = CliRunner().invoke(main, [name, PRISMS, old, "nan-not-a-value"])
    assert f"sheetview: warning: {old} is deprecated, use {new}" in r.stderr
    assert r.stderr.count("deprecated") == 1
    assert r.exit_code == 2 and "Traceback" not in r.output


def _periodic_copy(tmp_path):
    p = tmp_path / "periodic.csv"
    text = Path(PRISMS).read_text(encoding="utf-8")
    text = re.sub(r'# domain: \{[^\n]*\}', '# domain: {"shape": "box", "min": [0, 0, 0], '
                  '"max": [12, 12, 12], "periodic": true}', text)
    p.write_text(text, encoding="utf-8")
    return str(p)


# Options that cannot act on the input they are given with: every command refuses them the
# same way, naming what they apply to.
NOT_APPLICABLE = [
    (["measure", VOLUME, "--voxel", "1"], "--voxel", "a voxel volume"),
    (["slices", VOLUME, "--voxel", "1", "-o", "{tmp}/s.png"], "--voxel", "a voxel volume"),
    (["scatter", VOLUME, "--voxel", "1"], "--voxel", "a voxel volume"),
    (["relax", VOLUME, "--voxel", "1"], "--voxel", "a voxel volume"),
    (["section", VOLUME, "--voxel", "1"], "--voxel", "a voxel volume"),
    (["project", PRISMS, "--voxel", "1"], "--voxel", "prisms"),
    (["convert", PRISMS, "{tmp}/c.vtp", "--voxel", "1"], "--voxel", ".vtp"),
    (["convert", VOLUME, "{tmp}/c.npy", "--voxel", "1"], "--voxel", "a volume"),
    (["render", PRISMS, "-o", "{tmp}/r.png", "--voxel", "1"], "--voxel", "a picture without a cut"),
    (["info", PRISMS, "--volume-voxel", "1"], "--volume-voxel", "a prism table"),
    (["measure", PRISMS, "--volume-voxel", "1"], "--volume-voxel", "a prism table"),
    (["info", VOLUME, "--thickness", "1"], "--thickness", "a voxel volume"),
    (["info", PRISMS, "--as", "solid"], "--as", "a prism table"),
    (["info", str(ROOT / "sample_structures" / "sphere_packing.csv"), "--repeat", "1.2"],
     "--repeat", "a table of spheres"),
    (["measure", "{periodic}", "--intrusion", "--only", "pores"], "--intrusion", "periodic"),
    (["measure", VOLUME, "--at-progress", "0.5"], "--at-progress", "a voxel volume"),
    (["measure", VOLUME, "--pore-method", "exact"], "--pore-method", "a voxel volume"),
    (["section", PRISMS, "--normal", "1,1,0", "--at", "3"], "--at", "--normal"),
    (["project", PRISMS, "--at", "3"], "--at", "a projection of the whole sample"),
]


@pytest.mark.parametrize("args,option,what", NOT_APPLICABLE,
                         ids=[" ".join(a[:1] + [a[-2] if a[-1] != "pores" else "--intrusion"])
                              for a, _, _ in NOT_APPLICABLE])
def test_options_that_do_not_apply_are_refused_one_way(args, option, what, tmp_path):
    """The one rule (sheetview.app.applies): refused before any output, exit 2, one line
    ``OPTION does not apply to <input>; it applies to <...>``; nothing silently ignored."""
    args = [a.format(tmp=tmp_path, periodic=_periodic_copy(tmp_path)) for a in args]
    r = CliRunner().invoke(main, args)
    assert r.exit_code == 2, r.output
    err = [ln for ln in r.stderr.splitlines() if ln.startswith("sheetview: error:")]
    assert len(err) == 1, r.stderr
    assert f"{option} does not apply to" in err[0] and "; it applies to" in err[0], err[0]
    assert what in err[0].split("; it applies to")[0], err[0]
    assert not any(Path(tmp_path).iterdir()) or all(
        p.name == "periodic.csv" for p in Path(tmp_path).iterdir())


def test_batch_records_an_option_that_does_not_apply_as_that_input_failing(tmp_path):
    """``batch`` mixes inputs: an option that does not apply to one of them fails that input
    (exit status 1) with the same message as ``measure``."""
    r = CliRunner().invoke(main, ["batch", VOLUME, "--voxel", "1", "-o", str(tmp_path / "b"),
                                  "-q"])
    m = CliRunner().invoke(main, ["measure", VOLUME, "--voxel", "1"])
    assert r.exit_code == 1 and m.exit_code == 2
    msg = m.stderr.strip().splitlines()[-1].removeprefix("sheetview: error: ")
    assert msg in r.output


def test_messages_name_no_classes_or_fields():
    """Messages a user sees speak of prisms, solid bodies and voxel volumes, never of the
    classes (PhaseGrid, Structure, SurfaceBody) or of internal field names."""
    outs = []
    for args in (["measure", VOLUME, "--only", "stacking"], ["render", VOLUME, "-o", "x.png"],
                 ["info", PRISMS, "--volume-voxel", "1"]):
        outs.append(CliRunner().invoke(main, args).stderr)
    text = "\n".join(outs)
    assert "does not apply" in text or "need" in text
    for word in ("PhaseGrid", "Structure", "SurfaceBody", "field '", "voxel_size"):
        assert word not in text, text


@pytest.mark.parametrize("name", ["render", "slices", "trend", "synth", "batch"])
def test_a_missing_required_output_is_a_usage_error(name):
    """A command whose -o is required refuses to run without it (one line, exit 2)."""
    extra = ["--x", "a", "--y", "b"] if name == "trend" else []
    r = CliRunner().invoke(main, [name] + ([] if name == "synth" else [PRISMS]) + extra)
    assert r.exit_code == 2 and r.exception is None or isinstance(r.exception, SystemExit)
    assert "Missing option '-o'" in r.stderr and len(r.stderr.strip().splitlines()) == 1


def test_messages_show_current_spellings_and_settings(tmp_path):
    """A message written below the command line with an old spelling shows the current
    option (micrograph: --pixel); an error of the grid's voxel size is shown as --voxel,
    not as a field of the file."""
    from matplotlib.image import imsave

    from sheetview.cli import shown_error
    from sheetview.cli.measure import measure
    from sheetview.errors import OptionError
    png = tmp_path / "g.png"
    imsave(png, np.random.default_rng(0).random((32, 32)), cmap="gray")
    r = CliRunner().invoke(main, ["micrograph", str(png)])
    assert r.exit_code == 2 and "--pixel " in r.stderr and "--pixel-size" not in r.stderr
    e = OptionError("the closed surface encloses no volume", path="b.stl", field="voxel_size")
    text = shown_error(e, measure)
    assert text.startswith("b.stl: --voxel:") and "field" not in text
