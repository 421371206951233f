"""The largest eps's two other jobs as settings of their own: ``MatchSettings.off_network_m``
(the off-network radius) and ``MatchSettings.join_margin_m`` (the join limit's margin).

Defaults keep today's behaviour (0: the largest eps, twice the largest eps); a ladder
without its 60 m level keeps today's radii with ``off_network_m = 60`` and
``join_margin_m = 120``.
"""

from __future__ import annotations

import json

import pytest
import shapely

from livematch.core.build import Road, network_from_roads
from livematch.core.events import Assignment, Commit, Filtered
from livematch.core.fix import Fix
from livematch.core.geometry import Projection
from livematch.core.network import RoadNetwork
from livematch.core.settings import MatchSettings
from livematch.core.tracker import Tracker
from livematch.errors import BadConfigError
from livematch.pipeline import Output, Pipeline, matcher_settings_from_mapping

T0 = 1_764_576_000.0
PROJ = Projection.local(24.94, 60.17)
LEAN = (15.0, 30.0)
ROAD = [(0.0, 0.0), (1500.0, 0.0)]  # the only road, along y = 0


def _one_road() -> RoadNetwork:
    """One two-way road along y = 0, 1.5 km, shape points every 50 m."""
    return network_from_roads([Road([(float(x), 0.0) for x in range(0, 1501, 50)], way=1)],
                              PROJ)


def _to_car_park(off_m: float) -> list[tuple[float, float]]:
    """1 Hz positions: 20 s along the road at 10 m/s, 4 s across to ``off_m`` north of it
    (a car park beside the road), 60 s there creeping east at 1 m/s, 4 s back, 20 s on."""
    pts = [(10.0 * k, 0.0) for k in range(20)]
    pts += [(200.0 + 5.0 * k, off_m * k / 4.0) for k in range(1, 5)]
    pts += [(220.0 + 1.0 * k, off_m) for k in range(1, 61)]
    pts += [(280.0 + 5.0 * k, off_m * (4 - k) / 4.0) for k in range(1, 5)]
    pts += [(300.0 + 10.0 * k, 0.0) for k in range(1, 21)]
    return pts


def _messages(pts: list[tuple[float, float]]) -> list[tuple[str, bytes, float]]:
    out = []
    for i, (x, y) in enumerate(pts):
        lon, lat = PROJ.to_lonlat(x, y)
        body = {"time": T0 + i, "lat": round(float(lat), 7), "lon": round(float(lon), 7)}
        out.append(("fleet/van/position", json.dumps(body).encode(), T0 + i + 0.5))
    return out


def _alert_kinds(p: Pipeline, pts: list[tuple[float, float]]) -> list[str]:
    out: list[Output] = []
    for topic, payload, at in _messages(pts):
        out.extend(p.handle(topic, payload, at))
    out.extend(p.flush())
    return [o.record["kind"] for o in out if o.kind == "alert"]


def test_the_car_park_is_40_m_from_the_road() -> None:
    """The scene's premise, measured outside livematch (shapely's distance)."""
    assert shapely.LineString(ROAD).distance(shapely.Point(250.0, 40.0)) == pytest.approx(40.0)


def test_lean_ladder_goes_off_network_40_m_from_the_road_with_the_default_radius() -> None:
    """Ladder 15 / 30 m, default radius (its largest eps, 30 m): the 60 s in the car park
    are off the network (every level refuses those fixes: ``no_road_nearby``)."""
    p = Pipeline(_one_road(), MatchSettings(eps_levels=LEAN))
    assert _alert_kinds(p, _to_car_park(40.0)) == ["off_network", "on_network"]
    assert p.counters["filtered:no_road_nearby"] > 30
    assert p.counters["filtered:road_beyond_eps"] == 0


def test_lean_ladder_with_a_60_m_radius_stays_on_the_network() -> None:
    """Ladder 15 / 30 m with ``off_network_m`` 60: the same fixes have a road within 60 m,
    so they are ``road_beyond_eps`` (no answer, but on the network): no alert, as today's
    ladder 15 / 30 / 60 m, which matches them at its 60 m level, gives none."""
    p = Pipeline(_one_road(), MatchSettings(eps_levels=LEAN, off_network_m=60.0))
    assert _alert_kinds(p, _to_car_park(40.0)) == []
    beyond = p.counters["filtered:road_beyond_eps"]
    assert beyond > 30 and p.counters["filtered:no_road_nearby"] == 0
    today = Pipeline(_one_road(), MatchSettings())
    assert _alert_kinds(today, _to_car_park(40.0)) == []
    assert today.counters["eps_m:60.0"] == beyond  # the fixes today's 60 m level matched


