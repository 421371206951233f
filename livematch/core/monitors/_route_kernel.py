"""Compiled step of a route monitor's sweep window (numba, CPU only).

Private: :class:`livematch.core.monitors.route.RouteMonitor` calls :func:`route_advance`
once per fix for both directions (:func:`window_advance` is one direction). One window's
step does all of the pure-Python reference
(:func:`reference_advance`, built on :func:`livematch.core.sweep.sweep_step` and
:func:`livematch.core.sweep.fresh_start`): the sweep of the live states, and when none
survives, the *fresh start* from every chain segment within eps of the new fix, then the
metres each candidate has followed the route and the candidate that followed it longest.

Two costs shaped it (measured, ``bench/breakdown.py``): a compiled function that returns a
new array costs about 4.5 µs per array, one that returns scalars well under 1 µs; and the
fresh start in Python (a shapely STRtree query, one :class:`~livematch.core.sweep.Node`
per root) cost about 0.4 ms, on a few per cent of the fixes. So the window's states live
in one flat float64 array owned by the window and rewritten in place, the call returns a
tuple of scalars, and the fresh start scans the chain's segments here (a chain is one
route: hundreds to a few thousand segments, each rejected by its bounding box in a few
nanoseconds).

The window array ``w``: ``w[0]`` is the number ``k`` of live states, then ``k`` rows of
``ROW`` values ``seg, low, pos, x, y, cost, driven`` (the sweep kernel's state plus the
metres followed since the window started). Its capacity is ``(len(w) - 1) // ROW`` rows;
when a step needs more, nothing is written and the caller grows ``w`` and calls again.

Every float is computed by the same expressions in the same order as the reference (no
fastmath), so the results are bit-identical, with one documented exception: the
reference's fresh start takes the segments a shapely STRtree reports within eps of the
fix and keeps those whose free interval at the fix is non-empty; here every segment whose
bounding box comes within eps (plus a micrometre) is tried, and the free interval alone
decides. The two differ only for a segment whose distance from the fix equals eps to the
last bits of a double, where GEOS's distance and the quadratic's rounding may disagree.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from typing import Any

import numpy as np
import numpy.typing as npt

from livematch.core import _jit
from livematch.core import _sweep_kernel as _k
from livematch.core._kernel_key import code_key
from livematch.core.network import RoadNetwork
from livematch.core.sweep import Node, StepContext, fresh_start, step_route, sweep_step
from livematch.core.view import NetworkView

FloatArray = npt.NDArray[np.float64]

ROW = 7  # seg, low, pos, x, y, cost, driven
#: Return codes besides a state count (>= 0).
SWEEP_OVERFLOW = -1  # the sweep kernel's buffers are too small: grow them, call again
ROWS_OVERFLOW = -2  # ``w`` is too small: the second value says how many rows are needed
SKIPPED = -3  # route_advance did not step the reversed window (the forward one overflowed)
#: The window's cost weights, the last five step scalars (:class:`StepContext`'s order):
#: 1 / (2 sigma^2) with sigma 5 m, 1 / beta with beta 10 m, no turn-back or motion cost,
#: no limit on rolling back (``StepContext.roll_back`` -1).
#: A window only asks whether the fixes follow the route, so the weights merely rank its
#: candidates (:func:`best_row` breaks ties by cost).
WINDOW_WEIGHTS = (0.02, 0.1, 0.0, 0.0, -1.0)
assert _k.C_CHORD + 1 + len(WINDOW_WEIGHTS) == _k.N_CTX
#: Slack of the fresh start's bounding-box test (metres): it only has to keep every
#: segment the free interval could accept; the free interval decides.
BOX_SLACK_M = 1e-6


@_jit.njit(cache=True, error_model="numpy")
def _best(w: np.ndarray, k: int) -> int:
    """Row of the candidate that followed the route longest (see :func:`best_row`)."""
    best = 0
    for j in range(1, k):
        b = 1 + ROW * j
        c = 1 + ROW * best
        d, e = w[b + 6], w[c + 6]
        if d > e or (d == e and (w[b + 5] < w[c + 5] or (
                w[b + 5] == w[c + 5] and w[b] < w[c]))):
            best = j
    return best


@_jit.njit(cache=True, error_model="numpy", inline="always")
def _advance(
    netf: np.ndarray, neti: np.ndarray, fbuf: np.ndarray, ibuf: np.ndarray,
    ctx: np.ndarray, w: np.ndarray, buf: np.ndarray,
) -> tuple[int, int, float, int, float]:
    """:func:`window_advance`, inlined into the compiled callers.

    ``buf``: scratch of at least ``N_CTX + (LIVE_STRIDE + 1) * k`` values for the sweep
    kernel's ``live`` array and the live states' driven metres (one array the caller
    allocates for both windows; ``ctx`` may be its first ``N_CTX`` values).
    """
    cap = (w.shape[0] - 1) // ROW
    k = int(w[0])
    n_v = ibuf[0]
    n_e = ibuf[1]
    if k > 0:
        n_live = _k.N_CTX + _k.LIVE_STRIDE * k
        live = buf[:n_live]  # views: the kernel reads the number of states from the length
        driven = buf[n_live:n_live + k]
        for j in range(_k.N_CTX):
            live[j] = ctx[j]
        for j in range(k):
            b = _k.N_CTX + _k.LIVE_STRIDE * j
            r = 1 + ROW * j
            live[b] = w[r]
            for c in range(6):
                live[b + 1 + c] = w[r + c]
            driven[j] = w[r + 6]
        m, _ = _k.sweep_kernel(netf, neti, live, fbuf, ibuf)
        if m < 0:
            return SWEEP_OVERFLOW, 0, 0.0, -1, 0.0
        if m > cap:
            return ROWS_OVERFLOW, m, 0.0, -1, 0.0
        if m > 0:
            _, _, out_f0, _, out_i0, _ = _k.layout(n_v, n_e, ibuf[2], ibuf[3], ibuf[4],
                                                  ibuf[5])
            vb = out_i0 + m * _k.OUT_I_STRIDE
            most = 0.0
            for j in range(m):
                oi = out_i0 + j * _k.OUT_I_STRIDE
                of = out_f0 + j * _k.OUT_F_STRIDE
                seg = ibuf[oi]
                parent = ibuf[oi + 1]
                via_start = ibuf[oi + 2]
                via_len = ibuf[oi + 3]
                pos = fbuf[of + 1]
                pb = _k.N_CTX + _k.LIVE_STRIDE * parent
                pseg = int(live[pb + _k.L_SEG])
                ppos = live[pb + _k.L_POS]
                arc = _k.step_arc(netf, ibuf, vb + via_start, via_len, pseg, ppos, seg, pos)
                r = 1 + ROW * j
                w[r] = seg
                w[r + 1] = fbuf[of]
                w[r + 2] = pos
                w[r + 3] = fbuf[of + 2]
                w[r + 4] = fbuf[of + 3]
                w[r + 5] = fbuf[of + 4]
                d = driven[parent] + arc
                w[r + 6] = d
                if j == 0 or d > most:
                    most = d
            _rebase(w, m)
            w[0] = m
            j = _best(w, m)
            return m, 0, most, int(w[1 + ROW * j]), w[1 + ROW * j + 2]
    # Fresh start: every segment within eps of the new fix, in segment order.
    eps = ctx[_k.C_EPS]
    x1 = ctx[_k.C_X1]
    y1 = ctx[_k.C_Y1]
    inv_two_sigma2 = ctx[_k.C_INV_TWO_SIGMA2]
    eps2 = eps * eps
    reach = eps + BOX_SLACK_M
    count = 0
    for pass_ in range(2):  # count, then (when they fit) write
        if pass_ == 1:
            if count > cap:
                return ROWS_OVERFLOW, count, 0.0, -1, 0.0
            count = 0
        for seg in range(n_e):
            s8 = _k.SEG_STRIDE * seg  # the segment's record: its end points
            ax = netf[s8 + _k.S_AX]
            ay = netf[s8 + _k.S_AY]
            bx = netf[s8 + _k.S_BX]
            by = netf[s8 + _k.S_BY]
            if ((ax < x1 - reach and bx < x1 - reach) or (ax > x1 + reach and bx > x1 + reach)
                    or (ay < y1 - reach and by < y1 - reach)
                    or (ay > y1 + reach and by > y1 + reach)):
                continue
            lo, hi = _k.free_interval(ax, ay, bx, by, x1, y1, eps2)
            if lo > hi:
                continue
            if pass_ == 1:
                # the root offer of livematch.core.sweep._offer (no parent, no floor)
                dx = bx - ax
                dy = by - ay
                length2 = dx * dx + dy * dy
                pos = ((x1 - ax) * dx + (y1 - ay) * dy) / length2 if length2 > 0.0 else lo
                pos = lo if pos < lo else (hi if pos > hi else pos)
                mx = ax + pos * dx
                my = ay + pos * dy
                ex = mx - x1
                ey = my - y1
                r = 1 + ROW * count
                w[r] = seg
                w[r + 1] = lo
                w[r + 2] = pos
                w[r + 3] = mx
                w[r + 4] = my
                w[r + 5] = (ex * ex + ey * ey) * inv_two_sigma2
                w[r + 6] = 0.0
            count += 1
    w[0] = count
    if count == 0:
        return 0, 1, 0.0, -1, 0.0
    _rebase(w, count)
    j = _best(w, count)
    return count, 1, 0.0, int(w[1 + ROW * j]), w[1 + ROW * j + 2]


def _entry_points(sweep_key: int) -> tuple[Callable[..., Any], Callable[..., Any]]:
    """The compiled entry points, keyed on the sweep kernel's code (:func:`code_key`)."""

    @_jit.njit(cache=True, error_model="numpy")
    def window_advance(
        netf: np.ndarray, neti: np.ndarray, fbuf: np.ndarray, ibuf: np.ndarray,
        ctx: np.ndarray, w: np.ndarray,
    ) -> tuple[int, int, float, int, float]:
        """Advance the window ``w`` by the step ``ctx`` (the sweep kernel's step scalars).

        Returns ``(k, fresh, most, best_seg, best_pos)``: the number of live states now in
        ``w``, 1 when they come from a fresh start (0 when swept), the metres the best
        candidate has followed the route, and that candidate's segment and position (-1
        and 0 when no state is live). ``k`` is ``SWEEP_OVERFLOW`` or ``ROWS_OVERFLOW``
        (then ``fresh`` holds the rows needed) when a buffer is too small; ``w`` is then
        unchanged.
        """
        if sweep_key == -1:  # never: the key only has to be part of the function
            return SWEEP_OVERFLOW, 0, 0.0, -1, 0.0
        buf = np.empty(_k.N_CTX + (_k.LIVE_STRIDE + 1) * int(w[0]))
        return _advance(netf, neti, fbuf, ibuf, ctx, w, buf)

    @_jit.njit(cache=True, error_model="numpy")
    def route_advance(
        chainf: np.ndarray, chaini: np.ndarray, nf: int, ni: int,
        fbuf: np.ndarray, ibuf: np.ndarray, w: np.ndarray, bw: np.ndarray,
        eps: float, x0: float, y0: float, x1: float, y1: float, chord: float,
    ) -> tuple[int, int, float, int, float, int, int, float, int, float]:
        """:func:`window_advance` of the forward window ``w``, then of the reversed ``bw``.

        One call per fix instead of two (each call from Python pays numba's dispatch).
        ``chainf, chaini`` hold the forward chain's ``netf, neti`` (their first ``nf``
        and ``ni`` values), then the reversed chain's (two arrays fewer to pass: numba's
        dispatch costs about 0.1-0.2 µs per array argument, :class:`RouteChain`);
        both steps use the one scratch ``fbuf, ibuf``: the two chains have the same
        numbers of vertices and segments, so the same layout, and the sweep kernel
        leaves its scratch as it found it (:mod:`livematch.core._sweep_kernel`), the
        forward window's answer being read before the reversed one is swept.
        The step scalars come as numbers (``eps`` and the step from ``x0, y0`` to ``x1,
        y1``, ``chord`` metres long; the weights are :data:`WINDOW_WEIGHTS`): a numpy
        array built for them in Python cost more than the step's dispatch saves. The ten
        values are the two windows' five. The reversed window is stepped only when the
        forward one succeeded (``k >= 0``); its ``k`` is ``SKIPPED`` otherwise, and the
        caller finishes a window that reported an overflow with :func:`window_advance`.
        """
        if sweep_key == -1:  # never (see window_advance)
            return SWEEP_OVERFLOW, 0, 0.0, -1, 0.0, SKIPPED, 0, 0.0, -1, 0.0
        netf = chainf[:nf]
        neti = chaini[:ni]
        bnetf = chainf[nf:]
        bneti = chaini[ni:]
        # one scratch for both windows: the step scalars, then each window's live states
        # and driven metres in turn (_advance); in the room SweepArrays leaves after the
        # kernel's output rows (as tree_sweep packs a tree's live block), else allocated
        most_k = max(int(w[0]), int(bw[0]))
        need = _k.N_CTX + (_k.LIVE_STRIDE + 1) * most_k
        _, _, out_f0, _, _, _ = _k.layout(ibuf[0], ibuf[1], ibuf[2], ibuf[3], ibuf[4],
                                          ibuf[5])
        live0 = out_f0 + ibuf[4] * _k.OUT_F_STRIDE
        buf = fbuf[live0:live0 + need] if fbuf.shape[0] - live0 >= need else np.empty(need)
        ctx = buf[:_k.N_CTX]
        ctx[_k.C_EPS] = eps
        ctx[_k.C_X0] = x0
        ctx[_k.C_Y0] = y0
        ctx[_k.C_X1] = x1
        ctx[_k.C_Y1] = y1
        ctx[_k.C_CHORD] = chord
        for j in range(len(WINDOW_WEIGHTS)):
            ctx[_k.C_CHORD + 1 + j] = WINDOW_WEIGHTS[j]
        k, fresh, most, seg, pos = _advance(netf, neti, fbuf, ibuf, ctx, w, buf)
        if k < 0:
            return k, fresh, most, seg, pos, SKIPPED, 0, 0.0, -1, 0.0
        bk, bfresh, bmost, bseg, bpos = _advance(bnetf, bneti, fbuf, ibuf, ctx, bw, buf)
        return k, fresh, most, seg, pos, bk, bfresh, bmost, bseg, bpos

    return window_advance, route_advance


