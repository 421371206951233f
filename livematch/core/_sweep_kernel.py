"""Compiled inner loop of :func:`livematch.core.sweep.sweep_step` (numba, CPU only).

Private: callers go through :func:`livematch.core.fastsweep.fast_sweep_step`, which packs
the arrays described here and unpacks the result into :class:`~livematch.core.sweep.Node`
objects. The kernel reproduces the pure-Python reference operation for operation (no
fastmath, the same expressions in the same order), so every float it returns is
bit-identical to the reference's.

Two kinds of overhead shape the code. Every argument costs the numba dispatcher about
0.1 µs per call from Python, so everything is passed in five flat arrays, cut into named
pieces by offsets (:func:`layout`). And every array handed to another compiled function
costs two atomic reference-count updates per call, which in a loop of a few hundred calls
cost more than the arithmetic; so the hot loops call only scalar helpers
(:func:`free_interval`, :func:`_before`), and the offers are not made where the reference
makes them but recorded in order and replayed in one place: an offer only writes the new
states, and nothing the Dijkstra reads depends on them, so the same offers in the same
order give the same result.

``netf`` (float64), per network: one record of ``SEG_STRIDE`` (8) values per segment,
    ``ax, ay, bx, by, len, to, twin, slot`` (its end points' coordinates, its length, its
    head vertex, its twin or -1, and scratch: its output row in this step or -1; ids are
    exact in a float64 far beyond any network size), then one record of ``V_STRIDE``
    (4) values per vertex, ``white_lo, white_hi, flag, adj``: scratch, the vertex's white
    interval in this step and its flag word (bit 1 white interval cached, bit 2 vertex
    done, the rest 1 + its cheapest waiting entry), and ``adj``, read-only, its
    out-segments ``out_seg[adj >> ADJ_SHIFT:][:(adj >> 1) & ADJ_COUNT]`` and its
    ``turn_back_ok`` (``adj & 1``). 64-byte aligned, so that what a step reads about a
    segment is one cache line, about a vertex half of one (:func:`~livematch.core.
    fastsweep.network_records`); the arrays they replaced put each field in an array of
    its own, some ten cache lines per vertex settled. A vertex's coordinates are read
    from the record of a segment that ends (or starts) there: the same floats. The
    scratch fields are written only by this kernel and left as it found them (slots -1,
    flags 0), on success and on overflow alike; a network's records therefore serve one
    call at a time, as the scratch buffers do.
``neti`` (int64), per network, read-only: ``vptr[V + 1] | out_seg[E]``: the segments
    leaving vertex v are ``out_seg[vptr[v] >> 1:vptr[v + 1] >> 1]`` and ``vptr[v] & 1``
    is its ``turn_back_ok`` flag (the router's adjacency; the sweep reads ``adj``).
``live`` (float64), per call: ``N_CTX`` step scalars (see the ``C_*`` indices), then
    per live state seven values: its dict key, then its ``seg, low, pos, x, y, cost``
    (the reference reads the key where it iterates over the states and ``seg`` where it
    reads the parent; the two agree in every dict the matcher builds. Segment ids are
    exact in a float64 far beyond any network size).
``fbuf`` (float64), per network, scratch and output:
    ``entry_s[H] | entry_cost[H] | offer_lo_hi[O * 2] | out[M * 5]`` where an output row
    is ``low, pos, x, y, cost``; it may go on with room for :func:`tree_sweep`'s packed
    ``live`` array (``N_CTX + 7 M`` values; the kernel itself never reads or writes past
    ``out``).
``ibuf`` (int64), per network, scratch and output: a header ``V, E, H, B, M, O``, then
    ``vtouched[V] | entry[H * 4] | heap[H] | via[B] | offer[O * 4] | out[M * 4 + B]``.
    An entry row (and an offer row) is ``vertex`` (``seg``), ``parent, via_start,
    via_len``, its via being ``via[via_start:via_start + via_len]``. The output is ``m``
    rows ``seg, parent, via_start, via_len`` followed by the output states' vias one
    after another, ``via_start`` counting from the end of the rows: the caller converts
    one slice.

The heap holds entry ids; an entry id is the reference's ``counter - 1``, so ordering by
``(entry_s, entry_cost, id)`` is exactly the reference's ordering of its heap tuples
``(s, parent.cost, counter, ...)``. Those keys are unique, so any correct binary heap pops
them in the same order as :mod:`heapq` (NaN costs, which the reference never produces,
would break the total order).

Return value: ``(m, n_via)``, the number of new states and of via entries after their
rows, or ``(OVERFLOW, 0)`` (-1) when a buffer (entries, vias, offers or output rows) was
too small; the caller grows the buffers and calls again (the kernel changes nothing the
next call reads).
"""

from __future__ import annotations

import math
from typing import Final

import numpy as np

from livematch.core import _jit

# Indices of the step scalars at the head of ``live``.
C_EPS: Final = 0
C_X0: Final = 1
C_Y0: Final = 2
C_X1: Final = 3
C_Y1: Final = 4
C_CHORD: Final = 5
C_INV_TWO_SIGMA2: Final = 6
C_INV_BETA: Final = 7
C_TURN_BACK_COST: Final = 8
C_MOTION_COST: Final = 9
C_ROLL_BACK: Final = 10  # >= 0: metres a state along its own segment may lie behind its parent
N_CTX: Final = 11
LIVE_STRIDE: Final = 7
# Offsets within a row of ``live``.
L_KEY: Final = 0
L_SEG: Final = 1
L_LOW: Final = 2
L_POS: Final = 3
L_X: Final = 4
L_Y: Final = 5
L_COST: Final = 6
OUT_F_STRIDE: Final = 5
OUT_I_STRIDE: Final = 4
ENTRY_STRIDE: Final = 5
E_HPOS: Final = 4  # an entry's place in the heap (or _IN_WAIT, _GONE)
N_HEADER: Final = 6  # V, E, H, B, M, O at the head of ``ibuf``
# A segment's record in ``netf``: SEG_STRIDE values, the fields at these offsets.
SEG_STRIDE: Final = 8
S_AX: Final = 0
S_AY: Final = 1
S_BX: Final = 2
S_BY: Final = 3
S_LEN: Final = 4
S_TO: Final = 5
S_TWIN: Final = 6
S_SLOT: Final = 7  # scratch: the segment's output row in this step, -1
# A vertex's record in ``netf``, after the segments' (see the module docstring).
V_STRIDE: Final = 4
W_LO: Final = 0
W_HI: Final = 1
W_FLAG: Final = 2
W_ADJ: Final = 3
ADJ_SHIFT: Final = 21  # W_ADJ = first out-segment << ADJ_SHIFT | their count << 1 | turn_back_ok
ADJ_COUNT: Final = (1 << (ADJ_SHIFT - 1)) - 1
OFFER_STRIDE: Final = 4
OVERFLOW: Final = -1

_WHITE: Final = 1
_DONE: Final = 2
_FLAGS: Final = 3
_PEND_SHIFT: Final = 2  # vflag >> 2: 1 + the id of the vertex's cheapest waiting entry (0: none)
_IN_WAIT: Final = -1  # an entry's heap position while it waits to be sifted into the heap
_GONE: Final = -2  # ... once an entry for its vertex that pops first has replaced it
# a slot <= _CACHED in phases 1-2: the segment's interval at offer _CACHED - slot
_CACHED: Final = -2.0


@_jit.njit(cache=True, error_model="numpy")
def free_interval(
    ax: float, ay: float, bx: float, by: float, px: float, py: float, eps2: float
) -> tuple[float, float]:
    """The reference :func:`livematch.core.sweep.free_interval`, expression by expression.

    Parameters x in [0, 1] with ``|a + x (b - a) - p|^2 <= eps2`` as (lo, hi); lo > hi
    if none. A zero-length segment gives (0, 1) when its point is inside, else (1, 0).
    """
    dx = bx - ax
    dy = by - ay
    fx = ax - px
    fy = ay - py
    a = dx * dx + dy * dy
    c = fx * fx + fy * fy - eps2
    if a <= 0.0:
        if c <= 0.0:
            return 0.0, 1.0
        return 1.0, 0.0
    b = fx * dx + fy * dy
    disc = b * b - a * c
    if disc < 0.0:
        return 1.0, 0.0
    root = math.sqrt(disc)
    lo = (-b - root) / a
    hi = (-b + root) / a
    return (lo if lo > 0.0 else 0.0), (hi if hi < 1.0 else 1.0)


