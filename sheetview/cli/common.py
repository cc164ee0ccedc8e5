"""Options shared by commands that read a structure, and small output helpers."""
from __future__ import annotations

import click

from ..app.document import dumps as _dumps
from ..app.load import at_moment, load as app_load
from ..app.settings import parse_size as _parse


def read_options(f):
    """Decorator adding the options that steer reading to a command."""
    opts = [
        click.option("--thickness", type=float, default=None, metavar="NM",
                     help="Prism thickness in nm, for files that give none (a prism table "
                          "without a thickness column; a mesh read as sheets, where it "
                          "overrides a per-face array)."),
        click.option("--repeat", "spacing", type=float, default=None, metavar="NM",
                     help="Interlayer repeat in nm, the distance between the mid-planes of "
                          "stacked sheets (overrides the file's; default 1.4)."),
        click.option("--units", default=None, metavar="UNIT",
                     help="Length unit of a file that does not state it: nm, A (angstrom) "
                          "or um."),
        click.option("--as", "as_", type=click.Choice(["auto", "sheets", "solid"]), default="auto",
                     show_default=True,
                     help="Meshes: read open surfaces as sheet mid-surfaces and closed ones as "
                          "solid bodies (auto), or force one reading."),
        click.option("--volume-voxel", "voxel_size", type=float, default=None, metavar="NM",
                     help="Voxel volumes: the voxel edge in nm (overrides the file's; needed "
                          "where the file gives none)."),
        click.option("--phases", default=None, metavar="V=PHASE,...",
                     help="Voxel volumes: file values to phases, e.g. 0=gel,1=solid,2=interlayer "
                          "(phases: outside, solid, interlayer, gel)."),
        click.option("--shape", "raw_shape", default=None, metavar="NX,NY,NZ",
                     help="Raw voxel volumes: voxels along x, y and z."),
        click.option("--dtype", "raw_dtype", default=None, metavar="DTYPE",
                     help="Raw voxel volumes: numpy dtype of the values, such as uint8, <u2, "
                          "float32."),
        click.option("--byte-order", "raw_byte_order", type=click.Choice(["little", "big"]),
                     default=None, help="Raw voxel volumes: byte order of multi-byte values."),
    ]
    for o in reversed(opts):
        f = o(f)
    return f


def load_input(path, read_kw: dict, at_progress=None, at_time=None):
    """Read ``path`` with the options of :func:`read_options` and pick the moment of growth
    of :func:`at_options`: ``(obj, moment)`` (moment None when not asked for)."""
    from ..app.load import at_moment, load
    obj = load(path, **read_kwargs(read_kw))
    return at_moment(obj, at_progress, at_time)


def read_kwargs(kw: dict) -> dict:
    """The keyword arguments of :func:`sheetview.app.load.load` from the options of
    :func:`read_options` (the raw-volume options drop their prefix)."""
    names = {"raw_shape": "shape", "raw_dtype": "dtype", "raw_byte_order": "byte_order"}
    return {names.get(k, k): v for k, v in kw.items()}


def load(path, **kw):
    """Read a file with the options of :func:`read_options` (only those that apply)."""
    return app_load(path, **read_kwargs(kw))


def dumps(doc) -> str:
    """JSON text for a result document; NaN and inf become null (valid JSON)."""
    return _dumps(doc)


def parse_size(text):
    """'8G', '500M', '2.5GB', '123456789' -> bytes (:func:`sheetview.app.settings.parse_size`)."""
    return _parse(text)


def at_options(f):
    """Decorator adding ``--at-progress`` / ``--at-time`` (the structure as it stood then)."""
    f = click.option("--at-time", type=float, default=None, metavar="TIME",
                     help="Use the structure as it stood at TIME (in the unit of the file's "
                          "'born' column): the prisms born at or before it.")(f)
    f = click.option("--at-progress", type=float, default=None, metavar="FRACTION",
                     help="Use the structure as it stood when its progress (solid volume born "
                          "over the final) first reached FRACTION, in (0, 1]; needs a 'born' "
                          "column.")(f)
    return f


def apply_at(obj, at_progress=None, at_time=None):
    """``(obj, None)`` when neither option is set; else the structure at that moment and
    the :class:`~sheetview.measures.kinetics.Moment` (:func:`sheetview.app.load.at_moment`)."""
    return at_moment(obj, at_progress, at_time)


def echo_moment(moment, quiet: bool = False) -> None:
    """Say on stderr which moment of a grown structure is analysed (nothing for None)."""
    if moment is None or quiet:
        return
    click.echo(f"sheetview: as it stood at {moment.requested}: time {moment.time:g}, progress "
               f"{moment.progress:.3f}, {moment.n_prisms:,} of {moment.n_total:,} prisms",
               err=True)


class StageProgress:
    """The progress of a run on stderr: a line when a stage starts, its time when it ends,
    and in between the progress within long stages (a ``progress(stage, done, seconds=None,
    fraction=None)`` callback of :class:`sheetview.app.run.Run`): a bar redrawn in place
    when stderr is a terminal, else (a log file) a line at each quarter."""

    def __init__(self, stream=None):
        import sys
        self.stream = stream if stream is not None else sys.stderr
        self.tty = bool(getattr(self.stream, "isatty", lambda: False)())
        self._bar = False
        self._quarter = {}

    def __call__(self, stage, done, seconds=None, fraction=None):
        if fraction is not None:
            self._within(stage, fraction)
            return
        self._clear()
        if done:
            click.echo(f"  {stage}: {seconds:.2f} s", err=True)
        else:
            click.echo(f"sheetview: {stage} ...", err=True)

    def _within(self, stage, fraction):
        if self.tty:
            n = int(round(20 * fraction))
            self.stream.write(f"\r  {stage} [{'#' * n}{'.' * (20 - n)}] {100 * fraction:3.0f}%")
            self.stream.flush()
            self._bar = True
            return
        q = int(4 * fraction)
        if 0 < q < 4 and self._quarter.get(stage, 0) < q:
            self._quarter[stage] = q
            click.echo(f"  {stage}: {25 * q}%", err=True)

    def _clear(self):
        if self._bar:
            self.stream.write("\r" + " " * 60 + "\r")
            self.stream.flush()
            self._bar = False
