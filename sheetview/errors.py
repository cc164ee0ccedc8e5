"""Errors a user can cause.

Every error that comes from a bad file or a bad option is a :class:`SheetviewError`.
Its message names the file (and the line, row or field where known) and says what
was expected. The command line prints the message without a traceback and exits
with status 2.
"""
from __future__ import annotations

from pathlib import Path


class SheetviewError(Exception):
    """Base class of every error the user can cause and fix."""

    exit_code = 2

    def __init__(self, message: str, *, path: str | Path | None = None,
                 line: int | None = None, field: str | None = None):
        self.path = None if path is None else str(path)
        self.line = line
        self.field = field
        self.detail = message
        where = []
        if self.path is not None:
            where.append(self.path)
        if line is not None:
            where.append(f"line {line}")
        if field is not None:
            where.append(f"field '{field}'")
        prefix = ", ".join(where)
        super().__init__(f"{prefix}: {message}" if prefix else message)


class InputError(SheetviewError):
    """A file could not be read, or its content is not what was expected."""


class OptionError(SheetviewError):
    """An option or parameter is out of range or inconsistent."""


class OutputExistsError(SheetviewError):
    """An output already exists and ``force`` was not given."""


class MemoryLimitError(SheetviewError):
    """A requested computation would need more memory than allowed."""


def positive(value, what: str, *, field: str | None = None, unit: str = "nm") -> float:
    """``value`` as a finite float > 0, else an :class:`OptionError` naming ``what``
    (e.g. ``"--pixel"``) and the expected unit."""
    import math
    kind = f"number of {unit}" if unit else "number"
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise OptionError(f"{what} must be a positive {kind}, got {value!r}", field=field) from None
    if not (math.isfinite(v) and v > 0):
        raise OptionError(f"{what} must be a positive {kind}, got {value!r}", field=field)
    return v
