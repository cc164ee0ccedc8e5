"""Batch morphometry: the ``measure`` job over many structures, resumable.

Every input is measured with the same settings (a
:class:`~sheetview.app.settings.Settings`, as for ``sheetview measure``) by
:func:`measure_one` (read -> :class:`sheetview.app.run.Run` ->
:func:`sheetview.app.document.file_document` -> :func:`sheetview.report.write_report`),
in the calling process and local worker processes beside it, or on a Dask distributed
cluster. Each result lives under ``OUT/runs/<stem>-<key>/`` where ``key``
is a hash of the input's bytes (SHA-256) and of the settings (canonical JSON), so a
rerun skips what is finished, and a changed file or changed settings is measured anew.

Layout of ``OUT``::

    runs/<stem>-<key>/      full report folder of one structure (summary.json, CSV, PNG)
                            and report.html (self-contained page)
    failed/<stem>-<key>.json  the error of an input that could not be measured
    summary.csv, summary.parquet  one row per input, flat dotted columns
    index.html              links to every structure's page
    batch.log               one line per event (appended)

Every file is written under a temporary name and renamed into place
(:func:`sheetview.io.output.atomic_path`; report folders by ``write_report``), so a
killed run loses no finished result and leaves no file under its final name half
written. Temporary ``.*.part`` entries a kill leaves behind are removed by the next run.
"""
from __future__ import annotations

import glob
import hashlib
import json
import math
import os
import shutil
import sys
import time
import traceback
from dataclasses import dataclass, field
from pathlib import Path

from ._version import __version__
from .app.document import file_document, file_sha256, flatten, provenance
from .app.load import at_moment, load
from .app.applies import check_settings
from .app.registry import check_inputs, parse_only, select
from .app.run import Run
from .app.settings import Settings, fields_info
from .errors import OptionError, OutputExistsError, SheetviewError
from .io.columns import unit_of
from .io.output import atomic_path, json_default
from .io.safety import check_input_file
from .measures.kinetics import check_moment
from .figures import new_figure
from .report import index_page, write_json, write_report
from .report import structure_page as report_page

#: Scalar headline keys shown first in the HTML pages.
HEADLINE = ("n_prisms", "voxel_size_nm", "volume_fractions.solid", "volume_fractions.interlayer",
            "volume_fractions.gel", "specific_surface_nm-1", "specific_surface_m2_per_g",
            "chords.solid_mean_nm", "chords.pore_mean_nm", "pore_size.d10_nm",
            "pore_size.d50_nm", "pore_size.d90_nm", "pore_size.intrusion_d50_nm",
            "stacking.mean", "stacking.mean_volume", "stacking.n_stacks", "order.S",
            "order.biaxiality", "order.wall")


# ------------------------------------------------------------------ keys and inputs
def canonical_json(obj) -> str:
    """Canonical JSON text of ``obj``: sorted keys, no spaces, tuples as lists."""
    return json.dumps(obj, sort_keys=True, separators=(",", ":"), default=json_default,
                      allow_nan=True)


def result_key(input_sha256: str, config: dict) -> str:
    """Key of one result: ``sha256(canonical_json({"input": sha, "config": config}))``,
    first 16 hex digits (64 bits)."""
    text = canonical_json({"input": input_sha256, "config": config})
    return hashlib.sha256(text.encode()).hexdigest()[:16]


def key_settings(settings) -> dict:
    """The settings a result key hashes: every setting of the measure run as it will be
    used (a :class:`~sheetview.app.settings.Settings`, or a dict completed with the
    defaults), less those that change no number (``max_memory``):
    :meth:`Settings.key`. An unknown setting name is an :class:`OptionError`."""
    return Settings.of(settings).key()


def expand_inputs(patterns) -> list[Path]:
    """Paths and glob patterns -> existing-or-named paths, in the given order, without
    repeats. A pattern with wildcards that matches nothing is an :class:`OptionError`;
    a plain path is kept even if missing (it is recorded as a failed input)."""
    out, seen = [], set()
    for p in patterns:
        p = str(p)
        if glob.has_magic(p):
            hits = sorted(glob.glob(p, recursive=True))
            hits = [h for h in hits if not os.path.isdir(h)]
            if not hits:
                raise OptionError(f"pattern {p!r} matches no file")
        else:
            hits = [p]
        for h in hits:
            key = os.path.abspath(h)
            if key not in seen:
                seen.add(key)
                out.append(Path(h))
    if not out:
        raise OptionError("no input given")
    return out


@dataclass
class Job:
    """One input of a batch."""

    path: Path
    sha256: str | None
    key: str
    name: str
    error: str | None = None


def plan(paths, config: dict) -> list[Job]:
    """Hash every input and name its result folder ``<stem>-<key>``."""
    jobs = []
    for p in paths:
        try:
            check_input_file(p)
            sha = file_sha256(p)
        except SheetviewError as e:
            key = hashlib.sha256(str(p).encode()).hexdigest()[:16]
            jobs.append(Job(Path(p), None, key, f"{_safe(Path(p).stem)}-{key}", str(e)))
            continue
        except OSError as e:
            key = hashlib.sha256(os.path.abspath(p).encode()).hexdigest()[:16]
            jobs.append(Job(Path(p), None, key, f"{_safe(Path(p).stem)}-{key}",
                            f"{p}: cannot read ({e.strerror or e})"))
            continue
        key = result_key(sha, config)
        jobs.append(Job(Path(p), sha, key, f"{_safe(Path(p).stem)}-{key}"))
    return jobs


