"""The Python face of sheetview: :func:`measure` and the :class:`Measurement` it returns.

Examples
--------
>>> import sheetview as sv
>>> m = sv.measure("sample_structures/single_stack.csv", only="stacking,phases", voxel=0.2)
>>> m.stacking.mean
5.0
>>> round(m.summary()["volume_fractions"]["solid"], 2)
0.06
>>> m.phases.fractions["interlayer"] > 0
True
"""
from __future__ import annotations

import html
from pathlib import Path

from .app.document import document, flatten
from .app.load import at_moment, load
from .app.registry import REGISTRY, select
from .app.run import Run
from .app.settings import Settings
from .app.sidebyside import SideBySide, profiles_of, side_by_side
from .errors import OptionError
from .grid import PhaseGrid
from .particles import ParticleSet
from .structure import Structure, SurfaceBody
from .figures import figure_of
from .overlay import plot_side_by_side
from .report import write_comparison, write_report


class Measurement:
    """The results of :func:`measure` on one input.

    Each measure that ran is an attribute (``m.stacking``, ``m.phases``...; also
    ``m["phases"]``); ``m.grid`` is the phase grid the grid measures used; ``m.settings``
    the :class:`~sheetview.app.settings.Settings`; ``m.timings`` seconds per stage.
    :meth:`summary` is the document ``sheetview measure`` writes as ``summary.json``
    (without the file's path and hash), :meth:`to_frame` a one-row table of its scalars,
    :meth:`write` a report folder.
    """

    def __init__(self, run: Run, source=None, moment=None):
        self._run = run
        self.source = source
        self.moment = moment

    # ------------------------------------------------------------------ access
    @property
    def input(self):
        return self._run.obj

    @property
    def settings(self) -> Settings:
        return self._run.settings

    @property
    def results(self) -> dict:
        """Measure name -> result object, in the order they ran."""
        return dict(self._run.results)

    @property
    def grid(self) -> PhaseGrid | None:
        return self._run.__dict__.get("grid")

    @property
    def timings(self) -> dict:
        return dict(self._run.timings)

    def __getattr__(self, name):
        if name.startswith("_"):
            raise AttributeError(name)
        results = self.__dict__["_run"].results
        if name in results:
            return results[name]
        if name in REGISTRY:
            raise AttributeError(f"measure {name!r} did not run (ran: {', '.join(results)})")
        raise AttributeError(name)

    def __getitem__(self, name):
        return self._run.results[name]

    def __dir__(self):
        return sorted(set(super().__dir__()) | set(self._run.results))

    # ----------------------------------------------------------------- outputs
    def summary(self) -> dict:
        """The summary document (as ``summary.json``, without file provenance)."""
        doc = document(self._run)
        if self.moment is not None:
            doc["at"] = self.moment.to_dict()
        return doc

    def to_frame(self):
        """A one-row :class:`pandas.DataFrame` of the summary's scalars (dotted names such
        as ``volume_fractions.solid``), indexed by the input's source."""
        import pandas as pd  # heavy optional library, imported when asked for
        doc = self.summary()
        doc.pop("timings_s", None)
        row = flatten(doc)
        return pd.DataFrame([row], index=[str(self.source or "input")])

    def write(self, folder, *, force: bool = False, plots: bool = True) -> list[Path]:
        """Write a report folder (summary.json, CSV tables, PNG figures); see
        :func:`sheetview.report.write_report`."""
        return write_report(folder, self.summary(), self._run.results, force=force,
                            protect=[self.source] if self.source else (),
                            plots=plots, grid=self.grid)

    def plot(self, name: str, ax=None):
        """The figure of measure ``name``, or ``"sections"`` (three central sections of the
        phase grid): a matplotlib Figure; nothing is written and no global state changes."""
        if name == "sections":
            if self.grid is None:
                raise OptionError("no phase grid: no grid measure ran", param="name")
            return figure_of(name, None, ax=ax, grid=self.grid)
        if name not in self._run.results:
            raise OptionError(f"measure {name!r} did not run (ran: "
                              f"{', '.join(self._run.results)})", param="name")
        return figure_of(name, self[name], ax=ax, grid=self.grid)

    # ------------------------------------------------------------------ display
    def _headline(self) -> list[tuple[str, str]]:
        rows = []
        s = self.summary()
        obj = self.input
        what = (f"{len(obj):,} prisms" if isinstance(obj, Structure)
                else type(obj).__name__)
        rows.append(("input", f"{self.source or '(in memory)'}: {what}"))
        if "grid_shape" in s:
            rows.append(("phase grid", f"{' x '.join(map(str, s['grid_shape']))} voxels of "
                                       f"{s['voxel_size_nm']:.4g} nm"))
        for name, res in self._run.results.items():
            rows.append((name, _short(res)))
        return rows

    def __repr__(self) -> str:
        lines = ["Measurement"] + [f"  {k}: {v}" for k, v in self._headline()]
        return "\n".join(lines[:20])

    def _repr_html_(self) -> str:
        body = "".join(f"<tr><th style='text-align:left'>{html.escape(k)}</th>"
                       f"<td style='text-align:left'>{html.escape(v)}</td></tr>"
                       for k, v in self._headline())
        return f"<table><caption>sheetview measurement</caption>{body}</table>"


def _short(res, width: int = 100) -> str:
    text = repr(res).replace("\n", " ")
    return text if len(text) <= width else text[:width - 1] + "…"


