"""What every reader does before and while it parses a file.

* :func:`check_input_file`: the path names a regular file that can be opened (links are
  followed; a dangling link, a link loop, a folder, a FIFO, a socket or a device is
  refused at once, so that nothing waits on a pipe that never delivers);
* :func:`quiet`: libraries' warnings and log records are not printed while a file is read
  (a reader says what is wrong in its own one-line message) and numpy's floating point
  warnings are off;
* :func:`load_json`: JSON text from a file as a value of the expected type, with nesting
  depth, integer size and type errors turned into one-line :class:`InputError`;
* :func:`check_read_memory`: the memory a declared content needs, checked against
  :func:`memory_budget` BEFORE anything of that size is allocated.
"""
from __future__ import annotations

import contextlib
import errno
import json
import logging
import math
import os
import re
import stat
import warnings
from pathlib import Path

import numpy as np

from ..errors import InputError, MemoryLimitError

#: Fraction of the available memory that reading one file may take.
MEMORY_FRACTION = 0.75
#: Deepest JSON nesting accepted in a header or marker (sheetview writes depth <= 4;
#: free metadata of users may nest more).
MAX_JSON_DEPTH = 64
#: Longest JSON text accepted in a header, marker or metadata field (bytes).
MAX_JSON_BYTES = 16 * 2**20

_KINDS = {stat.S_IFIFO: "a named pipe (FIFO)", stat.S_IFSOCK: "a socket",
          stat.S_IFCHR: "a character device", stat.S_IFBLK: "a block device",
          stat.S_IFDIR: "a folder"}


def check_input_file(path, what: str = "a file", missing: str = "no such file") -> Path:
    """Refuse anything but a readable regular file (after following links), naming it;
    ``missing`` is the message for a file that does not exist.

    Returns ``Path(path)`` unchanged (messages keep naming the file as given).
    """
    path = Path(path)
    try:
        st = os.stat(path)
    except FileNotFoundError:
        if os.path.islink(path):
            raise InputError(f"is a symbolic link to {os.readlink(path)!r}, which does not exist",
                             path=path) from None
        raise InputError(missing, path=path) from None
    except OSError as e:
        if e.errno == errno.ELOOP:
            raise InputError("is a symbolic link loop (the links never reach a file)",
                             path=path) from None
        if e.errno == errno.ENAMETOOLONG:
            raise InputError("the file name is too long", path=path) from None
        raise InputError(f"cannot be examined: {e.strerror}", path=path) from None
    mode = stat.S_IFMT(st.st_mode)
    if mode == stat.S_IFDIR:
        raise InputError(f"is a folder, expected {what}", path=path)
    if mode != stat.S_IFREG:
        kind = _KINDS.get(mode, "not a regular file")
        raise InputError(f"is {kind}, not a regular file; sheetview reads regular files only",
                         path=path)
    try:
        # O_NONBLOCK: should the file have been swapped for a FIFO since the stat, opening
        # it does not wait for a writer
        fd = os.open(path, os.O_RDONLY | getattr(os, "O_NONBLOCK", 0))
    except OSError as e:
        raise InputError(f"cannot be opened: {e.strerror}", path=path) from None
    try:
        if stat.S_IFMT(os.fstat(fd).st_mode) != stat.S_IFREG:
            raise InputError("is not a regular file; sheetview reads regular files only",
                             path=path)
    finally:
        os.close(fd)
    return path


@contextlib.contextmanager
def quiet():
    """No library warnings, log records or numpy floating point warnings while reading."""
    previous = logging.root.manager.disable
    logging.disable(logging.CRITICAL)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            with np.errstate(all="ignore"):
                yield
    finally:
        logging.disable(previous)


# ------------------------------------------------------------------------------- JSON
_STRING_RE = re.compile(r'"(?:\\.|[^"\\])*"')


def _depth(text: str) -> int:
    """Deepest nesting of brackets outside strings (vectorised, no recursion)."""
    bare = _STRING_RE.sub("", text).encode("utf-8", errors="replace")
    b = np.frombuffer(bare, dtype=np.uint8)
    if b.size == 0:
        return 0
    step = ((b == 91) | (b == 123)).astype(np.int64) - ((b == 93) | (b == 125))
    return int(np.cumsum(step).max())


