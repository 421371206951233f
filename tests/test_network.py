"""RoadNetwork's spatial query: segments near a point."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import shapely

from livematch.mapdata.netfile import open_network

TOWN = Path(__file__).resolve().parent.parent / "replay_logs" / "larkmoor.geojson"


def test_segments_near_matches_distance_to_every_segment() -> None:
    """segments_near gives, sorted, every segment within the radius of the point."""
    net = open_network(str(TOWN))
    lines = shapely.linestrings(np.stack(
        [net.node_xy[net.seg_from], net.node_xy[net.seg_to]], axis=1))
    rng = np.random.default_rng(24)
    lo, hi = net.node_xy.min(axis=0), net.node_xy.max(axis=0)
    found = 0
    for x, y in rng.uniform(lo, hi, (60, 2)):
        point = shapely.Point(x, y)
        for radius in (15.0, 30.0, 60.0):
            got = net.segments_near(float(x), float(y), radius)
            # the reference: GEOS's distance from the point to each segment (shapely)
            want = np.flatnonzero(shapely.distance(lines, point) <= radius)
            assert got.dtype == np.int32
            assert got.tolist() == want.tolist()
            found += len(got)
    assert found > 0  # the points were near roads at least some of the time
