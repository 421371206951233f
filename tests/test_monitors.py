"""Alert monitors in the core: route adherence, geofences, off-network and staleness."""

from __future__ import annotations

import itertools
import json
import math

import numpy as np
import pytest
import shapely
import shapely.affinity

from livematch.core.fix import Fix
from livematch.core.geometry import Projection
from livematch.core.monitors import (
    AlertSettings,
    Fence,
    FenceMonitor,
    FenceSet,
    OffNetworkMonitor,
    Route,
    RouteChain,
    RouteMonitor,
    StaleWatch,
    VehicleAlerts,
)

PROJ = Projection.local(24.94, 60.17)
SETTINGS = AlertSettings()


def fix(t: float, x: float, y: float, vehicle: str = "v") -> Fix:
    """A fix at (x, y) metres with its WGS84 position."""
    lon, lat = PROJ.to_lonlat(x, y)
    return Fix(vehicle, float(t), round(float(lon), 7), round(float(lat), 7), float(x), float(y))


def chain(points: list[tuple[float, float]], route_id: str = "r") -> RouteChain:
    return RouteChain(Route(route_id, np.array(points, dtype=float)), PROJ)


def along(points: list[tuple[float, float]], step: float) -> list[tuple[float, float]]:
    """Points every ``step`` metres along a polyline (its last point included)."""
    out: list[tuple[float, float]] = []
    for (ax, ay), (bx, by) in itertools.pairwise(points):
        length = math.hypot(bx - ax, by - ay)
        n = max(1, round(length / step))
        out.extend((ax + (bx - ax) * k / n, ay + (by - ay) * k / n) for k in range(n))
    out.append(points[-1])
    return out


def feed(monitor: RouteMonitor, points: list[tuple[float, float]], t0: float = 0.0
         ) -> list[tuple[int, str, dict]]:
    """Feed one fix per second; (index, kind, facts) of every alert."""
    out = []
    for i, (x, y) in enumerate(points):
        out.extend((i, a.alert_kind, a.facts) for a in monitor.update(fix(t0 + i, x, y)))
    return out


L_ROUTE = [(0.0, 0.0), (1000.0, 0.0), (1000.0, 1000.0)]


# ------------------------------------------------------------------------ route
def test_route_chain_progress_and_loop_detection():
    """Progress is arc length from the start; a route ending on its start is a cycle."""
    c = chain(L_ROUTE)
    assert (c.length, c.closed) == (2000.0, False)
    assert c.progress(1, 0.5) == 1500.0
    assert c.progress(0, 0.25, backward=True) == 1750.0  # reversed chain starts at the end
    loop = chain([(0, 0), (400, 0), (400, 400), (0, 400), (0, 0)])
    assert (loop.closed, loop.length, loop.forward.n_segments) == (True, 1600.0, 4)


def test_route_monitor_on_route_no_alert_and_progress():
    """Driving the route at 10 m/s gives no alert and progress equal to the distance driven."""
    m = RouteMonitor("r", chain(L_ROUTE), SETTINGS)
    assert feed(m, along(L_ROUTE, 10.0)[:150]) == []
    assert m.state == "on"
    assert m.progress_m == pytest.approx(1490.0)


def test_route_monitor_detour_off_and_back():
    """A detour 300 m off the route: one off_route after the persistence, one on_route."""
    pts = along([(0, 0), (500, 0), (500, 300), (1000, 300), (1000, 700)], 10.0)
    m = RouteMonitor("r", chain(L_ROUTE), SETTINGS)
    alerts = feed(m, pts)
    assert [k for _, k, _ in alerts] == ["off_route", "on_route"]
    (i_off, _, off), (i_on, _, on) = alerts
    # Last on-route fix: (500, 40), 40 m from the route = eps; first fix beyond: (500, 50)
    # at index 55; alert 10 s later.
    assert off["last_on_route_time"] == 54.0 and off["last_progress_m"] == 500.0
    assert i_off == 65 and off["distance_m"] == 150.0
    lon, lat = PROJ.to_lonlat(500.0, 0.0)
    assert off["route_lat"] == pytest.approx(float(lat), abs=1e-7)
    assert off["route_lon"] == pytest.approx(float(lon), abs=1e-7)
    # Back within 40 m of the route: first near fix (960, 300);
    # on_route after 5 near fixes. Duration: from the last on-route fix to that first fix.
    first_near = next(i for i, (x, y) in enumerate(pts) if i > i_off and x >= 960.0)
    assert i_on == first_near + SETTINGS.on_route_fixes - 1
    assert on["duration_s"] == first_near - 54
    assert on["length_m"] == pytest.approx(260.0 + 460.0, abs=0.05)
    assert on["progress_m"] == pytest.approx(1000.0 + 300.0, abs=0.05)  # at (1000, 300)
    assert m.state == "on"


