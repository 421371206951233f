"""Kernels called at their compiled entry point (livematch.core._direct) answer as numba does.

The reference here is numba's own dispatcher (the library's documented call path): the
entry point must give the same values for the same arguments, and must not be used for
arguments whose types it was not compiled for.
"""

from __future__ import annotations

import numpy as np
import pytest

from livematch.core import _tree_kernel as _t
from livematch.core._direct import Direct, resolved, signature
from livematch.core._sweep_kernel import ROW_I, commit_point

# numba's dispatchers: the kernels under the JIT, which the session from source runs (a
# compiled install runs them ahead of time: tests/test_aot_kernels.py)
pytestmark = pytest.mark.pure_python


def _chain_tree() -> np.ndarray:
    """A tree header and rows: a chain of 6 rows (fixes 1..6), each the parent of the next."""
    n = 6
    ti = np.zeros(_t.HEAD + ROW_I * n + 4 + n, np.int32)  # ... 4 vias, n fixes' first rows
    ti[_t.H_N] = n
    ti[_t.H_LO] = n - 1
    ti[_t.H_HI] = n
    ti[_t.H_RCAP] = n
    ti[_t.H_T0] = 1
    ti[_t.H_NF] = ti[_t.H_TCAP] = n
    for r in range(n):
        ti[_t.HEAD + ROW_I * r + _t.I_SEG] = 10 + r
        ti[_t.HEAD + ROW_I * r + _t.I_PARENT] = r - 1
        ti[len(ti) - n + r] = r  # fix r + 1 starts at row r
    return ti


def test_entry_point_answers_as_the_dispatcher() -> None:
    ti = _chain_tree()
    calls = Direct(ancestor_at=_t.ancestor_at, commit_point=commit_point)
    for row in range(6):
        for seq in range(1, 7):
            assert calls.ancestor_at(ti, row, seq) == _t.ancestor_at(ti, row, seq)
    # resolved once: the attribute is now the compiled entry point, not the resolver
    assert calls.ancestor_at is not _t.ancestor_at
    assert calls.ancestor_at.__name__ == "ancestor_at"
    for nc in range(1, 7):
        for newest in range(nc, 7):
            assert calls.commit_point(ti, nc, newest) == commit_point(ti, nc, newest)


def test_numbers_follow_the_kernels_annotations() -> None:
    ti = _chain_tree()
    sig = signature(_t.ancestor_at, (ti, 3, 2))
    assert sig is not None and str(sig[1]) == "int64" and str(sig[2]) == "int64"
    # cut_and_check's last parameter is annotated bool
    sig = signature(_t.cut_and_check, (ti, 2, 5, True))
    assert sig is not None and str(sig[3]) == "bool"


def test_arrays_it_was_not_made_for_keep_the_dispatcher() -> None:
    ti = _chain_tree()
    readonly = ti.copy()
    readonly.flags.writeable = False
    assert signature(_t.ancestor_at, (readonly, 3, 2)) is None
    strided = np.zeros(2 * len(ti), np.int32)[::2]
    strided[:] = ti
    assert signature(_t.ancestor_at, (strided, 3, 2)) is None
    assert signature(_t.ancestor_at, (ti, "3", 2)) is None  # not a number
    assert signature(_t.ancestor_at, (ti, 3)) is None  # too few arguments
    assert resolved(_t.ancestor_at, (strided, 3, 2)) is None
    calls = Direct(ancestor_at=_t.ancestor_at)
    # the first call is refused: answered by the dispatcher, which stays for later calls
    assert calls.ancestor_at(strided, 4, 2) == _t.ancestor_at(ti, 4, 2)
    assert calls.ancestor_at is _t.ancestor_at