def _safe(stem: str) -> str:
    s = "".join(c if c.isalnum() or c in "-_." else "_" for c in stem).lstrip(".")
    return s[:60] or "input"


# ------------------------------------------------------------------ one structure
def measure_one(path, out_folder, settings: dict, read_kw: dict, only=None, plots=True,
                numba_threads: int | None = None, at: dict | None = None) -> dict:
    """Measure one input and write its report folder ``out_folder`` (atomically).

    ``at``: ``{"progress": P}`` or ``{"time": T}`` measures the structure as it stood
    then (:func:`sheetview.measures.kinetics.structure_at`; the moment is recorded under
    ``at`` in its summary), as ``measure --at-progress/--at-time``.

    Runs in a worker (a local process, a Dask worker or the calling process). Never
    raises for a bad input: returns ``{"status": "ok" | "failed", "error": message,
    "seconds": measure time, "write_seconds": report time}``. A
    :class:`~sheetview.errors.SheetviewError` gives its message; any other exception is
    recorded as an internal error with its type.
    """
    t0 = time.perf_counter()
    if numba_threads:
        _set_threads(numba_threads)
    try:
        obj, moment = at_moment(load(path, **read_kw), *_moment_args(at))
        settings = Settings.of(settings)
        check_settings(obj, settings, path=path)
        selected = select(only or None, obj)
        check_inputs(selected, obj, path)
        run = Run(obj, settings).run(selected)
        doc = file_document(path, run)
        if moment is not None:
            doc["at"] = moment.to_dict()
        doc["input_metadata"] = dict(getattr(obj, "metadata", {}) or {})
        if read_kw:
            doc["read_options"] = dict(read_kw)
        t1 = time.perf_counter()
        try:
            write_report(out_folder, doc, run.results, force=False, plots=plots, protect=[path],
                         grid=run.__dict__.get("grid"), page=False)
        except (OutputExistsError, OSError):
            # another process (a worker of a killed run) finished the same key meanwhile:
            # same content and settings, so its result stands
            if not (Path(out_folder) / "summary.json").is_file():
                raise
        t2 = time.perf_counter()
        return {"status": "ok", "error": None, "seconds": t1 - t0, "write_seconds": t2 - t1}
    except SheetviewError as e:
        text = e.format(_option_style)
        msg = text if e.path else f"{path}: {text}"
    except MemoryError:
        msg = f"{path}: out of memory; use a coarser voxel or a lower max_memory"
    except Exception as e:  # a bug: record it and let the batch go on
        msg = (f"{path}: internal error {type(e).__name__}: {e}\n"
               + "".join(traceback.format_exception(e)[-3:]))
    return {"status": "failed", "error": msg, "seconds": time.perf_counter() - t0,
            "write_seconds": 0.0}


def _option_style(param: str) -> str:
    """A parameter as the batch command's option (``max_memory`` -> ``--max-memory``)."""
    return {"voxel_size": "--volume-voxel", "spacing": "--repeat"}.get(
        param, "--" + param.rstrip("_").replace("_", "-"))


def _moment_args(at: dict | None) -> tuple:
    """``(at_progress, at_time)`` of a batch's ``at`` setting."""
    at = at or {}
    return at.get("progress"), at.get("time")


def _set_threads(n: int) -> None:
    try:
        import numba
        numba.set_num_threads(max(1, min(int(n), numba.config.NUMBA_NUM_THREADS)))
    except Exception:
        pass


def _get_threads():
    try:
        import numba
        return numba.get_num_threads()
    except Exception:
        return None


# glibc mallopt parameters (malloc.h)
_M_TRIM_THRESHOLD, _M_MMAP_MAX = -1, -4
_MMAP_MAX_DEFAULT, _TRIM_THRESHOLD_DEFAULT = 65536, 128 * 1024


def _libc():
    try:
        import ctypes
        libc = ctypes.CDLL("libc.so.6")
        libc.mallopt  # glibc only
        libc.malloc_trim
        return libc
    except (OSError, AttributeError):
        return None


def keep_heap(on: bool) -> bool:
    """Keep freed memory for reuse between measures (glibc only; elsewhere a no-op).

    The grid measures allocate and free arrays of hundreds of MB per structure (the
    two-point correlation alone some 2 GB at a 120^3 grid). glibc serves every block
    above 32 MB with a fresh ``mmap`` and returns it on ``free``, so each one is faulted
    in and zeroed by the kernel again: at this size 35 to 50 % of a measure was kernel
    time (transparent huge pages compacted and zeroed). ``on``: serve large blocks from the heap
    (``M_MMAP_MAX`` 0) and never shrink it (``M_TRIM_THRESHOLD`` at its largest), so a
    worker reuses the memory of the previous arrays: its resident size stays near the
    peak of the largest structure it measured (a few % above it, from fragmentation).
    ``off``: the default limits again, and the free memory is given back
    (``malloc_trim``). Numbers are unchanged. Returns whether the allocator was tuned.
    """
    libc = _libc()
    if libc is None:
        return False
    if on:
        return bool(libc.mallopt(_M_MMAP_MAX, 0)) and bool(
            libc.mallopt(_M_TRIM_THRESHOLD, 2 ** 31 - 1))
    libc.mallopt(_M_MMAP_MAX, _MMAP_MAX_DEFAULT)
    libc.mallopt(_M_TRIM_THRESHOLD, _TRIM_THRESHOLD_DEFAULT)
    libc.malloc_trim(0)
    return True


