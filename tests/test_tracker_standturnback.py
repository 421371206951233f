"""``stand_turnback``: a loop round a stand that the committed path drives without a
U-turn is committed as a turn back at the stand's vertex, through Tracker.update and
Tracker.flush, checked with shapely's distances (invented Larkmoor-style roads and
fixes, plain data)."""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest

from livematch.core import tracker as tracker_mod
from livematch.core.build import Road, network_from_roads
from livematch.core.events import Commit, Event, MatchedFix
from livematch.core.fix import Fix
from livematch.core.network import RoadNetwork
from livematch.core.settings import MatchSettings
from livematch.core.tracker import Tracker
from livematch.errors import BadConfigError
from livematch.pipeline import matcher_settings_from_mapping
from tests.catalogue import path_line, path_ways

shapely = pytest.importorskip("shapely")

ON = MatchSettings(stand_turnback=True)
OFF = MatchSettings(stand_turnback=False)
EPS = 15.0
J = (0.0, 0.0)  # the junction where the stem leaves the approach road
V = (6.0, 0.0)  # the end of the stem, where the ring begins and the van stands
# a turning ring from V back to J, about 40 m round (a small loop at a street's end)
SMALL_RING = [V, (11.0, -3.0), (15.0, 1.0), (12.0, 7.0), (5.0, 8.0), J]
# a ring that reaches 40 m east of V before it comes back
LARGE_RING = [V, (25.0, -10.0), (46.0, 0.0), (25.0, 12.0), (5.0, 8.0), J]


def _network(ring: list[tuple[float, float]], stem_way: int = 2,
             one_way_stem: bool = False) -> RoadNetwork:
    """A two-way road from the west into J (shape points every 10 m), a stem J -> V of
    two 3 m segments, and a ring from V back to J."""
    return network_from_roads([
        Road([(float(x), 0.0) for x in range(-200, 1, 10)], way=1),
        Road([J, (3.0, 0.0), V], way=stem_way, oneway=one_way_stem),
        Road(ring, way=3),
    ])


def _approach() -> list[tuple[float, float]]:
    """East at 10 m/s to x = -10, then slowly into V."""
    return [(-150.0 + 10.0 * i, 1.0) for i in range(15)] + [(-3.0, 1.0), (2.0, 0.5),
                                                             (5.0, 0.5)]


def _stand(seconds: int = 40) -> list[tuple[float, float]]:
    """A stand at V whose GNSS error leans into the ring by up to 3 m and wanders by
    about half a metre from fix to fix (a slow, correlated drift, shaped like the
    simulator's Gauss-Markov error)."""
    out = []
    for i in range(seconds):
        f = min(1.0, i / 10.0)
        out.append((V[0] + 3.0 * f + 0.5 * math.sin(1.7 * i),
                    -1.0 * f + 0.5 * math.cos(1.3 * i)))
    return out


def _back_west() -> list[tuple[float, float]]:
    """Out of the stand the way the van came: back to J and west at 10 m/s."""
    return [(5.0, 0.5), (2.0, 0.5), (-3.0, 1.0)] + [(-10.0 - 10.0 * i, 1.0) for i in range(10)]


def _settled(net: RoadNetwork, settings: MatchSettings, fixes: list[tuple[float, float]],
             every: float = 1.0) -> tuple[list[MatchedFix], list[int]]:
    tracker = Tracker(net, "van4", settings)
    events: list[Event] = []
    for i, (x, y) in enumerate(fixes):
        events += tracker.update(Fix("van4", every * i, 0.0, 0.0, x, y, 5.0))
    events += tracker.flush()
    commits = [e for e in events if isinstance(e, Commit)]
    settled = sorted((f for c in commits for f in c.fixes), key=lambda f: f.t)
    return settled, [s for c in commits for s in c.path]


