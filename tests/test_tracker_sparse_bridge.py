"""``sparse_bridge_m``: at sparse fixes the deciding level bridges only to close roads.

Invented data: two straight two-way roads 10 m apart (y = 0 and y = 10, 1 km long),
joined at both ends; a vehicle drives along the lower one at 10 m/s. Distances of the
candidates to the fixes are checked with shapely (an outside reference for the geometry).
"""

from __future__ import annotations

import pytest

from livematch.core.build import Road, network_from_roads
from livematch.core.fix import Fix
from livematch.core.network import RoadNetwork
from livematch.core.settings import MatchSettings
from livematch.core.tracker import Tracker
from livematch.core.view import view_of

shapely = pytest.importorskip("shapely")

ROADS = {1: [(0.0, 0.0), (500.0, 0.0), (1000.0, 0.0)],
         2: [(0.0, 10.0), (500.0, 10.0), (1000.0, 10.0)],
         3: [(0.0, 0.0), (0.0, 10.0)],
         4: [(1000.0, 0.0), (1000.0, 10.0)]}


def _network() -> RoadNetwork:
    return network_from_roads([Road(pts, way=w) for w, pts in ROADS.items()])


def _run(settings: MatchSettings, fixes: list[Fix]) -> tuple[Tracker, list[object]]:
    tracker = Tracker(_network(), "v", settings)
    events = [e for f in fixes for e in tracker.update(f)]
    return tracker, events


def _live_ways(tracker: Tracker) -> set[int]:
    tree = tracker.levels[0].tree
    nodes, _ = tree.live_nodes(view_of(tracker.network))
    return {int(tracker.network.seg_way[n.seg]) for n in nodes.values()}


def _fixes(dt: float, ys: list[float]) -> list[Fix]:
    return [Fix("v", 1e9 + dt * i, 0.0, 0.0, 100.0 + 10.0 * dt * i, y)
            for i, y in enumerate(ys)]


def test_sparse_step_offers_only_close_roads() -> None:
    # 15 s apart, 3 m off the lower road: the upper one is 7 m away, inside eps 15
    fixes = _fixes(15.0, [3.0, 3.0, 3.0, 3.0])
    lower = shapely.LineString(ROADS[1])
    upper = shapely.LineString(ROADS[2])
    last = shapely.Point(fixes[-1].x, fixes[-1].y)
    # shapely: both roads lie within the smallest eps (15 m) of the fix, only one within 5
    assert last.distance(lower) == pytest.approx(3.0)
    assert last.distance(upper) == pytest.approx(7.0)
    plain, _ = _run(MatchSettings(), fixes)
    assert _live_ways(plain) >= {1, 2}
    narrow, events = _run(MatchSettings(sparse_bridge_m=5.0), fixes)
    assert _live_ways(narrow) == {1}
    # the certificate is the level's own: eps 15, as without the rule
    assert {e.eps_m for e in events if e.kind == "assignment"} == {15.0}


def test_falls_back_to_eps_when_nothing_is_that_close() -> None:
    # 5 m off both roads: nothing within 4 m, so the level bridges within eps as before
    fixes = _fixes(15.0, [3.0, 3.0, 5.0])
    # shapely: the last fix is 5 m from each road
    last = shapely.Point(fixes[-1].x, fixes[-1].y)
    assert last.distance(shapely.LineString(ROADS[1])) == pytest.approx(5.0)
    assert last.distance(shapely.LineString(ROADS[2])) == pytest.approx(5.0)
    tracker, _ = _run(MatchSettings(sparse_bridge_m=4.0), fixes)
    # the tree went on (no fresh start at the last fix, which would have found both
    # roads) by a bridge within eps: to the lower road, the one the candidates reach
    # (the upper one only by a detour round an end, beyond the bridge's reach)
    assert tracker.levels[0].tree_seq == 1
    assert _live_ways(tracker) == {1}
    assert tracker.levels[0].cert_seq == 3


def test_dense_fixes_unchanged() -> None:
    # 1 s apart: no step is a gap, the rule cannot act; every event is the same
    fixes = _fixes(1.0, [3.0 + 0.1 * (i % 5) for i in range(40)])
    base = Tracker(_network(), "v", MatchSettings())
    rule = Tracker(_network(), "v", MatchSettings(sparse_bridge_m=5.0))
    a = [e for f in fixes for e in base.update(f)] + base.flush()
    b = [e for f in fixes for e in rule.update(f)] + rule.flush()
    assert a == b


def test_validation() -> None:
    assert ("sparse_bridge_m" in dict(MatchSettings(sparse_bridge_m=-1.0).problems()))
    assert not MatchSettings(sparse_bridge_m=10.0).problems()
    keys = MatchSettings.keys()
    assert "sparse_bridge_m" in keys
