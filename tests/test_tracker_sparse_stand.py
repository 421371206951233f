"""A stand seen by fixes 30 s apart, committed where the vehicle stood (sparse_stand_wait)."""

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
# 100 m and a last 13 m segment beyond the shape point at x = 300 to a dead end at 313.
# A van reports every 30 s: driving east, three fixes at a stand at x = 300 while the
# GNSS error leans east by 4-7 m (correlated error), then back west the way it came.
# It never drives past x = 300.
ROAD = [(0.0, 0.0), (100.0, 0.0), (200.0, 0.0), (300.0, 0.0), (313.0, 0.0)]
STAND_X = 300.0
LEANS = [(5.0, 6.0, 7.0), (4.0, 7.0, 6.0), (6.0, 6.0, 6.0)]


def _commits(settings: MatchSettings, lean: tuple[float, ...], dt: float = 30.0,
             ) -> tuple[RoadNetwork, list[Commit]]:
    net = network_from_roads([Road(ROAD, way=7)])
    xs = [0.0, 150.0, *(STAND_X + e for e in lean), 160.0, 20.0]
    tracker = Tracker(net, "van5", settings)
    events = [e for i, x in enumerate(xs)
              for e in tracker.update(Fix("van5", dt * i, 0.0, 0.0, x, 1.0, 5.0))]
    return net, [e for e in events + tracker.flush() if isinstance(e, Commit)]


def _reach(net: RoadNetwork, seg: int) -> float:
    """How far east along the road a segment reaches, by shapely's linear referencing."""
    road = shapely.LineString(ROAD)
    ends = (net.node_xy[net.seg_from[seg]], net.node_xy[net.seg_to[seg]])
    return max(road.project(shapely.Point(*xy)) for xy in ends)


@pytest.mark.parametrize("lean", LEANS)
def test_tracker_sparse_stand_committed_at_the_stand(lean: tuple[float, ...]) -> None:
    """With sparse_stand_wait, the commit that settles the stand also holds the step that
    leaves it, so stand_loops cuts out "on to x = 306, U-turn at the dead end, back": no
    fix and no path segment reaches past x = 300 (shapely's linear referencing of the
    road as the outside measure), and the path is one connected route. Without it the
    stand is committed on the last segment, which the van never drove."""
    net, done = _commits(MatchSettings(sparse_stand_wait=True), lean)
    fixes = [f for c in done for f in c.fixes]
    assert [f.t for f in fixes] == [30.0 * i for i in range(7)]
    assert max(_reach(net, f.segment) for f in fixes) <= STAND_X
    path = [s for c in done for s in c.path]
    assert max(_reach(net, s) for s in path) <= STAND_X
    assert all(net.seg_to[a] == net.seg_from[b] for a, b in itertools.pairwise(path))
    stand = [f for f in fixes if 60.0 <= f.t <= 120.0]
    assert all(abs(f.x - STAND_X) < 1e-9 and abs(f.y) < 1e-9 for f in stand)
    net, done = _commits(MatchSettings(sparse_stand_wait=False), lean)
    ahead = [f.t for c in done for f in c.fixes if _reach(net, f.segment) > STAND_X]
    assert ahead == [60.0, 90.0, 120.0]


@pytest.mark.parametrize("lean", LEANS)
def test_tracker_sparse_stand_wait_leaves_dense_fixes_alone(lean: tuple[float, ...]) -> None:
    """At or below gap_s between fixes (here 5 s, the same positions) the setting changes
    no commit: it is a rule for bridged steps only."""
    _, on = _commits(MatchSettings(sparse_stand_wait=True), lean, dt=5.0)
    _, off = _commits(MatchSettings(sparse_stand_wait=False), lean, dt=5.0)
    assert on == off


def test_sparse_stand_wait_must_be_a_bool() -> None:
    """Validated like the other switches (the config loader names the key)."""
    assert MatchSettings(sparse_stand_wait=False).problems() == []
    assert MatchSettings(sparse_stand_wait=1).problems() == [  # type: ignore[arg-type]
        ("sparse_stand_wait", "must be true or false, got 1")]