window_advance, route_advance = _entry_points(code_key(_k))


@_jit.njit(cache=True, error_model="numpy")
def _rebase(w: np.ndarray, k: int) -> None:
    """Subtract the smallest cost of the ``k`` rows from each (the window keeps no history)."""
    base = w[1 + 5]
    for j in range(1, k):
        c = w[1 + ROW * j + 5]
        if c < base:
            base = c
    for j in range(k):
        w[1 + ROW * j + 5] -= base


# ------------------------------------------------------------------ pure-Python reference
def best_row(rows: list[list[float]]) -> int:
    """Row (``seg, low, pos, x, y, cost, driven``) that followed the route longest, or -1.

    Ties go to the lower cost, then the lower segment id, then the earlier row: Python's
    ``max`` keeps the first of equal keys.

    >>> best_row([[3, 0, 0.5, 0, 0, 1.0, 20.0], [1, 0, 0.2, 0, 0, 0.0, 20.0]])
    1
    >>> best_row([])   # degenerate: no live state
    -1
    """
    if not rows:
        return -1
    return max(range(len(rows)), key=lambda j: (rows[j][6], -rows[j][5], -rows[j][0]))


def reference_advance(network: RoadNetwork, view: NetworkView, ctx: StepContext,
                      rows: list[list[float]]) -> tuple[list[list[float]], bool]:
    """:func:`window_advance` in plain Python on :class:`~livematch.core.sweep.Node` objects.

    ``rows`` are the live states as ``seg, low, pos, x, y, cost, driven``. Returns the new
    rows and whether they come from a fresh start: the states :func:`sweep_step` keeps,
    each one's driven metres its parent's plus the route length of the step
    (:func:`~livematch.core.sweep.step_route`); when none is kept, the roots of
    :func:`fresh_start` with 0 metres. Costs rebased to a minimum of 0 either way.

    Example (a 100 m route, a fix 10 m beside its middle: one root, then 20 m along):
        >>> from livematch.core.build import Road, network_from_roads
        >>> from livematch.core.view import view_of
        >>> net = network_from_roads([Road([(0.0, 0.0), (100.0, 0.0)], way=1, oneway=True)])
        >>> c = StepContext(view_of(net), 40.0, 50.0, 10.0, 50.0, 10.0, 1, 0.0, 0.0,
        ...                 0.02, 0.1, 0.0)
        >>> rows, fresh = reference_advance(net, view_of(net), c, [])
        >>> [(int(r[0]), r[2], r[6]) for r in rows], fresh
        ([(0, 0.5, 0.0)], True)
        >>> c = StepContext(view_of(net), 40.0, 50.0, 10.0, 70.0, 10.0, 2, 1.0, 20.0,
        ...                 0.02, 0.1, 0.0)
        >>> [(int(r[0]), r[2], r[6]) for r in reference_advance(net, view_of(net), c, rows)[0]]
        [(0, 0.7, 19.999999999999996)]
    """
    if rows:
        live = {int(r[0]): Node(int(r[0]), ctx.seq - 1, 0.0, r[2], r[3], r[4], None, (),
                                r[5], r[1]) for r in rows}
        driven = {int(r[0]): r[6] for r in rows}
        new = sweep_step(live, ctx)
        if new:
            out = [[float(n.seg), n.low, n.pos, n.x, n.y, n.cost,
                    driven[n.parent.seg] + step_route(view, n)]
                   for n in new.values() if n.parent is not None]
            base = min(r[5] for r in out)
            for r in out:
                r[5] -= base
            return out, False
    roots = fresh_start(network, ctx)
    out = [[float(n.seg), n.low, n.pos, n.x, n.y, n.cost, 0.0] for n in roots.values()]
    if out:
        base = min(r[5] for r in out)
        for r in out:
            r[5] -= base
    return out, True


def warm_up() -> None:
    """Compile (or load from numba's cache) the kernel with a two-segment chain.

    >>> warm_up()   # nothing to return
    """
    from livematch.core.build import Road, network_from_roads
    from livematch.core.fastsweep import sweep_arrays
    from livematch.core.view import view_of

    net = network_from_roads([Road([(0.0, 0.0), (50.0, 0.0), (100.0, 0.0)], way=1,
                                    oneway=True)])
    arrays = sweep_arrays(view_of(net))
    w = np.zeros(1 + ROW * 4)
    bw = np.zeros(1 + ROW * 4)
    a = (arrays.netf, arrays.neti, arrays.fbuf, arrays.ibuf)
    for x in (10.0, 20.0):
        ctx = np.array((40.0, x - 10.0, 0.0, x, 0.0, 10.0, *WINDOW_WEIGHTS))
        window_advance(*a, ctx, w)
        route_advance(np.concatenate((arrays.netf, arrays.netf)),
                      np.concatenate((arrays.neti, arrays.neti)), len(arrays.netf),
                      len(arrays.neti), arrays.fbuf, arrays.ibuf, w, bw, 40.0, x - 10.0,
                      0.0, x, 0.0, 10.0)
    assert math.isfinite(w[1])
