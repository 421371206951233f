"""Compiled inner loop of :func:`livematch.core.sweep.sweep_step` (numba, CPU only).

Private: callers go through :func:`livematch.core.fastsweep.fast_sweep_step`, which packs
the arrays described here and unpacks the result into :class:`~livematch.core.sweep.Node`
objects. The kernel reproduces the pure-Python reference operation for operation (no
fastmath, the same expressions in the same order), so every float it returns is
bit-identical to the reference's.

Few arguments, because every argument costs the numba dispatcher about 0.1 µs per call:
everything is passed in five flat arrays, cut into named pieces by offsets.

``netf`` (float64), per network, read-only:
    ``vx[V] | vy[V] | slen[E]``
``neti`` (int64), per network, read-only:
    ``sf[E] | st[E] | twin[E] | out_seg[E] | out_ptr[V + 1] | turn_back_ok[V]``
``live`` (float64), per call: ``N_CTX`` step scalars (see the ``C_*`` indices), then
    per live state six values: ``seg, low, pos, x, y, cost`` (segment ids are exact in a
    float64 far beyond any network size).
``fbuf`` (float64), per network, scratch and output:
    ``white_lo[V] | white_hi[V] | entry_s[H] | entry_cost[H] | out[M * 5]``
    where an output row is ``low, pos, x, y, cost``.
``ibuf`` (int64), per network, scratch and output: a header ``V, E, H, B, M``, then
    ``seg_slot[E] | vflag[V] | vtouched[V] | entry[H * 4] | heap[H] | via[B] | out[M * 4]
    | out_via[B]`` where an entry row is ``vertex, parent, via_start, via_len`` (its via
    is ``via[via_start:via_start + via_len]``) and an output row is ``seg, parent,
    via_start, via_len`` with ``via_start`` relative to ``out_via``: the output states'
    vias copied there one after another, so the caller converts one slice. ``seg_slot``
    (segment -> output row, -1) and ``vflag`` (bit 1: white interval cached; bit 2:
    vertex done) are reset to -1 / 0 before the kernel returns, on success and on
    overflow alike.

The heap holds entry ids; an entry id is the reference's ``counter - 1``, so ordering by
``(entry_s, entry_cost, id)`` is exactly the reference's ordering of its heap tuples
``(s, parent.cost, counter, ...)``. Those keys are unique, so any correct binary heap pops
them in the same order as :mod:`heapq` (NaN costs, which the reference never produces,
would break the total order).

Return value: the number of new states, or ``OVERFLOW`` (-1) when a buffer (entries,
vias or output rows) was too small; the caller grows the buffers and calls again (the
kernel changes nothing the next call reads).
"""

from __future__ import annotations

import math

import numba
import numpy as np

# Indices of the step scalars at the head of ``live``.
C_EPS = 0
C_X0 = 1
C_Y0 = 2
C_X1 = 3
C_Y1 = 4
C_CHORD = 5
C_INV_TWO_SIGMA2 = 6
C_INV_BETA = 7
C_TURN_BACK_COST = 8
C_MOTION_COST = 9
N_CTX = 10
LIVE_STRIDE = 6
OUT_F_STRIDE = 5
OUT_I_STRIDE = 4
ENTRY_STRIDE = 4
N_HEADER = 5  # V, E, H, B, M at the head of ``ibuf``
OVERFLOW = -1

_WHITE = 1
_DONE = 2


@numba.njit(cache=True)
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


@numba.njit(cache=True)
def _heap_less(es: np.ndarray, ec: np.ndarray, a: int, b: int) -> bool:
    """Entry a before entry b: Python's tuple order on (s, parent cost, counter)."""
    if es[a] != es[b]:
        return es[a] < es[b]
    if ec[a] != ec[b]:
        return ec[a] < ec[b]
    return a < b


@numba.njit(cache=True)
def _heap_push(heap: np.ndarray, n: int, es: np.ndarray, ec: np.ndarray, e: int) -> None:
    """Add entry ``e`` to the binary min-heap ``heap[:n]`` (the caller bumps n)."""
    i = n
    while i > 0:
        up = (i - 1) >> 1
        if _heap_less(es, ec, e, heap[up]):
            heap[i] = heap[up]
            i = up
        else:
            break
    heap[i] = e


@numba.njit(cache=True)
def _heap_pop(heap: np.ndarray, n: int, es: np.ndarray, ec: np.ndarray) -> int:
    """Remove and return the smallest entry of ``heap[:n]`` (the caller lowers n)."""
    top = heap[0]
    last = heap[n - 1]
    n -= 1
    i = 0
    while True:
        child = 2 * i + 1
        if child >= n:
            break
        if child + 1 < n and _heap_less(es, ec, heap[child + 1], heap[child]):
            child += 1
        if _heap_less(es, ec, heap[child], last):
            heap[i] = heap[child]
            i = child
        else:
            break
    if n > 0:
        heap[i] = last
    return top


