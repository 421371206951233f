"""bench/stublaps.py: stubs, laps and U-turns read from paths on a hand-drawn network.

The outside reference: the stub's length is shapely's length of the drawn line, and
which vertex is a stub's mouth is read off the drawn coordinates, not the arrays.
"""

from __future__ import annotations

import shapely

from livematch.core.build import Road, network_from_roads
from livematch.core.network import RoadNetwork
from tests.catalogue import bench_module, seg_of

STUB = [(200.0, 0.0), (200.0, 6.0), (200.0, 10.0)]


def _network() -> RoadNetwork:
    """A main road (0..400 m, nodes every 50 m), a 10 m two-way dead end north at
    x = 200 and a 40 m one at x = 300."""
    return network_from_roads([
        Road([(float(x), 0.0) for x in range(0, 401, 50)], way=1),
        Road(STUB, way=2),
        Road([(300.0, 0.0), (300.0, 40.0)], way=3),
    ])


def test_dead_ends_mouths_and_events() -> None:
    """The only stub mouth is the drawn junction at (200, 0); a path into the stub and
    back is one lap there, a U-turn at that junction is ``uturn-mouth``, one at the
    40 m dead end's end ``uturn-deadend``, one at the junction (300, 0) ``uturn-other``."""
    net = _network()
    stublaps = bench_module("stublaps")
    ends = stublaps.DeadEnds(net)
    mouth = [v for v in ends.mouths if tuple(net.node_xy[v]) == (200.0, 0.0)]
    assert len(ends.mouths) == 1 and len(mouth) == 1
    stub = ends.mouths[mouth[0]][0]
    assert sum(float(net.seg_len[s]) for s in stub) == shapely.LineString(STUB).length
    e = seg_of(net, (150.0, 0.0), (200.0, 0.0))
    w = seg_of(net, (200.0, 0.0), (150.0, 0.0))
    into = [seg_of(net, (200.0, 0.0), (200.0, 6.0)), seg_of(net, (200.0, 6.0), (200.0, 10.0))]
    out = [seg_of(net, (200.0, 10.0), (200.0, 6.0)), seg_of(net, (200.0, 6.0), (200.0, 0.0))]
    assert ends.events([e, *into, *out, w]) == {("lap", mouth[0]): 1}
    assert ends.events([e, w]) == {("uturn-mouth", mouth[0]): 1}
    up = seg_of(net, (300.0, 0.0), (300.0, 40.0))
    down = seg_of(net, (300.0, 40.0), (300.0, 0.0))
    e2 = seg_of(net, (250.0, 0.0), (300.0, 0.0))
    w2 = seg_of(net, (300.0, 0.0), (250.0, 0.0))
    assert {k for k, _ in ends.events([e2, up, down, w2])} == {"uturn-deadend"}
    assert {k for k, _ in ends.events([e2, w2])} == {"uturn-other"}


def test_read_detail_splits_added_and_missed() -> None:
    """An episode that misses the stub's four segments and adds nothing: all its stub
    metres are missed (2 x shapely's length of the drawn stub), and it lies between
    fixes (no true segment of its fixes is in the spur)."""
    net = _network()
    stublaps = bench_module("stublaps")
    ends = stublaps.DeadEnds(net)
    segs = [seg_of(net, a, b) for a, b in [
        ((200.0, 0.0), (200.0, 6.0)), ((200.0, 6.0), (200.0, 10.0)),
        ((200.0, 10.0), (200.0, 6.0)), ((200.0, 6.0), (200.0, 0.0))]]
    e = seg_of(net, (150.0, 0.0), (200.0, 0.0))
    episode = {"added": [], "missed": segs, "added_m": 0.0, "missed_m": 20.0,
               "true_seg": [e, e], "final": [e, e]}
    got = stublaps.read_detail(ends, [episode])
    assert got["dead_end_segment_m"] == {"missed stub": 2 * shapely.LineString(STUB).length}
    assert got["missing_episodes"] == {"stub: between fixes": [1, 20.0]}