def test_route_monitor_hysteresis_jitter_near_threshold():
    """Fixes jittering across eps beside the route, moving or standing, never alert."""
    # Moving parallel to the route 36..44 m away: the run beyond 40 m never lasts 10 s.
    offsets = [44.0, 44.0, 43.0, 36.0, 37.0] * 60
    pts = [(5.0 * i, dy) for i, dy in enumerate(offsets)]
    assert feed(RouteMonitor("r", chain([(0, 0), (2000, 0)]), SETTINGS), pts) == []
    # Standing 45-55 m off the route for 10 minutes: beyond eps but never 50 m from where
    # it stood, so no alert (the distance half of the persistence).
    rng = np.random.default_rng(4)
    still = [(300.0 + rng.normal(0, 3), 50.0 + rng.normal(0, 3)) for _ in range(600)]
    m = RouteMonitor("r", chain([(0, 0), (2000, 0)]), SETTINGS)
    assert feed(m, [(300.0, 30.0)] * 10 + still) == []
    # Stopping 85 m from the route, only 47 m from the last on-route fix (500, 38): two
    # eps away is beyond any jitter, so it alerts after 10 s all the same.
    stop = [(10.0 * i, 0.0) for i in range(50)] + [(500.0, 38.0)] + [(500.0, 85.0)] * 20
    alerts = feed(RouteMonitor("r", chain([(0, 0), (2000, 0)]), SETTINGS), stop)
    assert [(i, k, f["distance_m"]) for i, k, f in alerts] == [(61, "off_route", 85.0)]
    # The same parallel drive steadily 45 m away is a real off-route: alert after 10 s.
    steady = [(5.0 * i, 45.0) for i in range(40)]
    alerts = feed(RouteMonitor("r", chain([(0, 0), (2000, 0)]), SETTINGS), steady)
    assert [(i, k) for i, k, _ in alerts] == [(10, "off_route")]


def test_route_monitor_single_outliers_do_not_alert():
    """Isolated fixes 200 m away (outliers) break the sweep but never declare off-route."""
    pts = [(10.0 * i, 200.0 if i % 7 == 3 else 0.0) for i in range(180)]
    assert feed(RouteMonitor("r", chain([(0, 0), (2000, 0)]), SETTINGS), pts) == []


def test_route_monitor_wrong_direction():
    """Driving the route backwards: one wrong_direction alert after wrong_way_m metres,
    not from a single outlier fix landing on an earlier stretch of the route."""
    pts = along(list(reversed(L_ROUTE)), 10.0)[:60]
    m = RouteMonitor("r", chain(L_ROUTE), SETTINGS)
    alerts = feed(m, pts)
    # 100 m backwards at fix 10, confirmed by fix 11.
    assert [(i, k) for i, k, _ in alerts] == [(11, "wrong_direction")]
    facts = alerts[0][2]
    assert facts["backwards_m"] == 110.0 and facts["progress_m"] == 1890.0
    assert m.state == "unknown"  # never confirmed on route while going backwards
    # Standing at x=1100 after driving there, one fix 150 m back along the route, then
    # on: the reversed sweep follows that one fix backwards, the next fix undoes it.
    pts = ([(10.0 * i, 0.0) for i in range(111)] + [(1100.0, 0.0)] * 6 + [(950.0, 0.0)]
           + [(1100.0 + 10.0 * i, 0.0) for i in range(30)])
    m = RouteMonitor("r", chain([(0, 0), (2000, 0)]), SETTINGS)
    assert feed(m, pts) == []
    # The same with the second fix along: wrong direction.
    m = RouteMonitor("r", chain([(0, 0), (2000, 0)]), SETTINGS)
    assert [k for _, k, _ in feed(m, [*pts[:118], (945.0, 0.0)])] == ["wrong_direction"]


def test_route_monitor_standing_still_is_not_wrong_direction():
    """A vehicle standing on the route with 5 m jitter for 10 min: no alert of any kind."""
    rng = np.random.default_rng(7)
    pts = [(500.0 + rng.normal(0, 5), rng.normal(0, 5)) for _ in range(600)]
    assert feed(RouteMonitor("r", chain(L_ROUTE), SETTINGS), pts) == []


def test_route_monitor_loop_route_round_and_round():
    """A closed loop driven three times: no alert, progress wraps at the loop length."""
    square = [(0, 0), (400, 0), (400, 400), (0, 400), (0, 0)]
    pts = along(square, 10.0)[:-1] * 3 + [(0.0, 0.0), (10.0, 0.0), (20.0, 0.0)]
    m = RouteMonitor("loop", chain(square, "loop"), SETTINGS)
    assert feed(m, pts) == []
    assert m.progress_m == pytest.approx(20.0)
    assert m.fwd.followed() == pytest.approx(3 * 1600.0 + 20.0)


def test_route_monitor_out_and_back_route_overlapping_itself():
    """A route out along a street and back on it: both halves are on route, no alert."""
    out_back = [(0, 0), (1000, 0), (0, 0.5)]
    pts = along([(0, 0), (1000, 0), (0, 0)], 10.0)
    m = RouteMonitor("ob", chain(out_back, "ob"), SETTINGS)
    assert feed(m, pts) == []
    assert m.progress_m == pytest.approx(2000.0, abs=1.0)
    # Starting on the way back (free start anywhere) is not wrong direction either.
    m = RouteMonitor("ob", chain(out_back, "ob"), SETTINGS)
    assert feed(m, along([(900, 0), (100, 0)], 10.0)) == []
    assert m.progress_m == pytest.approx(1900.0, abs=1.0)


def test_route_monitor_state_round_trip_continues_exactly():
    """A monitor restored from its JSON state mid-detour gives the same alerts after."""
    pts = along([(0, 0), (500, 0), (500, 300), (1000, 300), (1000, 700)], 10.0)
    c = chain(L_ROUTE)
    a = RouteMonitor("r", c, SETTINGS)
    feed(a, pts[:60])
    b = RouteMonitor.from_state(json.loads(json.dumps(a.to_state())), c, SETTINGS)
    rest = [(i + 60, x, y) for i, (x, y) in enumerate(pts[60:])]
    out_a = [x.facts for t, px, py in rest for x in a.update(fix(t, px, py))]
    out_b = [x.facts for t, px, py in rest for x in b.update(fix(t, px, py))]
    assert out_a == out_b and len(out_a) == 2
    assert a.to_state() == b.to_state()