def load_json(text, *, path=None, field=None, line=None, what="header",
              expect: type | tuple | None = None):
    """Parse JSON ``text`` from a file; refuse with an :class:`InputError` naming the file,
    line and field when it is not JSON, nests deeper than :data:`MAX_JSON_DEPTH`, holds an
    integer of more digits than Python converts, or is not of type ``expect``."""
    if isinstance(text, bytes):
        text = text.decode("utf-8", errors="replace")
    text = str(text)
    if len(text) > MAX_JSON_BYTES:
        raise InputError(f"{what} is {len(text):,} characters of JSON, more than the "
                         f"{MAX_JSON_BYTES:,} accepted", path=path, line=line, field=field)
    if text.count("[") + text.count("{") > MAX_JSON_DEPTH and _depth(text) > MAX_JSON_DEPTH:
        raise InputError(f"{what} nests JSON deeper than {MAX_JSON_DEPTH} levels", path=path,
                         line=line, field=field)
    try:
        value = json.loads(text)
    except json.JSONDecodeError as e:
        raise InputError(f"{what} is not valid JSON ({e.msg} at column {e.colno})", path=path,
                         line=line, field=field) from None
    except ValueError as e:  # integers beyond the digit limit of int()
        raise InputError(f"{what} is not usable JSON ({str(e).split(';')[0]})", path=path,
                         line=line, field=field) from None
    except RecursionError:
        raise InputError(f"{what} nests JSON too deeply", path=path, line=line,
                         field=field) from None
    if expect is not None and not isinstance(value, expect):
        names = {dict: "a JSON object", list: "a JSON array", str: "a JSON string"}
        want = names.get(expect, getattr(expect, "__name__", str(expect))) \
            if not isinstance(expect, tuple) else " or ".join(names.get(t, t.__name__) for t in expect)
        raise InputError(f"{what} must be {want}, got {json_type(value)}", path=path,
                         line=line, field=field)
    return value


def json_type(v) -> str:
    """The JSON name of a parsed value's type, for messages."""
    if v is None:
        return "null"
    if isinstance(v, bool):
        return "true/false"
    if isinstance(v, (int, float)):
        return "a number"
    if isinstance(v, str):
        return "a string"
    if isinstance(v, list):
        return "an array"
    if isinstance(v, dict):
        return "an object"
    return type(v).__name__


def finite_number(v) -> float | None:
    """``v`` as a finite float if it is a JSON number (not true/false) that is finite as a
    float, else None (huge integers do not raise)."""
    if isinstance(v, bool) or not isinstance(v, (int, float, np.integer, np.floating)):
        return None
    try:
        f = float(v)
    except (OverflowError, ValueError):
        return None
    return f if math.isfinite(f) else None


def fmt(v) -> str:
    """A number for a message: plain Python text, never ``np.float64(...)``."""
    if isinstance(v, (np.generic,)):
        v = v.item()
    if isinstance(v, int) and not isinstance(v, bool) and abs(v) >= 10**15:
        try:
            return f"{float(v):.6g}"
        except OverflowError:
            return f"a {len(str(abs(v)))}-digit integer"
    if isinstance(v, float):
        return f"{v:.6g}"
    return str(v)[:80]


# ----------------------------------------------------------------------------- memory
def available_memory() -> int:
    from ..grid import available_memory as avail
    return avail()


def memory_budget() -> int:
    """Bytes that reading one file may take: :data:`MEMORY_FRACTION` of the available
    memory."""
    return int(MEMORY_FRACTION * available_memory())


def gib(n) -> str:
    n = int(n)
    if n >= 2**40 * 1024:
        return f"{n / 2**50:.3g} PiB"
    return f"{n / 2**30:.2f} GiB" if n >= 2**30 else f"{n / 2**20:.1f} MiB"


