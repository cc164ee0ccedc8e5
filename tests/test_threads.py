"""sheetview.threads.run_chunks: ranges that cover the items once, in order, whatever the
number of threads (checked against plain Python ranges and sums)."""
import numba
import numpy as np
import pytest

from sheetview.threads import chunk_tasks, run_chunks


@pytest.mark.parametrize("n", [0, 1, 2, 7, 16, 17, 1000])
@pytest.mark.parametrize("threads", [1, 2, 3, 8])
def test_chunk_tasks_cover_range_once_in_order(n, threads):
    """The ranges concatenate to ``range(n)`` (no gap, no overlap, none empty)."""
    tasks = chunk_tasks(n, threads)
    got = [i for lo, hi in tasks for i in range(lo, hi)]
    assert got == list(range(n))
    assert all(hi > lo for lo, hi in tasks)
    assert len(tasks) <= max(1, 8 * threads)


@numba.njit(cache=True, nogil=True)
def _square_rows(lo, hi, x, out):
    s = 0.0
    for i in range(lo, hi):
        out[i] = x[i] * x[i]
        s += x[i]
    return s


@pytest.mark.parametrize("threads", [1, 2, 4])
def test_run_chunks_disjoint_outputs_and_ordered_results(threads):
    """A nogil kernel over ranges on threads writes every row once (numpy's x**2 as the
    reference) and its partial results come back in range order (their sum = numpy's
    sum up to rounding; the ranges' own lo values are increasing)."""
    x = np.random.default_rng(0).normal(size=10_001)
    out = np.zeros_like(x)
    parts = run_chunks(_square_rows, len(x), x, out, threads=threads)
    np.testing.assert_array_equal(out, x * x)
    assert abs(sum(parts) - x.sum()) < 1e-9
    seen = run_chunks(lambda lo, hi: lo, len(x), threads=threads)
    assert seen == sorted(seen) and seen[0] == 0
