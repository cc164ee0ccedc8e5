"""Figures of measure results: each function draws into ``ax`` (or a new figure) and
returns the matplotlib ``Figure``. Nothing is written and no global state changes: figures
are made with ``matplotlib.figure.Figure`` directly (never pyplot, never
``matplotlib.use``), so inline plots in a notebook keep working; the report writes files
from these figures.

Multi-panel figures take ``ax`` as a sequence of axes (one per panel) or None.

Publication size: a new figure is drawn at the width it is printed at, a journal page
(:data:`PAGE_WIDTH`, 183 mm) or less, text at least 6.5 pt at that size, and its legend
outside the plotting areas (below them), so that no key covers data. On axes the caller
gives, the legend goes where it covers least (the caller owns the layout).
"""
from __future__ import annotations

import math
import textwrap

import numpy as np

from .grid import GEL, INTERLAYER, SOLID
from .measures.diffusion import RelaxationWalkResult, T2T2Result, TransportResult
from .style import PHASE_COLOURS, SECTION_ORDER, phase_label, section_rgb


#: Width (inches) of a figure spanning a journal page (183 mm, two columns) and of one
#: column (89 mm): the usual widths of journals' artwork guides (common practice).
PAGE_WIDTH = 7.2
COLUMN_WIDTH = 3.5


def new_figure(figsize, ncols: int = 1, ax=None, layout=None):
    """``(fig, axes)``: the figure of ``ax`` (one Axes or a sequence of ``ncols``), or a new
    ``Figure`` of ``figsize`` inches with ``ncols`` axes side by side (``layout``: a
    matplotlib layout engine name such as ``"constrained"``). ``axes`` is a list."""
    if ax is not None:
        axes = list(ax) if isinstance(ax, (list, tuple, np.ndarray)) else [ax]
        if len(axes) != ncols:
            raise ValueError(f"this figure has {ncols} panel(s): give {ncols} axes, got "
                             f"{len(axes)}")
        return axes[0].figure, axes
    from matplotlib.figure import Figure
    fig = Figure(figsize=figsize, layout=layout)
    axes = fig.subplots(1, ncols)
    return fig, (list(axes) if ncols > 1 else [axes])


def legend_outside(fig, axes, ax=None, *, ncol: int | None = None, fontsize: float = 8):
    """One legend for the handles of all ``axes`` (repeated labels once): on a new figure
    below the panels (``loc="outside lower center"`` of the constrained layout), on given
    axes (``ax`` not None) inside each panel where it covers least."""
    if ax is not None:
        for a in axes:
            if a.get_legend_handles_labels()[0]:
                a.legend(fontsize=7, loc="best", framealpha=0.85)
        return None
    seen, hs, ls = set(), [], []
    for a in axes:
        for h, lab in zip(*a.get_legend_handles_labels()):
            if lab not in seen and not lab.startswith("_"):
                seen.add(lab)
                hs.append(h)
                ls.append(lab)
    if not hs:
        return None
    n = ncol or min(len(hs), 3 if max(len(x) for x in ls) < 30 else 2)
    return fig.legend(hs, ls, loc="outside lower center", ncol=n, fontsize=fontsize,
                      frameon=False)


def _log_axis(a, which: str = "x", span=None):
    """Log axis labelled in plain numbers (0.5, 1, 2, 5...) at 1, 2, 5 x 10^k when the data
    span (lo, hi) covers at most two decades, at the decades otherwise; no minor labels (they
    collide)."""
    from matplotlib.ticker import FuncFormatter, LogLocator, NullFormatter
    axis = a.xaxis if which == "x" else a.yaxis
    subs = (1.0,)
    if span is not None and span[0] > 0 and span[1] > span[0] and \
            math.log10(span[1] / span[0]) <= 2.0:
        subs = (1.0, 2.0, 5.0)
    axis.set_major_locator(LogLocator(base=10.0, subs=subs))
    axis.set_major_formatter(FuncFormatter(lambda v, _: f"{v:g}"))
    axis.set_minor_formatter(NullFormatter())


