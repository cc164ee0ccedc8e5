"""Run a parser that might crash in a child process, so that its death is a clear error.

VTK's readers are C++ and trust the sizes a file declares: a damaged ``.vtk``/``.vtp``/
``.vti`` file can make them read or write outside their buffers (SIGSEGV), abort
(SIGABRT) or allocate without bound. :func:`run_isolated` runs such a parser in a child
process (forked on POSIX, so nothing is imported again; a fresh interpreter elsewhere)
with an address-space limit, a time limit and its output discarded, and hands back what
it returned. A child killed by a signal, out of memory or out of time becomes one
:class:`~sheetview.errors.InputError` or :class:`~sheetview.errors.MemoryLimitError`
naming the file; the calling process never sees the crash.
"""
from __future__ import annotations

import importlib
import os
import pickle
import select
import signal
import subprocess
import sys
import time
import traceback

from ..errors import InputError, MemoryLimitError, OptionError, SheetviewError

#: Seconds a child may take at least, and per megabyte of input on top.
TIMEOUT_BASE_S = 120.0
TIMEOUT_PER_MB_S = 0.5

_ERRORS = {"InputError": InputError, "OptionError": OptionError,
           "MemoryLimitError": MemoryLimitError}


def _vm_size() -> int:
    """Bytes of address space the process has mapped now (Linux), else 0."""
    try:
        with open("/proc/self/status") as fh:
            for line in fh:
                if line.startswith("VmSize:"):
                    return int(line.split()[1]) * 1024
    except (OSError, ValueError, IndexError):
        pass
    return 0


def _child(target: str, args: tuple, memory: int | None) -> bytes:
    """Run ``target`` ("module:function") on ``args``; the pickled outcome."""
    if memory:
        try:
            import resource
            limit = _vm_size() + int(memory)
            soft, hard = resource.getrlimit(resource.RLIMIT_AS)
            if hard != resource.RLIM_INFINITY:
                limit = min(limit, hard)
            resource.setrlimit(resource.RLIMIT_AS, (limit, hard))
        except (ImportError, ValueError, OSError):
            pass
    try:
        mod, name = target.split(":")
        fn = getattr(importlib.import_module(mod), name)
        out = ("ok", fn(*args))
    except SheetviewError as e:
        out = ("error", (type(e).__name__, e.detail, e.field, e.line))
    except MemoryError:
        out = ("memory", None)
    except BaseException as e:  # noqa: BLE001 - reported to the parent
        text = " ".join(str(e).split())[:200]
        out = ("exception", f"{type(e).__name__}: {text}" if text else type(e).__name__,
               traceback.format_exc()[-2000:])
    try:
        return pickle.dumps(out, protocol=pickle.HIGHEST_PROTOCOL)
    except MemoryError:
        return pickle.dumps(("memory", None))


def run_isolated(target: str, args: tuple, *, path, what: str, memory: int | None = None,
                 timeout: float | None = None):
    """``target(*args)`` run in a child process; its return value.

    ``target`` is ``"module:function"``. ``path`` names the file in messages and ``what``
    the parser ("VTK"). ``memory`` (bytes) caps the child's extra address space;
    ``timeout`` (s) defaults to :data:`TIMEOUT_BASE_S` plus :data:`TIMEOUT_PER_MB_S` per
    megabyte of the file. A :class:`SheetviewError` raised in the child is raised again
    here; any other failure becomes an :class:`InputError` naming the file.
    """
    if timeout is None:
        try:
            size = os.stat(path).st_size
        except OSError:
            size = 0
        timeout = TIMEOUT_BASE_S + TIMEOUT_PER_MB_S * size / 2**20
    status = None
    if hasattr(os, "fork") and sys.platform != "darwin":
        try:
            status, data = _run_forked(target, args, memory, timeout)
        except OSError:  # fork refused (process or memory limits): a fresh interpreter
            status = None
    if status is None:
        status, data = _run_spawned(target, args, memory, timeout)
    return _outcome(status, data, path, what, timeout)


