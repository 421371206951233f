"""Bounded shortest paths on the directed segment graph.

Used to bridge a step the straight chord cannot model (a long gap, or a window that
died) and to join committed stretches that came from different candidate trees. Every
search is bounded by a length, so its cost depends on the neighbourhood, never on the
size of the network.

With fixes 15-30 s apart every step is bridged, several searches per eps level, so the
searches are on the hot path of a sparse vehicle. :func:`bounded_dijkstra` and
:func:`route_segments` are the pure-Python definition; :func:`route_searches` runs the
same searches compiled (``_route_kernel``, numba) and answers only for the few segments
the caller asks about, with bit-identical distances, the same source and the same route
(``tests/test_routing.py`` compares the two on the OpenStreetMap extracts).
:func:`route_searches_reference` is the same interface on the pure-Python routines.
:func:`route_table` is the compiled answer before it is unpacked (a :class:`RouteTable`):
the bridged step reads it directly and slices out only the routes it offers.

The searches are edge-based (a state is the directed segment entered), not vertex-based:
a vehicle that drives into a dead end or a short spur and back out between two fixes
passes some vertices twice, which a search settling each vertex once cannot route.
"""

from __future__ import annotations

import heapq
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any, Final, NamedTuple, Protocol

import numpy as np
import numpy.typing as npt

from livematch.core import _route_kernel as _rk
from livematch.core.view import NetworkView

Source = tuple[int, float, int, int]
"""A search's start: ``(vertex, initial_length, source_tag, entering_segment)``."""
Search = tuple[list[Source], list[float] | None]
"""The sources of one search and its per-tag offsets (None: no offsets)."""


@dataclass(frozen=True, slots=True)
class Reach:
    """How a segment was entered: route length to its tail, which source, the segment before.

    ``pred`` is the segment driven just before on the shortest route, or -1 when the
    segment leaves the source's own head vertex.
    """

    dist: float
    source: int
    pred: int


def bounded_dijkstra(
    view: NetworkView,
    sources: list[tuple[int, float, int, int]],
    limit: float,
    offsets: list[float] | None = None,
    anywhere: bool = False,
) -> dict[int, Reach]:
    """Multi-source Dijkstra over directed segments, stopping at route length ``limit`` m.

    Args:
        view: the network view.
        sources: ``(vertex, initial_length, source_tag, entering_segment)`` tuples: the
            search starts at ``vertex`` having already driven ``initial_length`` metres
            along ``entering_segment`` (-1: none; needed to forbid an illegal U-turn there).
        limit: the longest route considered, metres.
        offsets: per source tag, a head start added to its labels (metres) and not
            counted against ``limit``: with a candidate's path cost converted to metres,
            every segment is labelled with the source minimising cost plus route length.
            ``Reach.dist`` then includes the offset.
        anywhere: allow a U-turn at every vertex, shape points in the middle of a road
            included (``MatchSettings.street_turns``: vehicles that turn round in the
            street, as a delivery van at a stop does).

    Returns:
        The segments entered within ``limit`` (their tail vertex reached by a route of at
        most ``limit`` metres from which turning into them is allowed), each with its
        :class:`Reach`; ``dist`` is the route length up to the segment's tail.

    The search is edge-based: its states are the segments entered, each settled once, so
    a route may pass a vertex more than once (into a dead end and back out past the
    vertices it came by). A U-turn (leaving a vertex on the twin of the segment that
    entered it) is allowed only where ``view.turn_back_ok`` says so (dead ends and
    intersections).

    Example (a 100 m segment and its twin: from the tail heading east, the twin is entered
    after a U-turn at the dead end; no source reaches nothing):
        >>> from livematch.core.build import Road, network_from_roads
        >>> from livematch.core.view import view_of
        >>> view = view_of(network_from_roads([Road([(0.0, 0.0), (100.0, 0.0)], way=1)]))
        >>> bounded_dijkstra(view, [(0, 0.0, 0, -1)], 150.0)
        {0: Reach(dist=0.0, source=0, pred=-1), 1: Reach(dist=100.0, source=0, pred=0)}
        >>> bounded_dijkstra(view, [], 100.0)
        {}
    """
    done: dict[int, Reach] = {}
    # entries (distance to the segment's tail, tag, segment, segment before); the label
    # is the tail's, so the bound and the sums are those of a vertex search, shifted by
    # one segment: the same floating-point additions in the same order
    heap: list[tuple[float, int, int, int]] = []
    shift = offsets or [0.0] * (1 + max((s[2] for s in sources), default=0))
    out, st, slen, twin = view.out, view.st, view.slen, view.twin
    ok = [True] * len(view.vx) if anywhere else view.turn_back_ok
    for vertex, length, tag, seg in sources:
        if length <= limit:
            back = twin[seg] if seg >= 0 and not ok[vertex] else -1
            for f in out[vertex]:
                if f != back:
                    heapq.heappush(heap, (length + shift[tag], tag, f, -1))
    while heap:
        dist, tag, g, pred = heapq.heappop(heap)
        if g in done:
            continue
        done[g] = Reach(dist, tag, pred)
        v = st[g]
        nd = dist + slen[g]
        if nd > limit + shift[tag]:
            continue
        back = twin[g] if not ok[v] else -1
        for f in out[v]:
            if f != back and f not in done:
                heapq.heappush(heap, (nd, tag, f, g))
    return done


