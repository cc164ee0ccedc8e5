"""Safe output: never overwrite without ``force``, never leave a half-written file.

Every writer in sheetview writes through :func:`atomic_path`: the data goes to a
temporary name beside the target and is renamed over it only when complete, so a
crash, a full disk or a kill leaves either the old file or nothing.
"""
from __future__ import annotations

import contextlib
import os
import tempfile
from pathlib import Path

from ..errors import OutputExistsError, SheetviewError


def check_writable(path: str | Path, force: bool = False) -> Path:
    """Check that ``path`` may be written: its folder exists and is writable, and it
    does not exist already unless ``force``."""
    path = Path(path)
    if path.exists() and not force:
        raise OutputExistsError("already exists; pass --force (force=True) to overwrite it",
                                path=path)
    if path.is_dir():
        raise SheetviewError("is a folder, expected a file name", path=path)
    parent = path.parent if str(path.parent) else Path(".")
    if not parent.is_dir():
        raise SheetviewError(f"folder {str(parent)!r} does not exist", path=path)
    if not os.access(parent, os.W_OK):
        raise SheetviewError(f"folder {str(parent)!r} is not writable", path=path)
    return path


@contextlib.contextmanager
def atomic_path(path: str | Path, force: bool = False, suffix: str | None = None):
    """Yield a temporary path beside ``path``; rename it to ``path`` on success.

    The temporary name keeps the target's suffix (some libraries choose the format
    from it). On any exception the temporary file is removed and ``path`` is untouched.
    """
    path = check_writable(path, force)
    suffix = path.suffix if suffix is None else suffix
    fd, tmp = tempfile.mkstemp(prefix=f".{path.stem}.", suffix=".part" + suffix,
                               dir=str(path.parent if str(path.parent) else "."))
    os.close(fd)
    tmp = Path(tmp)
    try:
        yield tmp
        if not tmp.exists() or tmp.stat().st_size == 0 and not _empty_ok(path):
            raise SheetviewError("writer produced no data", path=path)
        if path.exists() and not force:  # appeared while we were writing
            raise OutputExistsError("appeared while writing; not overwritten", path=path)
        os.chmod(tmp, 0o666 & ~_umask())  # mkstemp makes 0600; give the usual mode
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(OSError):
            tmp.unlink()
        raise


def _empty_ok(path: Path) -> bool:
    return False


def user_mode(folder: bool = False) -> int:
    """The mode a new file (0666) or folder (0777) gets under the user's umask: what
    temporary files and folders are given before they are renamed into place."""
    return (0o777 if folder else 0o666) & ~_umask()


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


def json_default(o):
    """``json.dumps`` fallback for metadata written into files: numpy scalars and arrays as
    numbers and lists, anything else as its text."""
    import numpy as np
    if isinstance(o, np.generic):
        return o.item()
    if isinstance(o, np.ndarray):
        return o.tolist()
    return str(o)
