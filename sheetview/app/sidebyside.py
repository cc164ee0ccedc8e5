"""Several structures through the same definitions, side by side.

A *profile* is what one structure's measure run left: its summary document and its tables
(the CSV tables of a report folder). Profiles come from a structure measured here (every
structure with the same settings and the same voxel) or from a report folder written
earlier by ``sheetview measure -o``. :func:`side_by_side` puts them together:

* a table of the headline numbers (:data:`HEADLINE`: label, unit), one column per structure,
  with the difference and the ratio of each to the first (the reference);
* the curves of each structure on shared axes (:data:`CURVES`): stacking histogram, pore-size
  distribution, chord-length distributions of solid and pore, two-point correlation,
  scattering curve, T2 spectrum;
* optionally a measured scattering curve and a measured T2 distribution, fitted to every
  structure with the same fits as ``sheetview scatter --compare`` and ``relax --compare``;
* the settings that differ between profiles (a comparison across other definitions is
  reported, never hidden).

The figure is drawn by :func:`sheetview.overlay.plot_side_by_side`.
"""
from __future__ import annotations

import csv
import json
import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..errors import InputError, OptionError
from ..io.curves import read_experimental
from ..measures.relaxation import compare_t2
from ..measures.scattering import compare_curve
from .document import document, flatten
from .load import load
from .registry import applicable, check_inputs, select
from .run import Run
from .settings import Settings

#: Headline quantities: dotted summary key -> (label, unit). A key ending in ``.*`` stands
#: for every scalar under it (``volume_fractions.*``: one row per phase class).
HEADLINE = {
    "n_prisms": ("prisms", "count"),
    "voxel_size_nm": ("voxel edge of the phase grid", "nm"),
    "stacking.mean": ("mean stacking number, over prisms", "layers"),
    "stacking.mean_stack": ("mean stacking number, over stacks", "layers"),
    "stacking.n_stacks": ("stacks", "count"),
    "order.S": ("orientational order parameter S", "1"),
    "order.local.mean": ("local order parameter, mean", "1"),
    "order.wall": ("wall order <P2(n.w)>", "1"),
    "volume_fractions.*": ("volume fraction of the domain", "1"),
    "specific_surface_nm-1": ("solid surface per domain volume", "nm^-1"),
    "specific_surface_m2_per_g": ("specific surface (per mass of C-S-H)", "m^2/g"),
    "pore_size.d10_nm": ("gel pore size d10 (local thickness)", "nm"),
    "pore_size.d50_nm": ("gel pore size d50 (local thickness)", "nm"),
    "pore_size.d90_nm": ("gel pore size d90 (local thickness)", "nm"),
    "chords.solid_mean_nm": ("mean solid chord", "nm"),
    "chords.pore_mean_nm": ("mean pore chord", "nm"),
    "chords.cauchy_pore_4v_over_s_nm": ("pore 4V/S (Cauchy)", "nm"),
    "correlation.s2_solid.phi": ("S2(0): solid fraction", "1"),
    "correlation.s2_solid.specific_surface_per_nm": ("S/V from the S2 slope", "nm^-1"),
    "scattering.features.porod.s_over_v_nm-1": ("Porod S/V", "nm^-1"),
    "scattering.features.slope_low_q.slope": ("scattering slope, low q", "1"),
    "scattering.features.slope_high_q.slope": ("scattering slope, high q", "1"),
    "scattering.features.guinier.rg_nm": ("Guinier radius", "nm"),
    "relaxation.t2_logmean_ms": ("T2, logarithmic mean", "ms"),
    "relaxation.class_fraction.*": ("water fraction", "1"),
}

#: Curves drawn on shared axes: name -> (title, x label, y label, x scale, y scale).
CURVES = {
    "stacking": ("Stacking numbers", "stacking number (layers)", "fraction of prisms",
                 "linear", "linear"),
    "pore_sizes": ("Pore sizes (local thickness)", "pore diameter d (nm)",
                   "dV/dlog10 d (pore volume)", "log", "linear"),
    "chords_solid": ("Solid chords", "chord length (nm)", "probability density (nm^-1)",
                     "linear", "linear"),
    "chords_pore": ("Pore chords", "chord length (nm)", "probability density (nm^-1)",
                    "linear", "linear"),
    "s2": ("Two-point correlation of the solid", "r (nm)", "S2(r)", "linear", "linear"),
    "scattering": ("Scattering", "q (nm^-1)", "I(q) (cm^-1)", "log", "log"),
    "t2": ("NMR T2 (fast exchange)", "T2 (ms)", "fraction per log10 T2", "log", "linear"),
}

