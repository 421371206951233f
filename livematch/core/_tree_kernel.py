"""Compiled operations on a candidate tree held in flat arrays (numba, CPU only).

Private: :class:`livematch.core.candidates.CandidateTree` is the interface. A tree is
one flat int32 array ``ti``, its ints first and its floats ``tf`` after them (from the
even index at or after ``H_IEND``, viewed as float64: :func:`floats`), rows in
topological order (a parent's row always precedes its children's):

``ti``'s ints: a header of ``HEAD`` values (``H_N`` rows in use, ``H_NV`` vias in use,
    the live block ``[H_LO, H_HI)``, six slots a step that found the arrays full leaves
    its sizes in, ``H_T0`` the sequence number of the first fix time kept, ``H_RCAP``
    the rows the arrays have room for, ``H_LCAP`` the live rows, ``H_NF`` the fixes in
    use from ``H_T0`` on and ``H_TCAP`` the fixes the arrays have room for, ``H_IEND``
    where the ints end), then room for ``H_RCAP`` rows of ``ROW_I`` ints ``seg, parent,
    via_end`` (field ``I_x`` of row r at ``ROW_I * r + K_x``; ``parent`` -1 for a root),
    then the vias, one after another in row order, from :func:`via_base` on (row r's
    vias run from row r - 1's ``via_end``, 0 for row 0, to its own: most rows have none,
    and one int says so), and last, in the ints' final ``H_TCAP`` values (from
    :func:`fix_base` to ``H_IEND``), each fix's first row: fix ``H_T0 + j``'s at ``j``
    (a fix with no rows, a gap in the run of fixes, has the next one's). A row keeps no
    fix of its own: rows are in fix order (a step appends its fix's rows after the older
    ones, and a compaction keeps the order), so row r's fix is the last whose first row
    is <= r (:func:`seq_at`), and a walk that compares rows' fixes with a bound compares
    row numbers with :func:`row_from` of the bound instead. 4 bytes a fix instead of 4 a
    row (since session 27; a tree keeps several rows a fix).
``tf`` (float64, the rest of the array): per row ``ROW_F`` (1) float, its ``pos`` (field
    ``F_POS`` of row r at ``ROW_F * r + F_POS``); then from :func:`live_base` (``ROW_F *
    H_RCAP``) room for ``H_LCAP`` live rows' ``LIVE_F`` floats ``low, cost`` (the live
    row ``lo + j`` at ``live_base + LIVE_F * j + LF_x``); then from :func:`time_base` on
    the fix times: the time of fix ``H_T0 + j`` at ``j`` (:func:`time_of`), one per fix
    from the oldest row's to the newest, shared by the fix's rows (a fix has several
    candidates; the time was a float in every row before). A state's ``low`` and
    ``cost`` are read only while it is live (the next sweep step, the ranking of the
    live states): once a step appends the next live block, the old one's are
    overwritten, and a row handed out as a node when it is no longer live has NaN for
    both. The matched point (x, y) of a row is not stored either: it is ``a + pos (b -
    a)`` on the row's segment, the very expression the sweep computed it with, so it is
    recomputed bit for bit where it is read (the live score, the sweep's input, a row
    handed out as a node) from the network's arrays (``seg_geo`` of
    :class:`livematch.core.fastsweep.SweepArrays`: ax, ay, bx - ax, by - ay per
    segment). A row is 20 bytes (12 + 8), 16 more while it is live, and 12 more a fix
    (its time and its first row).

One array rather than one per row field, with the counts in its header: a tree idle
between fixes costs one numpy object (about 120 bytes beyond its data; two arrays, ints
and floats, until session 30) and a compiled call takes the tree as one argument, its
counts read from the header rather than passed in and handed back (each argument and
each returned value costs the dispatcher time), and views its floats itself (a view
in compiled code allocates nothing). Python reads an int with ``ndarray.item`` at a
flat index, a float through a view of the array
(:attr:`~livematch.core.candidates.CandidateTree.tf`).

The live states are one contiguous block of rows, the newest fix's; they are leaves
(nothing points at them), so they can be filtered in place. Every function here mirrors
a Python function of :mod:`livematch.core.sweep` or :mod:`livematch.core.tracker` on
:class:`~livematch.core.sweep.Node` objects, step for step, so that a tracker on arrays
makes the same decisions as one on objects (``tests/test_candidates.py``).
"""