def route_segments(view: NetworkView, reached: dict[int, Reach], segment: int) -> list[int]:
    """The segments of the shortest route entering ``segment``, in driving order.

    Neither the source's own segment nor ``segment`` itself is included.
    """
    segs: list[int] = []
    g = reached[segment].pred
    while g >= 0:
        segs.append(g)
        g = reached[g].pred
    segs.reverse()
    return segs


class Arrival(NamedTuple):
    """How one segment was entered by a search: :class:`Reach` with the route spelled out.

    Attributes:
        dist: route length in metres to the segment's tail, the source's offset included
            (``Reach.dist``).
        source: the tag of the source the route starts from.
        segs: the route's segments in driving order, neither the source's own segment nor
            the segment entered included (:func:`route_segments`); empty when the segment
            leaves the source's own head vertex.
    """

    dist: float
    source: int
    segs: tuple[int, ...]


# Arrival(d, source, segs) without the Python-level __new__ of a NamedTuple (3x faster;
# a bridged step builds about a hundred of them)
_new_tuple = tuple.__new__


class RouteSearch(Protocol):
    """The signature of :func:`route_searches` and :func:`route_searches_reference`."""

    def __call__(self, view: NetworkView, searches: Sequence[Search], limit: float,
                 ends: list[int], anywhere: bool = False) -> list[list[Arrival | None]]:
        """Per search, per end segment, how it was entered (None: not reached)."""
        ...


def route_searches_reference(
    view: NetworkView, searches: Sequence[Search], limit: float, ends: list[int],
    anywhere: bool = False,
) -> list[list[Arrival | None]]:
    """Run bounded searches and report how each of the segments ``ends`` was entered.

    Args:
        view: the network view.
        searches: per search, the sources and the offsets of :func:`bounded_dijkstra`.
        limit: the longest route considered (metres), for every search.
        ends: the segments to report on (repeats allowed).

    Returns:
        Per search, per end segment, its :class:`Arrival` (the route to the segment's tail
        vertex from which turning into it is allowed) or None when the search did not
        enter it. This is the pure-Python definition: :func:`bounded_dijkstra` and
        :func:`route_segments`.

    Example (a 100 m road both ways; its way back, segment 1, is entered after 100 m
    and a U-turn at the dead end; nothing from no source):
        >>> from livematch.core.build import Road, network_from_roads
        >>> from livematch.core.view import view_of
        >>> view = view_of(network_from_roads([Road([(0.0, 0.0), (100.0, 0.0)], way=1)]))
        >>> route_searches_reference(view, [([(0, 0.0, 0, -1)], None), ([], None)], 150.0, [1])
        [[Arrival(dist=100.0, source=0, segs=(0,))], [None]]
    """
    answer: list[list[Arrival | None]] = []
    for sources, offsets in searches:
        reached = bounded_dijkstra(view, sources, limit, offsets, anywhere)
        row: list[Arrival | None] = []
        for seg in ends:
            r = reached.get(seg)
            row.append(None if r is None else
                       Arrival(r.dist, r.source, tuple(route_segments(view, reached, seg))))
        answer.append(row)
    return answer


