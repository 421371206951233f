"""``end_stand``: a stand at the end of the log stays on the segment it began on.

Outside reference: shapely places each reported point on the road line it names and
measures it against its fix.
"""

from __future__ import annotations

import pytest
import shapely

from livematch.core.build import Road, network_from_roads
from livematch.core.events import Commit, Event
from livematch.core.fix import Fix
from livematch.core.settings import MatchSettings
from livematch.core.tracker import Tracker

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
    tracker = Tracker(NET, "v", settings)
    events: list[Event] = []
    fixes = [(10.0 * i, 1.0) for i in range(10)] + stand
    for i, (x, y) in enumerate(fixes):
        if i == restore_at:
            tracker = Tracker.from_bytes(NET, settings, tracker.to_bytes())
        events += tracker.update(Fix("v", float(i), 0.0, 0.0, x, y))
    return events + tracker.flush()


def finals(events: list[Event]) -> dict[float, tuple[int, float, float, float]]:
    out = {}
    for e in events:
        if isinstance(e, Commit):
            for f in e.fixes:
                out[f.t] = (f.segment, f.offset_m, f.x, f.y)
    return out


def path(events: list[Event]) -> list[int]:
    return [s for e in events if isinstance(e, Commit) for s in e.path]


# standing at V for 30 s while the error drifts 7 m north (a correlated lean)
DRIFT = [(99.0 + 0.1 * (i % 3), 1.0 + min(i, 14) * 0.5) for i in range(30)]


def test_without_the_rule_the_stand_ends_on_s() -> None:
    """The case the rule is for: the flush commits the stand onto S (a road not driven)."""
    events = drive(MatchSettings(), DRIFT)
    got = finals(events)
    assert {got[float(t)][0] for t in range(20, 40)} == {2}
    assert 2 in path(events)


def test_end_stand_reports_the_stand_on_p() -> None:
    """With the rule every stand fix is on P (shapely), within eps of its fix; no S."""
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
    assert path(events) == [0]


def test_vehicle_that_drives_on_keeps_its_answers() -> None:
    """Fixes that move along S at the end of the log are not a stand: answers unchanged."""
    moving = [(100.5, 5.0 * i) for i in range(1, 15)]
    base = finals(drive(MatchSettings(), moving))
    new = finals(drive(MatchSettings(end_stand=True), moving))
    assert new == base
    assert {base[float(t)][0] for t in range(15, 24)} == {4}  # S's second piece


def test_short_stand_is_left_alone() -> None:
    """A stand of less than 10 s at the end of the log keeps its answers."""
    short = DRIFT[:8]
    assert finals(drive(MatchSettings(end_stand=True), short)) == finals(
        drive(MatchSettings(), short))


def test_restore_mid_stand_gives_the_same_outputs() -> None:
    """Checkpoint and restore in the stand, then the flush: the same events."""
    settings = MatchSettings(end_stand=True)
    assert drive(settings, DRIFT, restore_at=25) == drive(settings, DRIFT)


def test_end_stand_validation() -> None:
    """end_stand must be a boolean."""
    assert ("end_stand", "must be true or false, got 'yes'") in MatchSettings(
        end_stand="yes").problems()  # type: ignore[arg-type]