from __future__ import annotations

import math
from collections.abc import Callable

import numpy as np

from livematch.core import _sweep_kernel as _sk
from livematch.core._jit import njit
from livematch.core._kernel_key import code_key

# The row layout, and the sweep step on a tree (``tree_sweep``), live in _sweep_kernel:
# numba's disk cache only notices changes to a function's own file, and the step inlines
# the sweep kernel.
from livematch.core._sweep_kernel import (
    ARENA_FULL,
    DIED,
    F_POS,
    H_CAP_L,
    H_CAP_ROWS,
    H_CAP_T,
    H_CAP_VIAS,
    H_HI,
    H_IEND,
    H_LCAP,
    H_LO,
    H_M,
    H_N,
    H_NF,
    H_NV,
    H_NVIA,
    H_RCAP,
    H_T0,
    H_TCAP,
    HEAD,
    I_PARENT,
    I_SEG,
    I_VIAE,
    K_PARENT,
    K_SEG,
    K_VIAE,
    L_SPARE,
    LF_COST,
    LF_LOW,
    LIVE_F,
    MIN_SPARE,
    ROW_F,
    ROW_I,
    T_SPARE,
    TREE_OVERFLOW,
    ancestor_at,
    block_ancestor,
    commit_point,
    compact,
    compact_append,
    compact_in_place,
    compact_into,
    cut_and_check,
    cut_links,
    fix_base,
    floats,
    kept_rows,
    live_base,
    live_room,
    row_from,
    row_spare,
    rows_ancestor,
    seq_at,
    time_base,
    time_of,
    tree_append,
    tree_sweep,
    via_base,
)

__all__ = [
    "ARENA_FULL",
    "DIED",
    "F_POS",
    "HEAD",
    "H_CAP_L",
    "H_CAP_ROWS",
    "H_CAP_T",
    "H_CAP_VIAS",
    "H_HI",
    "H_IEND",
    "H_LCAP",
    "H_LO",
    "H_M",
    "H_N",
    "H_NF",
    "H_NV",
    "H_NVIA",
    "H_RCAP",
    "H_T0",
    "H_TCAP",
    "I_PARENT",
    "I_SEG",
    "I_VIAE",
    "K_PARENT",
    "K_SEG",
    "K_VIAE",
    "LF_COST",
    "LF_LOW",
    "LIVE_F",
    "L_SPARE",
    "MIN_SPARE",
    "ROW_F",
    "ROW_I",
    "TREE_OVERFLOW",
    "T_SPARE",
    "ancestor_at",
    "beam_live",
    "best_row",
    "best_scored",
    "block_ancestor",
    "chain_into",
    "commit_point",
    "compact",
    "compact_append",
    "compact_in_place",
    "compact_into",
    "cut_and_check",
    "cut_links",
    "descends_from",
    "driven_since",
    "fix_base",
    "floats",
    "junction_split",
    "keep_live",
    "kept_rows",
    "live_answer",
    "live_base",
    "live_room",
    "live_scores",
    "prune_live",
    "row_from",
    "row_spare",
    "seq_at",
    "time_base",
    "time_of",
    "tree_append",
    "tree_sweep",
    "trim",
    "via_base"
]

_jit = njit(cache=True, error_model="numpy")


