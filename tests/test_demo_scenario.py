"""The Larkmoor demo scenario: determinism, scripted incidents, samples and their replay."""

from __future__ import annotations

import gzip
import json
import subprocess
from pathlib import Path

import numpy as np
import pytest
import shapely
from pyproj import Geod

from livematch.cli import main
from livematch.demo.samples import LOG_NAME, SAMPLE_FILES
from livematch.demo.scenario import LIVE_FLEET, OFF_ROUTE_M, TRUTH_FORMAT, build_scenario
from livematch.feed.replaylog import read_replay_log
from livematch.mapdata.fences import read_fences
from livematch.mapdata.netfile import open_network
from livematch.mapdata.routes import load_routes

ROOT = Path(__file__).resolve().parent.parent
SAMPLES = ROOT / "replay_logs"
GEOD = Geod(ellps="WGS84")


@pytest.fixture(scope="module")
def scenario():
    return build_scenario()


@pytest.fixture(scope="module")
def truth():
    with gzip.open(SAMPLES / "larkmoor-truth.jsonl.gz", "rt", encoding="utf-8") as f:
        return [json.loads(line) for line in f]


@pytest.fixture(scope="module")
def log():
    return [(e.at, e.topic, json.loads(e.payload)) for e in read_replay_log(SAMPLES / LOG_NAME)]


def _fixes(truth, vehicle):
    return [r for r in truth if r["kind"] == "fix" and r["vehicle"] == vehicle]


def _incidents(truth, kind):
    return [r for r in truth if r["kind"] == "incident" and r["type"] == kind]


def test_scenario_same_seed_same_output():
    """The same seed gives identical messages and truth; another seed differs."""
    a = build_scenario(duration_s=60.0, seed=5)
    b = build_scenario(duration_s=60.0, seed=5)
    c = build_scenario(duration_s=60.0, seed=6)
    assert json.dumps(a.messages()) == json.dumps(b.messages())
    assert json.dumps(a.truth_records()) == json.dumps(b.truth_records())
    assert json.dumps(a.messages()) != json.dumps(c.messages())


def test_scenario_live_fleet_twenty_minutes():
    """The live demo's size (12 vehicles, 20 min) builds; messages come in receive order."""
    big = build_scenario(buses=LIVE_FLEET, duration_s=1200.0)
    assert len(big.vehicles) == 12
    messages = big.messages()
    assert [m.at for m in messages] == sorted(m.at for m in messages)
    per_vehicle = {m.payload["vehicle"] for m in messages}
    assert len(per_vehicle) == 12
    kinds = big.summary()["incidents"]
    assert kinds["detour"] >= 2 and kinds["silent"] == 1 and kinds["zone_exit"] == 1


def test_demo_docstring_examples_hold():
    """The worked examples in the demo modules' docstrings hold (run as doctests)."""
    import doctest

    from livematch.demo import scenario, town

    for module in (town, scenario):
        result = doctest.testmod(module, raise_on_error=False)
        assert result.failed == 0 and result.attempted > 0, module.__name__


def test_scenario_bad_arguments_raise():
    """Unknown lines and too many vans are refused with the value named."""
    with pytest.raises(ValueError, match="L9"):
        build_scenario(buses={"L9": 1}, duration_s=10.0)
    with pytest.raises(ValueError, match="got 5"):
        build_scenario(vans=5, duration_s=10.0)


def test_samples_regenerate_byte_identical(tmp_path):
    """scripts/make_samples rewrites every committed sample file byte for byte."""
    subprocess.run([str(ROOT / "scripts" / "make_samples"), str(tmp_path)], check=True,
                   capture_output=True, cwd=ROOT, timeout=120)
    for name in SAMPLE_FILES:
        assert (tmp_path / name).read_bytes() == (SAMPLES / name).read_bytes(), name
    total = sum((SAMPLES / name).stat().st_size for name in SAMPLE_FILES)
    assert total < 1_000_000


