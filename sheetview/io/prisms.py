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
import hashlib
import io
import json
import math
import os
import re
import tokenize
import zipfile
import zlib
from pathlib import Path

import numpy as np

from ..domain import MAX_LENGTH_NM, Box, domain_from_dict
from ..errors import InputError, OptionError
from .safety import check_read_memory, finite_number, fmt, json_type, load_json, read_npy_header
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
        raise InputError(f"unknown units {str(units)[:40]!r}; expected one of \"nm\", \"A\" "
                         f"(\"angstrom\"), \"um\"", path=path, line=line, field="units")
    return UNITS[units.strip().lower()]


# --------------------------------------------------------------------------- header
_HEADER_RE = re.compile(r"^#\s*([A-Za-z_][\w\-]*)\s*:\s*(.*?)\s*$")
_MAGIC_RE = re.compile(r"^#\s*sheetview prisms v(\d+)\s*$")


def parse_header(lines, path, *, magic=_MAGIC_RE, version=FORMAT_VERSION,
                 reserved=RESERVED_KEYS, what="prism table"):
    """Parse ``# key: JSON`` lines of a table's header (``(line number, text)`` pairs).
    Returns (header dict, {key: line number}). ``magic`` matches the format line (its
    group 1 the version, refused when newer than ``version``); a value that is not JSON is
    kept as text, except for the ``reserved`` keys, which are refused."""
    header, where = {}, {}
    for lineno, raw in lines:
        m = magic.match(raw)
        if m:
            if int(m.group(1)) > version:
                raise InputError(f"{what} version {m.group(1)} is newer than this sheetview "
                                 f"reads (v{version}); update sheetview", path=path, line=lineno)
            continue
        m = _HEADER_RE.match(raw)
        if not m:
            continue  # a free comment line
        key, value = m.group(1), m.group(2)
        try:
            header[key] = load_json(value, path=path, line=lineno, field=key,
                                    what="header value")
        except InputError as e:
            if key in reserved:
                raise InputError(f"{e.detail}; write it as `# {key}: <JSON value>`", path=path,
                                 line=lineno, field=key) from None
            header[key] = value  # free text metadata
        where[key] = lineno
    return header, where


def split_csv_header(raw: bytes, path, *, what="prism table", **header_kw):
    """The parts of a CSV table's bytes: ``(header, where, column_line, body, names)``: the
    parsed ``#`` header block (:func:`parse_header`; leading ``#`` and blank lines), the line
    number of the column line, the bytes from the column line on, and the column names.
    Refuses text that is not UTF-8 and a file with no column line, naming the file."""
    try:
        text_head = raw[:1 << 20].decode("utf-8")
    except UnicodeDecodeError:
        try:  # a multi-byte character cut at the 1 MiB boundary
            text_head = raw[:(1 << 20) - 3].decode("utf-8")
        except UnicodeDecodeError:
            raise InputError(f"not a text file (not UTF-8); expected a CSV {what}",
                             path=path) from None
    header_lines, pos, lineno = [], 0, 0
    for line in io.StringIO(text_head):
        stripped = line.strip()
        if stripped.startswith("#") or not stripped:
            lineno += 1
            header_lines.append((lineno, stripped))
            pos += len(line.encode("utf-8"))
            continue
        break
    header, where = parse_header(header_lines, path, what=what, **header_kw)
    body = raw[pos:]
    if not body.strip():
        raise InputError("no column line and no rows after the header", path=path)
    first = body.split(b"\n", 1)[0].decode("utf-8", "replace").strip().lstrip("\ufeff")
    names = [c.strip() for c in first.split(",")]
    return header, where, lineno + 1, body, names