class RouteArrays:
    """The compiled search's arrays for one network.

    The network's arrays are shared with the sweep kernel; the per-segment scratch is
    reused from call to call, so calls on one network must not run concurrently (as for
    the sweep kernel; the daemon runs every tracker on one event loop).
    """

    __slots__ = ("flag", "hf", "hi", "lab_f", "lab_i", "n_v", "netf", "neti", "neti_street",
                 "vias")

    def __init__(self, view: NetworkView) -> None:
        from livematch.core.fastsweep import sweep_arrays  # imports sweep, which imports us

        arrays = sweep_arrays(view)
        n_e = view.network.n_segments
        self.netf: npt.NDArray[np.float64] = arrays.netf
        self.neti: npt.NDArray[np.int64] = arrays.neti
        self.n_v = view.network.n_vertices
        self.neti_street: npt.NDArray[np.int64] | None = None
        self.flag: npt.NDArray[np.uint8] = np.zeros(n_e, dtype=np.uint8)
        self.lab_f: npt.NDArray[np.float64] = np.zeros(n_e, dtype=np.float64)
        self.lab_i: npt.NDArray[np.int32] = np.zeros(3 * n_e, dtype=np.int32)
        self.hf: npt.NDArray[np.float64] = np.empty(0)
        self.hi: npt.NDArray[np.int64] = np.empty(0, dtype=np.int64)
        self.vias: npt.NDArray[np.int64] = np.empty(0, dtype=np.int64)
        self.resize(_START_ENTRIES, _START_VIA)

    def street_neti(self) -> npt.NDArray[np.int64]:
        """The network's int arrays with a U-turn allowed at every vertex (built once).

        The layout starts with ``vptr[V + 1]``, whose low bit is ``turn_back_ok``
        (``_sweep_kernel``), so the copy only sets that bit; the sweep itself keeps the
        network's own rule.
        """
        if self.neti_street is None:
            street = self.neti.copy()
            street[:self.n_v] |= 1
            self.neti_street = street
        return self.neti_street

    def resize(self, entries: int, vias: int) -> None:
        """Fresh heap scratch for ``entries`` entries and room for ``vias`` route segments.

        Also the way to test the growth path: start with tiny capacities.
        """
        self.hf = np.empty(2 * entries)
        self.hi = np.empty((1 + _rk.ENTRY_STRIDE) * entries, dtype=np.int64)
        self.vias = np.empty(vias, dtype=np.int64)

    def grow(self) -> None:
        """Double both capacities (after the kernel reported an overflow)."""
        self.resize(len(self.hf), 2 * len(self.vias))


_ATTR: Final = "_route_arrays"  # where the per-network arrays live on the RoadNetwork object
# Initial capacities (heap entries, route segments), doubled on overflow. A bridged step
# at 15-30 s on a city network settles a few hundred segments per search.
_START_ENTRIES: Final = 4096
_START_VIA: Final = 8192


def route_arrays(view: NetworkView) -> RouteArrays:
    """The network's shared :class:`RouteArrays`, built on first use."""
    network: Any = view.network
    arrays = getattr(network, _ATTR, None)
    if arrays is None:
        arrays = RouteArrays(view)
        setattr(network, _ATTR, arrays)
    return arrays


INFO_STRIDE: Final = _rk.INFO_STRIDE  # RouteTable.info: ints per entry (row, source, start, length)


