"""The native particle table, version 1: spheres, ellipsoids and layered particles, in the
same three forms and with the same header conventions as the prism table
(:mod:`sheetview.io.prisms`; docs/formats.md, "Particle tables")::

    # sheetview particles v1
    # units: "nm"
    # domain: {"shape": "box", "min": [0, 0, 0], "max": [20, 20, 20], "periodic": true}
    x,y,z,radius
    ...

One table holds one kind, chosen by its columns:

* spheres: ``x, y, z, radius``;
* ellipsoids: ``x, y, z, a, b, c`` and optionally ``qw, qx, qy, qz`` (a unit quaternion
  rotating the particle's axes into the lab frame; identity when absent);
* layered particles: ``x, y, z, a, layers`` and optionally ``b`` (default ``a``) and
  ``qw, qx, qy, qz``; header ``spacing`` (repeat, default 1.4 nm), ``thickness`` (sheet
  thickness, default 0.7 nm), ``outline`` ("disc" or "ellipsoid"), ``segments``. They are
  read as the prisms of a :class:`~sheetview.structure.Structure`
  (:func:`sheetview.particles.layered_structure`).

Further numeric columns are kept. Prism corner columns (``ax ... cz``) in a particle table
are refused: one table holds one kind.
"""
from __future__ import annotations

import difflib
import io
import json
import re
import zipfile
import zlib
from pathlib import Path

import numpy as np

from ..domain import domain_from_dict
from ..errors import InputError, OptionError
from ..particles import (DEFAULT_SEGMENTS, DEFAULT_SHEET_THICKNESS_NM, OUTLINES, ParticleSet,
                         inferred_domain, layered_structure, quaternion_matrices)
from ..structure import DEFAULT_SPACING_NM
from .output import atomic_path
from .prisms import (CONTENT_KEY, CORNER_COLUMNS, CSV_READ_FACTOR, content_hash, npz_inventory,
                     split_csv_header, unit_factor)
from .safety import check_read_memory, finite_number, load_json

FORMAT_VERSION = 1
MAGIC = "sheetview particles"
CENTER = ["x", "y", "z"]
QUAT = ["qw", "qx", "qy", "qz"]
#: Columns of each kind (required, optional).
KINDS = {
    "spheres": (CENTER + ["radius"], []),
    "ellipsoids": (CENTER + ["a", "b", "c"], QUAT),
    "layered": (CENTER + ["a", "layers"], ["b"] + QUAT),
}
KNOWN = set(CENTER + ["radius", "a", "b", "c", "layers"] + QUAT)
#: Columns whose presence marks a table as a particle table.
MARKERS = {"x", "y", "z", "radius", "layers"}
RESERVED_KEYS = {"units", "domain", "spacing", "thickness", "outline", "segments"}
#: Columns of a layered-particle table whose values are lengths.
LENGTHS = {"x", "y", "z", "radius", "a", "b", "c"}

_MAGIC_RE = re.compile(r"^#\s*sheetview particles v(\d+)\s*$")


# ------------------------------------------------------------------------- sniffing
def table_columns(path) -> list[str] | None:
    """The column names of a CSV, NPZ or Parquet table without reading its rows (None
    when they cannot be read: the reader of the file then says what is wrong)."""
    path = Path(path)
    suffix = path.suffix.lower()
    try:
        if suffix in (".csv", ".txt"):
            with open(path, "rb") as fh:
                head = fh.read(1 << 16)
            text = head.decode("utf-8", "replace")
            for line in text.splitlines():
                s = line.strip()
                if _MAGIC_RE.match(s):
                    return ["#particles"]
                if not s or s.startswith("#"):
                    continue
                return [c.strip().lstrip("\ufeff") for c in s.split(",")]
            return None
        if suffix == ".npz":
            with zipfile.ZipFile(path) as zf:
                return [n[:-4] for n in zf.namelist() if n.endswith(".npy")]
        if suffix in (".parquet", ".pq"):
            import pyarrow.parquet as pq
            return list(pq.read_schema(path).names)
    except Exception:  # noqa: BLE001 - a damaged file is the reader's to report
        return None
    return None