def test_sample_log_fleet_and_message_form(log, truth):
    """The sample: 10 vehicles over 600 s; payloads carry the documented fields."""
    vehicles = {p["vehicle"] for _, _, p in log}
    assert vehicles == {"bus-11", "bus-12", "bus-21", "bus-22", "bus-31", "bus-41",
                        "van-1", "van-2", "van-3", "van-4"}
    for at, topic, p in log:
        assert topic == f"fleet/{p['vehicle']}/position"
        assert 0.2 - 1e-6 <= at - p["time"] <= 0.9 + 1e-6  # float sums
        assert set(p) == ({"vehicle", "time", "lat", "lon", "accuracy", "route"}
                          if p["vehicle"].startswith("bus") else
                          {"vehicle", "time", "lat", "lon", "accuracy"})
    assert [at for at, _, _ in log] == sorted(at for at, _, _ in log)
    times = [p["time"] for _, _, p in log]
    assert max(times) - min(times) == 600.0
    assert truth[0]["kind"] == "header" and truth[0]["format"] == TRUTH_FORMAT


def test_truth_keys_every_published_fix(log, truth):
    """Each message has one non-silent truth fix with the same observed position."""
    fixes = {(r["vehicle"], r["time"]): r for r in truth if r["kind"] == "fix"}
    published = [r for r in fixes.values() if not r["silent"]]
    assert len(published) == len(log)
    for _, _, p in log:
        rec = fixes[(p["vehicle"], p["time"])]
        assert (rec["obs_lat"], rec["obs_lon"], rec["accuracy"]) == (
            p["lat"], p["lon"], p["accuracy"])


def test_truth_segments_exist_in_the_sample_network(truth):
    """True segments are given by source ids of larkmoor.geojson as livematch imports it."""
    net = open_network(SAMPLES / "larkmoor.geojson")
    ids = {net.source_ids(s) for s in range(net.n_segments)}
    for r in truth:
        if r["kind"] == "fix":
            assert (r["way"], r["from_node"], r["to_node"]) in ids
        elif r["kind"] == "path":
            assert all((s["way"], s["from_node"], s["to_node"]) in ids for s in r["segments"])


def test_scenario_detour_leaves_route_by_150_to_400_m(scenario):
    """bus-21 leaves L2 at the closed street by 150–400 m and comes back onto it."""
    (detour,) = [i for i in scenario.incidents if i["type"] == "detour"]
    assert detour["vehicle"] == "bus-21" and detour["route"] == "L2"
    (track,) = [t for t in scenario.tracks if t.vehicle.id == "bus-21"]
    (line,) = [ln for ln in scenario.lines if ln.id == "L2"]
    # Reference: shapely (GEOS) distance from the true positions to the route line.
    dist = shapely.distance(line.line, shapely.points(track.x, track.y))
    during = (track.t >= detour["start"]) & (track.t <= detour["end"])
    assert 150.0 <= dist[during].max() <= 400.0
    after = track.t > detour["end"]
    assert after.sum() > 60 and dist[after].max() <= OFF_ROUTE_M
    assert dist[after][-60:].max() <= 1e-6  # back on its route
    before = track.t < detour["start"]
    assert before.sum() > 60 and dist[before].max() <= OFF_ROUTE_M
    # The closed block of Tanner Row (x 400..600 m on y = -200 m) is driven by no vehicle.
    net = scenario.town.network
    for tr in scenario.tracks:
        for seg in set(tr.path[: int(tr.path_index.max()) + 1]):
            ax, ay, bx, by = net.segment_coords(seg)
            assert not (ay == by == -200.0 and min(ax, bx) >= 400.0 and max(ax, bx) <= 600.0)


def test_scenario_silent_gap_in_log(log, truth):
    """bus-31 sends nothing for more than two minutes once; the truth marks it silent."""
    times = [p["time"] for _, _, p in log if p["vehicle"] == "bus-31"]
    gaps = np.diff(times)
    assert np.count_nonzero(gaps > 1.0) == 1
    assert gaps.max() >= 120.0
    (silent,) = _incidents(truth, "silent")
    assert silent["vehicle"] == "bus-31" and silent["gap_s"] == float(gaps.max())
    marked = [r["time"] for r in _fixes(truth, "bus-31") if r["silent"]]
    assert marked[0] == silent["start"] and marked[-1] == silent["end"]
    assert len(marked) == int(gaps.max()) - 1