def warm_up() -> float:
    """Load in this process what the first measure would otherwise load on the way: the
    measure modules, every compiled numba kernel found in the on-disk cache (loaded, never
    compiled here: entries of other numba or CPU builds are skipped) and matplotlib's Agg
    backend. Worker processes forked afterwards inherit all of it, so none of them pays
    it again. Returns the seconds spent. Performance only: any failure is ignored.
    """
    import importlib
    import pkgutil
    t0 = time.perf_counter()
    try:
        from numba.core.registry import CPUDispatcher
        pkg_path = [os.path.dirname(os.path.abspath(__file__))]
        mods = []
        for info in pkgutil.walk_packages(pkg_path, __package__ + "."):
            if info.name.startswith((f"{__package__}.cli", f"{__package__}.view",
                                     f"{__package__}.__main__")):
                continue  # the command line and the viewer (VTK) are not measures
            try:
                mods.append(importlib.import_module(info.name))
            except Exception:
                continue
        for mod in mods:
            for obj in list(vars(mod).values()):
                if not (isinstance(obj, CPUDispatcher) and obj.__module__ == mod.__name__):
                    continue
                try:  # numba internals (cache index): guarded, skipped if they change
                    index = obj._cache._cache_file._load_index()
                    magic = obj.targetctx.codegen().magic_tuple()
                    for key in index:
                        if key[1] == magic and not obj.overloads.get(key[0]):
                            obj.compile(key[0])
                except Exception:
                    continue
        import matplotlib.backends.backend_agg  # noqa: F401  # the renderer; no backend switch
    except Exception:
        pass
    return time.perf_counter() - t0


def _fork_context(choose_layer: bool = False):
    """A ``fork`` multiprocessing context when forking this process is safe, else None.

    Forking copies a warm process (modules imported, numba kernels loaded): a worker
    starts measuring at once instead of spending a second or two on start-up. It is safe
    on Linux when numba's threading layer is fork-safe (workqueue or TBB; GNU OpenMP is
    not: numba documentation, "The Threading Layers"), and when this process runs no
    other thread. With ``choose_layer``, in the ``sheetview`` program itself
    (:func:`_is_command_line`: its process ends with the batch), a process that has not
    started a layer yet is given the workqueue layer for the rest of its life, unless
    NUMBA_THREADING_LAYER is set (then the workers start fresh): the batch makes one numba
    call at a time, which is all that layer supports. Anywhere else (a library call, a
    notebook, the command run in-process by a test) the layer is never changed.
    """
    if not sys.platform.startswith("linux"):
        return None
    import multiprocessing as mp
    import threading
    if threading.active_count() != 1:
        return None  # other threads (a notebook kernel, a GUI, Dask): forking is not safe
    try:
        import numba
        try:
            layer = numba.threading_layer()
        except ValueError:  # no layer started in this process yet
            if not (choose_layer and _is_command_line()) or os.environ.get("NUMBA_THREADING_LAYER"):
                return None
            numba.config.THREADING_LAYER = layer = "workqueue"
        return mp.get_context("fork") if layer in ("workqueue", "tbb") else None
    except Exception:
        return None


def _is_command_line() -> bool:
    """Whether this process is the ``sheetview`` program itself (``python -m sheetview``
    or the ``sheetview`` script), which ends with its command; not a test runner, a
    notebook or another program calling the command in-process."""
    main = sys.modules.get("__main__")
    spec = getattr(main, "__spec__", None)
    if spec is not None and getattr(spec, "name", "") == f"{__package__}.__main__":
        return True
    return Path(sys.argv[0] if sys.argv else "").name == __package__


#: Seconds a forked worker may take to answer its first task before the batch gives up on
#: forking and starts fresh workers.
FORK_START_TIMEOUT = 60.0


def _worker_init(n_threads: int, batch_pid: int | None = None) -> None:
    for var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
        os.environ.setdefault(var, str(n_threads))
    _set_threads(n_threads)
    keep_heap(True)
    if batch_pid:
        import threading
        threading.Thread(target=_watch_parent, args=(batch_pid,), daemon=True).start()


def _watch_parent(pid: int, interval: float = 0.2) -> None:
    """End this worker when the batch process is gone (killed): an orphan would go on
    measuring for nobody. Its unfinished report is a hidden ``.part`` folder that the
    next run removes."""
    while True:
        time.sleep(interval)
        try:
            os.kill(pid, 0)
        except ProcessLookupError:
            os._exit(3)
        except PermissionError:
            pass


# ------------------------------------------------------------------ the batch
@dataclass
class BatchResult:
    """What a batch did: per-input records (in input order) and counts."""

    out: Path
    records: list = field(default_factory=list)
    n_done: int = 0
    n_skipped: int = 0
    n_failed: int = 0

    @property
    def failed(self) -> list:
        return [r for r in self.records if r["status"] == "failed"]


