"""``start_stand``: a stand at the start of the log is reported on the road it left by.

Outside reference: shapely places each reported point on the road line it names and
measures it against its fix.
"""

from __future__ import annotations

import itertools

import pytest
import shapely

from livematch.core.build import Road, network_from_roads
from livematch.core.events import Event, MatchedFix
from livematch.core.fix import Fix
from livematch.core.settings import MatchSettings
from livematch.core.sweep import Node
from livematch.core.tracker import Tracker
from tests.catalogue import committed_path as path
from tests.catalogue import final_answers as finals
from tests.catalogue import track_points

# Q comes north into V = (100, 0); T leaves V east. A vehicle stands at V when its log
# begins, its fixes leaning 4-7 m south (onto Q, a road it never drove), then it drives
# off east along T.
Q = [(100.0, -80.0), (100.0, 0.0)]
T = [(100.0, 0.0), (300.0, 0.0)]
NET = network_from_roads([Road(Q, way=1), Road(T, way=2)])
EPS = 15.0
SEG_Q, SEG_T = 0, 2  # the forward directions of the two roads (network_from_roads order)

# 20 s standing with the error leaning south, then 8 m/s east along T
STAND = [(100.0 + 0.3 * (i % 3), -4.0 - 0.15 * i) for i in range(20)]
DRIVE = [(100.0 + 8.0 * i, 0.5) for i in range(1, 16)]


def run(settings: MatchSettings, pts: list[tuple[float, float]], dt: float = 1.0,
        restore_at: int | None = None) -> list[Event]:
    """Fixes ``pts`` ``dt`` seconds apart, then the flush; optionally restored mid-way."""
    return track_points(NET, settings, pts, dt, restore_at)


def test_segments_of_the_network_are_as_assumed() -> None:
    """Q's and T's forward segments are the ones the tests name (shapely lines)."""
    for seg, line in ((SEG_Q, Q), (SEG_T, T)):
        ax, ay, bx, by = NET.segment_coords(seg)
        assert [(ax, ay), (bx, by)] == line


def test_without_the_rule_the_stand_is_on_q() -> None:
    """The case the rule is for: the first commit puts the stand on Q, a road not driven."""
    events = run(MatchSettings(start_stand=False), STAND + DRIVE)
    got = finals(events)
    assert {got[float(t)][0] for t in range(20)} == {SEG_Q}
    assert path(events)[:2] == [SEG_Q, SEG_T]


def test_start_stand_reports_the_stand_on_t() -> None:
    """With the rule every stand fix is on T (shapely), within eps of its fix; path from T."""
    events = run(MatchSettings(start_stand=True), STAND + DRIVE)
    got = finals(events)
    line_t = shapely.LineString(T)
    for i, (fx, fy) in enumerate(STAND):
        seg, offset, x, y = got[float(i)]
        assert seg == SEG_T
        point = shapely.Point(x, y)
        assert line_t.distance(point) == pytest.approx(0.0, abs=1e-9)  # shapely
        assert point.distance(shapely.Point(fx, fy)) <= EPS  # shapely
        assert offset == pytest.approx(line_t.project(point), abs=1e-6)  # shapely
    # offsets never decrease along the stand and the drive-off (never ahead of the next)
    offsets = [got[float(t)][1] for t in range(len(STAND) + len(DRIVE)) if got[float(t)][0]
               == SEG_T]
    assert offsets == sorted(offsets)
    assert SEG_Q not in path(events)
    assert path(events)[0] == SEG_T
    # fixes after the stand keep the answers they had without the rule
    base = finals(run(MatchSettings(start_stand=False), STAND + DRIVE))
    for t in range(len(STAND) + 2, len(STAND) + len(DRIVE)):
        assert got[float(t)] == base[float(t)]


def test_vehicle_moving_from_the_start_keeps_its_answers() -> None:
    """Fixes that move from the first one on are no stand: answers and path unchanged."""
    moving = [(100.0, -60.0 + 6.0 * i) for i in range(10)] + DRIVE
    base = run(MatchSettings(start_stand=False), moving)
    new = run(MatchSettings(start_stand=True), moving)
    assert finals(new) == finals(base)
    assert path(new) == path(base)


def test_short_stand_is_left_alone() -> None:
    """A stand of less than 10 s at the start of the log keeps its answers."""
    pts = STAND[:7] + DRIVE
    assert finals(run(MatchSettings(start_stand=True), pts)) == finals(
        run(MatchSettings(start_stand=False), pts))


def test_log_that_only_stands_is_left_alone() -> None:
    """No departure in the commit (the log ends standing): nothing to read the road from."""
    for end_stand in (False, True):
        assert finals(run(MatchSettings(start_stand=True, end_stand=end_stand), STAND)) == \
            finals(run(MatchSettings(start_stand=False, end_stand=end_stand), STAND))


def test_sparse_stand_is_left_alone() -> None:
    """Fixes 15 s apart: four fixes within 10 m over 45 s are no evidence of a stand."""
    # the last of the four is 5 m along T, so without the dense-fix guard the rule would
    # read "stood, then left by T" and move the first three onto T
    pts = [*STAND[:15:7], (105.0, 0.5), (200.0, 0.5), (300.0, 0.5)]
    base = finals(run(MatchSettings(start_stand=False), pts, dt=15.0))
    assert base[0.0][0] == base[15.0][0] == SEG_Q  # on Q without the rule
    assert finals(run(MatchSettings(start_stand=True), pts, dt=15.0)) == base