@_jit.njit(cache=True, error_model="numpy")
def layout(
    n_v: int, n_e: int, cap_h: int, cap_b: int, cap_m: int, cap_o: int
) -> tuple[int, int, int, int, int, int]:
    """Offsets of the growable areas of the buffers.

    Returns (es, offer_lo_hi, out_f) in ``fbuf``, then (entry, out_i) in ``ibuf`` and
    the length of ``ibuf``; the other pieces follow from them (module docstring).
    """
    es0 = 0
    offer_f0 = es0 + 2 * cap_h
    out_f0 = offer_f0 + 2 * cap_o
    entry0 = N_HEADER + n_v
    out_i0 = entry0 + cap_h * (ENTRY_STRIDE + 1) + cap_b + cap_o * OFFER_STRIDE
    end = out_i0 + cap_m * OUT_I_STRIDE + cap_b
    return es0, offer_f0, out_f0, entry0, out_i0, end


@_jit.njit(cache=True, error_model="numpy")
def _before(s_a: float, c_a: float, a: int, s_b: float, c_b: float, b: int) -> bool:
    """Heap order: Python's tuple order on (s, parent cost, counter), a before b."""
    if s_a != s_b:
        return s_a < s_b
    if c_a != c_b:
        return c_a < c_b
    return a < b