def test_route_chain_refuses_degenerate_route():
    """A route of one distinct point is refused with its id named."""
    with pytest.raises(ValueError, match="route 'x' needs at least two distinct points"):
        chain([(3.0, 3.0), (3.0, 3.0)], "x")


# ----------------------------------------------------------------------- fences
def _shapes() -> list[shapely.Geometry]:
    concave = shapely.Polygon([(0, 0), (300, 0), (300, 300), (150, 120), (0, 300)])
    holed = shapely.Polygon([(400, 0), (700, 0), (700, 300), (400, 300)],
                            [[(500, 100), (600, 100), (600, 200), (500, 200)]])
    multi = shapely.MultiPolygon([shapely.box(0, 400, 100, 500), shapely.box(200, 400, 300, 500)])
    return [concave, holed, multi]


def test_fence_membership_matches_shapely_predicates():
    """With no margins, inside iff shapely says the polygon covers the point (reference:
    shapely's own ``covers`` predicate, GEOS), boundary points included."""
    shapes = _shapes()
    fences = FenceSet([Fence(f"f{i}", g) for i, g in enumerate(shapes)],
                      AlertSettings(fence_inner_m=0.0, fence_outer_m=0.0, fence_fixes=1))
    rng = np.random.default_rng(11)
    points = [tuple(p) for p in rng.uniform(-50, 750, (600, 2))]
    points += [tuple(c) for g in shapes for c in shapely.get_coordinates(g)]  # on boundaries
    points += [(150.0, 120.0), (550.0, 150.0), (150.0, 450.0)]  # reflex vertex, hole, gap
    for k, (x, y) in enumerate(points):
        m = FenceMonitor()
        m.update(fences, fix(0.0, x, y), x, y, ())
        expected = [f"f{i}" for i, g in enumerate(shapes) if g.covers(shapely.Point(x, y))]
        assert m.inside() == expected, (k, x, y)


def test_fence_margins_match_shapely_distances():
    """Entering needs the point >= inner margin inside, leaving > outer margin outside,
    checked with shapely's distance to the boundary (reference: GEOS distance)."""
    poly = shapely.Polygon([(0, 0), (300, 0), (300, 300), (150, 120), (0, 300)])
    settings = AlertSettings(fence_inner_m=15.0, fence_outer_m=20.0, fence_fixes=1)
    fences = FenceSet([Fence("f", poly)], settings)
    rng = np.random.default_rng(3)
    checked = 0
    for x, y in rng.uniform(-60, 360, (800, 2)):
        p = shapely.Point(x, y)
        inside, edge = poly.covers(p), poly.exterior.distance(p)
        if abs(edge - 15.0) < 0.5 or abs(edge - 20.0) < 0.5:
            continue  # buffers approximate arcs by chords; stay clear of the margins
        m = FenceMonitor()
        entered = [a.alert_kind for a in m.update(fences, fix(0, x, y), x, y, ())]
        assert (entered == ["fence_enter"]) == (inside and edge >= 15.0)
        # Start inside (from the centre of the fence), then step to the point.
        m = FenceMonitor()
        m.update(fences, fix(0, 150, 50), 150, 50, ())
        left = [a.alert_kind for a in m.update(fences, fix(1, x, y), x, y, ())]
        assert (left == ["fence_exit"]) == (not inside and edge > 20.0)
        checked += 1
    assert checked > 700


def test_fence_standing_on_boundary_does_not_flap():
    """An hour standing on the boundary with 5 m correlated jitter and outliers: at most
    one enter and no exit with the default margins; many flaps without them."""
    from livematch.sim import gauss_markov

    rng = np.random.default_rng(5)
    err = gauss_markov(rng, 3600, 5.0, 45.0, 1.0, 2)
    outlier = rng.random(3600) < 0.01
    err[outlier] += rng.uniform(-150, 150, (int(outlier.sum()), 2))
    poly = shapely.box(0, 0, 200, 200)

    def kinds(settings: AlertSettings) -> list[str]:
        fences, m, out = FenceSet([Fence("f", poly)], settings), FenceMonitor(), []
        for t, (ex, ey) in enumerate(err):
            x, y = 200.0 + ex, 100.0 + ey
            out += [a.alert_kind for a in m.update(fences, fix(t, x, y), x, y, ())]
        return out

    steady = kinds(AlertSettings(fence_dwell_s=1e9))
    assert steady.count("fence_exit") == 0 and steady.count("fence_enter") <= 1
    bare = kinds(AlertSettings(fence_inner_m=0.0, fence_outer_m=0.0, fence_fixes=1,
                               fence_dwell_s=1e9))
    assert bare.count("fence_enter") > 10


def test_fence_enter_dwell_exit_and_filters():
    """Enter after two fixes inside, one dwell after dwell_s, exit with the time inside;
    a fence for a group ignores other vehicles."""
    fences = FenceSet([Fence("depot", shapely.box(0, 0, 100, 100), "Depot", dwell_s=30.0),
                       Fence("night", shapely.box(0, 0, 100, 100), groups=frozenset({"n"}))],
                      SETTINGS)
    m = FenceMonitor()
    track = [(-50.0, 50.0)] * 3 + [(50.0, 50.0)] * 60 + [(200.0, 50.0)] * 3
    out = []
    for t, (x, y) in enumerate(track):
        out += [(t, a.alert_kind, a.facts) for a in m.update(fences, fix(t, x, y), x, y, ())]
    assert [(t, k) for t, k, _ in out] == [(4, "fence_enter"), (33, "fence_dwell"),
                                          (64, "fence_exit")]
    assert out[0][2]["fence"] == "depot" and out[0][2]["name"] == "Depot"
    assert out[1][2]["duration_s"] == 30.0 and out[2][2]["duration_s"] == 61.0
    m = FenceMonitor()
    got = [a.facts["fence"] for t in range(3) for a in m.update(fences, fix(t, 50, 50), 50, 50,
                                                                 ["n"])]
    assert got == ["depot", "night"]


