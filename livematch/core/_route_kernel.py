"""Compiled bounded Dijkstra of :mod:`livematch.core.routing` (numba, CPU only).

Private: callers go through :func:`livematch.core.routing.route_searches`, which packs the
request and unpacks the answer into :class:`~livematch.core.routing.Arrival` tuples. The
kernel reproduces :func:`livematch.core.routing.bounded_dijkstra` followed by
:func:`~livematch.core.routing.route_segments` operation for operation (no fastmath, the
same sums in the same order), so every distance is bit-identical to the reference's.
Arrays are never reallocated inside the kernel: a loop that may rebind an array makes
numba count references on every pass, which made an early version of this kernel about
twenty times slower (some 400 against 20-70 ns per settled vertex).

Order of the search. The reference's heap holds tuples ``(dist, tag, vertex, pred,
seg_in)``. No two of them are equal: an entry pushed from a popped vertex carries the
segment it leaves by (``pred``), and a vertex is popped once; a source entry carries
``pred`` -1 and its own segment. Those keys are therefore a total order (distances are
never NaN: lengths and offsets are finite and >= 0), and any correct binary heap ordering
by the same tuple pops them in the same sequence as :mod:`heapq`; the heap below compares
the five fields lexicographically, exactly as Python compares the tuples.

Stopping early. A vertex's label is final when it is popped (every later entry has a key
at least as large), and so are the labels on its route, popped before it. The kernel is
only asked about a few vertices (``ends``), so each search stops as soon as all of them
are popped: the answer for them is the reference's, the rest is never looked at.

Arrays (the network's are those of :class:`livematch.core.fastsweep.SweepArrays`):

``netf`` (float64), read-only: ``vx[V] | vy[V] | slen[E]``.
``neti`` (int64), read-only: ``sf[E] | st[E] | twin[E] | out_seg[E] | out_ptr[V + 1]
    | turn_back_ok[V]``.
``flag`` (uint8[V]), ``lab_f`` (float64[V]), ``lab_i`` (int32[3 V]): per-network scratch.
    ``flag`` bit 1: vertex popped in this search; bit 2: vertex is one of the ends. Every
    bit is cleared again before the kernel returns. ``lab_f`` holds a popped vertex's
    distance; ``lab_i`` its source tag, its entering segment and the list of popped
    vertices (to clear their bits).
``hf`` (float64[2 H]), ``hi`` (int64[5 H]): per-network heap scratch for ``H`` entries:
    ``heap_d[H] | shift[H]`` and ``heap[H] | entry[4 H]`` (an entry is ``tag, vertex,
    pred, seg_in``; the heap holds entry ids and their distances). A search pushes at
    most its sources plus one entry per segment, so ``H`` = sources + segments always
    suffices; the caller starts smaller and grows on ``OVERFLOW``.
``vias`` (int64[B]): output, the routes' segments.
``req`` (float64), per call: ``limit, n_ends, ends[n_ends], n_searches``, then per search
    ``n_sources`` and per source ``vertex, length, tag, segment, shift`` where ``shift``
    is the reference's ``offsets[tag]`` (0 without offsets). Vertex and segment ids and
    tags are exact in a float64 far beyond any network size.

Answer: ``(dist, info, n_via)``, or ``OVERFLOW`` (-1) as ``n_via`` when ``H`` or ``B``
was too small (every flag is cleared all the same; the caller grows the buffers and
calls again: nothing the next call reads was changed). One row per end a search
reached, in the order of the searches and, within one, of ``ends``: ``dist`` the
reference's ``Reach.dist`` and ``info`` four ints ``row, source, via_start, via_len``
where ``row`` is ``j * n_ends + k`` for search ``j`` and end ``k``; the route's
segments are ``vias[via_start:via_start + via_len]`` in driving order, ``n_via`` the
number of them written.
"""

from __future__ import annotations

import numba
import numpy as np

_jit = numba.njit(cache=True, error_model="numpy")

_DONE = 1
_END = 2
INFO_STRIDE = 4
OVERFLOW = -1
ENTRY_STRIDE = 4  # a heap entry's ints: tag, vertex, pred, seg_in


