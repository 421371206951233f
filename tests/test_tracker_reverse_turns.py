"""A van that turns round at a plain point of a road between fixes 30 s apart (reverse_turns)."""

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

# Plain data (made up for the test): a two-way road west-east with shape points every
# 100 m (plain points of the road: no U-turn there in the sweep) and a dead end at
# x = 400. A van reports every 30 s: driving east, one fix while it dwells at the shape
# point x = 300 with the GNSS error leaning east by 3-7 m (correlated error), then back
# west the way it came. It never drives past x = 300; no step is slow enough to say that
# it stood (stop_turns).
ROAD = [(0.0, 0.0), (100.0, 0.0), (200.0, 0.0), (300.0, 0.0), (400.0, 0.0)]
TURN_X = 300.0
LEANS = (3.0, 5.0, 7.0)


def _run(settings: MatchSettings, lean: float, dt: float = 30.0,
         restore_at: int = -1, strip: bool = False,
         ) -> tuple[RoadNetwork, list[Commit], list[object]]:
    net = network_from_roads([Road(ROAD, way=7)])
    xs = [20.0, 160.0, TURN_X + lean, 170.0, 30.0]
    tracker = Tracker(net, "van9", settings)
    events: list[object] = []
    for i, x in enumerate(xs):
        if i == restore_at:
            blob = tracker.to_bytes()
            tracker = Tracker.from_bytes(net, settings,
                                         _without_step_dir(blob) if strip else blob)
        events += tracker.update(Fix("van9", dt * i, 0.0, 0.0, x, 1.0, 5.0))
    events += tracker.flush()
    return net, [e for e in events if isinstance(e, Commit)], events


def _reach(net: RoadNetwork, seg: int) -> float:
    """How far east along the road a segment reaches, by shapely's linear referencing."""
    road = shapely.LineString(ROAD)
    ends = (net.node_xy[net.seg_from[seg]], net.node_xy[net.seg_to[seg]])
    return max(road.project(shapely.Point(*xy)) for xy in ends)


@pytest.mark.parametrize("lean", LEANS)
def test_tracker_reverse_turns_turns_at_the_dwell_point(lean: float) -> None:
    """With reverse_turns the bridge out of the dwell fix may turn round at x = 300: no
    fix and no path segment reaches past it (shapely's linear referencing of the road
    as the outside measure), the path is one connected route, and its length is twice the
    road's length up to the turn (shapely's length of that piece of the road). Without it
    the only way back is the dead end at x = 400, and the dwell fix is committed on road
    past x = 300 that the van never drove."""
    net, done, _ = _run(MatchSettings(reverse_turns=True), lean)
    fixes = [f for c in done for f in c.fixes]
    assert [f.t for f in fixes] == [30.0 * i for i in range(5)]
    assert max(_reach(net, f.segment) for f in fixes) <= TURN_X
    path = [s for c in done for s in c.path]
    assert all(net.seg_to[a] == net.seg_from[b] for a, b in itertools.pairwise(path))
    assert max(_reach(net, s) for s in path) <= TURN_X
    driven = 2.0 * shapely.LineString(ROAD[:4]).length  # 0 -> 300 -> 0
    assert sum(float(net.seg_len[s]) for s in path) == pytest.approx(driven)
    net, done, _ = _run(MatchSettings(reverse_turns=False, lone_reverse_turns=False), lean)
    ahead = [f.t for c in done for f in c.fixes if _reach(net, f.segment) > TURN_X]
    assert ahead == [60.0]


@pytest.mark.parametrize("lean", LEANS)
def test_tracker_reverse_turns_leaves_dense_fixes_alone(lean: float) -> None:
    """At or below gap_s between fixes (here 5 s, the same positions) the setting changes
    nothing: it is a rule for gap steps only."""
    _, _, on = _run(MatchSettings(reverse_turns=True), lean, dt=5.0)
    _, _, off = _run(MatchSettings(reverse_turns=False, lone_reverse_turns=False), lean, dt=5.0)
    assert on == off


@pytest.mark.parametrize("restore_at", [1, 2, 3])
def test_tracker_reverse_turns_survives_a_checkpoint(restore_at: int) -> None:
    """The direction of the last step is part of the state: a tracker written and read
    back before any fix continues with exactly the outputs of one never stopped."""
    settings = MatchSettings(reverse_turns=True)
    _, _, straight = _run(settings, 5.0)
    _, _, restored = _run(settings, 5.0, restore_at=restore_at)
    assert restored == straight


def test_reverse_turns_must_be_a_bool() -> None:
    """Validated like the other switches (the config loader names the key)."""
    assert MatchSettings(reverse_turns=False, lone_reverse_turns=False).problems() == []
    assert MatchSettings(reverse_turns=1).problems() == [  # type: ignore[arg-type]
        ("reverse_turns", "must be true or false, got 1")]


