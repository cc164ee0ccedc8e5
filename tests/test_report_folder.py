"""Output folders written whole (``sheetview.report.atomic_folder``) and the cleanup of
``--force``: what an earlier run of the same command wrote and the new one does not is
removed; nothing else ever is (derived from the folder contract in docs/cli.md)."""
import os

import pytest

from sheetview.report import MANIFEST, atomic_folder


def _write(kind, out, files, force=True):
    with atomic_folder(out, force=force, kind=kind) as (tmp, _):
        for n in files:
            (tmp / n).write_text(n)


def test_force_removes_only_what_the_same_command_wrote(tmp_path):
    out = tmp_path / "res"
    _write("report", out, ["a.csv", "b.png", "summary.json"], force=False)
    (out / "mine.txt").write_text("the user's")
    _write("report", out, ["a.csv", "summary.json"])
    assert sorted(p.name for p in out.iterdir()) == [MANIFEST, "a.csv", "mine.txt", "summary.json"]
    # another command into the same folder removes nothing of the report
    _write("micrograph", out, ["overview.png"])
    assert {"a.csv", "summary.json", "mine.txt", "overview.png"} <= {p.name for p in out.iterdir()}
    assert (out / MANIFEST).read_text().splitlines() == ["# sheetview micrograph", "overview.png"]


def test_a_folder_without_manifest_keeps_its_files(tmp_path):
    out = tmp_path / "old"
    out.mkdir()
    (out / "summary.json").write_text("{}")
    (out / "old.png").write_text("x")
    _write("report", out, ["summary.json"])
    assert (out / "old.png").exists()


@pytest.mark.parametrize("manifest", [
    b"\xff\xfe\x00garbage\n",
    b"# sheetview report\n../outside.txt\n.\n..\nsub/inner.txt\n" + b"x" * 300 + b"\n",
    b"# sheetview report\n\n\n" + MANIFEST.encode() + b"\n",
])
def test_a_damaged_manifest_never_removes_anything_outside(tmp_path, manifest):
    out = tmp_path / "res"
    out.mkdir()
    (tmp_path / "outside.txt").write_text("keep")
    (out / "sub").mkdir()
    (out / "sub" / "inner.txt").write_text("keep")
    (out / "stale.csv").write_text("x")
    (out / MANIFEST).write_bytes(manifest)
    _write("report", out, ["summary.json"])
    assert (tmp_path / "outside.txt").read_text() == "keep"
    assert (out / "sub" / "inner.txt").read_text() == "keep"
    assert (out / "stale.csv").exists()  # not listed by a readable manifest of the report
    assert (out / "summary.json").read_text() == "summary.json"
    assert (out / MANIFEST).read_text().splitlines() == ["# sheetview report", "summary.json"]


def test_a_listed_symlink_is_not_followed(tmp_path):
    target = tmp_path / "precious.txt"
    target.write_text("keep")
    out = tmp_path / "res"
    _write("report", out, ["link.txt", "summary.json"], force=False)
    (out / "link.txt").unlink()
    os.symlink(target, out / "link.txt")
    _write("report", out, ["summary.json"])
    assert target.read_text() == "keep" and (out / "link.txt").is_symlink()
