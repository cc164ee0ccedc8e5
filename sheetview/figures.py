"""Figures of measure results: each function draws into ``ax`` (or a new figure) and
returns the matplotlib ``Figure``. Nothing is written and no global state changes: figures
are made with ``matplotlib.figure.Figure`` directly (never pyplot, never
``matplotlib.use``), so inline plots in a notebook keep working; the report writes files
from these figures.

Multi-panel figures take ``ax`` as a sequence of axes (one per panel) or None.
"""
from __future__ import annotations

import math
import textwrap

import numpy as np

from .grid import GEL, INTERLAYER, SOLID
from .measures.diffusion import RelaxationWalkResult, T2T2Result, TransportResult
from .style import PHASE_COLOURS, SECTION_ORDER, phase_label, section_rgb


def new_figure(figsize, ncols: int = 1, ax=None):
    """``(fig, axes)``: the figure of ``ax`` (one Axes or a sequence of ``ncols``), or a new
    ``Figure`` of ``figsize`` inches with ``ncols`` axes side by side. ``axes`` is a list."""
    if ax is not None:
        axes = list(ax) if isinstance(ax, (list, tuple, np.ndarray)) else [ax]
        if len(axes) != ncols:
            raise ValueError(f"this figure has {ncols} panel(s): give {ncols} axes, got "
                             f"{len(axes)}")
        return axes[0].figure, axes
    from matplotlib.figure import Figure
    fig = Figure(figsize=figsize)
    axes = fig.subplots(1, ncols)
    return fig, (list(axes) if ncols > 1 else [axes])


def _wrap(notes, width=115):
    return "\n".join(textwrap.fill(n, width) for n in notes)