@_jit
def own_row_from(ti: np.ndarray, seq: int) -> int:
    """:func:`~livematch.core._sweep_kernel.row_from`, this file's own copy.

    (A function here that called into _sweep_kernel would need that file's code key to
    keep numba's disk cache right; see junction_split. ``tests/test_candidates.py``
    checks that the copies agree.)
    """
    j = seq - ti[H_T0]
    if j <= 0:
        return 0
    if j >= ti[H_NF]:
        return ti[H_N]
    return ti[ti[H_IEND] - ti[H_TCAP] + j]


@_jit
def own_seq_at(ti: np.ndarray, row: int) -> int:
    """:func:`~livematch.core._sweep_kernel.seq_at`, this file's own copy (as above)."""
    fb = ti[H_IEND] - ti[H_TCAP]
    lo = 0
    hi = ti[H_NF] - 1
    while lo < hi:
        mid = (lo + hi + 1) >> 1
        if ti[fb + mid] <= row:
            lo = mid
        else:
            hi = mid - 1
    return ti[H_T0] + lo


@_jit
def best_row(ti: np.ndarray, prefer: int) -> int:
    """:func:`livematch.core.sweep.best_leaf`: lowest (cost, seg != prefer, seg)."""
    tf = ti[ti[H_IEND] + (ti[H_IEND] & 1):].view(np.float64)  # floats(), written out
    lb = ROW_F * ti[H_RCAP]  # live_base
    k = ti[H_HI] - ti[H_LO]
    return best_scored(ti, tf[lb + LF_COST:lb + LIVE_F * k:LIVE_F], prefer)


@_jit
def best_scored(ti: np.ndarray, score: np.ndarray, prefer: int) -> int:
    """The live row with the lowest (score, seg != prefer, seg); ``score[r - lo]`` is row r's."""
    lo = ti[H_LO]
    hi = ti[H_HI]
    best = lo
    for r in range(lo + 1, hi):
        c, cb = score[r - lo], score[best - lo]
        if c != cb:
            if c < cb:
                best = r
            continue
        s, sb = ti[ROW_I * r + K_SEG], ti[ROW_I * best + K_SEG]
        if (s != prefer) != (sb != prefer):
            if s == prefer:
                best = r
            continue
        if s < sb:
            best = r
    return best


@_jit
def live_scores(
    geo: np.ndarray, ti: np.ndarray, fix_xy: np.ndarray,
    fix_seq0: int, first: int, inv_two_sigma2: float, inv_tau: float, max_dt: float,
) -> np.ndarray:
    """:func:`livematch.core.sweep.live_score` of every live row, in row order.

    ``geo``: per segment ``ax, ay, bx - ax, by - ay``
    (:attr:`livematch.core.fastsweep.SweepArrays.seg_geo`), for the matched points.
    ``fix_xy[i]`` is the fix of sequence number ``fix_seq0 + i``; links to states older
    than fix ``first`` are not walked.
    """
    tf = ti[ti[H_IEND] + (ti[H_IEND] & 1):].view(np.float64)  # floats(), written out
    lo = ti[H_LO]
    hi = ti[H_HI]
    out = np.empty(hi - lo)
    n = fix_xy.shape[0]
    # the fix times (time_of, written out here: a call into _sweep_kernel would need
    # its code key, see junction_split)
    lb = ROW_F * ti[H_RCAP]  # live_base
    tb = lb + LIVE_F * ti[H_LCAP]  # time_base: fix slot j's time at tb + j
    # a row's fix slot: the last whose first row (ti[fb + slot]) is <= the row; found
    # going down from the child's, as a link's parent is of an older fix
    fb = ti[H_IEND] - ti[H_TCAP]  # fix_base
    t0 = ti[H_T0]
    nf = ti[H_NF]
    # a row below ``bound`` is of a fix older than first: own_row_from written out (a call
    # that takes an array costs two atomic reference-count updates; every fix)
    jf = first - t0
    bound = 0 if jf <= 0 else ti[H_N] if jf >= nf else ti[fb + jf]
    for r in range(lo, hi):
        score = tf[lb + LIVE_F * (r - lo) + LF_COST]
        cur = r
        sc = nf - 1
        while ti[fb + sc] > cur:
            sc -= 1
        # the matched points, as the sweep computed them (rows keep none): each row's is
        # computed once, and a link's parent is the next link's child
        pos = tf[ROW_F * cur + F_POS]
        g = ti[ROW_I * cur + K_SEG]
        cx = geo[g, 0] + pos * geo[g, 2]
        cy = geo[g, 1] + pos * geo[g, 3]
        while True:
            p = ti[ROW_I * cur + K_PARENT]
            if p < bound:  # (-1 too)
                break
            sp = sc
            while ti[fb + sp] > p:
                sp -= 1
            pos = tf[ROW_F * p + F_POS]
            g = ti[ROW_I * p + K_SEG]
            px = geo[g, 0] + pos * geo[g, 2]
            py = geo[g, 1] + pos * geo[g, 3]
            i = t0 + sc - fix_seq0
            j = t0 + sp - fix_seq0
            dt = tf[tb + sc] - tf[tb + sp]
            if j >= 0 and i < n and 0.0 < dt <= max_dt:
                ex = cx - fix_xy[i, 0]
                ey = cy - fix_xy[i, 1]
                rho = math.exp(-dt * inv_tau)
                wx = ex - rho * (px - fix_xy[j, 0])
                wy = ey - rho * (py - fix_xy[j, 1])
                score += ((wx * wx + wy * wy) * inv_two_sigma2 / (1.0 - rho * rho)
                          - (ex * ex + ey * ey) * inv_two_sigma2)
            cur = p
            sc = sp
            cx = px
            cy = py
        out[r - lo] = score
    return out


