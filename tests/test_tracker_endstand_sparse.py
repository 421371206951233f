"""``end_stand_sparse``: a stand at the end of a 30 s log stays on the road it began on.

Outside reference: shapely places each reported point on the road line it names,
measures it against its fix and measures the committed route's length.
"""

from __future__ import annotations

import pytest
import shapely

from livematch.core.events import Event, MatchedFix
from livematch.core.fix import Fix
from livematch.core.settings import MatchSettings
from livematch.core.tracker import Node, Tracker
from tests.catalogue import committed_path as path
from tests.catalogue import corner, track_points
from tests.catalogue import final_answers as finals

# P runs east into V = (100, 0); S leaves V north to a dead end 80 m on; T leaves V east.
P, S, T, NET, P_EAST, S_NORTH, S_SOUTH, T_EAST = corner()
EPS = 15.0
DT = 30.0
# end_at_vertex (on by default) would also report this stand at V: left out, so that
# these tests see end_stand_sparse alone
ON = MatchSettings(end_stand_sparse=True, end_at_vertex=False)
OFF = MatchSettings(end_stand_sparse=False, end_at_vertex=False)



# a van at 10 m/s along P, a fix every 30 s; it stops 3 m short of V and the log ends
# while it stands, its last fix leaning 5.5 m north (up S: a GNSS lean, as the
# simulator's correlated error makes) within 10 m (2 sigma_m) of the one before
STAND = [(-800.0, 1.0), (-500.0, -1.0), (-200.0, 1.0), (97.0, 1.0), (99.5, 5.5)]


def run(settings: MatchSettings, pts: list[tuple[float, float]],
        restore_at: int | None = None) -> list[Event]:
    """Fixes ``pts`` 30 s apart, then the end-of-log flush."""
    return track_points(NET, settings, pts, DT, restore_at)


def test_without_the_rule_the_last_fix_ends_on_s() -> None:
    """The case the rule is for: the flush commits the last fix onto S, never driven."""
    got = finals(run(OFF, STAND))
    assert got[3 * DT][0] == P_EAST
    assert got[4 * DT][0] == S_NORTH


def test_rule_reports_the_last_fix_on_p() -> None:
    """With the rule the last fix is on P where its fix projects (shapely), within eps."""
    events = run(ON, STAND)
    got = finals(events)
    line_p = shapely.LineString(P)
    seg, offset, x, y = got[4 * DT]
    assert seg == P_EAST
    point = shapely.Point(x, y)
    assert line_p.distance(point) == pytest.approx(0.0, abs=1e-9)  # shapely
    fix = shapely.Point(STAND[-1])
    assert point.distance(line_p.interpolate(line_p.project(fix))) == pytest.approx(
        0.0, abs=1e-6)  # shapely: the point of P nearest the fix
    assert point.distance(shapely.Point(STAND[-1])) <= EPS  # shapely
    assert offset == pytest.approx(line_p.project(point), abs=1e-6)  # shapely
    # only that answer moves: the path and every other answer are the rule off's
    base = run(OFF, STAND)
    assert path(events) == path(base)
    assert {t: a for t, a in got.items() if t != 4 * DT} == {
        t: a for t, a in finals(base).items() if t != 4 * DT}


def test_dense_stands_are_end_stands_own() -> None:
    """At 1 s between fixes the key changes nothing (``end_stand`` decides there)."""
    tracker_pts = [(10.0 * i - 100.0, 1.0) for i in range(20)] + [
        (99.0 + 0.1 * (i % 3), 1.0 + min(i, 14) * 0.5) for i in range(30)]

    def dense(settings: MatchSettings) -> list[Event]:
        tracker = Tracker(NET, "v", settings)
        events: list[Event] = []
        for i, (x, y) in enumerate(tracker_pts):
            events += tracker.update(Fix("v", float(i), 0.0, 0.0, x, y))
        return events + tracker.flush()

    assert dense(ON) == dense(OFF)


def test_moving_on_at_the_end_is_left_alone() -> None:
    """A van that drives on east along T at the end of the log keeps its answers."""
    moving = [*STAND[:4], (250.0, 1.0), (400.0, -1.0)]
    assert finals(run(ON, moving)) == finals(run(OFF, moving))


def _loop_chain() -> tuple[Tracker, list[Node], list[MatchedFix]]:
    """Nodes of a vehicle whose last two fixes (30 s apart, 7 m from each other) the path
    joins by a trip up S to its dead end and back onto T: a loop, not a stand."""
    tracker = Tracker(NET, "v", ON)
    for i, (x, y) in enumerate(STAND[:3]):
        tracker.update(Fix("v", DT * i, 0.0, 0.0, x, y))
    last = [(97.0, 1.0), (104.0, 2.0)]
    for k, (x, y) in enumerate(last):
        tracker.update(Fix("v", DT * (3 + k), 0.0, 0.0, x, y))
    seq = tracker.fix_seq0 + tracker.fix_n - 2
    len_p = float(NET.seg_len[P_EAST])
    a = Node(P_EAST, seq, 3 * DT, (len_p - 3.0) / len_p, 97.0, 0.0, None, (), 0.0, 0.0)
    b = Node(T_EAST, seq + 1, 4 * DT, 4.0 / 300.0, 104.0, 0.0, a, (S_NORTH, S_SOUTH),
             0.0, 0.0)
    answers = [MatchedFix(n.t, n.seg, n.pos * float(NET.seg_len[n.seg]), n.x, n.y)
               for n in (a, b)]
    return tracker, [a, b], answers


def test_loop_between_the_last_fixes_is_left_alone() -> None:
    """Fixes within 10 m whose path went round 167 m (shapely) are no stand: kept."""
    tracker, chain, answers = _loop_chain()
    route = (shapely.LineString([(97.0, 0.0), P[1]]).length
             + 2 * shapely.LineString(S).length
             + shapely.LineString([T[0], (104.0, 0.0)]).length)  # shapely
    assert route == pytest.approx(167.0)
    assert not tracker._short_sparse_stand(chain)
    kept = list(answers)
    tracker._end_stand(chain, None, EPS, kept)
    assert kept == answers
    # the same two nodes joined by a 7 m step instead (a stand): the rule acts
    chain[1].via = ()
    stood = list(answers)
    tracker._end_stand(chain, None, EPS, stood)
    assert stood[1].segment == P_EAST


def test_restore_mid_stand_gives_the_same_outputs() -> None:
    """Checkpoint and restore at the stand's first fix, then the flush: the same events."""
    assert run(ON, STAND, restore_at=4) == run(ON, STAND)


def test_end_stand_sparse_validation() -> None:
    """end_stand_sparse must be a boolean, and is on by default."""
    assert MatchSettings().end_stand_sparse
    assert ("end_stand_sparse", "must be true or false, got 1") in MatchSettings(
        end_stand_sparse=1).problems()  # type: ignore[arg-type]