class _Log:
    def __init__(self, path: Path, echo=None, quiet=False):
        self.path = path
        self.echo = echo
        self.quiet = quiet

    def __call__(self, msg: str, console: bool = True):
        stamp = time.strftime("%Y-%m-%d %H:%M:%S")
        with open(self.path, "a") as fh:  # a log: appended line by line
            fh.write(f"{stamp} {msg}\n")
        if console and not self.quiet:
            (self.echo or (lambda m: print(m, file=sys.stderr, flush=True)))(f"sheetview: {msg}")


#: The lock file of a batch folder: the host, process id and start time of the batch that
#: holds it.
LOCK = ".sheetview-batch.lock"


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


def acquire_lock(out: Path) -> Path:
    """Take the batch folder's lock (:data:`LOCK`, created exclusively) or refuse naming
    its holder. A lock left by a process of this host that no longer runs is stale: it is
    taken over (the caller logs it). A lock from another host is never taken over: the
    message says how to remove it when that batch is known to be dead."""
    import socket
    path = out / LOCK
    me = {"host": socket.gethostname(), "pid": os.getpid(),
          "started": time.strftime("%Y-%m-%d %H:%M:%S")}
    for _ in range(3):
        try:
            fd = os.open(path, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o644)
        except FileExistsError:
            try:
                holder = json.loads(path.read_text())
                host, pid = str(holder["host"]), int(holder["pid"])
            except (OSError, ValueError, KeyError, TypeError):
                holder, host, pid = {}, None, None
            if host == me["host"] and pid is not None and not _alive(pid):
                path.unlink(missing_ok=True)  # stale: its process is gone
                continue
            who = (f"batch process {pid} on host {host}, started {holder.get('started')}"
                   if host else "an unreadable lock file")
            raise SheetviewError(
                f"the folder is in use by {who}; wait for it to finish, or, if it is known "
                f"to be dead, remove {path}", path=out) from None
        with os.fdopen(fd, "w") as fh:
            json.dump(me, fh)
        return path
    raise SheetviewError(f"cannot take the lock {path}", path=out)


def release_lock(path: Path) -> None:
    """Remove the lock if this process still holds it."""
    try:
        if int(json.loads(path.read_text()).get("pid", -1)) == os.getpid():
            path.unlink()
    except (OSError, ValueError):
        pass


def prepare_out(out) -> Path:
    """Create ``out`` and its sub-folders; clear temporary leftovers of a killed run.
    A folder that cannot be written is a :class:`SheetviewError` (exit status 2). The
    caller holds the folder's lock (:func:`acquire_lock`) before leftovers are cleared."""
    out = Path(out)
    _check_out_folder(out)
    try:
        for sub in ("runs", "failed"):
            (out / sub).mkdir(exist_ok=True)
        probe = out / f".write-probe-{os.getpid()}"
        probe.write_bytes(b"")
        probe.unlink()
    except OSError as e:
        raise SheetviewError(f"output folder is not writable ({e.strerror})", path=out) from None
    for d in (out, out / "runs", out / "failed"):
        for p in d.glob(".*.part*"):
            if p.is_dir():
                shutil.rmtree(p, ignore_errors=True)
            else:
                p.unlink(missing_ok=True)
    return out


def run_batch(patterns, out, settings, read_kw: dict | None = None, *, only=None,
              plots: bool = True, workers: int = 1, cluster=None, html_pages: bool = True,
              quiet: bool = False, echo=None, dask_options: dict | None = None,
              threads: int | None = None, fork_warm: bool = False,
              at: dict | None = None) -> BatchResult:
    """Measure every input of ``patterns`` into ``out``; skip finished results.

    Parameters
    ----------
    patterns : list of str
        Paths or glob patterns.
    out : path
        Batch folder (created; see the module docstring for its layout).
    settings : Settings or dict
        Measure settings (:class:`~sheetview.app.settings.Settings`), the same for all,
        as for ``sheetview measure``. The result key hashes :func:`key_settings` of them.
    read_kw : dict
        Reading options of :func:`sheetview.app.load.load`.
    only : str, optional
        Comma-separated measure names (default: all that apply to each input).
    workers : int
        Structures measured at once on this machine: the calling process and
        ``workers - 1`` worker processes beside it (1: all in the calling process). Numba
        threads per worker are ``threads``, by default all cores with one worker and
        ``cpu_count // workers`` with more.
    cluster : str, optional
        ``"local"``: start a Dask ``LocalCluster`` of ``workers`` processes; otherwise the
        address of a running Dask scheduler (the inputs and ``out`` must be visible to
        its workers at the same paths).
    at : dict, optional
        ``{"progress": P}`` or ``{"time": T}``: measure every structure as it stood then
        (needs a ``born`` column; see :func:`measure_one`). Part of the result key.
    fork_warm : bool
        Local workers only, Linux: allow switching a process that has not started numba's
        threading layer to the fork-safe workqueue layer, so that the worker processes
        are forked from it once warm (:func:`_fork_context`). The command line sets it
        (its process ends with the batch); a library caller's process keeps its layer,
        and its workers are forked only if that layer is already fork-safe.

    Returns
    -------
    BatchResult
        Records in input order; ``status`` is ``ok``, ``skipped`` (finished before) or
        ``failed`` (with ``error``). Tables and pages are written at the end.
    """
    settings = Settings.of(settings)
    read_kw = {k: v for k, v in (read_kw or {}).items() if v is not None and v != "auto"}
    if only:
        only = ",".join(parse_only(only))
    if workers < 1:
        raise OptionError(f"--workers: must be at least 1, got {workers}")
    at = {k: v for k, v in (at or {}).items() if v is not None}
    if at:
        if set(at) - {"progress", "time"}:
            raise OptionError(f"at: expected 'progress' or 'time', got {sorted(at)}")
        try:
            at = {k: float(v) for k, v in at.items()}
        except (TypeError, ValueError):
            raise OptionError(f"at: expected numbers, got {at!r}") from None
        check_moment(*_moment_args(at))
    paths = expand_inputs(patterns)
    out = Path(out)
    _check_out_folder(out)
    lock = acquire_lock(out)
    try:
        return _run_locked(paths, out, settings, read_kw, only, plots, workers, cluster,
                           html_pages, quiet, echo, dask_options, threads, fork_warm, at)
    finally:
        release_lock(lock)


