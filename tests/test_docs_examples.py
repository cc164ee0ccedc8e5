"""Every shell example of the documentation (fenced blocks of docs/*.md and README.md that
run `sheetview`) uses files shipped with the project and runs: each block's commands run in
order in an empty folder that holds only a link to sample_structures/. Usage synopses are
fenced as ``text`` and are not run; `sheetview view` opens a window and is only checked for
its input file."""
from __future__ import annotations

import re
import shlex
from pathlib import Path

import pytest
from click.testing import CliRunner

from sheetview.cli import main

ROOT = Path(__file__).resolve().parents[1]
DOCS = sorted((ROOT / "docs").glob("*.md")) + [ROOT / "README.md"]
_FENCE = re.compile(r"^```(\w*)\n(.*?)^```", re.S | re.M)


def _commands(block: str) -> list[list[str]]:
    text = re.sub(r"\\\n\s*", " ", block)
    out = []
    for line in text.splitlines():
        for part in line.split("&&"):
            part = part.strip()
            m = re.match(r"^(?:\S*/)?sheetview\s+(.*)$", part)
            if m:
                out.append(shlex.split(m.group(1)))
    return out


def _blocks():
    found = []
    for doc in DOCS:
        for k, m in enumerate(_FENCE.finditer(doc.read_text(encoding="utf-8"))):
            if m.group(1) not in ("", "sh", "shell", "bash", "console"):
                continue
            cmds = _commands(m.group(2))
            if cmds:
                found.append(pytest.param(cmds, id=f"{doc.name}#{k}"))
    return found


BLOCKS = _blocks()


def test_the_documentation_has_examples():
    assert len(BLOCKS) >= 4


@pytest.mark.parametrize("commands", BLOCKS)
def test_shell_example_runs_on_shipped_files(commands, tmp_path, monkeypatch):
    (tmp_path / "sample_structures").symlink_to(ROOT / "sample_structures")
    monkeypatch.chdir(tmp_path)
    for args in commands:
        if args[0] == "view":  # a window: the input must be shipped
            assert (tmp_path / args[1]).is_file(), args
            continue
        r = CliRunner().invoke(main, args)
        assert r.exit_code == 0, f"sheetview {shlex.join(args)}\n{r.output}"
