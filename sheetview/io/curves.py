"""Experimental curves: scattering curves (q, I[, error]) and T2 distributions (T2,
amplitude) as written by instruments and analysis programs.

:func:`read_experimental` reads two or three numeric columns (comma, semicolon, tab or
whitespace separated) under an optional header whose labels name the columns and their
units (q in nm^-1 or Å^-1; T2 in s, ms or µs), and returns them in sheetview units.
Scattering curves are also read from the two canSAS 1D formats: canSAS XML (``.xml``,
SASroot/SASentry/SASdata/Idata with Q, I, Idev and their ``unit`` attributes) and NXcanSAS
HDF5 (``.h5``, ``.hdf5``, ``.nxs``: the NXdata group of a NXcanSAS entry, its ``signal``
I, the ``I_axes`` Q, the ``uncertainties`` of I, ``units`` attributes), read with h5py.
"""
from __future__ import annotations

import re
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..errors import InputError, OptionError
from .safety import check_input_file, check_read_memory

# unit spellings found in header labels -> factor to nm^-1 (scattering) or to s (T2)
_Q_UNITS = [  # checked in order; Å before nm so "1/A" inside "nm" labels cannot clash
    (re.compile(r"(1\s*/\s*(a|å|angstrom)\b|(a|å|angstrom)\s*\^?\s*(-1|⁻¹)|q_a\b|inv_?a\b)", re.I),
     10.0, "Å^-1"),
    (re.compile(r"(1\s*/\s*nm\b|nm\s*\^?\s*(-1|⁻¹)|q_nm\b|inv_?nm\b)", re.I), 1.0, "nm^-1"),
]
_T_UNITS = [
    (re.compile(r"(\bms\b|_ms\b|\(ms\)|\[ms\]|millisecond)", re.I), 1e-3, "ms"),
    (re.compile(r"(\bus\b|_us\b|µs|μs|\(us\)|\[us\]|microsecond)", re.I), 1e-6, "µs"),
    (re.compile(r"(\(s\)|\[s\]|_s\b|\bsec\b|\bseconds?\b|\bs\b)", re.I), 1.0, "s"),
]
_UNIT_OPTION_Q = {"nm": (1.0, "nm^-1"), "nm-1": (1.0, "nm^-1"), "1/nm": (1.0, "nm^-1"),
                  "a": (10.0, "Å^-1"), "a-1": (10.0, "Å^-1"), "1/a": (10.0, "Å^-1"),
                  "angstrom": (10.0, "Å^-1")}
_UNIT_OPTION_T = {"s": (1.0, "s"), "ms": (1e-3, "ms"), "us": (1e-6, "µs")}


@dataclass
class ExperimentalCurve:
    """An experimental curve in sheetview units: ``x`` is q (nm⁻¹) or T2 (s)."""

    x: np.ndarray
    y: np.ndarray
    sigma: np.ndarray | None
    unit_found: str
    unit_source: str
    warnings: list = field(default_factory=list)
    format: str = "columns"


def _is_number(tok: str) -> bool:
    try:
        float(tok)
        return True
    except ValueError:
        return False


def _split(line: str, delim):
    return [t.strip() for t in (line.split(delim) if delim else line.split())]


def read_experimental(path, kind: str = "scattering", unit: str | None = None,
                      columns: str | None = None) -> ExperimentalCurve:
    """Read an experimental scattering curve (q, I[, σ]) or T2 distribution (T2, amplitude).

    Parameters
    ----------
    path : file name
    kind : 'scattering' or 't2'
    unit : the x unit when the header does not say: 'nm' / 'A' for q (nm⁻¹, Å⁻¹);
        's' / 'ms' / 'us' for T2. A unit given here overrides the header.
    columns : 'X,Y' or 'X,Y,SIGMA', 1-based column numbers or header names; default:
        columns named like q/T2, I/amplitude, error/sigma, else the first two (three).

    Rules: blank lines and lines starting with '#' are skipped, except that the last
    non-numeric line before the data is read as the header (a leading '#' removed).
    Rows with a non-positive or non-finite intensity are dropped with a warning; rows
    out of x order are sorted with a warning. Anything else (a non-numeric row in the
    data, fewer than 3 rows, no unit found) is refused with an InputError naming the file.
    """
    p = check_input_file(path, missing="cannot read: no such file")
    size = p.stat().st_size
    # Python floats of each row: about 40 bytes per character of the text at worst
    check_read_memory(size * CURVE_READ_FACTOR, f"{size:,} bytes of text", p)
    from . import guarded
    suffix = p.suffix.lower()
    if suffix in CANSAS_XML_SUFFIXES or suffix in NXCANSAS_SUFFIXES:
        if kind != "scattering":
            raise InputError(f"a canSAS file ({suffix}) holds a scattering curve, not a T2 "
                             f"distribution", path=p)
        if columns is not None:
            raise OptionError("applies to text columns; a canSAS file names its Q, I and "
                              "Idev itself", path=p, param="columns")
        reader = _read_cansas_xml if suffix in CANSAS_XML_SUFFIXES else _read_nxcansas
        return guarded(reader, p, unit)
    return guarded(_read, p, kind, unit, columns)


