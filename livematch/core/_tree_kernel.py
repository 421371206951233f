"""Compiled operations on a candidate tree held in flat arrays (numba, CPU only).

Private: :class:`livematch.core.candidates.CandidateTree` is the interface. A tree is
three arrays, rows in topological order (a parent's row always precedes its children's):

``ti`` (int32, rows x 5): ``seg, seq, parent, via_start, via_len`` (``parent`` -1 for a
    root; the via of a row is ``tv[via_start:via_start + via_len]``).
``tf`` (float64, rows x 4): ``low, pos, cost, t``. The matched point (x, y) of a row is
    not stored: it is ``a + pos (b - a)`` on the row's segment, the very expression the
    sweep computed it with, so it is recomputed bit for bit where it is read (the live
    score, the sweep's input, a row handed out as a node) from the network's arrays
    (``seg_geo`` of :class:`livematch.core.fastsweep.SweepArrays`: ax, ay, bx - ax,
    by - ay per segment).
    A row is 52 bytes (20 + 32) instead of 68 with the point.
``tv`` (int32): the vias, one after another.

The live states are one contiguous block of rows ``[lo, hi)``, the newest fix's; they are
leaves (nothing points at them), so they can be filtered in place. Every function here
mirrors a Python function of :mod:`livematch.core.sweep` or :mod:`livematch.core.tracker`
on :class:`~livematch.core.sweep.Node` objects, step for step, so that a tracker on
arrays makes the same decisions as one on objects (``tests/test_candidates.py``).
"""

from __future__ import annotations

import math
from collections.abc import Callable

import numba
import numpy as np

from livematch.core import _sweep_kernel as _sk
from livematch.core._kernel_key import code_key

# The row layout, and the sweep step on a tree (``tree_sweep``), live in _sweep_kernel:
# numba's disk cache only notices changes to a function's own file, and the step inlines
# the sweep kernel.
from livematch.core._sweep_kernel import (
    ARENA_FULL,
    F_COST,
    F_LOW,
    F_POS,
    F_T,
    I_PARENT,
    I_SEG,
    I_SEQ,
    I_VIA0,
    I_VIAN,
    ROW_F,
    ROW_I,
    ancestor_at,
    block_ancestor,
    commit_point,
    compact,
    compact_append,
    compact_into,
    cut_and_check,
    cut_links,
    kept_rows,
    rows_ancestor,
    tree_append,
    tree_sweep,
)

__all__ = [
    "ARENA_FULL", "F_COST", "F_LOW", "F_POS", "F_T", "I_PARENT", "I_SEG", "I_SEQ", "I_VIA0",
    "I_VIAN", "ROW_F", "ROW_I", "ancestor_at", "best_row", "best_scored", "block_ancestor",
    "chain_into", "commit_point", "compact", "compact_append", "compact_into",
    "cut_and_check", "cut_links", "descends_from",
    "driven_since", "junction_split", "kept_rows", "live_answer", "live_scores", "prune_live",
    "tree_append", "tree_sweep", "trim",
]

_jit = numba.njit(cache=True, error_model="numpy")


@_jit
def best_row(ti: np.ndarray, tf: np.ndarray, lo: int, hi: int, prefer: int) -> int:
    """:func:`livematch.core.sweep.best_leaf`: lowest (cost, seg != prefer, seg)."""
    return best_scored(ti, tf[lo:hi, F_COST], lo, hi, prefer)


@_jit
def best_scored(ti: np.ndarray, score: np.ndarray, lo: int, hi: int, prefer: int) -> int:
    """The live row with the lowest (score, seg != prefer, seg); ``score[r - lo]`` is row r's."""
    best = lo
    for r in range(lo + 1, hi):
        c, cb = score[r - lo], score[best - lo]
        if c != cb:
            if c < cb:
                best = r
            continue
        s, sb = ti[r, I_SEG], ti[best, I_SEG]
        if (s != prefer) != (sb != prefer):
            if s == prefer:
                best = r
            continue
        if s < sb:
            best = r
    return best