def _header_number(header, where, key, path, positive=True):
    if key not in header:
        return None
    v = header[key]
    f = finite_number(v)
    if f is None or (positive and not 0 < f <= MAX_LENGTH_NM):
        shown = json_type(v) if not isinstance(v, (int, float)) or isinstance(v, bool) else fmt(v)
        raise InputError(f"expected a positive number of at most {MAX_LENGTH_NM:g}, got "
                         f"{shown}", path=path, line=where.get(key), field=key)
    return f


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
    for name, a in arrays.items():
        a = np.asarray(a)
        if a.shape != (n,) or a.dtype.kind not in "biuf":
            what = f"{a.dtype} values" if a.dtype.kind not in "biuf" else f"shape {a.shape}"
            raise InputError(f"column '{name}' must hold {n} numbers (one per prism), got "
                             f"{what}", path=path, field=name)
    if "thickness" in arrays:
        if thickness is not None:
            raise OptionError("<<thickness>> does not apply to this file: it gives a thickness "
                              "per prism (column 'thickness'); it applies to prism tables "
                              "without one", path=path, param="thickness")
        thick = np.asarray(arrays["thickness"], dtype=np.float64) * f
    else:
        t = thickness if thickness is not None else _header_number(header, where, "thickness", path)
        if t is None:
            raise InputError("no prism thickness: add a 'thickness' column, a `# thickness: <nm>` "
                             "header line, or give <<thickness>>", path=path, param="thickness")
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
            cols[name] = whole_numbers(a, name, path, "column")
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


def whole_numbers(a, name, path, what="column") -> np.ndarray:
    """An integer column as int64: floats must be whole and within the int64 range, and
    unsigned values must fit; else an :class:`InputError` naming the row."""
    a = np.asarray(a)
    if a.dtype.kind == "b":
        return a.astype(np.int64)
    if a.dtype.kind == "u" and a.dtype.itemsize >= 8:
        bad = a > np.iinfo(np.int64).max
    elif a.dtype.kind == "f":
        with np.errstate(invalid="ignore"):
            bad = ~np.isfinite(a) | (a != np.round(a)) | (np.abs(a) >= INT64_LIMIT)
    else:
        return a.astype(np.int64)
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        raise InputError(f"{what} '{name}' must hold whole numbers within +/-9.2e18, got "
                         f"{fmt(a[i])} at row {i + 1} ({int(bad.sum())} row(s) affected)",
                         path=path, field=name)
    return a.astype(np.int64)


#: Floats at or beyond this magnitude do not fit an int64.
INT64_LIMIT = 2.0 ** 63


