"""A shared catalogue of small road graphs and traces (metres), degenerate ones included."""

from __future__ import annotations

import importlib.util
import itertools
import sys
from pathlib import Path
from types import ModuleType

import numpy as np

from livematch.core.build import Road, network_from_roads
from livematch.core.events import Commit, Event
from livematch.core.fix import Fix
from livematch.core.network import RoadNetwork
from livematch.core.settings import MatchSettings
from livematch.core.tracker import Tracker


def straight_road(length: float = 1000.0, step: float = 50.0, oneway: bool = False) -> RoadNetwork:
    """One east-west road from (0, 0), shape points every ``step`` metres."""
    xs = np.arange(0.0, length + step / 2, step)
    return network_from_roads([Road([(float(x), 0.0) for x in xs], way=1, oneway=oneway,
                                    name="Long Street")])


def grid(n: int = 5, block: float = 200.0, step: float = 50.0) -> RoadNetwork:
    """An n x n grid of two-way streets; rows are ways 1, 3, 5...; columns 2, 4, 6..."""
    roads = []
    way = 1
    span = (n - 1) * block
    for i in range(n):
        pts = np.arange(0.0, span + step / 2, step)
        roads.append(Road([(float(x), i * block) for x in pts], way=way, name=f"Row {i}"))
        roads.append(Road([(i * block, float(y)) for y in pts], way=way + 1, name=f"Col {i}"))
        way += 2
    return network_from_roads(roads)


def oneway_pair(gap: float = 60.0) -> RoadNetwork:
    """Two parallel one-way roads ``gap`` metres apart: way 1 eastbound at y=0, way 2
    westbound at y=gap, joined at both ends by two-way connectors (ways 3 and 4)."""
    east = Road([(float(x), 0.0) for x in range(0, 1001, 50)], way=1, oneway=True)
    west = Road([(float(x), gap) for x in range(1000, -1, -50)], way=2, oneway=True)
    left = Road([(0.0, 0.0), (0.0, gap)], way=3)
    right = Road([(1000.0, 0.0), (1000.0, gap)], way=4)
    return network_from_roads([east, west, left, right])


def dead_end() -> RoadNetwork:
    """A main road (way 1, y=0) with a 300 m two-way cul-de-sac north (way 2) at x=500."""
    main = Road([(float(x), 0.0) for x in range(0, 1001, 50)], way=1)
    spur = Road([(500.0, float(y)) for y in range(0, 301, 50)], way=2)
    return network_from_roads([main, spur])


def fixes_along(points: list[tuple[float, float]], t0: float = 1_700_000_000.0,
                dt: float = 1.0, vehicle: str = "v1") -> list[Fix]:
    """Fixes at the given points (metres), one every ``dt`` seconds; lon/lat left at 0."""
    return [Fix(vehicle, t0 + i * dt, 0.0, 0.0, float(x), float(y))
            for i, (x, y) in enumerate(points)]


def polyline_points(coords: list[tuple[float, float]], spacing: float) -> list[tuple[float, float]]:
    """Points every ``spacing`` metres along a polyline (its last point included)."""
    out: list[tuple[float, float]] = []
    carry = 0.0
    for (ax, ay), (bx, by) in itertools.pairwise(coords):
        length = float(np.hypot(bx - ax, by - ay))
        d = carry
        while d < length:
            f = d / length
            out.append((ax + f * (bx - ax), ay + f * (by - ay)))
            d += spacing
        carry = d - length
    out.append(coords[-1])
    return out


def bench_module(name: str) -> ModuleType:
    """``bench/<name>.py`` loaded once as module ``bench_<name>`` (bench/ is no package)."""
    key = f"bench_{name}"
    if key not in sys.modules:
        path = Path(__file__).resolve().parent.parent / "bench" / f"{name}.py"
        spec = importlib.util.spec_from_file_location(key, path)
        assert spec is not None and spec.loader is not None
        module = importlib.util.module_from_spec(spec)
        sys.modules[key] = module
        spec.loader.exec_module(module)
    return sys.modules[key]


