"""The layers of the house hold: the import-linter contracts of pyproject.toml (layers
bottom to top, no import cycles between sibling modules) pass with no exception listed, and
no module imports another module's private (underscore) names."""
from __future__ import annotations

import ast
import shutil
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent


def test_import_linter_contracts_are_kept():
    exe = Path(sys.executable).with_name("lint-imports")
    cmd = [str(exe)] if exe.exists() else [shutil.which("lint-imports") or "lint-imports"]
    r = subprocess.run(cmd + ["--no-cache"], cwd=ROOT, capture_output=True, text=True,
                       timeout=300)
    assert r.returncode == 0, r.stdout[-4000:] + r.stderr[-2000:]
    assert "0 broken" in r.stdout
    text = (ROOT / "pyproject.toml").read_text()
    assert "ignore_imports" not in text  # no exception listed


def test_no_module_imports_private_names_of_another():
    """`from .x import _name` across modules is not allowed (a helper shared by several
    modules lives, public, in a kernel module); private kernel modules (`_walk`, `_result`)
    may be imported, their names are public."""
    kernel_modules = {p.stem for p in (ROOT / "sheetview").rglob("_*.py")}
    bad = []
    for path in (ROOT / "sheetview").rglob("*.py"):
        tree = ast.parse(path.read_text(encoding="utf-8"))
        for node in ast.walk(tree):
            if isinstance(node, ast.ImportFrom) and (node.level or (node.module or "").startswith("sheetview")):
                for alias in node.names:
                    if (alias.name.startswith("_") and not alias.name.startswith("__")
                            and alias.name not in kernel_modules):
                        bad.append(f"{path.relative_to(ROOT)}:{node.lineno} imports {alias.name}")
    assert not bad, "\n".join(bad)
