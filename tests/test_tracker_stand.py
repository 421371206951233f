"""The tracker's live answer while a vehicle stands (stand_hold), through Tracker.update."""

from __future__ import annotations

import math

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


def _reference_stand_start(tracker: Tracker, seq: int) -> tuple[int, int]:
    """The stand test as first written: the whole run walked back on every fix.

    Returns (first fix of the stand, first fix of the newest fix's run), (0, 0) if the
    vehicle does not stand (the definition in Tracker._stand_start's docstring).
    """
    seq0 = tracker.fix_seq0
    # from the last committed fix on, or (smallest_agrees) from the fix a deferred
    # commit would have settled
    lo = max(seq0, max(tracker.next_commit, tracker.agreed_seq + 1) - 1, 1)
    if seq - seq0 >= tracker.fix_n or seq <= lo:
        return 0, 0
    xy = tracker.fix_xy
    x, y = float(xy[seq - seq0, 0]), float(xy[seq - seq0, 1])
    radius = 2.0 * tracker.settings.sigma_m
    first = seq
    while first > lo and math.hypot(float(xy[first - 1 - seq0, 0]) - x,
                                    float(xy[first - 1 - seq0, 1]) - y) <= radius:
        first -= 1
    t_first = tracker.fix_time(first)
    t_seq = tracker.fix_time(seq)
    assert t_seq is not None
    span = t_seq - t_first if t_first is not None else -1.0
    if tracker.stand_seq and span >= 3.0:
        return max(tracker.stand_seq, lo), first
    return (first, first) if span >= 3.0 else (0, 0)


def _fleet_fixes(every: int) -> tuple[RoadNetwork, list[list[Fix]]]:
    """Simulated routed trips with dwells on the pyrosm test extract (© OpenStreetMap
    contributors, ODbL): stands of 10-90 s, GNSS error and 1 % outliers."""
    import importlib.resources

    import numpy as np

    from livematch.mapdata.netfile import open_network
    from livematch.sim.drive import TRIPS, DriveSettings, drivable_segments, observe, simulate_drive

    net = open_network(str(importlib.resources.files("pyrosm") / "data" / "test.osm.pbf"))
    allowed = drivable_segments(net)
    runs = []
    for i in range(3):
        drive = simulate_drive(net, np.random.default_rng([41, i]), f"v{i}", 1.7e9,
                               DriveSettings(duration_s=900.0, **TRIPS), allowed)
        runs.append([Fix(drive.vehicle, o.t, 0.0, 0.0, o.x, o.y, o.accuracy)
                     for o in observe(drive, every)])
    return net, runs


@pytest.mark.parametrize("every", [1, 5, 7])
def test_tracker_stand_start_equals_the_whole_walk(every: int) -> None:
    """The stand test that stops walking once the run spans the hold time gives, after
    every fix of routed trips with dwells, the stand the whole walk gave, and the run
    start it gave once completed (Tracker._run_start). At 5 and 7 s between fixes the
    spike test runs and moves fixes (a dropped fix's successor takes its place)."""
    net, runs = _fleet_fixes(every)
    stands = spikes = 0
    for fixes in runs:
        tracker = Tracker(net, fixes[0].vehicle)
        for fix in fixes:
            spikes += sum(1 for e in tracker.update(fix) if getattr(e, "reason", "") == "spike")
            seq = tracker.seq
            want = _reference_stand_start(tracker, seq)
            stand, reach = tracker._stand_start(seq)
            got = (stand, tracker._run_start(seq, reach) if reach else 0)
            assert got == want, (fixes[0].vehicle, fix.t)
            stands += bool(stand)
    assert stands > (300 // every)  # the drives do stand
    if every > 1:
        assert spikes > 0


def test_tracker_stand_hold_cache_changes_no_answer() -> None:
    """Tracker._held (which fixes lie within eps of a held point, remembered from the
    fix before) changes nothing: a tracker whose cache is emptied before every fix
    gives the same events on routed trips with dwells, at 1 and 5 s between fixes."""
    for every in (1, 5):
        net, runs = _fleet_fixes(every)
        for fixes in runs:
            cached = Tracker(net, fixes[0].vehicle)
            fresh = Tracker(net, fixes[0].vehicle)
            for fix in fixes:
                fresh._held = None
                assert fresh.update(fix) == cached.update(fix)
            assert fresh.flush() == cached.flush()
