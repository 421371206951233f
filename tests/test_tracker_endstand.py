"""``end_stand``: a stand at the end of the log stays on the segment it began on.

Outside reference: shapely places each reported point on the road line it names and
measures it against its fix.
"""

from __future__ import annotations

import pytest
import shapely

from livematch.core.build import Road, network_from_roads
from livematch.core.events import Event, MatchedFix
from livematch.core.fix import Fix
from livematch.core.settings import MatchSettings
from livematch.core.tracker import Node, Tracker
from tests.catalogue import committed_path as path
from tests.catalogue import final_answers as finals
from tests.catalogue import track_points

# P runs east into V = (100, 0); S leaves V north (its first piece 10 m long, so a stand
# drifting 8 m north is past its middle); T leaves V east.
P = [(0.0, 0.0), (100.0, 0.0)]
S = [(100.0, 0.0), (100.0, 10.0), (100.0, 80.0)]
T = [(100.0, 0.0), (200.0, 0.0)]
NET = network_from_roads([Road(P, way=1), Road(S, way=2), Road(T, way=3)])
EPS = 15.0


def drive(settings: MatchSettings, stand: list[tuple[float, float]],
          restore_at: int | None = None) -> list[Event]:
    """Ten fixes along P at 10 m/s, then ``stand``, one a second, then the flush."""
    return track_points(NET, settings, [(10.0 * i, 1.0) for i in range(10)] + stand,
                        restore_at=restore_at)


# standing at V for 30 s while the error drifts 7 m north (a correlated lean)
DRIFT = [(99.0 + 0.1 * (i % 3), 1.0 + min(i, 14) * 0.5) for i in range(30)]


def test_without_the_rule_the_stand_ends_on_s() -> None:
    """The case the rule is for: the flush commits the stand onto S (a road not driven)."""
    events = drive(MatchSettings(end_stand=False), DRIFT)
    got = finals(events)
    assert {got[float(t)][0] for t in range(20, 40)} == {2}
    assert 2 in path(events)


def test_end_stand_reports_the_stand_on_p() -> None:
    """With the rule every stand fix is on P (shapely), within eps of its fix; path kept."""
    events = drive(MatchSettings(end_stand=True), DRIFT)
    got = finals(events)
    line_p = shapely.LineString(P)
    for i, (fx, fy) in enumerate(DRIFT):
        seg, offset, x, y = got[float(10 + i)]
        assert seg == 0
        point = shapely.Point(x, y)
        assert line_p.distance(point) == pytest.approx(0.0, abs=1e-9)  # shapely
        assert point.distance(shapely.Point(fx, fy)) <= EPS  # shapely
        assert offset == pytest.approx(line_p.project(point), abs=1e-6)  # shapely
    # only the answers move: the committed path is the one without the rule
    assert path(events) == path(drive(MatchSettings(end_stand=False), DRIFT)) == [0, 2]


def test_vehicle_that_drives_on_keeps_its_answers() -> None:
    """Fixes that move along S at the end of the log are not a stand: answers unchanged."""
    moving = [(100.5, 5.0 * i) for i in range(1, 15)]
    base = finals(drive(MatchSettings(end_stand=False), moving))
    new = finals(drive(MatchSettings(end_stand=True), moving))
    assert new == base
    assert {base[float(t)][0] for t in range(15, 24)} == {4}  # S's second piece


def test_short_stand_is_left_alone() -> None:
    """A stand of less than 10 s at the end of the log keeps its answers."""
    short = DRIFT[:8]
    assert finals(drive(MatchSettings(end_stand=True), short)) == finals(
        drive(MatchSettings(end_stand=False), short))


def finals_every(settings: MatchSettings, pts: list[tuple[float, float]],
                 dt: float) -> dict[float, tuple[int, float, float, float]]:
    """Final answers for fixes ``pts`` taken ``dt`` seconds apart, then the flush."""
    tracker = Tracker(NET, "v", settings)
    events: list[Event] = []
    for i, (x, y) in enumerate(pts):
        events += tracker.update(Fix("v", dt * i, 0.0, 0.0, x, y))
    return finals(events + tracker.flush())