def test_fence_set_refuses_bad_fences():
    """Repeated ids and non-polygons are refused, naming the fence."""
    with pytest.raises(ValueError, match="fence id 'a' is used twice"):
        FenceSet([Fence("a", shapely.box(0, 0, 1, 1))] * 2, SETTINGS)
    with pytest.raises(ValueError, match="fence 'l' must be a non-empty Polygon"):
        FenceSet([Fence("l", shapely.LineString([(0, 0), (1, 1)]))], SETTINGS)


# --------------------------------------------------------------------- presence
def test_off_network_after_persistence_and_back():
    """off_network after off_network_s without a road; on_network after 3 fixes with one."""
    m = OffNetworkMonitor()
    out = []
    for t in range(100):
        has_road = t < 10 or t >= 60
        out += [(t, a.alert_kind, a.facts) for a in m.update(fix(t, 0, 0), has_road, SETTINGS)]
    assert [(t, k) for t, k, _ in out] == [(40, "off_network"), (62, "on_network")]
    assert out[0][2]["since"] == 10.0 and out[0][2]["last_on_network_time"] == 9.0
    assert out[1][2]["duration_s"] == 52.0


def test_off_network_state_as_written_before_reads_back():
    """A monitor state with ``last_on`` as a list (as every checkpoint so far wrote it)
    restores to the same state, and its last fix on a road is the one the next
    off_network alert names (session 26 keeps it as three fields, not a tuple)."""
    written = {"off": False, "since": None, "back": 0, "last_on": [9.0, 60.17, 24.94]}
    m = OffNetworkMonitor.from_state(json.loads(json.dumps(written)))
    assert m.to_state() == written and m.last_on == (9.0, 60.17, 24.94)
    out = [a for t in range(10, 41) for a in m.update(fix(t, 0, 0), False, SETTINGS)]
    assert [a.alert_kind for a in out] == ["off_network"]
    facts = out[0].facts
    assert (facts["last_on_network_time"], facts["last_on_network_lat"],
            facts["last_on_network_lon"]) == (9.0, 60.17, 24.94)
    assert OffNetworkMonitor().to_state()["last_on"] is None
    assert OffNetworkMonitor.from_state(OffNetworkMonitor().to_state()).last_on is None


def test_stale_watch_once_per_silence():
    """One stale per silence (judged on receive time), one fresh when fixes resume."""
    w = StaleWatch(at=10.0, t=9.0, lat=60.0, lon=24.0)
    assert w.check("v", 130.0, SETTINGS) == []
    stale = w.check("v", 130.5, SETTINGS)
    assert [a.alert_kind for a in stale] == ["stale"] and stale[0].t == 130.5
    assert w.check("v", 500.0, SETTINGS) == []
    fresh = w.seen(fix(600.0, 0, 0), 601.0)
    assert [(a.alert_kind, a.facts["silent_s"]) for a in fresh] == [("fresh", 591.0)]
    assert w.seen(fix(601.0, 0, 0), 602.0) == []


def test_vehicle_alerts_state_round_trip():
    """Every monitor of a vehicle survives a JSON round trip unchanged."""
    c = chain(L_ROUTE)
    fences = FenceSet([Fence("f", shapely.box(-100, -100, 100, 100))], SETTINGS)
    a = VehicleAlerts()
    a.set_route("r", c, SETTINGS)
    for t in range(20):
        a.seen(fix(t, 10.0 * t, 0), t + 0.5)
        a.update(fix(t, 10.0 * t, 0), (10.0 * t, 0.0), t % 5 != 0, fences, (), SETTINGS)
    state = json.loads(json.dumps(a.to_state()))
    b = VehicleAlerts.from_state(state, lambda rid: c if rid == "r" else None, SETTINGS)
    assert b.to_state() == a.to_state()
    gone = VehicleAlerts.from_state(state, lambda rid: None, SETTINGS)
    assert gone.route is None and gone.requested == "r"


def test_alert_settings_problems():
    """Invalid values are listed by key."""
    bad = AlertSettings(eps_route_m=0.0, on_route_fixes=0, wrong_way_m=50.0,
                        fence_position="gps", fence_inner_m=-1.0)
    keys = [k for k, _ in bad.problems()]
    assert keys == ["eps_route_m", "fence_inner_m", "on_route_fixes", "fence_position"]
    assert ("wrong_way_m", "must exceed 2 x eps_route_m (80.0), got 50.0") in \
        AlertSettings(wrong_way_m=50.0).problems()
    keys = AlertSettings.keys()
    assert keys[0] == "eps_route_m" and "stale_s" in keys


@pytest.mark.pure_python
def test_monitors_doctests():
    """The worked examples in the alert modules' docstrings hold (run as doctests)."""
    import doctest
    import importlib

    names = ["livematch.core.monitors.settings", "livematch.core.monitors.route",
             "livematch.core.monitors.fences", "livematch.core.monitors.presence",
             "livematch.core.monitors.vehicle", "livematch.mapdata.routes",
             "livematch.mapdata.fences", "livematch.pipeline"]
    for name in names:
        outcome = doctest.testmod(importlib.import_module(name), raise_on_error=False)
        assert outcome.failed == 0 and outcome.attempted > 0, name


