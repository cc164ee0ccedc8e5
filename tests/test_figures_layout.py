"""Figures fit to publish: every figure the report writes is drawn at most a journal page
wide (183 mm, the usual double-column width of artwork guides: common practice), with text of
at least 6.5 pt at that size, nothing outside the canvas (no clipped title), no legend over a
plotting area and no tick labels running into each other. Checked on the drawn figure with
matplotlib's own text and artist extents (renderer of the Agg backend)."""
from __future__ import annotations

import numpy as np
import pytest

import sheetview as sv
from sheetview import figures

MIN_PT = 6.5


@pytest.fixture(scope="module")
def measured():
    return sv.measure("sample_structures/single_stack.csv",
                      only="default,scattering,relaxation", voxel=0.2)


def _drawn_figures(m):
    out = []
    for name, entries in figures.FIGURES.items():
        if not hasattr(m, name) and name not in getattr(m, "results", {}):
            continue
        res = m[name]
        for stem, draw in entries:
            out.append((stem, draw(res)))
    out.append(("sections", figures.plot_sections(m.grid)))
    return out


@pytest.fixture(scope="module")
def more_figures():
    """The figures outside the report's measures: kinetics of a grown structure, the random
    walks (decay, T2 spectrum, exchange, MSD) and the T2-T2 map."""
    from sheetview import Sphere
    from sheetview.grid import GEL, SOLID, PhaseGrid
    from sheetview.measures import diffusion as dm
    from sheetview.measures.kinetics import progress
    from sheetview.synth import pack_stacks

    res = pack_stacks(Sphere((0, 0, 0), 9.0), 25, seeding="wall", orientation="wall",
                      lateral_size="fixed:4", layers="fixed:3", born=True, seed=1)
    out = [("kinetics", figures.plot_kinetics(progress(res.structure), title="grown"))]
    lab = np.full((24, 24, 24), GEL, np.uint8)
    lab[:, :, 10:14] = SOLID
    g = PhaseGrid(lab, spacing=0.5, periodic=True)
    m = sv.measure(g, only="water_walk,transport", n_walkers=600)
    for name in ("water_walk", "transport"):
        for stem, draw in figures.FIGURES[name]:
            out.append((stem, draw(m[name])))
    return out


def _boxes_overlap(a, b, tol=1.0):
    return (min(a.x1, b.x1) - max(a.x0, b.x0) > tol) and (min(a.y1, b.y1) - max(a.y0, b.y0) > tol)


def _drawn_ticklabels(axis):
    """The tick labels matplotlib draws: ticks inside the view interval, label shown."""
    lo, hi = sorted(axis.get_view_interval())
    out = []
    for tick in list(axis.get_major_ticks()) + list(axis.get_minor_ticks()):
        loc = tick.get_loc()
        if loc is None or not (lo - 1e-9 * abs(hi - lo) <= loc <= hi + 1e-9 * abs(hi - lo)):
            continue
        for lab in (tick.label1, tick.label2):
            if lab.get_visible() and lab.get_text().strip():
                out.append(lab)
    return out


def _has_data(ax):
    return bool(ax.lines or ax.images or ax.collections or
                [p for p in ax.patches if p.get_visible()])


def test_every_report_figure_is_fit_to_publish(measured, more_figures):
    figs = _drawn_figures(measured) + list(more_figures)
    assert len(figs) >= 13
    for stem, fig in figs:
        check_fit_to_publish(stem, fig)


def check_fit_to_publish(stem, fig):
    """The checks of the module docstring on one drawn figure (also used by the tests of
    other figures, such as the side-by-side comparison)."""
    from matplotlib.text import Text

    w, h = fig.get_size_inches()
    assert w <= figures.PAGE_WIDTH + 1e-6, (stem, w)
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    canvas_agg = FigureCanvasAgg(fig)
    canvas_agg.draw()
    r = canvas_agg.get_renderer()
    canvas = fig.bbox
    drawn = {id(t) for a in fig.axes if a.axison
             for axis in (a.xaxis, a.yaxis) for t in _drawn_ticklabels(axis)}
    hidden = {id(t) for a in fig.axes for axis in (a.xaxis, a.yaxis)
              for t in axis.get_ticklabels(which="both") if id(t) not in drawn}
    hidden |= {id(t) for a in fig.axes if not a.axison
               for t in (a.xaxis.label, a.yaxis.label, a.xaxis.offsetText,
                         a.yaxis.offsetText)}
    texts = [t for t in fig.findobj(Text) if t.get_visible() and t.get_text().strip()
             and id(t) not in hidden and t.get_window_extent(r).width > 0]
    for t in texts:
        assert t.get_fontsize() >= MIN_PT, (stem, t.get_text(), t.get_fontsize())
        bb = t.get_window_extent(r)
        assert bb.x0 >= canvas.x0 - 1 and bb.x1 <= canvas.x1 + 1 and \
            bb.y0 >= canvas.y0 - 1 and bb.y1 <= canvas.y1 + 1, (stem, t.get_text(), bb)
    data_axes = [a for a in fig.axes if _has_data(a)]
    legends = [lg for a in fig.axes for lg in ([a.get_legend()] if a.get_legend() else [])]
    legends += list(fig.legends)
    for lg in legends:
        lb = lg.get_window_extent(r)
        for a in data_axes:
            assert not _boxes_overlap(lb, a.get_window_extent(r)), (stem, "legend over data")
    for a in fig.axes:
        if not a.axison:
            continue
        for axis in (a.xaxis, a.yaxis):
            labs = _drawn_ticklabels(axis)
            bbs = [t.get_window_extent(r) for t in labs]
            for i in range(len(bbs)):
                for j in range(i + 1, len(bbs)):
                    assert not _boxes_overlap(bbs[i], bbs[j], tol=0.5), \
                        (stem, labs[i].get_text(), labs[j].get_text())


def test_figures_on_given_axes_keep_the_callers_layout(measured):
    """On axes the caller gives, the figure draws into them and adds no figure legend."""
    from matplotlib.figure import Figure

    fig = Figure(figsize=(8, 3))
    axes = fig.subplots(1, 2)
    assert figures.plot_chords(measured.chords, list(axes)) is fig
    assert not fig.legends
