"""The native prism table, version 1, in three forms: CSV, compressed NPZ and Parquet.

The format is documented in ``docs/formats.md``. In short, the CSV form is::

    # sheetview prisms v1
    # units: "nm"
    # thickness: 0.7
    # spacing: 1.4
    # domain: {"shape": "sphere", "center": [0, 0, 0], "radius": 20}
    ax,ay,az,bx,by,bz,cx,cy,cz,thickness,sheet,born,tag
    ...

Header lines are ``# key: JSON value``. Known keys: ``units``, ``thickness``,
``spacing``, ``domain``; every other key is kept as free metadata (study parameters,
for example) and written back out. All three forms hold the same content and
round-trip exactly (float64 written in shortest round-trip form).
"""
from __future__ import annotations

import dataclasses
import difflib
import io
import json
import re
import zipfile
from pathlib import Path

import numpy as np

from ..domain import Box, domain_from_dict
from ..errors import InputError, OptionError
from ..structure import DEFAULT_SPACING_NM, KNOWN_COLUMNS, Structure, with_inferred_domain
from .output import atomic_path

FORMAT_VERSION = 1
MAGIC = "sheetview prisms"
CORNER_COLUMNS = ["ax", "ay", "az", "bx", "by", "bz", "cx", "cy", "cz"]
OPTIONAL_COLUMNS = ["thickness", "sheet", "born", "tag"]

#: Length units accepted in files, as factors to nanometres.
UNITS = {
    "nm": 1.0, "nanometre": 1.0, "nanometer": 1.0,
    "a": 0.1, "angstrom": 0.1, "ångström": 0.1, "å": 0.1, "\u212b": 0.1,
    "um": 1000.0, "µm": 1000.0, "\u03bcm": 1000.0, "micrometre": 1000.0, "micrometer": 1000.0,
}
RESERVED_KEYS = {"units", "thickness", "spacing", "domain"}
_PLACEHOLDER_DOMAIN = Box((0.0, 0.0, 0.0), (1.0, 1.0, 1.0), inferred=True)


def unit_factor(units, *, path=None, line=None) -> float:
    """Factor that converts a length in ``units`` to nm; refuses unknown units."""
    if not isinstance(units, str) or units.strip().lower() not in UNITS:
        raise InputError(f"unknown units {units!r}; expected one of \"nm\", \"A\" "
                         f"(\"angstrom\"), \"um\"", path=path, line=line, field="units")
    return UNITS[units.strip().lower()]


# --------------------------------------------------------------------------- header
_HEADER_RE = re.compile(r"^#\s*([A-Za-z_][\w\-]*)\s*:\s*(.*?)\s*$")
_MAGIC_RE = re.compile(r"^#\s*sheetview prisms v(\d+)\s*$")


def _parse_header(lines, path):
    """Parse ``# key: JSON`` lines. Returns (header dict, {key: line number})."""
    header, where = {}, {}
    for lineno, raw in lines:
        m = _MAGIC_RE.match(raw)
        if m:
            version = int(m.group(1))
            if version > FORMAT_VERSION:
                raise InputError(f"prism table version {version} is newer than this sheetview "
                                 f"reads (v{FORMAT_VERSION}); update sheetview", path=path, line=lineno)
            continue
        body = raw.lstrip("#").strip()
        if not body:
            continue
        m = _HEADER_RE.match(raw)
        if not m:
            # a free comment line; keep going
            continue
        key, value = m.group(1), m.group(2)
        try:
            header[key] = json.loads(value)
        except json.JSONDecodeError as e:
            if key in RESERVED_KEYS:
                raise InputError(f"header value is not valid JSON ({e.msg}); write it as "
                                 f"`# {key}: <JSON value>`", path=path, line=lineno, field=key)
            header[key] = value  # free text metadata
        where[key] = lineno
    return header, where


def _header_number(header, where, key, path, positive=True):
    if key not in header:
        return None
    v = header[key]
    if isinstance(v, bool) or not isinstance(v, (int, float)) or not np.isfinite(v) or (positive and v <= 0):
        raise InputError(f"expected a positive number, got {json.dumps(v)}", path=path,
                         line=where.get(key), field=key)
    return float(v)


