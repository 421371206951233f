"""``pace_detour``: at 30 s between fixes a vehicle going round a turning loop shorter
than one step's drive is committed going round the way it drove, not the other way at
a crawl.

Outside reference: shapely measures the loop and places each driven point on it
(``line_interpolate_point``); the fixes lie on the driven line, so which way round the
vehicle went is fixed by the simulated motion alone.
"""

from __future__ import annotations

import pytest
import shapely

from livematch.core.build import Road, network_from_roads
from livematch.core.events import Event
from livematch.core.settings import MatchSettings
from tests.catalogue import final_answers as finals
from tests.catalogue import track_points

# A road from E = (600, 0) west to J = (0, 0), where a one-lane turning loop of 200 m
# (a 50 m square) hangs: J -> A = (-50, 0) -> B = (-50, -50) -> C = (0, -50) -> J. The
# road goes on straight into J -> A, so driving on straight goes round counter-clockwise
# (keeping the loop's island on the left, as right-hand traffic turns round one).
E, J, A, B, C = (600.0, 0.0), (0.0, 0.0), (-50.0, 0.0), (-50.0, -50.0), (0.0, -50.0)
NET = network_from_roads([Road([E, (300.0, 0.0), J], way=1), Road([J, A, B, C, J], way=2)])
DT = 30.0
ROAD_MPS, LOOP_MPS, LAPS = 8.0, 5.0, 4
ON = MatchSettings(pace_detour=True)
OFF = MatchSettings(pace_detour=False)


def seg_of(a: tuple[float, float], b: tuple[float, float]) -> int:
    """The directed segment from ``a`` to ``b``."""
    for s in range(NET.n_segments):
        if (tuple(NET.node_xy[NET.seg_from[s]]) == a
                and tuple(NET.node_xy[NET.seg_to[s]]) == b):
            return s
    raise LookupError((a, b))


ROUND = {seg_of(J, A), seg_of(A, B), seg_of(B, C), seg_of(C, J)}  # counter-clockwise
BACK = {seg_of(A, J), seg_of(B, A), seg_of(C, B), seg_of(J, C)}   # clockwise


def drive() -> list[tuple[float, float]]:
    """A fix every 30 s on the driven line: in at 8 m/s, four laps at 5 m/s (150 m per
    fix, three quarters of a lap), out at 8 m/s (points by shapely)."""
    line = shapely.LineString([E, J] + [A, B, C, J] * LAPS + [E])
    loop = 200.0 * LAPS
    t_in = 600.0 / ROAD_MPS
    t_out = t_in + loop / LOOP_MPS
    end = t_out + 600.0 / ROAD_MPS
    pts = []
    t = 0.0
    while t <= end:
        if t <= t_in:
            s = ROAD_MPS * t
        elif t <= t_out:
            s = 600.0 + LOOP_MPS * (t - t_in)
        else:
            s = 600.0 + loop + ROAD_MPS * (t - t_out)
        p = line.interpolate(s)
        pts.append((p.x, p.y))
        t += DT
    return pts


def in_loop(pts: list[tuple[float, float]]) -> list[int]:
    """Indices of the fixes inside the loop (west of J), the first one left out: its
    step enters the loop and is decided by the route in, not by the laps."""
    inside = [i for i, (x, y) in enumerate(pts) if x < -1e-6 or (x < 1e-6 and y < -1e-6)]
    return inside[1:]


def run(settings: MatchSettings, restore_at: int | None = None) -> list[Event]:
    """The loop drive, then the end-of-log flush."""
    return track_points(NET, settings, drive(), DT, restore_at)


def test_drive_is_three_quarters_of_a_lap_per_fix() -> None:
    """The scenario: the loop is 200 m round (shapely), a step in it 150 m of driving."""
    assert shapely.LineString([J, A, B, C, J]).length == pytest.approx(200.0)
    assert LOOP_MPS * DT == pytest.approx(0.75 * 200.0)
    assert len(in_loop(drive())) == 4


def test_without_the_rule_the_loop_is_committed_the_other_way() -> None:
    """The case the rule is for: the route term charges the true way for its 150 m
    routes against chords of 50 m or less, so the crawl the other way wins."""
    pts = drive()
    got = finals(run(OFF))
    assert all(got[DT * i][0] in BACK for i in in_loop(pts))


def test_rule_commits_the_way_round_it_drove() -> None:
    """With the rule every fix in the loop after the first is answered going round
    counter-clockwise, at its own point (within eps of its fix)."""
    pts = drive()
    got = finals(run(ON))
    for i in in_loop(pts):
        seg, _, x, y = got[DT * i]
        assert seg in ROUND
        assert shapely.Point(x, y).distance(shapely.Point(pts[i])) <= ON.eps_levels[0]


def test_rule_leaves_dense_fixes_alone() -> None:
    """At 5 s between fixes no step is a gap: every event is the same with the key."""
    line = shapely.LineString([E, J, A, B, C, J, E])
    walk = [(p.x, p.y) for p in (line.interpolate(8.0 * 5.0 * k) for k in range(33))]
    assert track_points(NET, ON, walk, 5.0) == track_points(NET, OFF, walk, 5.0)


def test_rule_restored_mid_loop_continues_the_same() -> None:
    """A checkpoint and restore mid-loop gives exactly the events of an unbroken run."""
    assert run(ON, restore_at=6) == run(ON)


def test_rule_validation() -> None:
    """The key takes true or false only."""
    assert ("pace_detour", "must be true or false, got 1") in MatchSettings(
        pace_detour=1).problems()  # type: ignore[arg-type]