@_jit
def live_scores(
    geo: np.ndarray, ti: np.ndarray, tf: np.ndarray, lo: int, hi: int, fix_xy: np.ndarray,
    fix_seq0: int, first: int, inv_two_sigma2: float, inv_tau: float, max_dt: float,
) -> np.ndarray:
    """:func:`livematch.core.sweep.live_score` of every live row, in row order.

    ``geo``: per segment ``ax, ay, bx - ax, by - ay``
    (:attr:`livematch.core.fastsweep.SweepArrays.seg_geo`), for the matched points.
    ``fix_xy[i]`` is the fix of sequence number ``fix_seq0 + i``; links to states older
    than fix ``first`` are not walked.
    """
    out = np.empty(hi - lo)
    n = fix_xy.shape[0]
    for r in range(lo, hi):
        score = tf[r, F_COST]
        cur = r
        # the matched points, as the sweep computed them (rows keep none): each row's is
        # computed once, and a link's parent is the next link's child
        pos = tf[cur, F_POS]
        g = ti[cur, I_SEG]
        cx = geo[g, 0] + pos * geo[g, 2]
        cy = geo[g, 1] + pos * geo[g, 3]
        while True:
            p = ti[cur, I_PARENT]
            if p < 0 or ti[p, I_SEQ] < first:
                break
            pos = tf[p, F_POS]
            g = ti[p, I_SEG]
            px = geo[g, 0] + pos * geo[g, 2]
            py = geo[g, 1] + pos * geo[g, 3]
            i = ti[cur, I_SEQ] - fix_seq0
            j = ti[p, I_SEQ] - fix_seq0
            dt = tf[cur, F_T] - tf[p, F_T]
            if j >= 0 and i < n and 0.0 < dt <= max_dt:
                ex = cx - fix_xy[i, 0]
                ey = cy - fix_xy[i, 1]
                rho = math.exp(-dt * inv_tau)
                wx = ex - rho * (px - fix_xy[j, 0])
                wy = ey - rho * (py - fix_xy[j, 1])
                score += ((wx * wx + wy * wy) * inv_two_sigma2 / (1.0 - rho * rho)
                          - (ex * ex + ey * ey) * inv_two_sigma2)
            cur = p
            cx = px
            cy = py
        out[r - lo] = score
    return out


@_jit
def _still_on(ti: np.ndarray, node: int, anc: int) -> bool:
    """Whether the path from ``anc`` to ``node`` never left ``anc``'s segment."""
    seg = ti[anc, I_SEG]
    cur = node
    while cur >= 0 and cur != anc:
        if ti[cur, I_VIAN] > 0 or ti[cur, I_SEG] != seg:
            return False
        cur = ti[cur, I_PARENT]
    return True


@_jit
def _branch(ti: np.ndarray, tv: np.ndarray, node: int, anc: int) -> int:
    """The first segment after ``anc``'s on the path from ``anc`` to ``node``."""
    cur = node
    while ti[cur, I_PARENT] >= 0 and ti[cur, I_PARENT] != anc:
        cur = ti[cur, I_PARENT]
    if ti[cur, I_VIAN] > 0:
        return tv[ti[cur, I_VIA0]]
    return ti[cur, I_SEG]


@_jit
def driven_since(ti: np.ndarray, tf: np.ndarray, tv: np.ndarray, slen: np.ndarray, node: int,
                 anc: int) -> float:
    """Metres driven along the path of row ``node`` since the head vertex of ``anc``'s segment.

    ``anc`` must lie on ``node``'s back-pointer chain. Each link's length is the route the
    sweep charged for it: along one segment, or out of the parent's segment, through the
    vias, into the child's.
    """
    total = 0.0
    cur = node
    while cur != anc:
        p = ti[cur, I_PARENT]
        seg = ti[cur, I_SEG]
        p_seg = ti[p, I_SEG]
        if ti[cur, I_VIAN] == 0 and seg == p_seg:
            total += (tf[cur, F_POS] - tf[p, F_POS]) * slen[seg]
        else:
            total += (1.0 - tf[p, F_POS]) * slen[p_seg] + tf[cur, F_POS] * slen[seg]
            for j in range(ti[cur, I_VIA0], ti[cur, I_VIA0] + ti[cur, I_VIAN]):
                total += slen[tv[j]]
        cur = p
    return total - (1.0 - tf[anc, F_POS]) * slen[ti[anc, I_SEG]]