def test_restore_mid_stand_gives_the_same_events() -> None:
    """A checkpoint taken during the stand and restored continues exactly as without."""
    settings = MatchSettings(start_stand=True)
    assert run(settings, STAND + DRIVE, restore_at=12) == run(settings, STAND + DRIVE)


def test_start_stand_validation() -> None:
    """start_stand must be a boolean, and is a configuration key."""
    assert ("start_stand", "must be true or false, got 'yes'") in MatchSettings(
        start_stand="yes").problems()  # type: ignore[arg-type]
    known = MatchSettings.keys()
    assert "start_stand" in known


# W leaves V = (100, 0) east in three segments: W1 and W2 4 m long, then W3
W = [(100.0, 0.0), (104.0, 0.0), (108.0, 0.0), (300.0, 0.0)]
NET_W = network_from_roads([Road(Q, way=1), Road(W, way=2)])
# the first fix lies on the far side of the stand from the way out
FIRST = (92.0, -1.0)
STAND_W = [FIRST] + [(100.0 - 0.4 * (i % 3), -1.0 - 0.1 * i) for i in range(11)]
# the drive-off: the first two fixes lag behind the path (within 2 sigma_m = 10 m of the
# first fix, so the stand run reaches them), then the vehicle is away
DRIVE_W = [(101.0, 0.3), (101.5, 0.4), (112.0, 0.5), (120.0, 0.5)]


def drive_off_case(via: tuple[int, ...]) -> tuple[bool, list[MatchedFix], list[int], list[int]]:
    """``_start_stand`` on a chain: Q for the stand, then W2 (``via`` before it), W3, W3.

    Returns what it returned, the answers and path it left, and W's segments.
    """
    seg_of = {}
    for seg in range(NET_W.n_segments):
        seg_of[NET_W.segment_coords(seg)] = seg
    seg_q = seg_of[(*Q[0], *Q[1])]
    seg_w = [seg_of[(*a, *b)] for a, b in itertools.pairwise(W)]
    tracker = Tracker(NET_W, "v1", MatchSettings(start_stand=True))
    for i, (x, y) in enumerate(STAND_W + DRIVE_W):
        tracker.update(Fix("v1", float(i), 0.0, 0.0, x, y))
    # the run's last node (the 14th) is on W3, whose start lies farther than eps from
    # the first fix
    at = [(seg_q, 1.0 - 1.0 / 80.0)] * len(STAND_W) + [
        (seg_w[1], 0.5), (seg_w[2], 0.005), (seg_w[2], 0.02), (seg_w[2], 0.06)]
    chain: list[Node] = []
    for i, (seg, pos) in enumerate(at):
        ax, ay, bx, by = NET_W.segment_coords(seg)  # a node's x, y: its point on seg
        x, y = ax + pos * (bx - ax), ay + pos * (by - ay)
        chain.append(Node(seg, tracker.fix_seq0 + i, float(i), pos, x, y,
                          chain[-1] if chain else None,
                          tuple(seg_w[s] for s in via) if i == len(STAND_W) else (),
                          0.0, 0.0))
    out = [MatchedFix(n.t, n.seg, n.pos, n.x, n.y) for n in chain]
    route = [seg_q, *seg_w]
    done = tracker._start_stand(chain, EPS, out, route)
    return done, out, route, seg_w


def check_on(out: list[MatchedFix], upto: int, seg: int, line: list[tuple[float, float]]) -> None:
    """Answers 0..upto-1 lie on ``seg``'s line (shapely) within eps of their fixes."""
    shape = shapely.LineString(line)
    for k in range(upto):
        assert out[k].segment == seg
        point = shapely.Point(out[k].x, out[k].y)
        assert shape.distance(point) == pytest.approx(0.0, abs=1e-9)  # shapely
        assert point.distance(shapely.Point(*(STAND_W + DRIVE_W)[k])) <= EPS  # shapely


def test_stand_run_into_the_drive_off_ends_on_a_road_the_fixes_fit() -> None:
    """The run reaches past short segments out of V: the stand goes on one within eps.

    The run's last node is on W3, whose start is 16.0 m from the first fix (shapely),
    more than eps: the rule with that node alone refused. W2 starts 12.0 m from it.
    """
    assert shapely.Point(FIRST).distance(shapely.Point(W[2])) > EPS  # shapely: 16.03 m
    assert shapely.Point(FIRST).distance(shapely.Point(W[1])) <= EPS  # shapely: 12.04 m
    done, out, route, seg_w = drive_off_case(())
    assert done
    b = len(STAND_W)  # the node on W2
    check_on(out, b + 1, seg_w[1], W[1:3])
    assert [f.segment for f in out[b + 1:]] == [seg_w[2]] * 3  # after it: unchanged
    assert route == seg_w[1:]


def test_stand_goes_on_the_first_road_out_of_the_stand_that_fits() -> None:
    """W1 driven between the stand and W2 (no fix on it): the stand goes on W1, at V."""
    done, out, route, seg_w = drive_off_case((0,))
    assert done
    b = len(STAND_W)
    check_on(out, b, seg_w[0], W[0:2])
    assert [f.segment for f in out[b:]] == [seg_w[1]] + [seg_w[2]] * 3  # unchanged
    assert route == seg_w
