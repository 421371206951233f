"""Facts about a network for people: counts, extent, road length by class, connectivity.

Used by ``livematch network info``. Road length counts each physical piece of road once:
a two-way road's segment pair (a->b and b->a) adds its length once, a one-way segment
adds its length once; after the build's merge of coincident segments a pair may report
two ways (a one-way drawn over a two-way road), and it is still one piece.
"""

from __future__ import annotations

from collections import defaultdict
from typing import Any

import networkx as nx
import numpy as np
import numpy.typing as npt

from livematch.core.network import RoadNetwork

FloatArray = npt.NDArray[np.float64]


def physical_length_by_class(network: RoadNetwork) -> dict[str, float]:
    """Metres of road per highway class, each physical road piece counted once.

    Segments joining the same two vertices (either direction) are one piece, counted in
    the class of the lower-indexed one. Classes are sorted by name.

    Example: a 100 m two-way road gives ``{"road": 100.0}``; the same as one-way gives
    the same; an empty network gives ``{}``.
    """
    if network.n_segments == 0:
        return {}
    lo = np.minimum(network.seg_from, network.seg_to).astype(np.int64)
    hi = np.maximum(network.seg_from, network.seg_to).astype(np.int64)
    keys = np.stack([lo, hi], axis=1)
    _, first = np.unique(keys, axis=0, return_index=True)
    totals: dict[str, float] = defaultdict(float)
    for s in first.tolist():
        road = network.roads[int(network.seg_road[s])]
        totals[str(road.get("highway") or "road")] += float(network.seg_len[s])
    return dict(sorted(totals.items()))


def largest_scc_share(network: RoadNetwork) -> float:
    """Share of segments inside the largest strongly connected component (by segments).

    A segment is inside a component when both its ends are. 1.0 means a vehicle can get
    from every segment to every other; an empty network gives 0.0.
    """
    if network.n_segments == 0:
        return 0.0
    graph = nx.DiGraph()
    graph.add_nodes_from(range(network.n_vertices))
    graph.add_edges_from(zip(network.seg_from.tolist(), network.seg_to.tolist(), strict=True))
    comp = np.empty(network.n_vertices, dtype=np.int64)
    for label, members in enumerate(nx.strongly_connected_components(graph)):
        comp[list(members)] = label
    same = comp[network.seg_from] == comp[network.seg_to]
    if not same.any():
        return 0.0
    counts = np.bincount(comp[network.seg_from][same])
    return float(counts.max()) / network.n_segments


def wgs84_bbox(network: RoadNetwork) -> tuple[float, float, float, float]:
    """(min_lon, min_lat, max_lon, max_lat) of the vertices, degrees."""
    lon, lat = network.projection.to_lonlat(network.node_xy[:, 0], network.node_xy[:, 1])
    return float(lon.min()), float(lat.min()), float(lon.max()), float(lat.max())


def network_summary(network: RoadNetwork) -> dict[str, Any]:
    """All ``info`` facts as a JSON-ready dict (lengths in metres)."""
    by_class = physical_length_by_class(network)
    ways = int(np.unique(network.seg_way).size)
    return {
        "source": network.source,
        "projection": network.projection.crs,
        "vertices": network.n_vertices,
        "segments": network.n_segments,
        "segments_without_reverse": int(np.count_nonzero(network.seg_twin < 0)),
        "roads": len(network.roads),
        "ways": ways,
        "bbox_wgs84": list(wgs84_bbox(network)) if network.n_vertices else None,
        "length_m_by_highway": {k: round(v, 1) for k, v in by_class.items()},
        "length_m_total": round(sum(by_class.values()), 1),
        "largest_scc_segment_share": round(largest_scc_share(network), 6),
    }
