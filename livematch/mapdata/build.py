"""Turn road chains (node ids with a travel direction) into a :class:`RoadNetwork`.

Both importers (OpenStreetMap and GeoJSON) reduce their source to the same thing: for each
road a list of *chains*, each a run of node ids in drawing order, plus which way traffic
may go. This module projects the vertices and lays out the directed segments.

Segment order is deterministic: roads in source order; within a chain the forward
segments in drawing order, then the backward ones in travel order (last point first), so
consecutive segments along a direction of travel have consecutive indices. Then, with
:attr:`ImportOptions.merge_coincident` (the default), segments joining the same two
vertices in the same direction are merged (:func:`livematch.core.network.merge_coincident`):
the first of them keeps its place and reports the way of the most important road class,
then the lowest way id; the later ones are dropped, so the indices after them move down.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import numpy.typing as npt

from livematch.core.geometry import Projection
from livematch.core.network import RoadNetwork, merge_coincident
from livematch.errors import BadNetworkError
from livematch.mapdata.options import ImportOptions, ImportStats

IntArray = npt.NDArray[np.int64]
FloatArray = npt.NDArray[np.float64]

#: Travel directions of a chain relative to its drawing order.
FORWARD = 1
BACKWARD = -1
BOTH = 0


@dataclass(frozen=True)
class Chain:
    """A run of at least two node ids of one road, in drawing order.

    Attributes:
        way: the source road id (OSM way id or GeoJSON feature id).
        road: index into the roads list.
        nodes: node ids; consecutive duplicates must already be removed.
        direction: :data:`FORWARD`, :data:`BACKWARD` or :data:`BOTH`.
    """

    way: int
    road: int
    nodes: IntArray
    direction: int


def drop_consecutive_repeats(nodes: Sequence[int]) -> list[int]:
    """``nodes`` without consecutive repeats (a zero-length step is no segment).

    >>> drop_consecutive_repeats([1, 1, 2, 2, 2, 3, 1])
    [1, 2, 3, 1]
    >>> drop_consecutive_repeats([])
    []
    """
    out: list[int] = []
    for n in nodes:
        if not out or out[-1] != n:
            out.append(n)
    return out


def assemble(
    chains: Sequence[Chain],
    vertex_ids: IntArray,
    vertex_lon: FloatArray,
    vertex_lat: FloatArray,
    roads: list[dict[str, Any]],
    options: ImportOptions,
    source: str,
    stats: ImportStats | None = None,
) -> RoadNetwork:
    """Build the network from chains and the positions of their nodes.

    Args:
        chains: the road chains, in the order their segments should appear.
        vertex_ids: sorted unique node ids, a superset of those the chains use.
        vertex_lon, vertex_lat: WGS84 degrees of each of ``vertex_ids``.
        roads: one dict per road, indexed by ``Chain.road``.
        options: projection choice.
        source: description stored on the network.
        stats: when given, the merge of coincident segments is counted and noted in it.

    Raises:
        BadNetworkError: when there is no chain at all (nothing to drive on).
    """
    if not chains:
        raise BadNetworkError(f"{source}: no drivable roads")
    used = np.unique(np.concatenate([c.nodes for c in chains]))
    pos = np.searchsorted(vertex_ids, used)
    node_lon = np.asarray(vertex_lon, dtype=np.float64)[pos]
    node_lat = np.asarray(vertex_lat, dtype=np.float64)[pos]
    projection = Projection.for_extent(node_lon, node_lat, options.projection, options.epsg)
    x, y = projection.to_xy(node_lon, node_lat)

    froms: list[IntArray] = []
    tos: list[IntArray] = []
    ways: list[IntArray] = []
    road_idx: list[IntArray] = []
    for chain in chains:
        idx = np.searchsorted(used, chain.nodes).astype(np.int64)
        a, b = idx[:-1], idx[1:]
        if chain.direction in (FORWARD, BOTH):
            froms.append(a)
            tos.append(b)
        if chain.direction in (BACKWARD, BOTH):
            froms.append(b[::-1])
            tos.append(a[::-1])
        n = (len(a) * (2 if chain.direction == BOTH else 1))
        ways.append(np.full(n, chain.way, dtype=np.int64))
        road_idx.append(np.full(n, chain.road, dtype=np.int64))
    seg_from = np.concatenate(froms)
    seg_to = np.concatenate(tos)
    seg_way = np.concatenate(ways)
    seg_road = np.concatenate(road_idx)
    if options.merge_coincident:
        merge = merge_coincident(seg_from, seg_to, seg_way, seg_road, roads)
        if merge.merged:
            seg_from, seg_to = seg_from[merge.keep], seg_to[merge.keep]
            seg_way, seg_road = seg_way[merge.report], seg_road[merge.report]
            if stats is not None:
                stats.coincident_merged += merge.merged
                stats.coincident_pairs += merge.pairs
                stats.notes.append(
                    f"{merge.merged} directed segments merged into another over the same "
                    f"two nodes ({merge.pairs} node pairs drawn by more than one way)")
    return RoadNetwork(
        projection=projection,
        node_xy=np.column_stack([x, y]),
        node_id=used,
        seg_from=seg_from.astype(np.int32),
        seg_to=seg_to.astype(np.int32),
        seg_way=seg_way,
        seg_road=seg_road.astype(np.int32),
        roads=roads,
        source=source,
    )