@_jit
def _still_on(ti: np.ndarray, node: int, anc: int) -> bool:
    """Whether the path from ``anc`` to ``node`` never left ``anc``'s segment."""
    seg = ti[ROW_I * anc + K_SEG]
    cur = node
    while cur >= 0 and cur != anc:
        # a via: the row's vias end after the row before's (its start; 0 at row 0)
        if (ti[ROW_I * cur + K_VIAE] > (ti[ROW_I * cur - ROW_I + K_VIAE] if cur else 0)
                or ti[ROW_I * cur + K_SEG] != seg):
            return False
        cur = ti[ROW_I * cur + K_PARENT]
    return True


@_jit
def _branch(ti: np.ndarray, vb: int, node: int, anc: int) -> int:
    """The first segment after ``anc``'s on the path from ``anc`` to ``node``.

    ``vb``: where the vias start in ``ti`` (:func:`via_base`).
    """
    cur = node
    while ti[ROW_I * cur + K_PARENT] >= 0 and ti[ROW_I * cur + K_PARENT] != anc:
        cur = ti[ROW_I * cur + K_PARENT]
    v0 = ti[ROW_I * cur - ROW_I + K_VIAE] if cur else 0  # the row's first via
    if ti[ROW_I * cur + K_VIAE] > v0:
        return ti[vb + v0]
    return ti[ROW_I * cur + K_SEG]


@_jit
def driven_since(ti: np.ndarray, slen: np.ndarray, node: int, anc: int) -> float:
    """Metres driven along the path of row ``node`` since the head vertex of ``anc``'s segment.

    ``anc`` must lie on ``node``'s back-pointer chain. Each link's length is the route the
    sweep charged for it: along one segment, or out of the parent's segment, through the
    vias, into the child's.
    """
    tf = ti[ti[H_IEND] + (ti[H_IEND] & 1):].view(np.float64)  # floats(), written out
    vb = HEAD + ROW_I * ti[H_RCAP]  # via_base (see live_scores)
    total = 0.0
    cur = node
    while cur != anc:
        ci = ROW_I * cur
        p = ti[ci + K_PARENT]
        seg = ti[ci + K_SEG]
        p_seg = ti[ROW_I * p + K_SEG]
        v0 = ti[ci - ROW_I + K_VIAE] if cur else 0  # the row's vias: v0 to its end
        v1 = ti[ci + K_VIAE]
        if v1 == v0 and seg == p_seg:
            total += (tf[ROW_F * cur + F_POS] - tf[ROW_F * p + F_POS]) * slen[seg]
        else:
            total += ((1.0 - tf[ROW_F * p + F_POS]) * slen[p_seg]
                      + tf[ROW_F * cur + F_POS] * slen[seg])
            for j in range(v0, v1):
                total += slen[ti[vb + j]]
        cur = p
    return total - (1.0 - tf[ROW_F * anc + F_POS]) * slen[ti[ROW_I * anc + K_SEG]]