#: Settings left out of the list of differing settings: those that decide no number, and
#: the voxel setting (the voxel actually used, ``voxel_size_nm``, is compared instead).
_NO_NUMBER = ("max_memory", "voxel")
#: Number of bins of the chord-length histograms (shared by all profiles).
CHORD_BINS = 40


@dataclass
class Profile:
    """One structure's measured state: ``summary`` (the summary document), ``tables`` (CSV
    table stem -> column -> values) and, when measured here, the live ``results``."""

    label: str
    source: str | None
    summary: dict
    tables: dict
    results: dict = field(default_factory=dict)

    def value(self, key: str):
        """The scalar at a dotted summary key, or None."""
        return flatten(self.summary).get(key)


def profile_of_run(run, label: str, source=None) -> Profile:
    """The profile of a finished :class:`~sheetview.app.run.Run`."""
    doc = document(run, timings=False)
    if source is not None:
        doc = {"file": str(source), **doc}
    tables: dict = {}
    for res in run.results.values():
        for stem, cols in (res.tables() if hasattr(res, "tables") else {}).items():
            tables.setdefault(stem, {}).update(cols)
    return Profile(label, None if source is None else str(source), doc, tables,
                   dict(run.results))


def is_report_folder(path) -> bool:
    p = Path(path)
    return p.is_dir() and (p / "summary.json").is_file()


def profile_of_folder(folder, label: str | None = None) -> Profile:
    """The profile of a report folder written by ``sheetview measure -o`` (its
    ``summary.json`` and CSV tables). Raises :class:`InputError` naming the file when the
    folder has no readable summary."""
    folder = Path(folder)
    path = folder / "summary.json"
    if not path.is_file():
        raise InputError("not a report folder: no summary.json in it", path=folder)
    try:
        doc = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, ValueError) as e:
        raise InputError(f"unreadable summary ({e})", path=path) from None
    if not isinstance(doc, dict) or "settings" not in doc or "measures" not in doc:
        raise InputError("not a sheetview summary (no 'settings' and 'measures')", path=path)
    tables = {}
    for f in sorted(folder.glob("*.csv")):
        tables[f.stem] = _read_csv(f)
    return Profile(label or folder.name, str(folder), doc, tables)


def _read_csv(path: Path) -> dict:
    try:
        with open(path, newline="", encoding="utf-8") as fh:
            rows = [r for r in csv.reader(fh) if r and not r[0].startswith("#")]
    except (OSError, UnicodeDecodeError, csv.Error) as e:
        raise InputError(f"unreadable table ({e})", path=path) from None
    if not rows:
        return {}
    head, body = rows[0], rows[1:]
    cols: dict = {h: [] for h in head}
    for r in body:
        for h, v in zip(head, r):
            cols[h].append(_num(v))
    return cols


def _num(v: str):
    try:
        return float(v) if v != "" else float("nan")
    except ValueError:
        return v


# ---------------------------------------------------------------------------- the table
def headline_table(profiles: list[Profile]) -> list[dict]:
    """Rows ``{key, quantity, unit, <label>: value..., 'difference <label>', 'ratio
    <label>'}`` of the headline numbers present in at least one profile; differences and
    ratios are of each profile against the first."""
    flats = [flatten(p.summary) for p in profiles]
    keys: list[str] = []
    for k in HEADLINE:
        if k.endswith(".*"):
            pre = k[:-1]
            for f in flats:
                keys += [x for x in f if x.startswith(pre) and x not in keys
                         and _is_number(f[x])]
        elif any(_is_number(f.get(k)) for f in flats):
            keys.append(k)
    rows = []
    ref = profiles[0].label
    for k in keys:
        base = k if k in HEADLINE else k.rsplit(".", 1)[0] + ".*"
        label, unit = HEADLINE[base]
        if base != k:
            label = f"{label}: {k.rsplit('.', 1)[1]}"
        row = {"key": k, "quantity": label, "unit": unit}
        vals = [f.get(k) if _is_number(f.get(k)) else None for f in flats]
        for p, v in zip(profiles, vals):
            row[p.label] = v
        for p, v in zip(profiles[1:], vals[1:]):
            a = vals[0]
            row[f"{p.label} - {ref}"] = (v - a) if (v is not None and a is not None) else None
            row[f"{p.label} / {ref}"] = (v / a if (v is not None and a not in (None, 0))
                                         else None)
        rows.append(row)
    return rows


def _is_number(v) -> bool:
    return isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(v)