@_jit.njit(cache=True, error_model="numpy")
def sweep_kernel(
    netf: np.ndarray, neti: np.ndarray, live: np.ndarray, fbuf: np.ndarray, ibuf: np.ndarray
) -> tuple[int, int]:
    """One sweep step over flat arrays (layout in the module docstring).

    One long function on purpose: helpers taking arrays would cost reference counting
    in the hot loops (module docstring).

    Returns ``(m, n_via)``: ``m`` new states (their rows at the output areas of ``fbuf``
    and ``ibuf``, in the reference's dict order), ``n_via`` via entries after the rows;
    or ``(OVERFLOW, 0)``. Zero live states give (0, 0).
    """
    n_v = ibuf[0]
    n_e = ibuf[1]
    cap_h = ibuf[2]
    cap_b = ibuf[3]
    cap_m = ibuf[4]
    cap_o = ibuf[5]
    es0, offer_f0, out_f0, entry0, out_i0, end = layout(n_v, n_e, cap_h, cap_b, cap_m,
                                                             cap_o)
    out_seg = neti[n_v + 1:n_v + 1 + n_e]
    vert = netf[SEG_STRIDE * n_e:SEG_STRIDE * n_e + V_STRIDE * n_v]
    es = fbuf[es0:es0 + cap_h]
    ec = fbuf[es0 + cap_h:es0 + 2 * cap_h]
    offer_f = fbuf[offer_f0:offer_f0 + 2 * cap_o]
    out_f = fbuf[out_f0:out_f0 + cap_m * OUT_F_STRIDE]
    vtouched = ibuf[N_HEADER:entry0]
    entry = ibuf[entry0:entry0 + cap_h * ENTRY_STRIDE]
    heap = ibuf[entry0 + cap_h * ENTRY_STRIDE:entry0 + cap_h * (ENTRY_STRIDE + 1)]
    via0 = entry0 + cap_h * (ENTRY_STRIDE + 1)
    via = ibuf[via0:via0 + cap_b]
    offer = ibuf[via0 + cap_b:via0 + cap_b + cap_o * OFFER_STRIDE]
    out_i = ibuf[out_i0:end]

    eps = live[C_EPS]
    eps2 = eps * eps
    x0 = live[C_X0]
    y0 = live[C_Y0]
    x1 = live[C_X1]
    y1 = live[C_Y1]
    n_live = (live.shape[0] - N_CTX) // LIVE_STRIDE
    n_touched = 0  # vertices with a flag set
    n_entries = 0  # entries made (the reference's counter)
    n_pushed = 0  # entries already in the heap
    n_heap = 0
    n_via = 0  # used part of ``via``
    n_offers = 0
    overflow = False

    # 1. Along the same segment, and the head vertex into the heap (offers recorded).
    for i in range(n_live):
        row = N_CTX + i * LIVE_STRIDE
        seg = int(live[row + L_KEY])
        s8 = SEG_STRIDE * seg
        b = int(netf[s8 + S_TO])
        bx = netf[s8 + S_BX]
        by = netf[s8 + S_BY]
        lo, hi = free_interval(netf[s8 + S_AX], netf[s8 + S_AY], bx, by, x1, y1, eps2)
        node_low = live[row + L_LOW]
        low = node_low if node_low > lo else lo
        if low <= hi:
            if n_offers >= cap_o:
                overflow = True
                break
            # the segment's own interval (lo, not low: phase 3 applies the state's low to
            # these first offers), which phase 2 reads back for the segment instead of
            # computing it again (the same call on the same floats); the slot marks it
            offer_f[2 * n_offers] = lo
            offer_f[2 * n_offers + 1] = hi
            k = n_offers * OFFER_STRIDE
            offer[k] = seg
            offer[k + 1] = i
            offer[k + 2] = 0
            offer[k + 3] = 0
            netf[s8 + S_SLOT] = _CACHED - n_offers
            n_offers += 1
        vb = V_STRIDE * b
        flag = int(vert[vb + W_FLAG])
        if flag == 0:
            wl, wh = free_interval(x0, y0, x1, y1, bx, by, eps2)
            vert[vb + W_LO] = wl
            vert[vb + W_HI] = wh
            flag = _WHITE
            vert[vb + W_FLAG] = _WHITE
            vtouched[n_touched] = b
            n_touched += 1
        else:
            wl = vert[vb + W_LO]
            wh = vert[vb + W_HI]
        if wl <= wh:
            cost = live[row + L_COST]
            pend = (flag >> _PEND_SHIFT) - 1
            if pend >= 0 and not (wl < es[pend] or (wl == es[pend] and cost < ec[pend])):
                continue  # an entry for b already waits that pops first: this one is a no-op
            if n_entries >= cap_h:
                overflow = True
                break
            e = n_entries
            n_entries += 1
            if pend >= 0:  # (none is in the heap yet) the waiting one would pop for nothing
                entry[pend * ENTRY_STRIDE + E_HPOS] = _GONE
            vert[vb + W_FLAG] = (flag & _FLAGS) | ((e + 1) << _PEND_SHIFT)
            es[e] = wl
            ec[e] = cost
            k = e * ENTRY_STRIDE
            entry[k] = b
            entry[k + 1] = i
            entry[k + 2] = 0
            entry[k + 3] = 0
            entry[k + E_HPOS] = _IN_WAIT

    n_first = n_offers  # phase 1's offers (their segments' slots mark cached intervals)

    # 2. Through vertices in order of s (offers recorded).
    while not overflow:
        while n_pushed < n_entries:  # sift the new entries up into the heap
            e = n_pushed
            n_pushed += 1
            if entry[e * ENTRY_STRIDE + E_HPOS] != _IN_WAIT:
                continue  # replaced by a later entry for its vertex, or already placed
            # sift e up from the free slot n_heap (every entry moved keeps its E_HPOS
            # current). Written out here and below, not a helper: the helper's four
            # array arguments cost eight atomic reference-count updates a call even
            # inlined (numba's inliner binds them to new variables), some 140 a step
            se = es[e]
            ce = ec[e]
            h = n_heap
            while h > 0:
                up = (h - 1) >> 1
                u = heap[up]
                if _before(se, ce, e, es[u], ec[u], u):
                    heap[h] = u
                    entry[u * ENTRY_STRIDE + E_HPOS] = h
                    h = up
                else:
                    break
            heap[h] = e
            entry[e * ENTRY_STRIDE + E_HPOS] = h
            n_heap += 1
        if n_heap == 0:
            break
        e = heap[0]  # pop the smallest entry
        n_heap -= 1
        last = heap[n_heap]
        h = 0
        while True:
            child = 2 * h + 1
            if child >= n_heap:
                break
            c2 = child + 1
            if c2 < n_heap and _before(es[heap[c2]], ec[heap[c2]], heap[c2],
                                       es[heap[child]], ec[heap[child]], heap[child]):
                child = c2
            c = heap[child]
            if _before(es[c], ec[c], c, es[last], ec[last], last):
                heap[h] = c
                entry[c * ENTRY_STRIDE + E_HPOS] = h
                h = child
            else:
                break
        if n_heap > 0:
            heap[h] = last
            entry[last * ENTRY_STRIDE + E_HPOS] = h

        s = es[e]
        k = e * ENTRY_STRIDE
        v = entry[k]
        parent = entry[k + 1]
        via_start = entry[k + 2]
        via_len = entry[k + 3]
        vv = V_STRIDE * v
        flag = int(vert[vv + W_FLAG])
        if flag & _DONE:
            continue
        # v was pushed, so its white interval is cached: already touched
        vert[vv + W_FLAG] = flag | _DONE
        if via_len > 0:
            back = int(netf[SEG_STRIDE * via[via_start + via_len - 1] + S_TWIN])
        else:
            back = int(netf[SEG_STRIDE * int(live[N_CTX + parent * LIVE_STRIDE + L_SEG])
                            + S_TWIN])
        adj = int(vert[vv + W_ADJ])
        turn_ok = adj & 1
        j0 = adj >> ADJ_SHIFT
        for j in range(j0, j0 + ((adj >> 1) & ADJ_COUNT)):
            f = out_seg[j]
            if f == back and turn_ok == 0:
                continue
            f8 = SEG_STRIDE * f
            w = int(netf[f8 + S_TO])
            wx = netf[f8 + S_BX]
            wy = netf[f8 + S_BY]
            cached = netf[f8 + S_SLOT]
            if cached <= _CACHED:  # a live state's segment: phase 1 computed its interval
                c1 = 2 * int(_CACHED - cached)
                lo = offer_f[c1]
                hi = offer_f[c1 + 1]
            else:
                # the record's tail point is v's: the reference's (vx[v], vy[v])
                lo, hi = free_interval(netf[f8 + S_AX], netf[f8 + S_AY], wx, wy, x1, y1,
                                       eps2)
            if lo <= hi:
                if n_offers >= cap_o:
                    overflow = True
                    break
                offer_f[2 * n_offers] = lo
                offer_f[2 * n_offers + 1] = hi
                q = n_offers * OFFER_STRIDE
                offer[q] = f
                offer[q + 1] = parent
                offer[q + 2] = via_start
                offer[q + 3] = via_len
                n_offers += 1
            vw = V_STRIDE * w
            wflag = int(vert[vw + W_FLAG])
            if wflag & _DONE:
                continue
            if wflag == 0:
                wl, wh = free_interval(x0, y0, x1, y1, wx, wy, eps2)
                vert[vw + W_LO] = wl
                vert[vw + W_HI] = wh
                wflag = _WHITE
                vert[vw + W_FLAG] = _WHITE
                vtouched[n_touched] = w
                n_touched += 1
            else:
                wl = vert[vw + W_LO]
                wh = vert[vw + W_HI]
            sw = s if s > wl else wl
            if sw <= wh:
                pend = (wflag >> _PEND_SHIFT) - 1
                if pend >= 0 and not (sw < es[pend] or (sw == es[pend] and ec[e] < ec[pend])):
                    continue  # an entry for w already waits that pops first
                if n_entries >= cap_h or n_via + via_len + 1 > cap_b:
                    overflow = True
                    break
                new_e = n_entries
                n_entries += 1
                vert[vw + W_FLAG] = (wflag & _FLAGS) | ((new_e + 1) << _PEND_SHIFT)
                es[new_e] = sw
                ec[new_e] = ec[e]  # parent.cost
                q = new_e * ENTRY_STRIDE
                entry[q] = w
                entry[q + 1] = parent
                entry[q + 2] = n_via
                entry[q + 3] = via_len + 1
                entry[q + E_HPOS] = _IN_WAIT
                if pend >= 0:
                    # the waiting entry for w would pop after this one, for nothing: this
                    # one takes its place (a smaller key: sifted up from there)
                    h = entry[pend * ENTRY_STRIDE + E_HPOS]
                    entry[pend * ENTRY_STRIDE + E_HPOS] = _GONE
                    if h >= 0:
                        # sift new_e up from h, the slot it takes over (as above)
                        se = es[new_e]
                        ce = ec[new_e]
                        while h > 0:
                            up = (h - 1) >> 1
                            u = heap[up]
                            if _before(se, ce, new_e, es[u], ec[u], u):
                                heap[h] = u
                                entry[u * ENTRY_STRIDE + E_HPOS] = h
                                h = up
                            else:
                                break
                        heap[h] = new_e
                        entry[new_e * ENTRY_STRIDE + E_HPOS] = h
                for r in range(via_len):
                    via[n_via + r] = via[via_start + r]
                via[n_via + via_len] = f
                n_via += via_len + 1

    for r in range(n_touched):
        vert[V_STRIDE * vtouched[r] + W_FLAG] = 0.0
    for o in range(n_first):
        netf[SEG_STRIDE * offer[o * OFFER_STRIDE] + S_SLOT] = -1.0
    if overflow:
        return OVERFLOW, 0

    # 3. The offers, in the reference's order: the reference's ``_offer`` with a parent
    # and ``floor`` -1 (phase 1's offers with ``C_ROLL_BACK`` >= 0: the reference's
    # ``_roll_floor``), expression by expression.
    inv_two_sigma2 = live[C_INV_TWO_SIGMA2]
    turn_back_cost = live[C_TURN_BACK_COST]
    chord = live[C_CHORD]
    inv_beta = live[C_INV_BETA]
    motion = live[C_MOTION_COST]
    roll_back = live[C_ROLL_BACK]
    m = 0
    for o in range(n_offers):
        lo = offer_f[2 * o]
        hi = offer_f[2 * o + 1]
        q = o * OFFER_STRIDE
        seg = offer[q]
        parent = offer[q + 1]
        via_start = offer[q + 2]
        via_len = offer[q + 3]
        prow = N_CTX + parent * LIVE_STRIDE
        if o < n_first:  # the reference's low: the state's own low if later (phase 1)
            node_low = live[prow + L_LOW]
            lo = node_low if node_low > lo else lo
        p_cost = live[prow + L_COST]
        s8 = SEG_STRIDE * seg
        slot = int(netf[s8 + S_SLOT])
        if slot >= 0 and lo >= out_f[slot * OUT_F_STRIDE] and p_cost >= out_f[
                slot * OUT_F_STRIDE + 4]:
            continue  # every term of the cost is >= 0: this way cannot do better
        p_seg = int(live[prow + L_SEG])
        p_pos = live[prow + L_POS]
        floor = -1.0
        if roll_back >= 0.0 and o < n_first:  # (seg is p_seg: phase 1)
            s_len = netf[s8 + S_LEN]
            floor = p_pos - roll_back / s_len if s_len > 0.0 else p_pos
        ax = netf[s8 + S_AX]
        ay = netf[s8 + S_AY]
        dx = netf[s8 + S_BX] - ax
        dy = netf[s8 + S_BY] - ay
        length2 = dx * dx + dy * dy
        pos = ((x1 - ax) * dx + (y1 - ay) * dy) / length2 if length2 > 0.0 else lo
        bottom = lo if lo > floor else (floor if floor < hi else hi)
        pos = bottom if pos < bottom else (hi if pos > hi else pos)
        mx = ax + pos * dx
        my = ay + pos * dy
        ex = mx - x1
        ey = my - y1
        cost = (ex * ex + ey * ey) * inv_two_sigma2
        if slot >= 0 and cost + p_cost >= out_f[slot * OUT_F_STRIDE + 4]:
            # the terms still to add are >= 0 and rounding is monotone, so the offer's
            # cost is >= cost + p_cost: it cannot replace the row, only lower its low
            if lo < out_f[slot * OUT_F_STRIDE]:
                out_f[slot * OUT_F_STRIDE] = lo
            continue
        if via_len == 0 and seg == p_seg:
            route = (pos - p_pos) * netf[s8 + S_LEN]
        else:
            p8 = SEG_STRIDE * p_seg
            route = (1.0 - p_pos) * netf[p8 + S_LEN] + pos * netf[s8 + S_LEN]
            prev_twin = netf[p8 + S_TWIN]
            turns = 0
            for r in range(via_start, via_start + via_len):
                v = via[r]
                v8 = SEG_STRIDE * v
                route += netf[v8 + S_LEN]
                if v == prev_twin:
                    turns += 1
                prev_twin = netf[v8 + S_TWIN]
            if seg == prev_twin:
                turns += 1
            cost += turns * turn_back_cost
        cost += p_cost + abs(route - chord) * inv_beta
        if slot >= 0 and cost >= out_f[slot * OUT_F_STRIDE + 4]:
            if lo < out_f[slot * OUT_F_STRIDE]:
                out_f[slot * OUT_F_STRIDE] = lo
            continue  # the motion term is >= 0: as above
        if motion > 0.0:
            ux = (mx - live[prow + L_X]) - (x1 - x0)
            uy = (my - live[prow + L_Y]) - (y1 - y0)
            cost += math.sqrt(ux * ux + uy * uy) * motion
        if slot < 0:
            if m >= cap_m:
                overflow = True
                break
            netf[s8 + S_SLOT] = m
            f = m * OUT_F_STRIDE
            out_f[f] = lo
            out_f[f + 1] = pos
            out_f[f + 2] = mx
            out_f[f + 3] = my
            out_f[f + 4] = cost
            k = m * OUT_I_STRIDE
            out_i[k] = seg
            out_i[k + 1] = parent
            out_i[k + 2] = via_start
            out_i[k + 3] = via_len
            m += 1
            continue
        f = slot * OUT_F_STRIDE
        if lo < out_f[f]:
            out_f[f] = lo
        if cost < out_f[f + 4]:
            out_f[f + 1] = pos
            out_f[f + 2] = mx
            out_f[f + 3] = my
            out_f[f + 4] = cost
            k = slot * OUT_I_STRIDE
            out_i[k + 1] = parent
            out_i[k + 2] = via_start
            out_i[k + 3] = via_len

    # 4. The output states' vias, one after another after the rows.
    total = 0
    for r in range(m):
        netf[SEG_STRIDE * out_i[r * OUT_I_STRIDE] + S_SLOT] = -1.0
        total += out_i[r * OUT_I_STRIDE + 3]
    if overflow or total > cap_b:
        return OVERFLOW, 0
    c = 0
    base = m * OUT_I_STRIDE
    for r in range(m):
        k = r * OUT_I_STRIDE
        start = out_i[k + 2]
        length = out_i[k + 3]
        for q in range(length):
            out_i[base + c + q] = via[start + q]
        out_i[k + 2] = c
        c += length
    return m, total


