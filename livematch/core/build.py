"""Build a :class:`RoadNetwork` from polylines in metres (pure; no file formats).

Used by the GeoJSON importer's callers, the demo town and the tests' catalogue of small
graphs. Polylines that share a coordinate exactly share the vertex there, which is how
roads connect. Segments that join the same two vertices in the same direction (two roads
drawn over the same points) are merged as every build does
(:func:`livematch.core.network.merge_coincident`).
"""

from __future__ import annotations

import itertools
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from livematch.core.geometry import Projection
from livematch.core.network import RoadNetwork, merge_coincident


@dataclass(frozen=True, slots=True)
class Road:
    """One road as a polyline in metres.

    Attributes:
        coords: the shape points, in the road's drawing direction.
        way: its source id.
        oneway: True = drivable only in drawing direction.
        name: road name, if any.
        highway: road class.
    """

    coords: Sequence[tuple[float, float]]
    way: int
    oneway: bool = False
    name: str | None = None
    highway: str = "road"


def network_from_roads(roads: Sequence[Road], projection: Projection | None = None) -> RoadNetwork:
    """A directed segment network from roads; shared coordinates become shared vertices.

    Vertex (node) ids are 1, 2, 3... in order of first appearance. Consecutive repeated
    points of a road are skipped (they would be zero-length segments). A segment that
    joins the same two vertices in the same direction as an earlier one is merged into
    it: the earlier keeps its place and reports the road of the more important class
    (``highway``, :data:`~livematch.core.network.ROAD_CLASS_ORDER`), then the lower
    ``way``.

    >>> net = network_from_roads([Road([(0, 0), (100, 0)], way=7)])
    >>> net.n_segments, net.source_ids(0)
    (2, (7, 1, 2))
    """
    index: dict[tuple[float, float], int] = {}
    xy: list[tuple[float, float]] = []
    seg_from: list[int] = []
    seg_to: list[int] = []
    seg_way: list[int] = []
    seg_road: list[int] = []
    meta = []
    for r, road in enumerate(roads):
        meta.append({"name": road.name, "ref": None, "highway": road.highway})
        ids: list[int] = []
        for p in road.coords:
            key = (float(p[0]), float(p[1]))
            v = index.get(key)
            if v is None:
                v = index[key] = len(xy)
                xy.append(key)
            if not ids or ids[-1] != v:
                ids.append(v)
        for a, b in itertools.pairwise(ids):
            seg_from.append(a)
            seg_to.append(b)
            seg_way.append(road.way)
            seg_road.append(r)
            if not road.oneway:
                seg_from.append(b)
                seg_to.append(a)
                seg_way.append(road.way)
                seg_road.append(r)
    merge = merge_coincident(seg_from, seg_to, seg_way, seg_road, meta)
    return RoadNetwork(
        projection=projection or Projection.local(0.0, 0.0),
        node_xy=np.array(xy, dtype=float).reshape(-1, 2),
        node_id=np.arange(1, len(xy) + 1, dtype=np.int64),
        seg_from=np.array(seg_from, dtype=np.int32)[merge.keep],
        seg_to=np.array(seg_to, dtype=np.int32)[merge.keep],
        seg_way=np.array(seg_way, dtype=np.int64)[merge.report],
        seg_road=np.array(seg_road, dtype=np.int32)[merge.report],
        roads=meta,
        source="polylines",
    )