@_jit
def _tie_less(t1: int, v1: int, p1: int, s1: int, t2: int, v2: int, p2: int, s2: int) -> bool:
    """``(t1, v1, p1, s1) < (t2, v2, p2, s2)``: the rest of two keys of equal distance."""
    if t1 != t2:
        return t1 < t2
    if v1 != v2:
        return v1 < v2
    if p1 != p2:
        return p1 < p2
    return s1 < s2


@_jit
def route_kernel(
    netf: np.ndarray, neti: np.ndarray, flag: np.ndarray, lab_f: np.ndarray,
    lab_i: np.ndarray, req: np.ndarray, hf: np.ndarray, hi: np.ndarray, vias: np.ndarray,
) -> tuple[np.ndarray, np.ndarray, int]:
    """Bounded multi-source Dijkstra searches and the routes to ``ends`` (see module doc)."""
    n_v = flag.shape[0]
    n_e = netf.shape[0] - 2 * n_v
    slen0 = 2 * n_v
    st0 = n_e
    twin0 = 2 * n_e
    oseg0 = 3 * n_e
    optr0 = 4 * n_e
    ok0 = 4 * n_e + n_v + 1
    src0 = n_v  # lab_i: source tag of each popped vertex
    pred0 = 2 * n_v  # lab_i: entering segment of each popped vertex; lab_i[:n_v]: popped list

    limit = req[0]
    n_ends = int(req[1])
    ends = np.empty(n_ends, dtype=np.int64)
    distinct = 0
    for k in range(n_ends):
        v = int(req[2 + k])
        ends[k] = v
        if not flag[v] & _END:
            flag[v] = _END
            distinct += 1
    pos = 2 + n_ends
    n_searches = int(req[pos])
    pos += 1

    out_d = np.empty(n_searches * n_ends, dtype=np.float64)
    out_i = np.empty(n_searches * n_ends * INFO_STRIDE, dtype=np.int64)
    n_out = 0
    n_via = 0
    overflow = False

    # Heap entries (ids) hold a key (dist, tag, vertex, pred, seg_in) and the tag's shift;
    # the heap array keeps each entry's distance beside its id, so that most comparisons
    # (distances differ) read no entry at all.
    cap_h = hf.shape[0] // 2
    heap_d = hf[:cap_h]
    e_sh = hf[cap_h:]
    heap = hi[:cap_h]
    e_i = hi[cap_h:]

    for j in range(n_searches):
        n_src = int(req[pos])
        pos += 1
        n_ent = 0
        n_heap = 0
        n_done = 0
        remaining = distinct
        for _ in range(n_src):
            vertex = int(req[pos])
            length = req[pos + 1]
            tag = int(req[pos + 2])
            seg = int(req[pos + 3])
            shift = req[pos + 4]
            pos += 5
            if not length <= limit:
                continue
            if n_ent == cap_h:
                overflow = True
                break
            e = n_ent
            n_ent += 1
            d = length + shift
            e_sh[e] = shift
            e_i[4 * e] = tag
            e_i[4 * e + 1] = vertex
            e_i[4 * e + 2] = -1
            e_i[4 * e + 3] = seg
            c = n_heap
            n_heap += 1
            while c > 0:  # sift up
                p = (c - 1) >> 1
                hd = heap_d[p]
                if d < hd or (d == hd and _tie_less(
                        tag, vertex, -1, seg, e_i[4 * heap[p]], e_i[4 * heap[p] + 1],
                        e_i[4 * heap[p] + 2], e_i[4 * heap[p] + 3])):
                    heap[c] = heap[p]
                    heap_d[c] = hd
                    c = p
                else:
                    break
            heap[c] = e
            heap_d[c] = d

        while n_heap > 0 and remaining > 0 and not overflow:
            top = heap[0]
            dist = heap_d[0]
            n_heap -= 1
            if n_heap > 0:
                # move the last entry to the root and sift it down
                e = heap[n_heap]
                d = heap_d[n_heap]
                c = 0
                while True:
                    a = 2 * c + 1
                    if a >= n_heap:
                        break
                    b = a + 1
                    if b < n_heap:
                        da = heap_d[a]
                        db = heap_d[b]
                        if db < da or (db == da and _tie_less(
                                e_i[4 * heap[b]], e_i[4 * heap[b] + 1], e_i[4 * heap[b] + 2],
                                e_i[4 * heap[b] + 3], e_i[4 * heap[a]], e_i[4 * heap[a] + 1],
                                e_i[4 * heap[a] + 2], e_i[4 * heap[a] + 3])):
                            a = b
                    da = heap_d[a]
                    if da < d or (da == d and _tie_less(
                            e_i[4 * heap[a]], e_i[4 * heap[a] + 1], e_i[4 * heap[a] + 2],
                            e_i[4 * heap[a] + 3], e_i[4 * e], e_i[4 * e + 1], e_i[4 * e + 2],
                            e_i[4 * e + 3])):
                        heap[c] = heap[a]
                        heap_d[c] = da
                        c = a
                    else:
                        break
                heap[c] = e
                heap_d[c] = d
            v = e_i[4 * top + 1]
            if flag[v] & _DONE:
                continue
            flag[v] = flag[v] | _DONE
            lab_i[n_done] = v
            n_done += 1
            tag = e_i[4 * top]
            seg_in = e_i[4 * top + 3]
            lab_f[v] = dist
            lab_i[src0 + v] = tag
            lab_i[pred0 + v] = e_i[4 * top + 2]
            if flag[v] & _END:
                remaining -= 1
                if remaining == 0:
                    break
            back = neti[twin0 + seg_in] if seg_in >= 0 else -1
            shift = e_sh[top]
            cap = limit + shift
            ok = neti[ok0 + v] != 0
            for r in range(neti[optr0 + v], neti[optr0 + v + 1]):
                f = neti[oseg0 + r]
                if f == back and not ok:
                    continue
                w = neti[st0 + f]
                nd = dist + netf[slen0 + f]
                if nd <= cap and not flag[w] & _DONE:
                    if n_ent == cap_h:
                        overflow = True
                        break
                    e = n_ent
                    n_ent += 1
                    e_sh[e] = shift
                    e_i[4 * e] = tag
                    e_i[4 * e + 1] = w
                    e_i[4 * e + 2] = f
                    e_i[4 * e + 3] = f
                    c = n_heap
                    n_heap += 1
                    while c > 0:  # sift up
                        p = (c - 1) >> 1
                        hd = heap_d[p]
                        if nd < hd or (nd == hd and _tie_less(
                                tag, w, f, f, e_i[4 * heap[p]], e_i[4 * heap[p] + 1],
                                e_i[4 * heap[p] + 2], e_i[4 * heap[p] + 3])):
                            heap[c] = heap[p]
                            heap_d[c] = hd
                            c = p
                        else:
                            break
                    heap[c] = e
                    heap_d[c] = nd

        # the answer for each end reached: its label and the route back to its source
        for k in range(n_ends):
            v = ends[k]
            if overflow or not flag[v] & _DONE:
                continue
            n = 0
            u = v
            while lab_i[pred0 + u] >= 0:
                n += 1
                u = neti[lab_i[pred0 + u]]  # the tail vertex sf of the entering segment
            if n_via + n > vias.shape[0]:
                overflow = True
                continue
            out_d[n_out] = lab_f[v]
            out_i[INFO_STRIDE * n_out] = j * n_ends + k
            out_i[INFO_STRIDE * n_out + 1] = lab_i[src0 + v]
            out_i[INFO_STRIDE * n_out + 2] = n_via
            out_i[INFO_STRIDE * n_out + 3] = n
            n_out += 1
            u = v
            i = n_via + n
            while lab_i[pred0 + u] >= 0:
                i -= 1
                f = lab_i[pred0 + u]
                vias[i] = f
                u = neti[f]
            n_via += n
        for q in range(n_done):
            u = lab_i[q]
            flag[u] = flag[u] ^ _DONE
        if overflow:
            break
    for k in range(n_ends):
        flag[ends[k]] = 0
    if overflow:
        return out_d[:0], out_i[:0], OVERFLOW
    return out_d[:n_out], out_i[:INFO_STRIDE * n_out], n_via