def check_read_memory(need: int, what: str, path, budget: int | None = None) -> None:
    """Refuse, before allocating, a content that needs ``need`` bytes (exact integer)
    beyond :func:`memory_budget`; ``what`` says what the file declares."""
    budget = memory_budget() if budget is None else budget
    if int(need) > budget:
        raise MemoryLimitError(
            f"declares {what}, which needs about {gib(need)} to read, more than the "
            f"{gib(budget)} allowed ({int(MEMORY_FRACTION * 100)}% of the available memory); "
            f"the file is damaged or too large for this machine", path=path)


def check_declared(declared: int, available: int, what: str, path) -> None:
    """Refuse a file whose header declares more bytes of data (``declared``) than the file
    holds (``available``): the header is damaged or the file truncated."""
    if int(declared) > int(available):
        raise InputError(f"declares {what} ({int(declared):,} bytes) but holds only "
                         f"{int(available):,} bytes of data: damaged header or truncated file",
                         path=path)


# ------------------------------------------------------------------------------- NPY
def read_npy_header(fh):
    """``(shape, fortran_order, dtype)`` from the header of an NPY stream positioned at its
    start (versions 1.0, 2.0 and 3.0); raises ValueError on a damaged header."""
    version = np.lib.format.read_magic(fh)
    if version == (1, 0):
        return np.lib.format.read_array_header_1_0(fh)
    if version == (2, 0):
        return np.lib.format.read_array_header_2_0(fh)
    try:
        from numpy.lib._format_impl import _read_array_header
    except ImportError:  # pragma: no cover - older numpy
        _read_array_header = np.lib.format._read_array_header
    return _read_array_header(fh, version)


# ------------------------------------------------------------------------------ TIFF
#: Most each TIFF compression can expand its data (declared bytes per stored byte), by
#: code: none, PackBits (128 bytes from 2), LZW (a 12-bit code stands for at most 4096
#: bytes; taken as 3000), deflate (RFC 1951, about 1032). Other codings: no bound here (the
#: memory budget still applies).
TIFF_MAX_RATIO = {1: 1, 32773: 64, 5: 3000, 8: 1032, 32946: 1032}


def check_tiff_pages(tif, path, pages=None) -> None:
    """Every page's image data inside the file, and no page declaring more pixels than its
    compression can produce from the bytes it stores: a damaged dimension tag or a
    truncated file is refused before tifffile allocates the declared image."""
    size = os.stat(path).st_size
    if pages is None:
        pages = []
        try:
            for k in range(len(tif.pages)):
                pages.append(tif.pages[k])
        except Exception as e:  # noqa: BLE001 - tifffile raises several kinds
            text = " ".join(str(e).split())[:120]
            raise InputError(f"page {len(pages) + 1} of the TIFF is damaged ({text}): truncated "
                             f"or damaged file", path=path) from None
    for k, page in enumerate(pages):
        if page is None or not hasattr(page, "dataoffsets"):
            continue
        offsets = page.dataoffsets or ()
        counts = page.databytecounts or ()
        stored = 0
        for o, c in zip(offsets, counts):
            if o < 0 or c < 0 or o + c > size:
                raise InputError(f"page {k + 1} of the TIFF: its image data ({c:,} bytes at "
                                 f"offset {o:,}) lies beyond the end of the file ({size:,} "
                                 f"bytes): truncated or damaged", path=path)
            stored += c
        try:
            shape = tuple(int(d) for d in page.shape)
            bits = getattr(page, "bitspersample", 0) or 0
            bits = max(bits) if isinstance(bits, (tuple, list)) else int(bits)
            bits = bits or 8 * (np.dtype(page.dtype).itemsize if page.dtype is not None else 1)
            compression = int(page.compression)
        except (TypeError, ValueError, OverflowError):
            continue  # a damaged tag: tifffile refuses the page when it decodes it
        declared = (math.prod(shape) * bits + 7) // 8
        ratio = TIFF_MAX_RATIO.get(compression)
        if ratio is not None and declared > ratio * stored + 4096:
            raise InputError(f"page {k + 1} of the TIFF declares a {' x '.join(map(str, shape))} "
                             f"image ({declared:,} bytes) but stores {stored:,} bytes: a "
                             f"damaged size tag or a truncated file", path=path)