@_jit
def descends_from(ti: np.ndarray, node: int, anc: int) -> bool:
    """Whether row ``anc`` lies on the back-pointer chain of row ``node``."""
    seq = ti[anc, I_SEQ]
    cur = node
    while cur >= 0 and ti[cur, I_SEQ] >= seq:
        if cur == anc:
            return True
        cur = ti[cur, I_PARENT]
    return False


@_jit
def prune_live(ti: np.ndarray, tf: np.ndarray, tv: np.ndarray, lo: int, hi: int,
               anc: int) -> int:
    """Keep, in order, the live rows descending from ``anc``; returns the new ``hi``.

    Live rows are leaves, so moving them within the block breaks no back-pointer.
    """
    w = lo
    for r in range(lo, hi):
        if descends_from(ti, r, anc):
            if w != r:
                for c in range(ROW_I):
                    ti[w, c] = ti[r, c]
                for c in range(ROW_F):
                    tf[w, c] = tf[r, c]
            w += 1
    return w


@_jit
def chain_into(ti: np.ndarray, top: int, min_seq: int, out: np.ndarray) -> int:
    """The rows of ``top``'s chain back to fix ``min_seq``, into ``out``; returns its length.

    ``out[:length]`` are the rows from the oldest with seq >= ``min_seq`` up to ``top``,
    ``out[length]`` the row before them (-1 if none). When ``out`` is too
    short nothing is written and ``-(length + 1)`` comes back (the size needed):
    returning an array from compiled code costs several microseconds, a scalar a
    fraction of one, and a commit asks for its chain every time.
    """
    length = 0
    cur = top
    while cur >= 0 and ti[cur, I_SEQ] >= min_seq:
        length += 1
        cur = ti[cur, I_PARENT]
    if length + 1 > out.shape[0]:
        return -(length + 1)
    out[length] = cur
    cur = top
    for j in range(length - 1, -1, -1):
        out[j] = cur
        cur = ti[cur, I_PARENT]
    return length


# Kernels that call into _sweep_kernel (another file) are made by factories with that
# file's code_key as a closure constant: numba's disk cache keys on closure constants
# but does not notice a change to a callee in another file (livematch.core._kernel_key).
_SWEEP_KEY = code_key(_sk)


def _keyed_junction_split(sweep_key: int) -> Callable[..., int]:
    """``junction_split`` compiled with the sweep kernel's :func:`code_key` as a constant."""

    @_jit
    def junction_split(
        ti: np.ndarray, tv: np.ndarray, lo: int, hi: int, best: int, margin: float,
        score: np.ndarray,
    ) -> int:
        """The junction the near-best candidates split at, or -1 to report ``best`` itself.

        Near-best: a live row r with ``score[r - lo]`` within ``margin`` of the best one's.
        Mirrors the decision of :meth:`livematch.core.tracker.Tracker._hold_at_junction`
        up to (not including) its distance check.
        """
        if sweep_key == -1:  # never: the key only has to be part of the function
            return -1
        limit = score[best - lo] + margin
        close = np.empty(hi - lo, np.int64)
        k = 0
        varied = False
        for r in range(lo, hi):
            if score[r - lo] <= limit:
                close[k] = r
                k += 1
                if ti[r, I_SEG] != ti[best, I_SEG]:
                    varied = True
        if k < 2 or not varied:
            return -1
        walk = close[:k].copy()
        split = rows_ancestor(ti, walk, k, -1)
        if split < 0 or split == best or _still_on(ti, best, split):
            return -1
        first = -1
        for j in range(k):
            n = close[j]
            if _still_on(ti, n, split):
                continue
            b = _branch(ti, tv, n, split)
            if first < 0:
                first = b
            elif b != first:
                return split
        return -1

    return junction_split


