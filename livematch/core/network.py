"""The directed road-segment graph every matcher works on.

A :class:`RoadNetwork` is a directed graph whose edges are straight *segments*: every
shape point of a road is a vertex, a two-way road gives one segment per direction and a
one-way road only the legal one. Each segment keeps its source ids (``way``,
``from_node``, ``to_node``) so that any output can be checked against the source map.

Hot-path data lives in flat numpy arrays (vertex coordinates, segment endpoints, CSR
adjacency); the spatial index (shapely's STRtree) is built lazily and is needed only to
start or restart a match, because the sweep takes its next candidates from adjacency.

Building a network from a map file is the job of :mod:`livematch.mapdata`; saving and
loading the compiled ``.lmnet`` file lives there too (I/O stays out of the core).

**Coincident segments.** A map may draw two ways over the same nodes (OpenStreetMap has
a service road or a second classification laid over a street's nodes). Each would give a
directed segment joining the same two vertices along the same straight line: no fix can
tell them apart, and a route driven on one would count the other as a road not driven.
Every build therefore merges them (:func:`merge_coincident`, called by
:func:`livematch.core.build.network_from_roads` and :func:`livematch.mapdata.build.assemble`):
one segment per ordered vertex pair, reporting the way of the most important road class
(:data:`ROAD_CLASS_ORDER`), then the lowest way id. Directions stay the union of the
ways' directions, since each direction is its own ordered pair.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np
import numpy.typing as npt
import shapely

from livematch.core.geometry import Projection

IntArray = npt.NDArray[np.int64]
Int32Array = npt.NDArray[np.int32]
FloatArray = npt.NDArray[np.float64]

#: OpenStreetMap ``highway`` classes from the most to the least important, the order the
#: OSM wiki's Key:highway page lists the road classes in (from memory); each ``*_link``
#: is placed right after its parent class (our choice: a link is part of that road's
#: network). A class not listed ranks after all of these. Used to pick which way a merged
#: coincident segment reports (:func:`merge_coincident`) and which classes the matcher's
#: class charge counts as minor (:func:`minor_segments`).
ROAD_CLASS_ORDER: tuple[str, ...] = (
    "motorway", "motorway_link", "trunk", "trunk_link", "primary", "primary_link",
    "secondary", "secondary_link", "tertiary", "tertiary_link",
    "unclassified", "residential", "living_street", "service", "road",
)
_CLASS_RANK = {name: rank for rank, name in enumerate(ROAD_CLASS_ORDER)}


@dataclass(eq=False)
class RoadNetwork:
    """Directed segment graph in projected metres.

    Attributes:
        projection: the CRS of ``node_xy``.
        node_xy: (V, 2) float64 vertex coordinates in metres.
        node_id: (V,) int64 source node ids (OSM node id; synthetic for GeoJSON).
        seg_from, seg_to: (E,) int32 vertex indices of each directed segment.
        seg_way: (E,) int64 source road id (OSM way id or GeoJSON feature id).
        seg_road: (E,) int32 index into ``roads`` (name/ref/class of the road), one per way.
        roads: list of dicts ``{"name": str|None, "ref": str|None, "highway": str}``.
        seg_len: (E,) float64 segment length in metres.
        out_ptr, out_seg: CSR adjacency: the segments leaving vertex v are
            ``out_seg[out_ptr[v]:out_ptr[v + 1]]``.
        in_ptr, in_seg: CSR of the segments entering each vertex.
        seg_twin: (E,) int32: the segment of the same road in the opposite direction
            (same vertices reversed), or -1 for one-way segments.
        source: a short description of where the network came from (for ``info``).
    """

    projection: Projection
    node_xy: FloatArray
    node_id: IntArray
    seg_from: Int32Array
    seg_to: Int32Array
    seg_way: IntArray
    seg_road: Int32Array
    roads: list[dict[str, Any]]
    seg_len: FloatArray = field(init=False)
    out_ptr: Int32Array = field(init=False)
    out_seg: Int32Array = field(init=False)
    in_ptr: Int32Array = field(init=False)
    in_seg: Int32Array = field(init=False)
    seg_twin: Int32Array = field(init=False)
    source: str = ""
    _tree: Any = field(default=None, init=False, repr=False)
    _view: Any = field(default=None, init=False, repr=False)
    _sweep_arrays: Any = field(default=None, init=False, repr=False)

    def __post_init__(self) -> None:
        self.node_xy = np.ascontiguousarray(self.node_xy, dtype=np.float64).reshape(-1, 2)
        self.node_id = np.ascontiguousarray(self.node_id, dtype=np.int64)
        self.seg_from = np.ascontiguousarray(self.seg_from, dtype=np.int32)
        self.seg_to = np.ascontiguousarray(self.seg_to, dtype=np.int32)
        self.seg_way = np.ascontiguousarray(self.seg_way, dtype=np.int64)
        self.seg_road = np.ascontiguousarray(self.seg_road, dtype=np.int32)
        n_v, n_e = len(self.node_xy), len(self.seg_from)
        if not (len(self.node_id) == n_v and len(self.seg_to) == n_e == len(self.seg_way)):
            raise ValueError("RoadNetwork arrays have inconsistent lengths")
        if n_e and (min(self.seg_from.min(), self.seg_to.min()) < 0
                    or max(self.seg_from.max(), self.seg_to.max()) >= n_v):
            raise ValueError("RoadNetwork segment endpoints refer to missing vertices")
        d = self.node_xy[self.seg_to] - self.node_xy[self.seg_from]
        self.seg_len = np.hypot(d[:, 0], d[:, 1])
        self.out_ptr, self.out_seg = _csr(self.seg_from, n_v)
        self.in_ptr, self.in_seg = _csr(self.seg_to, n_v)
        self.seg_twin = _twins(self.seg_from, self.seg_to, n_v)

    @property
    def n_vertices(self) -> int:
        """Number of vertices (shape points)."""
        return len(self.node_xy)

    @property
    def n_segments(self) -> int:
        """Number of directed segments."""
        return len(self.seg_from)

    def out_segments(self, vertex: int) -> Int32Array:
        """Segments leaving ``vertex``."""
        return self.out_seg[self.out_ptr[vertex]:self.out_ptr[vertex + 1]]

    def in_segments(self, vertex: int) -> Int32Array:
        """Segments entering ``vertex``."""
        return self.in_seg[self.in_ptr[vertex]:self.in_ptr[vertex + 1]]

    def segment_coords(self, segment: int) -> tuple[float, float, float, float]:
        """(ax, ay, bx, by) of a segment, metres."""
        a = self.node_xy[self.seg_from[segment]]
        b = self.node_xy[self.seg_to[segment]]
        return float(a[0]), float(a[1]), float(b[0]), float(b[1])

    def source_ids(self, segment: int) -> tuple[int, int, int]:
        """(way, from_node, to_node) source ids of a segment."""
        return (
            int(self.seg_way[segment]),
            int(self.node_id[self.seg_from[segment]]),
            int(self.node_id[self.seg_to[segment]]),
        )

    def road_name(self, segment: int) -> str | None:
        """The road's name (or its ref when unnamed), None when neither is known."""
        road = self.roads[int(self.seg_road[segment])]
        name = road.get("name") or road.get("ref")
        return str(name) if name else None

    def segments_near(self, x: float, y: float, radius: float) -> Int32Array:
        """Segments whose closest point lies within ``radius`` metres of (x, y), sorted.

        Uses an STRtree built on first use; the matcher calls this only to start or
        restart (three times for a new vehicle, once per eps level), never per fix on
        the hot path. The point goes in as an array of one (``shapely.points``), not a
        ``shapely.Point``: the same query and hits, without the scalar geometry's
        construction and the query's scalar path (``bench/loadpath.py``: a vehicle's
        first fix about 20 µs cheaper).
        """
        if self._tree is None:
            self._tree = shapely.STRtree(self._segment_lines())
        if self.n_segments == 0:
            return np.empty(0, dtype=np.int32)
        hits = self._tree.query(shapely.points(np.array(((x, y),))), predicate="dwithin",
                                distance=radius)[1]
        return np.sort(hits.astype(np.int32))

    def _segment_lines(self) -> npt.NDArray[np.object_]:
        coords = np.stack([self.node_xy[self.seg_from], self.node_xy[self.seg_to]], axis=1)
        return np.asarray(shapely.linestrings(coords))


