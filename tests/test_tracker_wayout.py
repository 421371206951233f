"""``stand_way_out``: the road a vehicle left a stand by, chosen by the fixes after the
stand, through Tracker.update and Tracker.flush, checked with shapely's distances
(invented roads and fixes, plain data: a street with a side lane that leaves it at a
junction V and joins it again 40 m on, at B, "a diamond")."""

from __future__ import annotations

import itertools
import math

import pytest

from livematch.core.build import Road, network_from_roads
from livematch.core.network import RoadNetwork
from livematch.core.settings import MatchSettings
from livematch.core.wayout import way_out_of_stand
from tests.catalogue import committed_path, final_answers, path_line, path_ways, track_points

shapely = pytest.importorskip("shapely")

ON = MatchSettings(stand_way_out=True)
OFF = MatchSettings(stand_way_out=False)
EPS = 15.0
V = (0.0, 0.0)  # the junction where the van stands
B = (0.0, 40.0)  # where the lane joins the street again
STREET = 1
LANE = 2
# a lane out of V to the north-east, 5 m east of the street, back into it at B
LANE_LINE = [V, (4.0, 4.0), (5.0, 12.0), (5.0, 32.0), B]


def _network() -> RoadNetwork:
    """A two-way street from the south through V and B to the north (shape points every
    10 m), and the two-way lane from V to B."""
    return network_from_roads([
        Road([(0.0, float(y)) for y in range(-200, 201, 10)], way=STREET),
        Road(LANE_LINE, way=LANE),
    ])


def _approach() -> list[tuple[float, float]]:
    """North along the street at 10 m/s, slowing into V."""
    return [(0.5, -150.0 + 10.0 * i) for i in range(14)] + [(0.5, -8.0), (0.5, -3.0)]


def _stand(seconds: int = 30) -> list[tuple[float, float]]:
    """A stand at V whose GNSS error leans towards the lane (to about (4, 5), 6 m from V)
    and wanders by about half a metre from fix to fix (a slow, correlated drift, shaped
    like the simulator's Gauss-Markov error)."""
    out = []
    for i in range(seconds):
        f = min(1.0, i / 8.0)
        out.append((4.0 * f + 0.5 * math.sin(1.7 * i), 5.0 * f + 0.5 * math.cos(1.3 * i)))
    return out


def _north(lane: bool = False) -> list[tuple[float, float]]:
    """Out of the stand north at 5 m/s to B and on at 10 m/s: along the street, or, with
    ``lane``, along the lane."""
    if lane:
        line = shapely.LineString(LANE_LINE)
        off = [line.interpolate(5.0 * i) for i in range(1, int(line.length / 5.0) + 1)]
        out = [(p.x, p.y) for p in off]
    else:
        out = [(0.3, 5.0 * i) for i in range(1, 9)]
    return out + [(0.3, 40.0 + 10.0 * i) for i in range(1, 13)]


def test_a_stand_that_leaned_into_a_side_lane_leaves_by_the_street_it_drove() -> None:
    """The van stands 30 s at V with its error leaning towards the lane, then drives
    north along the street. Off, the stand draws the committed path into the lane (V to
    B by the lane); on, the path is the street all the way (the committed line lies on
    the street: shapely's covers, with 1e-6 m of slack), every fix from
    the stand on lies within eps of its answer, and the whole trace within Fréchet
    distance eps of the new path (shapely's discrete Fréchet distance, densified to
    0.5 m)."""
    net = _network()
    fixes = _approach() + _stand() + _north()
    old_ev = track_points(net, OFF, fixes)
    new_ev = track_points(net, ON, fixes)
    old_path, new_path = committed_path(old_ev), committed_path(new_ev)
    assert LANE in path_ways(net, old_path)  # the lane, without the rule
    assert LANE not in path_ways(net, new_path)
    for a, b in itertools.pairwise(new_path):
        assert int(net.seg_to[a]) == int(net.seg_from[b])  # connected
    street = shapely.LineString([(0.0, -200.0), (0.0, 200.0)])
    assert street.buffer(1e-6).covers(path_line(net, new_path))  # the path lies on the street
    assert path_line(net, new_path).buffer(1e-6).covers(shapely.LineString([(0.0, 0.0), B]))
    new = final_answers(new_ev)
    for i, (x, y) in enumerate(fixes):
        seg, _, ax, ay = new[float(i)]
        assert shapely.Point(x, y).distance(shapely.Point(ax, ay)) <= EPS
        if i >= len(_approach()):
            assert int(net.seg_way[seg]) == STREET
    trace = shapely.LineString(fixes)
    assert shapely.frechet_distance(trace, path_line(net, new_path), densify=0.5) <= EPS
    # the approach keeps its answers
    old = final_answers(old_ev)
    assert [new[float(i)] for i in range(10)] == [old[float(i)] for i in range(10)]


def test_a_van_that_leaves_by_the_lane_keeps_the_lane() -> None:
    """The same stand, then the van drives the lane to B: its fixes fit the lane, and the
    rule leaves the path and the answers as they were without it."""
    net = _network()
    fixes = _approach() + _stand() + _north(lane=True)
    old_ev = track_points(net, OFF, fixes)
    new_ev = track_points(net, ON, fixes)
    assert LANE in path_ways(net, committed_path(new_ev))
    assert committed_path(new_ev) == committed_path(old_ev)
    assert final_answers(new_ev) == final_answers(old_ev)


def test_no_stand_no_change() -> None:
    """Driving through V at 10 m/s with fixes leaning 4 m towards the lane (no stand):
    nothing changes."""
    net = _network()
    fixes = [(0.5, -150.0 + 10.0 * i) for i in range(15)] + [(3.0, 2.0 + 10.0 * i)
                                                             for i in range(4)]
    fixes += [(0.3, 40.0 + 10.0 * i) for i in range(1, 12)]
    old_ev = track_points(net, OFF, fixes)
    new_ev = track_points(net, ON, fixes)
    assert committed_path(new_ev) == committed_path(old_ev)
    assert final_answers(new_ev) == final_answers(old_ev)


def test_the_key_is_on_by_default() -> None:
    assert MatchSettings().stand_way_out is True
    assert MatchSettings(stand_way_out=1).problems() == [  # type: ignore[arg-type]
        ("stand_way_out", "must be true or false, got 1")]


def test_nothing_past_the_stand_returns_the_chain() -> None:
    """A chain that ends inside the stand is returned as it is (the same list)."""
    from livematch.core.sweep import Node
    from livematch.core.view import view_of

    net = _network()
    view = view_of(net)
    seg = next(s for s in range(net.n_segments) if int(net.seg_way[s]) == STREET
               and net.node_xy[net.seg_to[s]][1] == 0.0 and net.node_xy[net.seg_from[s]][1] < 0)
    a = Node(seg, 1, 0.0, 1.0, 0.0, 0.0, None, (), 0.0, 1.0)
    b = Node(seg, 2, 1.0, 1.0, 0.0, 0.0, a, (), 0.0, 1.0)
    chain = [b]
    assert way_out_of_stand(view, chain, a, EPS, 5.0, lambda n: (n.x, n.y),
                            lambda p, ns: True) is chain
