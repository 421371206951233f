"""Compiled bounded Dijkstra of :mod:`livematch.core.routing` (numba, CPU only).

Private: callers go through :func:`livematch.core.routing.route_searches`, which packs the
request and unpacks the answer into :class:`~livematch.core.routing.Route` tuples. The
kernel reproduces :func:`livematch.core.routing.bounded_dijkstra` followed by
:func:`~livematch.core.routing.route_segments` operation for operation (no fastmath, the
same sums in the same order), so every distance is bit-identical to the reference's.

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
``req`` (float64), per call: ``limit, n_ends, ends[n_ends], n_searches``, then per search
    ``n_sources`` and per source ``vertex, length, tag, segment, shift`` where ``shift``
    is the reference's ``offsets[tag]`` (0 without offsets). Vertex and segment ids and
    tags are exact in a float64 far beyond any network size.

Answer: ``(dist, info, vias)``: for search ``j`` and end ``k`` (row ``j * n_ends + k``),
``dist`` the reference's ``Reach.dist`` and ``info`` four ints ``found, source,
via_start, via_len``, the route's segments being ``vias[via_start:via_start + via_len]``
in driving order.
"""

from __future__ import annotations

import numba
import numpy as np

_jit = numba.njit(cache=True, error_model="numpy")

_DONE = 1
_END = 2
INFO_STRIDE = 4
ENTRY_STRIDE = 4  # a heap entry's ints: tag, vertex, pred, seg_in


@_jit
def _less(d1: float, t1: int, v1: int, p1: int, s1: int,
          d2: float, t2: int, v2: int, p2: int, s2: int) -> bool:
    """``(d1, t1, v1, p1, s1) < (d2, t2, v2, p2, s2)`` as Python compares tuples."""
    if d1 != d2:
        return d1 < d2
    if t1 != t2:
        return t1 < t2
    if v1 != v2:
        return v1 < v2
    if p1 != p2:
        return p1 < p2
    return s1 < s2


@_jit
def _grown_f(a: np.ndarray, n: int) -> np.ndarray:
    """A float array of length ``n`` holding ``a`` at its start."""
    b = np.empty(n, dtype=np.float64)
    b[:a.shape[0]] = a
    return b


@_jit
def _grown_i(a: np.ndarray, n: int) -> np.ndarray:
    """An int array of length ``n`` holding ``a`` at its start."""
    b = np.empty(n, dtype=np.int64)
    b[:a.shape[0]] = a
    return b


@_jit
def route_kernel(
    netf: np.ndarray, neti: np.ndarray, flag: np.ndarray, lab_f: np.ndarray,
    lab_i: np.ndarray, req: np.ndarray,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
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

    out_d = np.zeros(n_searches * n_ends, dtype=np.float64)
    out_i = np.zeros(n_searches * n_ends * INFO_STRIDE, dtype=np.int64)
    vias = np.empty(64, dtype=np.int64)
    n_via = 0

    # heap entries: key (dist, tag, vertex, pred, seg_in) and the tag's shift
    e_d = np.empty(256, dtype=np.float64)
    e_sh = np.empty(256, dtype=np.float64)
    e_i = np.empty(ENTRY_STRIDE * 256, dtype=np.int64)
    heap = np.empty(256, dtype=np.int64)

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
            if n_ent == e_d.shape[0]:
                size = 2 * e_d.shape[0]
                e_d = _grown_f(e_d, size)
                e_sh = _grown_f(e_sh, size)
                e_i = _grown_i(e_i, ENTRY_STRIDE * size)
                heap = _grown_i(heap, size)
            e = n_ent
            n_ent += 1
            e_d[e] = length + shift
            e_sh[e] = shift
            e_i[4 * e] = tag
            e_i[4 * e + 1] = vertex
            e_i[4 * e + 2] = -1
            e_i[4 * e + 3] = seg
            # sift up
            c = n_heap
            n_heap += 1
            while c > 0:
                p = (c - 1) >> 1
                h = heap[p]
                if _less(e_d[e], e_i[4 * e], e_i[4 * e + 1], e_i[4 * e + 2], e_i[4 * e + 3],
                         e_d[h], e_i[4 * h], e_i[4 * h + 1], e_i[4 * h + 2], e_i[4 * h + 3]):
                    heap[c] = h
                    c = p
                else:
                    break
            heap[c] = e

        while n_heap > 0 and remaining > 0:
            top = heap[0]
            n_heap -= 1
            if n_heap > 0:
                # move the last entry to the root and sift it down
                e = heap[n_heap]
                c = 0
                while True:
                    a = 2 * c + 1
                    if a >= n_heap:
                        break
                    b = a + 1
                    m = heap[a]
                    if b < n_heap:
                        hb = heap[b]
                        if _less(e_d[hb], e_i[4 * hb], e_i[4 * hb + 1], e_i[4 * hb + 2],
                                 e_i[4 * hb + 3], e_d[m], e_i[4 * m], e_i[4 * m + 1],
                                 e_i[4 * m + 2], e_i[4 * m + 3]):
                            m = hb
                            a = b
                    if _less(e_d[m], e_i[4 * m], e_i[4 * m + 1], e_i[4 * m + 2], e_i[4 * m + 3],
                             e_d[e], e_i[4 * e], e_i[4 * e + 1], e_i[4 * e + 2], e_i[4 * e + 3]):
                        heap[c] = m
                        c = a
                    else:
                        break
                heap[c] = e
            v = e_i[4 * top + 1]
            if flag[v] & _DONE:
                continue
            flag[v] = flag[v] | _DONE
            lab_i[n_done] = v
            n_done += 1
            dist = e_d[top]
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
                    if n_ent == e_d.shape[0]:
                        size = 2 * e_d.shape[0]
                        e_d = _grown_f(e_d, size)
                        e_sh = _grown_f(e_sh, size)
                        e_i = _grown_i(e_i, ENTRY_STRIDE * size)
                        heap = _grown_i(heap, size)
                    e = n_ent
                    n_ent += 1
                    e_d[e] = nd
                    e_sh[e] = shift
                    e_i[4 * e] = tag
                    e_i[4 * e + 1] = w
                    e_i[4 * e + 2] = f
                    e_i[4 * e + 3] = f
                    c = n_heap
                    n_heap += 1
                    while c > 0:
                        p = (c - 1) >> 1
                        h = heap[p]
                        if _less(nd, tag, w, f, f, e_d[h], e_i[4 * h], e_i[4 * h + 1],
                                 e_i[4 * h + 2], e_i[4 * h + 3]):
                            heap[c] = h
                            c = p
                        else:
                            break
                    heap[c] = e

        # the answer for each end: its label and the route back to its source
        for k in range(n_ends):
            v = ends[k]
            row = j * n_ends + k
            if not flag[v] & _DONE:
                continue
            out_d[row] = lab_f[v]
            out_i[INFO_STRIDE * row] = 1
            out_i[INFO_STRIDE * row + 1] = lab_i[src0 + v]
            n = 0
            u = v
            while lab_i[pred0 + u] >= 0:
                n += 1
                u = neti[lab_i[pred0 + u]]  # the tail vertex sf of the entering segment
            while n_via + n > vias.shape[0]:
                vias = _grown_i(vias, 2 * vias.shape[0])
            out_i[INFO_STRIDE * row + 2] = n_via
            out_i[INFO_STRIDE * row + 3] = n
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
    for k in range(n_ends):
        flag[ends[k]] = 0
    return out_d, out_i, vias[:n_via]