def random_fences(rng: np.random.Generator, count: int, spread: float,
                  radius: tuple[float, float], half: tuple[float, float]) -> list[Fence]:
    """``count`` fences centred within ``spread`` metres of the origin: discs of a radius
    in ``radius`` and boxes of half-sides in ``half`` rotated by 0-90 degrees, in turn."""
    fences = []
    for k in range(count):
        x, y = rng.uniform(-spread, spread, 2)
        if k % 2:
            poly = shapely.Point(x, y).buffer(float(rng.uniform(*radius)))
        else:
            w, h = rng.uniform(*half, 2)
            poly = shapely.affinity.rotate(shapely.box(x - w, y - h, x + w, y + h),
                                           float(rng.uniform(0.0, 90.0)))
        fences.append(Fence(f"f{k}", poly))
    return fences


def odd_fences(rng: np.random.Generator) -> list[Fence]:
    """Random discs and rotated boxes, a polygon with a hole, a multipolygon, a bow tie
    (invalid: left to shapely) and a 3000-vertex disc (beyond the compiled test's size)."""
    fences = random_fences(rng, 30, 1500.0, (30.0, 300.0), (30.0, 400.0))
    ring = shapely.box(-300.0, -300.0, 300.0, 300.0)
    fences.append(Fence("hole", ring.difference(shapely.box(-100.0, -100.0, 100.0, 100.0))))
    fences.append(Fence("multi", shapely.MultiPolygon([
        shapely.box(500.0, 500.0, 700.0, 700.0), shapely.box(720.0, 500.0, 900.0, 640.0)])))
    fences.append(Fence("bowtie", shapely.Polygon([(-900.0, -900.0), (-600.0, -600.0),
                                                   (-600.0, -900.0), (-900.0, -600.0)])))
    fences.append(Fence("dense", shapely.Point(-500.0, 500.0).buffer(250.0, 750)))
    return fences


def test_fence_set_near_equals_strtree_query() -> None:
    """The fence grid finds exactly the fences shapely's STRtree ``intersects`` finds.

    Reference: shapely.STRtree (GEOS), queried with a Point; random discs, rotated boxes,
    one fence larger than the grid takes, and points on polygon vertices (boundary).
    """
    rng = np.random.default_rng(3)
    fences = random_fences(rng, 60, 3000.0, (20.0, 600.0), (30.0, 900.0))
    fences.append(Fence("county", shapely.box(-40000.0, -40000.0, 40000.0, 40000.0)))
    fs = FenceSet(fences, AlertSettings())
    tree = shapely.STRtree(fs.outer)
    points = [tuple(p) for p in rng.uniform(-4000.0, 4000.0, (3000, 2))]
    points += [c for g in fs.outer[:20] for c in list(g.exterior.coords)[:8]]
    points += [(250.0, 500.0), (0.0, 0.0), (-250.0, -250.0)]  # on grid lines
    for x, y in points:
        want = sorted(int(i) for i in tree.query(shapely.Point(x, y), predicate="intersects"))
        assert fs.near(float(x), float(y)) == want, (x, y)
        assert fs.may_be_near(float(x), float(y))  # a fence larger than the grid: always


def test_fence_set_box_skip_equals_shapely_tests() -> None:
    """Without a fence too large for the grid, ``near`` and ``inside_inner_many`` (which
    skip fences whose bounding box misses the point) equal shapely's own tests on every
    fence, and ``may_be_near`` rules out only points no outer polygon holds.

    Reference: ``shapely.intersects_xy`` (GEOS) on each outer and inner polygon; random
    discs and rotated boxes, points on polygon vertices (boundary) and on bounding-box
    edges.
    """
    rng = np.random.default_rng(5)
    fences = random_fences(rng, 40, 1500.0, (30.0, 300.0), (30.0, 400.0))
    fs = FenceSet(fences, AlertSettings())
    assert not fs._everywhere  # the grid path is the one under test
    points = [tuple(p) for p in rng.uniform(-2000.0, 2000.0, (3000, 2))]
    for g in (*fs.outer[:10], *fs.inner[:10]):
        points += list(g.exterior.coords)[:6]
        x0, y0, x1, y1 = g.bounds
        points += [(x0, y0), (x1, y1), (x0, (y0 + y1) / 2), ((x0 + x1) / 2, y1)]
    every = list(range(len(fences)))
    skipped = 0
    for x, y in points:
        x, y = float(x), float(y)
        outer = [i for i in every if shapely.intersects_xy(fs.outer[i], x, y)]
        assert fs.near(x, y) == outer, (x, y)
        if not fs.may_be_near(x, y):  # ruled out without the probe: truly near none
            assert outer == [], (x, y)
            skipped += 1
        want = [bool(shapely.intersects_xy(fs.inner[i], x, y)) for i in every]
        assert fs.inside_inner_many(every, x, y) == want, (x, y)
        some = every[::3]
        assert fs.inside_inner_many(some, x, y) == [want[i] for i in some], (x, y)
    assert skipped > 1000  # most random points are far from every fence
    assert fs.may_be_near(math.nan, 0.0) and fs.may_be_near(math.inf, 0.0)


