"""The join between committed stretches: its length bound (``MatchSettings.join_detour``)."""

from __future__ import annotations

import itertools
import math

import networkx as nx
import pytest
from catalogue import grid

from livematch.core.build import Road, network_from_roads
from livematch.core.network import RoadNetwork
from livematch.core.routing import connect
from livematch.core.settings import MatchSettings
from livematch.core.sweep import Node
from livematch.core.tracker import Tracker
from livematch.core.view import view_of


def _segment(net: RoadNetwork, a: tuple[float, float], b: tuple[float, float]) -> int:
    """The directed segment from point ``a`` to point ``b`` of a small network."""
    xy = net.node_xy.tolist()
    ia, ib = xy.index(list(a)), xy.index(list(b))
    for s in range(net.n_segments):
        if int(net.seg_from[s]) == ia and int(net.seg_to[s]) == ib:
            return s
    raise AssertionError(f"no segment {a} -> {b}")


def _one_way_block() -> RoadNetwork:
    """A 100 m square block of one-way streets, anticlockwise, shape points every 10 m."""
    corners = [(0.0, 0.0), (100.0, 0.0), (100.0, 100.0), (0.0, 100.0), (0.0, 0.0)]
    roads = []
    for way, ((ax, ay), (bx, by)) in enumerate(itertools.pairwise(corners), 1):
        roads.append(Road([(ax + (bx - ax) * i / 10, ay + (by - ay) * i / 10)
                           for i in range(11)], way=way, oneway=True))
    return network_from_roads(roads)


def test_join_limit_without_join_detour_is_the_speed_bound() -> None:
    """With ``join_detour`` 0 the bound is bridge_speed_mps x dt + 2 x the largest eps, the
    straight distance between the two points aside: 40 x 15 + 2 x 60 = 720 m."""
    tracker = Tracker(grid(n=2, block=100.0, step=10.0), "v1", MatchSettings(join_detour=0.0))
    assert tracker._join_limit(15.0, 20.0) == 720.0
    assert tracker._join_limit(15.0) == 720.0


def test_join_limit_with_join_detour_follows_the_straight_distance() -> None:
    """With ``join_detour`` 2 two points 20 m apart may be joined by at most 2 x 20 + 2 x 15
    = 70 m, never more than the speed bound (far apart: 720 m at 15 s)."""
    tracker = Tracker(grid(n=2, block=100.0, step=10.0), "v1", MatchSettings(join_detour=2.0))
    assert tracker._join_limit(15.0, 20.0) == 70.0
    assert tracker._join_limit(15.0, 1000.0) == 720.0
    assert tracker._join_limit(15.0, 0.0) == 30.0  # the same point: slack only


def test_join_detour_refuses_a_loop_back_to_a_point_overshot() -> None:
    """On a 100 m square block of one-way streets, a stretch committed up to 50 m along the
    south side and a next stretch that begins 20 m behind it, 15 s later, are joined only
    round the whole block (380 m, networkx's shortest path): within the speed bound
    (720 m), so with ``join_detour`` 0 the path re-drives the loop; with ``join_detour`` 2 the bound
    is 70 m and the path breaks instead, as it does where the vehicle jumped."""
    net = _one_way_block()
    view = view_of(net)
    seg_from = _segment(net, (50.0, 0.0), (60.0, 0.0))  # last committed point: x = 50
    seg_to = _segment(net, (30.0, 0.0), (40.0, 0.0))  # the next stretch: x = 30
    last = (seg_from, 0.0, 7, 1_700_000_000.0)
    first = Node(seg_to, 8, 1_700_000_015.0, 0.0, 30.0, 0.0, None, (), 0.0, 0.0)
    route_default = connect(view, seg_from, 0.0, seg_to, 0.0,
                            Tracker(net, "v1", MatchSettings(join_detour=0.0))
                            ._join_limit_to(last, first))
    assert route_default is not None
    loop = sum(float(net.seg_len[s]) for s in route_default) + 10.0  # + the rest of seg_from
    # outside check (networkx): the shortest route from x = 50 east round the block to x = 30
    g = nx.DiGraph()
    for s in range(net.n_segments):
        g.add_edge(int(net.seg_from[s]), int(net.seg_to[s]), length=float(net.seg_len[s]))
    xy = net.node_xy.tolist()
    around = nx.shortest_path_length(g, xy.index([60.0, 0.0]), xy.index([30.0, 0.0]),
                                     weight="length")
    assert loop == pytest.approx(around + 10.0) == pytest.approx(380.0)
    tracker = Tracker(net, "v1", MatchSettings(join_detour=2.0))
    limit = tracker._join_limit_to(last, first)
    assert limit == pytest.approx(2.0 * math.hypot(50.0 - 30.0, 0.0) + 30.0)
    assert connect(view, seg_from, 0.0, seg_to, 0.0, limit) is None


def test_join_detour_keeps_a_join_along_the_road() -> None:
    """A next stretch 40 m ahead along the same road is joined as before with
    ``join_detour`` 2 (the route, 40 m, is the straight distance)."""
    net = grid(n=2, block=100.0, step=10.0)
    view = view_of(net)
    seg_from = _segment(net, (20.0, 0.0), (30.0, 0.0))
    seg_to = _segment(net, (60.0, 0.0), (70.0, 0.0))
    last = (seg_from, 0.0, 7, 1_700_000_000.0)
    first = Node(seg_to, 8, 1_700_000_015.0, 0.0, 60.0, 0.0, None, (), 0.0, 0.0)
    tracker = Tracker(net, "v1", MatchSettings(join_detour=2.0))
    route = connect(view, seg_from, 0.0, seg_to, 0.0, tracker._join_limit_to(last, first))
    assert route == [_segment(net, (30.0, 0.0), (40.0, 0.0)),
                     _segment(net, (40.0, 0.0), (50.0, 0.0)),
                     _segment(net, (50.0, 0.0), (60.0, 0.0))]


def test_join_detour_validated() -> None:
    """join_detour is a number >= 0 (0 turns the bound off); a negative one is refused."""
    assert MatchSettings(join_detour=0.0).problems() == []
    assert MatchSettings(join_detour=-1.0).problems() == [
        ("join_detour", "must be a number >= 0, got -1.0")]
    with pytest.raises(ValueError, match=r"matcher\.join_detour must be a number >= 0"):
        Tracker(grid(), "v1", MatchSettings(join_detour=math.nan))