#: Peak bytes per byte of a curve file while it is parsed (the text, its lines, the rows as
#: Python floats, the arrays).
CURVE_READ_FACTOR = 48


def _read(p: Path, kind, unit, columns) -> ExperimentalCurve:
    try:
        text = p.read_text(encoding="utf-8-sig", errors="replace")
    except OSError as e:
        raise InputError(f"cannot read: {e.strerror}", path=p) from None
    lines = text.splitlines()
    header, header_line, rows, delim = None, None, [], None
    first_data = None
    for ln, raw in enumerate(lines, 1):
        s = raw.strip()
        if not s:
            continue
        if first_data is None:
            d = "," if "," in s else ";" if ";" in s else "\t" if "\t" in s else None
            toks = _split(s.lstrip("#"), d)
            if not s.startswith("#") and all(_is_number(t) for t in toks if t != "") and toks:
                first_data, delim = ln, d
            else:
                header, header_line = s.lstrip("#").strip(), ln
                continue
        if s.startswith("#"):
            continue
        toks = [t for t in _split(s, delim) if t != ""]
        try:
            rows.append([float(t) for t in toks])
        except ValueError:
            raise InputError(f"non-numeric value in a data row: {s[:60]!r}", path=p,
                             line=ln) from None
        if len(rows[-1]) != len(rows[0]):
            raise InputError(f"expected {len(rows[0])} columns like the first data row, found "
                             f"{len(rows[-1])}", path=p, line=ln)
    if len(rows) < 3:
        raise InputError("fewer than 3 data rows (expected columns of numbers: "
                         + ("q, I[, error])" if kind == "scattering" else "T2, amplitude)"),
                         path=p)
    data = np.asarray(rows, dtype=float)
    ncol = data.shape[1]
    if ncol < 2:
        raise InputError("expected at least two columns", path=p)
    names = _split(header, delim) if header is not None else []
    names = [n for n in names if n != ""]
    if len(names) != ncol:
        names = []  # labels cannot be matched to columns; units still read from the text
    ix, iy, ie = _pick_columns(names, ncol, columns, kind, p)
    # unit
    if unit is not None:
        table = _UNIT_OPTION_Q if kind == "scattering" else _UNIT_OPTION_T
        key = str(unit).strip().lower().replace("å", "a").replace("^", "")
        if key not in table:
            raise OptionError(f"unknown unit {unit!r}; expected one of {sorted(table)}",
                              path=p, field="unit")
        factor, uname = table[key]
        usrc = "option"
    else:
        label = names[ix] if names else (header or "")
        factor, uname = _detect_unit(label, kind)
        if factor is None and names:
            factor, uname = _detect_unit(header, kind)
        if factor is None:
            what = ("q unit (nm^-1 or A^-1; a header label such as 'q (1/A)' or 'q_nm-1', "
                    "or the unit option)") if kind == "scattering" else \
                   ("T2 unit (s, ms or us; a header label such as 'T2 (ms)', or the unit option)")
            raise InputError(f"cannot tell the {what}", path=p, line=header_line)
        usrc = f"header {header!r}"
    x = data[:, ix] * factor
    y = data[:, iy]
    sg = data[:, ie] if ie is not None else None
    warns = []
    bad = ~np.isfinite(x) | ~np.isfinite(y) | (x <= 0)
    if bad.any():
        raise InputError(f"{int(bad.sum())} rows with a non-finite value or a non-positive "
                         f"{'q' if kind == 'scattering' else 'T2'}", path=p)
    if kind == "scattering":
        drop = y <= 0
        if sg is not None:
            drop |= ~(sg > 0)
        if drop.any():
            warns.append(f"{p}: dropped {int(drop.sum())} rows with zero or negative intensity "
                         f"(or uncertainty)")
            x, y = x[~drop], y[~drop]
            sg = sg[~drop] if sg is not None else None
    else:
        if np.any(y < 0):
            warns.append(f"{p}: {int((y < 0).sum())} negative amplitudes set to 0")
            y = np.maximum(y, 0)
    if np.any(np.diff(x) < 0):
        o = np.argsort(x, kind="stable")
        x, y = x[o], y[o]
        sg = sg[o] if sg is not None else None
        warns.append(f"{p}: {'q' if kind == 'scattering' else 'T2'} values were not in increasing "
                     f"order; sorted")
    if x.size < 3:
        raise InputError("fewer than 3 usable rows after dropping non-positive intensities",
                         path=p)
    return ExperimentalCurve(x, y, sg, uname, usrc, warns)