@_jit
def descends_from(ti: np.ndarray, node: int, anc: int) -> bool:
    """Whether row ``anc`` lies on the back-pointer chain of row ``node``."""
    bound = own_row_from(ti, own_seq_at(ti, anc))  # a row below it: a fix older than anc's
    cur = node
    while cur >= bound:
        if cur == anc:
            return True
        cur = ti[ROW_I * cur + K_PARENT]
    return False


@_jit
def prune_live(ti: np.ndarray, anc: int) -> int:
    """Keep, in order, the live rows descending from ``anc``; returns the block's new end.

    Live rows are leaves, so moving them within the block breaks no back-pointer (see
    :func:`keep_live`).
    """
    lo = ti[H_LO]
    keep = np.zeros(ti[H_HI] - lo, np.bool_)
    for r in range(lo, ti[H_HI]):
        keep[r - lo] = descends_from(ti, r, anc)
    return keep_live(ti, keep)


@_jit
def keep_live(ti: np.ndarray, keep: np.ndarray) -> int:
    """Keep, in order, the live rows ``r`` with ``keep[r - lo]``; returns the block's new end.

    Live rows are leaves, so moving them within the block breaks no back-pointer. Their
    vias move down with them (each row's vias start where the row before's end), and
    the rows after the block are dropped (``H_N`` is the block's end).
    """
    tf = ti[ti[H_IEND] + (ti[H_IEND] & 1):].view(np.float64)  # floats(), written out
    lo = ti[H_LO]
    vb = HEAD + ROW_I * ti[H_RCAP]  # via_base (see live_scores)
    lb = ROW_F * ti[H_RCAP]  # live_base
    end_before = ti[ROW_I * lo - ROW_I + K_VIAE] if lo else 0
    nv = end_before
    w = lo
    for r in range(lo, ti[H_HI]):
        v0 = end_before
        end_before = ti[ROW_I * r + K_VIAE]
        if keep[r - lo]:
            for j in range(v0, end_before):
                ti[vb + nv + j - v0] = ti[vb + j]
            nv += end_before - v0
            if w != r:
                for c in range(ROW_I):
                    ti[ROW_I * w + HEAD + c] = ti[ROW_I * r + HEAD + c]
                for c in range(ROW_F):
                    tf[ROW_F * w + c] = tf[ROW_F * r + c]
                for c in range(LIVE_F):  # the live floats, as the rows: moving down
                    tf[lb + LIVE_F * (w - lo) + c] = tf[lb + LIVE_F * (r - lo) + c]
            ti[ROW_I * w + K_VIAE] = nv
            w += 1
    ti[H_HI] = w
    ti[H_N] = w
    ti[H_NV] = nv
    return w


@_jit
def _worse(ti: np.ndarray, costs: np.ndarray, lo: int, r: int, b: int, prefer: int) -> bool:
    """Whether live row ``r`` ranks after row ``b`` by (cost, seg != prefer, seg)."""
    c, cb = costs[r - lo], costs[b - lo]
    if c != cb:
        return c > cb
    s, sb = ti[ROW_I * r + K_SEG], ti[ROW_I * b + K_SEG]
    if (s != prefer) != (sb != prefer):
        return s != prefer
    return s > sb


