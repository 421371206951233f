"""A commit's chain of tree rows gathered in one compiled call (numba, CPU only).

Private: :meth:`livematch.core.candidates.CandidateTree.chain` builds the nodes of a
commit's chain from what :func:`chain_rows` writes. Before, it walked the chain in a
compiled call and then read each row's fields from Python (two slices, a via slice, the
fix time, four list look-ups for the matched point): about half a commit's cost of
building its chain. Here the walk and the fields are one call; Python only makes the
nodes.

Same values bit for bit: the fields are copied, and the matched point is the
expression :meth:`CandidateTree.point` evaluates, ``ax + pos * (bx - ax)`` (``bx -
ax`` as the network's ``seg_geo`` holds it, the difference Python takes), in the same
order, without fast-math (``tests/test_candidates.py`` compares chains with the
Python path's).

The tree's layout constants come from :mod:`livematch.core._sweep_kernel`: the kernel
is made by a factory that takes that file's :func:`~livematch.core._kernel_key.code_key`
as a closure constant, so numba's disk cache recompiles it when the layout changes.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Final

import numpy as np

from livematch.core import _jit
from livematch.core import _sweep_kernel as _sk
from livematch.core._kernel_key import code_key
from livematch.core._sweep_kernel import (
    F_POS,
    H_HI,
    H_IEND,
    H_LCAP,
    H_LO,
    H_N,
    H_NF,
    H_RCAP,
    H_T0,
    H_TCAP,
    HEAD,
    K_PARENT,
    K_SEG,
    K_VIAE,
    LF_COST,
    LF_LOW,
    LIVE_F,
    ROW_F,
    ROW_I,
    seq_at,
)

#: ints written per row: row, seg, seq, and the row's vias as ``ti[v0:v1]``
CHAIN_I: Final = 5
#: floats written per row: fix time, pos, matched x, y, cost, low
CHAIN_F: Final = 6


def _keyed_chain_rows(sweep_key: int) -> Callable[..., int]:
    """``chain_rows`` compiled with the sweep kernel's code key as a constant."""

    @_jit.njit(cache=True, error_model="numpy")
    def chain_rows(ti: np.ndarray, geo: np.ndarray, top: int, min_seq: int, oi: np.ndarray,
                   of: np.ndarray) -> int:
        """``top``'s chain back to fix ``min_seq`` and the row before it, with their fields.

        Entry ``j`` < length is the j-th row from the oldest with seq >= ``min_seq`` up to
        ``top`` (as ``chain_into`` orders them), entry ``length`` the row before them
        (its row -1 when there is none; its other fields then unset). Ints at ``oi[CHAIN_I
        * j:]``: row, seg, seq, v0, v1 (the row's vias are ``ti[v0:v1]``); floats at
        ``of[CHAIN_F * j:]``: fix time, pos, x, y, cost, low (cost and low NaN for a row
        that is not live: the tree keeps them for the live block only). Returns the
        length, or
        ``-(length + 1)`` with nothing written when ``oi`` or ``of`` is too short.
        """
        if sweep_key == -1:  # never: the key only keys numba's cache
            return 0
        tf = ti[ti[H_IEND] + (ti[H_IEND] & 1):].view(np.float64)  # _sweep_kernel.floats
        length = 0
        cur = top
        # a row below ``bound`` is of a fix older than min_seq: row_from written out (a
        # call that takes an array costs two atomic reference-count updates)
        j = min_seq - ti[H_T0]
        bound = (0 if j <= 0 else ti[H_N] if j >= ti[H_NF]
                 else ti[ti[H_IEND] - ti[H_TCAP] + j])
        while cur >= bound and cur >= 0:
            length += 1
            cur = ti[ROW_I * cur + K_PARENT]
        if CHAIN_I * (length + 1) > oi.shape[0] or CHAIN_F * (length + 1) > of.shape[0]:
            return -(length + 1)
        cap = ti[H_RCAP]
        lb = ROW_F * cap  # live_base
        tb = lb + LIVE_F * ti[H_LCAP]  # time_base: fix slot s's time at tb + s
        lo = ti[H_LO]
        hi = ti[H_HI]
        vb = HEAD + ROW_I * cap
        fb = ti[H_IEND] - ti[H_TCAP]  # fix_base: fix slot s's first row at fb + s
        t0 = ti[H_T0]
        before = cur  # the row before the chain (-1: none)
        oi[CHAIN_I * length] = before
        cur = top
        slot = ti[H_NF] - 1  # the chain's rows' fix slots, found going down
        for j in range(length, -1, -1):
            r = before if j == length else cur
            if r < 0:
                continue  # no row before: only its row (-1) is written
            seg = ti[ROW_I * r + K_SEG]
            if j == length:
                seq = seq_at(ti, r)
            else:
                while ti[fb + slot] > r:
                    slot -= 1
                seq = t0 + slot
            v1 = ti[ROW_I * r + K_VIAE]
            v0 = ti[ROW_I * r - ROW_I + K_VIAE] if v1 != 0 and r != 0 else 0
            b = CHAIN_I * j
            oi[b] = r
            oi[b + 1] = seg
            oi[b + 2] = seq
            oi[b + 3] = vb + v0
            oi[b + 4] = vb + v1
            pos = tf[ROW_F * r + F_POS]
            f = CHAIN_F * j
            of[f] = tf[tb + seq - t0]
            of[f + 1] = pos
            of[f + 2] = geo[seg, 0] + pos * geo[seg, 2]
            of[f + 3] = geo[seg, 1] + pos * geo[seg, 3]
            if lo <= r < hi:
                of[f + 4] = tf[lb + LIVE_F * (r - lo) + LF_COST]
                of[f + 5] = tf[lb + LIVE_F * (r - lo) + LF_LOW]
            else:
                of[f + 4] = np.nan
                of[f + 5] = np.nan
            if j < length:
                cur = ti[ROW_I * cur + K_PARENT]
        return length

    return chain_rows


chain_rows = _keyed_chain_rows(code_key(_sk))
