"""A lone reversal of the fixes at an outlier opens no turn in the street
(``MatchSettings.lone_reverse_turns``, ``REVERSE_TURN_MPS``)."""

from __future__ import annotations

import itertools
import math

import pytest

from livematch.core import tracker as tracker_module
from livematch.core.build import Road, network_from_roads
from livematch.core.events import Commit, Filtered
from livematch.core.fix import Fix
from livematch.core.network import RoadNetwork
from livematch.core.settings import MatchSettings
from livematch.core.tracker import REVERSE_TURN_MPS, Tracker

shapely = pytest.importorskip("shapely")

# Plain data (made up for the test): a two-way road west-east along y = 0 from a dead end
# at x = -600 to one at x = 600, shape points every 100 m (no U-turn there in the sweep),
# and a side road from the south joining it at x = 0. A van reports every 15 s at 6 m/s:
# north up the side road, right at the junction, then east. Its fix at 45 s is an outlier
# 180 m behind it, on the main road west of the junction: the fixes go north, west, then
# back east, a reversal at the outlier (mean speed of the two steps 12 m/s).
MAIN = [(float(x), 0.0) for x in range(-600, 700, 100)]
SIDE = [(0.0, -400.0), (0.0, 0.0)]
TRUE = [(0.0, -180.0), (0.0, -90.0), (0.0, 0.0), (90.0, 0.0), (180.0, 0.0), (270.0, 0.0),
        (360.0, 0.0)]
OUTLIER = 3
SEEN = [(-90.0, 3.0) if i == OUTLIER else xy for i, xy in enumerate(TRUE)]


def _run(settings: MatchSettings) -> tuple[RoadNetwork, list[object]]:
    net = network_from_roads([Road(MAIN, way=5), Road(SIDE, way=6)])
    tracker = Tracker(net, "van3", settings)
    events: list[object] = []
    for i, (x, y) in enumerate(SEEN):
        events += tracker.update(Fix("van3", 15.0 * i, 0.0, 0.0, x, y, 5.0))
    events += tracker.flush()
    return net, events


def _final_error(net: RoadNetwork, events: list[object]) -> float:
    """Distance from the outlier fix's final answer to the van's true position there, by
    shapely's interpolation along the answer's segment."""
    f = next(f for e in events if isinstance(e, Commit) for f in e.fixes
             if f.t == 15.0 * OUTLIER)
    line = shapely.LineString([net.node_xy[net.seg_from[f.segment]],
                               net.node_xy[net.seg_to[f.segment]]])
    return float(line.interpolate(f.offset_m).distance(shapely.Point(TRUE[OUTLIER])))


def _turns(net: RoadNetwork, events: list[object]) -> list[float]:
    path = [s for e in events if isinstance(e, Commit) for s in e.path]
    return [float(net.node_xy[net.seg_to[a]][0]) for a, b in itertools.pairwise(path)
            if int(net.seg_twin[a]) == b]


@pytest.mark.pure_python  # lifts a Final constant (inlined when compiled)
def test_a_reversal_at_an_outlier_opens_no_turn(monkeypatch: pytest.MonkeyPatch) -> None:
    """With the rule on, the outlier is dropped by the spike test and its final answer
    is where the van was (interpolated), exactly as with the rule off. Without the speed
    bound (the rule as session 12 left it), the turn opened at the outlier's vertex made
    the path out to it and back cheap: the outlier was kept, answered 180 m behind the
    van, and the path turned round at x = -100 where the van never went."""
    into, out = (math.dist(SEEN[i], SEEN[i + 1]) / 15.0 for i in (OUTLIER - 1, OUTLIER))
    assert (into + out) / 2.0 > REVERSE_TURN_MPS  # 6 and 18 m/s
    net, off = _run(MatchSettings(lone_reverse_turns=False))
    assert any(isinstance(e, Filtered) and e.reason == "spike" and e.t == 15.0 * OUTLIER
               for e in off)
    assert _final_error(net, off) < 1.0
    assert -100.0 not in _turns(net, off)
    net, on = _run(MatchSettings(lone_reverse_turns=True))
    assert on == off
    monkeypatch.setattr(tracker_module, "REVERSE_TURN_MPS", float("inf"))
    net, old = _run(MatchSettings(lone_reverse_turns=True))
    assert not any(isinstance(e, Filtered) and e.reason == "spike" for e in old)
    assert -100.0 in _turns(net, old)
    assert _final_error(net, old) == pytest.approx(180.0)
