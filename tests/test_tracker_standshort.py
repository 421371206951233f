"""``stand_short_m``: a stand's run past the middle of a short segment is reported at the
vertex too (with ``stand_at_vertex``), through Tracker.update and Tracker.flush, checked
with shapely's distances."""

from __future__ import annotations

import math
from dataclasses import replace

import pytest

from livematch.core.build import Road, network_from_roads
from livematch.core.events import Commit, Event, MatchedFix
from livematch.core.fix import Fix
from livematch.core.network import RoadNetwork
from livematch.core.settings import MatchSettings
from livematch.core.tracker import Tracker
from livematch.errors import BadConfigError
from livematch.pipeline import matcher_settings_from_mapping

shapely = pytest.importorskip("shapely")

V = 200.0
OFF = MatchSettings(stand_short_m=0.0)


def _network(short: float) -> RoadNetwork:
    """A two-way road west-east, shape points every 10 m up to x = 200, then one at
    x = 200 + ``short`` (a short segment S), then every 10 m again."""
    xs = [float(x) for x in range(0, 210, 10)] + [V + short]
    xs += [V + short + 10.0 * i for i in range(1, 20)]
    return network_from_roads([Road([(x, 0.0) for x in xs], way=7)])


def _fixes(lean: float) -> list[tuple[float, float]]:
    """A van drives east at 10 m/s to x = 200 and stands there for 40 s, to the end of
    the log, while the GNSS error leans east along the road by up to ``lean`` metres (a
    slow, correlated drift) and wanders by about half a metre from fix to fix (invented
    data shaped like the simulator's Gauss-Markov error)."""
    approach = [(30.0 + 10.0 * i, 1.0) for i in range(18)]
    stand = [(V + min(lean, 0.3 * i) + 0.4 * math.sin(1.7 * i), 1.0 + 0.4 * math.cos(1.3 * i))
             for i in range(1, 41)]
    return approach + stand


def _settled(net: RoadNetwork, settings: MatchSettings,
             fixes: list[tuple[float, float]]) -> tuple[list[MatchedFix], list[int]]:
    tracker = Tracker(net, "van9", settings)
    events: list[Event] = []
    for i, (x, y) in enumerate(fixes):
        events += tracker.update(Fix("van9", float(i), 0.0, 0.0, x, y, 5.0))
    events += tracker.flush()
    commits = [e for e in events if isinstance(e, Commit)]
    settled = sorted((f for c in commits for f in c.fixes), key=lambda f: f.t)
    return settled, [s for c in commits for s in c.path]


def _ends(net: RoadNetwork, f: MatchedFix) -> tuple[float, float]:
    """(from x, to x) of the segment a final answer is on."""
    return (float(net.node_xy[net.seg_from[f.segment], 0]),
            float(net.node_xy[net.seg_to[f.segment], 0]))


def test_a_stand_dragged_past_the_middle_of_a_short_segment_goes_to_the_vertex() -> None:
    """S runs from x = 200 to x = 203. The stand's fixes lean up to 2.7 m east: without
    the key the stand's later fixes are committed past the middle of S (x > 201.5),
    where the middle-of-segment guard keeps them; with ``stand_short_m`` = 10 every fix
    of the stand is reported at x = 200 as the end of the segment 190 -> 200 (shapely:
    the point lies on that segment's line, at its end), each within eps (15 m) of its
    fix (shapely's Point.distance). The committed path and the approach are unchanged."""
    net = _network(3.0)
    fixes = _fixes(2.7)
    old, old_path = _settled(net, OFF, fixes)
    new, new_path = _settled(net, MatchSettings(stand_short_m=10.0), fixes)
    assert new_path == old_path
    stand = range(18, len(fixes))
    past = [f for f in old[stand.start:] if _ends(net, f) == (V, V + 3.0)
            and f.offset_m > 1.5]
    assert len(past) >= 10  # the guard kept these past the middle of S
    for i in stand:
        f = new[i]
        a, b = net.node_xy[net.seg_from[f.segment]], net.node_xy[net.seg_to[f.segment]]
        line = shapely.LineString([tuple(map(float, a)), tuple(map(float, b))])
        assert line.coords[-1] == pytest.approx((V, 0.0))
        assert f.offset_m == pytest.approx(line.length)
        assert shapely.Point(f.x, f.y).distance(line) == pytest.approx(0.0, abs=1e-9)
        assert shapely.Point(fixes[i]).distance(shapely.Point(f.x, f.y)) <= 15.0
    assert new[:stand.start - 1] == old[:stand.start - 1]