def _wrap(notes, width=115):
    return "\n".join(textwrap.fill(n, width) for n in notes)


def _panel_with_key(ax, figsize, key: float = 1.0, right: float = 0.97, top: float = 0.97):
    """``(fig, axes)``: the given axes, or a new figure with one plot on top and room below
    it for the key and notes (:func:`_key_below`), so that no legend covers the data."""
    if ax is not None:
        return ax.figure, ax
    from matplotlib.figure import Figure
    fig = Figure(figsize=figsize)
    gs = fig.add_gridspec(2, 1, height_ratios=[2.4, key], left=0.11, right=right, top=top,
                          bottom=0.02, hspace=0.22)
    a = fig.add_subplot(gs[0])
    key = fig.add_subplot(gs[1])
    key.set_axis_off()
    fig._sheetview_key = key
    return fig, a


def _key_below(fig, a, ax, notes):
    """The legend of ``a`` and the ``notes`` in the key panel below it (a new figure of
    :func:`_panel_with_key`); on given axes, the legend where it covers least and no notes."""
    key = getattr(fig, "_sheetview_key", None) if ax is None else None
    if key is None:
        a.legend(fontsize=7, loc="best", framealpha=0.85)
        return
    h, lab = a.get_legend_handles_labels()
    if h:
        key.legend(h, lab, loc="upper left", fontsize=7, frameon=False, borderaxespad=0.0)
    if notes:
        key.text(0.0, 0.0, _wrap(notes, 120), fontsize=6.5, va="bottom", ha="left",
                 transform=key.transAxes)


