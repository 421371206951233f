"""Alerts through the pipeline: routes from fixes, control messages and config; fences;
off-network; stale/fresh ticks; checkpoints; the alerts.jsonl of a replay."""

from __future__ import annotations

import dataclasses
import itertools
import json
import math

import numpy as np
import pytest
import shapely
from pyproj import Geod

from livematch.commands.replay import replay
from livematch.core.build import Road, network_from_roads
from livematch.core.geometry import Projection
from livematch.core.monitors import AlertSettings, Fence, Route
from livematch.core.settings import MatchSettings
from livematch.errors import BadConfigError
from livematch.feed.replaylog import ReplayLogWriter
from livematch.pipeline import Output, Pipeline, alert_settings_from_mapping

T0 = 1_764_576_000.0
PROJ = Projection.local(24.94, 60.17)
GEOD = Geod(ellps="WGS84")


def _grid() -> object:
    """A 5 x 5 grid of two-way streets 200 m apart (0..800 m), shape points every 50 m."""
    roads = []
    for i in range(5):
        pts = [float(v) for v in range(0, 801, 50)]
        roads.append(Road([(x, 200.0 * i) for x in pts], way=10 + i))
        roads.append(Road([(200.0 * i, y) for y in pts], way=20 + i))
    return network_from_roads(roads, PROJ)


NET = _grid()
# Route R: along y=0 east to x=800, then north along x=800. Route N: north along x=400.
ROUTES = {
    "R": Route("R", np.array([[0.0, 0.0], [800.0, 0.0], [800.0, 800.0]])),
    "N": Route("N", np.array([[400.0, 0.0], [400.0, 800.0]])),
}


def points(corners: list[tuple[float, float]], step: float) -> list[tuple[float, float]]:
    out: list[tuple[float, float]] = []
    for (ax, ay), (bx, by) in itertools.pairwise(corners):
        n = max(1, round(math.hypot(bx - ax, by - ay) / step))
        out.extend((ax + (bx - ax) * k / n, ay + (by - ay) * k / n) for k in range(n))
    out.append(corners[-1])
    return out


def messages(vehicle: str, pts: list[tuple[float, float]], t0: float = T0,
             route: str | None = None, switch: tuple[int, str] | None = None,
             ) -> list[tuple[str, bytes, float]]:
    """(topic, payload, at) of one fix per second at ``pts``; ``switch`` = (index, route)."""
    out = []
    for i, (x, y) in enumerate(pts):
        lon, lat = PROJ.to_lonlat(x, y)
        body = {"time": t0 + i, "lat": round(float(lat), 7), "lon": round(float(lon), 7)}
        r = switch[1] if switch is not None and i >= switch[0] else route
        if r is not None:
            body["route"] = r
        out.append((f"fleet/{vehicle}/position", json.dumps(body).encode(), t0 + i + 0.5))
    return out


def run(p: Pipeline, msgs, tick: bool = False) -> list[Output]:
    out: list[Output] = []
    for topic, payload, at in msgs:
        out.extend(p.handle(topic, payload, at))
        if tick:
            out.extend(p.tick(at))
    return out


def alerts(outputs: list[Output]) -> list[dict]:
    return [o.record for o in outputs if o.kind == "alert"]


DETOUR = points([(0, 0), (400, 0), (400, 600)], 10.0)  # leaves R at x=400, north


def test_pipeline_off_route_distance_matches_geod():
    """The off_route distance equals the geodesic distance from the fix to the route on
    the WGS84 ellipsoid (pyproj Geod) within 0.5 %; lat/lon are the fix's own."""
    p = Pipeline(NET, MatchSettings(), routes=ROUTES)
    found = alerts(run(p, messages("bus1", DETOUR, route="R")))
    assert [a["kind"] for a in found] == ["off_route"]
    a = found[0]
    assert list(a)[:3] == ["vehicle", "time", "kind"] and a["vehicle"] == "bus1"
    assert a["route"] == "R" and a["last_on_route_time"] == T0 + 44  # (400, 40)
    # Reference: geodesic distance to the route densified every ~1 m along the geodesic.
    lon_r, lat_r = PROJ.to_lonlat(np.array([0.0, 800.0, 800.0]), np.array([0.0, 0.0, 800.0]))
    dense = []
    for k in range(2):
        n = int(GEOD.inv(lon_r[k], lat_r[k], lon_r[k + 1], lat_r[k + 1])[2])
        dense += [(lon_r[k], lat_r[k]), *GEOD.npts(lon_r[k], lat_r[k], lon_r[k + 1],
                                                   lat_r[k + 1], n)]
    d = min(GEOD.inv(a["lon"], a["lat"], lo, la)[2] for lo, la in dense)
    assert a["distance_m"] == pytest.approx(d, rel=5e-3)
    assert a["distance_m"] == pytest.approx(
        GEOD.inv(a["lon"], a["lat"], a["route_lon"], a["route_lat"])[2], rel=5e-3)
    assert a["distance_m"] == round(a["distance_m"], 1)


