"""Options shared by commands that read a structure, and small output helpers."""
from __future__ import annotations

import json
import math

import click

from ..errors import OptionError


def _parse_phases(value):
    """Parse ``--phases 0=outside,1=solid,2=gel`` into {0: 'outside', ...}."""
    if value is None:
        return None
    out = {}
    for item in value.split(","):
        if "=" not in item:
            raise OptionError(f"--phases: expected VALUE=PHASE pairs such as 0=outside,255=solid, "
                              f"got {item!r}")
        k, v = item.split("=", 1)
        try:
            out[int(k)] = v.strip().lower()
        except ValueError:
            raise OptionError(f"--phases: {k!r} is not a whole number") from None
    return out


def _parse_shape(value):
    if value is None:
        return None
    try:
        shape = tuple(int(v) for v in value.lower().replace("x", ",").split(","))
    except ValueError:
        raise OptionError(f"--shape: expected NX,NY,NZ, got {value!r}") from None
    if len(shape) != 3 or min(shape) <= 0:
        raise OptionError(f"--shape: expected three positive whole numbers, got {value!r}")
    return shape


def read_options(f):
    """Decorator adding the options that steer reading to a command."""
    opts = [
        click.option("--thickness", type=float, default=None,
                     help="Prism thickness in nm where the file gives none (meshes, plain CSV)."),
        click.option("--spacing", type=float, default=None,
                     help="Nominal interlayer repeat in nm (overrides the file; default 1.4)."),
        click.option("--units", default=None,
                     help='Length units of the file when it does not say: nm, A (angstrom), um.'),
        click.option("--as", "as_", type=click.Choice(["auto", "sheets", "solid"]), default="auto",
                     show_default=True,
                     help="Meshes: read open surfaces as sheet mid-surfaces and closed ones as "
                          "solid bodies (auto), or force one reading."),
        click.option("--voxel-size", type=float, default=None,
                     help="Volumes: voxel edge in nm (required where the file does not say)."),
        click.option("--phases", default=None,
                     help="Volumes: map file values to phases, e.g. 0=gel,1=solid,2=interlayer."),
        click.option("--shape", "raw_shape", default=None,
                     help="Raw volumes: NX,NY,NZ."),
        click.option("--dtype", "raw_dtype", default=None,
                     help="Raw volumes: numpy dtype such as uint8, <u2, float32."),
        click.option("--byte-order", "raw_byte_order", type=click.Choice(["little", "big"]),
                     default=None, help="Raw volumes: byte order of multi-byte values."),
    ]
    for o in reversed(opts):
        f = o(f)
    return f


def load(path, thickness=None, spacing=None, units=None, as_="auto", voxel_size=None,
         phases=None, raw_shape=None, raw_dtype=None, raw_byte_order=None):
    """Read a file with the options of :func:`read_options` (only those that apply)."""
    from ..io import family_of, read

    fam = family_of(path)
    opts = {}
    if fam in ("prisms", "meshes"):
        opts.update(thickness=thickness, spacing=spacing, units=units)
        if fam == "meshes" and as_ != "auto":
            opts["as_"] = as_
        ignored = [n for n, v in (("--voxel-size", voxel_size), ("--phases", phases),
                                  ("--shape", raw_shape), ("--dtype", raw_dtype),
                                  ("--byte-order", raw_byte_order)) if v is not None]
    else:
        opts.update(voxel_size=voxel_size, phases=_parse_phases(phases), shape=_parse_shape(raw_shape),
                    dtype=raw_dtype, byte_order=raw_byte_order, units=units)
        ignored = [n for n, v in (("--thickness", thickness), ("--spacing", spacing)) if v is not None]
    if ignored:
        raise OptionError(f"{', '.join(ignored)} do(es) not apply to {fam} files", path=path)
    return read(path, **opts)


def json_default(o):
    import numpy as np
    if isinstance(o, np.integer):
        return int(o)
    if isinstance(o, np.floating):
        return _clean_float(float(o))
    if isinstance(o, np.ndarray):
        return o.tolist()
    if isinstance(o, np.bool_):
        return bool(o)
    raise TypeError(f"not JSON serialisable: {type(o)}")


def _clean_float(x):
    return None if (math.isnan(x) or math.isinf(x)) else x


def dumps(doc) -> str:
    """JSON text for a result document; NaN and inf become null (valid JSON)."""
    def clean(o):
        if isinstance(o, float):
            return _clean_float(o)
        if isinstance(o, dict):
            return {str(k): clean(v) for k, v in o.items()}
        if isinstance(o, (list, tuple)):
            return [clean(v) for v in o]
        return o
    return json.dumps(clean(json.loads(json.dumps(doc, default=json_default, allow_nan=True))),
                      indent=2, allow_nan=False)


def parse_size(text):
    """'8G', '500M', '2.5GB', '123456789' -> bytes."""
    if text is None:
        return None
    t = str(text).strip().upper().rstrip("B")
    mult = {"K": 2 ** 10, "M": 2 ** 20, "G": 2 ** 30, "T": 2 ** 40}
    try:
        if t and t[-1] in mult:
            v = float(t[:-1]) * mult[t[-1]]
        else:
            v = float(t)
    except ValueError:
        raise OptionError(f"--max-memory: expected a size such as 8G or 500M, got {text!r}") from None
    if not (v > 0 and math.isfinite(v)):
        raise OptionError(f"--max-memory: must be positive, got {text!r}")
    return int(v)


def parse_split(text):
    if text is None:
        return ()
    try:
        return tuple(float(x) for x in str(text).split(",") if x.strip())
    except ValueError:
        raise OptionError(f"--pore-split: expected diameters in nm such as 5,20, got {text!r}") from None


def at_options(f):
    """Decorator adding ``--at-progress`` / ``--at-time`` (the structure as it stood then)."""
    f = click.option("--at-time", type=float, default=None, metavar="T",
                     help="Use the structure as it stood at time T: the prisms born at or "
                          "before T (needs a 'born' column).")(f)
    f = click.option("--at-progress", type=float, default=None, metavar="P",
                     help="Use the structure as it stood when its progress (solid volume born "
                          "over the final) first reached P, a fraction in (0, 1].")(f)
    return f


def apply_at(obj, at_progress=None, at_time=None):
    """``(obj, None)`` when neither option is set; else the structure at that moment and
    the :class:`~sheetview.measures.kinetics.Moment`."""
    if at_progress is None and at_time is None:
        return obj, None
    from ..measures.kinetics import structure_at
    from ..structure import Structure
    if not isinstance(obj, Structure):
        raise OptionError("--at-progress / --at-time need prisms with a 'born' column, but the "
                          f"input is a {type(obj).__name__}", path=getattr(obj, "source", None))
    return structure_at(obj, progress=at_progress, time=at_time)


def echo_moment(moment, quiet: bool = False) -> None:
    """Say on stderr which moment of a grown structure is analysed (nothing for None)."""
    if moment is None or quiet:
        return
    click.echo(f"sheetview: as it stood at {moment.requested}: time {moment.time:g}, progress "
               f"{moment.progress:.3f}, {moment.n_prisms:,} of {moment.n_total:,} prisms",
               err=True)
