"""Compiled bounded Dijkstra of :mod:`livematch.core.routing` (numba, CPU only).

Private: callers go through :func:`livematch.core.routing.route_searches`, which packs the
request and unpacks the answer into :class:`~livematch.core.routing.Arrival` tuples. The
kernel reproduces :func:`livematch.core.routing.bounded_dijkstra` followed by
:func:`~livematch.core.routing.route_segments` operation for operation (no fastmath, the
same sums in the same order), so every distance is bit-identical to the reference's.
Arrays are never reallocated inside the kernel: a loop that may rebind an array makes
numba count references on every pass, which made an early version of this kernel about
twenty times slower (some 400 against 20-70 ns per settled state).

The search is edge-based, as the reference: a state is a directed segment, labelled with
the route length to its tail vertex; each segment is settled once, a vertex may be
passed more than once.

Order of the search. The reference's heap holds tuples ``(dist, tag, seg, pred)``. An
entry pushed from a popped segment carries it as ``pred``, and a segment is popped once
and pushes each of its successors once; a source's entries carry ``pred`` -1 and their
source's tag. Two entries can only have equal keys when two sources share a tag and a
vertex and have equal distances, and then they are the same entry in every field. Those
keys are therefore a total order up to identical entries (distances are never NaN:
lengths and offsets are finite and >= 0), and any correct binary heap ordering by the
same tuple pops them in the same sequence as :mod:`heapq`; the heap below compares the
four fields lexicographically, exactly as Python compares the tuples.

Stopping early. A segment's label is final when it is popped (every later entry has a
key at least as large), and so are the labels on its route, popped before it. The kernel
is only asked about a few segments (``ends``), so each search stops as soon as all of
them are popped: the answer for them is the reference's, the rest is never looked at.

Arrays (the network's are those of :class:`livematch.core.fastsweep.SweepArrays`):

``netf`` (float64), read-only: a record of ``SEG_STRIDE`` values per segment
    (``_sweep_kernel``), of which this kernel reads the length, head vertex and twin.
``neti`` (int64), read-only: ``vptr[V + 1] | out_seg[E]``, the out-segments of vertex v
    being ``out_seg[vptr[v] >> 1:vptr[v + 1] >> 1]`` and ``vptr[v] & 1`` its
    ``turn_back_ok``.
``flag`` (uint8[E]), ``lab_f`` (float64[E]), ``lab_i`` (int32[3 E]): per-network scratch.
    ``flag`` bit 1: segment popped in this search; bit 2: segment is one of the ends.
    Every bit is cleared again before the kernel returns. ``lab_f`` holds a popped
    segment's distance; ``lab_i`` its source tag, the segment before it on its route and
    the list of popped segments (to clear their bits).
``hf`` (float64[2 H]), ``hi`` (int64[4 H]): per-network heap scratch for ``H`` entries:
    ``heap_d[H] | shift[H]`` and ``heap[H] | entry[3 H]`` (an entry is ``tag, seg,
    pred``; the heap holds entry ids and their distances). A search pushes at most its
    sources' out segments plus one entry per turn (a pair of consecutive segments), so
    the caller starts smaller and grows on ``OVERFLOW``.
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

import numpy as np

from livematch.core._jit import njit

_jit = njit(cache=True, error_model="numpy")

# The segment record of ``netf`` (the same numbers as livematch.core._sweep_kernel's; kept
# here as plain numbers so that numba's cache of this file sees them).
SEG_STRIDE = 8
S_LEN = 4
S_TO = 5
S_TWIN = 6

_DONE = 1
_END = 2
INFO_STRIDE = 4
OVERFLOW = -1
ENTRY_STRIDE = 3  # a heap entry's ints: tag, seg, pred


@_jit
def _less(d1: float, t1: int, s1: int, p1: int, d2: float, t2: int, s2: int, p2: int) -> bool:
    """``(d1, t1, s1, p1) < (d2, t2, s2, p2)``, as Python compares the tuples."""
    if d1 != d2:
        return d1 < d2
    if t1 != t2:
        return t1 < t2
    if s1 != s2:
        return s1 < s2
    return p1 < p2


@_jit
def _push(heap_d: np.ndarray, heap: np.ndarray, e_i: np.ndarray, e_sh: np.ndarray,
          n_heap: int, e: int, d: float, tag: int, seg: int, pred: int, shift: float) -> None:
    """Store entry ``e`` = ``(d, tag, seg, pred)`` and sift it up a heap of ``n_heap``."""
    e_sh[e] = shift
    e_i[3 * e] = tag
    e_i[3 * e + 1] = seg
    e_i[3 * e + 2] = pred
    c = n_heap
    while c > 0:
        p = (c - 1) >> 1
        hp = heap[p]
        hd = heap_d[p]
        if _less(d, tag, seg, pred, hd, e_i[3 * hp], e_i[3 * hp + 1], e_i[3 * hp + 2]):
            heap[c] = hp
            heap_d[c] = hd
            c = p
        else:
            break
    heap[c] = e
    heap_d[c] = d


@_jit
def route_kernel(
    netf: np.ndarray, neti: np.ndarray, flag: np.ndarray, lab_f: np.ndarray,
    lab_i: np.ndarray, req: np.ndarray, hf: np.ndarray, hi: np.ndarray, vias: np.ndarray,
) -> tuple[np.ndarray, np.ndarray, int]:
    """Bounded multi-source edge-based Dijkstra searches and the routes to ``ends``."""
    n_e = flag.shape[0]
    n_v = neti.shape[0] - n_e - 1
    oseg0 = n_v + 1  # neti: vptr[V + 1] | out_seg[E]; vptr[v] = 2 out_ptr[v] + turn_back_ok
    src0 = n_e  # lab_i: source tag of each popped segment
    pred0 = 2 * n_e  # lab_i: the segment before each popped one; lab_i[:n_e]: popped list

    limit = req[0]
    n_ends = int(req[1])
    ends = np.empty(n_ends, dtype=np.int64)
    distinct = 0
    for k in range(n_ends):
        g = int(req[2 + k])
        ends[k] = g
        if not flag[g] & _END:
            flag[g] = _END
            distinct += 1
    pos = 2 + n_ends
    n_searches = int(req[pos])
    pos += 1

    out_d = np.empty(n_searches * n_ends, dtype=np.float64)
    out_i = np.empty(n_searches * n_ends * INFO_STRIDE, dtype=np.int64)
    n_out = 0
    n_via = 0
    overflow = False

    # Heap entries (ids) hold a key (dist, tag, seg, pred) and the tag's shift; the heap
    # array keeps each entry's distance beside its id, so that most comparisons
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
            if not length <= limit or overflow:
                continue
            p_lo = neti[vertex]
            back = (int(netf[SEG_STRIDE * seg + S_TWIN]) if seg >= 0 and p_lo & 1 == 0
                    else -1)
            d = length + shift
            for r in range(p_lo >> 1, neti[vertex + 1] >> 1):
                f = neti[oseg0 + r]
                if f == back:
                    continue
                if n_ent == cap_h:
                    overflow = True
                    break
                _push(heap_d, heap, e_i, e_sh, n_heap, n_ent, d, tag, f, -1, shift)
                n_ent += 1
                n_heap += 1

        while n_heap > 0 and remaining > 0 and not overflow:
            top = heap[0]
            dist = heap_d[0]
            n_heap -= 1
            if n_heap > 0:
                # move the last entry to the root and sift it down
                e = heap[n_heap]
                d = heap_d[n_heap]
                et = e_i[3 * e]
                es = e_i[3 * e + 1]
                ep = e_i[3 * e + 2]
                c = 0
                while True:
                    a = 2 * c + 1
                    if a >= n_heap:
                        break
                    b = a + 1
                    if b < n_heap:
                        ha = heap[a]
                        hb = heap[b]
                        if _less(heap_d[b], e_i[3 * hb], e_i[3 * hb + 1], e_i[3 * hb + 2],
                                 heap_d[a], e_i[3 * ha], e_i[3 * ha + 1], e_i[3 * ha + 2]):
                            a = b
                    ha = heap[a]
                    da = heap_d[a]
                    if _less(da, e_i[3 * ha], e_i[3 * ha + 1], e_i[3 * ha + 2],
                             d, et, es, ep):
                        heap[c] = ha
                        heap_d[c] = da
                        c = a
                    else:
                        break
                heap[c] = e
                heap_d[c] = d
            g = e_i[3 * top + 1]
            if flag[g] & _DONE:
                continue
            flag[g] = flag[g] | _DONE
            lab_i[n_done] = g
            n_done += 1
            tag = e_i[3 * top]
            lab_f[g] = dist
            lab_i[src0 + g] = tag
            lab_i[pred0 + g] = e_i[3 * top + 2]
            if flag[g] & _END:
                remaining -= 1
                if remaining == 0:
                    break
            shift = e_sh[top]
            g8 = SEG_STRIDE * g
            nd = dist + netf[g8 + S_LEN]
            if not nd <= limit + shift:
                continue
            v = int(netf[g8 + S_TO])
            p_lo = neti[v]
            back = int(netf[g8 + S_TWIN]) if p_lo & 1 == 0 else -1
            for r in range(p_lo >> 1, neti[v + 1] >> 1):
                f = neti[oseg0 + r]
                if f == back or flag[f] & _DONE:
                    continue
                if n_ent == cap_h:
                    overflow = True
                    break
                _push(heap_d, heap, e_i, e_sh, n_heap, n_ent, nd, tag, f, g, shift)
                n_ent += 1
                n_heap += 1

        # the answer for each end reached: its label and the route back to its source
        for k in range(n_ends):
            g = ends[k]
            if overflow or not flag[g] & _DONE:
                continue
            n = 0
            u = lab_i[pred0 + g]
            while u >= 0:
                n += 1
                u = lab_i[pred0 + u]
            if n_via + n > vias.shape[0]:
                overflow = True
                continue
            out_d[n_out] = lab_f[g]
            out_i[INFO_STRIDE * n_out] = j * n_ends + k
            out_i[INFO_STRIDE * n_out + 1] = lab_i[src0 + g]
            out_i[INFO_STRIDE * n_out + 2] = n_via
            out_i[INFO_STRIDE * n_out + 3] = n
            n_out += 1
            u = lab_i[pred0 + g]
            i = n_via + n
            while u >= 0:
                i -= 1
                vias[i] = u
                u = lab_i[pred0 + u]
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