# ------------------------------------------------------------------ stacks and order
def plot_stacking(res, ax=None):
    """Stacking numbers by prisms, by volume and by stack (three panels)."""
    fig, axes = new_figure((PAGE_WIDTH, 2.9), 3, ax, layout="constrained")
    for a, (h, title, ylabel) in zip(axes, (
            (res.histogram, "by prisms", "prisms"),
            (res.histogram_volume, "by volume", "volume fraction"),
            (res.histogram_stacks, "by stack (largest column)", "stacks"))):
        k = [int(x) for x in h]
        a.bar(k, list(h.values()), color="#4477aa", width=0.8)
        a.set_xlabel("stacking number (layers)")
        a.set_ylabel(ylabel)
        a.set_title(title, fontsize=9)
        if k:
            a.set_xticks(range(1, max(k) + 1, max(1, max(k) // 10)))
    if ax is None:
        fig.suptitle(f"Stacking: mean {res.mean:.2f} (number), {res.mean_volume:.2f} (volume)",
                     fontsize=10)
    return fig


def pole_frame(res):
    """``(axis, e1, e2)``: the reference axis of the pole figure (the centre of the disc)
    and the two directions of its x and y axes, by the rule of
    :mod:`sheetview.measures.orientation` (z frame: e1 = +x, e2 = +y; otherwise e1 is
    perpendicular to the axis and to the coordinate axis least aligned with it)."""
    a = np.asarray(res.axis, float)
    a = a / np.linalg.norm(a)
    if abs(a[2]) > 0.999999:
        e1 = np.array([1.0, 0.0, 0.0])
    else:
        e = np.zeros(3)
        e[int(np.argmin(np.abs(a)))] = 1.0
        e1 = np.cross(e, a)
        e1 /= np.linalg.norm(e1)
    return a, e1, np.cross(a, e1)


def pole_bandwidth(n: int) -> float:
    """Gaussian smoothing width (standard deviation, Lambert units) of the drawn pole
    figure for ``n`` prisms: Scott's rule in two dimensions, ``h = s n^(-1/6)`` with
    ``s = sqrt(2)/2`` the standard deviation of each coordinate of a uniform density on the
    Lambert disc of radius sqrt(2) (Scott, Multivariate Density Estimation, 1992, eq. 6.42:
    common practice), and never finer than one bin of the measure's grid."""
    return math.sqrt(0.5) * max(int(n), 1) ** (-1.0 / 6.0)


def smooth_pole(density, edges, sigma):
    """Gaussian-smoothed pole density on the grid of ``edges``: normalised convolution over
    the cells inside the disc (``smooth(d * inside) / smooth(inside)``), so the mean of a
    uniform density stays 1 up to the rim; the rim is not wrapped to its antipode. Cells
    whose centre lies just outside the disc get the smoothed value too (so that a drawing
    clipped to the disc has no notches); cells far outside are NaN. Returns the smoothed
    grid and the width used (at least one cell)."""
    from scipy.ndimage import gaussian_filter

    d = np.asarray(density, float)
    inside = np.isfinite(d)
    cell = float(edges[1] - edges[0])
    s = max(sigma / cell, 1.0)
    num = gaussian_filter(np.where(inside, d, 0.0), s, mode="constant")
    den = gaussian_filter(inside.astype(float), s, mode="constant")
    with np.errstate(invalid="ignore", divide="ignore"):
        out = num / den
    out[~(den > 0.05)] = np.nan
    return out, s * cell


def _direction_label(v) -> str:
    """``+x`` for a coordinate axis, else the vector's components."""
    v = np.asarray(v, float)
    i = int(np.argmax(np.abs(v)))
    if abs(abs(v[i]) - 1.0) < 1e-6:
        return ("+" if v[i] > 0 else "\u2212") + "xyz"[i]
    return "(" + ", ".join(f"{c:.2f}" for c in v) + ")"


def plot_pole_figure(res, ax=None, *, smooth: bool = True):
    """Lambert equal-area pole figure of the sheet normals (upper hemisphere about the
    reference axis at the centre; the rim is the plane perpendicular to it).

    The measure's binned density (``pole_figure.csv``, volume-weighted, in multiples of
    uniform) is drawn smoothed by a Gaussian of width :func:`pole_bandwidth` (normalised
    convolution inside the disc: :func:`smooth_pole`); the width and its rule are written on
    the figure. ``smooth=False`` draws the raw bins. The dashed contour marks the uniform
    density (1); the directions of the disc's axes are written at the rim."""
    fig, (a,) = new_figure((5.8, 5.6), 1, ax, layout="constrained")
    e = np.asarray(res.pole_edges, float)
    nb = len(e) - 1
    if smooth and res.n_prisms:
        shown, sig = smooth_pole(res.pole, e, pole_bandwidth(res.n_prisms))
        how = (f"smoothed: Gaussian \u03c3 = {sig:.2f} (\u2248 {math.degrees(sig):.0f}\u00b0 at "
               f"the centre), Scott's rule for {res.n_prisms:,} prisms")
    else:
        shown = np.asarray(res.pole, float)
        how = f"raw bins ({nb} x {nb} over the disc)"
    from matplotlib.patches import Circle
    r = math.sqrt(2)
    im = a.pcolormesh(e, e, shown.T, cmap="viridis", shading="flat", vmin=0.0)
    disc = Circle((0, 0), r, transform=a.transData, facecolor="none", edgecolor="none")
    a.add_patch(disc)
    im.set_clip_path(disc)
    mid = 0.5 * (e[1:] + e[:-1])
    if np.isfinite(shown).any() and np.nanmin(shown) < 1.0 < np.nanmax(shown):
        cs = a.contour(mid, mid, np.nan_to_num(shown.T, nan=0.0), levels=[1.0],
                       colors="white", linewidths=0.8, linestyles="--")
        cs.set_clip_path(disc)
    t = np.linspace(0, 2 * np.pi, 361)
    a.plot(r * np.cos(t), r * np.sin(t), "k-", lw=0.8)
    axis, e1, e2 = pole_frame(res)
    ref = "director" if res.frame == "director" else "z axis"
    for (x, y, ha, va), vec in (((r * 1.04, 0, "left", "center"), e1),
                                ((0, r * 1.04, "center", "bottom"), e2)):
        a.text(x, y, _direction_label(vec), ha=ha, va=va, fontsize=8)
    a.plot([0], [0], "+", color="white", ms=8, mew=1.2)
    a.text(0.06, -0.06, ref if res.frame == "director" else _direction_label(axis),
           color="white", fontsize=8, ha="left", va="top")
    a.set_xlim(-r * 1.28, r * 1.28)
    a.set_ylim(-r * 1.12, r * 1.12)
    a.set_aspect("equal")
    a.set_axis_off()
    fig.colorbar(im, ax=a, label="density (multiples of uniform)", shrink=0.85)
    a.set_title(f"Sheet normals, Lambert equal-area about the {ref}\nS = {res.S:.3f}, "
                f"volume-weighted; dashed: uniform density", fontsize=10)
    a.text(0.5, -0.01, how, transform=a.transAxes, ha="center", va="top", fontsize=7)
    return fig


def plot_order(res, ax=None):
    """Local order histogram and the polar-angle density (two panels)."""
    fig, axes = new_figure((PAGE_WIDTH, 3.0), 2, ax, layout="constrained")
    ls = res.local_S
    axes[0].hist(ls, bins=np.linspace(-0.5, 1.0, 31), color="#4477aa")
    axes[0].set_xlabel(f"local S (radius {res.local_radius:g} nm)")
    axes[0].set_ylabel("prisms")
    ce = res.cos_edges
    dens = res.hist.sum(axis=1) * (len(ce) - 1)
    axes[1].stairs(dens, ce, color="#aa3377", label="density of |cos θ|")
    axes[1].axhline(1.0, color="grey", lw=0.8, ls="--", label="uniform (isotropic)")
    axes[1].set_xlabel("|cos θ| to the " + ("director" if res.frame == "director" else "z axis"))
    axes[1].set_ylabel("density (multiples of uniform)")
    if ax is None:
        fig.suptitle(f"Orientation order: S = {res.S:.3f}, biaxiality {res.biaxiality:.3f}",
                     fontsize=10)
    legend_outside(fig, axes[1:], ax)
    return fig


# ------------------------------------------------------------------------ grid measures
def plot_pore_sizes(pores, ax=None):
    """Pore size distribution and its cumulative curve (two panels)."""
    fig, axes = new_figure((PAGE_WIDTH, 3.2), 2, ax, layout="constrained")
    for key, label in (("local_thickness", "local thickness (continuous)"),
                       ("intrusion", "simulated intrusion")):
        r = pores.parts.get(key)
        if r is None:
            continue
        c = r.bin_centers
        axes[0].step(c, r.volume_fraction, where="mid", label=label)
        axes[1].plot(c, r.cumulative_finer, label=label)
    cs = [np.asarray(r.bin_centers, float) for r in pores.parts.values()
          if r is not None and hasattr(r, "bin_centers")]
    cs = np.concatenate(cs) if cs else np.zeros(0)
    cs = cs[cs > 0]
    span = (float(cs.min()), float(cs.max())) if cs.size else None
    for a in axes:
        a.set_xscale("log")
        _log_axis(a, span=span)
        a.set_xlabel("pore diameter (nm)")
    axes[0].set_ylabel("volume fraction per bin")
    axes[1].set_ylabel("cumulative volume fraction (finer)")
    if ax is None:
        fig.suptitle("Pore sizes of the gel pore space (interlayer excluded)", fontsize=10)
    legend_outside(fig, axes, ax)
    return fig


def plot_chords(ch, ax=None):
    """Chord-length densities of solid and pore (two panels)."""
    fig, axes = new_figure((PAGE_WIDTH, 3.0), 2, ax, layout="constrained")
    src = ch.exact
    res = ch.main
    for a, ph_name in zip(axes, ("solid", "pore")):
        L = res.chords(ph_name) if ph_name in res.lengths else np.zeros(0)
        if L.size:
            a.hist(L, bins=60, density=True, color="#0072b2" if ph_name == "solid" else "#e69f00")
            a.axvline(L.mean(), color="k", lw=1, ls="--", label="mean chord")
            a.set_title(f"{ph_name}: mean {L.mean():.3g} nm", fontsize=9)
        a.set_xlabel(f"{ph_name} chord length (nm)")
        a.set_ylabel("probability density (nm⁻¹)")
    how = ("isotropic random lines (exact)" if src is not None
           else "isotropic random lines through the voxel grid")
    if ax is None:
        fig.suptitle(f"Chords not cut by the domain wall; {how}", fontsize=10)
    legend_outside(fig, axes, ax)
    return fig


def plot_s2(cor, ax=None):
    """Two-point correlation of the solid, with φ² marked."""
    fig, (a,) = new_figure((4.8, 3.9), 1, ax, layout="constrained")
    r = cor.s2_solid
    a.plot(r.r, r.s2, "o-", ms=2, label=f"S₂ ({cor.reference})")
    a.axhline(r.phi ** 2, color="0.5", ls=":", label="φ²")
    if np.isfinite(r.slope0):
        rr = np.linspace(0.0, min(float(r.r[-1]), r.phi / max(-r.slope0, 1e-12)), 20)
        a.plot(rr, r.phi + r.slope0 * rr, "--", color="C3", lw=1,
               label=f"slope −S_V/4, S_V = {r.specific_surface:.3g} nm⁻¹")
    a.set_xlabel("r (nm)")
    a.set_ylabel("S₂(r) of the solid")
    legend_outside(fig, [a], ax, ncol=2)
    return fig


def _num(v):
    """A feature value as a float, NaN for None or a missing value."""
    try:
        return float(v)
    except (TypeError, ValueError):
        return float("nan")


def _feature_q(f):
    q = (f or {}).get("q_range_nm-1") or [None, None]
    return _num(q[0]), _num(q[1])


def plot_scattering(res, ax=None, *, comparison=None, notes=(), features=None,
                    experiment=None):
    """Log-log plot of a predicted curve (valid q range marked) with its features: each
    fitted power law drawn over the q range it was fitted on (slope ± standard error), the
    Porod range shaded with the line K q⁻⁴ (or why there is none), Bragg peaks marked with
    their spacing d = 2π/q, and, when ``comparison`` is given, the experimental curve (with
    its error bars when ``experiment = (q, I, sigma)`` has uncertainties) and the fitted
    model with the reduced χ². ``features``: the dict of
    :func:`sheetview.measures.scattering.curve_features`."""
    fig, a = _panel_with_key(ax, (PAGE_WIDTH, 7.0))
    m = res.valid()
    a.loglog(res.q[m], res.intensity[m], "-", color="C0", lw=1.4, label="model (valid q range)")
    if (~m).any():
        pos = ~m & (res.intensity > 0)
        a.loglog(res.q[pos], res.intensity[pos], ".", color="C0", alpha=0.3, ms=3,
                 label="model outside its valid range")
    feats = dict(features or {})
    lines = []
    k = 0
    for name, f in feats.items():
        if not name.startswith("slope") or "slope" not in (f or {}):
            continue
        lo, hi = _feature_q(f)
        A, p = _num(f.get("prefactor")), _num(f.get("slope"))
        if not (np.isfinite([lo, hi, A, p]).all() and hi > lo > 0):
            continue
        qq = np.geomspace(lo, hi, 30)
        se = _num(f.get("slope_stderr"))
        a.loglog(qq, 1.6 * A * qq ** p, "-", color=("C2", "C4", "C5", "C8")[k % 4], lw=2.2,
                 alpha=0.85, label=f"slope {p:+.2f}" + (f" \u00b1 {se:.2f}" if np.isfinite(se) else "")
                 + f" (q {lo:.3g}\u2013{hi:.3g}; drawn \u00d71.6)")
        k += 1
    po = feats.get("porod") or {}
    if po.get("status") == "ok":
        lo, hi = _feature_q(po)
        K = _num(po.get("porod_constant_cm-1_nm-4"))
        if np.isfinite([lo, hi, K]).all():
            a.axvspan(lo, hi, color="C1", alpha=0.12, lw=0)
            qq = np.geomspace(lo / 2, min(hi * 2, float(res.q[m][-1]) if m.any() else hi * 2), 30)
            a.loglog(qq, K * qq ** -4.0, "--", color="C1", lw=1.2,
                     label=f"Porod K q\u207b\u2074, K = {K:.3g} cm\u207b\u00b9 nm\u207b\u2074, S/V = "
                           f"{_num(po.get('s_over_v_nm-1')):.3g} nm\u207b\u00b9 (shaded: range)")
    elif po:
        lines.append("no Porod range: " + str(po.get("reason") or po.get("error") or "")[:400])
    pk = feats.get("bragg_peaks") or {}
    qs = [q for q in (pk.get("q_nm-1") or []) if q is not None]
    if qs:
        qs = np.asarray(qs, float)
        ipk = np.exp(np.interp(np.log(qs), np.log(res.q[res.intensity > 0]),
                               np.log(res.intensity[res.intensity > 0])))
        a.loglog(qs, ipk * 1.8, "v", color="C3", ms=6, label="Bragg peak (d = 2\u03c0/q)")
        for q, i, d in zip(qs, ipk, pk.get("d_nm") or []):
            a.annotate(f"d {d:.3g} nm", (q, i * 1.8), xytext=(0, 6), textcoords="offset points",
                       ha="center", va="bottom", fontsize=7, color="C3")
    if comparison is not None:
        c = comparison
        if experiment is not None and experiment[2] is not None:
            qe, ie, se = (np.asarray(v, float) for v in experiment)
            a.errorbar(qe, ie, yerr=se, fmt="o", ms=3, color="C3", ecolor="0.55", elinewidth=0.8,
                       capsize=1.5, label="experiment (\u00b11 \u03c3)", zorder=1)
        elif experiment is not None:
            a.loglog(np.asarray(experiment[0], float), np.asarray(experiment[1], float), "o",
                     ms=3, color="C3", label="experiment (no uncertainties given)")
        else:
            a.loglog(c.q, c.experiment, "o", ms=3, color="C3", label="experiment")
        a.loglog(c.q, c.model_fitted, "-", color="k", lw=1,
                 label=f"fit: {c.scale:.3g} \u00d7 model + {c.background:.3g}; "
                       f"\u03c7\u00b2/dof = {c.chi2_reduced:.3g} ({c.weighting})")
    from matplotlib.ticker import NullFormatter
    a.xaxis.set_minor_formatter(NullFormatter())
    a.set_xlabel("q (nm\u207b\u00b9)")
    a.set_ylabel("I(q) (cm\u207b\u00b9)")
    _key_below(fig, a, ax, list(notes) + lines)
    return fig


def plot_relaxation(res, ax=None, *, comparison=None, notes=()):
    """Stacked T2 distribution per pore class, with an experimental one when given."""
    fig, a = _panel_with_key(ax, (7, 6.2), key=0.7)
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
    nz = np.flatnonzero(bottom > 0)
    if nz.size:
        lo, hi = t_ms[nz[0]], t_ms[nz[-1]]
        if comparison is not None:
            lo = min(lo, comparison.t2.min() * 1e3)
            hi = max(hi, comparison.t2.max() * 1e3)
        a.set_xlim(lo / 10, hi * 10)
    _key_below(fig, a, ax, list(notes))
    return fig


def plot_kinetics(kin, ax=None, *, title: str | None = None):
    """Growth progress alpha(t) (step curve), the Avrami fit when there is one, the
    smoothed rate on a second axis, and the characteristic times t10, t50, t90 each marked
    where the progress curve reaches its level (so that their labels never overlap)."""
    fig, a = _panel_with_key(ax, (7.2, 5.6), key=0.45, right=0.88,
                             top=0.93 if title else 0.97)
    a.step(kin.times, kin.alpha, where="post", color="#2f5d8a", lw=1.6, label="progress alpha")
    if kin.avrami is not None:
        t = np.linspace(kin.times[0], kin.times[-1], 400)
        a.plot(t, kin.avrami.alpha(t), "--", color="#8a2f5d", lw=1.0,
               label=f"Avrami fit, n = {kin.avrami.n:.2f}, R\u00b2 = {kin.avrami.r2:.3f}")
    for name, v in kin.marks.items():
        if v is None or not np.isfinite(v):
            continue
        try:
            level = int(name.lstrip("t")) / 100.0
        except ValueError:
            continue
        a.plot([v, v], [0, level], ":", color="#777777", lw=0.8)
        a.plot([v], [level], "o", color="#777777", ms=3)
        a.annotate(f"{name} = {v:.3g}", (v, level), xytext=(6, -2), textcoords="offset points",
                   ha="left", va="top", fontsize=7, color="#444444",
                   bbox=dict(boxstyle="square,pad=0.1", fc="white", ec="none", alpha=0.8))
    a.set_ylim(0, 1.05)
    u = f" ({kin.unit})" if kin.unit else ""
    a.set_xlabel("time" + u)
    a.set_ylabel("alpha (volume fraction born)")
    if len(kin.rate):
        a2 = a.twinx()
        a2.plot(kin.bin_centres, kin.rate, color="#d08a2f", lw=1.2, label="rate (smoothed)")
        a2.set_ylabel("d alpha / dt" + (f" (per {kin.unit})" if kin.unit else ""))
        top = float(np.nanmax(kin.rate)) if np.isfinite(kin.rate).any() else 0.0
        a2.set_ylim(0, top * 1.15 if top > 0 else 1.0)  # a flat rate off the frame line
        h2, l2 = a2.get_legend_handles_labels()
        for h, lab in zip(h2, l2):
            a.plot([], [], color=h.get_color(), lw=h.get_linewidth(), label=lab)
    if title:
        a.set_title(title, fontsize=9)
    _key_below(fig, a, ax, [])
    return fig


def plot_sections(grid, ax=None):
    """Three orthogonal central sections of the phase grid (three panels), each class
    with its colour and legend entry."""
    fig, axes = new_figure((PAGE_WIDTH, 3.1), 3, ax, layout="constrained")
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
    if ax is None:
        fig.legend(handles=handles, loc="outside lower center", ncol=len(handles), fontsize=8,
                   frameon=False)
    else:
        axes[-1].legend(handles=handles, loc="best", fontsize=7, framealpha=0.85)
    return fig


# ------------------------------------------------------------------ random walks
def _one_axes(ax, size=(4.8, 3.9)):
    if ax is not None:
        return ax.figure, ax
    from matplotlib.figure import Figure
    fig = Figure(figsize=size, dpi=110, layout="constrained")
    fig._sheetview_new = True
    return fig, fig.add_subplot(1, 1, 1)


def _finish_one(fig, ax, ncol=2):
    """Legend of a figure of :func:`_one_axes`: below the plot on a new figure."""
    legend_outside(fig, [ax], None if getattr(fig, "_sheetview_new", False) else ax, ncol=ncol)


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
    _finish_one(fig, ax)
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
    _finish_one(fig, ax)
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
        _finish_one(fig, ax)
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
    _finish_one(fig, ax)
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
    return fig


#: The figures of the named measures: name -> [(file stem, function)].
FIGURES = {
    "stacking": [("stacking_histogram", plot_stacking)],
    "order": [("pole_figure", plot_pole_figure), ("order", plot_order)],
    "pores": [("pore_sizes", plot_pore_sizes)],
    "chords": [("chords", plot_chords)],
    "correlation": [("s2_solid", plot_s2)],
    "scattering": [("scattering", lambda r, ax=None: plot_scattering(
        r.curve, ax, features=r.features, notes=[f"predicted curve, {r.probe}s: {r.solid} in {r.fluid}; a model's "
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