def _check_out_folder(out: Path) -> None:
    """Create the batch folder (the lock lives in it) or refuse it."""
    if out.exists() and not out.is_dir():
        raise SheetviewError("exists and is not a folder; give a folder for -o", path=out)
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as e:
        raise SheetviewError(f"cannot create the output folder ({e.strerror})", path=out) from None
    if not os.access(out, os.W_OK | os.X_OK):
        raise SheetviewError("output folder is not writable", path=out)


def _run_locked(paths, out, settings, read_kw, only, plots, workers, cluster, html_pages, quiet,
                echo, dask_options, threads, fork_warm, at) -> BatchResult:
    out = prepare_out(out)
    log = _Log(out / "batch.log", echo, quiet)
    config = {"settings": key_settings(settings), "read": read_kw, "only": only}
    if at:  # only when set: the keys of earlier results without it stay valid
        config["at"] = at
    jobs = plan(paths, config)
    res = BatchResult(out)
    recs = {}          # key -> record of the first input with that key
    order = []         # (path, key) of every input
    todo = []
    for j in jobs:
        order.append((str(j.path), j.key))
        if j.key in recs:
            continue  # the same content twice: measured once
        if j.sha256 is not None:  # a result of the same content under another file name
            for d in sorted((out / "runs").glob(f"*-{j.key}")):
                if not d.name.startswith(".") and (d / "summary.json").is_file():
                    j.name = d.name
                    break
        rec = {"path": str(j.path), "name": j.name, "key": j.key, "sha256": j.sha256,
               "status": None, "error": None, "seconds": None, "write_seconds": None}
        recs[j.key] = rec
        if j.error is not None:
            rec.update(status="failed", error=j.error)
            _write_failure(out, j, rec)
        elif (out / "runs" / j.name / "summary.json").is_file():
            rec["status"] = "skipped"
            res.n_skipped += 1
        else:
            todo.append(j)
    log(f"batch of {len(jobs)} input(s) into {out}: {res.n_skipped} finished before, "
        f"{len(todo)} to measure" + (f" on {cluster}" if cluster else
                                      f" with {min(workers, max(1, len(todo)))} worker(s)"))
    log(f"settings {canonical_json(config)}"
        + (f"; max_memory {settings.max_memory}" if settings.max_memory else ""),
        console=False)

    t_start = time.perf_counter()
    n_todo = len(todo)

    def finished(job, r):
        rec = recs[job.key]
        rec.update(status=r["status"], error=r["error"], seconds=r["seconds"],
                   write_seconds=r["write_seconds"])
        k = sum(1 for j in todo if recs[j.key]["status"] is not None)
        el = time.perf_counter() - t_start
        eta = el / k * (n_todo - k) if k else float("nan")
        if r["status"] == "ok":
            res.n_done += 1
            (out / "failed" / f"{job.name}.json").unlink(missing_ok=True)
            log(f"[{k}/{n_todo}] {job.path}: done in {r['seconds']:.1f} s "
                f"(+{r['write_seconds']:.1f} s report); elapsed {el:.0f} s, ETA {eta:.0f} s")
        else:
            _write_failure(out, job, rec)
            first = r["error"].splitlines()[0] if r["error"] else ""
            log(f"[{k}/{n_todo}] FAILED {first}; elapsed {el:.0f} s, ETA {eta:.0f} s")

    args = lambda j, threads: (str(j.path), str(out / "runs" / j.name), settings, read_kw,
                               only, plots, threads, at or None)
    if todo:
        ncpu = os.cpu_count() or 1
        if cluster:
            _run_dask(todo, args, finished, cluster, workers, dask_options or {})
        else:
            kept = keep_heap(True)  # this process measures too
            try:
                if workers == 1 or len(todo) == 1:
                    before = _get_threads()
                    try:
                        for j in todo:
                            finished(j, measure_one(*args(j, threads)))
                    finally:
                        if threads and before:
                            _set_threads(before)
                else:
                    _run_local(todo, args, finished, min(workers, len(todo)), ncpu, threads,
                               log=log, choose_layer=fork_warm)
            finally:
                if kept:
                    keep_heap(False)
    res.records = [{**recs[key], "path": path} for path, key in order]
    res.n_failed = sum(1 for r in res.records if r["status"] == "failed")
    write_tables(out, res.records)
    if html_pages:
        write_pages(out, res.records)
    log(f"finished: {res.n_done} measured, {res.n_skipped} skipped, {res.n_failed} failed, "
        f"{time.perf_counter() - t_start:.1f} s; summary in {out / 'summary.csv'}")
    return res