class RouteTable(NamedTuple):
    """What route searches found for their end segments, the routes left packed.

    One entry per (search, end segment) the search entered, in the order of the searches
    and, within one, of the ends. :meth:`arrivals` unpacks it into the answer of
    :func:`route_searches`; a caller that looks at a few entries only (``bridge_step``
    drops every arrival too long for its target) reads the lists and slices the routes
    it keeps, instead of having an :class:`Arrival` and a route tuple built for each.

    Attributes:
        n_ends: the number of end segments asked about.
        dist: per entry, :attr:`Arrival.dist` (the source's offset included).
        info: four ints per entry: ``row`` (``j * n_ends + k`` for search ``j`` and end
            ``k``), the source's tag, and where the route starts in ``vias`` and its
            number of segments.
        vias: every entry's route, one after another: the route of an entry is
            ``vias[start:start + n]`` (:attr:`Arrival.segs`).
    """

    n_ends: int
    dist: list[float]
    info: list[int]
    vias: tuple[int, ...]

    def arrivals(self, n_searches: int) -> list[list[Arrival | None]]:
        """Per search, per end segment, its :class:`Arrival` or None (not entered).

        Example (one search entering end 0 by a route of two segments; end 1 missed):
            >>> RouteTable(2, [50.0], [0, 3, 0, 2], (4, 5)).arrivals(1)
            [[Arrival(dist=50.0, source=3, segs=(4, 5)), None]]
        """
        n_ends = self.n_ends
        flat: list[Arrival | None] = [None] * (n_searches * n_ends)
        segs = self.vias  # a slice of a tuple is the route's tuple: one allocation
        it = iter(self.info)  # four ints per reached end: row, source, via_start, via_len
        for d, row, source, start, n in zip(self.dist, it, it, it, it, strict=False):
            flat[row] = _new_tuple(Arrival, (d, source, segs[start:start + n]))
        return [flat[j * n_ends:(j + 1) * n_ends] for j in range(n_searches)]

    @classmethod
    def of_arrivals(cls, answer: list[list[Arrival | None]], n_ends: int) -> RouteTable:
        """The table of an answer of :data:`RouteSearch` (the inverse of :meth:`arrivals`).

        Example (the answer of the example above):
            >>> RouteTable.of_arrivals([[Arrival(50.0, 3, (4, 5)), None]], 2)
            RouteTable(n_ends=2, dist=[50.0], info=[0, 3, 0, 2], vias=(4, 5))
        """
        dist: list[float] = []
        info: list[int] = []
        vias: list[int] = []
        for j, row in enumerate(answer):
            for k, a in enumerate(row):
                if a is not None:
                    dist.append(a.dist)
                    info += (j * n_ends + k, a.source, len(vias), len(a.segs))
                    vias.extend(a.segs)
        return cls(n_ends, dist, info, tuple(vias))


def route_table(
    view: NetworkView, searches: Sequence[Search], limit: float, ends: list[int],
    anywhere: bool = False,
) -> RouteTable:
    """:func:`route_searches`' searches, compiled, answered as a :class:`RouteTable`.

    All the searches run in one call of the kernel, each stopping as soon as every end
    segment is settled (their labels are final then; see ``_route_kernel``).

    Example (as for :func:`route_searches_reference`: the way back of a 100 m road, entered
    after a U-turn at the dead end, by a route of one segment; nothing from no source):
        >>> from livematch.core.build import Road, network_from_roads
        >>> from livematch.core.view import view_of
        >>> view = view_of(network_from_roads([Road([(0.0, 0.0), (100.0, 0.0)], way=1)]))
        >>> route_table(view, [([(0, 0.0, 0, -1)], None), ([], None)], 150.0, [1])
        RouteTable(n_ends=1, dist=[100.0], info=[0, 0, 0, 1], vias=(0,))
        >>> route_table(view, [], 150.0, [1])
        RouteTable(n_ends=1, dist=[], info=[], vias=())
    """
    if not searches:
        return RouteTable(len(ends), [], [], ())
    arrays = route_arrays(view)
    req: list[float] = [limit, len(ends), *ends, len(searches)]
    for sources, offsets in searches:
        req.append(len(sources))
        for vertex, length, tag, seg in sources:
            req += (vertex, length, tag, seg, offsets[tag] if offsets else 0.0)
    packed = np.array(req, dtype=np.float64)
    while True:
        neti = arrays.street_neti() if anywhere else arrays.neti
        dist, info, n_via = _rk.route_kernel(arrays.netf, neti, arrays.flag,
                                             arrays.lab_f, arrays.lab_i, packed, arrays.hf,
                                             arrays.hi, arrays.vias)
        if n_via >= 0:
            break
        arrays.grow()
    return RouteTable(len(ends), dist.tolist(), info.tolist(),
                      tuple(arrays.vias[:n_via].tolist()))


