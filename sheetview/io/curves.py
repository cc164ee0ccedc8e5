"""Experimental curves: scattering curves (q, I[, error]) and T2 distributions (T2,
amplitude) as written by instruments and analysis programs.

:func:`read_experimental` reads two or three numeric columns (comma, semicolon, tab or
whitespace separated) under an optional header whose labels name the columns and their
units (q in nm^-1 or Å^-1; T2 in s, ms or µs), and returns them in sheetview units.
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