def test_pipeline_on_route_length_matches_geod():
    """Back on route: the detour's length (sum of fix-to-fix steps) agrees with the
    geodesic length of the same fixes (pyproj Geod.line_length) within 0.5 %."""
    pts = points([(0, 0), (400, 0), (400, 400), (800, 400), (800, 800)], 10.0)
    p = Pipeline(NET, MatchSettings(), routes=ROUTES)
    found = alerts(run(p, messages("bus1", pts, route="R")))
    assert [a["kind"] for a in found] == ["off_route", "on_route"]
    on = found[1]
    start = next(i for i, (x, y) in enumerate(pts) if y == 40.0)  # last on-route fix
    end = next(i for i, (x, y) in enumerate(pts) if x >= 760.0)  # first fix back near
    lon, lat = PROJ.to_lonlat(np.array([q[0] for q in pts[start:end + 1]]),
                              np.array([q[1] for q in pts[start:end + 1]]))
    assert on["length_m"] == pytest.approx(GEOD.line_length(lon, lat), rel=5e-3)
    assert on["duration_s"] == end - start
    assert p.route_status("bus1") == {"route": "R", "state": "on", "progress_m": 1600.0}


def test_pipeline_route_change_mid_trip():
    """The same drive raises off_route on route R, but not when the vehicle's fixes switch
    to route N as it turns onto it; then leaving N raises off_route for N."""
    p = Pipeline(NET, MatchSettings(), routes=ROUTES)
    pts = DETOUR + points([(400, 600), (600, 600)], 10.0)[1:]
    found = alerts(run(p, messages("bus1", pts, switch=(38, "N"), route="R")))
    assert [(a["kind"], a["route"]) for a in found] == [("off_route", "N")]
    assert found[0]["last_on_route_time"] == T0 + len(DETOUR) - 1 + 4  # (440, 600)


def test_pipeline_route_from_control_and_static_config():
    """A control message beats the fix's route field, which beats the static mapping;
    an empty control payload clears the assignment."""
    p = Pipeline(NET, MatchSettings(), routes=ROUTES, vehicle_routes={"bus1": "N"})
    assert p.handle("livematch/control/bus1/route", b'{"route": "R"}', T0) == []
    assert p.counters["control"] == 1
    run(p, messages("bus1", DETOUR[:5], route="N"))
    assert p.route_status("bus1")["route"] == "R"
    p.handle("livematch/control/bus1/route", b"", T0 + 5)
    run(p, messages("bus1", DETOUR[5:7], t0=T0 + 5))
    assert p.route_status("bus1")["route"] == "N"  # static mapping
    run(p, messages("bus1", DETOUR[7:9], t0=T0 + 7, route="R"))
    assert p.route_status("bus1")["route"] == "R"  # the fix's field
    bad = p.handle("livematch/control/bus1/route", b'{"route": 5.5}', T0 + 9)
    assert [(o.kind, o.record["reason"]) for o in bad] == [("reject", "bad_type")]


def test_pipeline_unknown_route_is_a_reject():
    """An unknown route id gives one unknown_route reject per change; the fix is matched."""
    p = Pipeline(NET, MatchSettings(), routes=ROUTES)
    out = run(p, messages("bus1", DETOUR[:6], route="X9"))
    rejects = [o for o in out if o.kind == "reject"]
    assert [(o.vehicle, o.record["reason"]) for o in rejects] == [("bus1", "unknown_route")]
    assert "'X9'" in rejects[0].record["detail"]
    assert sum(o.kind == "assignment" for o in out) == 6
    assert p.counters["reject:unknown_route"] == 1
    assert p.route_status("bus1") == {"route": None, "state": None, "progress_m": None}
    # Without any routes loaded, route fields are ignored (no reject).
    q = Pipeline(NET, MatchSettings())
    assert not [o for o in run(q, messages("bus1", DETOUR[:6], route="X9"))
                if o.kind == "reject"]