# along P every 15 s, then two fixes 6-8 m north of V, 15 s apart: within 10 m of each
# other and of the fix before on P, a "stand" of 30 s, but three fixes and two gaps of
# 15 s, as much a slow step or a turning circle as a stand
SPARSE = [(0.0, 1.0), (30.0, 1.0), (60.0, 1.0), (96.0, 1.0), (99.5, 6.0), (99.5, 8.0)]
# a receiver that repeats one position 5 m up S for 20 s after a stop just before V
STILL = [(10.0 * i, 1.0) for i in range(10)] + [(98.0, 1.0)] * 3 + [(100.0, 5.0)] * 20


def test_sparse_stand_is_left_alone() -> None:
    """Fixes 15 s apart: the rule does not act (without the dense-fix guard it would)."""
    base = finals_every(MatchSettings(end_stand=False), SPARSE, 15.0)
    assert base[75.0][0] == 2 and base[60.0][0] == 2  # on S without the rule
    assert finals_every(MatchSettings(end_stand=True), SPARSE, 15.0) == base


def test_repeated_position_is_left_alone() -> None:
    """A receiver repeating one position shows no wandering error: answers kept."""
    base = finals_every(MatchSettings(end_stand=False), STILL, 1.0)
    assert {base[t][0] for t in (27.0, 32.0)} == {2}  # on S without the rule
    assert finals_every(MatchSettings(end_stand=True), STILL, 1.0) == base


def test_restore_mid_stand_gives_the_same_outputs() -> None:
    """Checkpoint and restore in the stand, then the flush: the same events."""
    settings = MatchSettings(end_stand=True)
    assert drive(settings, DRIFT, restore_at=25) == drive(settings, DRIFT)


def test_end_stand_validation() -> None:
    """end_stand must be a boolean."""
    assert ("end_stand", "must be true or false, got 'yes'") in MatchSettings(
        end_stand="yes").problems()  # type: ignore[arg-type]


def _stand_chain() -> tuple[Tracker, list[Node], list[MatchedFix]]:
    """Six fixes on P before V, then six drifting 0.5-5.5 m up S: nodes and answers."""
    tracker = Tracker(NET, "v", MatchSettings(end_stand=True))
    chain: list[Node] = []
    for i in range(12):
        x, y = (98.0 + 0.2 * i, 0.0) if i < 6 else (100.0, 0.5 * i)
        _ = tracker.update(Fix("v", float(i), 0.0, 0.0, x, y))
        seg, pos = (0, x / 100.0) if i < 6 else (2, y / 10.0)  # S's first piece, 10 m
        chain.append(Node(seg, tracker.fix_seq0 + i, float(i), pos, x, y,
                          chain[-1] if chain else None, (), 0.0, 0.0))
    answers = [MatchedFix(n.t, n.seg, n.pos * float(NET.seg_len[n.seg]), n.x, n.y)
               for n in chain]
    return tracker, chain, answers


def test_answers_another_rule_placed_are_kept() -> None:
    """An answer already off its node's segment (at V, as the end of P) stays as it is;
    where the stand's first answer was so placed nothing changes at all."""
    tracker, chain, answers = _stand_chain()
    plain = list(answers)
    tracker._end_stand(chain, None, EPS, plain)
    assert [f.segment for f in plain[6:]] == [0] * 6  # the rule acts on this stand
    at_v = MatchedFix(8.0, 1, 0.0, 100.0, 0.0)  # placed elsewhere by another rule
    kept = list(answers)
    kept[8] = at_v
    tracker._end_stand(chain, None, EPS, kept)
    assert kept[8] == at_v and [f.segment for f in kept[6:8]] == [0, 0]
    # the stand's first node (fix 0, on P) reported elsewhere: no answer changes
    moved_first = list(answers)
    moved_first[0] = MatchedFix(0.0, 1, 0.0, 98.0, 0.0)
    expect = list(moved_first)
    tracker._end_stand(chain, None, EPS, moved_first)
    assert moved_first == expect