def track_points(net: RoadNetwork, settings: MatchSettings, pts: list[tuple[float, float]],
                 dt: float = 1.0, restore_at: int | None = None) -> list[Event]:
    """Vehicle "v" fed ``pts`` (metres) ``dt`` seconds apart from t = 0, then the
    end-of-log flush; at fix ``restore_at`` the tracker is checkpointed and restored."""
    tracker = Tracker(net, "v", settings)
    events: list[Event] = []
    for i, (x, y) in enumerate(pts):
        if i == restore_at:
            tracker = Tracker.from_bytes(net, settings, tracker.to_bytes())
        events += tracker.update(Fix("v", dt * i, 0.0, 0.0, x, y))
    return events + tracker.flush()


def final_answers(events: list[Event]) -> dict[float, tuple[int, float, float, float]]:
    """Each committed fix's final answer by fix time: (segment, offset_m, x, y)."""
    out = {}
    for e in events:
        if isinstance(e, Commit):
            for f in e.fixes:
                out[f.t] = (f.segment, f.offset_m, f.x, f.y)
    return out


def assert_answers_on_road(answers: dict[float, tuple[int, float, float, float]],
                           pts: list[tuple[float, float]], dt: float,
                           road: list[tuple[float, float]], eps: float) -> None:
    """Each fix ``pts[i]`` (at ``i * dt`` s) has its final answer on the line ``road``
    (shapely distance 0), within ``eps`` of the fix (shapely), at an offset inside it."""
    import shapely  # only the tests that compare geometry need it

    line = shapely.LineString(road)
    for i, (fx, fy) in enumerate(pts):
        _, offset, x, y = answers[i * dt]
        point = shapely.Point(x, y)
        assert line.distance(point) <= 1e-9  # shapely
        assert point.distance(shapely.Point(fx, fy)) <= eps  # shapely
        assert 0.0 <= offset <= line.length + 1e-9


def committed_path(events: list[Event]) -> list[int]:
    """The committed path's segments, all commits in order."""
    return [s for e in events if isinstance(e, Commit) for s in e.path]


def path_ways(net: RoadNetwork, path: list[int]) -> list[int]:
    """The OpenStreetMap-style way id of each directed segment of ``path``."""
    return [int(net.seg_way[s]) for s in path]


def path_line(net: RoadNetwork, path: list[int]) -> object:
    """The committed path as one shapely line (each segment's end is the next one's start)."""
    import shapely  # only the tests that compare geometry need it

    xy = net.node_xy
    pts = [tuple(map(float, xy[net.seg_from[path[0]]]))]
    pts += [tuple(map(float, xy[net.seg_to[s]])) for s in path]
    return shapely.LineString(pts)


def seg_of(net: RoadNetwork, a: tuple[float, float], b: tuple[float, float]) -> int:
    """The directed segment of ``net`` from node ``a`` to node ``b`` (exact coordinates)."""
    for s in range(net.n_segments):
        if (tuple(net.node_xy[net.seg_from[s]]) == a
                and tuple(net.node_xy[net.seg_to[s]]) == b):
            return s
    raise LookupError((a, b))


Line = list[tuple[float, float]]


def corner() -> tuple[Line, Line, Line, RoadNetwork, int, int, int, int]:
    """A corner for the end-of-log rules at sparse fixes, and its directed segments.

    P runs east into V = (100, 0); S leaves V north to a dead end 80 m on; T leaves V
    east (ways 1, 2, 3). Returns ``P, S, T, net, P east, S north, S south, T east``.
    """
    p = [(-1000.0, 0.0), (100.0, 0.0)]
    s = [(100.0, 0.0), (100.0, 80.0)]
    t = [(100.0, 0.0), (400.0, 0.0)]
    net = network_from_roads([Road(p, way=1), Road(s, way=2), Road(t, way=3)])
    return (p, s, t, net, seg_of(net, p[0], p[1]), seg_of(net, s[0], s[1]),
            seg_of(net, s[1], s[0]), seg_of(net, t[0], t[1]))