def measure(obj, only=None, settings=None, *, progress=None, at_progress=None, at_time=None,
            read_options=None, **kw) -> Measurement:
    """Measure a structure: every measure that applies (or those named in ``only``).

    Parameters
    ----------
    obj : a path (any format sheetview reads), a Structure, a SurfaceBody or a PhaseGrid
    only : measure names, ``"stacking,phases"`` or a list; ``"default"`` stands for the
        default selection (see ``sheetview.app.registry``)
    settings : a :class:`~sheetview.app.settings.Settings` (or a dict); keyword arguments
        (``voxel=0.2``, ``pore_split="5,20"``...) update it
    progress : ``progress(stage, done, seconds=None)``, told when each stage starts and ends
    at_progress, at_time : measure the structure as it stood at that moment of its growth
    read_options : dict of reading options when ``obj`` is a path (``thickness``,
        ``voxel_size``...)

    Returns
    -------
    Measurement

    Raises
    ------
    OptionError
        An unknown setting or measure name, or a value out of range (a ``ValueError``
        naming the parameter).
    """
    s = Settings.of(settings, **kw)
    source = None
    if isinstance(obj, (str, Path)):
        source = str(obj)
        obj = load(obj, **(read_options or {}))
    elif not isinstance(obj, (Structure, SurfaceBody, ParticleSet, PhaseGrid)):
        raise OptionError(f"expected a path, Structure, SurfaceBody or PhaseGrid, got "
                          f"{type(obj).__name__}", param="obj")
    else:
        source = getattr(obj, "source", None)
    obj, moment = at_moment(obj, at_progress, at_time)
    run = Run(obj, s, progress).run(select(only, obj))
    return Measurement(run, source, moment)


class Comparison:
    """Several structures side by side (:func:`compare_structures`).

    ``table``: the headline numbers, one column per structure, with the difference and
    the ratio of each to the first (a :class:`pandas.DataFrame` indexed by quantity);
    ``curves``: curve name -> structure label -> ``{"x", "y"}``; ``measured``: the fits
    to measured curves; ``settings_differ``: settings that differ between the structures
    (empty when every number has the same definition). :meth:`figure` draws the curves on
    shared axes, :meth:`write` writes a comparison folder.
    """

    def __init__(self, result: SideBySide):
        self._r = result

    @property
    def labels(self) -> list[str]:
        return self._r.labels

    @property
    def curves(self) -> dict:
        return self._r.curves

    @property
    def measured(self) -> dict:
        return self._r.measured

    @property
    def settings_differ(self) -> dict:
        return self._r.settings_differ

    @property
    def profiles(self) -> list:
        return list(self._r.profiles)

    @property
    def table(self):
        import pandas as pd  # heavy optional library, imported when asked for
        cols = self._r.table_columns()
        df = pd.DataFrame(cols)
        return df.set_index("key") if "key" in df else df

    def to_dict(self) -> dict:
        return self._r.to_dict()

    def figure(self):
        """The curves of every structure on shared axes (a matplotlib Figure)."""
        return plot_side_by_side(self._r)

    def write(self, folder, *, force: bool = False, plots: bool = True,
              protect=()) -> list[Path]:
        """Write a comparison folder: ``comparison.json`` (:meth:`to_dict`),
        ``headline.csv``, one ``curve_NAME.csv`` per curve (columns structure, x, y; units
        in ``comparison.json``), ``side_by_side.png``. Assembled beside ``folder`` and
        renamed into place when complete; the inputs are never replaced."""
        return write_comparison(folder, self._r, force=force, plots=plots,
                                protect=list(protect) + [p.source for p in self._r.profiles
                                                         if p.source])

    def __repr__(self) -> str:
        lines = [f"Comparison of {', '.join(self.labels)} (reference {self.labels[0]})"]
        for r in self._r.rows[:16]:
            vals = "  ".join(_num(r.get(lab)) for lab in self.labels)
            lines.append(f"  {r['quantity']} [{r['unit']}]: {vals}")
        if self.settings_differ:
            lines.append(f"  settings that differ: {', '.join(self.settings_differ)}")
        return "\n".join(lines[:20])

    def _repr_html_(self) -> str:
        head = "".join(f"<th>{html.escape(x)}</th>" for x in ["quantity", "unit", *self.labels])
        body = "".join("<tr>" + "".join(
            f"<td>{html.escape(x)}</td>" for x in [r["quantity"], r["unit"],
                                                  *(_num(r.get(lab)) for lab in self.labels)])
            + "</tr>" for r in self._r.rows)
        return f"<table><caption>sheetview comparison</caption><tr>{head}</tr>{body}</table>"


def _num(v) -> str:
    return "–" if v is None else (f"{v:.4g}" if isinstance(v, float) else str(v))


def compare_structures(inputs, labels=None, only=None, settings=None, *, measured_scattering=None,
                       measured_t2=None, q_unit=None, t2_unit=None, progress=None,
                       read_options=None, **kw) -> Comparison:
    """Put two or more structures through the same definitions and compare them.

    Parameters
    ----------
    inputs : paths of structures (any format sheetview reads; measured here), report
        folders written by ``sheetview measure -o`` (read), or Structure / SurfaceBody /
        PhaseGrid objects
    labels : one name per input (a list or ``"a,b"``); default the file names
    only : measures to run on structures measured here (default: the default set plus
        scattering and relaxation, whose curves are overlaid)
    settings, **kw : as for :func:`measure`; the same for every structure. Without a voxel,
        the first input's voxel is used for all, so that grid measures share one definition
    measured_scattering, measured_t2 : files of measured curves to fit every structure to
        (as ``sheetview scatter --compare`` / ``relax --compare``); ``q_unit``, ``t2_unit``
        their x units when the header does not say

    Returns
    -------
    Comparison
    """
    s = Settings.of(settings, **kw)
    profiles = profiles_of(inputs, labels=labels, only=only, settings=s, progress=progress,
                           read_options=read_options)
    return Comparison(side_by_side(profiles, measured_scattering=measured_scattering,
                                   measured_t2=measured_t2, q_unit=q_unit, t2_unit=t2_unit))
