"""Compiled checks on the tracker's fix log (numba, CPU only).

Private: :class:`livematch.core.tracker.Tracker` calls these on its own arrays (the fix
positions ``fix_xy``, one row ``x, y`` per accepted fix). Each mirrors a few lines of
the tracker that numpy did on small arrays: a numpy expression on a handful of rows
costs a few microseconds of fixed overhead per operation, a compiled loop one call.
Each gives exactly the answer of the numpy lines it replaces (same float64 operations,
in the same order; no fast-math), which ``tests/test_fix_kernel.py`` checks against
numpy.
"""

from __future__ import annotations

import numpy as np

from livematch.core import _jit


@_jit.njit(cache=True, error_model="numpy")
def all_within(xy: np.ndarray, lo: int, hi: int, hx: float, hy: float, r2: float) -> bool:
    """Whether every row ``lo`` to ``hi`` - 1 of ``xy`` lies within ``sqrt(r2)`` of (hx, hy).

    The numpy ``not float(((xy[lo:hi, 0] - hx) ** 2 + (xy[lo:hi, 1] - hy) ** 2).max()) >
    r2`` for ``lo < hi`` (``** 2`` is numpy's square, ``d * d``), without the arrays: a
    row with a squared distance above ``r2`` answers False; NaN compares false either
    way (numpy's max propagates it, and ``not NaN > r2`` is True).
    """
    for i in range(lo, hi):
        dx = xy[i, 0] - hx
        dy = xy[i, 1] - hy
        if dx * dx + dy * dy > r2:
            return False
    return True