@_jit
def _guarded(ti: np.ndarray, r: int, guard: np.ndarray) -> bool:
    """Whether live row ``r``'s segment is the segment of a live row of tree ``guard``."""
    s = ti[ROW_I * r + K_SEG]
    for q in range(guard[H_LO], guard[H_HI]):  # noqa: SIM110 (numba: a plain loop)
        if guard[ROW_I * q + K_SEG] == s:
            return True
    return False


@_jit
def beam_live(ti: np.ndarray, margin: float, most: int, prefer: int, guard: np.ndarray,
              guarded: bool) -> int:
    """:func:`livematch.core.sweep.beam`: drop the live rows far from the best; the block's end.

    A row stays when its cost is at most the best row's (:func:`best_row`) plus
    ``margin`` (``margin`` <= 0: no bound) and, with ``most`` > 0, it is among the
    ``most`` first by (cost, seg != prefer, seg), the order :func:`best_row` ranks by (a
    total order: one live state a segment). The best row always stays. With ``guarded``,
    a row whose segment is a live row's segment of tree ``guard`` (a smaller level's)
    stays too, whatever its cost or rank. Nothing is moved when every row stays (the
    usual case: one call reads the costs and returns).
    """
    tf = ti[ti[H_IEND] + (ti[H_IEND] & 1):].view(np.float64)  # floats(), written out
    lo = ti[H_LO]
    hi = ti[H_HI]
    k = hi - lo
    lb = ROW_F * ti[H_RCAP]  # live_base
    costs = tf[lb + LF_COST:lb + LIVE_F * k:LIVE_F]
    best = best_row(ti, prefer)
    bound = costs[best - lo] + margin if margin > 0.0 else math.inf
    drop = 0
    for j in range(k):
        if costs[j] > bound:
            drop += 1
    if most > 0 and k - drop > most:
        # the most-th row's cost by a sort of the rows within the bound; ties at that
        # cost ranked by the rest of the order, pairwise (rare)
        within = np.empty(k - drop)
        i = 0
        for j in range(k):
            if costs[j] <= bound:
                within[i] = costs[j]
                i += 1
        within.sort()
        cut = within[most - 1]
        below = 0
        for j in range(k):
            if costs[j] < cut:
                below += 1
        keep = np.zeros(k, np.bool_)
        for r in range(lo, hi):
            c = costs[r - lo]
            if c < cut:
                keep[r - lo] = True
            elif c == cut:
                ahead = below
                for q in range(lo, hi):
                    if q != r and costs[q - lo] == cut and _worse(ti, costs, lo, r, q, prefer):
                        ahead += 1
                keep[r - lo] = ahead < most
            if guarded and not keep[r - lo]:
                keep[r - lo] = _guarded(ti, r, guard)
        return keep_live(ti, keep)
    if drop == 0:
        return hi
    keep = np.zeros(k, np.bool_)
    kept = 0
    for j in range(k):
        if costs[j] <= bound or (guarded and _guarded(ti, lo + j, guard)):
            keep[j] = True
            kept += 1
    if kept == k:
        return hi
    return keep_live(ti, keep)


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
    bound = own_row_from(ti, min_seq)  # a row below it is of a fix older than min_seq
    while cur >= bound and cur >= 0:
        length += 1
        cur = ti[ROW_I * cur + K_PARENT]
    if length + 1 > out.shape[0]:
        return -(length + 1)
    out[length] = cur
    cur = top
    for j in range(length - 1, -1, -1):
        out[j] = cur
        cur = ti[ROW_I * cur + K_PARENT]
    return length


# Kernels that call into _sweep_kernel (another file) are made by factories with that
# file's code_key as a closure constant: numba's disk cache keys on closure constants
# but does not notice a change to a callee in another file (livematch.core._kernel_key).
_SWEEP_KEY = code_key(_sk)


