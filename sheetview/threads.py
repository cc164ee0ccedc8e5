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
