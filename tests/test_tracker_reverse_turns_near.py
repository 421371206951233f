"""A turn in the street where the fixes reverse, opened only near the reversing fix
(``MatchSettings.reverse_turns_near``)."""

from __future__ import annotations

import itertools

import pytest

from livematch.core.build import Road, network_from_roads
from livematch.core.events import Commit
from livematch.core.fix import Fix
from livematch.core.network import RoadNetwork
from livematch.core.settings import MatchSettings
from livematch.core.tracker import Tracker

shapely = pytest.importorskip("shapely")

# Plain data (made up for the test), as in test_tracker_reverse_turns.py: a two-way road
# west-east with shape points every 100 m (no U-turn there in the sweep) and a dead end
# at x = 400. A van reports every 30 s: east, one fix while it dwells at the shape point
# x = 300 with the GNSS error leaning east by 3-7 m, then back west the way it came.
ROAD = [(0.0, 0.0), (100.0, 0.0), (200.0, 0.0), (300.0, 0.0), (400.0, 0.0)]
TURN_X = 300.0
LEANS = (3.0, 5.0, 7.0)


def _commits(net: RoadNetwork, vehicle: str, xs: list[float], settings: MatchSettings,
             dt: float = 30.0, restore_at: int = -1) -> tuple[list[Commit], list[object]]:
    tracker = Tracker(net, vehicle, settings)
    events: list[object] = []
    for i, x in enumerate(xs):
        if i == restore_at:
            tracker = Tracker.from_bytes(net, settings, tracker.to_bytes())
        events += tracker.update(Fix(vehicle, dt * i, 0.0, 0.0, x, 1.0, 5.0))
    events += tracker.flush()
    return [e for e in events if isinstance(e, Commit)], events


def _reach(road: list[tuple[float, float]], net: RoadNetwork, seg: int) -> float:
    """How far along ``road`` a segment reaches, by shapely's linear referencing."""
    line = shapely.LineString(road)
    ends = (net.node_xy[net.seg_from[seg]], net.node_xy[net.seg_to[seg]])
    return max(line.project(shapely.Point(*xy)) for xy in ends)


@pytest.mark.parametrize("lean", LEANS)
def test_reverse_turns_near_turns_at_the_dwell_point(lean: float) -> None:
    """The van's dwell fix lies within eps of the shape point x = 300 where it turned: the
    bridge out of it may turn there. No fix and no path segment reaches past x = 300
    (shapely's linear referencing as the outside measure), the path is connected and as
    long as the road driven (shapely's length of 0 -> 300, twice). Off (the default), the
    only way back is the dead end at x = 400 and the dwell fix is committed past x = 300."""
    net = network_from_roads([Road(ROAD, way=7)])
    xs = [20.0, 160.0, TURN_X + lean, 170.0, 30.0]
    done, _ = _commits(net, "van9", xs, MatchSettings(reverse_turns_near=True))
    fixes = [f for c in done for f in c.fixes]
    assert [f.t for f in fixes] == [30.0 * i for i in range(5)]
    assert max(_reach(ROAD, net, f.segment) for f in fixes) <= TURN_X
    path = [s for c in done for s in c.path]
    assert all(net.seg_to[a] == net.seg_from[b] for a, b in itertools.pairwise(path))
    assert max(_reach(ROAD, net, s) for s in path) <= TURN_X
    driven = 2.0 * shapely.LineString(ROAD[:4]).length
    assert sum(float(net.seg_len[s]) for s in path) == pytest.approx(driven)
    done, _ = _commits(net, "van9", xs, MatchSettings(lone_reverse_turns=False))
    assert [f.t for c in done for f in c.fixes if _reach(ROAD, net, f.segment) > TURN_X] == [60.0]


@pytest.mark.parametrize("lean", LEANS)
def test_reverse_turns_near_leaves_dense_fixes_alone(lean: float) -> None:
    """At or below gap_s between fixes (5 s here) nothing changes: a rule for gap steps."""
    net = network_from_roads([Road(ROAD, way=7)])
    xs = [20.0, 160.0, TURN_X + lean, 170.0, 30.0]
    _, on = _commits(net, "van9", xs, MatchSettings(reverse_turns_near=True), dt=5.0)
    _, off = _commits(net, "van9", xs, MatchSettings(lone_reverse_turns=False), dt=5.0)
    assert on == off


# Plain data (made up for the test): a two-way main road west-east from x = -400 to a dead
# end at x = 1000, shape points at -300 .. 100 every 100 m and at x = 250, the junction
# x = 350 with a side road north (300 m, a dead end). A car drives east at about 13 m/s,
# passes x = 150 at t = 30 s, turns round at the junction x = 350 (where the network
# allows it) and is back at x = 120 at t = 60 s. Its fixes reverse at x = 150 as a
# dwelling van's do, but no vertex lies within eps of that fix ahead of it.
MAIN = [(-400.0, 0.0), (-300.0, 0.0), (-200.0, 0.0), (-100.0, 0.0), (0.0, 0.0),
        (100.0, 0.0), (250.0, 0.0), (350.0, 0.0), (1000.0, 0.0)]
SIDE = [(350.0, 0.0), (350.0, 300.0)]
JUNCTION_X = 350.0
CAR_XS = [-250.0, 150.0, 120.0, -200.0]


def test_reverse_turns_near_opens_no_turn_far_from_the_fix() -> None:
    """The segment the reversing fix is matched on ends 100 m ahead of it (x = 250),
    beyond every eps: reverse_turns_near opens no turn in the street, and the car is
    matched out to the junction where it turned and back: the path is connected and
    reaches x = 350 (shapely's linear referencing). reverse_turns (a turn at any vertex
    of the street) turns the same fixes round short of the junction, at the shape point
    x = 250, a route never driven."""
    net = network_from_roads([Road(MAIN, way=1), Road(SIDE, way=2)])
    done, _ = _commits(net, "car4", CAR_XS, MatchSettings(reverse_turns_near=True))
    path = [s for c in done for s in c.path]
    assert all(net.seg_to[a] == net.seg_from[b] for a, b in itertools.pairwise(path))
    assert max(_reach(MAIN, net, s) for s in path) == pytest.approx(
        shapely.LineString(MAIN).project(shapely.Point(JUNCTION_X, 0.0)))
    done, _ = _commits(net, "car4", CAR_XS, MatchSettings(reverse_turns=True))
    path = [s for c in done for s in c.path]
    assert max(_reach(MAIN, net, s) for s in path) < JUNCTION_X - MAIN[0][0]


@pytest.mark.parametrize("restore_at", [1, 2, 3])
def test_reverse_turns_near_survives_a_checkpoint(restore_at: int) -> None:
    """The last step's direction is in the state: written and read back before any fix,
    the tracker continues with exactly the outputs of one never stopped."""
    net = network_from_roads([Road(ROAD, way=7)])
    xs = [20.0, 160.0, TURN_X + 5.0, 170.0, 30.0]
    settings = MatchSettings(reverse_turns_near=True)
    assert (_commits(net, "van9", xs, settings, restore_at=restore_at)[1]
            == _commits(net, "van9", xs, settings)[1])


def test_reverse_turns_near_must_be_a_bool() -> None:
    """Validated like the other switches (the config loader names the key)."""
    assert MatchSettings(reverse_turns_near=True).problems() == []
    assert MatchSettings(reverse_turns_near=1).problems() == [  # type: ignore[arg-type]
        ("reverse_turns_near", "must be true or false, got 1")]