def route_searches(
    view: NetworkView, searches: Sequence[Search], limit: float, ends: list[int],
    anywhere: bool = False,
) -> list[list[Arrival | None]]:
    """:func:`route_searches_reference`, compiled: same arguments, same answer.

    :func:`route_table`, unpacked (:meth:`RouteTable.arrivals`).

    Example (as for the reference):
        >>> from livematch.core.build import Road, network_from_roads
        >>> from livematch.core.view import view_of
        >>> view = view_of(network_from_roads([Road([(0.0, 0.0), (100.0, 0.0)], way=1)]))
        >>> route_searches(view, [([(0, 0.0, 0, -1)], None), ([], None)], 150.0, [1])
        [[Arrival(dist=100.0, source=0, segs=(0,))], [None]]
        >>> route_searches(view, [], 150.0, [1])
        []
    """
    return route_table(view, searches, limit, ends, anywhere).arrivals(len(searches))


def connect(
    view: NetworkView, from_seg: int, from_pos: float, to_seg: int, to_pos: float, limit: float,
    search: RouteSearch = route_searches,
) -> list[int] | None:
    """Segments strictly between (from_seg, from_pos) and (to_seg, to_pos), or None.

    Positions are parameters in [0, 1] along the segments. Staying on one segment and
    moving forward needs no segment in between (returns ``[]``); otherwise the shortest
    route from the head of ``from_seg`` to the tail of ``to_seg`` no longer than
    ``limit`` metres in all. ``search`` is :func:`route_searches` or its reference.

    The route arrives at the tail of ``to_seg`` by any segment: the last turn, into
    ``to_seg``, is not checked (as it never was). Two committed stretches that disagree
    about the direction are then joined where they meet, not by an excursion to the next
    place the network allows a U-turn (on the simulated drives of bench/accuracy.py such
    excursions added segments the vehicle never drove).

    Example (a 100 m road both ways: from 30 m along it to 20 m along the way back):
        >>> from livematch.core.build import Road, network_from_roads
        >>> from livematch.core.view import view_of
        >>> view = view_of(network_from_roads([Road([(0.0, 0.0), (100.0, 0.0)], way=1)]))
        >>> connect(view, 0, 0.3, 1, 0.2, 200.0), connect(view, 0, 0.3, 1, 0.2, 80.0)
        ([], None)
        >>> connect(view, 0, 0.3, 0, 0.5, 10.0)
        []
    """
    if from_seg == to_seg and to_pos >= from_pos:
        return []
    start = view.st[from_seg]
    head_left = (1.0 - from_pos) * view.slen[from_seg]
    tail = view.sf[to_seg]
    rest = to_pos * view.slen[to_seg]
    if start == tail:
        return [] if head_left + rest <= limit else None
    # the search enters segments; the tail is reached at the head of one entering it
    into = view.network.in_segments(tail).tolist()
    found = search(view, [([(start, head_left, 0, from_seg)], None)], limit, into)[0]
    best: tuple[float, int, Arrival] | None = None
    for seg, r in zip(into, found, strict=True):
        if r is not None and (best is None or (r.dist + view.slen[seg], seg) < best[:2]):
            best = (r.dist + view.slen[seg], seg, r)
    if best is None or best[0] + rest > limit:
        return None
    return [*best[2].segs, best[1]]