def _csr(keys: Int32Array, n: int) -> tuple[Int32Array, Int32Array]:
    """CSR grouping of segment indices by vertex ``keys`` (stable, so ids stay sorted)."""
    order = np.argsort(keys, kind="stable").astype(np.int32)
    counts = np.bincount(keys, minlength=n)
    ptr = np.zeros(n + 1, dtype=np.int32)
    np.cumsum(counts, out=ptr[1:])
    return ptr, order


def _twins(seg_from: Int32Array, seg_to: Int32Array, n_v: int) -> Int32Array:
    """For each segment a->b, the index of a segment b->a, or -1."""
    twin = np.full(len(seg_from), -1, dtype=np.int32)
    if len(seg_from) == 0:
        return twin
    key = seg_from.astype(np.int64) * n_v + seg_to
    rev = seg_to.astype(np.int64) * n_v + seg_from
    order = np.argsort(key, kind="stable")
    pos = np.searchsorted(key[order], rev)
    pos = np.minimum(pos, len(key) - 1)
    found = key[order][pos] == rev
    twin[found] = order[pos[found]].astype(np.int32)
    return twin


@dataclass(frozen=True)
class CoincidentMerge:
    """Which directed segments survive :func:`merge_coincident` and what they report.

    Attributes:
        keep: (E',) int64 indices of the surviving segments, ascending: for each ordered
            vertex pair the first segment (lowest index) that joins it, so segment order
            is kept and a network without coincident segments keeps every index.
        report: (E',) int64: for each survivor, the segment whose ``seg_way`` and
            ``seg_road`` it takes (the chosen way of its group).
        merged: number of segments dropped (E - E').
        pairs: number of ordered vertex pairs that had two segments or more.
    """

    keep: IntArray
    report: IntArray
    merged: int
    pairs: int


