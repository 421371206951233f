"""``start_way_out``: the log's first fix, short of the vertex its path leaves by, at that vertex.

Outside reference: shapely places each reported point on the road line it names,
measures it against its fix, and measures distances along the truly driven line
(``LineString.project``) for the issue's road-and-direction definition.
"""

from __future__ import annotations

import pytest
import shapely

from livematch.core.build import Road, network_from_roads
from livematch.core.events import Commit, Event, Filtered
from livematch.core.fix import Fix
from livematch.core.settings import MatchSettings
from livematch.core.sweep import Node
from livematch.core.tracker import Tracker
from tests.catalogue import committed_path as path
from tests.catalogue import final_answers as finals
from tests.catalogue import track_points

# A runs east into V = (100, 0), B leaves V east, C leaves V north. The log begins with
# the vehicle at V (it stood there: a tracker switched on in a parked vehicle), its first
# fix 6 m short of V along A (the GNSS error leaning back), then it drives off along B,
# a fix every 15 s.
A = [(0.0, 0.0), (100.0, 0.0)]
B = [(100.0, 0.0), (800.0, 0.0)]
C = [(100.0, 0.0), (100.0, 300.0)]
NET = network_from_roads([Road(A, way=1), Road(B, way=2), Road(C, way=3)])
SEG_A, SEG_B = 0, 2  # the forward directions of the two roads (network_from_roads order)
V = (100.0, 0.0)
EPS = 15.0
FIRST = (94.0, 1.0)
DRIVE = [(160.0, -1.5), (280.0, 2.0), (410.0, -1.0), (540.0, 1.5), (670.0, 0.5)]
DT = 15.0
TOL_M = 30.0  # issue #3: the answer must lie on the driven path within 30 m along it


def run(settings: MatchSettings, pts: list[tuple[float, float]],
        restore_at: int | None = None) -> list[Event]:
    """Fixes ``pts`` 15 s apart, then the flush; optionally restored mid-way."""
    return track_points(NET, settings, pts, DT, restore_at)


def along_gap(truth_line: list[tuple[float, float]], true_xy: tuple[float, float],
              seg_line: list[tuple[float, float]]) -> float:
    """Metres along the driven line from the true point to the nearest point of a
    segment that lies on it (shapely's project); inf when the segment is not on it."""
    line = shapely.LineString(truth_line)
    seg = shapely.LineString(seg_line)
    if not line.buffer(1e-6).contains(seg):
        return float("inf")
    s = line.project(shapely.Point(true_xy))
    a = line.project(shapely.Point(seg_line[0]))
    b = line.project(shapely.Point(seg_line[-1]))
    return max(0.0, a - s, s - b)


def test_segments_of_the_network_are_as_assumed() -> None:
    """A's and B's forward segments are the ones the tests name (shapely lines)."""
    for seg, line in ((SEG_A, A), (SEG_B, B)):
        ax, ay, bx, by = NET.segment_coords(seg)
        assert [(ax, ay), (bx, by)] == line


def test_without_the_rule_the_first_fix_is_on_a() -> None:
    """The case the rule is for: the first commit puts the first fix on A, path [A, B]."""
    events = run(MatchSettings(start_way_out=False), [FIRST, *DRIVE])
    got = finals(events)
    assert got[0.0][0] == SEG_A
    assert path(events)[:2] == [SEG_A, SEG_B]


def test_start_way_out_reports_the_first_fix_at_v_on_b() -> None:
    """With the rule the first fix is at V on B (offset 0, shapely: on B's line, within
    eps of its fix); the committed path and every later fix's answer stay as they were."""
    off = run(MatchSettings(start_way_out=False), [FIRST, *DRIVE])
    on = run(MatchSettings(start_way_out=True), [FIRST, *DRIVE])
    seg, offset, x, y = finals(on)[0.0]
    assert (seg, offset) == (SEG_B, 0.0)
    assert (x, y) == V
    assert shapely.LineString(B).distance(shapely.Point(x, y)) == 0.0
    assert shapely.Point(FIRST).distance(shapely.Point(x, y)) <= EPS
    assert path(on) == path(off)
    later_on = {t: a for t, a in finals(on).items() if t > 0.0}
    later_off = {t: a for t, a in finals(off).items() if t > 0.0}
    assert later_on == later_off and len(later_on) == len(DRIVE)