# ---------------------------------------------------------------------------
# The sweep step on a candidate tree held in one flat array (ints, then floats)
# (livematch.core.candidates; the layout is described in livematch.core._tree_kernel).
# Here, not there, so that numba's disk cache of this function is invalidated whenever
# the kernel above changes.
I_SEG: Final = 0
I_PARENT: Final = 1
I_VIAE: Final = 2  # where the row's vias end: they start where the row before's end (0 at row 0)
ROW_I: Final = 3  # (a row's fix is not a field: rows are in fix order, see fix_row)
F_POS: Final = 0
ROW_F: Final = 1  # a row's floats: its position only (low and cost: live rows only, below)
# The live block's own floats, ``LIVE_F`` a live row from ``live_base`` on (the live row
# ``lo + j`` at ``live_base + LIVE_F * j``): only a live state's ``low`` and ``cost`` are
# ever read (the next sweep step, the ranking); an ancestor's are not kept.
LF_LOW: Final = 0
LF_COST: Final = 1
LIVE_F: Final = 2
# The header at the head of ``ti``: rows and vias in use, the live block [lo, hi), and
# (after ARENA_FULL) what the step waiting in the kernel's buffers needs: its rows and
# vias, and the capacities of the arrays to compact into (rows, vias, fix times); then
# the sequence number of the tree's first fix time and the rows the arrays have room for.
H_N: Final = 0
H_NV: Final = 1
H_LO: Final = 2
H_HI: Final = 3
H_M: Final = 4
H_NVIA: Final = 5
H_CAP_ROWS: Final = 6
H_CAP_VIAS: Final = 7
H_CAP_T: Final = 8
H_T0: Final = 9
H_RCAP: Final = 10
H_LCAP: Final = 11  # live rows the live floats' area has room for
H_CAP_L: Final = 12  # (after ARENA_FULL) the live rows the arrays to compact into have room for
H_NF: Final = 13  # fixes in use, from H_T0 on (0: no row); the newest is H_T0 + H_NF - 1
H_TCAP: Final = 14  # fixes the arrays have room for: their first rows, times (tf's tail)
H_IEND: Final = 15  # where the ints end; the floats start there, rounded up to even
HEAD: Final = 16
# A row's int field ``I_x`` is ``ti[ROW_I * row + K_x]``.
K_SEG: Final = HEAD + I_SEG
K_PARENT: Final = HEAD + I_PARENT
K_VIAE: Final = HEAD + I_VIAE
# tree_sweep's answers other than a commit point (which is >= -1)
DIED: Final = -2  # the window died: the tree is unchanged
ARENA_FULL: Final = -3  # the tree's arrays are too small for the new rows (see tree_sweep)
TREE_OVERFLOW: Final = -4  # the kernel's buffers are too small: grow them and call again
MIN_SPARE: Final = 8  # rows of room a compaction leaves, at least (and twice the live block)
T_SPARE: Final = 3  # fix times of room a compaction leaves, at least (a fix adds one; was 6)
L_SPARE: Final = 2  # live rows of room for floats a compaction leaves, at least