def road_class_rank(highway: object) -> int:
    """Position of a ``highway`` class in :data:`ROAD_CLASS_ORDER` (lower = more important).

    >>> road_class_rank("primary") < road_class_rank("unclassified") < road_class_rank("service")
    True
    >>> road_class_rank("bus_guideway") == len(ROAD_CLASS_ORDER)
    True
    """
    return _CLASS_RANK.get(str(highway), len(ROAD_CLASS_ORDER))


#: The least important class that is not *minor*: ``MatchSettings.class_cost_m`` charges
#: the classes ranked after it (``living_street``, ``service``, ``road`` and every class
#: not listed, such as ``track``). Our choice: the streets a through trip uses end here.
MINOR_AFTER: str = "residential"


def minor_segments(network: RoadNetwork) -> FloatArray:
    """Per segment 1.0 if its road's class is minor (ranked after :data:`MINOR_AFTER`), else 0.0.

    Read by the tracker's class charge (``MatchSettings.class_cost_m``), which multiplies
    it by the charge; float so that the product needs no conversion.

    Example (a residential street, a service road and a road with no class):
        >>> from livematch.core.build import Road, network_from_roads
        >>> net = network_from_roads([
        ...     Road([(0.0, 0.0), (100.0, 0.0)], way=1, oneway=True, highway="residential"),
        ...     Road([(0.0, 3.0), (100.0, 3.0)], way=2, oneway=True, highway="service"),
        ...     Road([(0.0, 9.0), (100.0, 9.0)], way=3, oneway=True, highway="")])
        >>> minor_segments(net).tolist()
        [0.0, 1.0, 1.0]
        >>> minor_segments(network_from_roads([])).tolist()
        []
    """
    limit = road_class_rank(MINOR_AFTER)
    per_road = np.array([1.0 if road_class_rank(r.get("highway")) > limit else 0.0
                         for r in network.roads] or [0.0], dtype=np.float64)
    return np.ascontiguousarray(per_road[network.seg_road], dtype=np.float64)


def merge_coincident(
    seg_from: npt.ArrayLike, seg_to: npt.ArrayLike, seg_way: npt.ArrayLike,
    seg_road: npt.ArrayLike, roads: list[dict[str, Any]],
) -> CoincidentMerge:
    """Group directed segments by their (from, to) vertices: one survivor per group.

    Two segments with the same start and end vertex are the same straight line in the
    same direction (a segment has no shape points of its own), so the merge needs no
    geometry test. The survivor is the group's lowest index; it reports the way and road
    of the group's member with the most important road class (:func:`road_class_rank` of
    ``roads[seg_road]["highway"]``), ties going to the lowest way id, then to the lowest
    index. That choice is deterministic (independent of the order ways come in) and keeps
    the more important class, which is what the simulator's travel times and a reader of
    the outputs expect of a road drawn twice. Pure; the caller applies the result.

    >>> m = merge_coincident([0, 0, 1], [1, 1, 0], [29, 288, 29], [0, 1, 0],
    ...                      [{"highway": "service"}, {"highway": "unclassified"}])
    >>> m.keep.tolist(), m.report.tolist(), m.merged, m.pairs
    ([0, 2], [1, 2], 1, 1)
    """
    f = np.asarray(seg_from, dtype=np.int64)
    t = np.asarray(seg_to, dtype=np.int64)
    way = np.asarray(seg_way, dtype=np.int64)
    road = np.asarray(seg_road, dtype=np.int64)
    n = len(f)
    if n == 0:
        empty = np.empty(0, dtype=np.int64)
        return CoincidentMerge(empty, empty, 0, 0)
    key = f * (int(max(f.max(), t.max())) + 1) + t
    rank_of_road = np.array([road_class_rank(r.get("highway")) for r in roads] or [0],
                            dtype=np.int64)
    rank = rank_of_road[road]
    idx = np.arange(n, dtype=np.int64)
    order = np.lexsort((idx, way, rank, key))  # by key, then rank, way, index
    sorted_key = key[order]
    starts = np.flatnonzero(np.r_[True, sorted_key[1:] != sorted_key[:-1]])
    report = order[starts]  # the best member of each group
    keep = np.minimum.reduceat(order, starts)  # the first member of each group
    by_index = np.argsort(keep, kind="stable")
    sizes = np.diff(np.r_[starts, n])
    return CoincidentMerge(keep[by_index], report[by_index], n - len(starts),
                           int(np.count_nonzero(sizes > 1)))