def _run_forked(target, args, memory, timeout):
    r, w = os.pipe()
    try:
        pid = os.fork()
    except OSError:
        os.close(r)
        os.close(w)
        raise
    if pid == 0:  # the child: never returns
        code = 0
        try:
            os.close(r)
            null = os.open(os.devnull, os.O_RDWR)
            for fd in (0, 1, 2):
                os.dup2(null, fd)
            import faulthandler
            faulthandler.disable()  # its dump (to a descriptor of its own) would be noise
            signal.signal(signal.SIGINT, signal.SIG_DFL)
            data = _child(target, args, memory)
            view = memoryview(data)
            while view:
                n = os.write(w, view[:1 << 20])
                view = view[n:]
        except BaseException:  # noqa: BLE001 - nothing may escape a forked child
            code = 70
        finally:
            os._exit(code)
    os.close(w)
    chunks = []
    deadline = time.monotonic() + timeout
    timed_out = False
    try:
        while True:
            left = deadline - time.monotonic()
            if left <= 0:
                timed_out = True
                break
            ready, _, _ = select.select([r], [], [], min(left, 1.0))
            if ready:
                chunk = os.read(r, 1 << 20)
                if not chunk:
                    break
                chunks.append(chunk)
    except BaseException:
        _kill(pid)
        raise
    finally:
        os.close(r)
    if timed_out:
        _kill(pid)
        return ("timeout", None), None
    _, st = os.waitpid(pid, 0)
    if os.WIFSIGNALED(st):
        return ("signal", os.WTERMSIG(st)), None
    return ("exit", os.WEXITSTATUS(st)), b"".join(chunks)


def _kill(pid):
    try:
        os.kill(pid, signal.SIGKILL)
    except ProcessLookupError:
        pass
    try:
        os.waitpid(pid, 0)
    except ChildProcessError:
        pass


def _run_spawned(target, args, memory, timeout):
    code = ("import faulthandler, pickle, sys; faulthandler.disable(); "
            "from sheetview.io.isolate import _child; "
            "t, a, m = pickle.loads(sys.stdin.buffer.read()); "
            "sys.stdout.buffer.write(_child(t, a, m))")
    try:
        p = subprocess.run([sys.executable, "-c", code], input=pickle.dumps((target, args, memory)),
                           capture_output=True, timeout=timeout)
    except subprocess.TimeoutExpired:
        return ("timeout", None), None
    if p.returncode < 0:
        return ("signal", -p.returncode), None
    return ("exit", p.returncode), p.stdout


def _outcome(status, data, path, what, timeout):
    kind, value = status
    if kind == "timeout":
        raise InputError(f"{what} did not finish parsing it within {timeout:.0f} s; the file is "
                         f"damaged or far too large", path=path)
    if kind == "signal":
        try:
            name = signal.Signals(value).name
        except ValueError:
            name = f"signal {value}"
        if value == signal.SIGKILL:
            raise MemoryLimitError(f"{what} was killed while parsing it (SIGKILL, most likely "
                                   f"out of memory); the file is damaged or too large",
                                   path=path)
        raise InputError(f"{what} crashed while parsing it ({name}); the file is damaged",
                         path=path)
    try:
        out = pickle.loads(data) if data else None
    except Exception:  # noqa: BLE001 - a child that died while writing
        out = None
    if out is None:
        raise InputError(f"{what} stopped while parsing it (exit status {value}); the file is "
                         f"damaged", path=path)
    if out[0] == "ok":
        return out[1]
    if out[0] == "error":
        cls, detail, field, line = out[1]
        raise _ERRORS.get(cls, InputError)(detail, path=path, field=field, line=line)
    if out[0] == "memory":
        raise MemoryLimitError(f"{what} ran out of the memory allowed while parsing it; the "
                               f"file is damaged or too large", path=path)
    raise InputError(f"cannot be read by {what} ({out[1]}); the file is damaged", path=path)
