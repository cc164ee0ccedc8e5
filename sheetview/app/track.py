"""Descriptors of a grown structure against its progress: the measures run on the
structure as it stood at several moments (``sheetview kinetics --track``)."""
from __future__ import annotations

import math

from ..errors import OptionError
from ..measures.kinetics import structure_at
from .document import flatten
from .registry import select
from .run import Run
from .settings import Settings


def track(structure, progresses, *, only=("stacking", "order"), settings=None,
          keys=None, progress_cb=None) -> dict:
    """Descriptors against progress: run the measures ``only`` on the structure as it
    stood at each progress and collect their scalar results.

    Returns a table {column: list}: ``progress``, ``time``, ``n_prisms`` and the scalars
    of each result's ``to_dict()`` as dotted names (``stacking.mean``); ``keys`` (a list
    of substrings) keeps only the columns whose names contain one of them.
    """
    names = select(only, structure)
    ps = [float(p) for p in progresses]
    if not ps:
        raise OptionError("--track needs at least one progress value", param="track")
    bad = [p for p in ps if not (math.isfinite(p) and 0 < p <= 1)]
    if bad:
        raise OptionError(f"--track values must be fractions in (0, 1], got {bad[0]!r} "
                          f"(for a percentage divide by 100)", param="track")
    rows = []
    for p in ps:
        sub, m = structure_at(structure, progress=p)
        if progress_cb:
            progress_cb(p, m)
        run = Run(sub, Settings.of(settings)).run(names)
        flat = flatten({n: run.results[n].to_dict() for n in names if n in run.results})
        flat = {k: v for k, v in flat.items() if isinstance(v, (int, float)) and not isinstance(v, bool)
                or v is None}
        if keys:
            flat = {k: v for k, v in flat.items() if any(s in k for s in keys)}
        rows.append({"progress_requested": p, "progress": m.progress, "time": m.time,
                     "n_prisms": m.n_prisms, **flat})
    cols = []
    for r in rows:
        for k in r:
            if k not in cols:
                cols.append(k)
    return {c: [r.get(c) for r in rows] for c in cols}
