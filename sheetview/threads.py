"""The thread budget of this process, shared by every parallel library sheetview calls.

numba kernels run on ``numba.get_num_threads()`` threads; the distance transforms (edt)
and FFTs (scipy.fft) are told to use the same number, so that one setting
(``numba.set_num_threads``, or a batch worker's share of the cores) governs them all and
two batch workers on two cores do not each start two threads per call.
"""
from __future__ import annotations


def budget() -> int:
    """Threads this process may use for one computation (at least 1)."""
    try:
        import numba
        return max(1, int(numba.get_num_threads()))
    except Exception:  # numba missing or its threading layer unavailable
        return 1


def chunk_tasks(n_items: int, threads: int, per_thread: int = 8) -> list[tuple[int, int]]:
    """Split ``range(n_items)`` into at most ``per_thread * threads`` contiguous ``(lo, hi)``
    ranges of near-equal size, in order (none empty)."""
    n_items = int(n_items)
    if n_items <= 0:
        return []
    k = max(1, min(n_items, per_thread * max(1, int(threads)) if threads > 1 else 1))
    return [(c * n_items // k, (c + 1) * n_items // k) for c in range(k)
            if (c + 1) * n_items // k > c * n_items // k]


def run_chunks(kernel, n_items: int, *args, threads: int | None = None,
               per_thread: int = 8) -> list:
    """Call ``kernel(lo, hi, *args)`` over contiguous ranges covering ``range(n_items)``,
    on a pool of ``threads`` threads (default :func:`budget`), and return the results in
    range order.

    For serial numba kernels compiled with ``nogil=True``: each call works on items
    ``lo <= item < hi`` only (its own outputs, or disjoint parts of shared ones), so the
    results do not depend on the number of threads. This replaces a ``parallel=True``
    kernel whose ``prange`` runs over independent chunks, at a fraction of its compile
    time. With one thread (or one range) the kernel runs in the calling thread.
    """
    nt = budget() if threads is None else max(1, int(threads))
    tasks = chunk_tasks(n_items, nt, per_thread)
    if nt == 1 or len(tasks) <= 1:
        return [kernel(lo, hi, *args) for lo, hi in tasks]
    from concurrent.futures import ThreadPoolExecutor
    with ThreadPoolExecutor(min(nt, len(tasks))) as ex:
        futures = [ex.submit(kernel, lo, hi, *args) for lo, hi in tasks]
        return [f.result() for f in futures]