def _run_local(todo, args, finished, workers, ncpu, threads=None, task=None, log=None,
               choose_layer=False):
    """Measure ``todo`` with ``workers`` workers: the calling process and ``workers - 1``
    worker processes beside it.

    Each worker takes the next structure when it is free (no structure waits in a queue
    behind a busy worker, so the last ones are not stuck behind a slow one). The calling
    process is already running and has the measure modules loaded once it has done one
    structure, so it saves one process start-up (interpreter, imports, numba cache loads,
    about 2 s) against a pool of ``workers`` processes. Numba threads per worker:
    ``threads``, by default ``ncpu // workers`` (2 workers x 1 thread on 2 cores: no
    oversubscription).

    A worker process that dies (killed, out of memory) fails the structure it had in
    hand; the remaining structures go on in the calling process. ``task`` (default
    :func:`measure_one`) is called with ``args(job, threads)``.

    On Linux the worker processes are forked from the calling process once it has loaded
    the measure modules, numba kernels and matplotlib (:func:`warm_up`,
    :func:`_fork_context`); elsewhere, or when numba's threading layer in this process
    is not fork-safe, they start fresh from a fork server (or by spawning). ``log``
    (optional) is told which. ``choose_layer``: see :func:`_fork_context`.
    """
    import multiprocessing as mp
    import threading
    from concurrent.futures import ProcessPoolExecutor
    task = task or measure_one
    threads = threads or max(1, ncpu // workers)
    lock = threading.Lock()
    queue = list(reversed(todo))       # pop() takes them in input order
    stop = threading.Event()

    def take():
        with lock:
            return queue.pop() if queue and not stop.is_set() else None

    def record(job, r):
        with lock:
            if not stop.is_set():
                finished(job, r)

    ex = None
    note = ""
    mpctx = _fork_context(choose_layer)
    if mpctx is not None:
        warm = warm_up()
        ex = ProcessPoolExecutor(workers - 1, mp_context=mpctx, initializer=_worker_init,
                                 initargs=(threads, os.getpid()))
        try:
            # fork every worker now, from this thread, while no numba kernel runs here; a
            # pool that would fork more of them later, from a driver thread, is not used
            ex.submit(os.getpid).result(timeout=FORK_START_TIMEOUT)
            if len(getattr(ex, "_processes", None) or ()) < workers - 1:
                raise RuntimeError("the pool starts its workers on demand")
            how = f"forked from this process after a {warm:.1f} s warm-up"
        except Exception as e:  # fork failed (memory), a worker died or hung at start
            for p in list((getattr(ex, "_processes", None) or {}).values()):
                p.terminate()
            ex.shutdown(wait=False, cancel_futures=True)
            ex = None
            note = f"forking failed ({type(e).__name__}: {e}), so "
    if ex is None:
        try:
            mpctx = mp.get_context("forkserver")
        except ValueError:
            mpctx = mp.get_context("spawn")
        how = f"{note}started by {mpctx.get_start_method()}"
        ex = ProcessPoolExecutor(workers - 1, mp_context=mpctx, initializer=_worker_init,
                                 initargs=(threads, os.getpid()))
    if log:
        log(f"{workers - 1} worker process(es) {how}, {threads} numba thread(s) each",
            console=False)

    def drive():
        while (job := take()) is not None:
            try:
                fut = ex.submit(task, *args(job, threads))
            except Exception:   # the pool is broken (a worker died): the calling process goes on
                with lock:
                    queue.append(job)
                return
            record(job, _outcome(fut, job))
            if stop.is_set() or fut.cancelled() or fut.exception() is not None:
                return  # a dead worker breaks the pool: the calling process goes on

    drivers = [threading.Thread(target=drive, name=f"sheetview-worker-{i + 1}", daemon=True)
               for i in range(workers - 1)]
    before = _get_threads()
    try:
        for t in drivers:
            t.start()
        while (job := take()) is not None:
            record(job, task(*args(job, threads)))
        for t in drivers:
            t.join()
        while (job := take()) is not None:  # given back by a driver of a broken pool
            record(job, task(*args(job, threads)))
    except BaseException:
        stop.set()
        ex.shutdown(wait=False, cancel_futures=True)
        raise
    finally:
        if before:
            _set_threads(before)
    ex.shutdown(wait=True)


def _outcome(fut, job):
    try:
        return fut.result()
    except BaseException as e:  # a worker died (killed, out of memory)
        return {"status": "failed", "error": f"{job.path}: worker failed: {type(e).__name__}: {e}",
                "seconds": 0.0, "write_seconds": 0.0}


def _run_dask(todo, args, finished, cluster, workers, dask_options):
    try:
        from distributed import Client, LocalCluster, as_completed
    except ImportError:
        raise OptionError("--cluster needs the Dask distributed package "
                          "(pip install 'dask[distributed]')") from None
    own = None
    try:
        if cluster == "local":
            opts = {"n_workers": workers, "threads_per_worker": 1, "processes": True,
                    "dashboard_address": None, "host": "127.0.0.1", "protocol": "tcp"}
            opts.update(dask_options)
            try:
                own = LocalCluster(**opts)
            except (OSError, RuntimeError) as e:
                raise SheetviewError(f"--cluster local: cannot start a Dask LocalCluster "
                                     f"({e})") from None
            client = Client(own)
        else:
            try:
                client = Client(cluster, timeout="10s")
            except (OSError, TimeoutError) as e:
                raise OptionError(f"--cluster: cannot reach the Dask scheduler at {cluster!r} "
                                  f"({e})") from None
        with client:
            nthreads = client.nthreads()
            threads = max(1, min(nthreads.values()) if nthreads else 1)
            futs = {client.submit(measure_one, *args(j, threads), pure=False,
                                  key=f"sheetview-{j.name}"): j for j in todo}
            for f in as_completed(futs):
                finished(futs[f], _outcome(f, futs[f]))
    finally:
        if own is not None:
            own.close()


def _write_failure(out: Path, job: Job, rec: dict) -> None:
    write_json(out / "failed" / f"{job.name}.json",
               {"path": str(job.path), "sha256": job.sha256, "key": job.key,
                "error": rec["error"]}, force=True)


# ------------------------------------------------------------------ tables
def row_of(rec: dict, doc: dict | None) -> dict:
    """One summary row: input path, status, error, then the flattened summary document
    (``input_metadata.*`` holds the file's header metadata, ``settings.*`` the settings,
    ``read_options.*`` reading options given on the command line).
    Timings are left out so reruns give equal rows."""
    row = {"input": rec["path"], "status": "failed" if rec["status"] == "failed" else "ok",
           "error": rec["error"] or "", "result": f"runs/{rec['name']}" if doc else ""}
    if doc:
        flat = flatten({k: v for k, v in doc.items()
                        if k not in ("timings_s", "note", "file", "provenance")})
        row.update(flat)
    return row


def load_rows(out, records) -> list[dict]:
    rows = []
    for rec in records:
        doc = None
        p = Path(out) / "runs" / rec["name"] / "summary.json"
        if rec["status"] != "failed" and p.is_file():
            doc = json.loads(p.read_text())
        rows.append(row_of(rec, doc))
    return rows


def columns_of(rows) -> dict:
    """Rows (dicts) -> ordered columns with missing values as None."""
    names = []
    seen = set()
    for r in rows:
        for k in r:
            if k not in seen:
                seen.add(k)
                names.append(k)
    return {k: [r.get(k) for r in rows] for k in names}


def _arrow_table(cols):
    import pyarrow as pa
    arrays = {}
    for k, vals in cols.items():
        present = [v for v in vals if v is not None]
        if present and all(isinstance(v, bool) for v in present):
            arrays[k] = pa.array(vals, pa.bool_())
        elif present and all(isinstance(v, int) and not isinstance(v, bool) for v in present):
            arrays[k] = pa.array(vals, pa.int64())
        elif all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in present):
            arrays[k] = pa.array([None if v is None else float(v) for v in vals], pa.float64())
        else:
            arrays[k] = pa.array([None if v is None else (v if isinstance(v, str) else
                                                           json.dumps(v)) for v in vals],
                                 pa.string())
    return pa.table(arrays)