def is_particle_table(path) -> bool:
    """Whether a table file is a particle table: the CSV magic line ``# sheetview particles
    v1``, or a particle column (``x, y, z, radius, layers``) among its columns (an NPZ also
    needs its ``header`` array)."""
    names = table_columns(path)
    if names and Path(path).suffix.lower() == ".npz" and "header" not in names:
        return False  # not a sheetview table at all: the prism reader says what it needs
    return bool(names) and ("#particles" in names or bool(MARKERS & set(names)))


def kind_of_columns(names, path, line=None) -> str:
    """The kind of particle table given by its column names; refuses mixed, missing,
    duplicated and misspelt columns, naming them."""
    dup = sorted({n for n in names if list(names).count(n) > 1})
    if dup:
        raise InputError(f"column(s) {dup} appear more than once", path=path, line=line)
    prism = [c for c in names if c in CORNER_COLUMNS or c == "vertices"]
    if prism:
        raise InputError(f"the table mixes particle columns ({', '.join(n for n in names if n in KNOWN)}) "
                         f"with prism columns ({', '.join(prism)}): a table holds one kind; write "
                         f"particles and prisms to separate files", path=path, line=line)
    for n in names:
        if n not in KNOWN and n.lower() in KNOWN | {"r"}:
            hint = "radius" if n.lower() == "r" else n.lower()
            raise InputError(f"unknown column {n!r}; did you mean {hint!r}? (column names are "
                             f"lower case)", path=path, line=line)
        if n not in KNOWN:
            close = difflib.get_close_matches(n.lower(), sorted(KNOWN - {"a", "b", "c"}), n=1,
                                              cutoff=0.8)
            if close:
                raise InputError(f"unknown column {n!r}; did you mean {close[0]!r}?", path=path,
                                 line=line)
    s = set(names)
    if "layers" in s:
        kind = "layered"
        if "radius" in s or "c" in s:
            raise InputError("a layered-particle table (column 'layers') takes 'a' and optionally "
                             "'b' for the layer outline, not 'radius' or 'c'", path=path, line=line)
    elif "radius" in s:
        kind = "spheres"
        if s & {"a", "b", "c"} or s & set(QUAT):
            raise InputError("a table with 'radius' holds spheres and takes no 'a', 'b', 'c' or "
                             "quaternion columns; for ellipsoids give a, b, c (and qw, qx, qy, qz)",
                             path=path, line=line)
    else:
        kind = "ellipsoids"
    need, opt = KINDS[kind]
    missing = [c for c in need if c not in s]
    if missing:
        raise InputError(f"missing column(s) {', '.join(missing)}; a particle table holds "
                         f"spheres (x,y,z,radius), ellipsoids (x,y,z,a,b,c[,qw,qx,qy,qz]) or "
                         f"layered particles (x,y,z,a[,b],layers[,qw,qx,qy,qz])", path=path,
                         line=line)
    q = [c for c in QUAT if c in s]
    if q and len(q) != 4:
        raise InputError(f"an orientation needs all four quaternion columns qw, qx, qy, qz; "
                         f"found only {', '.join(q)}", path=path, line=line)
    return kind


def _number(header, where, key, path, default):
    if key not in header or header[key] is None:
        return default
    f = finite_number(header[key])
    if f is None or not f > 0:
        raise InputError(f"expected a positive number, got {str(header[key])[:40]}", path=path,
                         line=where.get(key), field=key)
    return f


