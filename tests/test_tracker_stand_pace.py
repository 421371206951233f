"""``stand_pace``: a van that dwells in the middle of a road at 30 s between fixes and
leaves the way it came is committed as turning round where it stood.

Outside reference: shapely measures the committed route's length and places each
reported point on the road line it names and against its fix.
"""

from __future__ import annotations

import pytest
import shapely

from livematch.core.build import Road, network_from_roads
from livematch.core.events import Event
from livematch.core.settings import MatchSettings
from livematch.core.tracker import stand_step
from tests.catalogue import assert_answers_on_road, seg_of, track_points
from tests.catalogue import committed_path as path
from tests.catalogue import final_answers as finals

# A road north from S = (0, 0) through V = (0, 500), a plain point of the road (a vertex
# of degree two: no U-turn there but in the street), to W = (0, 530), a junction with a
# side road east, and on north. The van drives north at 4.7 m/s, stops at V, turns round
# there and drives back south.
S, V, W, N = (0.0, 0.0), (0.0, 500.0), (0.0, 530.0), (0.0, 1000.0)
NET = network_from_roads([Road([S, V, W, N], way=1), Road([W, (300.0, 530.0)], way=2)])
EPS = 15.0
DT = 30.0
ON = MatchSettings(stand_pace=True)
OFF = MatchSettings(stand_pace=False)
# a fix every 30 s; at the stand the first fix leans 5 m past V (a GNSS lean), the next
# 3 m short of it (the van has turned): a 8.9 m step in 30 s, within 2 sigma_m (10 m);
# then back south at 5 m/s
DWELL = [(1.0, 80.0), (-1.0, 220.0), (1.0, 360.0), (2.0, 505.0), (-2.0, 497.0),
         (1.0, 340.0), (-1.0, 180.0)]


IN, OUT = seg_of(NET, S, V), seg_of(NET, V, S)
ON_PAST_V, BACK_TO_V = seg_of(NET, V, W), seg_of(NET, W, V)


def run(settings: MatchSettings, pts: list[tuple[float, float]], dt: float = DT,
        restore_at: int | None = None) -> list[Event]:
    """Fixes ``pts`` ``dt`` seconds apart, then the end-of-log flush."""
    return track_points(NET, settings, pts, dt, restore_at)


def route_length(segs: list[int]) -> float:
    """The length of a committed route as shapely measures its polyline."""
    coords = [tuple(NET.node_xy[NET.seg_from[segs[0]]])]
    coords += [tuple(NET.node_xy[NET.seg_to[s]]) for s in segs]
    return float(shapely.LineString(coords).length)


def test_without_the_rule_the_stand_is_committed_past_v() -> None:
    """The case the rule is for: the bridge drives on to W and back during the stand
    (a U-turn in the street costs more), so the first stand fix lands on V -> W."""
    events = run(OFF, DWELL)
    got = finals(events)
    assert got[3 * DT][0] == ON_PAST_V
    assert path(events) == [IN, ON_PAST_V, BACK_TO_V, OUT]
    assert route_length(path(events)) == pytest.approx(1000.0 + 60.0)  # shapely


def test_rule_turns_round_where_the_van_stood() -> None:
    """With the rule the van is committed to V and back: every fix on the road in or out,
    at its own point of that road (shapely), within eps, the route 2 x 500 m long."""
    events = run(ON, DWELL)
    got = finals(events)
    assert path(events) == [IN, OUT]
    assert route_length(path(events)) == pytest.approx(1000.0)  # shapely
    assert [got[i * DT][0] for i in range(len(DWELL))] == [IN] * 4 + [OUT] * 3
    assert_answers_on_road(got, DWELL, DT, [S, V], EPS)  # shapely


def test_a_loop_between_fixes_far_apart_is_kept() -> None:
    """A vehicle whose fixes 30 s apart lie 60 m apart (more than 2 sigma_m) is not
    standing, whatever it drove between them: the rule changes nothing."""
    loop = [(1.0, 80.0), (-1.0, 220.0), (1.0, 360.0), (1.0, 470.0), (-1.0, 410.0),
            (1.0, 260.0)]
    assert run(ON, loop) == run(OFF, loop)


def test_dense_fixes_are_left_alone() -> None:
    """At 5 s between fixes (within gap_s) the rule never acts: the same stand, one fix
    every 5 s, gives the same events with and without it."""
    pts = ([(0.0, 400.0 + 5.0 * i) for i in range(20)] + [(1.0, 501.0)] * 8
           + [(0.0, 495.0 - 5.0 * i) for i in range(20)])
    assert run(ON, pts, 5.0) == run(OFF, pts, 5.0)


def test_restore_mid_stand_gives_the_same_events() -> None:
    """Checkpointed and restored at the stand's second fix: the same events (the rule
    keeps no state of its own)."""
    assert run(ON, DWELL, restore_at=4) == run(ON, DWELL)


def test_stand_step() -> None:
    """Which steps show a stand: sparse (over gap_s) and within the radius."""
    assert stand_step(30.0, 10.0, 10.0, 10.0)
    assert not stand_step(30.0, 10.5, 10.0, 10.0)
    assert not stand_step(10.0, 1.0, 10.0, 10.0)
    assert stand_step(15.0, 0.0, 10.0, 10.0)


def test_stand_pace_validation() -> None:
    """stand_pace must be a boolean, and is off by default."""
    assert not MatchSettings().stand_pace
    assert ("stand_pace", "must be true or false, got 1") in MatchSettings(
        stand_pace=1).problems()  # type: ignore[arg-type]
    assert MatchSettings(stand_pace=True).problems() == []