def small_loop(
    view: NetworkView, vertex: int, limit: float, centre: tuple[float, float], radius: float,
    not_first: int = -1, not_last: int = -1,
) -> tuple[list[int], float] | None:
    """The shortest closed drive from ``vertex`` back to it inside a disc, or None.

    A lap round a small loop (a turning circle, a ring of service road, a block, or in
    and out of a short dead end): a non-empty run of directed segments that leaves
    ``vertex`` and ends entering it, makes no U-turn (no segment followed by its own
    twin) except at a dead end (where the twin is the only way on), never leaves the
    disc of ``radius`` metres around ``centre`` (every vertex it passes lies inside; the
    segments are straight, so the whole lap does) and is at most ``limit`` metres long.
    Its first segment is not ``not_first`` (the twin of the segment driven into
    ``vertex``: no U-turn onto the lap), its last one not ``not_last`` (the twin of the
    segment the path goes on by). Returns the lap and its length. Edge-based Dijkstra,
    as :func:`bounded_dijkstra`; the disc bounds the work.

    Example (a 20 m square one-way ring, vertices 0-1-2-3, entered at vertex 0):
        >>> from livematch.core.build import Road, network_from_roads
        >>> from livematch.core.view import view_of
        >>> ring = [(0.0, 0.0), (20.0, 0.0), (20.0, 20.0), (0.0, 20.0), (0.0, 0.0)]
        >>> view = view_of(network_from_roads([Road(ring, way=1, oneway=True)]))
        >>> lap, length = small_loop(view, view.sf[0], 100.0, (10.0, 10.0), 20.0)
        >>> len(lap), length
        (4, 80.0)
        >>> small_loop(view, view.sf[0], 79.0, (10.0, 10.0), 20.0) is None
        True
        >>> small_loop(view, view.sf[0], 100.0, (10.0, 10.0), 10.0) is None
        True
    """
    cx, cy = centre
    r2 = radius * radius
    vx, vy, st, twin, slen, out = view.vx, view.vy, view.st, view.twin, view.slen, view.out

    def inside(v: int) -> bool:
        dx = vx[v] - cx
        dy = vy[v] - cy
        return dx * dx + dy * dy <= r2

    if not inside(vertex):
        return None
    best: dict[int, float] = {}
    pred: dict[int, int] = {}
    heap: list[tuple[float, int]] = []
    for seg in out[vertex]:
        if seg != not_first and slen[seg] <= limit and inside(st[seg]):
            best[seg] = slen[seg]
            pred[seg] = -1
            heapq.heappush(heap, (slen[seg], seg))
    while heap:
        d, seg = heapq.heappop(heap)
        if d > best[seg]:
            continue
        head = st[seg]
        if head == vertex and seg != not_last:
            lap = [seg]
            while pred[lap[-1]] >= 0:
                lap.append(pred[lap[-1]])
            lap.reverse()
            return lap, d
        ways = out[head]
        for nxt in ways:
            nd = d + slen[nxt]
            if (nxt == twin[seg] and len(ways) > 1) or nd > limit \
                    or nd >= best.get(nxt, np.inf):
                continue
            if not inside(st[nxt]):
                continue
            best[nxt] = nd
            pred[nxt] = seg
            heapq.heappush(heap, (nd, nxt))
    return None


def warm_up() -> None:
    """Compile (or load) the search kernel now rather than at a vehicle's first bridged step.

    Called by :func:`livematch.pipeline.prepare_kernels` with the sweep and tree kernels'
    warm-up, for the same reason: no broker keepalive or lease renewal should wait behind
    a compilation (a few seconds on a cold cache).

    Example:
        >>> warm_up()  # compiles (or loads) the kernel; nothing to return
    """
    from livematch.core.build import Road, network_from_roads
    from livematch.core.view import view_of

    view = view_of(network_from_roads([Road([(0.0, 0.0), (100.0, 0.0)], way=1)]))
    route_searches(view, [([(0, 0.0, 0, -1)], [0.0])], 150.0, [1])