def _detect_unit(label, kind):
    if not label:
        return None, None
    lab = label.replace("Å", "A")
    for rx, f, name in (_Q_UNITS if kind == "scattering" else _T_UNITS):
        if rx.search(lab):
            return f, name
    return None, None


def _pick_columns(names, ncol, columns, kind, p):
    low = [n.lower() for n in names]
    if columns is not None:
        parts = [c.strip() for c in str(columns).split(",")]
        if len(parts) not in (2, 3):
            raise OptionError(f"columns: expected X,Y or X,Y,ERROR, got {columns!r}", path=p)
        idx = []
        for c in parts:
            if c.isdigit():
                i = int(c) - 1
            elif c.lower() in low:
                i = low.index(c.lower())
            else:
                raise OptionError(f"columns: no column {c!r} (header: {names})", path=p)
            if not 0 <= i < ncol:
                raise OptionError(f"columns: column {c} out of range 1-{ncol}", path=p)
            idx.append(i)
        return idx[0], idx[1], (idx[2] if len(idx) == 3 else None)

    def find(pred):
        for i, n in enumerate(low):
            if pred(n):
                return i
        return None
    if names:
        if kind == "scattering":
            ix = find(lambda n: n.startswith("q"))
            ie = find(lambda n: any(k in n for k in ("err", "sigma", "unc", "std")) or
                      n.startswith("di") or n.startswith("d_i"))
            iy = find(lambda n: (n.startswith("i") or "intens" in n) and not n.startswith("id"))
        else:
            ix = find(lambda n: n.startswith("t2") or n.startswith("t_2") or n.startswith("time")
                      or n.startswith("t "))
            iy = find(lambda n: any(k in n for k in ("amp", "signal", "fraction", "intens",
                                                     "density", "f(", "p(")))
            ie = None
        if ix is not None and iy is not None and ix != iy:
            return ix, iy, ie
    return 0, 1, (2 if (kind == "scattering" and ncol >= 3) else None)


# ============================================================== commands


# ----------------------------------------------------------------------------- canSAS
CANSAS_XML_SUFFIXES = {".xml"}
NXCANSAS_SUFFIXES = {".h5", ".hdf5", ".hdf", ".nxs"}

#: canSAS / NeXus spellings of the q unit -> factor to nm^-1 and the name shown.
_CANSAS_Q_UNITS = {"1/a": (10.0, "Å^-1"), "a^-1": (10.0, "Å^-1"), "1/angstrom": (10.0, "Å^-1"),
                   "angstrom^-1": (10.0, "Å^-1"), "1/å": (10.0, "Å^-1"), "å^-1": (10.0, "Å^-1"),
                   "1/nm": (1.0, "nm^-1"), "nm^-1": (1.0, "nm^-1"), "1/m": (1e-9, "m^-1")}