@numba.njit(cache=True)
def _offer(
    vx: np.ndarray, vy: np.ndarray, slen: np.ndarray, sf: np.ndarray, st: np.ndarray,
    twin: np.ndarray, live: np.ndarray, seg_slot: np.ndarray, via: np.ndarray,
    out_f: np.ndarray, out_i: np.ndarray, m: int, cap_m: int,
    seg: int, lo: float, hi: float, parent: int, via_start: int, via_len: int,
) -> int:
    """The reference ``_offer`` with a parent and ``floor`` -1; returns the new row count.

    Returns ``OVERFLOW`` when a new row does not fit in ``cap_m`` rows.
    """
    floor = -1.0
    x0 = live[C_X0]
    y0 = live[C_Y0]
    x1 = live[C_X1]
    y1 = live[C_Y1]
    prow = N_CTX + parent * LIVE_STRIDE
    p_seg = int(live[prow])
    p_pos = live[prow + 2]
    p_x = live[prow + 3]
    p_y = live[prow + 4]
    p_cost = live[prow + 5]
    slot = seg_slot[seg]
    if slot >= 0 and lo >= out_f[slot * OUT_F_STRIDE] and p_cost >= out_f[
            slot * OUT_F_STRIDE + 4]:
        return m  # every term of the cost is >= 0: this way cannot do better
    a = sf[seg]
    b = st[seg]
    ax = vx[a]
    ay = vy[a]
    dx = vx[b] - ax
    dy = vy[b] - ay
    length2 = dx * dx + dy * dy
    pos = ((x1 - ax) * dx + (y1 - ay) * dy) / length2 if length2 > 0.0 else lo
    bottom = lo if lo > floor else (floor if floor < hi else hi)
    pos = bottom if pos < bottom else (hi if pos > hi else pos)
    mx = ax + pos * dx
    my = ay + pos * dy
    ex = mx - x1
    ey = my - y1
    cost = (ex * ex + ey * ey) * live[C_INV_TWO_SIGMA2]
    if via_len == 0 and seg == p_seg:
        route = (pos - p_pos) * slen[seg]
    else:
        route = (1.0 - p_pos) * slen[p_seg] + pos * slen[seg]
        prev = p_seg
        turns = 0
        for q in range(via_start, via_start + via_len):
            v = via[q]
            route += slen[v]
            if v == twin[prev]:
                turns += 1
            prev = v
        if seg == twin[prev]:
            turns += 1
        cost += turns * live[C_TURN_BACK_COST]
    cost += p_cost + abs(route - live[C_CHORD]) * live[C_INV_BETA]
    motion = live[C_MOTION_COST]
    if motion > 0.0:
        ux = (mx - p_x) - (x1 - x0)
        uy = (my - p_y) - (y1 - y0)
        cost += math.sqrt(ux * ux + uy * uy) * motion
    if slot < 0:
        if m >= cap_m:
            return OVERFLOW
        seg_slot[seg] = m
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
        return m + 1
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
    return m


