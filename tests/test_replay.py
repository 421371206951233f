"""``livematch replay``: outputs of a recorded feed, their contract and their stability."""

from __future__ import annotations

import gzip
import itertools
import json
import math
import sys
from collections import Counter
from datetime import UTC, datetime
from pathlib import Path

import numpy as np
import pytest
import shapely
from pyproj import Geod, Transformer

from livematch.cli import main
from livematch.commands.replay import OUTPUT_FILES, load_replay_config, replay, summarize
from livematch.core.geometry import Projection
from livematch.core.settings import MatchSettings
from livematch.errors import BadConfigError
from livematch.feed.decode import FeedLimits, parse_time
from livematch.feed.replaylog import ReplayLogWriter
from livematch.mapdata.netfile import open_network
from livematch.pipeline import Pipeline

DATA = Path(__file__).parent / "data" / "feeds"
NETWORK = DATA / "grid_town.geojson"
T0 = 1_764_576_000.0  # 2025-12-01T08:00:00Z

# The contract (issue text, README): field names and their order, pinned.
ASSIGNMENT_FIELDS = ["vehicle", "time", "lat", "lon", "way", "from_node", "to_node",
                     "offset_m", "road", "eps_m", "window_fixes", "window_s", "committed"]
COMMIT_FIELDS = ["vehicle", "fixes", "path"]
COMMIT_FIX_FIELDS = ["time", "lat", "lon", "way", "from_node", "to_node", "offset_m"]
PATH_FIELDS = ["way", "from_node", "to_node"]
REJECT_FIELDS = ["at", "topic", "reason", "detail", "payload"]
SUMMARY_FIELDS = ["messages", "rejects", "duplicates", "fixes", "fixes_accepted", "filtered",
                  "assignments", "assignments_held", "commits", "alerts", "vehicles",
                  "eps_levels"]

# Grid corners of grid_town.geojson (lon, lat); streets ~100 m between shape points.
LON0, LAT0, DLON, DLAT = 24.93, 60.16, 0.0018, 0.0009
BUS1_ROUTE = [(0.5, 0), (3, 0), (3, 3), (5.5, 3)]  # Quay St east, Middle Av north, Market St east
BUS1_WAYS = {100, 201, 101}
BUS2_ROUTE = [(0.5, 6), (5.5, 6)]               # Hill Street, eastbound one-way
BUS2_WAYS = {102}
_LOCAL = Projection.local(24.9354, 60.1627)