#: Intensity units -> factor to cm^-1 (absolute scale); others are relative.
_CANSAS_I_UNITS = {"1/cm": 1.0, "cm^-1": 1.0, "1/m": 0.01, "m^-1": 0.01}


def _unit_key(u) -> str:
    if isinstance(u, bytes):
        u = u.decode("utf-8", "replace")
    return str(u or "").strip().lower().replace(" ", "").replace("**", "^")


def _q_factor(file_unit, option_unit, p):
    """(factor to nm^-1, unit name, where it came from) of the q unit: the option when
    given, else the file's ``unit``/``units`` attribute."""
    if option_unit is not None:
        key = str(option_unit).strip().lower().replace("å", "a").replace("^", "")
        if key not in _UNIT_OPTION_Q:
            raise OptionError(f"unknown unit {option_unit!r}; expected one of "
                              f"{sorted(_UNIT_OPTION_Q)}", path=p, field="unit")
        f, name = _UNIT_OPTION_Q[key]
        return f, name, "option"
    key = _unit_key(file_unit)
    if key in _CANSAS_Q_UNITS:
        f, name = _CANSAS_Q_UNITS[key]
        return f, name, "file"
    raise InputError(f"cannot tell the q unit (the file gives {file_unit!r}; expected 1/A or "
                     f"1/nm, or give the unit option)", path=p)


def _cansas_curve(p, q, i, dev, q_unit, i_unit, option_unit, fmt) -> ExperimentalCurve:
    """The checked curve of a canSAS file (same rules as the text columns)."""
    q, i = np.asarray(q, float).ravel(), np.asarray(i, float).ravel()
    if q.shape != i.shape:
        raise InputError(f"Q and I differ in length ({q.size} and {i.size})", path=p)
    if dev is not None:
        dev = np.asarray(dev, float).ravel()
        if dev.shape != i.shape:
            raise InputError(f"the uncertainties of I differ in length from I ({dev.size} and "
                             f"{i.size})", path=p)
    f, uname, usrc = _q_factor(q_unit, option_unit, p)
    warns = []
    ikey = _unit_key(i_unit)
    if ikey in _CANSAS_I_UNITS:
        i = i * _CANSAS_I_UNITS[ikey]
        dev = dev * _CANSAS_I_UNITS[ikey] if dev is not None else None
    else:
        warns.append(f"{p}: intensity unit {i_unit!r} is not an absolute scale (1/cm); the "
                     f"fitted scale factor absorbs it")
    x = q * f
    bad = ~np.isfinite(x) | ~np.isfinite(i) | (x <= 0)
    if bad.any():
        raise InputError(f"{int(bad.sum())} points with a non-finite value or a non-positive q",
                         path=p)
    drop = i <= 0
    if dev is not None:
        drop |= ~(dev > 0)
    if drop.any():
        warns.append(f"{p}: dropped {int(drop.sum())} points with zero or negative intensity "
                     f"(or uncertainty)")
        x, i = x[~drop], i[~drop]
        dev = dev[~drop] if dev is not None else None
    if np.any(np.diff(x) < 0):
        o = np.argsort(x, kind="stable")
        x, i = x[o], i[o]
        dev = dev[o] if dev is not None else None
        warns.append(f"{p}: q values were not in increasing order; sorted")
    if x.size < 3:
        raise InputError("fewer than 3 usable points", path=p)
    return ExperimentalCurve(x, i, dev, uname, f"{fmt} {usrc}", warns, fmt)


def _local(tag: str) -> str:
    return tag.rsplit("}", 1)[-1]


