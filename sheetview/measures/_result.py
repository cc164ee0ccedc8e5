"""What every measure result shares: a short ``repr``, an HTML table for notebooks, and the
hooks the application layer reads (``headline`` for the summary, ``tables`` for CSV).

A result class derives from :class:`Result` (with ``@dataclass(repr=False)`` so that the
dataclass does not write its own ``repr``, which would print whole arrays) and implements
``to_dict()``; it may override :meth:`Result.headline` (summary keys), :meth:`Result.tables`
(CSV tables: file stem -> columns) and :meth:`Result.brief` (the one-line description).
"""
from __future__ import annotations

import html
import math

#: Longest text of a repr.
REPR_WIDTH = 100


class Result:
    """Mixin of measure results (see the module docstring)."""

    def headline(self) -> dict:
        """Keys of the summary document this result adds at the top level (default none)."""
        return {}

    def tables(self) -> dict:
        """CSV tables: file stem -> {column: values}; default ``{name: table()}`` when the
        result has a ``table()`` method (the name given by the registry)."""
        return {}

    def scalars(self) -> dict:
        """The scalar entries of ``to_dict()`` (numbers, texts, booleans), first level."""
        out = {}
        for k, v in self.to_dict().items():
            if isinstance(v, (bool, int, float, str)) or v is None:
                out[k] = v
        return out

    def brief(self) -> str:
        """One line: the first scalars of the result."""
        parts = []
        for k, v in self.scalars().items():
            if isinstance(v, float):
                v = f"{v:.4g}" if math.isfinite(v) else str(v)
            parts.append(f"{k}={v}")
        return ", ".join(parts)

    def __repr__(self) -> str:
        text = f"{type(self).__name__}({self.brief()})"
        return text if len(text) <= REPR_WIDTH else text[:REPR_WIDTH - 2] + "…)"

    def _repr_html_(self) -> str:
        rows = "".join(f"<tr><th style='text-align:left'>{html.escape(str(k))}</th>"
                       f"<td style='text-align:left'>{html.escape(_fmt(v))}</td></tr>"
                       for k, v in self.scalars().items())
        return (f"<table><caption>{html.escape(type(self).__name__)}</caption>{rows}"
                f"</table>")


def _fmt(v) -> str:
    if isinstance(v, float):
        return f"{v:.6g}" if math.isfinite(v) else "–"
    return "–" if v is None else str(v)