def _assemble(arrays: dict, header: dict, where: dict, path, *, thickness=None, spacing=None,
              units=None, row_offset=None):
    """A ParticleSet (spheres, ellipsoids) or a Structure (layered particles) from columns in
    file units and the header; every value checked, naming the row and column."""
    names = list(arrays)
    kind = kind_of_columns(names, path)
    f = unit_factor(units if units is not None else header.get("units", "nm"), path=path,
                    line=where.get("units"))
    n = None
    for name, a in arrays.items():
        a = np.asarray(a)
        if n is None:
            n = len(a) if a.ndim == 1 else -1
        if a.ndim != 1 or a.shape != (n,) or a.dtype.kind not in "biuf":
            what = f"{a.dtype} values" if a.dtype.kind not in "biuf" else f"shape {a.shape}"
            raise InputError(f"column '{name}' must hold {n} numbers (one per particle), got "
                             f"{what}", path=path, field=name)
    if not n:
        raise InputError("the table has no rows", path=path)

    def col(name):
        return np.asarray(arrays[name], dtype=np.float64)

    def fail(e):
        if row_offset is not None and e.line is None:
            m = re.search(r"particle row (\d+)", e.detail)
            if m:
                return InputError(e.detail, path=path, line=int(m.group(1)) + row_offset,
                                  field=e.field)
        return e

    def bad_row(name, mask, what):
        i = int(np.flatnonzero(mask)[0])
        return fail(InputError(f"particle row {i + 1}: column '{name}' {what}, got "
                               f"{arrays[name][i]!r} ({int(mask.sum())} row(s) affected)",
                               path=path, field=name))

    for name in arrays:
        a = np.asarray(arrays[name])
        if a.dtype.kind == "f":
            bad = ~np.isfinite(a)
            if bad.any():
                raise bad_row(name, bad, "must be a finite number (found NaN or inf)")
    centers = np.stack([col(c) for c in CENTER], axis=1) * f
    if all(c in arrays for c in QUAT):
        q = np.stack([col(c) for c in QUAT], axis=1)
    else:
        q = np.tile([1.0, 0.0, 0.0, 0.0], (n, 1))
    dom = None
    if header.get("domain") is not None:
        dom = domain_from_dict(header["domain"], scale=f, path=path, line=where.get("domain"))
    meta = {k: v for k, v in header.items() if k not in RESERVED_KEYS}
    extra = {k: np.asarray(v) for k, v in arrays.items() if k not in KNOWN}
    src = str(path) if path is not None else None
    if kind == "layered":
        for name in ("a", "b"):
            if name in arrays:
                bad = ~(col(name) > 0)
                if bad.any():
                    raise bad_row(name, bad, "(layer semi-axis) must be a positive number")
        lay = col("layers")
        bad = (lay < 1) | (lay != np.round(lay)) | (lay > 1e6)
        if bad.any():
            raise bad_row("layers", bad, "must be a whole number of layers from 1 to 1e6")
        norm = np.linalg.norm(q, axis=1)
        bad = np.abs(norm - 1) > 1e-3
        if bad.any():
            raise bad_row("qw", bad, "with qx, qy, qz must form a unit quaternion (norm 1)")
        ab = np.stack([col("a"), col("b") if "b" in arrays else col("a")], axis=1) * f
        sp = spacing if spacing is not None else _number(header, where, "spacing", path,
                                                         None)
        sp = DEFAULT_SPACING_NM if sp is None else sp * (f if spacing is None else 1.0)
        t = thickness if thickness is not None else _number(header, where, "thickness", path,
                                                            None)
        t = DEFAULT_SHEET_THICKNESS_NM if t is None else t * (f if thickness is None else 1.0)
        outline = header.get("outline", "disc")
        if outline not in OUTLINES:
            raise InputError(f"expected one of {', '.join(OUTLINES)}, got {str(outline)[:40]!r}",
                             path=path, line=where.get("outline"), field="outline")
        seg = header.get("segments", DEFAULT_SEGMENTS)
        if not isinstance(seg, int) or isinstance(seg, bool) or not 3 <= seg <= 1024:
            raise InputError(f"expected a whole number from 3 to 1024, got {str(seg)[:40]}",
                             path=path, line=where.get("segments"), field="segments")
        if not 0 < t < sp:
            raise InputError(f"the sheet thickness ({t:g} nm) must be less than the repeat "
                             f"({sp:g} nm)", path=path, field="thickness")
        check_read_memory(int(lay.sum()) * seg * 400, f"{int(lay.sum()) * seg:,} prisms", path)
        s = layered_structure(centers, ab, lay.astype(np.int64), q, dom, spacing=sp,
                              thickness=t, outline=outline, segments=seg, columns=extra,
                              metadata=meta, source=src)
        try:
            s.validate()
        except InputError as e:
            raise InputError(f"{e.detail} (prisms made from the layered particles)", path=path,
                             field=e.field) from None
        return s
    given = [k for k, v in (("thickness", thickness), ("spacing", spacing)) if v is not None]
    if given:
        raise OptionError(f"<<{given[0]}>> does not apply to a table of {kind}; it applies to "
                          f"prism tables and layered particles", path=path, param=given[0])
    if kind == "spheres":
        semi = np.repeat(col("radius")[:, None], 3, axis=1) * f
    else:
        semi = np.stack([col("a"), col("b"), col("c")], axis=1) * f
    ps = ParticleSet(centers, semi, q, dom or inferred_domain(centers, np.zeros((n, 3))), kind,
                     extra, meta, src)
    try:
        ps.validate()
    except InputError as e:
        raise fail(e) from None
    if dom is None:
        R = quaternion_matrices(q)
        h = np.sqrt(np.einsum("nik,nk->ni", R ** 2, semi ** 2))
        ps = ParticleSet(ps.centers, ps.semi_axes, ps.rotations, inferred_domain(centers, h),
                         kind, extra, meta, src)
    return ps