# ------------------------------------------------------------------ stacks and order
def plot_stacking(res, ax=None):
    """Stacking numbers by prisms, by volume and by stack (three panels)."""
    fig, axes = new_figure((12, 3.6), 3, ax)
    for a, (h, title, ylabel) in zip(axes, (
            (res.histogram, "by prisms", "prisms"),
            (res.histogram_volume, "by volume", "volume fraction"),
            (res.histogram_stacks, "by stack (largest column)", "stacks"))):
        k = [int(x) for x in h]
        a.bar(k, list(h.values()), color="#4477aa", width=0.8)
        a.set_xlabel("stacking number (layers)")
        a.set_ylabel(ylabel)
        a.set_title(title)
        if k:
            a.set_xticks(range(1, max(k) + 1, max(1, max(k) // 10)))
    if ax is None:
        fig.suptitle(f"Stacking: mean {res.mean:.2f} (number), {res.mean_volume:.2f} (volume)")
        fig.tight_layout()
    return fig


def plot_pole_figure(res, ax=None):
    """Lambert equal-area pole figure of the sheet normals."""
    fig, (a,) = new_figure((5.2, 4.6), 1, ax)
    e = res.pole_edges
    im = a.pcolormesh(e, e, res.pole.T, cmap="viridis", shading="flat")
    t = np.linspace(0, 2 * np.pi, 361)
    a.plot(math.sqrt(2) * np.cos(t), math.sqrt(2) * np.sin(t), "k-", lw=0.8)
    a.set_aspect("equal")
    a.set_axis_off()
    fig.colorbar(im, ax=a, label="density (multiples of uniform)")
    ref = "director" if res.frame == "director" else "z axis"
    a.set_title(f"Sheet normals, Lambert equal-area about the {ref}\nS = {res.S:.3f}")
    if ax is None:
        fig.tight_layout()
    return fig


def plot_order(res, ax=None):
    """Local order histogram and the polar-angle density (two panels)."""
    fig, axes = new_figure((9, 3.6), 2, ax)
    ls = res.local_S
    axes[0].hist(ls, bins=np.linspace(-0.5, 1.0, 31), color="#4477aa")
    axes[0].set_xlabel(f"local S (radius {res.local_radius:g} nm)")
    axes[0].set_ylabel("prisms")
    ce = res.cos_edges
    dens = res.hist.sum(axis=1) * (len(ce) - 1)
    axes[1].stairs(dens, ce, color="#aa3377")
    axes[1].axhline(1.0, color="grey", lw=0.8, ls="--")
    axes[1].set_xlabel("|cos θ| to the " + ("director" if res.frame == "director" else "z axis"))
    axes[1].set_ylabel("density (multiples of uniform)")
    if ax is None:
        fig.suptitle(f"Orientation order: S = {res.S:.3f}, biaxiality {res.biaxiality:.3f}")
        fig.tight_layout()
    return fig


# ------------------------------------------------------------------------ grid measures
def plot_pore_sizes(pores, ax=None):
    """Pore size distribution and its cumulative curve (two panels)."""
    fig, axes = new_figure((9, 3.6), 2, ax)
    for key, label in (("local_thickness", "local thickness (continuous)"),
                       ("intrusion", "simulated intrusion")):
        r = pores.parts.get(key)
        if r is None:
            continue
        c = r.bin_centers
        axes[0].step(c, r.volume_fraction, where="mid", label=label)
        axes[1].plot(c, r.cumulative_finer, label=label)
    for a in axes:
        a.set_xscale("log")
        a.set_xlabel("pore diameter (nm)")
        a.legend(fontsize=8)
    axes[0].set_ylabel("volume fraction per bin")
    axes[1].set_ylabel("cumulative volume fraction (finer)")
    if ax is None:
        fig.suptitle("Pore sizes of the gel pore space (interlayer excluded)", fontsize=10)
        fig.tight_layout()
    return fig


def plot_chords(ch, ax=None):
    """Chord-length densities of solid and pore (two panels)."""
    fig, axes = new_figure((9, 3.6), 2, ax)
    src = ch.exact
    res = ch.main
    for a, ph_name in zip(axes, ("solid", "pore")):
        L = res.chords(ph_name) if ph_name in res.lengths else np.zeros(0)
        if L.size:
            a.hist(L, bins=60, density=True, color="#0072b2" if ph_name == "solid" else "#e69f00")
            a.axvline(L.mean(), color="k", lw=1, ls="--", label=f"mean {L.mean():.3g} nm")
            a.legend(fontsize=8)
        a.set_xlabel(f"{ph_name} chord length (nm)")
        a.set_ylabel("probability density (nm⁻¹)")
    how = ("isotropic random lines (exact)" if src is not None
           else "isotropic random lines through the voxel grid")
    if ax is None:
        fig.suptitle(f"Chords not cut by the domain wall; {how}", fontsize=10)
        fig.tight_layout()
    return fig


def plot_s2(cor, ax=None):
    """Two-point correlation of the solid, with φ² marked."""
    fig, (a,) = new_figure((5, 3.6), 1, ax)
    r = cor.s2_solid
    a.plot(r.r, r.s2, "o-", ms=2, label=f"S₂ ({cor.reference})")
    a.axhline(r.phi ** 2, color="0.5", ls=":", label="φ²")
    if np.isfinite(r.slope0):
        rr = np.linspace(0.0, min(float(r.r[-1]), r.phi / max(-r.slope0, 1e-12)), 20)
        a.plot(rr, r.phi + r.slope0 * rr, "--", color="C3", lw=1,
               label=f"slope −S_V/4, S_V = {r.specific_surface:.3g} nm⁻¹")
    a.set_xlabel("r (nm)")
    a.set_ylabel("S₂(r) of the solid")
    a.legend(fontsize=8)
    if ax is None:
        fig.tight_layout()
    return fig


def plot_scattering(res, ax=None, *, comparison=None, notes=()):
    """Log-log plot of a predicted curve (valid q range marked), with an experimental
    curve and its fit when ``comparison`` is given."""
    fig, (a,) = new_figure((7, 5.2), 1, ax)
    m = res.valid()
    a.loglog(res.q[m], res.intensity[m], "-", color="C0", label="model (valid q range)")
    if (~m).any():
        pos = ~m & (res.intensity > 0)
        a.loglog(res.q[pos], res.intensity[pos], ".", color="C0", alpha=0.3,
                 label="model outside valid range")
    if comparison is not None:
        c = comparison
        a.loglog(c.q, c.experiment, "o", ms=3, color="C3", label="experiment")
        a.loglog(c.q, c.model_fitted, "-", color="k", lw=1,
                 label=f"scale {c.scale:.3g} x model + {c.background:.3g}")
    from matplotlib.ticker import NullFormatter
    a.xaxis.set_minor_formatter(NullFormatter())
    a.set_xlabel("q (nm⁻¹)")
    a.set_ylabel("I(q) (cm⁻¹)")
    a.legend(fontsize=8)
    if notes and ax is None:
        fig.text(0.01, 0.01, _wrap(notes), fontsize=6.5, va="bottom")
        fig.subplots_adjust(bottom=0.25)
    return fig


def plot_relaxation(res, ax=None, *, comparison=None, notes=()):
    """Stacked T2 distribution per pore class, with an experimental one when given."""
    fig, (a,) = new_figure((7, 5), 1, ax)
    t_ms = res.t2 * 1e3
    dl = np.diff(np.log(res.edges))
    bottom = np.zeros_like(t_ms)
    for i, (k, v) in enumerate(res.fraction.items()):
        a.fill_between(t_ms, bottom, bottom + v / dl, step="mid", alpha=0.6, label=k,
                       color=f"C{i}")
        bottom = bottom + v / dl
    if comparison is not None:
        a.plot(comparison.t2 * 1e3, comparison.experiment, "o-", ms=3, color="k",
               label="experiment (normalised)")
    a.set_xscale("log")
    a.set_xlabel("T2 (ms)")
    a.set_ylabel("signal density per ln T2")
    a.legend(fontsize=8)
    nz = np.flatnonzero(bottom > 0)
    if nz.size:
        lo, hi = t_ms[nz[0]], t_ms[nz[-1]]
        if comparison is not None:
            lo = min(lo, comparison.t2.min() * 1e3)
            hi = max(hi, comparison.t2.max() * 1e3)
        a.set_xlim(lo / 10, hi * 10)
    if notes and ax is None:
        fig.text(0.01, 0.01, _wrap(notes), fontsize=6.5, va="bottom")
        fig.subplots_adjust(bottom=0.2)
    return fig


def plot_sections(grid, ax=None):
    """Three orthogonal central sections of the phase grid (three panels), each class
    with its colour and legend entry."""
    fig, axes = new_figure((11, 4), 3, ax)
    lab = grid.labels
    sp = grid.spacing
    n = lab.shape
    o = grid.origin
    for a, ax_i in zip(axes, (2, 1, 0)):
        sl = [slice(None)] * 3
        sl[ax_i] = n[ax_i] // 2
        img = lab[tuple(sl)]
        u, v = [k for k in range(3) if k != ax_i]
        a.imshow(section_rgb(img.T), origin="lower", interpolation="nearest",
                 extent=(o[u], o[u] + n[u] * sp[u], o[v], o[v] + n[v] * sp[v]))
        at = o[ax_i] + (n[ax_i] // 2 + 0.5) * sp[ax_i]
        a.set_title(f"{'xyz'[u]}{'xyz'[v]} section at {'xyz'[ax_i]} = {at:.3g} nm", fontsize=9)
        a.set_xlabel("xyz"[u] + " (nm)")
        a.set_ylabel("xyz"[v] + " (nm)")
    from matplotlib.patches import Patch
    present = set(np.flatnonzero(np.bincount(lab.ravel(), minlength=256)).tolist())
    shown = [c for c in SECTION_ORDER if c in present or c in (SOLID, INTERLAYER, GEL)]
    handles = [Patch(color=PHASE_COLOURS[c], label=phase_label(c, grid.names)) for c in shown]
    fig.legend(handles=handles, loc="lower center", ncol=len(handles), fontsize=8, frameon=False)
    if ax is None:
        fig.tight_layout(rect=(0, 0.07, 1, 1))
    return fig


# ------------------------------------------------------------------ random walks
def _one_axes(ax, size=(5.0, 3.6)):
    if ax is not None:
        return ax.figure, ax
    from matplotlib.figure import Figure
    fig = Figure(figsize=size, dpi=110)
    return fig, fig.add_subplot(1, 1, 1)


def plot_decay(result: RelaxationWalkResult, ax=None):
    """M(t) of a relaxation walk, total and by start class (log scale). Returns the Figure."""
    fig, ax = _one_axes(ax)
    t = result.t_us * 1e-3
    ax.semilogy(t, np.maximum(result.m, 1e-6), "k-", lw=1.6, label="all water")
    for k, v in result.m_by_class.items():
        ax.semilogy(t, np.maximum(v, 1e-6), lw=1.0, label=f"started in {k}")
    ax.set_xlabel("t (ms)")
    ax.set_ylabel("M(t) / M(0)")
    ax.set_title("Predicted decay (random walk)", fontsize=9)
    ax.legend(fontsize=7)
    fig.tight_layout()
    return fig


def plot_t2_spectrum(result: RelaxationWalkResult, ax=None):
    """The walk's T2 spectrum by start class beside the fast-diffusion one of ``relax``.
    Returns the Figure."""
    fig, ax = _one_axes(ax)
    sp = result.spectrum
    if sp is not None:
        x = sp.t2_s * 1e3
        ax.semilogx(x, sp.amplitude, "k-", lw=1.6, label="walk, all water")
        for k, v in sp.amplitude_by_class.items():
            ax.semilogx(x, v, lw=1.0, label=f"walk, started in {k}")
    if result.fast is not None:
        ax.semilogx(result.fast.t2 * 1e3, result.fast.total, "k--", lw=1.0,
                    label="fast diffusion (relax)")
    ax.set_xlabel("T2 (ms)")
    ax.set_ylabel("signal fraction per bin")
    ax.set_title("Predicted T2 spectra (not measurements)", fontsize=9)
    ax.legend(fontsize=7)
    fig.tight_layout()
    return fig


def plot_exchange(result, ax=None):
    """Share of the walkers of each start class found in another class against time
    (an :class:`ExchangeResult` or a :class:`RelaxationWalkResult`). Returns the Figure."""
    ex = result.exchange if isinstance(result, RelaxationWalkResult) else result
    fig, ax = _one_axes(ax)
    t = np.maximum(ex.t_us, 1e-12)
    for i, a in enumerate(ex.classes):
        for j, b in enumerate(ex.classes):
            if i != j:
                ax.semilogx(t[1:], ex.fraction[1:, i, j], lw=1.0, label=f"{a} → {b}")
    ax.set_xlabel("mixing time (µs)")
    ax.set_ylabel("fraction of the walkers of the start class")
    ax.set_title("Exchange between pore classes", fontsize=9)
    if len(ex.classes) > 1:
        ax.legend(fontsize=7)
    fig.tight_layout()
    return fig


def plot_msd(result: TransportResult, ax=None):
    """MSD per axis against time with the free-water line 2 D0 t. Returns the Figure."""
    fig, ax = _one_axes(ax)
    t = result.t_us
    for a, axn in enumerate("xyz"):
        ax.plot(t, result.msd_nm2[:, a, a], lw=1.2, label=f"<Δ{axn}²>")
    ax.plot(t, 2 * result.d0_nm2_per_us * t, "k:", lw=1.0, label="free water 2 D0 t")
    ax.set_xlabel("t (µs)")
    ax.set_ylabel("mean-square displacement (nm²)")
    ax.set_title("Transport (random walk)", fontsize=9)
    ax.legend(fontsize=7)
    fig.tight_layout()
    return fig


def plot_t2_t2(result: T2T2Result, ax=None):
    """The T2–T2 exchange map: amplitude against T2 during encoding (x) and detection
    (y), log axes, with the diagonal. Returns the Figure (made without pyplot)."""
    fig, ax = _one_axes(ax, size=(4.6, 4.0))
    e = result.edges_s * 1e3
    F = np.asarray(result.amplitude, float)
    mesh = ax.pcolormesh(e, e, F.T, cmap="viridis", shading="flat")
    ax.set_xscale("log")
    ax.set_yscale("log")
    ax.plot([e[0], e[-1]], [e[0], e[-1]], "w:", lw=0.8)
    ax.set_xlabel("T2 during encoding (ms)")
    ax.set_ylabel("T2 during detection (ms)")
    ax.set_title(f"Predicted T2–T2 map, mixing {result.mixing_time_us:.3g} µs", fontsize=9)
    fig.colorbar(mesh, ax=ax, label="signal fraction per bin")
    fig.tight_layout()
    return fig


#: The figures of the named measures: name -> [(file stem, function)].
FIGURES = {
    "stacking": [("stacking_histogram", plot_stacking)],
    "order": [("pole_figure", plot_pole_figure), ("order", plot_order)],
    "pores": [("pore_sizes", plot_pore_sizes)],
    "chords": [("chords", plot_chords)],
    "correlation": [("s2_solid", plot_s2)],
    "scattering": [("scattering", lambda r, ax=None: plot_scattering(
        r.curve, ax, notes=[f"predicted curve, {r.probe}s: {r.solid} in {r.fluid}; a model's "
                            "prediction, not a measurement"]))],
    "water_walk": [("walk_decay", lambda r, ax=None: plot_decay(r, ax)),
                   ("walk_t2_spectrum", lambda r, ax=None: plot_t2_spectrum(r, ax)),
                   ("walk_exchange", lambda r, ax=None: plot_exchange(r, ax))],
    "transport": [("transport_msd", lambda r, ax=None: plot_msd(r, ax))],
    "relaxation": [("t2_distribution", lambda r, ax=None: plot_relaxation(
        r, ax, notes=["predicted T2 distribution (fast exchange); a model's prediction, not "
                      "a measurement"]))],
}


def figure_of(name: str, result, ax=None, grid=None):
    """The (first) figure of measure ``name``; ``"sections"`` draws ``grid``."""
    if name == "sections":
        return plot_sections(grid, ax)
    if name not in FIGURES:
        raise ValueError(f"no figure for measure {name!r}; figures: "
                         f"{', '.join(list(FIGURES) + ['sections'])}")
    return FIGURES[name][0][1](result, ax)