def test_pipeline_stale_and_fresh_via_tick():
    """tick(now) marks a vehicle silent for more than stale_s as stale once; its next fix
    gives fresh with the silence."""
    p = Pipeline(NET, MatchSettings(), alerts=AlertSettings(stale_s=30.0))
    run(p, messages("a", DETOUR[:5]) + messages("b", DETOUR[:5]))  # last at T0 + 4.5
    assert p.tick(T0 + 34.5) == []
    out = p.tick(T0 + 34.6)
    assert [(o.vehicle, o.record["kind"], o.record["time"]) for o in out] == [
        ("a", "stale", T0 + 34.6), ("b", "stale", T0 + 34.6)]
    assert out[0].record["last_fix_time"] == T0 + 4 and out[0].record["silent_s"] == 30.1
    assert p.tick(T0 + 100.0) == []
    fresh = alerts(run(p, messages("a", DETOUR[5:6], t0=T0 + 200)))
    assert [(a["kind"], a["silent_s"]) for a in fresh] == [("fresh", 196.0)]
    assert p.tick(T0 + 200.5 + 30.0) == [] and p.counters["alert:stale"] == 2


def test_pipeline_off_network_and_back():
    """Fixes with no road within the largest eps for 30 s: off_network; back: on_network."""
    pts = (points([(0, 0), (100, 0)], 10.0) + [(100.0 + 5 * k, -300.0) for k in range(40)]
           + points([(200, 0), (300, 0)], 10.0))
    p = Pipeline(NET, MatchSettings(max_speed_mps=400.0))
    found = alerts(run(p, messages("van", pts)))
    assert [a["kind"] for a in found] == ["off_network", "on_network"]
    # The 300 m jumps out (at T0 + 11) and back (at T0 + 51) are far beyond the last
    # step's speed (10 m/s): each is filtered as impossible twice and believed at the
    # third fix, so the episode runs from T0 + 13 and ends at T0 + 55.
    assert p.counters["filtered:impossible_jump"] == 4
    assert found[0]["since"] == T0 + 13 and found[0]["time"] == T0 + 43
    assert found[1]["time"] == T0 + 55 and found[1]["duration_s"] == 42.0


def test_pipeline_fences_groups_and_matched_position():
    """Fence alerts go only to the vehicles a fence watches; the matched position puts a
    vehicle driving along y=0 (fixes 15 m north) inside a fence covering only the road."""
    strip = shapely.box(220, -10, 380, 10)  # the road y=0 between two junctions
    fence = Fence("strip", strip, "Strip", groups=frozenset({"buses"}))
    pts = [(x, 15.0) for x, _ in points([(0, 0), (800, 0)], 10.0)]
    settings = AlertSettings(fence_inner_m=2.0, fence_outer_m=2.0)
    for groups, position, expect in [({"bus1": ["buses"]}, "matched", ["fence_enter",
                                                                       "fence_exit"]),
                                     ({"bus1": ["buses"]}, "raw", []),
                                     ({}, "matched", [])]:
        p = Pipeline(NET, MatchSettings(), fences=[fence], vehicle_groups=groups,
                     alerts=dataclasses.replace(settings, fence_position=position))
        assert [a["kind"] for a in alerts(run(p, messages("bus1", pts)))] == expect


def test_pipeline_checkpoint_restores_monitors_exactly():
    """A vehicle exported mid-detour and imported elsewhere gives the same alerts after."""
    pts = points([(0, 0), (400, 0), (400, 400), (800, 400), (800, 800)], 10.0)
    msgs = messages("bus1", pts, route="R")
    fence = Fence("f", shapely.box(350, 100, 450, 300))
    kw = {"routes": ROUTES, "fences": [fence]}
    stay = Pipeline(NET, MatchSettings(), **kw)
    first = run(stay, msgs[:50], tick=True)
    moved = Pipeline(NET, MatchSettings(), **kw)
    moved.import_vehicle("bus1", stay.export_vehicle("bus1"))
    assert moved.export_vehicle("bus1") == stay.export_vehicle("bus1")
    rest_moved = run(moved, msgs[50:], tick=True)
    rest_stay = run(stay, msgs[50:], tick=True)
    assert rest_moved == rest_stay
    kinds = [a["kind"] for a in alerts(first + rest_stay)]
    assert kinds == ["fence_enter", "off_route", "fence_exit", "on_route"]


