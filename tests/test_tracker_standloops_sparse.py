"""``stand_loops_sparse``: a van that turns round in the middle of a road at 30 s between
fixes, where the next vertex the sweep may turn at lies within eps, is committed as
turning where it stood, not as driving on to that vertex and back.

Outside reference: shapely measures the committed route's length, places each reported
point on the road line it names and measures its distance to the fix.
"""

from __future__ import annotations

import pytest
import shapely

from livematch.core.build import Road, network_from_roads
from livematch.core.events import Assignment, Event
from livematch.core.network import RoadNetwork
from livematch.core.settings import MatchSettings
from tests.catalogue import assert_answers_on_road, path_line, seg_of, track_points
from tests.catalogue import committed_path as path
from tests.catalogue import final_answers as finals

# A road north from S = (0, 0) through V = (0, 500), a plain point of the road (a vertex
# of degree two: the sweep turns round there only in the street, at a charge), to W =
# (0, 510), a junction with a side road east, 10 m past V (within eps), and on north.
# The van drives north at about 4.7 m/s, stops at V, turns round there and drives back.
S, V, W, N = (0.0, 0.0), (0.0, 500.0), (0.0, 510.0), (0.0, 1000.0)
NET = network_from_roads([Road([S, V, W, N], way=1), Road([W, (300.0, 510.0)], way=2)])
# the same with the junction 30 m past V (beyond eps = 15 m)
FAR = network_from_roads([Road([S, V, (0.0, 530.0), N], way=1),
                          Road([(0.0, 530.0), (300.0, 530.0)], way=2)])
EPS = 15.0
DT = 30.0
ON = MatchSettings(stand_loops_sparse=True)
OFF = MatchSettings(stand_loops_sparse=False)
# a fix every 30 s; at the stand the first fix leans 4 m past V (a GNSS lean; nearer V
# than W), the next 3 m short of it (the van has turned); then back south at about 5 m/s
DWELL = [(1.0, 80.0), (-1.0, 220.0), (1.0, 360.0), (2.0, 504.0), (-2.0, 497.0),
         (1.0, 340.0), (-1.0, 180.0)]


IN, OUT = seg_of(NET, S, V), seg_of(NET, V, S)
ON_PAST_V, BACK_TO_V = seg_of(NET, V, W), seg_of(NET, W, V)


def run(settings: MatchSettings, pts: list[tuple[float, float]], dt: float = DT,
        restore_at: int | None = None, net: RoadNetwork = NET) -> list[Event]:
    """Fixes ``pts`` ``dt`` seconds apart, then the end-of-log flush."""
    return track_points(net, settings, pts, dt, restore_at)


def route_length(segs: list[int]) -> float:
    """The length of a committed route as shapely measures its polyline."""
    line = path_line(NET, segs)
    assert isinstance(line, shapely.LineString)
    return float(line.length)


def test_without_the_rule_the_stand_is_committed_past_v() -> None:
    """The case the rule is for: the path drives on to W and back (no U-turn at V), and
    the first stand fix lands on V -> W, a road the van never drove."""
    events = run(OFF, DWELL)
    assert finals(events)[3 * DT][0] == ON_PAST_V
    assert path(events) == [IN, ON_PAST_V, BACK_TO_V, OUT]
    assert route_length(path(events)) == pytest.approx(1000.0 + 20.0)  # shapely


def test_rule_turns_round_where_the_van_stood() -> None:
    """With the rule the van is committed to V and back: every fix on the road in or out,
    at a point of that road (shapely), within eps of its fix, the route 2 x 500 m."""
    events = run(ON, DWELL)
    got = finals(events)
    assert path(events) == [IN, OUT]
    assert route_length(path(events)) == pytest.approx(1000.0)  # shapely
    assert [got[i * DT][0] for i in range(len(DWELL))] == [IN] * 4 + [OUT] * 3
    assert_answers_on_road(got, DWELL, DT, [S, V], EPS)  # shapely
    # the stand's fix is reported at V, the end of the road in
    assert (got[3 * DT][2], got[3 * DT][3]) == pytest.approx(V)


def test_only_commits_change() -> None:
    """Live answers (the Assignment events) are the same with and without the rule."""
    def live(events: list[Event]) -> list[tuple[float, int]]:
        return [(e.t, e.segment) for e in events if isinstance(e, Assignment)]

    assert live(run(ON, DWELL)) == live(run(OFF, DWELL))
    assert len(live(run(ON, DWELL))) == len(DWELL)


def test_a_turning_vertex_beyond_eps_is_kept() -> None:
    """Where the next junction lies 30 m past V (beyond eps), the loop to it and back
    leaves the disc the fixes could not tell apart: the rule changes nothing."""
    assert run(ON, DWELL, net=FAR) == run(OFF, DWELL, net=FAR)


def test_a_turn_at_speed_keeps_the_loop() -> None:
    """A vehicle that drives on to W, turns round there and comes back at speed (steps of
    140-145 m in 30 s on both sides of the fix past V: no stand) keeps the loop to W."""
    pts = [(1.0, 80.0), (-1.0, 220.0), (1.0, 360.0), (2.0, 505.0), (-1.0, 365.0),
           (1.0, 225.0)]
    events = run(ON, pts)
    assert events == run(OFF, pts)
    assert path(events) == [IN, ON_PAST_V, BACK_TO_V, OUT]


def test_a_stand_nearer_the_junction_keeps_the_loop() -> None:
    """A van whose stand fix lies 7 m past V, nearer W (10 m past V) than V, stood at W:
    the loop to W and back is kept, as without the rule."""
    pts = [*DWELL[:3], (2.0, 507.0), *DWELL[4:]]
    events = run(ON, pts)
    assert events == run(OFF, pts)
    assert path(events) == [IN, ON_PAST_V, BACK_TO_V, OUT]


def test_dense_fixes_are_left_alone() -> None:
    """At 5 s between fixes the rule never acts: the same stand, one fix every 5 s,
    gives the same events with and without it."""
    pts = ([(0.0, 400.0 + 5.0 * i) for i in range(20)] + [(1.0, 501.0)] * 8
           + [(0.0, 495.0 - 5.0 * i) for i in range(20)])
    assert run(ON, pts, 5.0) == run(OFF, pts, 5.0)


def test_driving_through_is_left_alone() -> None:
    """A van that drives on north past V and W (no loop) gets the same events."""
    pts = [(1.0, 80.0 + 140.0 * i) for i in range(7)]
    assert run(ON, pts) == run(OFF, pts)


def test_restore_mid_stand_gives_the_same_events() -> None:
    """Checkpointed and restored at the stand's second fix: the same events (the rule
    keeps no state of its own)."""
    assert run(ON, DWELL, restore_at=4) == run(ON, DWELL)


def test_stand_loops_sparse_validation() -> None:
    """stand_loops_sparse must be a boolean, and is off by default."""
    assert not MatchSettings().stand_loops_sparse
    assert ("stand_loops_sparse", "must be true or false, got 1") in MatchSettings(
        stand_loops_sparse=1).problems()  # type: ignore[arg-type]
    assert MatchSettings(stand_loops_sparse=True).problems() == []