junction_split = _keyed_junction_split(_SWEEP_KEY)


def _keyed_live_answer(sweep_key: int) -> Callable[..., tuple[int, int]]:
    """``live_answer`` compiled with the sweep kernel's :func:`code_key` as a constant."""

    @_jit
    def live_answer(
        geo: np.ndarray, ti: np.ndarray, tf: np.ndarray, tv: np.ndarray, lo: int, hi: int,
        prefer: int, fix_xy: np.ndarray, fix_n: int, fix_seq0: int, first: int,
        inv_two_sigma2: float, inv_tau: float, max_dt: float, margin: float,
    ) -> tuple[int, int]:
        """The live answer's rows in one call: ``(best, split)``.

        ``best``: :func:`best_scored` by :func:`live_scores` (over ``fix_xy[:fix_n]``) when
        ``inv_tau`` > 0, else :func:`best_row` (path cost). ``split``: :func:`junction_split`
        around ``best`` with the same ranking, -1 when ``margin`` is not positive. Each call
        from Python costs a dispatch per argument and a returned array costs more than the
        scoring itself, so the tracker asks for both rows at once.
        """
        if sweep_key == -1:  # never (see junction_split)
            return -1, -1
        if inv_tau > 0.0:
            score = live_scores(geo, ti, tf, lo, hi, fix_xy[:fix_n], fix_seq0, first,
                                inv_two_sigma2, inv_tau, max_dt)
        else:
            score = tf[lo:hi, F_COST].copy()
        best = best_scored(ti, score, lo, hi, prefer)
        split = junction_split(ti, tv, lo, hi, best, margin, score) if margin > 0.0 else -1
        return best, split

    return live_answer


live_answer = _keyed_live_answer(_SWEEP_KEY)


def _keyed_trim(sweep_key: int) -> Callable[..., tuple[int, int, int]]:
    """``trim`` compiled with the sweep kernel's :func:`code_key` as a constant."""

    @_jit
    def trim(
        ti: np.ndarray, tf: np.ndarray, tv: np.ndarray, lo: int, hi: int, next_commit: int,
        seq: int, trim_seq: int, max_lag: int, prefer: int,
    ) -> tuple[int, int, int]:
        """Cut the history no future commit needs; force-prune a tree that stopped committing.

        Commits only ever read states from fix ``next_commit - 1`` on, so every back-pointer
        to an older state is cut (that state becomes unreachable, and the next compaction
        drops it): a tree holds the live states and their paths back to the last commit,
        never more. If the tree has not been cut for ``2 * max_lag`` fixes (commits stalled),
        only the live states descending from the best one's ancestor ``max_lag`` fixes back
        are kept.

        Returns ``(hi, trim_seq, forced)``: the live block's new end, the fix the history now
        starts at and the seq of the state a forced prune kept (-1 if none).
        """
        if sweep_key == -1:  # never (see junction_split)
            return hi, trim_seq, -1
        cut = next_commit - 1
        cut_links(ti, lo, hi, cut)
        if cut > trim_seq:
            trim_seq = cut
        if seq - trim_seq > 2 * max_lag:
            keep = ancestor_at(ti, best_row(ti, tf, lo, hi, prefer), seq - max_lag)
            kept = int(ti[keep, I_SEQ])
            ti[keep, I_PARENT] = -1  # before pruning: ``keep`` may be a live row that moves
            hi = prune_live(ti, tf, tv, lo, hi, keep)
            return hi, kept, kept
        return hi, trim_seq, -1


    return trim


trim = _keyed_trim(_SWEEP_KEY)
