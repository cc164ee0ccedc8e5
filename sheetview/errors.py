"""Errors a user can cause.

Every error that comes from a bad file or a bad option is a :class:`SheetviewError`.
Its message names the file (and the line or row where known), the parameter, and says what
was expected. :class:`OptionError` and :class:`InputError` are also :class:`ValueError`\\ s,
so Python code can catch them the usual way. The parameter is named as the Python API names
it (``voxel``); the command line translates it to its option (``--voxel``) in one place
(:mod:`sheetview.cli`), prints the message on one line without a traceback and exits with
status 2.
"""
from __future__ import annotations

import re
from pathlib import Path

#: A parameter named inside a message: ``<<voxel>>`` (shown as ``--voxel`` on the command
#: line, ``voxel`` in Python).
_REF = re.compile(r"<<([A-Za-z_][A-Za-z0-9_]*)>>")


class SheetviewError(Exception):
    """Base class of every error the user can cause and fix.

    Parameters
    ----------
    message : what is wrong and what was expected
    path : the file concerned
    line : line (or row) of the file
    field : the field (header key, column) of the file concerned
    param : the parameter concerned, by its Python name (``voxel``, ``pixel``)
    """

    exit_code = 2

    def __init__(self, message: str, *, path: str | Path | None = None,
                 line: int | None = None, field: str | None = None,
                 param: str | None = None):
        self.path = None if path is None else str(path)
        self.line = line
        self.field = field
        self.param = param
        self.detail = message
        super().__init__(self.format())

    def format(self, name_of=None) -> str:
        """The one-line message; ``name_of(param)`` gives the name the parameter is shown
        by (the command line passes its option names), default the parameter itself.
        Other parameters the message speaks of are written ``<<name>>`` in it and shown
        the same way."""
        where = []
        if self.path is not None:
            where.append(self.path)
        if self.line is not None:
            where.append(f"line {self.line}")
        if self.field is not None:
            where.append(f"field '{self.field}'")
        show = name_of if name_of is not None else (lambda p: p)
        text = _REF.sub(lambda m: show(m.group(1)) or m.group(1), self.detail)
        if self.param is not None:
            shown = show(self.param)
            if shown and not text.startswith((f"{shown}:", f"{shown} ")):
                text = f"{shown}: {text}"
        prefix = ", ".join(where)
        return f"{prefix}: {text}" if prefix else text

    def __str__(self) -> str:
        return self.format()


class InputError(SheetviewError, ValueError):
    """A file could not be read, or its content is not what was expected."""


class OptionError(SheetviewError, ValueError):
    """An option or parameter is out of range or inconsistent."""


class OutputExistsError(SheetviewError):
    """An output already exists and ``force`` was not given."""


class MemoryLimitError(SheetviewError):
    """A requested computation would need more memory than allowed."""


def positive(value, what: str, *, param: str | None = None, unit: str = "nm",
             field: str | None = None) -> float:
    """``value`` as a finite float > 0, else an :class:`OptionError` naming ``what``
    (the parameter) and the expected unit."""
    import math
    kind = f"number of {unit}" if unit else "number"
    name = param
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise OptionError(f"{what} must be a positive {kind}, got {value!r}", param=name,
                          field=field) from None
    if not (math.isfinite(v) and v > 0):
        raise OptionError(f"{what} must be a positive {kind}, got {value!r}", param=name,
                          field=field)
    return v