# ---------------------------------------------------------------------------- readers
def read_csv(path, *, thickness=None, spacing=None, units=None):
    """Read the CSV form of a particle table."""
    import pyarrow as pa
    import pyarrow.csv as pcsv

    path = Path(path)
    try:
        size = path.stat().st_size
        check_read_memory(size * CSV_READ_FACTOR, f"{size:,} bytes of CSV text", path)
        raw = path.read_bytes()
    except OSError as e:
        raise InputError(f"cannot read: {e.strerror}", path=path) from None
    header, where, column_line, body, names = split_csv_header(
        raw, path, what="particle table", magic=_MAGIC_RE, version=FORMAT_VERSION,
        reserved=RESERVED_KEYS)
    kind_of_columns(names, path, column_line)
    try:
        table = pcsv.read_csv(
            io.BytesIO(body),
            read_options=pcsv.ReadOptions(column_names=names, skip_rows=1),
            convert_options=pcsv.ConvertOptions(column_types={n: pa.float64() for n in names},
                                                strings_can_be_null=False,
                                                quoted_strings_can_be_null=False,
                                                null_values=[]))
    except pa.ArrowInvalid as e:
        msg = str(e).splitlines()[0]
        m = re.search(r"In CSV column #(\d+): .*invalid value '(.*)'", msg)
        if m:
            c = names[int(m.group(1))] if int(m.group(1)) < len(names) else m.group(1)
            raise InputError(f"column '{c}': {m.group(2)[:40]!r} is not a number (every cell "
                             f"must be numeric; empty cells are not allowed)", path=path,
                             field=str(c)) from None
        m = re.search(r"Expected (\d+) columns, got (\d+)", msg)
        if m:
            raise InputError(f"expected {m.group(1)} cells per row like the column line, got "
                             f"{m.group(2)} (a truncated or malformed row)", path=path) from None
        raise InputError(f"cannot parse the table: {msg[:200]}", path=path) from None
    if table.num_rows == 0:
        raise InputError("the table has a column line but no rows", path=path)
    arrays = {n: table.column(n).to_numpy() for n in names}
    return _assemble(arrays, header, where, path, thickness=thickness, spacing=spacing,
                     units=units, row_offset=column_line)