def test_a_segment_as_long_as_the_bound_keeps_the_guard() -> None:
    """The same stand beside a 10 m S, leaning up to 6 m east (past its middle): with
    ``stand_short_m`` = 10 (a segment shorter than 10 m) and with 5 m (``sigma_m``) the
    answers are those with the key off (0, the default), where the middle-of-segment
    guard acts."""
    net = _network(10.0)
    fixes = _fixes(6.0)
    off = _settled(net, OFF, fixes)
    assert _settled(net, MatchSettings(stand_short_m=10.0), fixes) == off
    assert _settled(net, MatchSettings(stand_short_m=5.0), fixes) == off
    assert _settled(net, MatchSettings(), fixes) == off


def test_five_metres_act_on_a_segment_shorter_than_sigma() -> None:
    """At 5 m (``sigma_m``, the value of the decision runs) the 3 m S of the first test
    is short, so the answers are those of ``stand_short_m`` = 10 there, not those of 0."""
    net = _network(3.0)
    fixes = _fixes(2.7)
    on = _settled(net, MatchSettings(stand_short_m=5.0), fixes)
    assert on == _settled(net, MatchSettings(stand_short_m=10.0), fixes)
    assert on != _settled(net, OFF, fixes)


def test_fixes_that_spread_wider_than_a_stand_keep_their_answers() -> None:
    """The same van, its fixes past the middle of the 3 m S, but swinging 7 m to either
    side of the road (14 m apart, more than the 10 m, 2 ``sigma_m``, within which the
    tracker reads a stand): the fixes stay within eps (15 m) of V for 40 s, as those of
    a vehicle circling a small loop round V do, yet do not stand, so the run stops at
    the middle of S as without the key (the answers equal those with the key off)."""
    net = _network(3.0)
    approach = [(30.0 + 10.0 * i, 1.0) for i in range(18)]
    swing = [(V + min(2.7, 0.3 * i) + 0.4 * math.sin(1.7 * i), 7.0 * math.sin(0.9 * i))
             for i in range(1, 41)]
    fixes = approach + swing
    old, _ = _settled(net, OFF, fixes)
    assert sum(_ends(net, f) == (V, V + 3.0) and f.offset_m > 1.5 for f in old) >= 10
    assert max(math.dist(a, b) for a in swing for b in swing) > 10.0
    assert _settled(net, MatchSettings(stand_short_m=10.0), fixes) == _settled(net, OFF, fixes)


def test_the_rule_needs_stand_at_vertex() -> None:
    """With ``stand_at_vertex`` off the key changes nothing."""
    net = _network(3.0)
    fixes = _fixes(2.7)
    off = MatchSettings(stand_at_vertex=False, stand_short_m=0.0)
    assert _settled(net, replace(off, stand_short_m=10.0), fixes) == _settled(net, off, fixes)


def test_the_key_is_validated() -> None:
    """stand_short_m is a number of metres >= 0 in [matcher], 0 (off) by default."""
    assert MatchSettings().stand_short_m == 0.0
    assert matcher_settings_from_mapping({"stand_short_m": 10},
                                         "a.toml").stand_short_m == 10
    assert [k for k, _ in MatchSettings(stand_short_m=-1.0).problems()] == ["stand_short_m"]
    assert [k for k, _ in MatchSettings(stand_short_m=math.inf).problems()] == [
        "stand_short_m"]
    with pytest.raises(BadConfigError, match=r"matcher\.stand_short_m"):
        matcher_settings_from_mapping({"stand_short_m": "long"}, "a.toml")