def test_beyond_the_radius_is_still_off_the_network() -> None:
    """A car park 70 m from the road (shapely: 70 m) is beyond a 60 m radius: off the
    network with the lean ladder and radius 60, as with today's ladder."""
    road = shapely.LineString(ROAD)
    assert road.distance(shapely.Point(250.0, 70.0)) == pytest.approx(70.0)
    pts = _to_car_park(70.0)
    between = sum(30.0 < road.distance(shapely.Point(x, y)) <= 60.0 for x, y in pts)
    assert between == 4  # on the way across and back (52.5 and 35 m)
    for settings, beyond in ((MatchSettings(eps_levels=LEAN, off_network_m=60.0), between),
                             (MatchSettings(), 0)):
        p = Pipeline(_one_road(), settings)
        assert _alert_kinds(p, pts) == ["off_network", "on_network"]
        assert p.counters["filtered:road_beyond_eps"] == beyond


def test_tracker_reasons_per_fix() -> None:
    """In the core: each fix 40 m off is ``road_beyond_eps`` with radius 60 and
    ``no_road_nearby`` without; the default radius never asks the index (no reason
    other than today's)."""
    net = _one_road()
    pts = _to_car_park(40.0)
    fixes = [Fix("v", T0 + i, 0.0, 0.0, x, y) for i, (x, y) in enumerate(pts)]
    off = {f.t for f in fixes if shapely.LineString(ROAD).distance(shapely.Point(f.x, f.y))
           > 30.0}
    for radius, reason in ((0.0, "no_road_nearby"), (60.0, "road_beyond_eps")):
        tracker = Tracker(net, "v", MatchSettings(eps_levels=LEAN, off_network_m=radius))
        events = [e for f in fixes for e in tracker.update(f)]
        refused = {e.t: e.reason for e in events if isinstance(e, Filtered)}
        assert set(refused) == off and set(refused.values()) == {reason}


def test_default_off_network_radius_is_the_largest_eps() -> None:
    """``off_network_m`` 60 on today's ladder changes nothing: the same events, fix by fix
    (a fix 70 m off is ``no_road_nearby`` either way)."""
    net = _one_road()
    fixes = [Fix("v", T0 + i, 0.0, 0.0, x, y) for i, (x, y) in enumerate(_to_car_park(70.0))]
    runs = []
    for settings in (MatchSettings(), MatchSettings(off_network_m=60.0)):
        tracker = Tracker(net, "v", settings)
        runs.append([e for f in fixes for e in tracker.update(f)] + tracker.flush())
    assert runs[0] == runs[1]
    assert any(isinstance(e, Filtered) and e.reason == "no_road_nearby" for e in runs[0])


# ------------------------------------------------------------------------ join margin

X0 = 300.0  # where the fixes leave the south road
LINK = X0 + 180.0  # the link north, 180 m further east


def _u_turn_block() -> RoadNetwork:
    """A south road along y = 0 to x = LINK, a 50 m link north at x = LINK, and a north
    road back west along y = 50 (shape points every 20 m)."""
    return network_from_roads([
        Road([(float(x), 0.0) for x in range(0, int(LINK) + 1, 20)], way=1),
        Road([(LINK, 0.0), (LINK, 50.0)], way=2),
        Road([(float(x), 50.0) for x in range(int(LINK), -1, -20)], way=3),
    ])


def _committed_path(settings: MatchSettings) -> list[tuple[float, float, float, float]]:
    """The committed path of a vehicle east on the south road to x = X0 (1 Hz), then,
    8 s later, west on the north road from x = X0: the two stretches lie 50 m apart and
    the road between them runs round the link."""
    net = _u_turn_block()
    pts = [(float(x), 0.0, float(i)) for i, x in enumerate(range(0, int(X0) + 1, 10))]
    t = pts[-1][2] + 8.0
    pts += [(X0 - 10.0 * k, 50.0, t + k) for k in range(25)]
    tracker = Tracker(net, "v", settings)
    events = [e for x, y, tt in pts for e in tracker.update(Fix("v", T0 + tt, 0.0, 0.0, x, y))]
    events += tracker.flush()
    xy = net.node_xy
    return [(float(xy[net.seg_from[s]][0]), float(xy[net.seg_from[s]][1]),
             float(xy[net.seg_to[s]][0]), float(xy[net.seg_to[s]][1]))
            for e in events if isinstance(e, Commit) for s in e.path]


