"""Reports: measure results -> a folder of JSON, CSV tables and PNG figures.

Only this module writes result files. Every file goes through
:func:`sheetview.io.output.atomic_path`, so a crash never leaves a half-written file,
and an existing non-empty folder is refused unless ``force``.

Folder layout (files appear only for the measures that ran)::

    summary.json                 the document printed by ``sheetview measure --json``
    prisms.csv                   one row per prism (stacking number, layer, stack, local S...)
    stacks.csv                   one row per stack
    tilted_contacts.csv          one row per tilted prism pair
    stacking_histogram.png       stacking numbers: by prism count, by volume, by stack
    orientation_distribution.csv equal-area bins (cos theta x phi): fraction, density
    pole_figure.csv              Lambert equal-area grid: density in multiples of uniform
    pole_figure.png, order.png   pole figure; local-order and polar-angle histograms
    phase_fractions.csv          volume fraction and volume of each phase class
    interfaces.csv               solid interface areas per pore class, with the domain wall, and
                                 their total over the pore classes
    minkowski.csv                Minkowski functionals of the solid and of the pore space,
                                 densities per domain volume
    pore_sizes_local_thickness.csv, pore_sizes_intrusion.csv, pore_sizes.png
    chords_solid.csv, chords_pore.csv, chords.png
    s2_solid.csv, s2_solid.png   two-point correlation of the solid
    sections.png                 three orthogonal central sections of the phase grid

The folder is assembled under a temporary name and renamed into place when complete.
"""
from __future__ import annotations

import contextlib
import csv
import glob
import math
import os
import shutil
import tempfile
from pathlib import Path

import numpy as np

from .errors import OutputExistsError, SheetviewError
from .figures import FIGURES, plot_sections
from .io.output import atomic_path, user_mode
from .io.columns import with_units
from .app.document import dumps
from .app.sidebyside import CURVES
from .overlay import plot_side_by_side


def check_folder(outdir, force: bool = False) -> Path:
    """Raise unless ``outdir`` may be written: absent, an empty folder, or ``force``."""
    out = Path(outdir)
    if out.exists():
        if not out.is_dir():
            raise SheetviewError("exists and is not a folder; give a folder name for -o",
                                 path=out)
        if any(out.iterdir()) and not force:
            raise OutputExistsError("folder exists and is not empty; pass --force to write "
                                    "into it (files of the same name are replaced, and those an "
                                    "earlier report wrote that this one does not are removed)",
                                    path=out)
    return out


def prepare_folder(outdir, force: bool = False) -> Path:
    """Create ``outdir`` (and parents). Refuse an existing non-empty folder unless
    ``force``, and a path that is a file."""
    out = check_folder(outdir, force)
    if not out.exists():
        try:
            out.mkdir(parents=True)
        except OSError as e:
            raise SheetviewError(f"cannot create the folder ({e.strerror})", path=out) from None
    return out


def _fmt(v):
    if isinstance(v, (int, np.integer)):
        return str(int(v))
    v = float(v)
    if math.isnan(v):
        return "nan"
    if math.isinf(v):
        return "inf" if v > 0 else "-inf"
    return repr(v) if v == int(v) and abs(v) < 1e15 else f"{v:.9g}"


def write_csv(path, columns: dict, force: bool = False) -> Path:
    """Write equal-length columns as a CSV file with a header row (atomically).

    Cells: whole-number columns (and booleans) as integers; floats with 9 significant
    digits (``format(v, ".9g")``), or ``repr`` where the value is a whole number below
    1e15 (``2.0``), ``nan``, ``inf``, ``-inf``; text as it is. Rows end in CRLF, as the
    ``csv`` module writes them. Number columns are formatted column by column (tens of
    thousands of rows: chords, prisms); tables with text go through ``csv.writer``.
    """
    names = list(columns)
    cols = [np.asarray(columns[k]) for k in names]
    n = len(cols[0]) if cols else 0
    if any(len(c) != n for c in cols):
        raise ValueError("columns must have equal lengths")
    kinds = ["i" if c.dtype.kind in "iub" else "s" if c.dtype.kind in "USO" else
             "f" if c.dtype.kind == "f" else "x" for c in cols]
    with atomic_path(path, force=force) as tmp:
        with open(tmp, "w", newline="") as fh:
            w = csv.writer(fh)
            w.writerow(names)
            for start in range(0, n, 65536):
                block = [_cells(c[start:start + 65536], k) for c, k in zip(cols, kinds)]
                if "s" in kinds or "x" in kinds:
                    w.writerows(zip(*block))
                elif block:
                    fh.write("\r\n".join(map(",".join, zip(*block))) + "\r\n")
    return Path(path)