def differing_settings(profiles: list[Profile]) -> dict:
    """Setting name -> {label: value} for the settings (and the voxel) that differ."""
    out = {}
    names = []
    for p in profiles:
        names += [n for n in (p.summary.get("settings") or {}) if n not in names]
    for n in names + ["voxel_size_nm"]:
        if n in _NO_NUMBER:
            continue
        if n == "voxel_size_nm":
            vals = {p.label: p.summary.get(n) for p in profiles}
            vs = [v for v in vals.values() if v is not None]
            # the grid fits the voxel to the domain's extent (a few 0.01 % apart): within
            # 1 % the voxels are the same definition
            same = all(math.isclose(v, vs[0], rel_tol=0.01) for v in vs) if vs else True
        else:
            vals = {p.label: (p.summary.get("settings") or {}).get(n) for p in profiles}
            vs = list(vals.values())
            if all(_is_number(v) for v in vs):
                same = all(math.isclose(v, vs[0], rel_tol=1e-9) for v in vs)
            else:
                same = len({json.dumps(v, sort_keys=True) for v in vs}) == 1
        if not same:
            out[n] = vals
    return out


# --------------------------------------------------------------------------- the curves
def curves_of(profiles: list[Profile]) -> dict:
    """Curve name -> {label: {"x": array, "y": array}} for every profile that has it."""
    out = {name: {} for name in CURVES}
    chords = {ph: [_chord_lengths(p, ph) for p in profiles] for ph in ("solid", "pore")}
    for ph, lists in chords.items():
        allv = np.concatenate([v for v in lists if v is not None and v.size] or [np.zeros(0)])
        if allv.size:
            hi = float(np.quantile(allv, 0.99)) or float(allv.max())
            edges = np.linspace(0.0, hi, CHORD_BINS + 1)
            for p, v in zip(profiles, lists):
                if v is not None and v.size:
                    h, _ = np.histogram(v, bins=edges, density=True)
                    out[f"chords_{ph}"][p.label] = {"x": 0.5 * (edges[1:] + edges[:-1]), "y": h}
    for p in profiles:
        for name, fn in (("stacking", _stacking), ("pore_sizes", _pore_sizes), ("s2", _s2),
                         ("scattering", _scattering), ("t2", _t2)):
            c = fn(p)
            if c is not None:
                out[name][p.label] = c
    return out


def _col(p: Profile, stem: str, *names):
    t = p.tables.get(stem)
    if not t:
        return None
    for n in names:
        if n in t:
            return np.asarray(t[n], float)
    return None


def _stacking(p: Profile):
    hist = (p.summary.get("stacking") or {}).get("histogram")
    if not hist:
        return None
    x = np.array([int(k) for k in hist], float)
    y = np.array(list(hist.values()), float)
    o = np.argsort(x)
    return {"x": x[o], "y": y[o] / y.sum()}


def _pore_sizes(p: Profile):
    lo = _col(p, "pore_sizes_local_thickness", "d_lower_nm")
    hi = _col(p, "pore_sizes_local_thickness", "d_upper_nm")
    f = _col(p, "pore_sizes_local_thickness", "volume_fraction")
    if lo is None or hi is None or f is None or lo.size == 0:
        return None
    return {"x": np.sqrt(lo * hi), "y": f / np.log10(hi / lo)}


def _chord_lengths(p: Profile, phase: str):
    ln = _col(p, f"chords_{phase}", "length_nm")
    if ln is None:
        return None
    cut = _col(p, f"chords_{phase}", "cut")
    return ln[cut == 0] if cut is not None else ln


def _s2(p: Profile):
    r = _col(p, "s2_solid", "r_nm")
    s = _col(p, "s2_solid", "s2")
    return None if r is None or s is None else {"x": r, "y": s}


class _Curve:
    """A scattering curve read back from a table (what :func:`compare_curve` needs)."""

    def __init__(self, q, intensity, q_valid):
        self.q, self.intensity, self.q_valid = q, intensity, tuple(q_valid)

    def valid(self):
        lo, hi = self.q_valid
        return ((self.q >= lo) & (self.q <= hi) & np.isfinite(self.intensity)
                & (self.intensity > 0))


def _scattering_curve(p: Profile):
    res = p.results.get("scattering")
    if res is not None:
        return res.curve
    q = _col(p, "scattering", "q_nm-1")
    i = _col(p, "scattering", "intensity_cm-1")
    qv = (p.summary.get("scattering") or {}).get("q_valid_nm-1")
    if q is None or i is None or not qv:
        return None
    return _Curve(q, i, qv)


