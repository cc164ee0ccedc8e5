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
"""
from __future__ import annotations

import csv
import math
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
                                    "into it (files of the same name are replaced)", path=out)
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
    """Write equal-length columns as a CSV file with a header row (atomically)."""
    names = list(columns)
    cols = [np.asarray(columns[k]) for k in names]
    n = len(cols[0]) if cols else 0
    if any(len(c) != n for c in cols):
        raise ValueError("columns must have equal lengths")
    with atomic_path(path, force=force) as tmp:
        with open(tmp, "w", newline="") as fh:
            w = csv.writer(fh)
            w.writerow(names)
            ints = [c.dtype.kind in "iub" for c in cols]
            for start in range(0, n, 65536):
                block = [c[start:start + 65536].tolist() for c in cols]
                rows = []
                for r in zip(*block):
                    rows.append([str(int(x)) if isint else _fmt(x) for x, isint in zip(r, ints)])
                w.writerows(rows)
            if n == 0:
                fh.write("")
    return Path(path)


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


def write_report(outdir, doc: dict, results: dict, *, force: bool = False,
                 plots: bool = True) -> list[Path]:
    """Write a report folder for measure ``results`` (name -> result object).

    ``doc`` is the JSON summary (written as ``summary.json``). Returns the paths written.
    """
    out = prepare_folder(outdir, force)
    written = [write_json(out / "summary.json", doc, force)]
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
        written.append(write_csv(out / "prisms.csv", prism_cols, force))
    if stk is not None:
        written.append(write_csv(out / "stacks.csv", stk.stack_table(), force))
        g = stk.graph
        t = g.tilted
        written.append(write_csv(out / "tilted_contacts.csv", {
            "prism_a": t[:, 0], "prism_b": t[:, 1], "angle_deg": g.tilted_angle,
            "layer_a": stk.layer[t[:, 0]] if len(t) else np.zeros(0, np.int64),
            "layer_b": stk.layer[t[:, 1]] if len(t) else np.zeros(0, np.int64)}, force))
        if plots and stk.n_prisms:
            p = out / "stacking_histogram.png"
            plot_stacking(stk, p, force)
            written.append(p)
    if order is not None:
        ce, pe = order.cos_edges, order.phi_edges
        nc, nphi = order.hist.shape
        ci, pi = np.meshgrid(np.arange(nc), np.arange(nphi), indexing="ij")
        written.append(write_csv(out / "orientation_distribution.csv", {
            "cos_theta_lo": ce[ci.ravel()], "cos_theta_hi": ce[ci.ravel() + 1],
            "phi_lo": pe[pi.ravel()], "phi_hi": pe[pi.ravel() + 1],
            "fraction": order.hist.ravel(), "density_mud": order.hist.ravel() * nc * nphi},
            force))
        e = order.pole_edges
        xi, yi = np.meshgrid(np.arange(len(e) - 1), np.arange(len(e) - 1), indexing="ij")
        written.append(write_csv(out / "pole_figure.csv", {
            "x": 0.5 * (e[xi.ravel()] + e[xi.ravel() + 1]),
            "y": 0.5 * (e[yi.ravel()] + e[yi.ravel() + 1]),
            "density_mud": order.pole.ravel()}, force))
        if plots and order.n_prisms:
            for name, fn in (("pole_figure.png", plot_pole_figure), ("order.png", plot_order)):
                plot = out / name
                fn(order, plot, force)
                written.append(plot)
    return written