def _cells(c: np.ndarray, kind: str) -> list:
    """One column's cells as text (see :func:`write_csv`)."""
    if kind == "i":
        return [str(x) for x in c.astype(np.int64 if c.dtype.kind == "b" else c.dtype).tolist()]
    if kind == "s":
        return [str(x) for x in c.tolist()]
    if kind == "x":
        return [_fmt(x) for x in c.tolist()]
    vals = c.astype(np.float64).tolist()
    out = [format(v, ".9g") for v in vals]
    a = c.astype(np.float64)
    with np.errstate(invalid="ignore"):
        whole = np.isfinite(a) & (a == np.trunc(a)) & (np.abs(a) < 1e15)
    for i in np.flatnonzero(whole).tolist():
        out[i] = repr(vals[i])
    return out


def write_json(path, doc, force: bool = False) -> Path:
    with atomic_path(path, force=force) as tmp:
        Path(tmp).write_text(dumps(doc) + "\n")
    return Path(path)


def save_figure(fig, path, force: bool = False) -> Path:
    """Write a matplotlib Figure as PNG through :func:`atomic_path` (no pyplot state)."""
    with atomic_path(path, force=force) as tmp:
        fig.savefig(tmp, dpi=120, format="png")
    return Path(path)


def write_report(outdir, doc: dict, results: dict, *, force: bool = False,
                 plots: bool = True, grid=None, protect=()) -> list[Path]:
    """Write a report folder for measure ``results`` (name -> result object).

    ``doc`` is the JSON summary (written as ``summary.json``); ``grid`` the phase grid the
    grid measures used (for the section figure). The folder is assembled under a temporary
    name beside ``outdir`` and renamed into place when complete, so an interrupted run
    leaves no half-written report. ``protect``: files (the inputs) that must never be
    replaced or removed by the report; a report that would is refused before anything in
    ``outdir`` changes. Returns the paths written.
    """
    with atomic_folder(outdir, force, protect=protect) as (out, final):
        names = _write_all(out, doc, results, plots, grid)
    return [final / n for n in names]


@contextlib.contextmanager
def atomic_folder(outdir, force: bool = False, kind: str = "report", protect=()):
    """Yield ``(tmp, final)``: a temporary folder beside ``outdir`` to fill, and the final
    path. On success the folder is renamed into place (with ``force`` into an existing
    folder: see :func:`_move_into_place`; ``kind`` names the command in the manifest);
    on any exception it is removed and ``outdir`` is untouched. ``outdir`` is checked (:func:`check_folder`) first."""
    final = check_folder(outdir, force)
    parent = final.parent if str(final.parent) else Path(".")
    if not parent.exists():
        try:
            parent.mkdir(parents=True)
        except OSError as e:
            raise SheetviewError(f"cannot create the folder ({e.strerror})", path=final) from None
    clear_stale_parts(parent, final.name)
    try:
        tmp = Path(tempfile.mkdtemp(prefix=f".{final.name}.{os.getpid()}.", suffix=".part",
                                    dir=parent))
        os.chmod(tmp, user_mode(folder=True))  # mkdtemp makes 0700; give the usual mode
    except OSError as e:
        raise SheetviewError(f"cannot write beside the output folder ({e.strerror})",
                             path=final) from None
    try:
        yield tmp, final
        _move_into_place(tmp, final, kind, protect)
    except OSError as e:
        shutil.rmtree(tmp, ignore_errors=True)
        raise SheetviewError(f"cannot write the folder ({e.strerror or e})", path=final) from None
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise


def clear_stale_parts(parent: Path, name: str) -> None:
    """Remove the temporary ``.NAME.PID.*.part`` folders beside an output that a killed
    run of this host left behind (their process no longer runs); folders of running
    processes and of an unknown process are kept."""
    for p in parent.glob(f".{glob.escape(name)}.*.part"):
        pid = p.name[len(name) + 2:].split(".", 1)[0]
        if not pid.isdigit() or _pid_alive(int(pid)) or not p.is_dir() or p.is_symlink():
            continue
        shutil.rmtree(p, ignore_errors=True)


def _pid_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except (PermissionError, OverflowError):
        return True
    return True


#: Hidden file in an output folder: a first line ``# sheetview <kind>`` naming what wrote the
#: folder (``report``, ``micrograph``), then the names of the files that run wrote.
MANIFEST = ".sheetview-files"
#: Longest file name (bytes) taken from a manifest (NAME_MAX on common file systems).
_NAME_MAX = 255


def _plain_name(n: str) -> bool:
    """A file name of this folder itself: no path separator, not ``.``/``..``, not the
    manifest, not too long."""
    return (bool(n) and n not in (".", "..", MANIFEST) and n == os.path.basename(n)
            and os.sep not in n and (os.altsep is None or os.altsep not in n)
            and len(n.encode("utf-8", "replace")) <= _NAME_MAX)