def parquet_metadata(names) -> dict:
    """The ``sheetview`` key of summary.parquet's schema metadata: the ``units`` of the
    columns that have one (from their names, :func:`sheetview.io.columns.unit_of`), the
    sheetview version and the provenance of the batch run (time, command line, library
    versions)."""
    setting_units = {name: meta.get("unit") for name, _, meta in fields_info()}
    units = {}
    for n in names:
        parts = n.split(".")
        u = (setting_units.get(parts[-1]) if len(parts) > 1 and parts[-2] == "settings"
             else None) or unit_of(n)
        if u:
            units[n] = u
    return {"sheetview_version": __version__, "units": units, "provenance": provenance(),
            "note": "columns without a unit are counts, fractions, ratios or text"}


def write_tables(out, records) -> tuple[Path, Path]:
    """Write ``summary.csv`` and ``summary.parquet`` (one row per input), atomically."""
    import csv

    import pyarrow.parquet as pq
    out = Path(out)
    cols = columns_of(load_rows(out, records))
    names = list(cols)
    n = len(records)
    with atomic_path(out / "summary.csv", force=True) as tmp:
        with open(tmp, "w", newline="") as fh:
            w = csv.writer(fh)
            w.writerow(names)
            for i in range(n):
                w.writerow([_csv_cell(cols[k][i]) for k in names])
    table = _arrow_table(cols)
    table = table.replace_schema_metadata({**(table.schema.metadata or {}),
                                           b"sheetview": json.dumps(parquet_metadata(names))})
    with atomic_path(out / "summary.parquet", force=True) as tmp:
        pq.write_table(table, tmp)
    return out / "summary.csv", out / "summary.parquet"


def _csv_cell(v):
    if v is None:
        return ""
    if isinstance(v, float):
        return "nan" if math.isnan(v) else repr(v)
    return v