def _scattering(p: Profile):
    c = _scattering_curve(p)
    if c is None:
        return None
    v = c.valid()
    return {"x": np.asarray(c.q)[v], "y": np.asarray(c.intensity)[v]}


class _Spectrum:
    """A T2 distribution read back from a table (what :func:`compare_t2` needs)."""

    def __init__(self, t2, fraction):
        self.t2 = t2
        lt = np.log(t2)
        mid = 0.5 * (lt[1:] + lt[:-1])
        first = lt[0] - (mid[0] - lt[0]) if lt.size > 1 else lt[0] - 0.05
        last = lt[-1] + (lt[-1] - mid[-1]) if lt.size > 1 else lt[0] + 0.05
        self.edges = np.exp(np.concatenate([[first], mid, [last]]))
        self.total = fraction

    def logmean(self) -> float:
        w = self.total
        return float(np.exp(np.sum(w * np.log(self.t2)) / w.sum())) if w.sum() > 0 else math.nan


def _t2_spectrum(p: Profile):
    res = p.results.get("relaxation")
    if res is not None:
        return res
    t = _col(p, "t2_distribution", "t2_s")
    f = _col(p, "t2_distribution", "fraction")
    return None if t is None or f is None or t.size == 0 else _Spectrum(t, f)


def _t2(p: Profile):
    s = _t2_spectrum(p)
    if s is None:
        return None
    width = np.diff(np.log10(s.edges))
    return {"x": np.asarray(s.t2) * 1e3, "y": np.asarray(s.total) / width}


# ------------------------------------------------------------------- the whole comparison
@dataclass
class SideBySide:
    """The comparison of several structures: see the module docstring.

    ``rows``: the headline table (:func:`headline_table`); ``curves``: name -> label ->
    {x, y}; ``measured``: the measured curves with the fit of each structure to them;
    ``settings_differ``: setting -> label -> value for settings that differ."""

    profiles: list
    rows: list
    curves: dict
    measured: dict
    settings_differ: dict

    @property
    def labels(self) -> list[str]:
        return [p.label for p in self.profiles]

    def to_dict(self) -> dict:
        def arr(c):
            return {k: np.asarray(v).tolist() for k, v in c.items()}
        return {"structures": [{"label": p.label, "source": p.source,
                                "input_kind": p.summary.get("input_kind"),
                                "measures": p.summary.get("measures")} for p in self.profiles],
                "reference": self.labels[0],
                "headline": self.rows,
                "settings_differ": self.settings_differ,
                "measured": {k: {"file": m["file"], "fits": m["fits"]}
                             for k, m in self.measured.items()},
                "note": ("differences are of the simulated structures under the same "
                         "definitions; they are not measurements of real material")}

    def table_columns(self) -> dict:
        """The headline table as CSV columns."""
        cols: dict = {}
        for r in self.rows:
            for k in r:
                cols.setdefault(k, [])
        for r in self.rows:
            for k in cols:
                cols[k].append(r.get(k))
        return cols

    def curve_columns(self, name: str) -> dict:
        """One curve of every structure as long-format CSV columns (structure, x, y)."""
        lab, xs, ys = [], [], []
        for label, c in self.curves.get(name, {}).items():
            lab += [label] * len(c["x"])
            xs += np.asarray(c["x"], float).tolist()
            ys += np.asarray(c["y"], float).tolist()
        return {"structure": lab, "x": xs, "y": ys}