def _listed(folder: Path, kind: str) -> set:
    """Names in the manifest of ``folder`` when the same kind of run wrote it; nothing for
    another kind, a folder written before manifests existed, or a manifest that cannot be
    read (corrupted lines are skipped)."""
    try:
        lines = (folder / MANIFEST).read_text(encoding="utf-8", errors="replace").splitlines()
    except (OSError, ValueError):
        return set()
    if not lines or lines[0].strip() != f"# sheetview {kind}":
        return set()
    return {n for n in lines[1:] if _plain_name(n)}


def _move_into_place(tmp: Path, final: Path, kind: str = "report", protect=()) -> None:
    """Rename the finished temporary folder to ``final``. With an existing folder (force)
    the files of the same name are replaced; the files an earlier run of the same kind
    wrote (listed in its :data:`MANIFEST`) that this run did not write are removed; any
    other file (the user's own, another command's output, the files of a folder written
    before manifests existed) is kept. Only plain files of the folder itself are removed,
    never a folder, a symbolic link or anything outside it."""
    names = sorted(p.name for p in tmp.iterdir())
    (tmp / MANIFEST).write_text(f"# sheetview {kind}\n" + "".join(n + "\n" for n in names))
    if not final.exists():
        os.replace(tmp, final)
        return
    stale = _listed(final, kind) - set(names)
    guarded = {os.path.realpath(p) for p in protect}
    hit = [n for n in sorted(set(names) | stale)
           if os.path.realpath(final / n) in guarded]
    if hit:
        raise SheetviewError(f"the report would replace its own input {final / hit[0]}; write "
                             f"the report to another folder", path=final)
    for p in tmp.iterdir():
        os.replace(p, final / p.name)
    tmp.rmdir()
    for n in sorted(stale):
        p = final / n
        try:
            if p.is_file() and not p.is_symlink():
                p.unlink()
        except OSError:
            continue  # best effort: the new report is complete already


def _write_all(out: Path, doc, results, plots, grid) -> list[str]:
    written = [write_json(out / "summary.json", doc)]
    for name, table in collect_tables(results).items():
        written.append(write_csv(out / f"{name}.csv", with_units(name, table)))
    if plots:
        written.extend(_write_figures(out, results, grid))
    return [Path(p).name for p in written]


def collect_tables(results: dict) -> dict:
    """The CSV tables of the results (each result's ``tables()``: file stem -> columns), in
    the order the measures ran; tables of the same name (``prisms`` from stacking and
    order) are joined column by column, the first ``prism`` column kept."""
    out: dict = {}
    for res in results.values():
        for name, cols in res.tables().items():
            if name in out:
                out[name].update({k: v for k, v in cols.items() if k not in out[name]})
            else:
                out[name] = dict(cols)
    return out


def _drawable(name, res) -> bool:
    """Whether a result has anything to draw (an empty structure has no histograms)."""
    if name in ("stacking", "order"):
        return bool(res.n_prisms)
    if name == "pores":
        return res.parts.get("local_thickness") is not None
    return True


def _write_figures(out: Path, results: dict, grid) -> list[Path]:
    written = []
    for name, res in results.items():
        if not _drawable(name, res):
            continue
        for stem, draw in FIGURES.get(name, []):
            written.append(save_figure(draw(res), out / f"{stem}.png"))
    if grid is not None:
        written.append(save_figure(plot_sections(grid), out / "sections.png"))
    return written


def write_comparison(outdir, cmp, *, force: bool = False, plots: bool = True,
                     protect=()) -> list[Path]:
    """Write a comparison folder (:class:`sheetview.app.sidebyside.SideBySide`):
    ``comparison.json``, ``headline.csv``, ``curve_NAME.csv`` (structure, x, y) per curve
    drawn, ``side_by_side.png``. Assembled beside ``outdir``, renamed into place when
    complete; ``protect``: inputs never replaced or removed (an input report folder may not
    be the output folder)."""
    final = Path(outdir).resolve()
    for p in protect:
        if p and Path(p).exists() and Path(p).resolve() == final:
            raise SheetviewError("the output folder is one of the inputs; choose another "
                                 "folder for -o", path=outdir)
    doc = cmp.to_dict()
    doc["curves"] = {name: {"title": t, "x": xl, "y": yl, "file": f"curve_{name}.csv"}
                     for name, (t, xl, yl, _, _) in CURVES.items() if cmp.curves.get(name)}
    names = []
    with atomic_folder(outdir, force, kind="comparison", protect=protect) as (out, final):
        write_json(out / "comparison.json", doc)
        names.append("comparison.json")
        write_csv(out / "headline.csv", cmp.table_columns())
        names.append("headline.csv")
        for name in CURVES:
            if cmp.curves.get(name):
                write_csv(out / f"curve_{name}.csv", cmp.curve_columns(name))
                names.append(f"curve_{name}.csv")
        if plots:
            save_figure(plot_side_by_side(cmp), out / "side_by_side.png")
            names.append("side_by_side.png")
    return [final / n for n in names]