def test_fence_probe_equals_shapely_on_edges_vertices_and_holes() -> None:
    """The compiled probe gives shapely's answer for every fence, boundary points included.

    Reference: ``shapely.intersects_xy`` (GEOS) on each outer and inner polygon. Shapes:
    random discs and rotated boxes, an axis-aligned box (horizontal edges), a polygon with
    a hole, a multipolygon, a self-intersecting "bow tie" (invalid: always left to
    shapely), a 3000-vertex disc (beyond the compiled test's size limit) and a fence too
    large for the grid. Points: random, every vertex, edge midpoints (on the boundary to
    within rounding), points on horizontal edges and on the hole's boundary. Also checks
    that most answers came from the compiled test and that the undecided path ran.
    """
    from livematch.core.monitors import _fence_kernel as fk

    rng = np.random.default_rng(21)
    fences = odd_fences(rng)  # 30 random shapes, then the odd ones; a square among them
    fences.insert(30, Fence("square", shapely.box(100.0, 100.0, 400.0, 250.0)))
    fences.append(Fence("county", shapely.box(-40000.0, -40000.0, 40000.0, 40000.0)))
    for settings in (AlertSettings(), AlertSettings(fence_inner_m=0.0, fence_outer_m=0.0)):
        fs = FenceSet(fences, settings)
        points = [tuple(p) for p in rng.uniform(-1600.0, 1600.0, (2000, 2))]
        for g in (*fs.outer, *fs.inner):
            for part in getattr(g, "geoms", [g]):
                for r in (part.exterior, *part.interiors):
                    xy = shapely.get_coordinates(r)[:40]
                    points += [tuple(v) for v in xy]
                    points += [tuple(v) for v in (xy[:-1] + xy[1:]) / 2.0]
        points += [(250.0, 250.0), (150.0, 100.0), (0.0, 100.0), (-100.0, 0.0), (600.0, 700.0)]
        every = range(len(fences))
        # left to shapely: the dense disc, and the bow tie where no margin repairs it (a
        # buffer of a bow tie is valid)
        left = {len(fences) - 2} | ({len(fences) - 3} if settings.fence_outer_m == 0 else set())
        undecided_random: set[int] = set()
        undecided_boundary = 0
        for k, (x, y) in enumerate(points):
            x, y = float(x), float(y)
            near, inner = fs.probe(x, y)
            want = [i for i in every if shapely.intersects_xy(fs.outer[i], x, y)]
            assert near == want, (x, y)
            assert inner == [bool(shapely.intersects_xy(fs.inner[i], x, y)) for i in near]
            n = abs(fk.fence_probe(x, y, 250.0, fs._fi, fs._ff, fs._out))
            rows = fs._out[:3 * n].reshape(n, 3)
            unsure = rows[np.any(rows[:, 1:] == fk.UNDECIDED, axis=1), 0].tolist()
            if k < 2000:
                undecided_random.update(unsure)
            else:
                undecided_boundary += len(set(unsure) - left)
        # random points: only the shapes left to shapely; vertices: the fallback ran
        assert undecided_random == left and undecided_boundary > 100


def test_route_window_step_equals_node_reference() -> None:
    """The compiled route-window step equals sweep_step on nodes plus the driven metres.

    Reference: livematch.core.sweep.sweep_step (pure Python) on the same live states, then
    the window's rules written on nodes: driven = parent's + the step's route length, costs
    rebased to a minimum of 0. A zig-zag route (many short chain segments, a U-turn
    spur) and a noisy trace along it and back.
    """
    from livematch.core import _sweep_kernel as k
    from livematch.core.fastsweep import sweep_arrays
    from livematch.core.sweep import Node, StepContext, fresh_start, sweep_step

    pts = [(0.0, 0.0)] + [(20.0 * i, 15.0 * (i % 2)) for i in range(1, 40)]
    ch = chain(pts)
    view = ch.forward_view
    arrays = sweep_arrays(view)
    rng = np.random.default_rng(12)
    trace = [(x + rng.normal(0, 4), y + rng.normal(0, 4)) for x, y in pts[::2]]
    trace += trace[::-1]  # and back: the forward window dies and restarts
    rows = np.empty((0, 6))
    driven = np.empty(0)
    steps = 0
    for seq, ((x0, y0), (x1, y1)) in enumerate(itertools.pairwise(trace), start=1):
        ctx = StepContext(view, 25.0, x0, y0, x1, y1, seq, float(seq),
                          math.hypot(x1 - x0, y1 - y0), 0.02, 0.1, 0.0)
        if len(rows):
            live = {int(r[0]): Node(int(r[0]), seq - 1, 0.0, r[2], r[3], r[4], None, (), r[5],
                                    r[1]) for r in rows.tolist()}
            before = dict(zip(live, driven.tolist(), strict=True))
            ref = sweep_step(live, ctx)
            scalars = np.array((ctx.eps, x0, y0, x1, y1, ctx.chord, 0.02, 0.1, 0.0, 0.0,
                                -1.0))
            code, got, got_driven = k.window_step(arrays.netf, arrays.neti, arrays.fbuf,
                                                  arrays.ibuf, scalars, rows, driven)
            assert code == 0
            assert [int(s) for s in got[:, 0]] == list(ref)
            if ref:
                steps += 1
                base = min(n.cost for n in ref.values())
                slen = view.slen
                for j, (seg, n) in enumerate(ref.items()):
                    p = n.parent
                    assert p is not None
                    if not n.via and seg == p.seg:
                        arc = (n.pos - p.pos) * slen[seg]
                    else:
                        arc = ((1.0 - p.pos) * slen[p.seg] + sum(slen[v] for v in n.via)
                               + n.pos * slen[seg])
                    assert got_driven[j] == before[p.seg] + arc
                    assert got[j].tolist() == [seg, n.low, n.pos, n.x, n.y, n.cost - base]
                rows, driven = got, got_driven
                continue
        new = fresh_start(ch.forward, ctx)
        rows = np.array([(n.seg, n.low, n.pos, n.x, n.y, n.cost) for n in new.values()])
        rows = rows.reshape(len(new), 6)
        driven = np.zeros(len(new))
    assert steps > 20


