"""A turn in the street at the reversing fix, opened only for a lone reversal
(``MatchSettings.lone_reverse_turns``)."""

from __future__ import annotations

import itertools

import pytest

from livematch.core.build import Road, network_from_roads
from livematch.core.events import Commit
from livematch.core.fix import Fix
from livematch.core.network import RoadNetwork
from livematch.core.settings import MatchSettings
from livematch.core.tracker import REVERSE_APART_S, Tracker

shapely = pytest.importorskip("shapely")

# Plain data (made up for the test): a two-way road west-east from x = -600 to a dead end
# at x = 600, shape points every 100 m from -100 to 500 (no U-turn there in the sweep), a
# junction at x = -200 with a side road south (a dead end 300 m on; U-turns are allowed
# at junctions). A van reports every 30 s: east, one fix while it dwells at the shape
# point x = 300 (the GNSS error leaning east by 4 m), back west, one fix while it dwells
# at the shape point x = 100 (leaning west by 4 m), then east again.
ROAD = [(-600.0, 0.0), (-200.0, 0.0), (-100.0, 0.0), (0.0, 0.0), (100.0, 0.0),
        (200.0, 0.0), (300.0, 0.0), (400.0, 0.0), (500.0, 0.0), (600.0, 0.0)]
SIDE = [(-200.0, 0.0), (-200.0, -300.0)]
XS = [20.0, 160.0, 304.0, 190.0, 96.0, 230.0, 380.0]
FIRST_X, SECOND_X = 300.0, 100.0


def _run(xs: list[float], settings: MatchSettings, dt: float = 30.0,
         restore_at: int = -1) -> tuple[RoadNetwork, list[Commit], list[object]]:
    net = network_from_roads([Road(ROAD, way=3), Road(SIDE, way=4)])
    tracker = Tracker(net, "van2", settings)
    events: list[object] = []
    for i, x in enumerate(xs):
        if i == restore_at:
            tracker = Tracker.from_bytes(net, settings, tracker.to_bytes())
        events += tracker.update(Fix("van2", dt * i, 0.0, 0.0, x, 1.0, 5.0))
    events += tracker.flush()
    return net, [e for e in events if isinstance(e, Commit)], events


def _path(done: list[Commit]) -> list[int]:
    return [s for c in done for s in c.path]


def _turns_at(net: RoadNetwork, path: list[int]) -> list[float]:
    """The x of every vertex where the path turns back onto the twin of a segment."""
    return [float(net.node_xy[net.seg_to[a]][0]) for a, b in itertools.pairwise(path)
            if int(net.seg_twin[a]) == b]


def _reach(net: RoadNetwork, seg: int) -> float:
    """How far east along ROAD a segment reaches, by shapely's linear referencing."""
    line = shapely.LineString(ROAD)
    return max(line.project(shapely.Point(*net.node_xy[v]))
               for v in (net.seg_from[seg], net.seg_to[seg])) + ROAD[0][0]


def test_lone_reverse_turns_turns_at_the_first_dwell_only() -> None:
    """The first reversal (at the fix x = 304, none before it) is lone: the van is turned
    at the shape point x = 300 where it dwelt, the dwell fix committed on the segment
    ending there (shapely's linear referencing), as with reverse_turns_near. The second
    (at x = 96, 60 s later, within REVERSE_APART_S) is not: no turn in the street at
    x = 100, where reverse_turns_near turns it. Off (the default), no turn at x = 300
    either: the dwell fix is taken for a spike and answered short of x = 300."""
    assert REVERSE_APART_S > 60.0
    net, done, _ = _run(XS, MatchSettings(lone_reverse_turns=True))
    fixes = [f for c in done for f in c.fixes]
    assert [f.t for f in fixes] == [30.0 * i for i in range(len(XS))]
    assert _reach(net, fixes[2].segment) == pytest.approx(FIRST_X)
    turns = _turns_at(net, _path(done))
    assert FIRST_X in turns
    assert SECOND_X not in turns
    net, done, _ = _run(XS, MatchSettings(reverse_turns_near=True))
    fixes = [f for c in done for f in c.fixes]
    assert _reach(net, fixes[2].segment) == pytest.approx(FIRST_X)
    assert _turns_at(net, _path(done))[-1] == SECOND_X
    net, done, _ = _run(XS, MatchSettings(lone_reverse_turns=False))
    fixes = [f for c in done for f in c.fixes]
    assert _reach(net, fixes[2].segment) < FIRST_X
    assert FIRST_X not in _turns_at(net, _path(done))


def test_lone_reverse_turns_leaves_dense_fixes_alone() -> None:
    """At or below gap_s between fixes (5 s here) nothing changes: a rule for gap steps."""
    assert (_run(XS, MatchSettings(lone_reverse_turns=True), dt=5.0)[2]
            == _run(XS, MatchSettings(lone_reverse_turns=False), dt=5.0)[2])


@pytest.mark.parametrize("restore_at", [1, 2, 3, 4, 5, 6])
def test_lone_reverse_turns_survives_a_checkpoint(restore_at: int) -> None:
    """The time of the last reversal is in the state: written and read back before any
    fix (between the two reversals too), the tracker continues with exactly the outputs
    of one never stopped."""
    settings = MatchSettings(lone_reverse_turns=True)
    assert _run(XS, settings, restore_at=restore_at)[2] == _run(XS, settings)[2]


def test_lone_reverse_turns_must_be_a_bool() -> None:
    """Validated like the other switches (the config loader names the key)."""
    assert MatchSettings(lone_reverse_turns=True).problems() == []
    assert MatchSettings(lone_reverse_turns=1).problems() == [  # type: ignore[arg-type]
        ("lone_reverse_turns", "must be true or false, got 1")]
