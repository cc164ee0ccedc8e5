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
    report.html                  the page of the folder (:func:`structure_page`): the headline
                                 numbers with labels, units and basis, figures, settings

The folder is assembled under a temporary name and renamed into place when complete.
"""
from __future__ import annotations

import base64
import contextlib
import csv
import dataclasses
import glob
import html
import json
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
                 plots: bool = True, grid=None, protect=(), page: bool = True) -> list[Path]:
    """Write a report folder for measure ``results`` (name -> result object), with
    ``report.html`` (:func:`structure_page`) unless ``page`` is False.

    ``doc`` is the JSON summary (written as ``summary.json``); ``grid`` the phase grid the
    grid measures used (for the section figure). The folder is assembled under a temporary
    name beside ``outdir`` and renamed into place when complete, so an interrupted run
    leaves no half-written report. ``protect``: files (the inputs) that must never be
    replaced or removed by the report; a report that would is refused before anything in
    ``outdir`` changes. Returns the paths written.
    """
    with atomic_folder(outdir, force, protect=protect) as (out, final):
        names = _write_all(out, doc, results, plots, grid)
        if page:
            with atomic_path(out / "report.html") as tmp:
                Path(tmp).write_text(structure_page(out))
            names.append("report.html")
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


# ==================================================================== HTML pages
# A page of one result folder reads like a report: the headline numbers with human labels,
# units and the basis of each, grouped as a practitioner reads them (structure, stacks and
# order, pores, surfaces, experiment), each group's figures beside its table, the files of
# the folder linked, the settings and provenance at the end. Self-contained (figures inlined
# as base64 PNG), one plain stylesheet of our own with a print variant.

#: The page's groups: (anchor, title, rows, figure stems, table stems). A row is (summary
#: key, label, unit, basis key or a text in words). Rows whose key the summary lacks are
#: left out; so are groups with nothing to show.
PAGE_GROUPS = (
    ("structure", "Structure", (
        ("n_prisms", "Prisms", "", "sheets (triangular prisms) in the input"),
        ("voxel_size_nm", "Voxel edge of the phase grid", "nm",
         "edge of the cubic voxels the grid measures use"),
        ("volume_fractions.solid", "Solid", "volume fraction", "volume_fractions"),
        ("volume_fractions.interlayer", "Interlayer", "volume fraction", "volume_fractions"),
        ("volume_fractions.gel", "Gel pore", "volume fraction", "volume_fractions"),
        ("volume_fractions.interhydrate", "Interhydrate pore", "volume fraction",
         "volume_fractions"),
        ("volume_fractions.capillary", "Capillary pore", "volume fraction", "volume_fractions"),
        ("volume_fractions.coarse", "Coarse pore", "volume fraction", "volume_fractions"),
        ("phases.void_fraction", "Porosity (interlayer and gel)", "volume fraction",
         "the phases that are not solid, over the domain"),
        ("phases.interlayer_share_of_csh_volume", "Interlayer share of the C-S-H", "",
         "interlayer over solid + interlayer volume"),
    ), ("sections",), ("phase_fractions",)),
    ("stacks", "Stacks and order", (
        ("stacking.mean", "Mean stacking number, by prisms", "layers", "stacking.mean"),
        ("stacking.mean_volume", "Mean stacking number, by volume", "layers", "stacking.mean"),
        ("stacking.mean_stack", "Mean stacking number, by stack", "layers", "stacking.mean"),
        ("stacking.n_stacks", "Stacks", "", "connected columns of stacked prisms"),
        ("stacking.max", "Largest stack", "layers", "the highest stacking number"),
        ("order.S", "Order parameter S", "", "order.S"),
        ("order.biaxiality", "Biaxiality", "",
         "difference of the two smaller eigenvalues of the order tensor (0 uniaxial)"),
        ("order.wall", "Order towards the wall", "",
         "volume-weighted P2 of the angle between the sheet normal and the inward wall "
         "normal: +1 flat on the wall, -1/2 on edge, 0 isotropic"),
    ), ("stacking_histogram", "pole_figure", "order"),
        ("stacks", "prisms", "tilted_contacts", "orientation_distribution", "pole_figure")),
    ("pores", "Pores", (
        ("pore_size.d10_nm", "Pore diameter d10", "nm", "pore_size"),
        ("pore_size.d50_nm", "Pore diameter d50 (median)", "nm", "pore_size"),
        ("pore_size.d90_nm", "Pore diameter d90", "nm", "pore_size"),
        ("pore_size.intrusion_d50_nm", "Intrusion d50", "nm",
         "median of the simulated intrusion (largest ball reaching the point from the "
         "domain wall)"),
        ("chords.solid_mean_nm", "Mean solid chord", "nm", "chords"),
        ("chords.pore_mean_nm", "Mean pore chord", "nm", "chords"),
    ), ("pore_sizes", "chords"),
        ("pore_sizes_local_thickness", "pore_sizes_intrusion", "chords_solid", "chords_pore")),
    ("surfaces", "Surfaces", (
        ("specific_surface_nm-1", "Specific surface, per volume", "nm⁻¹",
         "specific_surface_nm-1"),
        ("specific_surface_m2_per_g", "Specific surface, per mass", "m²/g",
         "specific_surface_m2_per_g"),
        ("correlation.r_max_nm", "S₂ computed to", "nm",
         "largest distance of the two-point probability of the solid"),
    ), ("s2_solid",), ("interfaces", "minkowski", "s2_solid")),
    ("experiment", "Experiment: predicted signals", (
        ("relaxation.t2_logmean_ms", "T2, logarithmic mean", "ms",
         "fast-exchange prediction of the water's T2 distribution; a model, not a "
         "measurement"),
        ("water_walk.t2_logmean_ms", "T2 of the random walk, logarithmic mean", "ms",
         "water_walk"),
        ("water_walk.shift_decades", "Walk against fast exchange", "decades", "water_walk"),
        ("transport.d_eff_over_d0.x", "Deff / D0 along x", "", "transport"),
        ("transport.d_eff_over_d0.y", "Deff / D0 along y", "", "transport"),
        ("transport.d_eff_over_d0.z", "Deff / D0 along z", "", "transport"),
        ("scattering.two_phase_contrast_1e-6_A-2", "Scattering contrast, two phases",
         "10⁻⁶ Å⁻²", "difference of the scattering length densities of solid and fluid"),
    ), ("scattering", "t2_distribution", "walk_decay", "walk_t2_spectrum", "walk_exchange",
        "transport_msd"), ("scattering", "t2_distribution")),
)

#: Columns of the index page: (summary key, short label with unit).
INDEX_COLUMNS = (
    ("n_prisms", "prisms"), ("volume_fractions.solid", "solid fraction"),
    ("volume_fractions.gel", "gel-pore fraction"), ("specific_surface_m2_per_g", "surface (m²/g)"),
    ("pore_size.d50_nm", "pore d50 (nm)"), ("chords.pore_mean_nm", "pore chord (nm)"),
    ("stacking.mean", "stacking"), ("order.S", "order S"),
)


def fmt_number(v, unit: str = "") -> str:
    """A number as a reader wants it: integers whole with thin-space thousands, fractions
    and other floats to 3 significant figures (4 from 1000 on, no exponent between 1e-3 and
    1e6), an undefined value as an en dash."""
    if v is None or isinstance(v, bool):
        return "–" if v is None else ("yes" if v else "no")
    if isinstance(v, (int, np.integer)):
        return f"{int(v):,}".replace(",", "\u2009")
    if isinstance(v, str):
        return v
    try:
        x = float(v)
    except (TypeError, ValueError):
        return str(v)
    if not math.isfinite(x):
        return "–"
    if x == 0:
        return "0"
    a = abs(x)
    if 1e-3 <= a < 1e6:
        digits = 3 if a < 1000 else 4
        d = max(0, digits - 1 - int(math.floor(math.log10(a))))
        s = f"{x:.{d}f}"
        if a >= 1000:
            s = f"{x:,.0f}".replace(",", "\u2009")
        return s
    m, e = f"{x:.2e}".split("e")
    return f"{m} × 10{_sup(int(e))}"


def _sup(n: int) -> str:
    return str(n).translate(str.maketrans("-0123456789", "⁻⁰¹²³⁴⁵⁶⁷⁸⁹"))


def _page_css() -> str:
    from .style import BACKGROUND, OUTLINE_COLOUR, PAGE_COLOURS, TEXT_COLOUR
    c = PAGE_COLOURS
    return (
        f":root{{--text:{TEXT_COLOUR};--line:{OUTLINE_COLOUR};--accent:{c['accent']};"
        f"--link:{c['link']};--err:{c['error']};--rule:{c['rule']};--muted:{c['muted']};"
        f"--frame:{c['frame']};--bg:{BACKGROUND}}}"
        "*{box-sizing:border-box}"
        "body{font-family:system-ui,-apple-system,'Segoe UI',sans-serif;color:var(--text);"
        "background:var(--bg);margin:0 auto;padding:1.2em 1.5em;max-width:1180px;"
        "line-height:1.45;font-size:15px}"
        "h1{font-size:1.45em;margin:.2em 0 .3em;overflow-wrap:anywhere}"
        "h2{font-size:1.2em;border-bottom:2px solid var(--accent);padding-bottom:.15em;"
        "margin-top:1.8em}"
        "h3{font-size:1em;margin:.8em 0 .3em}"
        "a{color:var(--link)}nav{font-size:.92em;margin:.4em 0 1em}nav a{margin-right:1em}"
        ".lead{margin:.2em 0 .8em}.muted{color:var(--muted);font-size:.88em}"
        ".pair{display:grid;grid-template-columns:minmax(0,1fr) minmax(0,1.15fr);gap:1.4em;"
        "align-items:start}"
        "@media (max-width:900px){.pair{grid-template-columns:minmax(0,1fr)}}"
        "table{border-collapse:collapse;width:100%;font-size:.92em;margin:.3em 0 .8em}"
        "th,td{border-bottom:1px solid var(--rule);padding:.3em .5em;text-align:left;"
        "vertical-align:top;overflow-wrap:anywhere}"
        "thead th{border-bottom:2px solid var(--line);font-weight:600;overflow-wrap:normal}"
        "td.num{text-align:right;white-space:nowrap;font-variant-numeric:tabular-nums}"
        "td.basis{color:var(--muted);font-size:.9em}"
        "figure{margin:0 0 1em}figure img{max-width:100%;height:auto;display:block;"
        "border:1px solid var(--frame)}figcaption{font-size:.85em;color:var(--muted);margin-top:.2em}"
        ".files{font-size:.9em}.files a{margin-right:.8em;white-space:nowrap}"
        ".err{color:var(--err)}code{font-size:.9em;overflow-wrap:anywhere}"
        "th.key{white-space:nowrap}th.key code{overflow-wrap:normal}"
        "table.prov th{width:11em}.wide figure{max-width:100%}"
        "@media print{body{max-width:none;padding:0;font-size:10pt}nav{display:none}"
        "a{color:inherit;text-decoration:none}.pair{grid-template-columns:minmax(0,1fr) "
        "minmax(0,1fr)}figure,table,tr{break-inside:avoid}h2{break-after:avoid}"
        "section{break-before:auto}}"
    )


def _head(title: str) -> str:
    e = html.escape
    return ("<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>"
            "<meta name='viewport' content='width=device-width, initial-scale=1'>"
            f"<title>{e(title)}</title><style>{_page_css()}</style></head><body>")


def _lookup_basis(basis: dict, how: str | None) -> str:
    if not how:
        return ""
    return str(basis.get(how, how if " " in how else ""))


def structure_page(folder, *, index_href: str | None = None) -> str:
    """Self-contained HTML of one result folder (``summary.json``, its CSV tables and PNG
    figures): the headline numbers by group with labels, units and basis, each group's
    figures beside its table and its CSV files linked, then the settings and provenance.
    ``index_href``: the link back to an index page, if any."""
    from .app.document import flatten
    from .app.settings import Settings

    folder = Path(folder)
    doc = json.loads((folder / "summary.json").read_text())
    flat = flatten({k: v for k, v in doc.items() if k not in ("timings_s", "basis")})
    basis = doc.get("basis") or {}
    e = html.escape
    name = Path(str(doc.get("file") or folder.name)).name
    pngs = {p.stem: p for p in sorted(folder.glob("*.png"))}
    csvs = {p.stem: p for p in sorted(folder.glob("*.csv"))}
    used_png, used_csv = set(), set()
    groups = []
    for anchor, title, rows, figs, tables in PAGE_GROUPS:
        items = []
        for key, label, unit, how in rows:
            if key not in flat:
                continue
            unit_text = "" if unit in ("", "volume fraction") else f" {unit}"
            lab = label + (" (volume fraction)" if unit == "volume fraction" else "")
            shown = fmt_number(flat[key])
            items.append((key, lab, shown + (unit_text if shown != "–" else ""),
                          _lookup_basis(basis, how)))
        if anchor == "structure":
            known = {r[0] for r in rows}
            items += [(k, f"{k.split('.', 1)[1]} (volume fraction)", fmt_number(flat[k]),
                       _lookup_basis(basis, "volume_fractions"))
                      for k in flat if k.startswith("volume_fractions.") and k not in known]
        body = _rows_with_shared_basis(items)
        fig_html, wide_html = [], []
        for stem in figs:
            p = pngs.get(stem)
            if p is None:
                continue
            used_png.add(stem)
            (wide_html if _is_wide(p) else fig_html).append(_figure(p))
        links = []
        for stem in tables:
            p = csvs.get(stem)
            if p is not None and stem not in used_csv:
                used_csv.add(stem)
                links.append(f"<a href='{e(p.name)}'>{e(p.name)}</a>")
        if not body and not fig_html and not wide_html:
            continue
        table = ("<table><thead><tr><th>quantity</th><th>value</th><th>basis</th></tr></thead>"
                 f"<tbody>{''.join(body)}</tbody></table>" if body else "")
        files = f"<p class='files'>Tables: {' '.join(links)}</p>" if links else ""
        pair = (f"<div class='pair'><div>{table}{files}</div><div>{''.join(fig_html)}</div>"
                "</div>" if fig_html else f"<div>{table}{files}</div>")
        groups.append((anchor, title,
                       f"<section id='{anchor}'><h2>{e(title)}</h2>{pair}"
                       f"<div class='wide'>{''.join(wide_html)}</div></section>"))
    rest = [p for s, p in pngs.items() if s not in used_png]
    if rest:
        groups.append(("more", "More figures", f"<section id='more'><h2>More figures</h2>"
                       f"<div class='wide'>{''.join(_figure(p) for p in rest)}</div>"
                       "</section>"))
    # files, settings, provenance
    file_links = [f"<a href='summary.json'>summary.json</a>"] if (folder / "summary.json").is_file() else []
    file_links += [f"<a href='{e(p.name)}'>{e(p.name)}</a>" for p in csvs.values()]
    settings = doc.get("settings") or {}
    meta = {f.name: f.metadata for f in dataclasses.fields(Settings)}
    srows = []
    for k, v in settings.items():
        m = meta.get(k, {})
        unit = m.get("unit") or ""
        if v is None:
            shown = "default"
        elif isinstance(v, (list, tuple)):
            shown = ", ".join(_setting(x) for x in v) + (f" {unit}" if unit and v else "")
            shown = shown or "none"
        else:
            shown = _setting(v) + (f" {unit}" if unit and not isinstance(v, str) else "")
        srows.append(f"<tr><th class='key'><code>{e(k)}</code></th><td class='num'>"
                     f"{e(shown)}</td><td class='basis'>{e(m.get('help') or '')}</td></tr>")
    dom = doc.get("domain") or {}
    prov = [("input file", doc.get("file")), ("input SHA-256", doc.get("input_sha256")),
            ("input kind", doc.get("input_kind")),
            ("domain", _domain_text(dom) + (" (inferred from the input)"
                                            if doc.get("domain_inferred") else "")),
            ("interlayer repeat", None if doc.get("spacing") is None
             else f"{fmt_number(doc['spacing'])} nm"),
            ("phase grid", None if not doc.get("grid_shape") else
             " × ".join(str(n) for n in doc["grid_shape"]) + " voxels"),
            ("measures run", ", ".join(doc.get("measures") or [])),
            ("sheetview version", doc.get("sheetview_version")),
            ("run time", None if not doc.get("timings_s") else
             f"{fmt_number(sum(v for v in doc['timings_s'].values() if isinstance(v, (int, float))))} s")]
    if doc.get("at"):
        prov.append(("moment", ", ".join(f"{k} {fmt_number(v)}" for k, v in doc["at"].items()
                                         if not isinstance(v, (dict, list)))))
    prows = "".join(f"<tr><th>{e(k)}</th><td><code>{e(str(v))}</code></td></tr>"
                    for k, v in prov if v not in (None, ""))
    meta_rows = "".join(f"<tr><th><code>{e(k[15:])}</code></th><td>{e(fmt_number(v))}</td></tr>"
                        for k, v in flat.items() if k.startswith("input_metadata."))
    nav = [f"<a href='{e(index_href)}'>← all results</a>"] if index_href else []
    nav += [f"<a href='#{a}'>{e(t)}</a>" for a, t, _ in groups]
    nav += ["<a href='#files'>Files</a>", "<a href='#settings'>Settings and provenance</a>"]
    lead = _lead(flat)
    parts = [_head(f"{name}: sheetview report"), f"<nav>{''.join(nav)}</nav>",
             f"<h1>{e(name)}</h1>",
             f"<p class='lead'>{e(lead)}</p>" if lead else "",
             f"<p class='muted'>{e(str(doc.get('note', '')))}</p>"]
    parts += [g[2] for g in groups]
    parts.append(f"<section id='files'><h2>Files</h2><p class='files'>{' '.join(file_links)}"
                 "</p></section>")
    parts.append("<section id='settings'><h2>Settings and provenance</h2>"
                 "<h3>Settings</h3><table><thead><tr><th>setting</th><th>value</th>"
                 f"<th>meaning</th></tr></thead><tbody>{''.join(srows)}</tbody></table>"
                 f"<h3>Provenance</h3><table class='prov'><tbody>{prows}</tbody></table>"
                 + (f"<h3>File header</h3><table><tbody>{meta_rows}</tbody></table>"
                    if meta_rows else "") + "</section>")
    parts.append("</body></html>\n")
    return "".join(parts)


def _setting(v) -> str:
    """A setting as the user gives it (no rounding)."""
    if isinstance(v, bool):
        return "yes" if v else "no"
    if isinstance(v, float):
        return f"{v:g}"
    return str(v)


#: Width over height above which a figure spans the page instead of standing beside the
#: table (three-panel figures).
WIDE_ASPECT = 1.6


def _is_wide(png: Path) -> bool:
    try:
        from PIL import Image
        with Image.open(png) as im:
            w, h = im.size
        return w > WIDE_ASPECT * h
    except Exception:  # noqa: BLE001 - an unreadable PNG is still shown
        return False


def _figure(p: Path) -> str:
    e = html.escape
    b64 = base64.b64encode(p.read_bytes()).decode("ascii")
    cap = p.stem.replace("_", " ")
    return (f"<figure><img alt='{e(cap)}' src='data:image/png;base64,{b64}'><figcaption>"
            f"{e(cap)} (<a href='{e(p.name)}'>{e(p.name)}</a>)</figcaption></figure>")


def _rows_with_shared_basis(items) -> list:
    """Table rows (key, label, value, basis); consecutive rows with the same basis share
    one cell (rowspan)."""
    e = html.escape
    out = []
    i = 0
    while i < len(items):
        j = i + 1
        while j < len(items) and items[j][3] == items[i][3]:
            j += 1
        for k in range(i, j):
            key, lab, val, how = items[k]
            cell = (f"<td class='basis' rowspan='{j - i}'>{e(how)}</td>" if k == i else "")
            out.append(f"<tr><th title='summary key: {e(key)}'>{e(lab)}</th>"
                       f"<td class='num'>{e(val)}</td>{cell}</tr>")
        i = j
    return out


def _domain_text(dom: dict) -> str:
    if not dom:
        return ""
    shape = dom.get("shape", "")
    if "min" in dom and "max" in dom:
        size = " × ".join(fmt_number(b - a) for a, b in zip(dom["min"], dom["max"]))
        return f"{shape} {size} nm" + (" (periodic)" if dom.get("periodic") else "")
    if "radius" in dom:
        return f"{shape} of radius {fmt_number(dom['radius'])} nm"
    return str(shape)


def _lead(flat: dict) -> str:
    """One sentence of the numbers a reader looks at first."""
    bits = []
    if flat.get("n_prisms") is not None:
        bits.append(f"{fmt_number(flat['n_prisms'])} prisms")
    if flat.get("volume_fractions.solid") is not None:
        bits.append(f"solid volume fraction {fmt_number(flat['volume_fractions.solid'])}")
    if flat.get("stacking.mean") is not None:
        bits.append(f"mean stacking number {fmt_number(flat['stacking.mean'])}")
    if flat.get("order.S") is not None:
        bits.append(f"order S {fmt_number(flat['order.S'])}")
    if flat.get("pore_size.d50_nm") is not None:
        bits.append(f"median pore diameter {fmt_number(flat['pore_size.d50_nm'])} nm")
    return "; ".join(bits) + "." if bits else ""


def index_page(out, records, *, extra_links=()) -> str:
    """HTML of a batch's ``index.html``: one row per input (linked to its page when it
    finished, its error when it failed) with the headline numbers of
    :data:`INDEX_COLUMNS`; ``extra_links``: (file name, label) of the batch's own files,
    linked when they exist."""
    from .app.document import flatten

    out = Path(out)
    e = html.escape
    rows = []
    n_ok = 0
    for rec in records:
        folder = out / "runs" / rec["name"]
        page = folder / "report.html"
        if rec["status"] != "failed" and (folder / "summary.json").is_file():
            n_ok += 1
            flat = flatten(json.loads((folder / "summary.json").read_text()))
            cells = "".join(f"<td class='num'>{e(fmt_number(flat.get(k)))}</td>"
                            for k, _ in INDEX_COLUMNS)
            first = (f"<a href='runs/{e(rec['name'])}/report.html'>{e(str(rec['path']))}</a>"
                     if page.is_file() else e(str(rec["path"])))
            links = (f" <span class='muted'>(<a href='runs/{e(rec['name'])}/summary.json'>"
                     "JSON</a>)</span>")
            rows.append(f"<tr><td>{first}{links}</td><td>ok</td>{cells}</tr>")
        else:
            err = (rec.get("error") or "").splitlines()
            rows.append(f"<tr><td>{e(str(rec['path']))}</td><td class='err' colspan='"
                        f"{len(INDEX_COLUMNS) + 1}'>failed: {e(err[0] if err else '')}</td></tr>")
    head = "".join(f"<th>{e(lab)}</th>" for _, lab in INDEX_COLUMNS)
    present = [(f, lab) for f, lab in extra_links if (out / f).is_file()]
    files = " ".join(f"<a href='{e(f)}'>{e(lab)}</a>" for f, lab in present)
    return (_head("sheetview batch") + f"<h1>sheetview batch: {len(records)} input(s), "
            f"{n_ok} measured</h1>"
            + (f"<p class='files'>Files: {files}</p>" if files else "")
            + "<p class='muted'>Volume fractions of the domain; pore d50: median local "
              "thickness of the non-interlayer pore space; stacking: mean stacking number by "
              "prisms; order S: nematic order parameter of the sheet normals. Each page gives "
              "the basis of every number.</p>"
            + f"<table><thead><tr><th>input</th><th>status</th>{head}</tr></thead><tbody>"
            + "".join(rows) + "</tbody></table></body></html>\n")


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