def test_a_stand_whose_path_goes_round_a_ring_turns_back_at_the_vertex() -> None:
    """The van comes in by the stem, stands 40 s at V and leaves the way it came. Off,
    the committed path drives the ring back to J (no U-turn to charge); on, it turns
    round at V and drives the stem back: no segment of the ring, the stem both ways.
    Every fix of the stand is reported at V (shapely: the point is V, within eps of
    its fix), and the whole trace lies within Fréchet distance eps of the new path
    (shapely's discrete Fréchet distance, densified to 0.5 m)."""
    net = _network(SMALL_RING)
    fixes = _approach() + _stand() + _back_west()
    old, old_path = _settled(net, OFF, fixes)
    new, new_path = _settled(net, ON, fixes)
    assert 3 in path_ways(net, old_path)  # the ring, without the rule
    assert 3 not in path_ways(net, new_path)
    assert path_ways(net, new_path).count(2) == 4  # the stem in and out: two segments each way
    for a, b in itertools.pairwise(new_path):
        assert int(net.seg_to[a]) == int(net.seg_from[b])  # connected
    stand = range(len(_approach()) + 1, len(_approach()) + len(_stand()))
    for i in stand:
        f = new[i]
        assert shapely.Point(f.x, f.y).distance(shapely.Point(V)) == pytest.approx(0.0,
                                                                                 abs=1e-9)
        assert shapely.Point(fixes[i]).distance(shapely.Point(f.x, f.y)) <= EPS
    trace = shapely.LineString(fixes)
    assert shapely.frechet_distance(trace, path_line(net, new_path), densify=0.5) <= EPS
    # the approach keeps its answers
    assert new[:len(_approach()) - 3] == old[:len(_approach()) - 3]


def test_the_key_on_is_the_default() -> None:
    """The default settings give the answers of ``stand_turnback`` = true (on since
    session 15), which differ from the key off on the ring."""
    assert MatchSettings().stand_turnback is True
    net = _network(SMALL_RING)
    fixes = _approach() + _stand() + _back_west()
    default = _settled(net, MatchSettings(), fixes)
    assert default == _settled(net, MatchSettings(stand_turnback=True), fixes)
    assert default != _settled(net, MatchSettings(stand_turnback=False), fixes)


def test_a_van_that_drives_round_the_ring_without_standing_keeps_it() -> None:
    """Fixes that follow the ring at 3 m/s without stopping: no stand, so the rule leaves
    the path round the ring (the answers equal those with the key off)."""
    net = _network(SMALL_RING)
    ring = shapely.LineString(SMALL_RING)
    fixes = _approach() + [tuple(map(float, ring.interpolate(3.0 * i).coords[0]))
                           for i in range(1, int(ring.length / 3.0))] + _back_west()
    off = _settled(net, OFF, fixes)
    assert 3 in path_ways(net, off[1])
    assert _settled(net, ON, fixes) == off


def test_fixes_that_follow_a_large_ring_keep_it() -> None:
    """The van stands at V, then drives round a ring that reaches 40 m east of V, its
    fixes on the ring: they lie farther than eps from the way back along the stem, so
    the ring is what the fixes show and the answers equal those with the key off."""
    net = _network(LARGE_RING)
    ring = shapely.LineString(LARGE_RING)
    fixes = _approach() + _stand() + [tuple(map(float, ring.interpolate(4.0 * i).coords[0]))
                                      for i in range(1, int(ring.length / 4.0))]
    fixes += [(-10.0 - 10.0 * i, 1.0) for i in range(10)]
    off = _settled(net, OFF, fixes)
    assert 3 in path_ways(net, off[1])
    assert _settled(net, ON, fixes) == off


def test_a_one_way_stem_is_never_driven_back() -> None:
    """With the stem one-way (J -> V) there is no way back along it: the turn can only
    be read at J (the stand's fixes lie within eps of J too), so the new path drives no
    segment from V towards J (none exists) and reports the stand within eps of its
    fixes (shapely's Point.distance); with the key off the path drives the ring."""
    net = _network(SMALL_RING, one_way_stem=True)
    fixes = _approach() + _stand() + _back_west()
    off = _settled(net, OFF, fixes)
    assert 3 in path_ways(net, off[1])
    new, new_path = _settled(net, ON, fixes)
    xy = net.node_xy
    for s in new_path:
        a, b = xy[net.seg_from[s]], xy[net.seg_to[s]]
        assert not (int(net.seg_way[s]) == 2 and float(b[0]) < float(a[0]))
    for a, b in itertools.pairwise(new_path):
        assert int(net.seg_to[a]) == int(net.seg_from[b])
    for f, fx in zip(new, fixes, strict=True):
        assert shapely.Point(fx).distance(shapely.Point(f.x, f.y)) <= EPS