# Plain data (made up for the test): a two-way road west-east, shape points every 100 m,
# dead ends at x = -600 and x = 400. A vehicle drives east at 12 m/s without stopping,
# turns round at the dead end x = 400 (t = 72.5 s) and drives back west; a fix every
# 30 s. Its fixes reverse at x = 250 (t = 60 s) as a dwelling van's do, but it turned at
# the dead end 150 m further on.
WALK_ROAD = [(float(x), 0.0) for x in range(-600, 401, 100)]
WALK_XS = (-470.0, -110.0, 250.0, 190.0, -170.0)


def _walk(settings: MatchSettings, restore_at: int = -1,
          strip: bool = False) -> tuple[RoadNetwork, list[Commit], list[object]]:
    net = network_from_roads([Road(WALK_ROAD, way=8)])
    tracker = Tracker(net, "car3", settings)
    events: list[object] = []
    for i, x in enumerate(WALK_XS):
        if i == restore_at:
            blob = tracker.to_bytes()
            if strip:
                blob = _without_step_dir(blob)
            tracker = Tracker.from_bytes(net, settings, blob)
        events += tracker.update(Fix("car3", 30.0 * i, 0.0, 0.0, x, 1.0, 5.0))
    events += tracker.flush()
    return net, [e for e in events if isinstance(e, Commit)], events


def _without_step_dir(blob: bytes) -> bytes:
    """An LMT6 state (uncompressed) with ``step_dir`` taken out of its JSON header, as a
    state written before reverse_turns (or with it off) is."""
    import json

    assert blob[:4] == b"LMT6" and blob[4] == 0
    size = int.from_bytes(blob[5:9], "little")
    header = json.loads(blob[9:9 + size])
    assert "step_dir" in header
    del header["step_dir"]
    text = json.dumps(header).encode()
    return blob[:5] + len(text).to_bytes(4, "little") + text + blob[9 + size:]


def test_tracker_reverse_turns_keeps_a_dead_ends_turn_at_its_end() -> None:
    """A vehicle that went on to the dead end and back reverses its fixes too; the dead
    end 150 m ahead of the reversing fix is within what the step into it drove in 30 s,
    so no turn in the street is opened: the committed path is one connected route out to
    x = 400 and back, as long as the road driven (shapely's lengths of the road's pieces).
    With a turn in the street open at every vertex (street_turns) the same fixes are
    matched with a turn short of the end: the case the rule keeps out."""
    driven = (shapely.LineString(WALK_ROAD[1:]).length       # -500 -> 400
              + shapely.LineString(WALK_ROAD[4:]).length)    # 400 -> -200
    net, done, _ = _walk(MatchSettings(reverse_turns=True))
    path = [s for c in done for s in c.path]
    assert all(net.seg_to[a] == net.seg_from[b] for a, b in itertools.pairwise(path))
    road = shapely.LineString(WALK_ROAD)
    far = max(road.project(shapely.Point(*net.node_xy[net.seg_to[s]])) for s in path)
    assert far == pytest.approx(road.length)  # out to the dead end x = 400
    assert sum(float(net.seg_len[s]) for s in path) == pytest.approx(driven)
    net, done, _ = _walk(MatchSettings(street_turns=True))
    path = [s for c in done for s in c.path]
    far = max(road.project(shapely.Point(*net.node_xy[net.seg_to[s]])) for s in path)
    assert far < road.length


@pytest.mark.parametrize("restore_at", [2, 3])
def test_tracker_reverse_turns_rebuilds_step_dir_of_an_older_state(restore_at: int) -> None:
    """A state without ``step_dir`` (written before reverse_turns or with it off) gets it
    back from the fix log: read back just before the dwell fix or the step out of it, it
    is the state as written, and the tracker continues exactly like one never stopped
    (at 3, without the direction the reversal would go unseen)."""
    settings = MatchSettings(reverse_turns=True)
    assert _walk(settings, restore_at, strip=True)[2] == _walk(settings)[2]
    assert _run(settings, 5.0, restore_at=restore_at, strip=True)[2] == _run(settings, 5.0)[2]
    net = network_from_roads([Road(WALK_ROAD, way=8)])
    tracker = Tracker(net, "car3", settings)
    for i, x in enumerate(WALK_XS[:restore_at]):
        tracker.update(Fix("car3", 30.0 * i, 0.0, 0.0, x, 1.0, 5.0))
    blob = tracker.to_bytes()
    assert Tracker.from_bytes(net, settings, _without_step_dir(blob)).to_bytes() == blob