@numba.njit(cache=True)
def sweep_kernel(
    netf: np.ndarray, neti: np.ndarray, live: np.ndarray, fbuf: np.ndarray, ibuf: np.ndarray
) -> int:
    """One sweep step over flat arrays (layout in the module docstring).

    Returns the number of new states (their rows at the output areas of ``fbuf`` and
    ``ibuf``, in the reference's dict order), or ``OVERFLOW``. Zero live states give 0.
    """
    n_v = ibuf[0]
    n_e = ibuf[1]
    cap_h = ibuf[2]
    cap_b = ibuf[3]
    cap_m = ibuf[4]
    vx = netf[0:n_v]
    vy = netf[n_v:2 * n_v]
    slen = netf[2 * n_v:2 * n_v + n_e]
    sf = neti[0:n_e]
    st = neti[n_e:2 * n_e]
    twin = neti[2 * n_e:3 * n_e]
    out_seg = neti[3 * n_e:4 * n_e]
    out_ptr = neti[4 * n_e:4 * n_e + n_v + 1]
    ok = neti[4 * n_e + n_v + 1:4 * n_e + 2 * n_v + 1]
    white_lo = fbuf[0:n_v]
    white_hi = fbuf[n_v:2 * n_v]
    es = fbuf[2 * n_v:2 * n_v + cap_h]
    ec = fbuf[2 * n_v + cap_h:2 * n_v + 2 * cap_h]
    out_f = fbuf[2 * n_v + 2 * cap_h:2 * n_v + 2 * cap_h + cap_m * OUT_F_STRIDE]
    p = N_HEADER
    seg_slot = ibuf[p:p + n_e]
    p += n_e
    vflag = ibuf[p:p + n_v]
    p += n_v
    vtouched = ibuf[p:p + n_v]
    p += n_v
    entry = ibuf[p:p + cap_h * ENTRY_STRIDE]
    p += cap_h * ENTRY_STRIDE
    heap = ibuf[p:p + cap_h]
    p += cap_h
    via = ibuf[p:p + cap_b]
    p += cap_b
    out_i = ibuf[p:p + cap_m * OUT_I_STRIDE]
    p += cap_m * OUT_I_STRIDE
    out_via = ibuf[p:p + cap_b]

    eps = live[C_EPS]
    eps2 = eps * eps
    x0 = live[C_X0]
    y0 = live[C_Y0]
    x1 = live[C_X1]
    y1 = live[C_Y1]
    n_live = (live.shape[0] - N_CTX) // LIVE_STRIDE
    m = 0  # new states so far
    n_touched = 0  # vertices with a flag set
    n_entries = 0  # entries pushed (the reference's counter)
    n_heap = 0
    n_via = 0  # used part of ``via``
    status = 0

    for i in range(n_live):
        row = N_CTX + i * LIVE_STRIDE
        seg = int(live[row])
        a = sf[seg]
        b = st[seg]
        lo, hi = free_interval(vx[a], vy[a], vx[b], vy[b], x1, y1, eps2)
        node_low = live[row + 1]
        low = node_low if node_low > lo else lo
        if low <= hi:
            m = _offer(vx, vy, slen, sf, st, twin, live, seg_slot, via, out_f, out_i, m,
                       cap_m, seg, low, hi, i, 0, 0)
            if m < 0:
                status = OVERFLOW
                break
        if vflag[b] == 0:
            wl, wh = free_interval(x0, y0, x1, y1, vx[b], vy[b], eps2)
            white_lo[b] = wl
            white_hi[b] = wh
            vflag[b] = _WHITE
            vtouched[n_touched] = b
            n_touched += 1
        if white_lo[b] <= white_hi[b]:
            if n_entries >= cap_h:
                status = OVERFLOW
                break
            e = n_entries
            n_entries += 1
            es[e] = white_lo[b]
            ec[e] = live[row + 5]
            entry[e * ENTRY_STRIDE] = b
            entry[e * ENTRY_STRIDE + 1] = i
            entry[e * ENTRY_STRIDE + 2] = 0
            entry[e * ENTRY_STRIDE + 3] = 0
            _heap_push(heap, n_heap, es, ec, e)
            n_heap += 1

    while status == 0 and n_heap > 0:
        e = _heap_pop(heap, n_heap, es, ec)
        n_heap -= 1
        s = es[e]
        v = entry[e * ENTRY_STRIDE]
        parent = entry[e * ENTRY_STRIDE + 1]
        via_start = entry[e * ENTRY_STRIDE + 2]
        via_len = entry[e * ENTRY_STRIDE + 3]
        if vflag[v] & _DONE:
            continue
        vflag[v] |= _DONE  # v was pushed, so its white interval is cached: already touched
        if via_len > 0:
            back = twin[via[via_start + via_len - 1]]
        else:
            back = twin[int(live[N_CTX + parent * LIVE_STRIDE])]
        for j in range(out_ptr[v], out_ptr[v + 1]):
            f = out_seg[j]
            if f == back and ok[v] == 0:
                continue
            w = st[f]
            lo, hi = free_interval(vx[v], vy[v], vx[w], vy[w], x1, y1, eps2)
            if lo <= hi:
                m = _offer(vx, vy, slen, sf, st, twin, live, seg_slot, via, out_f, out_i, m,
                           cap_m, f, lo, hi, parent, via_start, via_len)
                if m < 0:
                    status = OVERFLOW
                    break
            if vflag[w] & _DONE:
                continue
            if vflag[w] == 0:
                wl, wh = free_interval(x0, y0, x1, y1, vx[w], vy[w], eps2)
                white_lo[w] = wl
                white_hi[w] = wh
                vflag[w] = _WHITE
                vtouched[n_touched] = w
                n_touched += 1
            sw = s if s > white_lo[w] else white_lo[w]
            if sw <= white_hi[w]:
                if n_entries >= cap_h or n_via + via_len + 1 > cap_b:
                    status = OVERFLOW
                    break
                new_e = n_entries
                n_entries += 1
                es[new_e] = sw
                ec[new_e] = ec[e]
                entry[new_e * ENTRY_STRIDE] = w
                entry[new_e * ENTRY_STRIDE + 1] = parent
                entry[new_e * ENTRY_STRIDE + 2] = n_via
                entry[new_e * ENTRY_STRIDE + 3] = via_len + 1
                for q in range(via_len):
                    via[n_via + q] = via[via_start + q]
                via[n_via + via_len] = f
                n_via += via_len + 1
                _heap_push(heap, n_heap, es, ec, new_e)
                n_heap += 1

    if status == 0:
        # Copy the output states' vias one after another into ``out_via``, so the caller
        # converts one slice; a row's via_start becomes relative to it.
        total = 0
        for r in range(m):
            total += out_i[r * OUT_I_STRIDE + 3]
        if total > cap_b:
            status = OVERFLOW
        else:
            c = 0
            for r in range(m):
                k = r * OUT_I_STRIDE
                start = out_i[k + 2]
                length = out_i[k + 3]
                for q in range(length):
                    out_via[c + q] = via[start + q]
                out_i[k + 2] = c
                c += length

    for r in range(m):
        seg_slot[out_i[r * OUT_I_STRIDE]] = -1
    for r in range(n_touched):
        vflag[vtouched[r]] = 0
    if status != 0:
        return OVERFLOW
    return m