def test_join_margin_decides_the_committed_join() -> None:
    """The join between the two stretches runs from x = 300 on the south road round the
    link to x = 300 on the north road: 180 + 50 + 180 = 410 m (shapely's length of that
    line). 8 s apart, the limit is 40 x 8 + the margin: 380 m with the lean ladder's own
    margin (2 x 30 m), so the path breaks there; 440 m with ``join_margin_m`` 120 (today's
    2 x 60 m), so the path goes round the link. (``join_detour`` 0: the speed bound alone.)"""
    join = shapely.LineString([(X0, 0.0), (LINK, 0.0), (LINK, 50.0), (X0, 50.0)]).length
    assert join == pytest.approx(410.0)
    lean = MatchSettings(eps_levels=LEAN, join_detour=0.0)
    kept = MatchSettings(eps_levels=LEAN, join_detour=0.0, join_margin_m=120.0)
    assert 40.0 * 8 + 2 * 30.0 < join <= 40.0 * 8 + 120.0
    link = (LINK, 0.0, LINK, 50.0)
    broken = _committed_path(lean)
    joined = _committed_path(kept)
    assert link not in broken and link in joined
    # the joined path drives the join whole: east on the south road from x = 300 to the
    # link, north, and west on the north road back to x = 300; its length is the join's
    i = joined.index(link)
    east = [s for s in joined[:i] if s[1] == 0.0 and s[0] >= X0]
    west = [s for s in joined[i + 1:] if s[1] == 50.0 and s[2] >= X0]
    driven = sum(abs(s[2] - s[0]) + abs(s[3] - s[1]) for s in [*east, link, *west])
    assert driven == pytest.approx(join)
    # the lean ladder's default margin is twice its largest eps: 60 m gives the same path
    assert _committed_path(MatchSettings(eps_levels=LEAN, join_detour=0.0,
                                         join_margin_m=60.0)) == broken


def test_join_limit_reads_the_margin() -> None:
    """``_join_limit``: bridge_speed_mps x dt + the margin (0: twice the largest eps)."""
    net = _u_turn_block()
    assert Tracker(net, "v", MatchSettings(join_detour=0.0))._join_limit(8.0) == 440.0
    assert Tracker(net, "v", MatchSettings(eps_levels=LEAN, join_detour=0.0)
                   )._join_limit(8.0) == 380.0
    assert Tracker(net, "v", MatchSettings(eps_levels=LEAN, join_detour=0.0,
                                           join_margin_m=120.0))._join_limit(8.0) == 440.0


# ------------------------------------------------------------------------ validation

@pytest.mark.parametrize(("section", "message"), [
    ({"off_network_m": 40},
     "a.toml: matcher.off_network_m must be 0 (the largest eps) or at least the largest eps "
     "level (60), got 40"),
    ({"eps_levels": [15, 30], "off_network_m": 20.0},
     "a.toml: matcher.off_network_m must be 0 (the largest eps) or at least the largest eps "
     "level (30), got 20.0"),
    ({"off_network_m": -1}, "a.toml: matcher.off_network_m must be a number >= 0, got -1"),
    ({"off_network_m": "60"}, "a.toml: matcher.off_network_m must be a finite number, got '60'"),
    ({"join_margin_m": -5.0}, "a.toml: matcher.join_margin_m must be a number >= 0, got -5.0"),
    ({"join_margin_m": float("inf")},
     "a.toml: matcher.join_margin_m must be a finite number, got inf"),
])
def test_radius_and_margin_validated_naming_key_and_file(section, message) -> None:
    with pytest.raises(BadConfigError) as info:
        matcher_settings_from_mapping(section, "a.toml")
    assert str(info.value) == message


def test_radius_and_margin_from_config() -> None:
    """The lean ladder with today's radii, as a [matcher] table gives it."""
    s = matcher_settings_from_mapping(
        {"eps_levels": [15, 30], "off_network_m": 60, "join_margin_m": 120}, "a.toml")
    assert s == MatchSettings(eps_levels=LEAN, off_network_m=60.0, join_margin_m=120.0)
    assert (s.off_network_radius(), s.join_margin()) == (60.0, 120.0)
    assert MatchSettings(eps_levels=(15.0, 30.0, 60.0), off_network_m=60.0).problems() == []


def test_radius_and_margin_not_in_the_state() -> None:
    """Settings are not serialised: a tracker written with one radius and margin goes on
    under others (only the ladder must agree), answering as one never written."""
    net = _one_road()
    fixes = [Fix("v", T0 + i, 0.0, 0.0, x, y) for i, (x, y) in enumerate(_to_car_park(40.0))]
    writer = Tracker(net, "v", MatchSettings(eps_levels=LEAN))
    for f in fixes[:30]:
        writer.update(f)
    kept = MatchSettings(eps_levels=LEAN, off_network_m=60.0, join_margin_m=120.0)
    restored = Tracker.from_bytes(net, kept, writer.to_bytes())
    straight = Tracker(net, "v", kept)
    for f in fixes[:30]:
        straight.update(f)
    after = [[e for f in fixes[30:] for e in t.update(f)] for t in (restored, straight)]
    assert after[0] == after[1]
    assert any(isinstance(e, Filtered) and e.reason == "road_beyond_eps" for e in after[0])
    assert any(isinstance(e, Assignment) for e in after[0])