def test_pipeline_version_1_checkpoint_still_read():
    """A version-1 checkpoint (no alert state) is read; the vehicle starts fresh monitors."""
    p = Pipeline(NET, MatchSettings(), routes=ROUTES)
    run(p, messages("bus1", DETOUR[:10], route="R"))
    blob = p.export_vehicle("bus1")
    import msgspec

    fields = msgspec.msgpack.decode(blob[5:])
    old = b"LMPV\x01" + msgspec.msgpack.encode(fields[:3])
    q = Pipeline(NET, MatchSettings(), routes=ROUTES)
    q.import_vehicle("bus1", old)
    assert q.route_status("bus1")["route"] is None
    run(q, messages("bus1", DETOUR[10:12], t0=T0 + 10, route="R"))
    assert q.route_status("bus1")["route"] == "R"


def test_pipeline_version_2_checkpoint_still_read():
    """A version-2 checkpoint (alert state as zlib-compressed JSON) restores the monitors
    exactly: the vehicle then gives the same alerts as one that never moved."""
    import zlib

    import msgspec

    pts = points([(0, 0), (400, 0), (400, 400), (800, 400), (800, 800)], 10.0)
    msgs = messages("bus1", pts, route="R")
    kw = {"routes": ROUTES, "fences": [Fence("f", shapely.box(350, 100, 450, 300))]}
    stay = Pipeline(NET, MatchSettings(), **kw)
    run(stay, msgs[:50], tick=True)
    blob = stay.export_vehicle("bus1")
    assert blob[:5] == b"LMPV\x03"
    fields = msgspec.msgpack.decode(blob[5:])
    extra = msgspec.msgpack.decode(fields[3])
    fields[3] = zlib.compress(json.dumps(extra, separators=(",", ":")).encode())
    old = b"LMPV\x02" + msgspec.msgpack.encode(fields)
    moved = Pipeline(NET, MatchSettings(), **kw)
    moved.import_vehicle("bus1", old)
    assert moved.export_vehicle("bus1") == blob
    assert run(moved, msgs[50:], tick=True) == run(stay, msgs[50:], tick=True)


@pytest.mark.pure_python
def test_pipeline_checkpoint_keeps_numpy_floats_and_refuses_other_objects():
    """A numpy float in a monitor's state is written as the float it equals (as version
    2's JSON wrote it); an object neither format can hold is refused."""
    p = Pipeline(NET, MatchSettings(), routes=ROUTES)
    run(p, messages("bus1", DETOUR[:10], route="R"))
    watch = p._vehicles["bus1"].alerts.watch
    assert watch is not None
    plain = p.export_vehicle("bus1")
    watch.lat = np.float64(watch.lat)
    assert p.export_vehicle("bus1") == plain
    watch.lat = object()
    with pytest.raises(TypeError, match="cannot hold a value of type object"):
        p.export_vehicle("bus1")


def test_pipeline_invalid_alert_settings_and_fences():
    """Invalid alert settings or fences are BadConfigError naming the key or the fence."""
    with pytest.raises(BadConfigError, match=r"alerts\.stale_s must be a positive number"):
        Pipeline(NET, MatchSettings(), alerts=AlertSettings(stale_s=0.0))
    with pytest.raises(BadConfigError, match="fence id 'a' is used twice"):
        Pipeline(NET, MatchSettings(), fences=[Fence("a", shapely.box(0, 0, 1, 1))] * 2)


def test_replay_writes_alerts_jsonl(tmp_path):
    """replay writes alert records (vehicle, time, kind first) and ticks the stale watch."""
    log = tmp_path / "feed.jsonl"
    msgs = messages("bus1", DETOUR, route="R") + messages("bus2", DETOUR[:3])
    msgs += messages("bus1", DETOUR[-1:] * 200, t0=T0 + len(DETOUR))  # bus2 goes silent
    msgs.sort(key=lambda m: m[2])
    with ReplayLogWriter(log) as w:
        for topic, payload, at in msgs:
            w.write(at, topic, payload)
    p = Pipeline(NET, MatchSettings(), routes=ROUTES)
    summary = replay(log, p, tmp_path / "out")
    lines = [json.loads(s) for s in (tmp_path / "out" / "alerts.jsonl").read_text().splitlines()]
    assert [(a["vehicle"], a["kind"]) for a in lines] == [("bus1", "off_route"),
                                                         ("bus2", "stale")]
    assert all(list(a)[:3] == ["vehicle", "time", "kind"] for a in lines)
    assert lines[1]["time"] == T0 + 2.5 + 120.0 + 1.0 and summary["alerts"] == 2


