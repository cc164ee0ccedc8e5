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
    interfaces.csv               interface areas (solid-interlayer, solid-gel, solid-outside)
    minkowski.csv                Minkowski functionals of the solid and of the gel pores
    pore_sizes_local_thickness.csv, pore_sizes_intrusion.csv, pore_sizes.png
    chords_solid.csv, chords_pore.csv, chords.png
    s2_solid.csv, s2_solid.png   two-point correlation of the solid
    sections.png                 three orthogonal central sections of the phase grid

The folder is assembled under a temporary name and renamed into place when complete.
"""
from __future__ import annotations

import contextlib
import csv
import math
import os
import shutil
import tempfile
from pathlib import Path

import numpy as np

from .errors import OutputExistsError, SheetviewError
from .io.output import atomic_path


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
    from .cli.common import dumps
    with atomic_path(path, force=force) as tmp:
        Path(tmp).write_text(dumps(doc) + "\n")
    return Path(path)


def _savefig(fig, path, force):
    import matplotlib.pyplot as plt
    with atomic_path(path, force=force) as tmp:
        fig.savefig(tmp, dpi=120, format="png")
    plt.close(fig)


def _pyplot():
    import matplotlib
    matplotlib.use("Agg", force=True)
    import matplotlib.pyplot as plt
    return plt


def plot_stacking(res, path, force=False):
    plt = _pyplot()
    fig, axes = plt.subplots(1, 3, figsize=(12, 3.6))
    for ax, (h, title, ylabel) in zip(axes, (
            (res.histogram, "by prisms", "prisms"),
            (res.histogram_volume, "by volume", "volume fraction"),
            (res.histogram_stacks, "by stack (largest column)", "stacks"))):
        k = [int(x) for x in h]
        ax.bar(k, list(h.values()), color="#4477aa", width=0.8)
        ax.set_xlabel("stacking number (layers)")
        ax.set_ylabel(ylabel)
        ax.set_title(title)
        if k:
            ax.set_xticks(range(1, max(k) + 1, max(1, max(k) // 10)))
    fig.suptitle(f"Stacking: mean {res.mean:.2f} (number), {res.mean_volume:.2f} (volume)")
    fig.tight_layout()
    _savefig(fig, path, force)
    return Path(path)


def plot_pole_figure(res, path, force=False):
    plt = _pyplot()
    fig, ax = plt.subplots(figsize=(5.2, 4.6))
    e = res.pole_edges
    im = ax.pcolormesh(e, e, res.pole.T, cmap="viridis", shading="flat")
    t = np.linspace(0, 2 * np.pi, 361)
    ax.plot(math.sqrt(2) * np.cos(t), math.sqrt(2) * np.sin(t), "k-", lw=0.8)
    ax.set_aspect("equal")
    ax.set_axis_off()
    fig.colorbar(im, ax=ax, label="density (multiples of uniform)")
    ref = "director" if res.frame == "director" else "z axis"
    ax.set_title(f"Sheet normals, Lambert equal-area about the {ref}\nS = {res.S:.3f}")
    fig.tight_layout()
    _savefig(fig, path, force)
    return Path(path)


def plot_order(res, path, force=False):
    plt = _pyplot()
    fig, axes = plt.subplots(1, 2, figsize=(9, 3.6))
    ls = res.local_S
    axes[0].hist(ls, bins=np.linspace(-0.5, 1.0, 31), color="#4477aa")
    axes[0].set_xlabel(f"local S (radius {res.local_radius:g} nm)")
    axes[0].set_ylabel("prisms")
    ce = res.cos_edges
    dens = res.hist.sum(axis=1) * (len(ce) - 1)
    axes[1].stairs(dens, ce, color="#aa3377")
    axes[1].axhline(1.0, color="grey", lw=0.8, ls="--")
    axes[1].set_xlabel("|cos theta| to the " + ("director" if res.frame == "director" else "z axis"))
    axes[1].set_ylabel("density (multiples of uniform)")
    fig.suptitle(f"Orientation order: S = {res.S:.3f}, biaxiality {res.biaxiality:.3f}")
    fig.tight_layout()
    _savefig(fig, path, force)
    return Path(path)


def write_report(outdir, doc: dict, results: dict, *, force: bool = False,
                 plots: bool = True, grid=None) -> list[Path]:
    """Write a report folder for measure ``results`` (name -> result object).

    ``doc`` is the JSON summary (written as ``summary.json``); ``grid`` the phase grid the
    grid measures used (for the section figure). The folder is assembled under a temporary
    name beside ``outdir`` and renamed into place when complete, so an interrupted run
    leaves no half-written report. Returns the paths written.
    """
    with atomic_folder(outdir, force) as (out, final):
        names = _write_all(out, doc, results, plots, grid)
    return [final / n for n in names]


@contextlib.contextmanager
def atomic_folder(outdir, force: bool = False, kind: str = "report"):
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
    try:
        tmp = Path(tempfile.mkdtemp(prefix=f".{final.name}.", suffix=".part", dir=parent))
    except OSError as e:
        raise SheetviewError(f"cannot write beside the output folder ({e.strerror})",
                             path=final) from None
    try:
        yield tmp, final
        _move_into_place(tmp, final, kind)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise


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


def _move_into_place(tmp: Path, final: Path, kind: str = "report") -> None:
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
    prism_cols = {}
    stk = results.get("stacking")
    order = results.get("order")
    if stk is not None:
        prism_cols.update(stk.table())
    if order is not None:
        n = order.n_prisms
        prism_cols.setdefault("prism", np.arange(n))
        prism_cols.update(order.table())
    if prism_cols:
        written.append(write_csv(out / "prisms.csv", prism_cols))
    if stk is not None:
        written.append(write_csv(out / "stacks.csv", stk.stack_table()))
        g = stk.graph
        t = g.tilted
        written.append(write_csv(out / "tilted_contacts.csv", {
            "prism_a": t[:, 0], "prism_b": t[:, 1], "angle_deg": g.tilted_angle,
            "layer_a": stk.layer[t[:, 0]] if len(t) else np.zeros(0, np.int64),
            "layer_b": stk.layer[t[:, 1]] if len(t) else np.zeros(0, np.int64)}))
        if plots and stk.n_prisms:
            written.append(plot_stacking(stk, out / "stacking_histogram.png"))
    if order is not None:
        ce, pe = order.cos_edges, order.phi_edges
        nc, nphi = order.hist.shape
        ci, pi = np.meshgrid(np.arange(nc), np.arange(nphi), indexing="ij")
        written.append(write_csv(out / "orientation_distribution.csv", {
            "cos_theta_lo": ce[ci.ravel()], "cos_theta_hi": ce[ci.ravel() + 1],
            "phi_lo": pe[pi.ravel()], "phi_hi": pe[pi.ravel() + 1],
            "fraction": order.hist.ravel(), "density_mud": order.hist.ravel() * nc * nphi}))
        e = order.pole_edges
        xi, yi = np.meshgrid(np.arange(len(e) - 1), np.arange(len(e) - 1), indexing="ij")
        written.append(write_csv(out / "pole_figure.csv", {
            "x": 0.5 * (e[xi.ravel()] + e[xi.ravel() + 1]),
            "y": 0.5 * (e[yi.ravel()] + e[yi.ravel() + 1]),
            "density_mud": order.pole.ravel()}))
        if plots and order.n_prisms:
            written.append(plot_pole_figure(order, out / "pole_figure.png"))
            written.append(plot_order(order, out / "order.png"))
    ph = results.get("phases")
    if ph is not None:
        written.append(write_csv(out / "phase_fractions.csv", ph.table()))
    sur = results.get("surface")
    if sur is not None:
        itf = sur.parts["interfaces"]
        written.append(write_csv(out / "interfaces.csv", {
            "interface": list(itf.areas), "area_nm2": list(itf.areas.values())}))
        mk = {k: v.to_dict() for k, v in sur.parts.items() if k.startswith("minkowski")}
        keys = sorted({kk for d in mk.values() for kk, vv in d.items()
                       if isinstance(vv, (int, float)) and not isinstance(vv, bool)})
        written.append(write_csv(out / "minkowski.csv", dict(
            {"phase": [k.replace("minkowski_", "") for k in mk]},
            **{k: [float(d.get(k, np.nan)) for d in mk.values()] for k in keys})))
    pores = results.get("pores")
    if pores is not None:
        for key in ("local_thickness", "intrusion"):
            r = pores.parts.get(key)
            if r is not None:
                written.append(write_csv(out / f"pore_sizes_{key}.csv", r.table()))
        if plots and pores.parts.get("local_thickness") is not None:
            written.append(plot_pore_sizes(pores, out / "pore_sizes.png"))
    ch = results.get("chords")
    if ch is not None:
        res = ch.parts["exact"] if ch.parts["exact"] is not None else ch.parts["voxel_lines"]
        for ph_name in ("solid", "pore"):
            if ph_name in res.lengths:
                written.append(write_csv(out / f"chords_{ph_name}.csv", {
                    "length_nm": res.lengths[ph_name], "cut": res.cut[ph_name].astype(np.int8),
                    "line": res.line[ph_name], "axis": res.axis[ph_name]}))
        if plots:
            written.append(plot_chords(ch, out / "chords.png"))
    cor = results.get("correlation")
    if cor is not None:
        written.append(write_csv(out / "s2_solid.csv", cor.parts["s2_solid"].table()))
        if plots:
            written.append(plot_s2(cor, out / "s2_solid.png"))
    sc = results.get("scattering")
    if sc is not None:
        written.append(write_csv(out / "scattering.csv", sc.table()))
        if plots:
            written.append(plot_scattering(sc.curve, out / "scattering.png", notes=[
                f"predicted curve, {sc.probe}s: {sc.solid} in {sc.fluid}; a model's prediction, "
                "not a measurement"]))
    rx = results.get("relaxation")
    if rx is not None:
        written.append(write_csv(out / "t2_distribution.csv", rx.table()))
        if plots:
            written.append(plot_relaxation(rx, out / "t2_distribution.png", notes=[
                "predicted T2 distribution (fast exchange); a model's prediction, not a "
                "measurement"]))
    if plots and grid is not None:
        written.append(plot_sections(grid, out / "sections.png"))
    return [Path(p).name for p in written]


def _wrap(notes, width=115):
    import textwrap
    return "\n".join(textwrap.fill(n, width) for n in notes)


def plot_scattering(res, path, cmp_=None, notes=(), force=False):
    """Log-log plot of a predicted curve (valid q range marked), with an experimental
    curve and its fit when ``cmp_`` is given."""
    plt = _pyplot()
    fig, ax = plt.subplots(figsize=(7, 5.2))
    m = res.valid()
    ax.loglog(res.q[m], res.intensity[m], "-", color="C0", label="model (valid q range)")
    if (~m).any():
        pos = ~m & (res.intensity > 0)
        ax.loglog(res.q[pos], res.intensity[pos], ".", color="C0", alpha=0.3,
                  label="model outside valid range")
    if cmp_ is not None:
        ax.loglog(cmp_.q, cmp_.experiment, "o", ms=3, color="C3", label="experiment")
        ax.loglog(cmp_.q, cmp_.model_fitted, "-", color="k", lw=1,
                  label=f"scale {cmp_.scale:.3g} x model + {cmp_.background:.3g}")
    from matplotlib.ticker import NullFormatter
    ax.xaxis.set_minor_formatter(NullFormatter())
    ax.set_xlabel("q (nm⁻¹)")
    ax.set_ylabel("I(q) (cm⁻¹)")
    ax.legend(fontsize=8)
    fig.text(0.01, 0.01, _wrap(notes), fontsize=6.5, va="bottom")
    fig.subplots_adjust(bottom=0.25)
    _savefig(fig, path, force)
    return Path(path)


def plot_relaxation(res, path, cmp_=None, notes=(), force=False):
    """Stacked T2 distribution per pore class, with an experimental one when given."""
    plt = _pyplot()
    fig, ax = plt.subplots(figsize=(7, 5))
    t_ms = res.t2 * 1e3
    dl = np.diff(np.log(res.edges))
    bottom = np.zeros_like(t_ms)
    for i, (k, v) in enumerate(res.fraction.items()):
        ax.fill_between(t_ms, bottom, bottom + v / dl, step="mid", alpha=0.6, label=k,
                        color=f"C{i}")
        bottom = bottom + v / dl
    if cmp_ is not None:
        ax.plot(cmp_.t2 * 1e3, cmp_.experiment, "o-", ms=3, color="k", label="experiment "
                "(normalised)")
    ax.set_xscale("log")
    ax.set_xlabel("T2 (ms)")
    ax.set_ylabel("signal density per ln T2")
    ax.legend(fontsize=8)
    nz = np.flatnonzero(bottom > 0)
    if nz.size:
        lo, hi = t_ms[nz[0]], t_ms[nz[-1]]
        if cmp_ is not None:
            lo, hi = min(lo, cmp_.t2.min() * 1e3), max(hi, cmp_.t2.max() * 1e3)
        ax.set_xlim(lo / 10, hi * 10)
    fig.text(0.01, 0.01, _wrap(notes), fontsize=6.5, va="bottom")
    fig.subplots_adjust(bottom=0.2)
    _savefig(fig, path, force)
    return Path(path)


def plot_pore_sizes(pores, path, force=False):
    plt = _pyplot()
    fig, ax = plt.subplots(1, 2, figsize=(9, 3.6))
    for key, label in (("local_thickness", "local thickness (continuous)"),
                       ("intrusion", "simulated intrusion")):
        r = pores.parts.get(key)
        if r is None:
            continue
        c = r.bin_centers
        ax[0].step(c, r.volume_fraction, where="mid", label=label)
        ax[1].plot(c, r.cumulative_finer, label=label)
    for a in ax:
        a.set_xscale("log")
        a.set_xlabel("pore diameter (nm)")
        a.legend(fontsize=8)
    ax[0].set_ylabel("volume fraction per bin")
    ax[1].set_ylabel("cumulative volume fraction (finer)")
    fig.suptitle("Pore sizes of the gel pore space (interlayer excluded)", fontsize=10)
    fig.tight_layout()
    _savefig(fig, path, force)
    return Path(path)


def plot_chords(ch, path, force=False):
    plt = _pyplot()
    fig, ax = plt.subplots(1, 2, figsize=(9, 3.6))
    src = ch.parts["exact"]
    res = src if src is not None else ch.parts["voxel_lines"]
    for a, ph_name in zip(ax, ("solid", "pore")):
        L = res.chords(ph_name) if ph_name in res.lengths else np.zeros(0)
        if L.size:
            a.hist(L, bins=60, density=True, color="#0072b2" if ph_name == "solid" else "#e69f00")
            a.axvline(L.mean(), color="k", lw=1, ls="--", label=f"mean {L.mean():.3g} nm")
            a.legend(fontsize=8)
        a.set_xlabel(f"{ph_name} chord length (nm)")
        a.set_ylabel("probability density (nm⁻¹)")
    how = ("isotropic random lines (exact)" if src is not None
           else "isotropic random lines through the voxel grid")
    fig.suptitle(f"Chords not cut by the domain wall; {how}", fontsize=10)
    fig.tight_layout()
    _savefig(fig, path, force)
    return Path(path)


def plot_s2(cor, path, force=False):
    plt = _pyplot()
    r = cor.parts["s2_solid"]
    fig, ax = plt.subplots(figsize=(5, 3.6))
    ax.plot(r.r, r.s2, "o-", ms=2)
    ax.axhline(r.phi ** 2, color="0.5", ls=":", label="φ²")
    ax.set_xlabel("r (nm)")
    ax.set_ylabel("S₂(r) of the solid")
    ax.legend(fontsize=8)
    fig.tight_layout()
    _savefig(fig, path, force)
    return Path(path)


def plot_sections(grid, path, force=False):
    """Three orthogonal central sections of the phase grid, with a scale bar."""
    from .view import PHASE_COLOURS, PHASE_LABELS, section_rgb
    plt = _pyplot()
    lab = grid.labels
    sp = grid.spacing
    n = lab.shape
    o = grid.origin
    fig, axes = plt.subplots(1, 3, figsize=(11, 4))
    for a, ax_i in zip(axes, (2, 1, 0)):
        sl = [slice(None)] * 3
        sl[ax_i] = n[ax_i] // 2
        img = lab[tuple(sl)]
        u, v = [k for k in range(3) if k != ax_i]
        rgb = section_rgb(img.T)
        a.imshow(rgb, origin="lower", interpolation="nearest",
                 extent=(o[u], o[u] + n[u] * sp[u], o[v], o[v] + n[v] * sp[v]))
        at = o[ax_i] + (n[ax_i] // 2 + 0.5) * sp[ax_i]
        a.set_title(f"{'xyz'[u]}{'xyz'[v]} section at {'xyz'[ax_i]} = {at:.3g} nm", fontsize=9)
        a.set_xlabel("xyz"[u] + " (nm)")
        a.set_ylabel("xyz"[v] + " (nm)")
    from matplotlib.patches import Patch
    handles = [Patch(color=PHASE_COLOURS[c], label=PHASE_LABELS[c]) for c in PHASE_COLOURS]
    fig.legend(handles=handles, loc="lower center", ncol=len(handles), fontsize=8, frameon=False)
    fig.tight_layout(rect=(0, 0.07, 1, 1))
    _savefig(fig, path, force)
    return Path(path)