def read_npz(path, *, thickness=None, spacing=None, units=None):
    """Read the NPZ form: one 1-D array per column and a 0-d text array ``header`` (JSON).
    Pickles are refused; shapes and sizes are checked before any array is read."""
    path = Path(path)
    inv = npz_inventory(path)
    if "header" not in inv:
        raise InputError("not a sheetview particle NPZ (needs a 'header' array)", path=path)
    hshape, hdtype = inv["header"]
    if hshape != () or hdtype.kind != "U":
        raise InputError(f"the 'header' array must be one text (a 0-d unicode array), got "
                         f"{hdtype} {hshape}", path=path, field="header")
    names = [k for k in inv if k != "header"]
    kind_of_columns(names, path)
    n = None
    for k in names:
        shp, dt = inv[k]
        if n is None:
            n = shp[0] if len(shp) == 1 else -1
        if len(shp) != 1 or shp != (n,) or dt.kind not in "fiub":
            raise InputError(f"array {k!r} must hold {n} numbers (one per particle), got {dt} "
                             f"{shp}", path=path, field=k)
    check_read_memory(max(n, 0) * (48 * len(names) + 512), f"{n:,} particles", path)
    try:
        with np.load(path, allow_pickle=False) as z:
            data = {k: z[k] for k in z.files}
    except ValueError as e:
        raise InputError(f"damaged NPZ, or it holds Python objects (pickles), which sheetview "
                         f"never loads ({str(e)[:120]})", path=path) from None
    except (zipfile.BadZipFile, EOFError, OSError, KeyError, zlib.error) as e:
        raise InputError(f"damaged or truncated NPZ ({type(e).__name__})", path=path) from None
    header = load_json(str(data.pop("header")), path=path, field="header",
                       what="the 'header' array", expect=dict)
    fmt_name = str(header.pop("format", f"{MAGIC} v1"))
    m = re.match(rf"{MAGIC} v(\d+)$", fmt_name)
    if not m or int(m.group(1)) > FORMAT_VERSION:
        raise InputError(f"unsupported format {fmt_name[:80]!r} (this sheetview reads "
                         f"{MAGIC} v{FORMAT_VERSION})", path=path, field="format")
    return _assemble(data, header, {}, path, thickness=thickness, spacing=spacing, units=units)


