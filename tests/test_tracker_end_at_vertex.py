"""``end_at_vertex``: the last fix of a 30 s log just past a vertex is reported at it.

Outside reference: shapely places each reported point on the road line it names, gives
the road's length (the offset of its end) and measures the point against its fix.
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
ON = MatchSettings(end_at_vertex=True)
OFF = MatchSettings(end_at_vertex=False)


# a van at 10 m/s along P, a fix every 30 s; it reaches V and stands there as the log
# ends (it will turn round there, or drive on later), its fix 4 m short of V, then its
# last fix leaning 6 m north of V, up S (a GNSS lean, as the simulator's correlated
# error makes)
DRIVE = [(-800.0, 1.0), (-500.0, -1.0), (-200.0, 1.0)]
NEAR = (96.0, 1.0)
LAST = (101.0, 6.0)
STAND = [*DRIVE, NEAR, LAST]


def run(settings: MatchSettings, pts: list[tuple[float, float]], dt: float = DT,
        restore_at: int | None = None) -> list[Event]:
    """Fixes ``pts`` ``dt`` seconds apart, then the end-of-log flush."""
    return track_points(NET, settings, pts, dt, restore_at)


def test_without_the_rule_the_last_fix_ends_on_s() -> None:
    """The case the rule is for: the flush commits the last fix onto S, never driven."""
    got = finals(run(OFF, STAND))
    assert got[3 * DT][0] == P_EAST
    assert got[4 * DT][0] == S_NORTH


def test_rule_reports_the_last_fix_at_v_on_p() -> None:
    """With the rule the last fix is at V, the end of P (shapely), within eps of its fix."""
    events = run(ON, STAND)
    got = finals(events)
    seg, offset, x, y = got[4 * DT]
    assert seg == P_EAST
    line_p = shapely.LineString(P)
    point = shapely.Point(x, y)
    assert point.distance(shapely.Point(line_p.coords[-1])) == pytest.approx(0.0, abs=1e-9)
    assert offset == pytest.approx(line_p.length, abs=1e-6)  # shapely: P's end
    assert point.distance(shapely.Point(LAST)) <= EPS  # shapely
    # only that answer moves: the path (on into S) and every other answer are kept
    base = run(OFF, STAND)
    assert path(events) == path(base)
    assert S_NORTH in path(events)
    assert {t: a for t, a in got.items() if t != 4 * DT} == {
        t: a for t, a in finals(base).items() if t != 4 * DT}


def test_one_last_fix_after_a_drive_is_kept() -> None:
    """One fix past V after a fix 300 m back is no stand: it stays on S."""
    got = finals(run(ON, [*DRIVE, LAST]))
    assert got[3 * DT][0] == S_NORTH
    assert got == finals(run(OFF, [*DRIVE, LAST]))


def test_two_last_fixes_past_v_both_move() -> None:
    """A stand of two fixes past V, 30 s apart, is reported at V for both."""
    pts = [*DRIVE, (101.0, 5.0), (102.0, 9.0)]
    base = finals(run(OFF, pts))
    assert [base[k * DT][0] for k in (3, 4)] == [S_NORTH, S_NORTH]
    got = finals(run(ON, pts))
    assert [got[k * DT][:2] for k in (3, 4)] == [(P_EAST, pytest.approx(1100.0))] * 2


def test_a_last_fix_beyond_eps_of_v_is_kept() -> None:
    """A last fix 25 m up S (beyond eps of V, shapely) keeps its answer on S."""
    far = (101.0, 25.0)
    assert shapely.Point(far).distance(shapely.Point(S[0])) > EPS  # shapely
    got = finals(run(ON, [*DRIVE, NEAR, far]))
    assert got[4 * DT][0] == S_NORTH
    assert got == finals(run(OFF, [*DRIVE, NEAR, far]))


def test_dense_fixes_are_left_alone() -> None:
    """At 1 s between fixes the key changes nothing (the stand rules decide there)."""
    pts = [(10.0 * i - 100.0, 1.0) for i in range(20)] + [(100.5, 1.0 + 0.5 * i)
                                                         for i in range(8)]
    assert run(ON, pts, dt=1.0) == run(OFF, pts, dt=1.0)


def test_driving_on_along_t_is_left_alone() -> None:
    """A van whose last fix is well along T keeps every answer."""
    pts = [*DRIVE, (96.0, 1.0), (250.0, 1.0)]
    assert finals(run(ON, pts)) == finals(run(OFF, pts))


def test_a_turn_round_at_v_is_left_alone() -> None:
    """A run entered from S's twin (a U-turn at V) is kept: P would be a road left."""
    tracker = Tracker(NET, "v", ON)
    for i, (x, y) in enumerate([(100.0, 60.0), (100.0, 10.0), (101.0, 4.0)]):
        tracker.update(Fix("v", DT * i, 0.0, 0.0, x, y))
    seq = tracker.fix_seq0 + 1
    a = Node(S_SOUTH, seq, DT, 70.0 / 80.0, 100.0, 10.0, None, (), 0.0, 0.0)
    b = Node(S_NORTH, seq + 1, 2 * DT, 4.0 / 80.0, 100.0, 4.0, a, (S_SOUTH,), 0.0, 0.0)
    answers = [MatchedFix(n.t, n.seg, n.pos * 80.0, n.x, n.y) for n in (a, b)]
    kept = list(answers)
    tracker._end_at_vertex([a, b], None, EPS, kept)
    assert kept == answers
    # the same last node entered from P instead: moved to V on P
    b.via = (P_EAST,)
    moved = list(answers)
    tracker._end_at_vertex([a, b], None, EPS, moved)
    assert moved[1].segment == P_EAST


def test_restore_before_the_last_fix_gives_the_same_outputs() -> None:
    """Checkpoint and restore at the last fix, then the flush: the same events."""
    assert run(ON, STAND, restore_at=4) == run(ON, STAND)


def test_end_at_vertex_validation() -> None:
    """end_at_vertex must be a boolean, and is on by default."""
    assert MatchSettings().end_at_vertex
    assert ("end_at_vertex", "must be true or false, got 1") in MatchSettings(
        end_at_vertex=1).problems()  # type: ignore[arg-type]