def side_by_side(profiles: list[Profile], *, measured_scattering=None, measured_t2=None,
                 q_unit: str | None = None, t2_unit: str | None = None) -> SideBySide:
    """Compare profiles (at least two, labels unique). ``measured_scattering`` /
    ``measured_t2``: files of a measured scattering curve (q, I[, sigma]) and T2
    distribution (T2, amplitude), read as ``scatter --compare`` / ``relax --compare`` read
    them (``q_unit``, ``t2_unit`` when the header does not say), and fitted to every
    structure that has that curve with the same fits (scale and flat background; log-mean
    shift and overlap)."""
    if len(profiles) < 2:
        raise OptionError(f"a comparison needs at least two structures, got {len(profiles)}",
                          param="inputs")
    labels = [p.label for p in profiles]
    dup = sorted({x for x in labels if labels.count(x) > 1})
    if dup:
        raise OptionError(f"labels must differ; repeated: {', '.join(dup)}", param="labels")
    measured = {}
    if measured_scattering is not None:
        path = measured_scattering
        measured_scattering = read_experimental(path, "scattering", q_unit)
        measured_scattering.path = str(path)
        fits = {}
        for p in profiles:
            c = _scattering_curve(p)
            if c is None:
                continue
            cmp_ = compare_curve(_AsResult(c), measured_scattering.x, measured_scattering.y,
                                 measured_scattering.sigma, source=measured_scattering.path)
            fits[p.label] = cmp_.to_dict()
        measured["scattering"] = {"file": str(measured_scattering.path), "fits": fits,
                                  "x": measured_scattering.x, "y": measured_scattering.y,
                                  "sigma": measured_scattering.sigma}
    if measured_t2 is not None:
        path = measured_t2
        measured_t2 = read_experimental(path, "t2", t2_unit)
        measured_t2.path = str(path)
        fits = {}
        for p in profiles:
            s = _t2_spectrum(p)
            if s is None:
                continue
            fits[p.label] = compare_t2(s, measured_t2.x, measured_t2.y,
                                       source=measured_t2.path).to_dict()
        measured["t2"] = {"file": str(measured_t2.path), "fits": fits,
                          "x": measured_t2.x, "y": measured_t2.y}
    return SideBySide(list(profiles), headline_table(profiles), curves_of(profiles), measured,
                      differing_settings(profiles))


class _AsResult:
    """A scattering curve in the shape :func:`compare_curve` reads (``q``, ``intensity``,
    ``valid()``)."""

    def __init__(self, curve):
        self.q = np.asarray(curve.q, float)
        self.intensity = np.asarray(curve.intensity, float)
        self._valid = curve.valid()

    def valid(self):
        return self._valid


# ------------------------------------------------------------------- measuring the inputs
#: The measures of a comparison when none are named: the default set plus the predicted
#: scattering and T2 curves (they are overlaid).
DEFAULT_ONLY = "default,scattering,relaxation"


def profiles_of(inputs, *, labels=None, only=None, settings=None, progress=None,
                read_options=None) -> list[Profile]:
    """The profiles of ``inputs``: paths of structures (measured here), report folders
    (read), or in-memory Structure / SurfaceBody / PhaseGrid objects (measured here).

    Every structure measured here gets the same settings; when no voxel is set, the voxel of
    the first input (its own default, or the voxel of its report) is used for all the others,
    so that grid measures share one definition. ``labels``: one per input (default: the
    file stems, or ``structure 1``...). ``progress(stage, done, seconds=None)``: as for
    :func:`sheetview.measure`, with stages prefixed by the label."""
    inputs = list(inputs)
    if len(inputs) < 2:
        raise OptionError(f"a comparison needs at least two structures, got {len(inputs)}",
                          param="inputs")
    if labels is None:
        labels = [_label_of(x, i) for i, x in enumerate(inputs)]
    elif isinstance(labels, str):
        labels = [t.strip() for t in labels.split(",")]
    labels = [str(x) for x in labels]
    if len(labels) != len(inputs):
        raise OptionError(f"{len(labels)} labels for {len(inputs)} structures", param="labels")
    dup = sorted({x for x in labels if labels.count(x) > 1})
    if dup:
        raise OptionError(f"labels must differ; repeated: {', '.join(dup)} (give labels)",
                          param="labels")
    s = Settings.of(settings)
    profiles = []
    for x, lab in zip(inputs, labels):
        if isinstance(x, (str, Path)) and is_report_folder(x):
            prof = profile_of_folder(x, lab)
        else:
            source = str(x) if isinstance(x, (str, Path)) else getattr(x, "source", None)
            obj = load(x, **(read_options or {})) if isinstance(x, (str, Path)) else x
            sel = select(only or DEFAULT_ONLY, obj)
            if only is None:  # opt-in measures that cannot use this input are left out
                ok = set(applicable(obj, optional=True))
                sel = [n for n in sel if n in ok]
            check_inputs(sel, obj, source)
            tell = None if progress is None else _prefixed(progress, lab)
            run = Run(obj, s, tell).run(sel)
            prof = profile_of_run(run, lab, source)
        if s.voxel is None and prof.summary.get("voxel_size_nm"):
            s = Settings.of(s, voxel=float(prof.summary["voxel_size_nm"]))
        profiles.append(prof)
    return profiles


def _prefixed(progress, label):
    def tell(stage, done, seconds=None):
        progress(f"{label}: {stage}", done, seconds)
    return tell


def _label_of(x, i: int) -> str:
    if isinstance(x, (str, Path)):
        p = Path(x)
        return p.name if p.is_dir() else p.stem
    return getattr(x, "source", None) and Path(x.source).stem or f"structure {i + 1}"