def _read_cansas_xml(p: Path, unit) -> ExperimentalCurve:
    """canSAS 1D XML (SASroot v1.0/1.1): the first SASdata of the first SASentry, its Idata
    points' Q, I and Idev with their ``unit`` attributes. Documents with a DTD or entity
    declarations are refused (no entity expansion)."""
    import xml.etree.ElementTree as ET

    raw = p.read_bytes()
    if b"<!DOCTYPE" in raw or b"<!ENTITY" in raw:
        raise InputError("an XML document with a DOCTYPE or entity declarations is not read",
                         path=p)
    try:
        root = ET.fromstring(raw)
    except ET.ParseError as e:
        raise InputError(f"cannot be read as XML: {e}", path=p) from None
    if _local(root.tag) != "SASroot":
        raise InputError(f"not a canSAS XML file (root element {_local(root.tag)!r}, expected "
                         f"'SASroot')", path=p)
    datas = [el for el in root.iter() if _local(el.tag) == "SASdata"]
    if not datas:
        raise InputError("no SASdata in the file", path=p)
    q, i, dev = [], [], []
    units = {}
    for pt in (el for el in datas[0] if _local(el.tag) == "Idata"):
        vals = {}
        for el in pt:
            name = _local(el.tag)
            if name in ("Q", "I", "Idev"):
                try:
                    vals[name] = float((el.text or "").strip())
                except ValueError:
                    raise InputError(f"Idata {name} is not a number: {(el.text or '')[:30]!r}",
                                     path=p) from None
                units.setdefault(name, el.get("unit"))
        if "Q" not in vals or "I" not in vals:
            raise InputError("an Idata point without Q or I", path=p)
        q.append(vals["Q"])
        i.append(vals["I"])
        dev.append(vals.get("Idev", np.nan))
    if not q:
        raise InputError("the SASdata holds no Idata points", path=p)
    d = np.asarray(dev, float)
    d = None if np.all(np.isnan(d)) else d
    c = _cansas_curve(p, q, i, d, units.get("Q"), units.get("I"), unit, "canSAS XML")
    if len(datas) > 1:
        c.warnings.append(f"{p}: {len(datas)} SASdata blocks; the first is used")
    return c


def _attr(obj, name, default=None):
    v = obj.attrs.get(name, default)
    if isinstance(v, bytes):
        return v.decode("utf-8", "replace")
    if isinstance(v, np.ndarray) and v.size == 1:
        v = v.ravel()[0]
        return v.decode("utf-8", "replace") if isinstance(v, bytes) else v
    return v


def _read_nxcansas(p: Path, unit) -> ExperimentalCurve:
    """NXcanSAS (HDF5): the first NXdata (canSAS_class SASdata) group inside an NXentry
    whose ``definition`` is NXcanSAS; its ``signal`` (I), first ``I_axes`` (Q), the
    ``uncertainties`` of I, and their ``units`` attributes."""
    try:
        import h5py
    except ImportError:
        raise InputError("reading NXcanSAS (HDF5) needs the h5py package "
                         "(pip install h5py)", path=p) from None
    try:
        fh = h5py.File(p, "r")
    except OSError as e:
        raise InputError(f"cannot be read as HDF5: {e}", path=p) from None
    with fh:
        found = []

        def visit(name, obj):
            if isinstance(obj, h5py.Group) and (_attr(obj, "NX_class") == "NXdata" or
                                                _attr(obj, "canSAS_class") == "SASdata"):
                found.append(name)
        fh.visititems(visit)
        if not found:
            raise InputError("no NXdata / SASdata group (not an NXcanSAS file)", path=p)
        g = fh[found[0]]
        sig = _attr(g, "signal", "I")
        axes = _attr(g, "I_axes", "Q")
        if isinstance(axes, (list, tuple, np.ndarray)):
            axes = axes[0]
        axes = str(axes).split(",")[0].strip()
        if sig not in g or axes not in g:
            raise InputError(f"the group {found[0]!r} lacks its signal {sig!r} or axis {axes!r}",
                             path=p)
        ids, qds = g[sig], g[axes]
        for d in (ids, qds):
            if d.size > 50_000_000:
                raise InputError(f"{d.name} holds {d.size:,} values: not a 1D curve", path=p)
        i = np.asarray(ids[()], float)
        q = np.asarray(qds[()], float)
        if i.ndim != 1 or q.ndim != 1:
            raise InputError(f"expected a 1D curve, found I of shape {i.shape} and Q of shape "
                             f"{q.shape}", path=p)
        dname = _attr(ids, "uncertainties")
        dev = np.asarray(g[dname][()], float) if dname and dname in g else None
        c = _cansas_curve(p, q, i, dev, _attr(qds, "units"), _attr(ids, "units"), unit,
                          "NXcanSAS")
        if len(found) > 1:
            c.warnings.append(f"{p}: {len(found)} data groups; the first ({found[0]}) is used")
        return c