def test_still_fixes_keep_the_ring() -> None:
    """A receiver that repeats its position while standing (no wandering error for the
    path to follow): the rule's wander guard leaves the answers as with the key off."""
    net = _network(SMALL_RING)
    fixes = _approach() + [(V[0] + 2.0, -0.5)] * 40 + _back_west()
    assert _settled(net, ON, fixes) == _settled(net, OFF, fixes)


def test_validation() -> None:
    """The key takes true or false only."""
    assert matcher_settings_from_mapping({"stand_turnback": True},
                                         "a.toml").stand_turnback is True
    with pytest.raises(BadConfigError):
        matcher_settings_from_mapping({"stand_turnback": "yes"}, "a.toml")


@pytest.mark.pure_python  # lifts a Final constant (inlined when compiled)
def test_a_stop_at_a_corner_of_a_narrow_block_at_5_s_keeps_the_block() -> None:
    """A ring round a narrow island (30 x 7 m, a block of service roads, entered and left
    at its corner J): the vehicle stops 30 s at the far corner and drives on round the
    block, then west; fixes every 5 s. The far side lies within eps of the way back, so
    one or two fixes there read like a turn back, and with the gap bound lifted
    (``TURNBACK_GAP_S``) the rule committed one, leaving out a side of the block the
    vehicle drove (docs/measured.md, "Session 15 (ringv)": the random walk's losses on
    the Helsinki extract). With the bound the committed path is the route driven: its
    line has Hausdorff distance 0 to the true route and the same length (shapely), as
    with the key off; at 1 s the rule leaves the block too."""
    block = [J, (30.0, 0.0), (30.0, -7.0), (0.0, -7.0), J]
    net = network_from_roads([Road([(float(x), 0.0) for x in range(-200, 1, 10)], way=1),
                              Road(block, way=3)])
    truth: list[tuple[float, float]] = [(x, 0.0) for x in np.arange(-150.0, 0.0, 10.0)]
    truth += [(x, 0.0) for x in np.arange(0.0, 30.0, 5.0)] + [block[1]] * 30
    ring = shapely.LineString(block[1:])
    truth += [tuple(map(float, ring.interpolate(5.0 * i).coords[0]))
              for i in range(1, int(ring.length / 5.0) + 1)]
    truth += [(-10.0 * i, 0.0) for i in range(1, 15)]
    # a GNSS error that leans south-east by about 2 m and wanders slowly
    fixes = [(float(x) + 2.0 + math.sin(0.05 * i) + 0.5 * math.sin(1.7 * i),
              float(y) - 2.0 + math.cos(0.07 * i) + 0.5 * math.cos(1.3 * i))
             for i, (x, y) in enumerate(truth)]
    for every in (1, 5):
        sparse = fixes[::every]
        _, path = _settled(net, ON, sparse, every=float(every))
        assert _settled(net, ON, sparse, every=float(every)) == _settled(net, OFF, sparse,
                                                                        every=float(every))
        line = path_line(net, path)
        # the true route from where the committed path begins to where it ends
        route = shapely.LineString([line.coords[0], *block, line.coords[-1]])
        assert line.hausdorff_distance(route) == pytest.approx(0.0, abs=1e-6)
        assert line.length == pytest.approx(route.length)
    lifted = pytest.MonkeyPatch()
    lifted.setattr(tracker_mod, "TURNBACK_GAP_S", math.inf)
    try:
        _, path = _settled(net, ON, fixes[::5], every=5.0)
    finally:
        lifted.undo()
    assert path_line(net, path).hausdorff_distance(route) > 5.0  # a side of the block left out