def read_summary(path) -> dict:
    """Read a batch ``summary.csv`` or ``summary.parquet`` as columns (lists); CSV cells
    that parse as numbers become floats, empty cells None."""
    path = Path(path)
    if not path.is_file():
        raise SheetviewError("no such file", path=path)
    if path.suffix.lower() in (".parquet", ".pq"):
        import pyarrow.parquet as pq
        try:
            return pq.read_table(path).to_pydict()
        except Exception as e:
            raise SheetviewError(f"not a readable Parquet table ({e})", path=path) from None
    import csv
    try:
        with open(path, newline="") as fh:
            rows = list(csv.reader(fh))
    except (OSError, UnicodeDecodeError, csv.Error) as e:
        raise SheetviewError(f"not a readable CSV table ({e})", path=path) from None
    if not rows:
        raise SheetviewError("empty table, expected a header row", path=path)
    head, body = rows[0], rows[1:]
    cols = {}
    for i, k in enumerate(head):
        vals = [r[i] if i < len(r) else "" for r in body]
        cols[k] = [_num(v) for v in vals]
    return cols


def _num(s):
    if s == "":
        return None
    try:
        return float(s)
    except ValueError:
        return s


# ------------------------------------------------------------------ HTML pages
def structure_page(folder) -> str:
    """Self-contained HTML of one result folder (:func:`sheetview.report.structure_page`),
    linked back to the batch's index."""
    return report_page(folder, index_href="../../index.html")


def write_pages(out, records) -> Path:
    """Write ``report.html`` in every finished result folder (if missing) and
    ``index.html`` linking them, with the failures and their errors
    (:func:`sheetview.report.index_page`)."""
    out = Path(out)
    done = set()
    for rec in records:
        folder = out / "runs" / rec["name"]
        if rec["status"] != "failed" and (folder / "summary.json").is_file():
            page = folder / "report.html"
            if rec["name"] not in done and not page.is_file():
                text = structure_page(folder)
                with atomic_path(page, force=True) as tmp:
                    Path(tmp).write_text(text)
            done.add(rec["name"])
    text = index_page(out, records, extra_links=(("summary.csv", "summary.csv"),
                                                 ("summary.parquet", "summary.parquet"),
                                                 ("batch.log", "batch.log")))
    with atomic_path(out / "index.html", force=True) as tmp:
        Path(tmp).write_text(text)
    return out / "index.html"


# ------------------------------------------------------------------ trend plot
def group_stats(x, y, group=None):
    """Replicas (equal ``x`` and ``group``) -> ``{group: (xs, mean, std, n)}``.

    ``std`` is the sample standard deviation (ddof=1; 0 for a single replica). Rows with
    a missing ``y`` are dropped."""
    import numpy as np
    g = group if group is not None else [None] * len(x)
    acc = {}
    for xi, yi, gi in zip(x, y, g):
        if yi is None or xi is None or (isinstance(yi, float) and math.isnan(yi)):
            continue
        acc.setdefault(gi, {}).setdefault(xi, []).append(float(yi))
    out = {}
    for gi, d in acc.items():
        xs = sorted(d, key=lambda v: (isinstance(v, str), v))
        vals = [np.asarray(d[v]) for v in xs]
        out[gi] = (xs, np.array([v.mean() for v in vals]),
                   np.array([v.std(ddof=1) if len(v) > 1 else 0.0 for v in vals]),
                   np.array([len(v) for v in vals]))
    return out


def trend_plot(summary_path, x: str, y: str, out_png, group: str | None = None,
               force: bool = False) -> dict:
    """Plot column ``y`` against column ``x`` of a batch summary; replicas (same ``x``
    and ``group``) as mean with standard-deviation error bars. Returns the statistics."""
    cols = read_summary(summary_path)
    for opt, c in (("--x", x), ("--y", y), ("--group", group)):
        if c is not None and c not in cols:
            near = [k for k in cols if c.split(".")[-1] in k][:8]
            raise OptionError(f"{opt}: no column {c!r} in the summary"
                              + (f"; similar: {', '.join(near)}" if near else ""),
                              path=summary_path)
    yv = cols[y]
    if any(isinstance(v, str) for v in yv if v is not None):
        raise OptionError(f"--y: column {y!r} is not numeric", path=summary_path)
    stats = group_stats(cols[x], yv, cols[group] if group else None)
    if not stats:
        raise OptionError(f"--y: column {y!r} has no values", path=summary_path)
    fig, (ax,) = new_figure((6, 4.2))
    cats = sorted({v for xs, *_ in stats.values() for v in xs if isinstance(v, str)})
    for gi, (xs, m, s, n) in stats.items():
        pos = [cats.index(v) if isinstance(v, str) else v for v in xs]
        ax.errorbar(pos, m, yerr=s, marker="o", capsize=3,
                    label=None if group is None else f"{group} = {gi}")
    if cats:
        ax.set_xticks(range(len(cats)), cats)
    ax.set_xlabel(x)
    ax.set_ylabel(y)
    nrep = max(int(n.max()) for *_, n in stats.values())
    ax.set_title(f"{y}\nagainst {x}" + ("\n(mean ± sample s.d. of replicas)" if nrep > 1 else ""),
                 fontsize=9)
    if group is not None:
        ax.legend(fontsize=8)
    fig.tight_layout()
    with atomic_path(out_png, force=force) as tmp:
        fig.savefig(tmp, dpi=120, format="png")
    return stats