@_jit.njit(cache=True, error_model="numpy")
def live_room(m: int, k: int) -> int:
    """Live rows the live floats' area of new arrays holds: ``m`` new ones, ``k`` before.

    The larger of the two and an eighth as many again (at least ``L_SPARE``): a live
    block grows and shrinks by a few states a fix, and outgrowing the area costs new
    arrays. 16 bytes a live row, against 16 bytes of every row when each kept its low
    and cost. (Half as many again until session 15: a third of the area never written,
    and no fewer new arrays than with a quarter; a quarter, at least 4, until session
    28: about 95 B more a 1 Hz tracker for 0.05 fewer new arrays a fix;
    ``bench/memory.py --steps 7``, docs/measured.md.)
    """
    big = m if m > k else k
    return big + max(big // 8, L_SPARE)


@_jit.njit(cache=True, error_model="numpy")
def row_spare(m: int, k: int) -> int:
    """The least room for rows a compaction into new arrays leaves (``ARENA_FULL``).

    ``m`` the step's new live block, ``k`` the old one: a live block and a quarter and
    ``MIN_SPARE`` (and a half until session 29: 0.33 KB more a 1 Hz tracker for 0.14
    fewer new arrays a fix; twice the live block until session 15: a 1 Hz tree compacts
    about every second fix either way, and the room of half a live block was 24 bytes a
    row never written). The vias get as many (4 bytes each; twice as many until session
    29: 0.21 KB more a 1 Hz tracker for 0.13 fewer new arrays a fix; both measured by
    ``bench/memory.py --steps 7``, docs/measured.md "Session 29 (mem29)").
    """
    return max(m, k + k // 4 + MIN_SPARE)


@_jit.njit(cache=True, error_model="numpy")
def floats(ti: np.ndarray) -> np.ndarray:
    """The tree's floats ``tf``: the rest of its one array after the ints, as float64.

    A view (no copy): a tree is one int32 array, its ints ending at ``H_IEND`` and its
    floats starting at the next even index (8-byte aligned: numpy's data is).
    """
    e = ti[H_IEND]
    return ti[e + (e & 1):].view(np.float64)


@_jit.njit(cache=True, error_model="numpy")
def via_base(ti: np.ndarray) -> int:
    """Where the vias start in ``ti``: after the header and the rows the arrays have room for."""
    return HEAD + ROW_I * ti[H_RCAP]


@_jit.njit(cache=True, error_model="numpy")
def live_base(ti: np.ndarray) -> int:
    """Where the live block's floats start in ``tf``: after the rows the arrays have room for."""
    return ROW_F * ti[H_RCAP]


@_jit.njit(cache=True, error_model="numpy")
def time_base(ti: np.ndarray) -> int:
    """Where the fix times start in ``tf``: after the rows' and the live block's floats."""
    return ROW_F * ti[H_RCAP] + LIVE_F * ti[H_LCAP]


@_jit.njit(cache=True, error_model="numpy")
def fix_base(ti: np.ndarray) -> int:
    """Where the fixes' first rows start in ``ti``: its last ``H_TCAP`` ints (before ``H_IEND``)."""
    return ti[H_IEND] - ti[H_TCAP]


@_jit.njit(cache=True, error_model="numpy")
def row_from(ti: np.ndarray, seq: int) -> int:
    """The first row whose fix is ``seq`` or later (``H_N`` if none).

    Rows are in fix order, so ``seq_at(ti, r) >= seq`` exactly when ``r >= row_from(ti,
    seq)``: a walk that compares rows' fixes with a bound compares row numbers with this
    instead (one look-up, not one a row).
    """
    j = seq - ti[H_T0]
    if j <= 0:
        return 0
    if j >= ti[H_NF]:
        return ti[H_N]
    return ti[ti[H_IEND] - ti[H_TCAP] + j]


@_jit.njit(cache=True, error_model="numpy")
def seq_at(ti: np.ndarray, row: int) -> int:
    """The fix (sequence number) of row ``row``: the last fix whose first row is <= it."""
    fb = ti[H_IEND] - ti[H_TCAP]
    lo = 0
    hi = ti[H_NF] - 1
    while lo < hi:  # the last j in [lo, hi] with first row <= row (the first fix's is 0)
        mid = (lo + hi + 1) >> 1
        if ti[fb + mid] <= row:
            lo = mid
        else:
            hi = mid - 1
    return ti[H_T0] + lo


@_jit.njit(cache=True, error_model="numpy")
def time_of(ti: np.ndarray, row: int) -> float:
    """The time of row ``row``'s fix (kept once per fix, after the live floats in ``tf``)."""
    return floats(ti)[time_base(ti) + seq_at(ti, row) - ti[H_T0]]


@_jit.njit(cache=True, error_model="numpy")
def tree_sweep(
    netf: np.ndarray, neti: np.ndarray, fbuf: np.ndarray, ibuf: np.ndarray,
    ctx: np.ndarray, ti: np.ndarray, seq: int, t: float,
    next_commit: int, newest: int,
) -> tuple[int, int, int]:
    """One sweep step of the live block; the new states are appended as the new live block.

    ``ctx`` holds the kernel's ``N_CTX`` step scalars; the tree's counts are read from
    and written to its header (no counts are passed in). Returns ``(top, lo, hi)``:
    the live block after the call, and ``top``, after a step whose window survived, the
    commit check: with ``newest`` >= 0 the
    :func:`commit_point` of the new live block for ``next_commit`` and ``newest`` (what
    ``Tracker._settle`` asks next), else -1. Otherwise a code, with the tree unchanged:
    ``DIED`` (no state left), ``TREE_OVERFLOW`` (the kernel's buffers are too small), or
    ``ARENA_FULL``: the new rows do not fit, and the header's ``H_M``, ``H_NVIA`` say how
    many rows and vias the step brings, ``H_CAP_ROWS``, ``H_CAP_VIAS`` the capacities
    to compact into (:func:`compact_append` compacts into arrays the caller made and
    appends the result, which waits in the kernel's buffers).

    A tree whose arrays are full is first compacted in its own arrays if that makes room
    and the arrays have room for at most a quarter more rows, and half as many vias
    again, as a compaction into new arrays would give them (so a tree that shrank gives
    its memory back, and a tree holds about as many bytes as with new arrays at every
    compaction). Either compaction keeps what the tree needs once the step is appended
    (:func:`step_mask`): the old live rows the new ones descend from and their
    ancestors, not the whole old live block (whose other rows the step leaves dead:
    about 1 KB a driven 1 Hz vehicle kept until the next compaction before session 31,
    and 0.12 more new arrays a fix; ``bench/memory.py --steps 6,7``, docs/measured.md
    "Session 31 (lay31)").
    """
    tf = floats(ti)
    n = ti[H_N]
    nv = ti[H_NV]
    lo = ti[H_LO]
    hi = ti[H_HI]
    k = hi - lo
    n_v = ibuf[0]
    n_e = ibuf[1]
    # the live block packed into the room after the kernel's output rows (SweepArrays
    # leaves room for as many states as output rows), else into a new array
    _, _, out_f0, entry0, _, _ = layout(n_v, n_e, ibuf[2], ibuf[3], ibuf[4], ibuf[5])
    live0 = out_f0 + ibuf[4] * OUT_F_STRIDE
    need = N_CTX + LIVE_STRIDE * k
    live = fbuf[live0:live0 + need] if fbuf.shape[0] - live0 >= need else np.empty(need)
    for j in range(N_CTX):
        live[j] = ctx[j]
    lb = ROW_F * ti[H_RCAP]  # live_base
    for j in range(k):
        r = lo + j
        b = N_CTX + LIVE_STRIDE * j
        seg = ti[ROW_I * r + K_SEG]
        pos = tf[ROW_F * r + F_POS]
        lf = lb + LIVE_F * j
        live[b] = seg
        live[b + 1] = seg
        live[b + 2] = tf[lf + LF_LOW]
        live[b + 3] = pos
        # the matched point, not kept in the row: recomputed by the sweep's own expression
        # (``mx = ax + pos * dx``), so bit for bit the value the sweep wrote
        s8 = SEG_STRIDE * seg
        ax = netf[s8 + S_AX]
        ay = netf[s8 + S_AY]
        live[b + 4] = ax + pos * (netf[s8 + S_BX] - ax)
        live[b + 5] = ay + pos * (netf[s8 + S_BY] - ay)
        live[b + 6] = tf[lf + LF_COST]
    m, n_via = sweep_kernel(netf, neti, live, fbuf, ibuf)
    if m < 0:
        return TREE_OVERFLOW, lo, hi
    if m == 0:
        return DIED, lo, hi
    cap_rows = ti[H_RCAP]
    cap_vias = ti[H_IEND] - HEAD - ROW_I * cap_rows - ti[H_TCAP]
    cap_l = ti[H_LCAP]
    cap_t = tf.shape[0] - ROW_F * cap_rows - LIVE_F * cap_l
    if n + m > cap_rows or nv + n_via > cap_vias or seq - ti[H_T0] >= cap_t or m > cap_l:
        # what the tree holds once the step is appended: the old live rows the new ones
        # descend from and their ancestors (an old live row no new row descends from is
        # dead from this step on; until session 31 it was kept until the next compaction)
        keep = step_mask(ti, ibuf, m)
        kept, kept_v, span = count_kept(ti, keep)
        # the fix times kept run from the first kept row's fix to the live block's (the
        # last kept row), and the new rows' fix comes after it
        span_t = seq - (ti[H_T0] + ti[H_NF] - 1 - span + 1) + 1
        # the room of new arrays (rows: row_spare; vias: as many, or half those kept)
        spare = row_spare(m, k)
        cap = kept + max(kept // 4, spare)
        cap_v = kept_v + max(kept_v // 2, max(n_via, spare))
        # (arrays with room for over a quarter more rows than new arrays would get,
        # ``cap``, or half as many vias again as ``cap_v``, are replaced: until session
        # 28 the rows were held against what new arrays got before session 15, twice
        # the live block + 8, and the vias not at all, which kept about 0.2 KB more a
        # 1 Hz tracker for 0.12 fewer new arrays a fix; one and a half times the rows
        # until session 25, 0.35 KB more for 0.08 fewer; bench/memory.py --steps 7)
        if (kept + m > cap_rows or kept_v + n_via > cap_vias or span_t > cap_t
                or m > cap_l
                or 4 * cap_rows > 5 * cap
                or 2 * cap_vias > 3 * cap_v):
            ti[H_M] = m
            ti[H_NVIA] = n_via
            ti[H_CAP_ROWS] = cap
            ti[H_CAP_L] = live_room(m, k)
            ti[H_CAP_VIAS] = cap_v
            # (as much room for fix times as for rows: a step adds a fix and a row at
            # least, so the times do not fill up first)
            ti[H_CAP_T] = span_t + max(span_t // 4, spare)
            return ARENA_FULL, lo, hi
        compact_kept(ti, ti, ti[H_RCAP], ti[H_LCAP], keep)
        step_parents(ibuf, m, keep, lo, hi)
    tree_append(fbuf, ibuf, ti, tf, seq, t, m, n_via)
    if newest < 0:
        return -1, ti[H_LO], ti[H_HI]
    # the walk's scratch: the kernel's heap area and its entries' (marks), free once the
    # kernel has returned
    cap_h = ibuf[2]
    if m <= cap_h:
        heap0 = entry0 + cap_h * ENTRY_STRIDE
        cur = ibuf[heap0:heap0 + m]
        for j in range(m):
            cur[j] = ti[H_LO] + j
        top = commit_point_of(ti, next_commit, newest, rows_ancestor_marked(
            ti, cur, m, next_commit - 1, ibuf[entry0:heap0]))
    else:
        top = commit_point(ti, next_commit, newest)
    return top, ti[H_LO], ti[H_HI]


@_jit.njit(cache=True, error_model="numpy")
def kept_mask(ti: np.ndarray) -> np.ndarray:
    """Which of the tree's rows in use a compaction keeps.

    The live block and every ancestor of it (a parent's index is always below its
    child's). Shared by :func:`compact` and :func:`compact_into`, kept in this file with
    them (numba's disk cache only notices changes to a function's own file).
    """
    n = ti[H_N]
    keep = np.zeros(n, np.bool_)
    keep[ti[H_LO]:ti[H_HI]] = True
    mark_ancestors(ti, keep)
    return keep


@_jit.njit(cache=True, error_model="numpy")
def mark_ancestors(ti: np.ndarray, keep: np.ndarray) -> None:
    """Mark in ``keep`` every ancestor of a row it marks (a parent's index is below its child's)."""
    for r in range(ti[H_N] - 1, -1, -1):
        if keep[r]:
            p = ti[ROW_I * r + K_PARENT]
            if p >= 0:
                keep[p] = True


@_jit.njit(cache=True, error_model="numpy")
def step_mask(ti: np.ndarray, ibuf: np.ndarray, m: int) -> np.ndarray:
    """Which rows a compaction before appending the step waiting in ``ibuf`` keeps.

    The old live rows that one of the step's ``m`` output rows descends from (its
    parent, an index into the old live block), and every ancestor of them: what
    :func:`kept_mask` keeps once the step is appended, less the new rows. An old live
    row no new row descends from is read by nothing after the step (the live block, and
    every walk from it, see only its ancestors), so it is not kept, nor are ancestors
    only it had.
    """
    n = ti[H_N]
    lo = ti[H_LO]
    keep = np.zeros(n, np.bool_)
    out_i0 = layout(ibuf[0], ibuf[1], ibuf[2], ibuf[3], ibuf[4], ibuf[5])[4]
    for j in range(m):
        keep[lo + ibuf[out_i0 + j * OUT_I_STRIDE + 1]] = True
    mark_ancestors(ti, keep)
    return keep


@_jit.njit(cache=True, error_model="numpy")
def step_parents(ibuf: np.ndarray, m: int, keep: np.ndarray, lo: int, hi: int) -> None:
    """Renumber the parents of the step's ``m`` output rows after a :func:`step_mask` compaction.

    A parent is an index into the old live block ``[lo, hi)``; the compaction kept only
    the rows ``keep`` marks, in order, so the new index is the count of kept live rows
    before it.
    """
    out_i0 = layout(ibuf[0], ibuf[1], ibuf[2], ibuf[3], ibuf[4], ibuf[5])[4]
    rank = np.empty(hi - lo, np.int64)
    c = 0
    for j in range(hi - lo):
        rank[j] = c
        if keep[lo + j]:
            c += 1
    for j in range(m):
        q = out_i0 + j * OUT_I_STRIDE + 1
        ibuf[q] = rank[ibuf[q]]


@_jit.njit(cache=True, error_model="numpy")
def kept_rows(ti: np.ndarray) -> tuple[int, int, int]:
    """Rows, vias and fix times a compaction keeps: the live block and its ancestors.

    The fix times: one per fix from the first kept row's to the last's (rows are in fix
    order), 0 when no row is kept.
    """
    return count_kept(ti, kept_mask(ti))


@_jit.njit(cache=True, error_model="numpy")
def count_kept(ti: np.ndarray, keep: np.ndarray) -> tuple[int, int, int]:
    """Rows, vias and fix times of the rows ``keep`` marks (:func:`kept_rows`)."""
    rows = 0
    vias = 0
    first = -1
    last = -1
    for r in range(ti[H_N]):
        if keep[r]:
            rows += 1
            vias += ti[ROW_I * r + K_VIAE] - (ti[ROW_I * r - ROW_I + K_VIAE] if r else 0)
            if first < 0:
                first = r
            last = r
    if first < 0:
        return 0, 0, 0
    # the two rows' fix slots (seq_at written out: a call that takes the array costs two
    # atomic reference-count updates, and a full tree asks this about twice a fix): the
    # last row kept is the live block's, of the newest fix or one just before; the
    # first kept is of an old fix, a few slots up from the oldest
    fb = ti[H_IEND] - ti[H_TCAP]
    nf = ti[H_NF]
    j_last = nf - 1
    while ti[fb + j_last] > last:
        j_last -= 1
    j_first = 0
    while j_first + 1 < nf and ti[fb + j_first + 1] <= first:
        j_first += 1
    return rows, vias, j_last - j_first + 1


@_jit.njit(cache=True, error_model="numpy")
def compact(
    ti: np.ndarray, spare_rows: int, spare_vias: int, spare_t: int, spare_live: int,
) -> np.ndarray:
    """Keep only the live block and its ancestors, in new arrays with room to spare.

    The room left is at least ``spare_rows`` rows (``spare_vias`` vias, and half those
    kept; fix times: as many as rows, and ``spare_t`` after the newest kept) and a
    quarter of the rows kept,
    so compactions get rarer as the tree grows (amortised O(1) per row); room for the
    floats of ``spare_live`` live rows at least (:func:`live_room`). Returns the new
    tree (one array); the live block keeps its order and length.
    """
    rows, vias, span = kept_rows(ti)
    cap = rows + max(rows // 4, spare_rows)
    cap_l = max(spare_live, live_room(ti[H_HI] - ti[H_LO], 0))
    cap_t = span + max(span // 4, spare_t, spare_rows, T_SPARE)
    iend = HEAD + ROW_I * cap + vias + max(vias // 2, spare_vias) + cap_t
    ti2 = np.empty(iend + (iend & 1) + 2 * (ROW_F * cap + LIVE_F * cap_l + cap_t), np.int32)
    ti2[H_IEND] = iend
    compact_into(ti, ti2, cap, cap_l)
    return ti2


@_jit.njit(cache=True, error_model="numpy")
def compact_in_place(ti: np.ndarray) -> None:
    """Keep only the live block and its ancestors, moved down within the same arrays.

    The rows kept, and their vias, come out exactly as :func:`compact` writes them into
    new arrays (same order, same parents, vias one after another), so a tree compacted
    either way holds the same rows. Safe in place: a row only ever moves down (its new
    index is at most its old one, and so is its vias' start).
    """
    compact_into(ti, ti, ti[H_RCAP], ti[H_LCAP])


@_jit.njit(cache=True, error_model="numpy")
def compact_into(ti: np.ndarray, ti2: np.ndarray, cap2: int, cap_l2: int) -> None:
    """:func:`compact_in_place`, writing into the array ``ti2`` (header included).

    ``ti2``'s ``H_IEND`` must be set: its ints end there and its floats ``tf2``
    (:func:`floats`) fill the rest. ``cap2``: the rows ``ti2`` has room
    for, ``cap_l2`` the live rows ``tf2`` has floats for after them; the rest of
    ``tf2`` is fix times, and ``ti2``'s ints end with as many fixes' first rows (the
    rest of them is vias). They must hold at least the
    rows, vias and fix times
    :func:`kept_rows` counts and the live block. The caller
    allocates them with numpy: an array numba allocates and returns costs about 130
    bytes more to keep (its memory-info object) and more time to hand back than numpy's.
    :func:`compact_in_place` passes its own arrays as the targets (safe: a row only ever
    moves down, and so does a fix time).
    """
    compact_kept(ti, ti2, cap2, cap_l2, kept_mask(ti))


@_jit.njit(cache=True, error_model="numpy")
def compact_kept(ti: np.ndarray, ti2: np.ndarray, cap2: int, cap_l2: int,
                 keep: np.ndarray) -> None:
    """:func:`compact_into`, keeping the rows ``keep`` marks (a row's parent with it).

    :func:`kept_mask` (the live block and its ancestors) or :func:`step_mask` (the old
    live rows a waiting step's rows descend from, and their ancestors): the live rows
    kept stay the live block, in their order.
    """
    tf = floats(ti)
    tf2 = floats(ti2)
    n = ti[H_N]
    lo = ti[H_LO]
    hi = ti[H_HI]
    t0 = ti[H_T0]
    lb = ROW_F * ti[H_RCAP]  # live_base
    tb = lb + LIVE_F * ti[H_LCAP]  # time_base
    new_index = np.full(n, -1, np.int64)
    vb = via_base(ti)
    fb = ti[H_IEND] - ti[H_TCAP]  # fix_base
    nf = ti[H_NF]
    ti2[H_RCAP] = cap2
    vb2 = via_base(ti2)
    lb2 = ROW_F * cap2
    tb2 = lb2 + LIVE_F * cap_l2
    tcap2 = tf2.shape[0] - tb2
    fb2 = ti2[H_IEND] - tcap2
    q = 0
    nv = 0
    first = -1  # the fix slots (from H_T0) of the first and last rows kept
    last = -1
    fix = 0  # row r's fix slot: the last with first row <= r
    nxt = ti[fb + 1] if nf > 1 else n  # the first row of slot fix + 1 (n: no such slot)
    end_before = 0  # where the vias of row r - 1 end (read before row r - 1 is rewritten)
    for r in range(n):
        v0 = end_before
        end_before = ti[ROW_I * r + K_VIAE]
        while r >= nxt:
            fix += 1
            nxt = ti[fb + fix + 1] if fix + 1 < nf else n
        if not keep[r]:
            continue
        if first < 0:
            first = fix
        # the first row of each fix from the last row kept's (exclusive) to this row's:
        # this one (a fix none of whose rows is kept starts where the next kept one
        # does). Written below where it is read, in place too: slot fix - first <= fix
        while last < fix:
            last += 1
            if last >= first:
                ti2[fb2 + last - first] = q
        new_index[r] = q
        ri = ROW_I * r
        qi = ROW_I * q
        p = ti[ri + K_PARENT]
        vn = end_before - v0
        for j in range(vn):
            ti2[vb2 + nv + j] = ti[vb + v0 + j]
        ti2[qi + K_SEG] = ti[ri + K_SEG]
        ti2[qi + K_PARENT] = new_index[p] if p >= 0 else -1
        ti2[qi + K_VIAE] = nv + vn
        for c in range(ROW_F):
            tf2[ROW_F * q + c] = tf[ROW_F * r + c]
        nv += vn
        q += 1
    # the kept live rows' floats (in their order from the live base: in place, the
    # same room, each moving down or onto itself), then the fix times of the kept rows'
    # fixes, from the first's on (moving down only)
    k2 = 0
    for j in range(hi - lo):
        if keep[lo + j]:
            for c in range(LIVE_F):
                tf2[lb2 + LIVE_F * k2 + c] = tf[lb + LIVE_F * j + c]
            k2 += 1
    if first >= 0:
        for s in range(first, last + 1):
            tf2[tb2 + s - first] = tf[tb + s]
    ti2[H_N] = q
    ti2[H_NV] = nv
    ti2[H_LO] = q - k2  # the live rows are the last rows, and so are the kept ones
    ti2[H_HI] = q
    for c in range(H_M, H_CAP_T + 1):
        ti2[c] = 0
    ti2[H_CAP_L] = 0
    ti2[H_LCAP] = cap_l2
    ti2[H_T0] = t0 + first if first >= 0 else 0
    ti2[H_NF] = last - first + 1 if first >= 0 else 0
    ti2[H_TCAP] = tcap2
    if ti2[H_IEND] & 1:  # the pad before the floats: written, so a tight tree's bytes are set
        ti2[ti2[H_IEND]] = 0


@_jit.njit(cache=True, error_model="numpy")
def tree_append(
    fbuf: np.ndarray, ibuf: np.ndarray, ti: np.ndarray, tf: np.ndarray,
    seq: int, t: float, m: int, n_via: int,
) -> None:
    """Append the last kernel call's ``m`` output rows (and ``n_via`` vias) as the live block.

    The output stays in the scratch buffers until the next kernel call, so after an
    ``ARENA_FULL`` the caller makes room and appends without sweeping again. Parents
    are rows of the live block; the header is updated (the new rows are the live block).
    """
    n = ti[H_N]
    nv = ti[H_NV]
    lo = ti[H_LO]
    vb = via_base(ti)
    # the fix's time, once for all its rows (gaps in the run of fixes, if any, NaN)
    lb = ROW_F * ti[H_RCAP]  # live_base
    tb = lb + LIVE_F * ti[H_LCAP]  # time_base
    if n == 0:
        ti[H_T0] = seq
        have = 0
    else:
        have = ti[H_NF]
    at = seq - ti[H_T0]
    fb = ti[H_IEND] - ti[H_TCAP]  # fix_base
    for j in range(have, at):
        tf[tb + j] = np.nan
        ti[fb + j] = n  # a fix with no rows: its rows would start where the next's do
    tf[tb + at] = t
    if at >= have:
        ti[fb + at] = n
        ti[H_NF] = at + 1
    _, _, out_f0, _, out_i0, _ = layout(ibuf[0], ibuf[1], ibuf[2], ibuf[3], ibuf[4],
                                           ibuf[5])
    for j in range(m):
        r = n + j
        ri = ROW_I * r
        oi = out_i0 + j * OUT_I_STRIDE
        of = out_f0 + j * OUT_F_STRIDE
        ti[ri + K_SEG] = ibuf[oi]
        ti[ri + K_PARENT] = lo + ibuf[oi + 1]
        # the kernel writes each output row's vias after the row before's
        ti[ri + K_VIAE] = nv + ibuf[oi + 2] + ibuf[oi + 3]
        # an output row is low, pos, x, y, cost: the matched point is not kept, and low
        # and cost only while the row is live (the old live block's are read: the step
        # packed them into its input)
        tf[ROW_F * r + F_POS] = fbuf[of + 1]
        tf[lb + LIVE_F * j + LF_LOW] = fbuf[of]
        tf[lb + LIVE_F * j + LF_COST] = fbuf[of + 4]
    ob = out_i0 + m * OUT_I_STRIDE
    for j in range(n_via):
        ti[vb + nv + j] = ibuf[ob + j]
    ti[H_N] = n + m
    ti[H_NV] = nv + n_via
    ti[H_LO] = n
    ti[H_HI] = n + m


@_jit.njit(cache=True, error_model="numpy")
def compact_append(
    ti: np.ndarray, ti2: np.ndarray, iend2: int, fbuf: np.ndarray, ibuf: np.ndarray,
    seq: int, t: float, next_commit: int, newest: int,
) -> int:
    """After ``ARENA_FULL``: :func:`compact_into` the new arrays, then :func:`tree_append`.

    One call instead of a compaction that returns new arrays and an append: an array
    numba allocates and hands back costs several microseconds to box (and about 130
    bytes more to keep) than the caller's numpy array. ``ti2`` (its ints ending at ``iend2``,
    written into its header here, its floats from the next even index) must hold the
    rows and vias kept plus the step's (the header's ``H_M`` rows and ``H_NVIA`` vias,
    which :func:`tree_sweep` wrote). Returns the commit check of :func:`tree_sweep`.
    """
    m = ti[H_M]
    n_via = ti[H_NVIA]
    ti2[H_IEND] = iend2
    keep = step_mask(ti, ibuf, m)
    compact_kept(ti, ti2, ti[H_CAP_ROWS], ti[H_CAP_L], keep)
    step_parents(ibuf, m, keep, ti[H_LO], ti[H_HI])
    tree_append(fbuf, ibuf, ti2, floats(ti2), seq, t, m, n_via)
    return commit_point(ti2, next_commit, newest) if newest >= 0 else -1


# The commit check on a tree's rows (``Tracker._settle``): here, beside the tree step,
# so that a step answers it in the same call. numba's disk cache notices changes to a
# function's own file only, and ``trim`` and ``junction_split`` in _tree_kernel call the
# functions below: whoever changes one of them must also change _tree_kernel.py (or
# clear the cache), else those two keep the cached old code.
@_jit.njit(cache=True, error_model="numpy")
def rows_ancestor(ti: np.ndarray, cur: np.ndarray, k: int, floor: int) -> int:
    """:func:`livematch.core.sweep.common_ancestor` of the ``k`` distinct rows ``cur``."""
    # a row below ``bound`` is of fix <= floor: row_from(ti, floor + 1) written out (a
    # call that takes an array costs two atomic reference-count updates; every fix)
    j = floor + 1 - ti[H_T0]
    bound = 0 if j <= 0 else ti[H_N] if j >= ti[H_NF] else ti[ti[H_IEND] - ti[H_TCAP] + j]
    while k > 1:
        if cur[0] < bound:
            return -1
        nk = 0
        for j in range(k):
            p = ti[ROW_I * cur[j] + K_PARENT]
            if p < 0:
                return -1
            seen = False
            for q in range(nk):
                if cur[q] == p:
                    seen = True
                    break
            if not seen:
                cur[nk] = p  # nk <= j: rows still to read are not overwritten
                nk += 1
        k = nk
    return cur[0] if k == 1 else -1


@_jit.njit(cache=True, error_model="numpy")
def rows_ancestor_marked(ti: np.ndarray, cur: np.ndarray, k: int, floor: int,
                         mark: np.ndarray) -> int:
    """:func:`rows_ancestor`, the distinct parents found with a mark per row (same answer).

    :func:`rows_ancestor` looks each parent up among those already kept: about k^2 / 2
    reads a level, 0.6 µs of a 60 m step's 5 (27 live rows). The rows of a level are
    all of one fix, and so are their parents, which therefore lie close together: a
    level's parents are marked in ``mark`` (scratch, at least as long as their span of
    row numbers; a longer span is looked up as :func:`rows_ancestor` does). Keeps the
    first of each parent in the order :func:`rows_ancestor` keeps them, so ``cur``
    ends the same too.
    """
    room = mark.shape[0]
    # a row below ``bound`` is of fix <= floor: row_from(ti, floor + 1), written out (see
    # rows_ancestor)
    j = floor + 1 - ti[H_T0]
    bound = 0 if j <= 0 else ti[H_N] if j >= ti[H_NF] else ti[ti[H_IEND] - ti[H_TCAP] + j]
    while k > 1:
        if cur[0] < bound:
            return -1
        p_min = cur[0]  # a bound: a parent's row is below its child's
        p_max = -1
        for j in range(k):
            p = ti[ROW_I * cur[j] + K_PARENT]
            if p < 0:
                return -1
            cur[j] = p
            if p < p_min:
                p_min = p
            if p > p_max:
                p_max = p
        nk = 0
        if p_max - p_min < room:
            for q in range(p_max - p_min + 1):
                mark[q] = 0
            for j in range(k):
                p = cur[j]
                if mark[p - p_min] == 0:
                    mark[p - p_min] = 1
                    cur[nk] = p  # nk <= j: parents still to read are not overwritten
                    nk += 1
        else:
            for j in range(k):
                p = cur[j]
                seen = False
                for q in range(nk):
                    if cur[q] == p:
                        seen = True
                        break
                if not seen:
                    cur[nk] = p
                    nk += 1
        k = nk
    return cur[0] if k == 1 else -1


@_jit.njit(cache=True, error_model="numpy")
def block_ancestor(ti: np.ndarray, floor: int) -> int:
    """The deepest common ancestor of the live block, or -1 (see :func:`rows_ancestor`)."""
    lo = ti[H_LO]
    hi = ti[H_HI]
    cur = np.arange(lo, hi)
    return rows_ancestor(ti, cur, hi - lo, floor)


@_jit.njit(cache=True, error_model="numpy")
def commit_point(ti: np.ndarray, next_commit: int, newest: int) -> int:
    """The row a commit of the live block may settle up to, or -1.

    The live states' deepest common ancestor (:func:`block_ancestor` above fix
    ``next_commit - 1``), taken back to fix ``newest`` if it is newer
    (:func:`ancestor_at`); -1 unless its fix lies in ``[next_commit, newest]``. One call
    for what ``Tracker._settle`` asks of every covering level.
    """
    return commit_point_of(ti, next_commit, newest, block_ancestor(ti, next_commit - 1))


@_jit.njit(cache=True, error_model="numpy")
def commit_point_of(ti: np.ndarray, next_commit: int, newest: int, top: int) -> int:
    """:func:`commit_point` from the live block's :func:`block_ancestor` ``top``."""
    # rows from ``after`` on are of fixes after newest, from ``start`` on of next_commit
    # or later: row_from written out (see rows_ancestor)
    t0 = ti[H_T0]
    nf = ti[H_NF]
    fb = ti[H_IEND] - ti[H_TCAP]
    j = newest + 1 - t0
    after = 0 if j <= 0 else ti[H_N] if j >= nf else ti[fb + j]
    if top >= after:
        top = ancestor_at(ti, top, newest)
    j = next_commit - t0
    start = 0 if j <= 0 else ti[H_N] if j >= nf else ti[fb + j]
    if top >= 0 and start <= top < after:
        return top
    return -1


@_jit.njit(cache=True, error_model="numpy")
def cut_and_check(ti: np.ndarray, next_commit: int, newest: int, cut: bool) -> int:
    """:func:`commit_point`, first cutting (``cut``) the links older than fix ``next_commit - 1``.

    The cut is the part of ``livematch.core._tree_kernel.trim`` that ``Tracker._trim``
    does after the commits of a fix (every back-pointer from the live block's paths to a
    state older than fix ``next_commit - 1`` set to -1; no forced prune), done here
    when a commit has just moved ``next_commit``, so that ``Tracker._trim`` finds the
    level cut and makes no call of its own. It changes no commit point: the walk of
    :func:`rows_ancestor` stops at fix ``next_commit - 1`` before it reads such a link
    (a state's parent is always a state of the fix before), and the rows it cuts off are
    read by no later commit (they are older than the last one).
    """
    if cut:
        cut_links(ti, next_commit - 1)
    return commit_point(ti, next_commit, newest)


@_jit.njit(cache=True, error_model="numpy")
def cut_links(ti: np.ndarray, cut: int) -> None:
    """Set to -1 the first back-pointer to a state older than fix ``cut`` on each live path."""
    # a row below ``bound`` is of a fix older than cut: row_from(ti, cut), written out
    # (see rows_ancestor)
    j = cut - ti[H_T0]
    bound = 0 if j <= 0 else ti[H_N] if j >= ti[H_NF] else ti[ti[H_IEND] - ti[H_TCAP] + j]
    for r in range(ti[H_LO], ti[H_HI]):
        cur = r
        while True:
            p = ti[ROW_I * cur + K_PARENT]
            if p < 0:
                break
            if p < bound:
                ti[ROW_I * cur + K_PARENT] = -1
                break
            cur = p


@_jit.njit(cache=True, error_model="numpy")
def ancestor_at(ti: np.ndarray, row: int, seq: int) -> int:
    """The ancestor of ``row`` (itself included) with the largest seq <= ``seq``."""
    # rows from ``after`` on are of fixes after seq: row_from(ti, seq + 1), written out
    # (see rows_ancestor)
    j = seq + 1 - ti[H_T0]
    after = 0 if j <= 0 else ti[H_N] if j >= ti[H_NF] else ti[ti[H_IEND] - ti[H_TCAP] + j]
    while row >= after and ti[ROW_I * row + K_PARENT] >= 0:
        row = ti[ROW_I * row + K_PARENT]
    return row


@_jit.njit(cache=True, error_model="numpy")
def step_arc(netf: np.ndarray, ibuf: np.ndarray, via0: int, via_len: int,
             pseg: int, ppos: float, seg: int, pos: float) -> float:
    """Metres driven from ``ppos`` on ``pseg`` to ``pos`` on ``seg`` through vias.

    The via segments are ``ibuf[via0:via0 + via_len]``; positions are parameters in
    [0, 1]. Shared by the route windows here and in ``monitors._route_kernel`` (same sums in the
    same order, so both give the same floats).
    """
    if via_len == 0 and seg == pseg:
        return (pos - ppos) * netf[SEG_STRIDE * seg + S_LEN]
    through = 0.0
    for q in range(via_len):
        through += netf[SEG_STRIDE * ibuf[via0 + q] + S_LEN]
    return ((1.0 - ppos) * netf[SEG_STRIDE * pseg + S_LEN] + through
            + pos * netf[SEG_STRIDE * seg + S_LEN])


@_jit.njit(cache=True, error_model="numpy")
def window_step(
    netf: np.ndarray, neti: np.ndarray, fbuf: np.ndarray, ibuf: np.ndarray,
    ctx: np.ndarray, rows: np.ndarray, driven: np.ndarray,
) -> tuple[int, np.ndarray, np.ndarray]:
    """One step of a route monitor's window (livematch.core.monitors.route._Window).

    ``rows`` holds the live states as ``seg, low, pos, x, y, cost`` and ``driven`` the
    metres each has followed the route. Returns ``(code, rows, driven)`` for the new
    states: each one's driven metres are its parent's plus the route length of the step,
    and the costs are rebased so that the cheapest is 0 (the window keeps no history).
    ``code`` is 0, or ``OVERFLOW`` when the kernel's buffers are too small. No live
    state left gives empty arrays.
    """
    k = rows.shape[0]
    live = np.empty(N_CTX + LIVE_STRIDE * k)
    for j in range(N_CTX):
        live[j] = ctx[j]
    for j in range(k):
        b = N_CTX + LIVE_STRIDE * j
        live[b] = rows[j, 0]
        for c in range(6):
            live[b + 1 + c] = rows[j, c]
    m, _ = sweep_kernel(netf, neti, live, fbuf, ibuf)
    if m <= 0:
        return (OVERFLOW if m < 0 else 0), np.empty((0, 6)), np.empty(0)
    n_v = ibuf[0]
    n_e = ibuf[1]
    _, _, out_f0, _, out_i0, _ = layout(n_v, n_e, ibuf[2], ibuf[3], ibuf[4], ibuf[5])
    vb = out_i0 + m * OUT_I_STRIDE
    out = np.empty((m, 6))
    new_driven = np.empty(m)
    for j in range(m):
        oi = out_i0 + j * OUT_I_STRIDE
        of = out_f0 + j * OUT_F_STRIDE
        seg = ibuf[oi]
        parent = ibuf[oi + 1]
        via_start = ibuf[oi + 2]
        via_len = ibuf[oi + 3]
        pos = fbuf[of + 1]
        pseg = int(rows[parent, 0])
        ppos = rows[parent, 2]
        arc = step_arc(netf, ibuf, vb + via_start, via_len, pseg, ppos, seg, pos)
        new_driven[j] = driven[parent] + arc
        out[j, 0] = seg
        out[j, 1] = fbuf[of]
        out[j, 2] = pos
        out[j, 3] = fbuf[of + 2]
        out[j, 4] = fbuf[of + 3]
        out[j, 5] = fbuf[of + 4]
    base = out[0, 5]
    for j in range(1, m):
        if out[j, 5] < base:
            base = out[j, 5]
    for j in range(m):
        out[j, 5] -= base
    return 0, out, new_driven


@_jit.njit(cache=True, error_model="numpy")
def window_best(rows: np.ndarray, driven: np.ndarray) -> int:
    """Row of the window candidate that followed the route longest; -1 when none is live.

    Ties go to the lower cost (column 5), then the lower segment id (column 0), then the
    earlier row: the order of ``max`` over ``(driven, -cost, -seg)`` in row order, which
    :meth:`livematch.core.monitors.route._Window.best` used before this was compiled.
    """
    best = -1
    for j in range(rows.shape[0]):
        if best < 0:
            best = j
            continue
        d, b = driven[j], driven[best]
        if d > b or (d == b and (rows[j, 5] < rows[best, 5] or (
                rows[j, 5] == rows[best, 5] and rows[j, 0] < rows[best, 0]))):
            best = j
    return best