# ------------------------------------------------------------------------------ CSV
def read_csv(path, *, thickness=None, spacing=None, units=None) -> Structure:
    """Read the CSV form of the prism table (also plain CSV without a header block)."""
    import pyarrow as pa
    import pyarrow.csv as pcsv

    path = Path(path)
    try:
        size = path.stat().st_size
        # the text, Arrow's parsed columns and the prism arrays made from them
        check_read_memory(size * CSV_READ_FACTOR, f"{size:,} bytes of CSV text", path)
        raw = path.read_bytes()
    except OSError as e:
        raise InputError(f"cannot read: {e.strerror}", path=path) from None
    if not raw.strip():
        raise InputError("file is empty; expected a prism table (see docs/formats.md)", path=path)
    header, where, column_line, body, names = split_csv_header(raw, path)
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
    """Read the NPZ form. Object arrays (pickles) are refused; the declared shape of every
    array is checked against the archive (:func:`npz_inventory`) and the memory budget
    before any array is read."""
    path = Path(path)
    inventory = npz_inventory(path)
    if "vertices" not in inventory or "header" not in inventory:
        raise InputError("not a sheetview prism NPZ (needs arrays 'vertices' and "
                         "'header'); for a voxel volume use .npy", path=path)
    shape, dtype = inventory["vertices"]
    if len(shape) != 3 or shape[1:] != (3, 3) or dtype.kind not in "fiu":
        raise InputError(f"'vertices' must be a numeric (N, 3, 3) array, got {dtype} {shape}",
                         path=path, field="vertices")
    n = shape[0]
    if n == 0:
        raise InputError("holds no prisms ('vertices' has 0 rows)", path=path, field="vertices")
    hshape, hdtype = inventory["header"]
    if hshape != () or hdtype.kind != "U":
        raise InputError(f"the 'header' array must be one text (a 0-d unicode array), got "
                         f"{hdtype} {hshape}", path=path, field="header")
    for k, (shp, dt) in inventory.items():
        if k.startswith("col_") or k == "thickness":
            if shp != (n,) or dt.kind not in "fiub":
                raise InputError(f"array {k!r} must hold {n} numbers (one per prism), got "
                                 f"{dt} {shp}", path=path, field=k)
    check_read_memory(n * prism_read_bytes(len(inventory) + 8), f"{n:,} prisms", path)
    try:
        with np.load(path, allow_pickle=False) as z:
            data = {k: z[k] for k in z.files if k in inventory}
    except ValueError as e:
        if "pickle" in str(e).lower() or "object" in str(e).lower():
            raise InputError("holds Python objects (pickles), which sheetview never loads",
                             path=path) from None
        raise InputError(f"damaged or truncated NPZ ({_first_line(e)})", path=path) from None
    except (zipfile.BadZipFile, EOFError, OSError, KeyError, zlib.error, SyntaxError,
            tokenize.TokenError) as e:
        raise InputError(f"damaged or truncated NPZ ({type(e).__name__}: {_first_line(e)})",
                         path=path) from None
    header = load_json(str(data.pop("header")), path=path, field="header",
                       what="the 'header' array", expect=dict)
    fmt_name = header.pop("format", f"{MAGIC} v1")
    m = re.match(rf"{MAGIC} v(\d+)$", str(fmt_name))
    if not m or int(m.group(1)) > FORMAT_VERSION:
        raise InputError(f"unsupported format {str(fmt_name)[:80]!r} (this sheetview reads "
                         f"v{FORMAT_VERSION})", path=path, field="format")
    v = data.pop("vertices")
    arrays = {name: v[:, k // 3, k % 3] for k, name in enumerate(CORNER_COLUMNS)}
    t = data.pop("thickness", None)
    if t is not None:
        arrays["thickness"] = t
    for k, a in data.items():
        if k.startswith("col_"):
            arrays[k[4:]] = a
    return _assemble(arrays, header, {}, path, thickness=thickness, spacing=spacing, units=units)


#: Most a deflate stream can expand (RFC 1951: at best about 1032 output bytes per input
#: byte); a zip entry claiming more is damaged.
DEFLATE_MAX_RATIO = 1032
#: Most the corner coordinates of real prisms are accepted to compress (declared bytes per
#: stored byte). Random coordinates compress about 1.2:1, coordinates on an integer lattice
#: about 6:1 (measured with zlib); far higher only comes from runs of identical bytes, i.e.
#: zeros (degenerate prisms) or copies of one prism: a decompression bomb.
COORDINATE_MAX_RATIO = 256


def npz_inventory(path) -> dict:
    """``{name: (shape, dtype)}`` of the arrays of an NPZ, read from the ``.npy`` headers of
    its entries without reading their data; refuses damaged archives (an entry larger than
    the file, a declared size deflate cannot reach, a header that disagrees with the entry
    size), object arrays, and corner coordinates compressed beyond
    :data:`COORDINATE_MAX_RATIO`."""
    path = Path(path)
    size = path.stat().st_size
    out = {}
    try:
        with zipfile.ZipFile(path) as zf:
            for info in zf.infolist():
                name = info.filename[:-4] if info.filename.endswith(".npy") else info.filename
                if info.compress_size > size:
                    raise InputError(f"damaged NPZ: entry {name!r} claims {info.compress_size:,} "
                                     f"stored bytes, more than the file holds", path=path)
                if info.compress_type == zipfile.ZIP_STORED and info.file_size != info.compress_size \
                        or info.compress_type == zipfile.ZIP_DEFLATED and \
                        info.file_size > DEFLATE_MAX_RATIO * info.compress_size + 1024:
                    raise InputError(f"damaged NPZ: entry {name!r} claims {info.file_size:,} bytes "
                                     f"from {info.compress_size:,} stored bytes", path=path)
                if not info.filename.endswith(".npy"):
                    continue
                with zf.open(info) as fh:
                    shape, _fortran, dtype = read_npy_header(fh)
                    hlen = fh.tell()
                if dtype.hasobject:
                    raise InputError(f"array {name!r} holds Python objects (pickles), which "
                                     f"sheetview never loads", path=path)
                nbytes = math.prod(int(d) for d in shape) * dtype.itemsize
                if nbytes + hlen != info.file_size:
                    raise InputError(f"damaged NPZ: array {name!r} declares shape {shape} of "
                                     f"{dtype} ({nbytes:,} bytes) but its entry holds "
                                     f"{info.file_size - hlen:,}", path=path)
                if name == "vertices" and info.compress_type != zipfile.ZIP_STORED and \
                        nbytes > COORDINATE_MAX_RATIO * max(info.compress_size, 1):
                    raise InputError(f"'vertices' declares {nbytes:,} bytes of corner "
                                     f"coordinates stored in {info.compress_size:,} bytes (a "
                                     f"ratio of {nbytes // max(info.compress_size, 1):,}:1 that "
                                     f"real coordinates do not reach): a damaged file or a "
                                     f"decompression bomb", path=path, field="vertices")
                out[name] = (tuple(int(d) for d in shape), dtype)
    except InputError:
        raise
    except (zipfile.BadZipFile, zipfile.LargeZipFile, EOFError, OSError, zlib.error,
            ValueError, KeyError, NotImplementedError, SyntaxError, tokenize.TokenError) as e:
        raise InputError(f"damaged or truncated NPZ ({type(e).__name__}: {_first_line(e)})",
                         path=path) from None
    return out


def _first_line(e) -> str:
    s = str(e).strip().splitlines()
    return (s[0] if s else type(e).__name__)[:200]


#: Bytes of the text a CSV reading holds at its peak per byte of file (the text, Arrow's
#: columns and the prism arrays; measured 4.5 with benchmarks/bench_io.py).
CSV_READ_FACTOR = 6


def prism_read_bytes(n_columns: int) -> int:
    """Peak bytes per prism of reading a binary prism table of ``n_columns`` columns: the
    columns as read, the (N, 3, 3) corners, the validation temporaries (measured about 400
    bytes per prism for 13 columns with benchmarks/bench_io.py; taken as 48 per column plus
    256)."""
    return 48 * int(n_columns) + 256


# -------------------------------------------------------------------------- Parquet
#: Schema metadata key of the checksum of the prism columns (see :func:`content_hash`).
CONTENT_KEY = b"sheetview.content"


def content_hash(columns: dict, header: bytes = b"") -> str:
    """``sha256:<hex>`` of the header text (the ``sheetview`` schema metadata, as stored) and
    the columns in order: for each, its name, numpy type (little endian), length and the
    SHA-256 of its bytes (the columns are hashed in parallel threads; hashlib releases the
    GIL). Written into the Parquet schema metadata and checked on reading, so that a damaged
    data page that still decodes (a flipped bit in a number) or a damaged header value is
    refused instead of giving other numbers."""
    from concurrent.futures import ThreadPoolExecutor

    cols = []
    for name, a in columns.items():
        a = np.asarray(a)
        cols.append((name, np.ascontiguousarray(a.astype(a.dtype.newbyteorder("<"), copy=False))))

    def digest(a):
        return hashlib.sha256(memoryview(a).cast("B")).digest()

    with ThreadPoolExecutor(max_workers=max(1, min(4, os.cpu_count() or 1))) as pool:
        digests = list(pool.map(digest, [a for _, a in cols]))
    h = hashlib.sha256()
    h.update(b"header\0" + bytes(header) + b"\0")
    for (name, a), d in zip(cols, digests):
        h.update(f"{name}\0{a.dtype.str}\0{a.shape[0]}\0".encode())
        h.update(d)
    return "sha256:" + h.hexdigest()


def write_parquet(s: Structure, path, *, force=False) -> Path:
    """Write the Parquet form: one column per table column, header in schema metadata,
    CRC-32 checksums on every data page and a checksum of the columns
    (:func:`content_hash`) in the schema metadata."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    cols = {k: np.ascontiguousarray(v) for k, v in _columns_for(s).items()}
    header = dict(_header_for(s), format=f"{MAGIC} v{FORMAT_VERSION}")
    table = pa.table(cols)
    text = json.dumps(header).encode()
    table = table.replace_schema_metadata({b"sheetview": text,
                                           CONTENT_KEY: content_hash(cols, text).encode()})
    with atomic_path(path, force) as tmp:
        pq.write_table(table, tmp, compression="zstd", write_page_checksum=True)
    return Path(path)


def read_parquet(path, *, thickness=None, spacing=None, units=None) -> Structure:
    """Read the Parquet form. The footer is checked first (row counts that agree, column
    chunks inside the file, the memory the rows need); data pages are read with their
    checksums verified, and the columns checked against :func:`content_hash` when the file
    carries one."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    path = Path(path)
    try:
        pf = pq.ParquetFile(path, page_checksum_verification=True,
                            thrift_string_size_limit=64 * 2**20)
        md = pf.metadata
        _check_parquet_footer(md, path)
        table = pf.read(use_threads=True)
    except InputError:
        raise
    except (pa.ArrowException, OSError, ValueError) as e:
        raise InputError(f"damaged or not a Parquet file ({_first_line(e)})", path=path) from None
    if table.num_rows != md.num_rows:
        raise InputError(f"damaged Parquet file: the footer declares {md.num_rows:,} rows but "
                         f"{table.num_rows:,} were read", path=path)
    meta = table.schema.metadata or {}
    header = {}
    if b"sheetview" in meta:
        header = load_json(meta[b"sheetview"], path=path, field="sheetview",
                           what="the 'sheetview' schema metadata", expect=dict)
        header.pop("format", None)
    names = table.column_names
    _check_columns(names, path, None)
    arrays = {}
    for n in names:
        col = table.column(n)
        if not (pa.types.is_floating(col.type) or pa.types.is_integer(col.type)):
            raise InputError(f"column {n!r} must be numeric, not {col.type}", path=path, field=n)
        if col.null_count:
            raise InputError(f"column {n!r} has {col.null_count:,} missing (null) value(s); "
                             f"every cell must be a number", path=path, field=n)
        arrays[n] = col.to_numpy()
    if table.num_rows == 0:
        raise InputError("the table has no rows", path=path)
    if CONTENT_KEY in meta:
        expected = meta[CONTENT_KEY].decode("ascii", errors="replace")
        if content_hash(arrays, meta.get(b"sheetview", b"")) != expected:
            raise InputError("the prism columns or the header do not match the checksum "
                             "written with them (schema metadata 'sheetview.content'): the "
                             "file is damaged", path=path)
    return _assemble(arrays, header, {}, path, thickness=thickness, spacing=spacing, units=units)


def _check_parquet_footer(md, path) -> None:
    """Row counts that agree between the footer and its row groups, and rows whose columns
    fit the memory budget. (Only these fields are read: pyarrow aborts the process, instead
    of raising, on some damaged column-chunk metadata, so the column chunks are left to its
    reader, which raises.)"""
    n = md.num_rows
    groups = sum(md.row_group(i).num_rows for i in range(md.num_row_groups))
    if n < 0 or groups != n:
        raise InputError(f"damaged Parquet file: the footer declares {n:,} rows, its row "
                         f"groups {groups:,}", path=path)
    check_read_memory(n * prism_read_bytes(md.num_columns), f"{n:,} rows", path)


READERS = {".csv": read_csv, ".txt": read_csv, ".npz": read_npz,
           ".parquet": read_parquet, ".pq": read_parquet}
WRITERS = {".csv": write_csv, ".npz": write_npz, ".parquet": write_parquet, ".pq": write_parquet}


def check_options(thickness=None, spacing=None):
    for name, v in (("thickness", thickness), ("spacing", spacing)):
        if v is not None and not (np.isfinite(v) and v > 0):
            raise OptionError(f"must be a positive number of nm, got {v}", param=name)