def _check_columns(names, path, line):
    """Refuse missing or misspelt columns; return the names of extra numeric columns."""
    known = CORNER_COLUMNS + OPTIONAL_COLUMNS
    dup = sorted({n for n in names if names.count(n) > 1})
    if dup:
        raise InputError(f"column(s) {dup} appear more than once", path=path, line=line)
    missing = [c for c in CORNER_COLUMNS if c not in names]
    unknown = [n for n in names if n not in known]
    for n in unknown:
        close = difflib.get_close_matches(n.lower(), known, n=1, cutoff=0.75)
        if close or n.lower() in known:
            hint = close[0] if close else n.lower()
            raise InputError(f"unknown column {n!r}; did you mean {hint!r}? (column names are "
                             f"lower case: {', '.join(known)})", path=path, line=line)
    if missing:
        raise InputError(f"missing column(s) {', '.join(missing)}; a prism table needs "
                         f"{','.join(CORNER_COLUMNS)} (corner coordinates of each mid-plane "
                         f"triangle), optionally {', '.join(OPTIONAL_COLUMNS)}", path=path, line=line)
    return unknown


def _assemble(arrays: dict, header: dict, where: dict, path, *, thickness=None,
              spacing=None, units=None, row_offset=None) -> Structure:
    """Build and validate a Structure from columns (in file units) and the header."""
    units_value = units if units is not None else header.get("units", "nm")
    f = unit_factor(units_value, path=path, line=where.get("units"))
    n = len(arrays["ax"])
    vert = np.empty((n, 3, 3), dtype=np.float64)
    for k, name in enumerate(CORNER_COLUMNS):
        vert[:, k // 3, k % 3] = arrays[name]
    if f != 1.0:
        vert *= f
    if "thickness" in arrays:
        thick = np.asarray(arrays["thickness"], dtype=np.float64) * f
    else:
        t = thickness if thickness is not None else _header_number(header, where, "thickness", path)
        if t is None:
            raise InputError("no prism thickness: add a 'thickness' column, a `# thickness: <nm>` "
                             "header line, or pass --thickness", path=path)
        thick = np.full(n, float(t) * (f if thickness is None else 1.0))
    sp = spacing if spacing is not None else _header_number(header, where, "spacing", path)
    sp = DEFAULT_SPACING_NM if sp is None else sp * (f if spacing is None else 1.0)
    if "domain" in header and header["domain"] is not None:
        dom = domain_from_dict(header["domain"], scale=f, path=path, line=where.get("domain"))
    else:
        dom = None  # inferred from the prisms once they are known to be valid
    cols = {}
    for name, a in arrays.items():
        if name in CORNER_COLUMNS or name == "thickness":
            continue
        a = np.asarray(a)
        if name in ("sheet", "tag"):
            if a.dtype.kind == "f":
                if not np.all(np.isfinite(a)) or np.any(a != np.round(a)):
                    raise InputError(f"column '{name}' must hold whole numbers", path=path, field=name)
            cols[name] = a.astype(np.int64)
        else:
            cols[name] = a.astype(np.float64)
    meta = {k: v for k, v in header.items() if k not in RESERVED_KEYS}
    s = Structure(vert, thick, dom or _PLACEHOLDER_DOMAIN, sp, cols, meta,
                  str(path) if path is not None else None)
    try:
        s.validate()
        if dom is None:
            s = dataclasses.replace(s, domain=with_inferred_domain(s.vertices, s.thickness))
    except InputError as e:
        if row_offset is not None:
            # translate "prism row i" into a file line number for CSV input
            m = re.search(r"prism row (\d+)", e.detail)
            if m:
                raise InputError(e.detail, path=path, line=int(m.group(1)) + row_offset,
                                 field=e.field) from None
        raise
    return s


# ------------------------------------------------------------------------------ CSV
def read_csv(path, *, thickness=None, spacing=None, units=None) -> Structure:
    """Read the CSV form of the prism table (also plain CSV without a header block)."""
    import pyarrow as pa
    import pyarrow.csv as pcsv

    path = Path(path)
    try:
        raw = path.read_bytes()
    except OSError as e:
        raise InputError(f"cannot read: {e.strerror}", path=path) from None
    if not raw.strip():
        raise InputError("file is empty; expected a prism table (see docs/formats.md)", path=path)
    try:
        text_head = raw[:1 << 20].decode("utf-8")
    except UnicodeDecodeError:
        try:
            raw[:(1 << 20) - 3].decode("utf-8")
            text_head = raw[:(1 << 20) - 3].decode("utf-8")
        except UnicodeDecodeError:
            raise InputError("not a text file (not UTF-8); expected a CSV prism table",
                             path=path) from None
    # header block: leading lines beginning with '#' (and blank lines)
    header_lines, pos, lineno = [], 0, 0
    for line in io.StringIO(text_head):
        stripped = line.strip()
        if stripped.startswith("#") or not stripped:
            lineno += 1
            header_lines.append((lineno, stripped))
            pos += len(line.encode("utf-8"))
            continue
        break
    header, where = _parse_header(header_lines, path)
    column_line = lineno + 1
    body = raw[pos:]
    if not body.strip():
        raise InputError("no column line and no rows after the header", path=path)
    first = body.split(b"\n", 1)[0].decode("utf-8", "replace").strip().lstrip("\ufeff")
    names = [c.strip() for c in first.split(",")]
    _check_columns(names, path, column_line)
    types = {n: pa.float64() for n in names}
    try:
        table = pcsv.read_csv(
            io.BytesIO(body),
            read_options=pcsv.ReadOptions(column_names=names, skip_rows=1),
            parse_options=pcsv.ParseOptions(),
            convert_options=pcsv.ConvertOptions(column_types=types, strings_can_be_null=False,
                                                quoted_strings_can_be_null=False,
                                                null_values=[]),
        )
    except pa.ArrowInvalid as e:
        raise InputError(_explain_arrow_error(str(e), body, names, column_line), path=path) from None
    if table.num_rows == 0:
        raise InputError("the table has a column line but no rows", path=path)
    arrays = {n: table.column(n).to_numpy() for n in names}
    return _assemble(arrays, header, where, path, thickness=thickness, spacing=spacing,
                     units=units, row_offset=column_line)


def _explain_arrow_error(msg: str, body: bytes, names, column_line: int) -> str:
    """Turn a parser message into one that names the line, column and cell."""
    m = re.search(r"In CSV column #(\d+): .*CSV conversion error to double: invalid value '(.*)'", msg)
    if m:
        col, cell = int(m.group(1)), m.group(2)
        lines = body.decode("utf-8", "replace").splitlines()
        for i, ln in enumerate(lines[1:], start=1):
            cells = ln.split(",")
            if col < len(cells):
                try:
                    float(cells[col])
                except ValueError:
                    cell = cells[col].strip()
                    return (f"line {column_line + i}, column '{names[col]}': {cell!r} is not a "
                            f"number (every cell must be numeric; empty cells are not allowed)")
        return f"column '{names[col]}': {cell!r} is not a number (every cell must be numeric)"
    m = re.search(r"Expected (\d+) columns, got (\d+): (.*)", msg)
    if m:
        bad = m.group(3).strip()
        lines = body.decode("utf-8", "replace").splitlines()
        line = next((column_line + i for i, ln in enumerate(lines) if ln.strip() == bad), None)
        where = f"line {line}: " if line else ""
        return (f"{where}expected {m.group(1)} cells per row like the column line, got "
                f"{m.group(2)} (a truncated or malformed row)")
    return f"cannot parse the table: {msg.splitlines()[0]}"


def _header_for(s: Structure) -> dict:
    h = {"units": "nm"}
    h["spacing"] = s.spacing
    if not s.domain.inferred:
        h["domain"] = s.domain.to_dict()
    for k, v in s.metadata.items():
        if k not in RESERVED_KEYS:
            h[k] = v
    return h


def _columns_for(s: Structure) -> dict:
    cols = {}
    for k, name in enumerate(CORNER_COLUMNS):
        cols[name] = s.vertices[:, k // 3, k % 3]
    cols["thickness"] = s.thickness
    for name in ("sheet", "born", "tag"):
        if name in s.columns:
            cols[name] = s.columns[name]
    for name in sorted(set(s.columns) - set(KNOWN_COLUMNS)):
        cols[name] = s.columns[name]
    return cols


def write_csv(s: Structure, path, *, force=False) -> Path:
    """Write the CSV form (v1). Floats are written in shortest round-trip form."""
    import pyarrow as pa
    import pyarrow.csv as pcsv

    cols = _columns_for(s)
    lines = [f"# {MAGIC} v{FORMAT_VERSION}"]
    for k, v in _header_for(s).items():
        lines.append(f"# {k}: {json.dumps(v)}")
    lines.append(",".join(cols))
    with atomic_path(path, force) as tmp:
        with open(tmp, "wb") as fh:
            fh.write(("\n".join(lines) + "\n").encode("utf-8"))
            if len(s):
                table = pa.table({k: np.ascontiguousarray(v) for k, v in cols.items()})
                pcsv.write_csv(table, fh, write_options=pcsv.WriteOptions(include_header=False))
    return Path(path)


# ------------------------------------------------------------------------------ NPZ
def write_npz(s: Structure, path, *, force=False) -> Path:
    """Write the compressed NPZ form: one array per column plus a JSON header string."""
    cols = _columns_for(s)
    header = dict(_header_for(s), format=f"{MAGIC} v{FORMAT_VERSION}")
    arrays = {"vertices": s.vertices, "thickness": s.thickness}
    arrays.update({f"col_{k}": v for k, v in cols.items() if k not in CORNER_COLUMNS and k != "thickness"})
    arrays["header"] = np.array(json.dumps(header))
    with atomic_path(path, force) as tmp:
        with open(tmp, "wb") as fh:
            np.savez_compressed(fh, **arrays)
    return Path(path)


def read_npz(path, *, thickness=None, spacing=None, units=None) -> Structure:
    """Read the NPZ form. Object arrays (pickles) are refused."""
    path = Path(path)
    try:
        with np.load(path, allow_pickle=False) as z:
            names = set(z.files)
            if "vertices" not in names or "header" not in names:
                raise InputError("not a sheetview prism NPZ (needs arrays 'vertices' and "
                                 "'header'); for a voxel volume use .npy", path=path)
            data = {k: z[k] for k in z.files}
    except InputError:
        raise
    except ValueError as e:
        if "pickle" in str(e).lower() or "object" in str(e).lower():
            raise InputError("holds Python objects (pickles), which sheetview never loads",
                             path=path) from None
        raise InputError(f"damaged or truncated NPZ ({e})", path=path) from None
    except (zipfile.BadZipFile, EOFError, OSError, KeyError) as e:
        raise InputError(f"damaged or truncated NPZ ({type(e).__name__}: {e})", path=path) from None
    try:
        header = json.loads(str(data.pop("header")))
    except json.JSONDecodeError:
        raise InputError("the 'header' array is not valid JSON", path=path, field="header") from None
    fmt = header.pop("format", f"{MAGIC} v1")
    m = re.match(rf"{MAGIC} v(\d+)$", str(fmt))
    if not m or int(m.group(1)) > FORMAT_VERSION:
        raise InputError(f"unsupported format {fmt!r} (this sheetview reads v{FORMAT_VERSION})",
                         path=path, field="format")
    v = data.pop("vertices")
    if v.ndim != 3 or v.shape[1:] != (3, 3) or v.dtype.kind not in "fiu":
        raise InputError(f"'vertices' must be a numeric (N, 3, 3) array, got {v.dtype} {v.shape}",
                         path=path, field="vertices")
    arrays = {name: v[:, k // 3, k % 3] for k, name in enumerate(CORNER_COLUMNS)}
    t = data.pop("thickness", None)
    if t is not None:
        arrays["thickness"] = t
    for k, a in data.items():
        if k.startswith("col_"):
            if a.shape != (len(v),) or a.dtype.kind not in "fiub":
                raise InputError(f"column array {k!r} must be numeric with {len(v)} entries",
                                 path=path, field=k)
            arrays[k[4:]] = a
    return _assemble(arrays, header, {}, path, thickness=thickness, spacing=spacing, units=units)


# -------------------------------------------------------------------------- Parquet
def write_parquet(s: Structure, path, *, force=False) -> Path:
    """Write the Parquet form: one column per table column, header in schema metadata."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    cols = _columns_for(s)
    header = dict(_header_for(s), format=f"{MAGIC} v{FORMAT_VERSION}")
    table = pa.table({k: np.ascontiguousarray(v) for k, v in cols.items()})
    table = table.replace_schema_metadata({b"sheetview": json.dumps(header).encode()})
    with atomic_path(path, force) as tmp:
        pq.write_table(table, tmp, compression="zstd")
    return Path(path)


def read_parquet(path, *, thickness=None, spacing=None, units=None) -> Structure:
    import pyarrow as pa
    import pyarrow.parquet as pq

    path = Path(path)
    try:
        table = pq.read_table(path)
    except (pa.ArrowInvalid, OSError) as e:
        raise InputError(f"damaged or not a Parquet file ({str(e).splitlines()[0]})", path=path) from None
    meta = table.schema.metadata or {}
    header = {}
    if b"sheetview" in meta:
        try:
            header = json.loads(meta[b"sheetview"])
        except json.JSONDecodeError:
            raise InputError("the 'sheetview' schema metadata is not valid JSON", path=path) from None
        header.pop("format", None)
    names = table.column_names
    _check_columns(names, path, None)
    arrays = {}
    for n in names:
        col = table.column(n)
        if not (pa.types.is_floating(col.type) or pa.types.is_integer(col.type)):
            raise InputError(f"column {n!r} must be numeric, not {col.type}", path=path, field=n)
        arrays[n] = col.to_numpy()
    if table.num_rows == 0:
        raise InputError("the table has no rows", path=path)
    return _assemble(arrays, header, {}, path, thickness=thickness, spacing=spacing, units=units)


READERS = {".csv": read_csv, ".txt": read_csv, ".npz": read_npz,
           ".parquet": read_parquet, ".pq": read_parquet}
WRITERS = {".csv": write_csv, ".npz": write_npz, ".parquet": write_parquet, ".pq": write_parquet}


def check_options(thickness=None, spacing=None):
    for name, v in (("thickness", thickness), ("spacing", spacing)):
        if v is not None and not (np.isfinite(v) and v > 0):
            raise OptionError(f"--{name} must be a positive number of nm, got {v}")