def test_alert_settings_from_mapping_names_file_and_key():
    """An [alerts] table maps onto AlertSettings; every problem names the file and key."""
    got = alert_settings_from_mapping({"fence_position": "matched", "on_route_fixes": 3},
                                      "live.toml")
    assert (got.fence_position, got.on_route_fixes) == ("matched", 3)
    with pytest.raises(BadConfigError) as info:
        alert_settings_from_mapping({"eps": 3, "stale_s": "2m", "fence_position": 1},
                                    "live.toml")
    assert str(info.value).splitlines() == [
        "live.toml: unknown key alerts.eps (expected one of " + ", ".join(AlertSettings.keys())
        + ")",
        "live.toml: alerts.stale_s must be a finite number, got '2m'",
        "live.toml: alerts.fence_position must be a string, got 1"]
    with pytest.raises(BadConfigError, match=r"live\.toml: alerts\.wrong_way_m must exceed"):
        alert_settings_from_mapping({"eps_route_m": 60}, "live.toml")


def test_replay_cli_routes_and_fences_files(tmp_path):
    """`livematch replay --routes --fences`: bus1 follows its route R1 (no route alert);
    given the Hill Street line as R1 instead, it is off route; a fence on its path gives
    enter and exit."""
    from test_replay import BUS1_ROUTE, DLAT, DLON, LAT0, LON0, NETWORK, write_town_feed

    from livematch.cli import main

    log = tmp_path / "feed.jsonl"
    write_town_feed(log)

    def line(corners):
        return {"type": "LineString",
                "coordinates": [[LON0 + i * DLON, LAT0 + j * DLAT] for i, j in corners]}

    fence = {"type": "Feature", "id": "market", "properties": {"name": "Market"},
             "geometry": {"type": "Polygon", "coordinates": [[
                 [LON0 + 2.5 * DLON, LAT0 + 1 * DLAT], [LON0 + 3.5 * DLON, LAT0 + 1 * DLAT],
                 [LON0 + 3.5 * DLON, LAT0 + 2 * DLAT], [LON0 + 2.5 * DLON, LAT0 + 2 * DLAT],
                 [LON0 + 2.5 * DLON, LAT0 + 1 * DLAT]]]}}
    fences = tmp_path / "fences.geojson"
    fences.write_text(json.dumps({"type": "FeatureCollection", "features": [fence]}))
    kinds = {}
    for name, corners in (("own", BUS1_ROUTE), ("hill", [(0.5, 6), (5.5, 6)])):
        routes = tmp_path / f"{name}.geojson"
        routes.write_text(json.dumps({"type": "FeatureCollection", "features": [
            {"type": "Feature", "id": "R1", "properties": {}, "geometry": line(corners)}]}))
        out = tmp_path / name
        assert main(["replay", str(log), "--network", str(NETWORK), "--out", str(out),
                     "--routes", str(routes), "--fences", str(fences)]) == 0
        lines = [json.loads(s) for s in (out / "alerts.jsonl").read_text().splitlines()]
        kinds[name] = [(a["vehicle"], a["kind"]) for a in lines]
        summary = json.loads((out / "summary.json").read_text())
        assert summary["alerts"] == len(lines)
    assert kinds["own"] == [("bus1", "fence_enter"), ("bus1", "fence_exit")]
    assert kinds["hill"] == [("bus1", "off_route"), *kinds["own"]]


def test_replay_config_alerts_and_control_topic(tmp_path):
    """replay takes [alerts] and mqtt.control_topic from the daemon's config file."""
    from livematch.commands.replay import load_alert_config, load_control_topic

    cfg = tmp_path / "live.toml"
    cfg.write_text('[alerts]\nstale_s = 60\n[mqtt]\ncontrol_topic = "ops/+/line"\n')
    assert load_alert_config(str(cfg))[0] == AlertSettings(stale_s=60.0)
    assert load_control_topic(str(cfg)) == "ops/+/line"
    assert load_control_topic(None) == "livematch/control/+/route"
    p = Pipeline(NET, MatchSettings(), routes=ROUTES, control_topic="ops/+/line")
    assert p.handle("ops/bus1/line", b'"N"', T0) == []
    run(p, messages("bus1", DETOUR[:3], route="R"))
    assert p.route_status("bus1")["route"] == "N"
