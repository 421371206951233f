"""A lone reversal in a dead-end spur opens no turn in the street on another branch of
the spur's junction (``MatchSettings.lone_reverse_turns``, ``Tracker._said_segment``)."""

from __future__ import annotations

import itertools

import pytest

from livematch.core import tracker as tracker_module
from livematch.core.build import Road, network_from_roads
from livematch.core.events import Commit
from livematch.core.fix import Fix
from livematch.core.network import RoadNetwork
from livematch.core.settings import MatchSettings
from livematch.core.tracker import Tracker

shapely = pytest.importorskip("shapely")

# Plain data (made up for the test, shaped after the junction of bench/accuracy.py's
# random walk, test extract, seed 31, 30 s, drive sim-058): a two-way road from the north
# ends at a junction J = (0, 0); a 50 m dead-end spur goes on south from J; a road leaves
# J to the west-south-west, with a shape point 9.5 m from J. A vehicle reports every 30 s,
# comes south slowly, drives to the spur's end and back to J between its fixes at 60 and
# 90 s, stands at J, and leaves north the way it came. The fix at 90 s lies south-west of
# J, nearest the west road just past its shape point, so the fixes reverse there (the
# mean speed of the two steps about 1.3 m/s: a slow, lone reversal).
NORTH = [(0.0, 900.0), (0.0, 600.0), (0.0, 300.0), (0.0, 0.0)]
SPUR = [(0.0, 0.0), (0.0, -50.0)]
WEST = [(0.0, 0.0), (-9.0, -3.0), (-110.0, -45.0), (-400.0, -45.0)]
SEEN = [(0.0, 620.0), (2.0, 300.0), (3.0, 27.0), (-8.0, -7.0), (-3.0, 37.0), (1.0, 330.0),
        (0.0, 640.0)]
# the road the vehicle truly drove (north road, spur out and back): for shapely
TRUE_ROADS = shapely.MultiLineString([NORTH, SPUR])


def _run(settings: MatchSettings) -> tuple[RoadNetwork, list[int]]:
    net = network_from_roads([Road(NORTH, way=1), Road(SPUR, way=2), Road(WEST, way=3)])
    tracker = Tracker(net, "walk58", settings)
    events: list[object] = []
    for i, (x, y) in enumerate(SEEN):
        events += tracker.update(Fix("walk58", 30.0 * i, 0.0, 0.0, x, y, 5.0))
    events += tracker.flush()
    path = [s for e in events if isinstance(e, Commit) for s in e.path]
    path = [s for s, _ in itertools.groupby(path)]  # one entry per segment driven
    return net, path


def _added_m(net: RoadNetwork, path: list[int]) -> float:
    """Metres of the committed path on road the vehicle never drove: each segment whose
    line does not lie within 0.5 m of the roads it drove, by shapely's geometry."""
    truth = TRUE_ROADS.buffer(0.5)
    added = 0.0
    for s in path:
        line = shapely.LineString([net.node_xy[net.seg_from[s]], net.node_xy[net.seg_to[s]]])
        if not line.within(truth):
            added += line.length
    return added


@pytest.mark.pure_python
def test_a_reversal_in_a_spur_opens_no_turn_on_another_branch(
        monkeypatch: pytest.MonkeyPatch) -> None:
    """With the rule on, the dead-end check searches on from the live answer at J (the
    road the candidates came in by, held at the junction where they split) and finds the
    spur's end, so no turn in the street is opened and the committed path adds no road,
    as with the rule off. Searched on from the best row's own segment (the west road's
    first, as before this change), the check saw only the west road, the rule opened a
    turn at its shape point and the path went out 9.5 m and back: 19 m never driven."""
    net, off = _run(MatchSettings(lone_reverse_turns=False))
    assert _added_m(net, off) == 0.0
    net, on = _run(MatchSettings(lone_reverse_turns=True))
    assert on == off
    monkeypatch.setattr(tracker_module.Tracker, "_said_segment",
                        lambda self, prev: self.last_seg)
    net, old = _run(MatchSettings(lone_reverse_turns=True))
    # 2 x 9.49 m (the hypotenuse of 9 and 3 m)
    assert _added_m(net, old) == pytest.approx(2 * (9.0**2 + 3.0**2) ** 0.5)