def test_route_window_advance_equals_python_reference() -> None:
    """The route window's compiled step (sweep or fresh start) equals its Python reference.

    Reference: ``_route_kernel.reference_advance`` (livematch.core.sweep.sweep_step and
    fresh_start on nodes, pure Python), compared float for float, and the roots of every
    fresh start against shapely: the chain segments whose ``shapely.distance`` from the
    fix is within eps (none lies within a micrometre of eps here). A zig-zag open route
    and a closed loop, each window started with room for one state so the growth path
    runs, traces along them and back (the forward window dies and starts afresh).
    """
    from livematch.core.monitors import _route_kernel as rk
    from livematch.core.monitors.route import _step_scalars
    from livematch.core.sweep import StepContext

    zigzag = [(0.0, 0.0)] + [(20.0 * i, 15.0 * (i % 2)) for i in range(1, 40)]
    loop = [(150.0 * math.cos(a), 150.0 * math.sin(a))
            for a in np.linspace(0.0, 2.0 * math.pi, 41)]
    rng = np.random.default_rng(12)
    fresh_starts = sweeps = 0
    for pts in (zigzag, loop):
        ch = chain(pts)
        for net, view, arrays in ((ch.forward, ch.forward_view, ch.forward_arrays),
                                  (ch.backward, ch.backward_view, ch.backward_arrays)):
            lines = shapely.linestrings(np.stack(
                [net.node_xy[net.seg_from], net.node_xy[net.seg_to]], axis=1))
            trace = [(x + rng.normal(0, 6), y + rng.normal(0, 6)) for x, y in pts[::2]]
            trace += [*trace[::-1], (5000.0, 5000.0), *trace]  # back, far away, again
            w = np.zeros(1 + rk.ROW)
            rows: list[list[float]] = []
            for seq, ((x0, y0), (x1, y1)) in enumerate(itertools.pairwise(trace), start=1):
                chord = math.hypot(x1 - x0, y1 - y0)
                ctx = StepContext(view, 25.0, x0, y0, x1, y1, seq, float(seq), chord,
                                  0.02, 0.1, 0.0)
                rows, fresh = rk.reference_advance(net, view, ctx, rows)
                scalars = _step_scalars(25.0, x0, y0, x1, y1, chord)
                while (got := rk.window_advance(arrays.netf, arrays.neti, arrays.fbuf,
                                                arrays.ibuf, scalars, w))[0] < 0:
                    assert got[0] == rk.ROWS_OVERFLOW
                    w = np.concatenate([w, np.zeros(rk.ROW * got[1])])
                k, got_fresh, most, best_seg, best_pos = got
                assert k == len(rows) and bool(got_fresh) == fresh
                assert w[1:1 + rk.ROW * k].reshape(k, rk.ROW).tolist() == rows
                j = rk.best_row(rows)
                assert (best_seg, best_pos) == ((int(rows[j][0]), rows[j][2]) if rows
                                                else (-1, 0.0))
                assert most == max((r[6] for r in rows), default=0.0)
                if fresh:
                    fresh_starts += 1
                    dist = shapely.distance(lines, shapely.Point(x1, y1))
                    assert not np.any(np.abs(dist - 25.0) < 1e-6)
                    assert [int(r[0]) for r in rows] == np.flatnonzero(dist <= 25.0).tolist()
                else:
                    sweeps += 1
    assert fresh_starts > 20 and sweeps > 100


def test_kernel_code_key_follows_the_callee_code() -> None:
    """A kernel's cache key changes with a compiled callee's code or constants.

    numba's documentation (caching notes, from memory): the disk cache is not invalidated
    when a function called from another file changes; the key is what forces a new
    compilation then. Two throwaway modules differing in one expression or one constant.
    """
    import types

    import numba

    from livematch.core._kernel_key import code_key

    def module(body: str, limit: int) -> types.ModuleType:
        m = types.ModuleType("probe_module")
        m.__dict__["numba"] = numba
        m.LIMIT = limit
        exec(f"@numba.njit\ndef f(x):\n    return {body}\n", m.__dict__)
        return m

    base = code_key(module("x + 1", 3))
    assert code_key(module("x + 1", 3)) == base  # stable: no addresses in it
    assert code_key(module("x + 2", 3)) != base
    assert code_key(module("x - 1", 3)) != base
    assert code_key(module("x + 1", 4)) != base


def test_route_window_best_equals_python_max() -> None:
    """The compiled best-candidate pick equals ``max`` over (driven, -cost, -segment).

    Reference: Python's built-in ``max`` with that key, which keeps the first of equal
    keys; many ties (driven and cost drawn from a few values) exercise every tie-break.
    """
    from livematch.core import _sweep_kernel as k

    rng = np.random.default_rng(5)
    assert k.window_best(np.empty((0, 6)), np.empty(0)) == -1  # degenerate: no live state
    for _ in range(300):
        m = int(rng.integers(1, 12))
        rows = np.zeros((m, 6))
        rows[:, 0] = rng.integers(0, 4, m)
        rows[:, 5] = rng.choice([0.0, 0.5, 1.0], m)
        driven = rng.choice([0.0, 3.0, 7.5], m)
        want = max(range(m), key=lambda j: (driven[j], -rows[j, 5], -rows[j, 0]))
        assert k.window_best(rows, driven) == want


