"""The tracker's live answer while a vehicle stands (stand_hold), through Tracker.update."""

from __future__ import annotations

import pytest

from livematch.core.build import Road, network_from_roads
from livematch.core.events import Assignment, Event
from livematch.core.fix import Fix
from livematch.core.network import RoadNetwork
from livematch.core.settings import MatchSettings
from livematch.core.tracker import Tracker

shapely = pytest.importorskip("shapely")

# 1 Hz fixes 2 m beside a 400 m two-way road with a shape point every 5 m (segments as
# short as Helsinki's): east from x = 30 to the shape point at x = 200 at 10 m/s, a 60 s
# stand there while the GNSS error leans ahead along the road (0.4 m/s up to 8 m, then
# held: correlated error), then back west at 10 m/s (the vehicle leaves the way it came).
STAND_FIRST, STAND_LAST = 17, 77  # fix indices of the stand (x = 200 + drift)
XS = ([30.0 + 10.0 * i for i in range(18)] + [200.0 + min(8.0, 0.4 * i) for i in range(1, 61)]
      + [200.0 - 10.0 * i for i in range(1, 18)])
ROAD = shapely.LineString([(0.0, 0.0), (400.0, 0.0)])


def _network() -> RoadNetwork:
    return network_from_roads([Road([(float(x), 0.0) for x in range(0, 405, 5)], way=7)])


def _fixes() -> list[Fix]:
    return [Fix("van4", float(i), 0.0, 0.0, x, 2.0, 5.0) for i, x in enumerate(XS)]


def _live(settings: MatchSettings) -> tuple[RoadNetwork, list[Assignment]]:
    net = _network()
    tracker = Tracker(net, "van4", settings)
    out: list[Assignment] = []
    for fix in _fixes():
        out += [e for e in tracker.update(fix) if isinstance(e, Assignment)]
    assert [a.t for a in out] == [float(i) for i in range(len(XS))]
    return net, out


def _reach(net: RoadNetwork, segment: int) -> float:
    """How far along the road (m) the segment reaches, by shapely's linear referencing."""
    ends = (net.node_xy[net.seg_from[segment]], net.node_xy[net.seg_to[segment]])
    return max(ROAD.project(shapely.Point(*xy)) for xy in ends)


def test_tracker_stand_hold_keeps_the_live_answer_at_the_stand() -> None:
    """While the vehicle stands and the error drifts 8 m ahead, the live answer stays at
    the shape point where it stopped, on the segment it came in by (which it drives back
    over), from the third second of the stand on; without stand_hold it follows the
    drift onto the segments beyond the stop, which the vehicle never drives."""
    net, held = _live(MatchSettings())
    stand = range(STAND_FIRST + 3, STAND_LAST + 1)
    for i in stand:
        a = held[i]
        # the point and the whole segment, located along the road by shapely
        assert ROAD.project(shapely.Point(a.x, a.y)) == pytest.approx(200.0)
        assert _reach(net, a.segment) == pytest.approx(200.0)
        assert a.eps_m == 15.0
    net, drifting = _live(MatchSettings(stand_hold=False))
    beyond = [i for i in stand if _reach(net, drifting[i].segment) > 200.0]
    assert len(beyond) >= 45
    assert max(ROAD.project(shapely.Point(drifting[i].x, drifting[i].y))
               for i in stand) == pytest.approx(208.0)


def test_tracker_stand_hold_keeps_the_certificate() -> None:
    """Every held answer's certificate holds: the window of fixes it names lies within
    Fréchet distance eps of the reported road path (from the first fix's matched point
    to the held point), checked with shapely's frechet_distance (the window here starts
    at the first fix: the smallest level does not die during the stand)."""
    _, held = _live(MatchSettings())
    fixes = _fixes()
    for i in range(STAND_FIRST + 3, STAND_LAST + 1):
        a = held[i]
        assert a.window_fixes == i + 1
        window = shapely.LineString([(f.x, f.y) for f in fixes[i + 1 - a.window_fixes:i + 1]])
        # the road path as driven: its shape points every 5 m, up to the held point
        path = shapely.LineString([(x, 0.0) for x in range(30, int(a.x), 5)] + [(a.x, a.y)])
        # the discrete Fréchet distance of the densified curves bounds the continuous
        # one from above (shapely's frechet_distance with densify)
        assert shapely.frechet_distance(window, path, densify=0.25) <= a.eps_m


def test_tracker_stand_hold_leaves_a_moving_vehicle_alone() -> None:
    """A vehicle driving at 5 m/s (15 m in 3 s, more than 2 sigma_m) never stands: its
    live answers are the same with and without stand_hold."""
    net = _network()
    fixes = [Fix("bus", float(i), 0.0, 0.0, 20.0 + 5.0 * i, 2.0, 5.0) for i in range(60)]

    def live(settings: MatchSettings) -> list[Event]:
        tracker = Tracker(net, "bus", settings)
        return [e for f in fixes for e in tracker.update(f)]

    assert live(MatchSettings()) == live(MatchSettings(stand_hold=False))


@pytest.mark.parametrize("cut", [STAND_FIRST + 2, STAND_FIRST + 8, STAND_LAST - 1, STAND_LAST + 2])
def test_tracker_stand_hold_survives_a_restore_mid_stand(cut: int) -> None:
    """A tracker written and read back before, during and right after the stand goes on
    exactly as the one that was not: the same events and the same state at the end."""
    net = _network()
    fixes = _fixes()
    straight = Tracker(net, "van4")
    first = [e for f in fixes[:cut] for e in straight.update(f)]
    restored = Tracker(net, "van4")
    assert [e for f in fixes[:cut] for e in restored.update(f)] == first
    restored = Tracker.from_bytes(net, None, restored.to_bytes())
    assert restored.stand_seq == straight.stand_seq
    after = [e for f in fixes[cut:] for e in restored.update(f)]
    assert after == [e for f in fixes[cut:] for e in straight.update(f)]
    assert restored.flush() == straight.flush()
    assert restored.to_bytes() == straight.to_bytes()