def test_scenario_van_leaves_its_zone(scenario, truth):
    """van-3 leaves its zone polygon (150–300 m) and comes back; others stay inside."""
    (exit_,) = _incidents(truth, "zone_exit")
    assert exit_["vehicle"] == "van-3" and exit_["zone"] == "zone-CE"
    (zone,) = [f.polygon for f in scenario.fences if f.id == "zone-CE"]
    (track,) = [t for t in scenario.tracks if t.vehicle.id == "van-3"]
    # Reference: shapely point-in-polygon and distance.
    outside = ~shapely.contains_xy(zone, track.x, track.y)
    assert outside.any() and not outside[-1]
    assert 150.0 <= shapely.distance(zone, shapely.points(track.x, track.y)).max() <= 300.0
    for r in truth:
        if r["kind"] == "fix" and r["vehicle"].startswith("van") and r["vehicle"] != "van-3":
            assert r["in_zone"]


def test_scenario_degraded_accuracy_in_the_centre(truth):
    """Fixes between the tall buildings report 30–80 m accuracy; elsewhere below 10 m."""
    fixes = [r for r in truth if r["kind"] == "fix"]
    centre = shapely.Polygon(truth[0]["degraded_area"])
    degraded = [r for r in fixes if r["degraded"]]
    assert len({r["vehicle"] for r in degraded}) >= 4
    for r in fixes:
        assert r["degraded"] == centre.contains(shapely.Point(r["x"], r["y"]))
        if r["degraded"]:
            assert 30.0 <= r["accuracy"] <= 80.0
        else:
            assert r["accuracy"] < 10.0


def test_scenario_outliers_jump_80_to_250_m(truth):
    """Six outliers lie 80–250 m (plus at most 25 m of ordinary error) from the truth."""
    outliers = [r for r in truth if r["kind"] == "fix" and r["outlier"]]
    assert len(outliers) == 6 == len(_incidents(truth, "outlier"))
    for r in outliers:
        # Reference: pyproj Geod (WGS84 ellipsoid) distance, independent of our projection.
        _, _, d = GEOD.inv(r["lon"], r["lat"], r["obs_lon"], r["obs_lat"])
        assert 80.0 - 25.0 <= d <= 250.0 + 25.0
    ordinary = [r for r in truth if r["kind"] == "fix" and not r["outlier"]
                and not r["silent"] and not r["degraded"]]
    _, _, d = GEOD.inv([r["lon"] for r in ordinary], [r["lat"] for r in ordinary],
                       [r["obs_lon"] for r in ordinary], [r["obs_lat"] for r in ordinary])
    assert float(np.max(d)) < 30.0


def test_sample_routes_and_fences_load(scenario):
    """The routes and fences files load with livematch's own readers."""
    net = open_network(SAMPLES / "larkmoor.geojson")
    routes = load_routes(SAMPLES / "larkmoor-routes.geojson", net)
    assert sorted(routes) == ["L1", "L2", "L3", "L4"]
    fences = read_fences(SAMPLES / "larkmoor-fences.geojson", net.projection)
    assert sorted(f.id for f in fences) == sorted(f.id for f in scenario.fences)


def test_replay_sample_assigns_every_vehicle(tmp_path, log, capsys):
    """`livematch replay` on the sample runs and assigns fixes of every vehicle."""
    out = tmp_path / "out"
    code = main(["replay", str(SAMPLES / LOG_NAME), "--network",
                 str(SAMPLES / "larkmoor.geojson"), "--routes",
                 str(SAMPLES / "larkmoor-routes.geojson"), "--fences",
                 str(SAMPLES / "larkmoor-fences.geojson"), "--out", str(out)])
    assert code == 0
    assert "replayed 3940 messages" in capsys.readouterr().err
    summary = json.loads((out / "summary.json").read_text())
    assert summary["messages"] == len(log) == 3940
    assert summary["rejects"]["total"] == 0 and summary["vehicles"] == 10
    with open(out / "assignments.jsonl", encoding="utf-8") as f:
        assigned = {json.loads(line)["vehicle"] for line in f}
    assert assigned == {p["vehicle"] for _, _, p in log}
