"""Bounded shortest paths on the directed segment graph.

Used off the hot path: to bridge a step the straight chord cannot model (a long gap, or a
window that died) and to join committed stretches that came from different candidate
trees. Every search is bounded by a length, so its cost depends on the neighbourhood,
never on the size of the network.
"""

from __future__ import annotations

import heapq
from dataclasses import dataclass

from livematch.core.view import NetworkView


@dataclass(frozen=True, slots=True)
class Reach:
    """How a vertex was reached: route length, which source, and the segment that entered it.

    ``pred`` is the segment entering the vertex on the shortest route, or -1 when the
    vertex is the source's own head vertex.
    """

    dist: float
    source: int
    pred: int


def bounded_dijkstra(
    view: NetworkView,
    sources: list[tuple[int, float, int, int]],
    limit: float,
    offsets: list[float] | None = None,
) -> dict[int, Reach]:
    """Multi-source Dijkstra over vertices, stopping at route length ``limit`` metres.

    Args:
        view: the network view.
        sources: ``(vertex, initial_length, source_tag, entering_segment)`` tuples: the
            search starts at ``vertex`` having already driven ``initial_length`` metres
            along ``entering_segment`` (needed to forbid an illegal U-turn there).
        limit: the longest route considered, metres.
        offsets: per source tag, a head start added to its labels (metres) and not
            counted against ``limit``: with a candidate's path cost converted to metres,
            every vertex is labelled with the source minimising cost plus route length.
            ``Reach.dist`` then includes the offset.

    Returns:
        The vertices reached within ``limit``, each with its :class:`Reach`.

    A U-turn (leaving a vertex on the twin of the segment that entered it) is allowed
    only where ``view.turn_back_ok`` says so (dead ends and intersections).

    Example (a 100 m segment and its twin; no source reaches nothing):
        >>> from livematch.core.build import Road, network_from_roads
        >>> from livematch.core.view import view_of
        >>> view = view_of(network_from_roads([Road([(0.0, 0.0), (100.0, 0.0)], way=1)]))
        >>> bounded_dijkstra(view, [(0, 0.0, 0, -1)], 150.0)
        {0: Reach(dist=0.0, source=0, pred=-1), 1: Reach(dist=100.0, source=0, pred=0)}
        >>> bounded_dijkstra(view, [], 100.0)
        {}
    """
    done: dict[int, Reach] = {}
    heap: list[tuple[float, int, int, int, int]] = []
    shift = offsets or [0.0] * (1 + max((s[2] for s in sources), default=0))
    for vertex, length, tag, seg in sources:
        if length <= limit:
            heapq.heappush(heap, (length + shift[tag], tag, vertex, -1, seg))
    out, st, slen, twin, ok = view.out, view.st, view.slen, view.twin, view.turn_back_ok
    while heap:
        dist, tag, v, pred, seg_in = heapq.heappop(heap)
        if v in done:
            continue
        done[v] = Reach(dist, tag, pred)
        back = twin[seg_in] if seg_in >= 0 else -1
        cap = limit + shift[tag]
        for f in out[v]:
            if f == back and not ok[v]:
                continue
            w = st[f]
            nd = dist + slen[f]
            if nd <= cap and w not in done:
                heapq.heappush(heap, (nd, tag, w, f, f))
    return done


def route_segments(view: NetworkView, reached: dict[int, Reach], vertex: int) -> list[int]:
    """The segments of the shortest route ending at ``vertex``, in driving order.

    The source's own segment is not included.
    """
    segs: list[int] = []
    v = vertex
    while True:
        r = reached[v]
        if r.pred < 0:
            break
        segs.append(r.pred)
        v = view.sf[r.pred]
    segs.reverse()
    return segs


def connect(
    view: NetworkView, from_seg: int, from_pos: float, to_seg: int, to_pos: float, limit: float
) -> list[int] | None:
    """Segments strictly between (from_seg, from_pos) and (to_seg, to_pos), or None.

    Positions are parameters in [0, 1] along the segments. Staying on one segment and
    moving forward needs no segment in between (returns ``[]``); otherwise the shortest
    route from the head of ``from_seg`` to the tail of ``to_seg`` no longer than
    ``limit`` metres in all.
    """
    if from_seg == to_seg and to_pos >= from_pos:
        return []
    start = view.st[from_seg]
    head_left = (1.0 - from_pos) * view.slen[from_seg]
    reached = bounded_dijkstra(view, [(start, head_left, 0, from_seg)], limit)
    tail = view.sf[to_seg]
    r = reached.get(tail)
    if r is None or r.dist + to_pos * view.slen[to_seg] > limit:
        return None
    return route_segments(view, reached, tail)
