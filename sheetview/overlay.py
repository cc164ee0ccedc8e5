"""The figure of a side-by-side comparison (:class:`sheetview.app.sidebyside.SideBySide`):
the curves of every structure on shared axes, one panel per curve, one colour and one line
style per structure throughout, measured curves in black with their error bars.

Like :mod:`sheetview.figures`, it draws with ``matplotlib.figure.Figure`` (never pyplot) and
returns the Figure; nothing is written.
"""
from __future__ import annotations

import textwrap

import numpy as np

from .app.sidebyside import CURVES
from .figures import PAGE_WIDTH
from .style import GROUP_PALETTE, TEXT_COLOUR

#: Line styles cycled with the colours, so that structures stay apart in greyscale print.
LINE_STYLES = ("-", "--", "-.", ":")
#: Panel order (the curves a practitioner reads first come first).
PANELS = ("stacking", "pore_sizes", "chords_solid", "chords_pore", "s2", "scattering", "t2")


def plot_side_by_side(cmp, *, width: float = PAGE_WIDTH):
    """The comparison figure, a journal page wide (183 mm): a 4 x 2 grid of panels, the
    last one naming the structures, the reference and the settings that differ. Panels of
    curves no structure has say so."""
    from matplotlib.figure import Figure
    fig = Figure(figsize=(width, width * 1.25), layout="constrained")
    axes = fig.subplots(4, 2).ravel()
    labels = cmp.labels
    look = {lab: (GROUP_PALETTE[i % len(GROUP_PALETTE)], LINE_STYLES[i % len(LINE_STYLES)])
            for i, lab in enumerate(labels)}
    for ax, name in zip(axes, PANELS):
        _panel(ax, name, cmp, look)
    _legend_panel(axes[-1], cmp, look)
    return fig


def _panel(ax, name, cmp, look):
    title, xl, yl, xs, ys = CURVES[name]
    ax.set_title(title, fontsize=10)
    ax.set_xlabel(xl, fontsize=8)
    ax.set_ylabel(yl, fontsize=8)
    ax.tick_params(labelsize=7)
    curves = cmp.curves.get(name, {})
    if not curves:
        ax.text(0.5, 0.5, "not measured", ha="center", va="center", transform=ax.transAxes,
                color="0.4", fontsize=9)
        ax.set_xticks([])
        ax.set_yticks([])
        return
    n = len(curves)
    for i, (lab, c) in enumerate(curves.items()):
        colour, ls = look[lab]
        x, y = np.asarray(c["x"], float), np.asarray(c["y"], float)
        if name == "stacking":
            w = 0.8 / n
            ax.bar(x - 0.4 + w * (i + 0.5), y, width=w, color=colour, label=lab,
                   edgecolor="white", linewidth=0.4)
        else:
            ok = np.isfinite(x) & np.isfinite(y)
            if xs == "log":
                ok &= x > 0
            if ys == "log":
                ok &= y > 0
            ax.plot(x[ok], y[ok], ls, color=colour, lw=1.4, label=lab)
    meas = cmp.measured.get(name if name != "t2" else "t2")
    if meas is not None:
        _measured(ax, name, meas, cmp, look)
    if name == "stacking":
        ax.set_xticks(sorted({int(v) for c in curves.values() for v in c["x"]}))
    ax.set_xscale(xs)
    ax.set_yscale(ys)
    if xs == "log":
        from matplotlib.ticker import LogLocator, NullFormatter
        ax.xaxis.set_major_locator(LogLocator(base=10))
        ax.xaxis.set_minor_formatter(NullFormatter())
    if name == "t2":  # the occupied decades, not the whole binning range
        occ = [np.asarray(c["x"])[np.asarray(c["y"]) > 1e-3 * max(np.max(c["y"]), 1e-300)]
               for c in curves.values()]
        if meas is not None:
            occ.append(np.asarray(meas["x"], float) * 1e3)
        occ = np.concatenate([o for o in occ if o.size] or [np.zeros(0)])
        if occ.size:
            ax.set_xlim(occ.min() / 3, occ.max() * 3)
    ax.grid(alpha=0.25, lw=0.5)


def _measured(ax, name, meas, cmp, look):
    x = np.asarray(meas["x"], float)
    y = np.asarray(meas["y"], float)
    if name == "scattering":
        sig = meas.get("sigma")
        ax.errorbar(x, y, yerr=None if sig is None else np.asarray(sig, float), fmt="o",
                    ms=2.5, color="black", ecolor="0.35", elinewidth=0.6, label="measured",
                    zorder=3)
        for lab, fit in meas["fits"].items():
            c = cmp.curves["scattering"].get(lab)
            if c is None or fit.get("scale") is None:
                continue
            colour, _ = look[lab]
            ax.plot(c["x"], fit["scale"] * np.asarray(c["y"]) + (fit["background_cm-1"] or 0),
                    ":", color=colour, lw=1.0)
        ax.text(0.03, 0.03, "dotted: scale x model + background\nfitted to the measured curve",
                transform=ax.transAxes, fontsize=6.5, color="0.3")
    else:
        # T2 in s -> ms; amplitudes as a density per log10 T2 with unit area
        t_ms = x * 1e3
        lx = np.log10(t_ms)
        area = np.trapezoid(y, lx) if hasattr(np, "trapezoid") else np.trapz(y, lx)
        if area > 0:  # the model curves have unit area over log10 T2 (fractions sum to 1)
            ax.plot(t_ms, y / area, "o-", ms=2.5, lw=0.8, color="black", label="measured")


def _legend_panel(ax, cmp, look):
    ax.axis("off")
    from matplotlib.lines import Line2D
    handles = [Line2D([], [], color=look[lab][0], ls=look[lab][1], lw=2) for lab in cmp.labels]
    names = [f"{lab}" + ("  (reference)" if i == 0 else "") for i, lab in enumerate(cmp.labels)]
    if cmp.measured:
        handles.append(Line2D([], [], color="black", marker="o", ms=3, ls="none"))
        names.append("measured")
    ax.legend(handles, names, loc="upper left", frameon=False, fontsize=8)
    lines = []
    if cmp.settings_differ:
        lines.append("Settings that differ:")
        for k, v in cmp.settings_differ.items():
            lines.append(f"  {k}: " + ", ".join(f"{a} {b}" for a, b in v.items()))
    else:
        lines.append("Same settings and voxel for every structure.")
    for name, m in cmp.measured.items():
        for lab, fit in m["fits"].items():
            if name == "scattering" and fit.get("chi2_reduced") is not None:
                lines.append(f"{lab}: reduced chi2 {fit['chi2_reduced']:.3g} (scattering)")
            if name == "t2" and fit.get("overlap") is not None:
                lines.append(f"{lab}: T2 overlap {fit['overlap']:.2f}, shift "
                             f"{fit['shift_decades']:+.2f} decades")
    lines.append("Simulated structures; not measurements of real material.")
    text = "\n".join(textwrap.fill(t, 60, subsequent_indent="   ") for t in lines)
    ax.text(0.0, 0.5, text, transform=ax.transAxes, va="top", fontsize=7, color=TEXT_COLOUR)