def test_vehicle_monitors_have_no_instance_dict():
    """The per-vehicle monitor objects use slots (one set per vehicle in a service)."""
    alerts = VehicleAlerts()
    fences = FenceSet([Fence("f", shapely.box(-100, -100, 100, 100))], SETTINGS)
    alerts.set_route("r", chain(L_ROUTE), SETTINGS)
    for t in range(10):  # on the route (an anchor) and entering the fence
        alerts.seen(fix(t, 10.0 * t, 0.0), t + 0.5)
        alerts.update(fix(t, 10.0 * t, 0.0), None, True, fences, (), SETTINGS)
    assert alerts.route is not None and alerts.route.anchor is not None
    for obj in (alerts, alerts.fences, alerts.network, alerts.watch, alerts.route,
                alerts.route.anchor, alerts.route.fwd):
        assert obj is not None and not hasattr(obj, "__dict__"), type(obj).__name__


@pytest.mark.pure_python  # lifts a Final constant (inlined when compiled)
def test_route_window_gives_back_room_without_changing_answers(monkeypatch):
    """A window grown for a fresh start beside many route parts gives its room back once
    it holds few states, and every alert and state is the same as without giving back."""
    from livematch.core.monitors import _route_kernel, route

    comb = [(0.0, 0.0), (200.0, 0.0)] * 10  # one street driven back and forth 10 times
    points = [*comb, (200.0, 500.0), (2000.0, 500.0)]
    c = chain(points)
    drive = along([(0.0, 3.0), (200.0, 3.0), (200.0, 500.0), (2000.0, 500.0)], 10.0)

    def run() -> tuple[list[object], list[int]]:
        m = RouteMonitor("r", c, SETTINGS)
        seen, sizes = [], []
        for i, (x, y) in enumerate(drive):
            seen.append([(a.alert_kind, a.facts) for a in m.update(fix(i, x, y))])
            seen.append(json.dumps(m.to_state()))
            sizes.append(len(m.fwd.w))
        return seen, sizes

    given_back, sizes = run()
    keep = 1 + _route_kernel.ROW * route._KEEP_ROWS
    assert max(sizes) > keep  # the fresh start on the street needed more room
    assert sizes[-1] == keep  # and gave it back on the single leg, once settled
    monkeypatch.setattr(route, "_SHRINK_LEN", 10**9)  # never give room back
    kept, sizes = run()
    assert sizes[-1] > keep
    assert given_back == kept


def test_route_monitor_answers_do_not_depend_on_scratch_room():
    """A route chain's sweep scratch starts small and grows on overflow; the answers are
    those of scratch with the sweep kernel's default room (a city network's), alert for
    alert and state for state, on a drive along a comb of parallel legs, backwards along
    it (wrong direction), off the route and back on. Scratch of one slot each makes the
    growth path run (both windows sweep in one scratch, shared again after it grew)."""
    from livematch.core import fastsweep
    from livematch.core.monitors import route

    comb = [(0.0, 0.0), (300.0, 0.0), (300.0, 30.0), (0.0, 30.0), (0.0, 60.0), (300.0, 60.0)]
    path = along(comb, 12.0)
    detour = [(300.0, 60.0 + 10.0 * k) for k in range(1, 30)]  # 290 m away, 29 s
    drive = [*path, *path[::-1], *detour, *detour[::-1], *path]
    rng = np.random.default_rng(5)
    drive = [(x + rng.normal(0.0, 4.0), y + rng.normal(0.0, 4.0)) for x, y in drive]

    def run(caps: tuple[int, int, int, int]) -> tuple[list[object], RouteChain]:
        c = chain(comb)
        assert c.forward_arrays.cap_h == route._CHAIN_SCRATCH[0]  # starts small
        assert c.backward_arrays.ibuf is c.forward_arrays.ibuf  # one scratch for both
        c.forward_arrays.resize(*caps)
        c.share_scratch()
        m = RouteMonitor("r", c, SETTINGS)
        seen: list[object] = []
        for i, (x, y) in enumerate(drive):
            seen.append([(a.alert_kind, a.facts) for a in m.update(fix(i, x, y))])
            seen.append(json.dumps(m.to_state()))
        return seen, c

    roomy, _ = run((fastsweep._START_ENTRIES, fastsweep._START_VIA, fastsweep._START_ROWS,
                    fastsweep._START_OFFERS))
    tiny, c = run((1, 1, 1, 1))
    assert c.forward_arrays.cap_h > 1  # grew
    assert c.backward_arrays.ibuf is c.forward_arrays.ibuf  # and shared again
    kinds = {k for step in roomy[0::2] for k, _ in step}  # type: ignore[attr-defined]
    assert {"wrong_direction", "off_route", "on_route"} <= kinds
    assert tiny == roomy


def test_vehicle_alerts_fence_monitor_only_near_fences():
    """A vehicle holds a fence monitor only while it is in a fence or entering one; the
    alerts are those of a monitor kept all along."""
    fences = FenceSet([Fence("f", shapely.box(0, 0, 100, 100))], SETTINGS)
    a = VehicleAlerts()
    kept = FenceMonitor()
    held, got, want = [], [], []
    for t, x in enumerate([-500.0, -300.0, 50.0, 50.0, 50.0, 400.0, 400.0, 400.0, 900.0]):
        f = fix(t, x, 50.0)
        got.extend(a.update(f, None, True, fences, (), SETTINGS))
        want.extend(kept.update(fences, f, x, 50.0, ()))
        held.append(a.fences is not None)
    assert [w.alert_kind for w in want] == ["fence_enter", "fence_exit"]
    assert got == want
    assert held == [False, False, True, True, True, True, False, False, False]