def _keyed_junction_split(sweep_key: int) -> Callable[..., int]:
    """``junction_split`` compiled with the sweep kernel's :func:`code_key` as a constant."""

    @_jit
    def junction_split(
        ti: np.ndarray, best: int, margin: float, score: np.ndarray,
    ) -> int:
        """The junction the near-best candidates split at, or -1 to report ``best`` itself.

        Near-best: a live row r with ``score[r - lo]`` within ``margin`` of the best one's.
        Mirrors the decision of :meth:`livematch.core.tracker.Tracker._hold_at_junction`
        up to (not including) its distance check.
        """
        if sweep_key == -1:  # never: the key only has to be part of the function
            return -1
        lo = ti[H_LO]
        hi = ti[H_HI]
        limit = score[best - lo] + margin
        close = np.empty(hi - lo, np.int64)
        k = 0
        varied = False
        best_seg = ti[ROW_I * best + K_SEG]
        for r in range(lo, hi):
            if score[r - lo] <= limit:
                close[k] = r
                k += 1
                if ti[ROW_I * r + K_SEG] != best_seg:
                    varied = True
        if k < 2 or not varied:
            return -1
        walk = close[:k].copy()
        split = rows_ancestor(ti, walk, k, -1)
        if split < 0 or split == best or _still_on(ti, best, split):
            return -1
        vb = via_base(ti)
        first = -1
        for j in range(k):
            n = close[j]
            if _still_on(ti, n, split):
                continue
            b = _branch(ti, vb, n, split)
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
        geo: np.ndarray, ti: np.ndarray, prefer: int, fix_xy: np.ndarray,
        fix_n: int, fix_seq0: int, first: int, inv_two_sigma2: float, inv_tau: float,
        max_dt: float, margin: float,
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
            score = live_scores(geo, ti, fix_xy[:fix_n], fix_seq0, first,
                                inv_two_sigma2, inv_tau, max_dt)
        else:
            lb = ROW_F * ti[H_RCAP]  # live_base
            tf = ti[ti[H_IEND] + (ti[H_IEND] & 1):].view(np.float64)  # floats(), written out
            score = tf[lb + LF_COST:lb + LIVE_F * (ti[H_HI] - ti[H_LO]):LIVE_F].copy()
        best = best_scored(ti, score, prefer)
        split = junction_split(ti, best, margin, score) if margin > 0.0 else -1
        return best, split

    return live_answer


live_answer = _keyed_live_answer(_SWEEP_KEY)


def _keyed_trim(sweep_key: int) -> Callable[..., tuple[int, int, int]]:
    """``trim`` compiled with the sweep kernel's :func:`code_key` as a constant."""

    @_jit
    def trim(
        ti: np.ndarray, next_commit: int, seq: int, trim_seq: int, max_lag: int,
        prefer: int,
    ) -> tuple[int, int, int]:
        """Cut the history no future commit needs; force-prune a tree that stopped committing.

        Commits only ever read states from fix ``next_commit - 1`` on, so every back-pointer
        to an older state is cut (that state becomes unreachable, and the next compaction
        drops it): a tree holds the live states and their paths back to the last commit,
        never more. If the tree has not been cut for ``2 * max_lag`` fixes (commits stalled),
        only the live states descending from the best one's ancestor ``max_lag`` fixes back
        are kept.

        Returns ``(trim_seq, forced, hi)``: the fix the history now starts at, the seq of
        the state a forced prune kept (-1 if none) and the live block's end (also in the
        header).
        """
        if sweep_key == -1:  # never (see junction_split)
            return trim_seq, -1, -1
        cut = next_commit - 1
        cut_links(ti, cut)
        if cut > trim_seq:
            trim_seq = cut
        if seq - trim_seq > 2 * max_lag:
            keep = ancestor_at(ti, best_row(ti, prefer), seq - max_lag)
            kept = own_seq_at(ti, keep)
            # before pruning: ``keep`` may be a live row that moves
            ti[ROW_I * keep + K_PARENT] = -1
            hi = prune_live(ti, keep)
            return kept, kept, hi
        return trim_seq, -1, int(ti[H_HI])

    return trim


trim = _keyed_trim(_SWEEP_KEY)