@pytest.mark.parametrize("came_by_a", [False, True])
def test_the_answer_at_v_holds_whichever_way_the_vehicle_came(came_by_a: bool) -> None:
    """Issue #3's definition, measured along the driven line with shapely: the rule's
    answer (B) is on the path within 30 m whether the vehicle stood at V or came in by A
    (true point 8 m short of V); the answer without it (A) only in the second case."""
    truth_line = [*A, B[1]] if came_by_a else B
    true_xy = (92.0, 0.0) if came_by_a else V
    answer_on = along_gap(truth_line, true_xy, B)
    answer_off = along_gap(truth_line, true_xy, A)
    assert answer_on <= TOL_M
    assert (answer_off <= TOL_M) is came_by_a


def test_v_farther_than_eps_from_the_first_fix_is_left_alone() -> None:
    """A first fix 25 m short of V (V outside its eps) keeps its answer on A."""
    pts = [(75.0, 1.0), *DRIVE]
    on = run(MatchSettings(start_way_out=True), pts)
    assert finals(on)[0.0][0] == SEG_A
    assert on == run(MatchSettings(start_way_out=False), pts)


def test_a_log_whose_second_fix_is_still_on_a_is_left_alone() -> None:
    """The second fix, 15 s on, still short of V on A: the path does not leave A before
    it, so nothing moves (the fixes show A driven)."""
    pts = [(90.0, 1.0), (97.0, 0.5), *DRIVE]
    on = run(MatchSettings(start_way_out=True), pts)
    off = run(MatchSettings(start_way_out=False), pts)
    assert finals(off)[0.0][0] == SEG_A
    assert on == off


def test_dense_fixes_are_left_alone() -> None:
    """Fixes 1 s apart (the first 6 m short of V, then along B at 8 m/s): the next fix
    comes sooner than SPARSE_S after the first, so the rule does not act."""
    pts = [FIRST] + [(100.0 + 8.0 * i, 0.5) for i in range(1, 40)]
    on = track_points(NET, MatchSettings(start_way_out=True), pts, 1.0)
    off = track_points(NET, MatchSettings(start_way_out=False), pts, 1.0)
    assert finals(off)[0.0][0] == SEG_A
    assert on == off


def test_a_log_that_leaves_v_by_c_is_reported_on_c() -> None:
    """The segment the rule reports is the one the path enters at V (here C, north),
    the path's second segment."""
    north = [(101.0, 120.0), (99.0, 250.0), (100.5, 295.0)]
    on = run(MatchSettings(start_way_out=True), [FIRST, *north])
    seg = finals(on)[0.0][0]
    ax, ay, bx, by = NET.segment_coords(seg)
    assert [(ax, ay), (bx, by)] == C
    assert path(on)[1] == seg


def test_restore_before_the_first_commit_gives_the_same_events() -> None:
    """Checkpoint and restore at each fix: the events are those of a tracker that never
    stopped (the rule keeps no state of its own)."""
    base = run(MatchSettings(start_way_out=True), [FIRST, *DRIVE])
    for at in range(1, 1 + len(DRIVE)):
        assert run(MatchSettings(start_way_out=True), [FIRST, *DRIVE], restore_at=at) == base


def test_start_way_out_must_be_a_bool() -> None:
    """The setting is validated like every other switch."""
    assert ("start_way_out", "must be true or false, got 'yes'") in \
        MatchSettings(start_way_out="yes").problems()  # type: ignore[arg-type]



# An outlier as the second fix, 5 s after the first, 150 m up C (30 m/s: within the
# jump filter's 60 m/s bound for a first step), then the vehicle drives off along B at
# 10 m/s, a fix every 5 s. The spike test drops the outlier one fix late.
OUTLIER_LOG = [FIRST, (102.0, 150.0)] + [(100.0 + 50.0 * i, (-1.0) ** i) for i in range(1, 14)]