def _drive(route: list[tuple[float, int]], step_m: float, noise_m: float, seed: int
           ) -> list[tuple[float, float]]:
    """(lon, lat) points every step_m metres along grid corners, with Gaussian noise."""
    corners = [_LOCAL.to_xy(LON0 + i * DLON, LAT0 + j * DLAT) for i, j in route]
    xy = [(float(x), float(y)) for x, y in corners]
    rng = np.random.default_rng(seed)
    pts: list[tuple[float, float]] = []
    for (ax, ay), (bx, by) in itertools.pairwise(xy):
        length = math.hypot(bx - ax, by - ay)
        for k in range(int(length // step_m)):
            f = k * step_m / length
            pts.append((ax + f * (bx - ax), ay + f * (by - ay)))
    pts.append(xy[-1])
    out = []
    for x, y in pts:
        dx, dy = rng.normal(0.0, noise_m, 2)
        lon, lat = _LOCAL.to_lonlat(x + dx, y + dy)
        out.append((round(float(lon), 7), round(float(lat), 7)))
    return out


def _iso(t: float) -> str:
    return datetime.fromtimestamp(t, UTC).isoformat().replace("+00:00", "Z")


def write_town_feed(path: Path) -> dict[str, int]:
    """Two buses on the grid, redeliveries, a late fix and broken messages; returns counts."""
    msgs: list[tuple[float, str, bytes]] = []
    for k, (lon, lat) in enumerate(_drive(BUS1_ROUTE, 16.0, 3.0, seed=1)):
        t = T0 + 2.0 * k
        body = {"time": _iso(t), "lat": lat, "lon": lon, "accuracy": 5, "route": "R1"}
        msgs.append((t + 0.4, "fleet/bus1/position", json.dumps(body).encode()))
    for k, (lon, lat) in enumerate(_drive(BUS2_ROUTE, 27.0, 3.0, seed=2)):
        t = T0 + 1.0 + 3.0 * k
        body = {"vehicle": "bus2", "time": t, "lat": lat, "lon": lon, "speed": 9.0}
        msgs.append((t + 0.3, "fleet/bus2/position", json.dumps(body).encode()))
    msgs.sort(key=lambda m: m[0])
    # QoS 1 redeliveries of two bus1 messages, right after the originals.
    for i in (10, 11):
        msgs.insert(i + 1, msgs[i])
    # A bus2 fix from between its first two fixes, arriving half-way through: out of order.
    lon, lat = _drive(BUS2_ROUTE, 27.0, 3.0, seed=2)[0]
    late = {"vehicle": "bus2", "time": T0 + 2.5, "lat": lat, "lon": lon}
    half = len(msgs) // 2
    msgs.insert(half, (msgs[half][0], "fleet/bus2/position", json.dumps(late).encode()))
    broken = [
        (T0 + 5.1, "fleet/bus3/position", b"lat=60.16;lon=24.93"),
        (T0 + 6.1, "fleet/bus3/position", b'{"time": 1764576006, "lat": 91, "lon": 24.93}'),
        (T0 + 7.1, "fleet/bus3/position",
         b'{"time": "2025-12-01T08:00:07", "lat": 60.16, "lon": 24.93}'),
        (T0 + 8.1, "fleet/bus1/position",
         b'{"vehicle": "bus9", "time": 1764576008, "lat": 60.16, "lon": 24.93}'),
        (T0 + 9.1, "telemetry/raw", b'{"time": 1764576009, "lat": NaN, "lon": 24.93}'),
        (T0 + 9.2, "fleet/bus3/position", b'{"pad": "' + b"x" * 5000 + b'"}'),
    ]
    for at, topic, payload in broken:
        pos = next(i for i, m in enumerate(msgs) if m[0] > at)
        msgs.insert(pos, (at, topic, payload))
    with ReplayLogWriter(path) as log:
        for at, topic, payload in msgs:
            log.write(at, topic, payload)
    return {"messages": len(msgs), "broken": len(broken), "duplicates": 2}


@pytest.fixture(scope="module")
def town(tmp_path_factory: pytest.TempPathFactory) -> dict[str, object]:
    """The town feed replayed once through the CLI; paths and parsed outputs."""
    base = tmp_path_factory.mktemp("town")
    log = base / "feed.jsonl"
    counts = write_town_feed(log)
    out = base / "out"
    assert main(["replay", str(log), "--network", str(NETWORK), "--out", str(out)]) == 0
    lines = {kind: [json.loads(line) for line in (out / name).read_text().splitlines()]
             for kind, name in OUTPUT_FILES.items()}
    summary = json.loads((out / "summary.json").read_text())
    return {"log": log, "out": out, "counts": counts, "lines": lines, "summary": summary,
            "base": base}


def test_replay_writes_every_output_file(town):
    """assignments, commits, rejects, alerts (.jsonl) and summary.json are all written."""
    names = sorted(p.name for p in Path(town["out"]).iterdir())
    assert names == ["alerts.jsonl", "assignments.jsonl", "commits.jsonl", "rejects.jsonl",
                     "summary.json"]
    assert town["lines"]["alert"] == []


def test_replay_assignment_fields_pinned(town):
    """Every assignment line has exactly the contract fields, in order, with their types."""
    rows = town["lines"]["assignment"]
    assert rows
    for row in rows:
        # a refused fix's repeated answer ends with "held": true (hold_filtered)
        assert list(row) == ASSIGNMENT_FIELDS + (["held"] if "held" in row else [])
        assert row.get("held", True) is True
        assert row["committed"] is False
        assert isinstance(row["way"], int) and isinstance(row["from_node"], int)
        assert row["road"] in {"Quay Street", "Middle Avenue", "Market Street", "Hill Street",
                               "West Avenue", "East Avenue"}
        assert row["eps_m"] in (15.0, 30.0, 60.0)
        assert row["window_fixes"] >= 1 and row["window_s"] >= 0


def test_replay_commit_and_reject_fields_pinned(town):
    """Commit lines, their fixes and path steps, and reject lines have the contract fields."""
    for row in town["lines"]["commit"]:
        assert list(row) == COMMIT_FIELDS
        for fix in row["fixes"]:
            assert list(fix) == COMMIT_FIX_FIELDS
        for step in row["path"]:
            assert list(step) == PATH_FIELDS
    for row in town["lines"]["reject"]:
        assert list(row) == REJECT_FIELDS
    assert list(town["summary"]) == SUMMARY_FIELDS


def test_replay_one_assignment_per_accepted_fix(town):
    """Each accepted fix gives one assignment, at the fix's own time, in time order."""
    s = town["summary"]
    rows = town["lines"]["assignment"]
    # plus one line per refused fix given the newest answer again (hold_filtered)
    assert s["assignments"] == s["fixes_accepted"]
    assert len(rows) == s["assignments"] + s["assignments_held"]
    assert sum(1 for r in rows if r.get("held")) == s["assignments_held"]
    for vehicle in ("bus1", "bus2"):
        times = [r["time"] for r in rows if r["vehicle"] == vehicle]
        assert times == sorted(times) and len(set(times)) == len(times)
        assert all((t - T0) % (2.0 if vehicle == "bus1" else 3.0) in (0.0, 1.0) for t in times)


def _road_lines() -> tuple[dict[int, shapely.LineString], Transformer]:
    """The roads of grid_town.geojson in metres, read with json + pyproj (not livematch)."""
    to_m = Transformer.from_crs("EPSG:4326", "EPSG:32635", always_xy=True)  # UTM 35N
    doc = json.loads(NETWORK.read_text())
    lines = {}
    for feat in doc["features"]:
        xs, ys = to_m.transform(*zip(*feat["geometry"]["coordinates"], strict=True))
        lines[feat["id"]] = shapely.LineString(list(zip(xs, ys, strict=True)))
    return lines, to_m


def test_replay_matched_points_on_their_road_and_near_the_fix(town):
    """Matched lat/lon lies on the named way, within eps_m of the raw fix it stands for."""
    # Outside references: the GeoJSON read with json and projected with pyproj to UTM 35N,
    # distances by shapely; fix-to-match distance by pyproj.Geod (GeographicLib).
    lines, to_m = _road_lines()
    geod = Geod(ellps="WGS84")
    raw = {}
    for line in Path(town["log"]).read_text().splitlines():
        rec = json.loads(line)
        p = rec["payload"]
        if isinstance(p, dict) and rec["topic"] in ("fleet/bus1/position", "fleet/bus2/position"):
            t = parse_time(p["time"])
            raw[(rec["topic"].split("/")[1], t)] = (p["lon"], p["lat"])
    for row in town["lines"]["assignment"]:
        x, y = to_m.transform(row["lon"], row["lat"])
        assert lines[row["way"]].distance(shapely.Point(x, y)) < 0.05
        lon, lat = raw[(row["vehicle"], row["time"])]
        _, _, dist = geod.inv(lon, lat, row["lon"], row["lat"])
        assert dist <= row["eps_m"] + 0.05


def test_replay_commits_cover_every_accepted_fix_once(town):
    """After the final flush each accepted fix is committed exactly once, on its route."""
    committed: dict[str, list[float]] = {"bus1": [], "bus2": []}
    for row in town["lines"]["commit"]:
        committed[row["vehicle"]].extend(f["time"] for f in row["fixes"])
        ways = {f["way"] for f in row["fixes"]} | {s["way"] for s in row["path"]}
        assert ways <= (BUS1_WAYS if row["vehicle"] == "bus1" else BUS2_WAYS)
    for vehicle, times in committed.items():
        assigned = [r["time"] for r in town["lines"]["assignment"] if r["vehicle"] == vehicle]
        assert times == assigned


def test_replay_commit_paths_are_connected(town):
    """Each commit's path is a connected walk, and consecutive commits join up."""
    last_step: dict[str, dict[str, int]] = {}
    for row in town["lines"]["commit"]:
        steps = row["path"]
        for a, b in itertools.pairwise(steps):
            assert a["to_node"] == b["from_node"]
        prev = last_step.get(row["vehicle"])
        if steps and prev is not None:
            assert prev["to_node"] == steps[0]["from_node"] or prev == steps[0]
        if steps:
            last_step[row["vehicle"]] = steps[-1]


def test_replay_rejects_and_summary_counts(town):
    """Broken messages are in rejects.jsonl with their reasons; the summary adds up."""
    rejects = town["lines"]["reject"]
    assert [r["reason"] for r in rejects] == ["not_json", "out_of_range", "bad_time",
                                               "vehicle_mismatch", "not_finite", "too_large"]
    assert rejects[0] == {"at": T0 + 5.1, "topic": "fleet/bus3/position", "reason": "not_json",
                          "detail": rejects[0]["detail"], "payload": "lat=60.16;lon=24.93"}
    assert rejects[0]["detail"].startswith("payload is not valid JSON")
    assert len(rejects[5]["payload"]) == 512
    s = town["summary"]
    counts = town["counts"]
    assert s["messages"] == counts["messages"]
    assert s["rejects"] == {"total": 6, "by_reason": {
        "bad_time": 1, "not_finite": 1, "not_json": 1, "out_of_range": 1, "too_large": 1,
        "vehicle_mismatch": 1}}
    assert s["duplicates"] == counts["duplicates"]
    assert s["fixes"] == counts["messages"] - 6 - 2
    assert s["filtered"]["by_reason"].get("out_of_order") == 1
    assert s["fixes_accepted"] == s["fixes"] - s["filtered"]["total"]
    assert s["vehicles"] == 2
    assert s["commits"] == len(town["lines"]["commit"])
    shares = [lv["share"] for lv in s["eps_levels"]]
    assert [lv["eps_m"] for lv in s["eps_levels"]] == [15.0, 30.0, 60.0]
    assert sum(lv["assignments"] for lv in s["eps_levels"]) == s["assignments"]
    assert sum(shares) == pytest.approx(1.0, abs=1e-5)


def test_replay_output_is_byte_identical_across_runs(town, tmp_path):
    """A second run, and a run from the gzip copy of the log, write the same bytes."""
    gz = tmp_path / "feed.jsonl.gz"
    gz.write_bytes(gzip.compress(Path(town["log"]).read_bytes()))
    for i, log in enumerate([town["log"], gz]):
        out = tmp_path / f"run{i}"
        assert main(["replay", str(log), "--network", str(NETWORK), "--out", str(out)]) == 0
        for name in [*OUTPUT_FILES.values(), "summary.json"]:
            assert (out / name).read_bytes() == (Path(town["out"]) / name).read_bytes(), name


def test_replay_function_matches_cli(town, tmp_path):
    """The library function with a fresh pipeline gives the same summary as the command."""
    pipeline = Pipeline(open_network(NETWORK), MatchSettings())
    assert replay(town["log"], pipeline, tmp_path) == town["summary"]


def test_replay_timing_on_stderr_not_in_summary(town, tmp_path, capsys):
    """The run time is printed to stderr; summary.json holds counts only."""
    out = tmp_path / "o"
    assert main(["replay", str(town["log"]), "--network", str(NETWORK), "--out", str(out)]) == 0
    err = capsys.readouterr().err
    assert f"replayed {town['counts']['messages']} messages" in err
    assert " s (" in err and "msg/s" in err
    # Another run took another time, yet the summary is the same: no timing inside.
    assert json.loads((out / "summary.json").read_text()) == town["summary"]


def test_replay_config_matcher_section(town, tmp_path):
    """--config [matcher] eps_levels change the ladder seen in the summary."""
    cfg = tmp_path / "m.toml"
    cfg.write_text("[matcher]\neps_levels = [20, 40]\n")
    out = tmp_path / "o"
    assert main(["replay", str(town["log"]), "--network", str(NETWORK), "--out", str(out),
                 "--config", str(cfg)]) == 0
    summary = json.loads((out / "summary.json").read_text())
    assert [lv["eps_m"] for lv in summary["eps_levels"]] == [20.0, 40.0]
    eps = {json.loads(line)["eps_m"] for line in (out / "assignments.jsonl").open()}
    assert eps <= {20.0, 40.0}


@pytest.mark.parametrize(("text", "message"), [
    ("[matcher]\neps_levels = [30, 15]\n",
     "matcher.eps_levels must be strictly increasing, got [30.0, 15.0]"),
    ("[matcher]\nepsilon = 3\n", "unknown key matcher.epsilon"),
    ("[matcher]\nmax_lag_fixes = 2.5\n", "matcher.max_lag_fixes must be an integer, got 2.5"),
])
def test_replay_bad_config_names_file_and_key(tmp_path, capsys, text, message):
    """An invalid [matcher] value fails with exit 2 and names the file and the key."""
    log = tmp_path / "feed.jsonl"
    log.write_text("")
    cfg = tmp_path / "bad.toml"
    cfg.write_text(text)
    code = main(["replay", str(log), "--network", str(NETWORK), "--out", str(tmp_path / "o"),
                 "--config", str(cfg)])
    err = capsys.readouterr().err
    assert code == 2
    assert str(cfg) in err and message in err
    assert not (tmp_path / "o").exists()


def test_replay_missing_inputs_exit_2(tmp_path, capsys):
    """A missing log, network, routes or fences file is one error line and exit code 2."""
    log = tmp_path / "feed.jsonl"
    log.write_text("")
    cases = [
        (["replay", str(tmp_path / "nope.jsonl"), "--network", str(NETWORK)], "nope.jsonl"),
        (["replay", str(log), "--network", str(tmp_path / "no.geojson")], "no.geojson"),
        (["replay", str(log), "--network", str(NETWORK), "--routes", "r.json"], "r.json"),
        (["replay", str(log), "--network", str(NETWORK), "--fences", "f.json"], "f.json"),
        (["replay", str(log)], "needs --network"),
    ]
    for argv, needle in cases:
        assert main([*argv, "--out", str(tmp_path / "o")]) == 2
        err = capsys.readouterr().err
        assert err.startswith("livematch: error: ") and needle in err
        assert "Traceback" not in err


def test_replay_bad_routes_file_is_an_error(tmp_path, capsys):
    """A route file that is not GeoJSON routes stops the replay, naming the file."""
    log = tmp_path / "feed.jsonl"
    log.write_text("")
    routes = tmp_path / "routes.json"
    routes.write_text("{}")
    out = tmp_path / "o"
    assert main(["replay", str(log), "--network", str(NETWORK), "--out", str(out),
                 "--routes", str(routes)]) == 2
    err = capsys.readouterr().err
    assert f"{routes}: expected a GeoJSON FeatureCollection or Feature" in err


def test_replay_broken_log_line_is_an_error(tmp_path, capsys):
    """A malformed log line stops the replay with the file and line number."""
    code = main(["replay", str(DATA / "broken.jsonl"), "--network", str(NETWORK),
                 "--out", str(tmp_path / "o")])
    assert code == 2
    assert f"{DATA / 'broken.jsonl'}:3: not a replay log line" in capsys.readouterr().err


def test_load_replay_config_defaults_and_network(tmp_path):
    """No file gives defaults; inputs.network of the file is used when --network is absent."""
    settings, limits, net = load_replay_config(None)
    assert settings == MatchSettings() and limits.topic_filter == "fleet/+/position"
    assert net == ""
    with pytest.raises(BadConfigError):
        load_replay_config(str(tmp_path / "missing.toml"))


def test_summarize_shares():
    """Shares are per eps level over all assignments, rounded to 6 decimals."""
    counters = Counter({"assignments": 3, "eps_m:15.0": 2, "eps_m:60.0": 1, "messages": 4,
                        "fixes": 3, "reject:not_json": 1})
    s = summarize(counters, MatchSettings(), 1)
    assert s["eps_levels"] == [{"eps_m": 15.0, "assignments": 2, "share": 0.666667},
                               {"eps_m": 30.0, "assignments": 0, "share": 0.0},
                               {"eps_m": 60.0, "assignments": 1, "share": 0.333333}]
    assert s["rejects"] == {"total": 1, "by_reason": {"not_json": 1}}
    assert s["fixes_accepted"] == 3


@pytest.mark.parametrize(("text", "message"), [
    ("[matcher]\neps_levels = [30, 15]\n[mqtt]\nurl = 'x'\n",
     "matcher.eps_levels must be strictly increasing, got [30.0, 15.0]"),
    ("[matcher]\nreorder_fixes = true\n", "matcher.reorder_fixes must be an integer, got True"),
    ("matcher = 3\n", "matcher must be a [matcher] table"),
    ("[matcher\n", "not valid TOML"),
])
def test_load_replay_config_without_daemon_loader(tmp_path, monkeypatch, text, message):
    """Without livematch.config, only [matcher] is read, with the same kind of errors."""
    monkeypatch.setitem(sys.modules, "livematch.config", None)
    cfg = tmp_path / "c.toml"
    cfg.write_text(text)
    with pytest.raises(BadConfigError) as info:
        load_replay_config(str(cfg))
    assert str(info.value).startswith(f"{cfg}: ")
    assert message in str(info.value)
    cfg.write_text("[matcher]\neps_levels = [12, 24]\nmax_lag_s = 90\n[mqtt]\nanything = 1\n")
    settings, limits, net = load_replay_config(str(cfg))
    assert settings == MatchSettings(eps_levels=(12.0, 24.0), max_lag_s=90.0)
    assert (limits, net) == (FeedLimits(), "")