def read_parquet(path, *, thickness=None, spacing=None, units=None):
    """Read the Parquet form (header in the ``sheetview`` schema metadata, page checksums
    verified, the columns checked against the content checksum when the file has one)."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    path = Path(path)
    try:
        pf = pq.ParquetFile(path, page_checksum_verification=True,
                            thrift_string_size_limit=64 * 2**20)
        md = pf.metadata
        check_read_memory(md.num_rows * (48 * md.num_columns + 512), f"{md.num_rows:,} rows",
                          path)
        table = pf.read(use_threads=True)
    except InputError:
        raise
    except (pa.ArrowException, OSError, ValueError) as e:
        raise InputError(f"damaged or not a Parquet file ({str(e).splitlines()[0][:160]})",
                         path=path) from None
    meta = table.schema.metadata or {}
    header = {}
    if b"sheetview" in meta:
        header = load_json(meta[b"sheetview"], path=path, field="sheetview",
                           what="the 'sheetview' schema metadata", expect=dict)
        header.pop("format", None)
    names = table.column_names
    kind_of_columns(names, path)
    arrays = {}
    for n in names:
        c = table.column(n)
        if not (pa.types.is_floating(c.type) or pa.types.is_integer(c.type)):
            raise InputError(f"column {n!r} must be numeric, not {c.type}", path=path, field=n)
        if c.null_count:
            raise InputError(f"column {n!r} has {c.null_count:,} missing (null) value(s); every "
                             f"cell must be a number", path=path, field=n)
        arrays[n] = c.to_numpy()
    if CONTENT_KEY in meta:
        if content_hash(arrays, meta.get(b"sheetview", b"")) != \
                meta[CONTENT_KEY].decode("ascii", errors="replace"):
            raise InputError("the particle columns or the header do not match the checksum "
                             "written with them: the file is damaged", path=path)
    return _assemble(arrays, header, {}, path, thickness=thickness, spacing=spacing, units=units)


READERS = {".csv": read_csv, ".txt": read_csv, ".npz": read_npz, ".parquet": read_parquet,
           ".pq": read_parquet}


def read_particles(path, *, thickness=None, spacing=None, units=None):
    """Read a particle table (CSV, NPZ or Parquet by suffix): a
    :class:`~sheetview.particles.ParticleSet` for spheres and ellipsoids, a
    :class:`~sheetview.structure.Structure` of prisms for layered particles. ``thickness``
    and ``spacing`` (nm) override the sheet thickness and repeat of layered particles;
    ``units`` overrides the header."""
    for name, v in (("thickness", thickness), ("spacing", spacing)):
        if v is not None and not (np.isfinite(v) and v > 0):
            raise OptionError(f"must be a positive number of nm, got {v}", param=name)
    suffix = Path(path).suffix.lower()
    if suffix not in READERS:
        raise InputError(f"a particle table is .csv, .npz or .parquet, not {suffix!r}", path=path)
    return READERS[suffix](path, thickness=thickness, spacing=spacing, units=units)


# ---------------------------------------------------------------------------- writers
def particle_columns(ps: ParticleSet) -> dict:
    """The table columns of a ParticleSet (spheres: x,y,z,radius; ellipsoids: x,y,z,a,b,c,
    qw,qx,qy,qz), then its extra columns."""
    cols = {n: ps.centers[:, k] for k, n in enumerate(CENTER)}
    if ps.kind == "spheres":
        cols["radius"] = ps.semi_axes[:, 0]
    else:
        for k, n in enumerate("abc"):
            cols[n] = ps.semi_axes[:, k]
        for k, n in enumerate(QUAT):
            cols[n] = ps.rotations[:, k]
    for k in sorted(ps.columns):
        cols[k] = ps.columns[k]
    return cols


def particle_header(ps: ParticleSet) -> dict:
    h = {"units": "nm"}
    if not ps.domain.inferred:
        h["domain"] = ps.domain.to_dict()
    h.update({k: v for k, v in ps.metadata.items() if k not in RESERVED_KEYS})
    return h


def write_table(columns: dict, header: dict, path, *, force=False) -> Path:
    """Write particle columns (nm) and a header as CSV, NPZ or Parquet by suffix (floats in
    shortest round-trip form; atomic: written under a temporary name, then renamed)."""
    import pyarrow as pa

    path = Path(path)
    suffix = path.suffix.lower()
    cols = {k: np.ascontiguousarray(v) for k, v in columns.items()}
    kind_of_columns(list(cols), path)
    with atomic_path(path, force) as tmp:
        if suffix in (".csv", ".txt"):
            import pyarrow.csv as pcsv
            lines = [f"# {MAGIC} v{FORMAT_VERSION}"]
            lines += [f"# {k}: {json.dumps(v)}" for k, v in header.items()]
            lines.append(",".join(cols))
            with open(tmp, "wb") as fh:
                fh.write(("\n".join(lines) + "\n").encode("utf-8"))
                pcsv.write_csv(pa.table(cols), fh,
                               write_options=pcsv.WriteOptions(include_header=False))
        elif suffix == ".npz":
            h = dict(header, format=f"{MAGIC} v{FORMAT_VERSION}")
            with open(tmp, "wb") as fh:
                np.savez_compressed(fh, header=np.array(json.dumps(h)), **cols)
        elif suffix in (".parquet", ".pq"):
            import pyarrow.parquet as pq
            text = json.dumps(dict(header, format=f"{MAGIC} v{FORMAT_VERSION}")).encode()
            table = pa.table(cols).replace_schema_metadata(
                {b"sheetview": text, CONTENT_KEY: content_hash(cols, text).encode()})
            pq.write_table(table, tmp, compression="zstd", write_page_checksum=True)
        else:
            raise OptionError(f"cannot write a particle table as {suffix or '(no suffix)'!r}; "
                              f"use .csv, .npz or .parquet", path=path)
    return path


def write_particles(ps: ParticleSet, path, *, force=False) -> Path:
    """Write a ParticleSet as a particle table (CSV, NPZ or Parquet by suffix)."""
    return write_table(particle_columns(ps), particle_header(ps), path, force=force)