def test_an_outlier_second_fix_does_not_send_the_first_answer_out_by_its_road() -> None:
    """Before the spike test judges the second fix, every candidate leaves V by C towards
    it; the rule waits for that test and then reads the way out from the fixes that
    count: the first answer is at V on B, never on C, and the committed path is the one
    without the rule (A, B; shapely: the first answer on B's line, within eps)."""
    on = track_points(NET, MatchSettings(start_way_out=True), OUTLIER_LOG, 5.0)
    off = track_points(NET, MatchSettings(start_way_out=False), OUTLIER_LOG, 5.0)
    assert any(isinstance(e, Filtered) and e.t == 5.0 and e.reason == "spike" for e in on)
    seg, offset, x, y = finals(on)[0.0]
    assert (seg, offset) == (SEG_B, 0.0)
    assert shapely.LineString(B).distance(shapely.Point(x, y)) == 0.0
    assert shapely.Point(FIRST).distance(shapely.Point(x, y)) <= EPS
    assert finals(off)[0.0][0] == SEG_A
    assert path(on) == path(off) == [SEG_A, SEG_B]
    assert {t: a for t, a in finals(on).items() if t > 0.0} == \
        {t: a for t, a in finals(off).items() if t > 0.0}


def test_the_first_commit_waits_one_fix_only_while_the_second_is_held() -> None:
    """The same log without the outlier (the second fix on B): the first answer still
    moves to V on B, committed once the third fix has come (the spike test has judged
    the second); at 15 s as in the other tests it moves too."""
    clean = [FIRST] + [(100.0 + 50.0 * i, (-1.0) ** i) for i in range(1, 14)]
    tracker = Tracker(NET, "v", MatchSettings(start_way_out=True))
    first_commit_at = None
    for i, (x, y) in enumerate(clean):
        got = tracker.update(Fix("v", 5.0 * i, 0.0, 0.0, x, y))
        if first_commit_at is None and any(isinstance(e, Commit) for e in got):
            first_commit_at = i
            assert finals(got)[0.0][:2] == (SEG_B, 0.0)
    assert first_commit_at == 2
    off = track_points(NET, MatchSettings(start_way_out=False), clean, 5.0)
    assert finals(off)[0.0][0] == SEG_A


def test_a_first_node_at_its_segments_start_vertex_is_left_alone() -> None:
    """A first node at the very start of its segment (``pos`` 0: at the vertex where A
    begins) is already at a vertex on the road the path leaves it by; the rule moves
    nothing (the same node 6 m short of V is moved: the radius and the way out hold).
    Hand-made nodes, as in the method's docstring example; V's distance from the fix
    is checked with shapely."""
    net = network_from_roads([Road([(0.0, 0.0), (10.0, 0.0)], way=1),
                              Road([(10.0, 0.0), (200.0, 0.0)], way=2)])
    tracker = Tracker(net, "v", MatchSettings(start_way_out=True))
    tracker.update(Fix("v", 0.0, 0.0, 0.0, 4.0, 1.0))
    assert shapely.Point(4.0, 1.0).distance(shapely.Point(10.0, 0.0)) <= EPS
    tree = tracker.levels[0].tree
    seq0 = tracker.fix_seq0
    for pos, want in ((0.0, -1), (0.4, 2)):
        a = Node(0, seq0, 0.0, pos, 10.0 * pos, 0.0, None, (), 0.0, pos)
        b = Node(2, seq0 + 1, 15.0, 0.5, 105.0, 0.0, a, (), 1.0, 0.5)
        assert tracker._start_way_out(tree, [a, b], EPS) == want


def test_start_way_out_is_on_by_default() -> None:
    """On since session 19 (decision runs: docs/measured.md "Session 19 (logstart2)");
    the default tracker reports the first fix at V on B."""
    assert MatchSettings().start_way_out is True
    assert finals(run(MatchSettings(), [FIRST, *DRIVE]))[0.0][:2] == (SEG_B, 0.0)
