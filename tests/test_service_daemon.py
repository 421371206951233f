"""The live daemon in-process against a real mosquitto (and redis-server)."""

from __future__ import annotations

import asyncio
import contextlib
import json
import logging
import ssl
import time
from collections.abc import AsyncIterator
from pathlib import Path
from typing import Any

import aiomqtt
import anyio
import pytest
import redis
from moat.lib.mqtt.async_broker import AsyncMQTTBroker, MQTTAuthorizer
from prometheus_client.parser import text_string_to_metric_families
from services import (
    PROJECTION,
    T0,
    Collector,
    Mosquitto,
    RedisServer,
    drive,
    http_get,
    logged,
    position,
    publisher,
    town,
    wait_until,
    write_config,
)

from livematch.cli import main
from livematch.commands.run import build_daemon
from livematch.config import load_config
from livematch.feed.replaylog import ReplayLogWriter
from livematch.mapdata.netfile import save_network
from livematch.pipeline import Pipeline
from livematch.service.daemon import _FULL_LOG_EVERY_S, Daemon, _Pending
from livematch.service.logs import KeyValueFormatter
from livematch.service.mqtt import IntakeQueue
from livematch.service.shards import shard_of

pytest_plugins = ("fixtures_services",)

ASSIGNMENT_FIELDS = {"vehicle", "time", "lat", "lon", "way", "from_node", "to_node",
                     "offset_m", "road", "eps_m", "window_fixes", "window_s", "committed"}


def make_daemon(config_path: Path) -> Daemon:
    config = load_config(config_path, env={})
    return Daemon(config, Pipeline(town(), config.matcher, limits=config.feed,
                                   alerts=config.alerts,
                                   control_topic=config.mqtt.control_topic))


@contextlib.asynccontextmanager
async def running(daemon: Daemon) -> AsyncIterator[asyncio.Task[None]]:
    """Run the daemon as a task until the block ends, then stop it cleanly."""
    task = asyncio.create_task(daemon.run(), name="daemon")
    try:
        # ready = connected, subscribed, store open, state restored: a fix published
        # from here on is received (Daemon.readiness)
        await wait_until(lambda: not daemon.readiness() or task.done(),
                         f"the daemon to be ready (missing {daemon.readiness()})")
        assert not task.done(), task.exception()
        assert daemon.readiness() == []
        yield task
    finally:
        daemon.request_stop()
        await asyncio.wait_for(task, timeout=30)


def direct(messages: list[tuple[str, bytes]], config_path: Path) -> list[Any]:
    """The outputs of the same messages run through a Pipeline directly (like replay)."""
    config = load_config(config_path, env={})
    pipeline = Pipeline(town(), config.matcher, limits=config.feed)
    out = []
    for topic, payload in messages:
        out.extend(pipeline.handle(topic, payload, at=time.time()))
    return out


async def status_is(port: int, path: str, status: int) -> bool:
    """Whether GET ``path`` answers ``status`` now."""
    return (await http_get(port, path))[0] == status


async def metric_at_least(port: int, name: str, value: float) -> bool:
    """Whether the unlabelled sample ``name`` of /metrics is at least ``value`` now."""
    _, text = await http_get(port, "/metrics")
    return metric_values(text).get((name, ()), 0.0) >= value


def metric_values(text: str) -> dict[tuple[str, tuple[tuple[str, str], ...]], float]:
    """Samples of a /metrics page, keyed by (sample name, sorted labels)."""
    out = {}
    for family in text_string_to_metric_families(text):
        for sample in family.samples:
            out[(sample.name, tuple(sorted(sample.labels.items())))] = sample.value
    return out


async def test_daemon_outputs_equal_direct_pipeline(mosquitto: Mosquitto, prefix: str,
                                                    tmp_path: Path) -> None:
    """Fixes of several vehicles in: the same records out as the Pipeline run directly."""
    cfg = write_config(tmp_path, prefix, broker=mosquitto.url)
    feeds = [drive(f"bus-{k}", 25, start_x=200.0 + 700 * k) for k in range(3)]
    messages = [(f"{prefix}/fleet/bus-{k}/position", feeds[k][i][1])
                for i in range(25) for k in range(3)]
    expected = direct(messages, cfg)
    daemon = make_daemon(cfg)
    async with Collector("127.0.0.1", mosquitto.port, f"{prefix}/out/#") as col, \
            running(daemon):
        async with publisher(mosquitto.port) as pub:
            for topic, payload in messages:
                await pub.publish(topic, payload, qos=1)
        await col.wait_for("/out/", len(expected))
        await asyncio.sleep(0.3)  # nothing more may come
        assert len(col.messages) == len(expected)
        for k in range(3):
            vehicle = f"bus-{k}"
            for kind, part in (("assignment", "/out/match/"), ("commit", "/out/commit/")):
                want = [o.record for o in expected if o.kind == kind and o.vehicle == vehicle]
                got = col.records(f"{part}{vehicle}")
                assert got == want
        assignments = col.records("/out/match/")
        assert len(assignments) == 75
        # a refused fix's repeated answer adds "held": true (hold_filtered)
        assert all(set(a) - {"held"} == ASSIGNMENT_FIELDS and a.get("held", True) is True
                   for a in assignments)
        assert {a["way"] for a in assignments} == {1}
        status, text = await http_get(daemon.http.port, "/metrics")  # type: ignore[union-attr]
    assert status == 200
    values = metric_values(text)
    assert values[("livematch_messages_received_total", ())] == 75
    assert values[("livematch_fixes_processed_total", ())] == 75
    assert values[("livematch_published_total", (("kind", "assignment"),))] == 75
    assert values[("livematch_published_total", (("kind", "commit"),))] == sum(
        o.kind == "commit" for o in expected)
    assert values[("livematch_processing_seconds_count", ())] == 75
    assert values[("livematch_fix_to_publish_lag_seconds_count", ())] == 75
    assert values[("livematch_eps_level_assignments_total", (("eps_m", "15.0"),))] == 75
    assert values[("livematch_vehicles_live", ())] == 3
    assert values[("livematch_publish_queue_depth", ())] == 0


async def test_daemon_payloads_equal_replay_files(mosquitto: Mosquitto, prefix: str,
                                                  tmp_path: Path) -> None:
    """Published bytes equal the lines `livematch replay` writes for the same messages."""
    net = tmp_path / "town.lmnet"
    save_network(town(), net)
    cfg = write_config(tmp_path, prefix, broker=mosquitto.url, network=str(net))
    feeds = [drive(f"car-{k}", 15, start_x=500.0 + 900 * k) for k in range(2)]
    messages = [(f"{prefix}/fleet/car-{k}/position", feeds[k][i][1])
                for i in range(15) for k in range(2)]
    messages.insert(7, (f"{prefix}/fleet/car-0/position", b'{"time": 1, "lat": 0, "lon": 0}'))
    log = tmp_path / "feed.jsonl"
    with ReplayLogWriter(log) as writer:
        for i, (topic, payload) in enumerate(messages):
            writer.write(T0 + i, topic, payload)
    assert main(["replay", str(log), "--network", str(net), "--out", str(tmp_path / "out"),
                 "--config", str(cfg)]) == 0

    def lines(name: str) -> list[bytes]:
        return (tmp_path / "out" / name).read_bytes().splitlines()

    # replay flushes every vehicle at the end of its log; a live daemon does not
    config = load_config(cfg, env={})
    pipeline = Pipeline(town(), config.matcher, limits=config.feed)
    for topic, payload in messages:
        pipeline.handle(topic, payload, at=time.time())
    at_end = sum(o.kind == "commit" for o in pipeline.flush())
    live_commits = lines("commits.jsonl")[:len(lines("commits.jsonl")) - at_end]
    daemon = make_daemon(cfg)
    async with Collector("127.0.0.1", mosquitto.port, f"{prefix}/out/#") as col, \
            running(daemon):
        async with publisher(mosquitto.port) as pub:
            for topic, payload in messages:
                await pub.publish(topic, payload, qos=1)
        await col.wait_for("/out/match/", 30)
        await col.wait_for("/out/commit/", len(live_commits))
        await col.wait_for("/out/rejects", 1)
        await asyncio.sleep(0.3)
    published = {part: [p for t, p, _ in col.messages if f"/out/{part}" in t]
                 for part in ("match/", "commit/", "rejects")}
    assert published["match/"] == lines("assignments.jsonl")
    assert published["commit/"] == live_commits
    assert [json.loads(p)["reason"] for p in published["rejects"]] == ["out_of_range"]
    assert [json.loads(p)["reason"] for p in lines("rejects.jsonl")] == ["out_of_range"]


BAD_MESSAGES = [
    # (payload, expected reason)
    (b"this is not json", "not_json"),
    (b'{"time": 1780000100, "lat": 60.17}', "missing_field"),
    (b'{"time": 1780000100, "lat": NaN, "lon": 24.94}', "not_finite"),
    (b'{"time": 1780000100, "lat": 1e999, "lon": 24.94}', "not_finite"),
    (b'{"time": 1780000100, "lat": 91, "lon": 24.94}', "out_of_range"),
    (b'{"time": 1780000100, "lat": "60.17", "lon": 24.94}', "bad_type"),
    (b'{"time": "last tuesday", "lat": 60.17, "lon": 24.94}', "bad_time"),
    (b'{"vehicle": "car\\u0007", "time": 1780000100, "lat": 60.17, "lon": 24.94}',
     "bad_vehicle"),
    (b'{"time": 1780000100, "lat": 60.17, "lon": 24.94, "pad": "' + b"x" * 2000 + b'"}',
     "too_large"),
]


async def test_daemon_rejects_go_to_dead_letter_topic(mosquitto: Mosquitto, prefix: str,
                                                      tmp_path: Path) -> None:
    """Each malformed message lands on the reject topic with its reason; valid ones all pass."""
    cfg = write_config(tmp_path, prefix, broker=mosquitto.url)
    good = drive("van-1", len(BAD_MESSAGES) + 1)
    topic = f"{prefix}/fleet/van-1/position"
    messages: list[tuple[str, bytes]] = []
    for i, (_, payload) in enumerate(good):
        messages.append((topic, payload))
        if i < len(BAD_MESSAGES):
            messages.append((topic, BAD_MESSAGES[i][0]))
    daemon = make_daemon(cfg)
    async with Collector("127.0.0.1", mosquitto.port, f"{prefix}/out/#") as col, \
            running(daemon):
        async with publisher(mosquitto.port) as pub:
            for t, payload in messages:
                await pub.publish(t, payload, qos=1)
        await col.wait_for("/out/rejects", len(BAD_MESSAGES))
        await col.wait_for("/out/match/van-1", len(good))
        _, text = await http_get(daemon.http.port, "/metrics")  # type: ignore[union-attr]
    rejects = col.records("/out/rejects")
    assert [r["reason"] for r in rejects] == [reason for _, reason in BAD_MESSAGES]
    for r, (payload, _) in zip(rejects, BAD_MESSAGES, strict=True):
        assert r["topic"] == topic
        assert r["detail"]
        assert r["payload"] == payload.decode()[:512]
    assert [a["time"] for a in col.records("/out/match/van-1")] == [t for t, _ in good]
    values = metric_values(text)
    assert values[("livematch_messages_received_total", ())] == len(messages)
    assert values[("livematch_messages_rejected_total", (("reason", "not_finite"),))] == 2
    for reason in ("not_json", "missing_field", "out_of_range", "bad_type", "bad_time",
                   "bad_vehicle", "too_large"):
        assert values[("livematch_messages_rejected_total", (("reason", reason),))] == 1
    assert values[("livematch_published_total", (("kind", "reject"),))] == len(BAD_MESSAGES)


async def test_daemon_drops_redelivered_fix(mosquitto: Mosquitto, prefix: str,
                                            tmp_path: Path) -> None:
    """The same fix twice (a QoS 1 redelivery) gives one assignment and a filtered count."""
    cfg = write_config(tmp_path, prefix, broker=mosquitto.url)
    fixes = drive("bus-9", 4)
    topic = f"{prefix}/fleet/bus-9/position"
    daemon = make_daemon(cfg)
    async with Collector("127.0.0.1", mosquitto.port, f"{prefix}/out/match/#") as col, \
            running(daemon):
        async with publisher(mosquitto.port) as pub:
            for _, payload in [fixes[0], fixes[1], fixes[1], fixes[2], fixes[3]]:
                await pub.publish(topic, payload, qos=1)
        await col.wait_for("/out/match/", 4)
        await asyncio.sleep(0.3)
        _, text = await http_get(daemon.http.port, "/metrics")  # type: ignore[union-attr]
    assert [a["time"] for a in col.records("/out/match/")] == [t for t, _ in fixes]
    values = metric_values(text)
    assert values[("livematch_fixes_filtered_total", (("reason", "duplicate"),))] == 1


async def test_daemon_health_endpoints(mosquitto: Mosquitto, prefix: str,
                                       tmp_path: Path) -> None:
    """/healthz and /readyz answer 200 when connected; unknown paths 404."""
    daemon = make_daemon(write_config(tmp_path, prefix, broker=mosquitto.url))
    async with running(daemon):
        port = daemon.http.port  # type: ignore[union-attr]
        assert await http_get(port, "/healthz") == (200, "ok\n")
        assert await http_get(port, "/readyz") == (200, "ready\n")
        assert (await http_get(port, "/nothing"))[0] == 404


async def test_daemon_throttle_and_retain(mosquitto: Mosquitto, prefix: str,
                                          tmp_path: Path) -> None:
    """throttle_s publishes one assignment per road per period; retain keeps the latest."""
    cfg = write_config(tmp_path, prefix, broker=mosquitto.url,
                       extra="[publish]\nthrottle_s = 5.0\nretain_latest = true\n")
    fixes = drive("taxi-1", 12)  # one fix per second on one road
    daemon = make_daemon(cfg)
    async with Collector("127.0.0.1", mosquitto.port, f"{prefix}/out/match/#") as col, \
            running(daemon):
        async with publisher(mosquitto.port) as pub:
            for _, payload in fixes:
                await pub.publish(f"{prefix}/fleet/taxi-1/position", payload, qos=1)
        await col.wait_for("/out/match/", 3)
        await asyncio.sleep(0.3)
    # fix times T0+0..T0+11: published at 0, 5 and 10 s (same road throughout)
    assert [a["time"] for a in col.records("/out/match/")] == [T0, T0 + 5, T0 + 10]
    # A new subscriber gets the retained latest assignment of the vehicle.
    async with Collector("127.0.0.1", mosquitto.port, f"{prefix}/out/match/#") as late:
        await late.wait_for("/out/match/", 1)
    assert late.records("/out/match/") == [col.records("/out/match/")[-1]]
    assert late.messages[0][2] is True
    # Clear the retained message so the broker does not keep it for later tests.
    async with publisher(mosquitto.port) as pub:
        await pub.publish(f"{prefix}/out/match/taxi-1", b"", qos=1, retain=True)


async def test_daemon_readyz_503_and_requeue_while_broker_down(
        own_mosquitto: Mosquitto, prefix: str, tmp_path: Path) -> None:
    """Broker stopped: not ready, outputs kept; restarted: reconnects, sends them, goes on."""
    broker = own_mosquitto
    cfg = write_config(tmp_path, prefix, broker=broker.url)
    topic = f"{prefix}/fleet/bus-1/position"
    first = drive("bus-1", 150)
    after = drive("bus-1", 20, first=150)
    daemon = make_daemon(cfg)
    async with Collector("127.0.0.1", broker.port, f"{prefix}/out/#") as col, \
            running(daemon):
        port = daemon.http.port  # type: ignore[union-attr]
        async with publisher(broker.port) as pub:
            # All but the last 20 at once (the broker keeps their order); the daemon
            # may match and publish all of them before the last acknowledgement reaches
            # this publisher (it matches messages that arrive together in one turn).
            await asyncio.gather(*(pub.publish(topic, payload, qos=1)
                                   for _, payload in first[:-20]))
        # Then one at a time, until outputs are seen waiting for the broker's
        # acknowledgement in the daemon's queue (the rest follow the restart). This
        # publisher stays connected until then: closing it would let the daemon's
        # acknowledgements arrive meanwhile.
        tail = contextlib.AsyncExitStack()
        pub = await tail.enter_async_context(publisher(broker.port))
        sent = len(first) - 20
        while sent < len(first) and not daemon._outbox:
            await pub.publish(topic, first[sent][1], qos=1)
            sent += 1
            for _ in range(2000):
                if len(daemon._outbox) > 0:
                    break
                await asyncio.sleep(0)
        # Stop the broker while outputs wait in the daemon's queue: between the check
        # and the signal nothing else runs on this event loop.
        waiting = [(p.topic, p.payload) for p in daemon._outbox]
        assert waiting, "the daemon never had outputs queued"
        broker.stop()
        await wait_until(lambda: status_is(port, "/readyz", 503), "/readyz 503")
        status, body = await http_get(port, "/readyz")
        assert (status, body) == (503, "not ready: broker\n")
        with contextlib.suppress(aiomqtt.MqttError):
            await tail.aclose()  # its broker is gone
        await asyncio.sleep(1.0)  # several reconnect attempts fail meanwhile
        broker.start()
        await wait_until(lambda: daemon.readiness() == [], "the daemon ready again")
        assert (await http_get(port, "/readyz"))[0] == 200
        async with publisher(broker.port) as pub:
            for _, payload in first[sent:] + after:
                await pub.publish(topic, payload, qos=1)
        times = {t for t, _ in first + after}
        await wait_until(lambda: {a["time"] for a in col.records("/out/match/")} >= times,
                         "every fix answered")
        got = col.records("/out/match/")
        status, text = await http_get(port, "/metrics")
    assert {a["time"] for a in got} == times  # every fix matched, none lost
    delivered = {(t, p) for t, p, _ in col.messages}
    for item in waiting:  # what was queued while the broker was away was delivered
        assert item in delivered
    values = metric_values(text)
    assert values[("livematch_broker_reconnects_total", ())] >= 1
    assert values[("livematch_publish_dropped_total", ())] == 0


async def test_daemon_keeps_matching_while_store_down(
        mosquitto: Mosquitto, own_redis: RedisServer, prefix: str, tmp_path: Path,
        caplog: pytest.LogCaptureFixture) -> None:
    """Redis stopped: not ready, errors counted, fixes still matched; back: state rewritten."""
    caplog.set_level(logging.INFO, logger="livematch.daemon")
    cfg = write_config(tmp_path, prefix, broker=mosquitto.url, store=own_redis.url)
    topic = f"{prefix}/fleet/bus-5/position"
    fixes = drive("bus-5", 30)
    daemon = make_daemon(cfg)
    raw = redis.Redis.from_url(own_redis.url)
    async with Collector("127.0.0.1", mosquitto.port, f"{prefix}/out/match/#") as col, \
            running(daemon), publisher(mosquitto.port) as pub:
        port = daemon.http.port  # type: ignore[union-attr]
        for _, payload in fixes[:10]:
            await pub.publish(topic, payload, qos=1)
        await col.wait_for("/out/match/", 10)
        own_redis.stop()
        down_at = time.monotonic()
        await wait_until(lambda: status_is(port, "/readyz", 503), "/readyz 503")
        assert await http_get(port, "/readyz") == (503, "not ready: store\n")
        for _, payload in fixes[10:20]:
            await pub.publish(topic, payload, qos=1)
        await col.wait_for("/out/match/", 20)  # matching goes on without the store
        await asyncio.sleep(1.5)  # down at least this long: several checkpoint rounds
        await wait_until(lambda: metric_at_least(port, "livematch_store_errors_total", 1),
                         "a store error counted")
        own_redis.start()  # same port, empty (no persistence)
        await wait_until(lambda: daemon.readiness() == [], "the daemon ready again")
        down_s = time.monotonic() - down_at
        for _, payload in fixes[20:]:
            await pub.publish(topic, payload, qos=1)
        await col.wait_for("/out/match/", 30)

        def latest_time() -> float | None:
            latest = raw.hget(f"{prefix}:latest", "bus-5")
            return None if latest is None else json.loads(latest)["time"]  # type: ignore[arg-type]

        await wait_until(lambda: latest_time() == fixes[-1][0], "the latest record rewritten")
        assert raw.exists(f"{prefix}:vehicle:bus-5")
    assert [a["time"] for a in col.records("/out/match/")] == [t for t, _ in fixes]
    # One line at the outage's start (a round a tick, not one per due checkpoint), then at
    # most one line per _FULL_LOG_EVERY_S (10 s) however long a loaded machine keeps the
    # store down, each with the rounds failed since the one before; one line when
    # checkpoints go through again, with every round that failed.
    failed = [r for r in caplog.records if r.getMessage() == "checkpoint failed; will retry"]
    again = [r for r in caplog.records if r.getMessage() == "checkpoints written again"]
    rounds = [r.fields["failed_rounds"] for r in failed]  # type: ignore[attr-defined]
    assert rounds[0] == 1
    assert len(rounds) <= 1 + int(down_s // _FULL_LOG_EVERY_S)
    assert len(again) == 1
    assert again[0].fields["failed_rounds"] >= max(2, sum(rounds))  # type: ignore[attr-defined]


async def test_daemon_evicts_idle_vehicle(mosquitto: Mosquitto, redis_server: RedisServer,
                                          prefix: str, tmp_path: Path) -> None:
    """A vehicle silent for idle_ttl_s of fix time is flushed, forgotten and deleted."""
    cfg = write_config(tmp_path, prefix, broker=mosquitto.url, store=redis_server.url,
                       extra="")
    text = cfg.read_text().replace("checkpoint_every_s = 1.0",
                                   "checkpoint_every_s = 1.0\nidle_ttl_s = 20.0")
    cfg.write_text(text)
    quiet = drive("quiet", 5)
    busy = drive("busy", 40, start_x=2000.0)
    daemon = make_daemon(cfg)
    raw = redis.Redis.from_url(redis_server.url)
    async with Collector("127.0.0.1", mosquitto.port, f"{prefix}/out/#") as col, \
            running(daemon), publisher(mosquitto.port) as pub:
        for _, payload in quiet:
            await pub.publish(f"{prefix}/fleet/quiet/position", payload, qos=1)
        await col.wait_for("/out/match/quiet", 5)
        await wait_until(lambda: raw.exists(f"{prefix}:vehicle:quiet"),
                         "quiet checkpointed (every 5 fixes)")
        for _, payload in busy:
            await pub.publish(f"{prefix}/fleet/busy/position", payload, qos=1)
        await col.wait_for("/out/match/busy", 40)
        await wait_until(lambda: daemon.pipeline.vehicles() == ["busy"], "quiet evicted")
        await wait_until(lambda: not raw.exists(f"{prefix}:vehicle:quiet"),
                         "quiet's checkpoint deleted")
        assert raw.hget(f"{prefix}:latest", "quiet") is None
        # the eviction flushed the quiet vehicle: its last fix is committed and published
        await asyncio.sleep(0.3)
        committed = [f["time"] for c in col.records("/out/commit/quiet") for f in c["fixes"]]
        assert committed == [t for t, _ in quiet]


async def test_daemon_authenticates_and_never_logs_password(
        tmp_path: Path, prefix: str, caplog: pytest.LogCaptureFixture) -> None:
    """Right credentials connect; wrong ones leave it not ready; no password in any log line."""
    broker = Mosquitto(tmp_path / "auth", users={"fleet": "right-pass-1"})
    broker.start()
    caplog.set_level(logging.DEBUG)
    try:
        cfg = write_config(tmp_path, prefix, broker=broker.url)
        env = {"LIVEMATCH_MQTT_USERNAME": "fleet", "LIVEMATCH_MQTT_PASSWORD": "right-pass-1"}
        config = load_config(cfg, env=env)
        async with running(Daemon(config, Pipeline(town(), config.matcher))) as _:
            pass
        env["LIVEMATCH_MQTT_PASSWORD"] = "wrong-pass-2"
        config = load_config(cfg, env=env)
        daemon = Daemon(config, Pipeline(town(), config.matcher))
        seen = len(caplog.records)
        task = asyncio.create_task(daemon.run())
        # refused, and refused again on the retry: not a slow first attempt
        await wait_until(lambda: task.done() or logged(
            caplog.records[seen:], "broker connection failed; retrying") >= 2,
            "two refused connection attempts")
        assert not task.done(), task.exception()
        assert daemon.readiness() == ["broker"]
        daemon.request_stop()
        await asyncio.wait_for(task, timeout=30)
    finally:
        broker.stop()
    lines = "\n".join(KeyValueFormatter().format(r) for r in caplog.records)
    assert "broker connection failed; retrying" in lines
    assert "right-pass-1" not in lines and "wrong-pass-2" not in lines


async def test_daemon_small_publish_queue_pauses_intake(mosquitto: Mosquitto, prefix: str,
                                                        tmp_path: Path) -> None:
    """A full publish queue pauses intake between messages; nothing is lost or reordered."""
    cfg = write_config(tmp_path, prefix, broker=mosquitto.url,
                       extra="[publish]\nqueue_max = 1\n")
    fixes = drive("bus-q", 40)
    daemon = make_daemon(cfg)
    async with Collector("127.0.0.1", mosquitto.port, f"{prefix}/out/match/#") as col, \
            running(daemon):
        async with publisher(mosquitto.port) as pub:
            for _, payload in fixes:
                await pub.publish(f"{prefix}/fleet/bus-q/position", payload, qos=1)
        await col.wait_for("/out/match/", 40)
    assert [a["time"] for a in col.records("/out/match/")] == [t for t, _ in fixes]


async def test_daemon_vehicle_from_payload_when_topic_has_none(mosquitto: Mosquitto,
                                                               prefix: str,
                                                               tmp_path: Path) -> None:
    """With a filter without '+', the payload names the vehicle; no vehicle is a reject."""
    cfg = write_config(tmp_path, prefix, broker=mosquitto.url, topic="feed/#")
    fixes = drive("tram-4", 5)
    daemon = make_daemon(cfg)
    async with Collector("127.0.0.1", mosquitto.port, f"{prefix}/out/#") as col, \
            running(daemon):
        async with publisher(mosquitto.port) as pub:
            for _, payload in fixes:
                await pub.publish(f"{prefix}/feed/gateway-2", payload, qos=1)
            await pub.publish(f"{prefix}/feed/gateway-2",
                              b'{"time": 1780000100, "lat": 60.17, "lon": 24.94}', qos=1)
        await col.wait_for("/out/match/tram-4", 5)
        await col.wait_for("/out/rejects", 1)
    assert [a["time"] for a in col.records("/out/match/tram-4")] == [t for t, _ in fixes]
    assert [r["reason"] for r in col.records("/out/rejects")] == ["missing_field"]


def routes_fences_config(tmp_path: Path, prefix: str, broker: str) -> Path:
    """A config with two routes (R-side on way 2, R-main on way 1), a depot fence on Main
    Street at x 1500-1700 m and a control topic under ``prefix``."""
    net = tmp_path / "town.lmnet"
    save_network(town(), net)
    (tmp_path / "routes.geojson").write_text(json.dumps({"type": "FeatureCollection",
        "features": [{"type": "Feature", "id": "R-side", "properties": {"ways": [2]},
                      "geometry": None},
                     {"type": "Feature", "id": "R-main", "properties": {"ways": [1]},
                      "geometry": None}]}))
    corners = [PROJECTION.to_lonlat(x, y) for x, y in
               ((1500, -60), (1700, -60), (1700, 60), (1500, 60), (1500, -60))]
    (tmp_path / "fences.geojson").write_text(json.dumps({"type": "FeatureCollection",
        "features": [{"type": "Feature", "id": "depot", "properties": {"name": "Depot"},
                      "geometry": {"type": "Polygon", "coordinates": [
                          [[float(lon), float(lat)] for lon, lat in corners]]}}]}))
    cfg = write_config(tmp_path, prefix, broker=broker, network=str(net))
    text = cfg.read_text().replace(
        "[inputs]\n", '[inputs]\nroutes = "routes.geojson"\nfences = "fences.geojson"\n')
    cfg.write_text(text.replace(
        "[mqtt]\n", f'[mqtt]\ncontrol_topic = "{prefix}/control/+/route"\n'))
    return cfg


def routes_fences_feed(prefix: str) -> tuple[tuple[str, bytes], list[tuple[str, bytes]]]:
    """For :func:`routes_fences_config`: a control message giving bus-1 route R-side and
    60 fixes each of bus-1 (on Main Street: off its route) and bus-2 (R-main in its
    fixes; through the depot), interleaved."""
    control = (f"{prefix}/control/bus-1/route", b'{"route": "R-side"}')
    bus1 = drive("bus-1", 60)
    bus2 = [(t, position("bus-2", t, 1300.0 + i * 12.0, 0.0, route="R-main"))
            for i, (t, _) in enumerate(drive("bus-2", 60, start_x=1300.0))]
    return control, [(f"{prefix}/fleet/bus-{k}/position", feed[i][1])
                     for i in range(60) for k, feed in ((1, bus1), (2, bus2))]


async def publish_control(pub: Any, daemon: Any, control: tuple[str, bytes]) -> None:
    """Publish the retained route control message and wait until the daemon has taken it."""
    await pub.publish(*control, qos=1, retain=True)
    await wait_until(lambda: daemon.pipeline.counters["control"] == 1,
                     "the control message taken")


async def test_daemon_routes_fences_and_control_alerts_equal_pipeline(
        mosquitto: Mosquitto, prefix: str, tmp_path: Path) -> None:
    """Routes and fences from files, a retained route control message: the daemon's
    alerts (off route, fence enter/exit) equal the same messages through the Pipeline."""
    config = load_config(routes_fences_config(tmp_path, prefix, mosquitto.url), env={})
    control, fixes = routes_fences_feed(prefix)
    expected = build_daemon(config).pipeline
    direct_out = [o for topic, payload in [control, *fixes]
                  for o in expected.handle(topic, payload, at=time.time())]
    want_alerts = [o.record for o in direct_out if o.kind == "alert"]
    kinds = {a["kind"] for a in want_alerts}
    assert {"off_route", "fence_enter", "fence_exit"} <= kinds  # the scenario is meaningful
    daemon = build_daemon(config)
    async with Collector("127.0.0.1", mosquitto.port, f"{prefix}/out/#") as col, \
            running(daemon), publisher(mosquitto.port) as pub:
        await publish_control(pub, daemon, control)
        for topic, payload in fixes:
            await pub.publish(topic, payload, qos=1)
        await col.wait_for("/out/alert/", len(want_alerts))
        await col.wait_for("/out/match/", sum(o.kind == "assignment" for o in direct_out))
        await pub.publish(control[0], b"", qos=1, retain=True)  # clear the retained message
    for vehicle in ("bus-1", "bus-2"):
        assert col.records(f"/out/alert/{vehicle}") == [
            a for a in want_alerts if a["vehicle"] == vehicle]


async def test_daemon_over_tls_with_own_ca(tmp_path: Path, prefix: str) -> None:
    """mqtts:// with mqtt.ca_file: the daemon verifies the broker and works as over TCP."""
    broker = Mosquitto(tmp_path / "tls", tls=True)
    broker.start()
    try:
        cfg = write_config(tmp_path, prefix, broker=broker.url)
        cfg.write_text(cfg.read_text().replace(
            "[mqtt]\n", f'[mqtt]\nca_file = "{broker.ca_file}"\n'))
        context = ssl.create_default_context(cafile=str(broker.ca_file))
        fixes = drive("bus-t", 3)
        daemon = make_daemon(cfg)
        async with Collector("127.0.0.1", broker.port, f"{prefix}/out/match/#",
                             tls_context=context) as col, running(daemon), \
                publisher(broker.port, context) as pub:
            for _, payload in fixes:
                await pub.publish(f"{prefix}/fleet/bus-t/position", payload, qos=1)
            await col.wait_for("/out/match/", 3)
        # without the CA the broker's certificate is refused: never ready
        cfg.write_text(cfg.read_text().replace(f'ca_file = "{broker.ca_file}"\n', ""))
        untrusting = make_daemon(cfg)
        task = asyncio.create_task(untrusting.run())
        # the store and the restore finish (a second or more on a busy machine); the
        # broker never does: it stays the one thing missing
        deadline = asyncio.get_running_loop().time() + 30.0
        while untrusting.readiness() != ["broker"]:
            assert asyncio.get_running_loop().time() < deadline, untrusting.readiness()
            await asyncio.sleep(0.1)
        await asyncio.sleep(1.0)  # several connection attempts later
        assert untrusting.readiness() == ["broker"]
        untrusting.request_stop()
        await asyncio.wait_for(task, timeout=30)
    finally:
        broker.stop()
    assert [a["time"] for a in col.records("/out/match/")] == [t for t, _ in fixes]


class ExplodingPipeline:
    """Fault injection: the real pipeline, but handling a payload with 'boom' raises.

    It wraps a :class:`Pipeline` rather than subclassing it: the compiled class (mypyc,
    setup.py ``NATIVE``) cannot be subclassed from Python.
    """

    def __init__(self, *args: Any, **kwargs: Any) -> None:
        self.inner = Pipeline(*args, **kwargs)

    def __getattr__(self, name: str) -> Any:
        return getattr(self.inner, name)

    def handle(self, topic: str, payload: bytes, at: float) -> list[Any]:
        if b"boom" in payload:
            raise RuntimeError("injected fault")
        return self.inner.handle(topic, payload, at)


async def test_daemon_survives_pipeline_error(mosquitto: Mosquitto, prefix: str,
                                              tmp_path: Path) -> None:
    """An unexpected error while handling one message is an internal_error reject;
    the messages around it are processed."""
    cfg = write_config(tmp_path, prefix, broker=mosquitto.url)
    config = load_config(cfg, env={})
    daemon = Daemon(config, ExplodingPipeline(town(), config.matcher, limits=config.feed))
    fixes = drive("bus-x", 4)
    topic = f"{prefix}/fleet/bus-x/position"
    async with Collector("127.0.0.1", mosquitto.port, f"{prefix}/out/#") as col, \
            running(daemon), publisher(mosquitto.port) as pub:
        for i, (_, payload) in enumerate(fixes):
            await pub.publish(topic, payload, qos=1)
            if i == 1:
                await pub.publish(topic, b'{"boom": true}', qos=1)
        await col.wait_for("/out/match/", 4)
        await col.wait_for("/out/rejects", 1)
    [reject] = col.records("/out/rejects")
    assert (reject["reason"], reject["topic"], reject["payload"]) == (
        "internal_error", topic, '{"boom": true}')
    assert reject["detail"] == "RuntimeError: injected fault"
    assert [a["time"] for a in col.records("/out/match/")] == [t for t, _ in fixes]


async def test_daemon_stale_on_the_clock_and_fresh_again(mosquitto: Mosquitto, prefix: str,
                                                         tmp_path: Path) -> None:
    """A vehicle silent for stale_s gets `stale` from the clock alone, `fresh` on its next fix."""
    # stale_s with room: the three fixes must reach the daemon within it of each other
    cfg = write_config(tmp_path, prefix, broker=mosquitto.url,
                       extra="[alerts]\nstale_s = 3.0\n")
    fixes = drive("van-s", 4)
    daemon = make_daemon(cfg)
    topic = f"{prefix}/fleet/van-s/position"
    async with Collector("127.0.0.1", mosquitto.port, f"{prefix}/out/alert/#") as col, \
            running(daemon), publisher(mosquitto.port) as pub:
        for _, payload in fixes[:3]:
            await pub.publish(topic, payload, qos=1)
        await col.wait_for("/out/alert/", 1)
        assert [a["kind"] for a in col.records("/out/alert/")] == ["stale"]
        await pub.publish(topic, fixes[3][1], qos=1)
        await col.wait_for("/out/alert/", 2)
    stale, fresh = col.records("/out/alert/")
    assert (fresh["kind"], stale["last_fix_time"], fresh["last_fix_time"]) == (
        "fresh", fixes[2][0], fixes[2][0])


async def test_daemon_no_stale_from_its_own_outage(own_mosquitto: Mosquitto, prefix: str,
                                                   tmp_path: Path) -> None:
    """The broker away for longer than stale_s: no vehicle is declared stale for it, even
    one whose fixes arrive a little after the reconnection."""
    broker = own_mosquitto
    # stale_s with room: van-b's fixes must arrive within it of the reconnection, and a
    # busy machine can stretch that past 1.5 s (waits, connections, the daemon's turns)
    cfg = write_config(tmp_path, prefix, broker=broker.url,
                       extra="[alerts]\nstale_s = 5.0\n")
    feeds = {v: drive(v, 6, start_x=100.0 + 1000 * k) for k, v in enumerate(("van-a", "van-b"))}
    daemon = make_daemon(cfg)

    async def send(vehicle: str, lo: int, hi: int) -> None:
        async with publisher(broker.port) as pub:
            for _, payload in feeds[vehicle][lo:hi]:
                await pub.publish(f"{prefix}/fleet/{vehicle}/position", payload, qos=1)

    async with Collector("127.0.0.1", broker.port, f"{prefix}/out/#") as col, \
            running(daemon):
        await send("van-a", 0, 3)
        await send("van-b", 0, 3)
        await col.wait_for("/out/match/", 6)
        broker.stop()
        await asyncio.sleep(6.0)  # longer than stale_s
        broker.start()
        await wait_until(lambda: daemon.readiness() == [], "the daemon ready again")
        await send("van-a", 3, 6)
        await col.wait_for("/out/match/van-a", 6)
        await asyncio.sleep(0.5)  # van-b reports a little later, within stale_s
        await send("van-b", 3, 6)
        await col.wait_for("/out/match/van-b", 6)
        await asyncio.sleep(0.3)
    assert col.records("/out/alert/") == []


async def test_daemon_vehicle_cap_rejects_new_vehicles_and_serves_the_others(
        mosquitto: Mosquitto, prefix: str, tmp_path: Path,
        caplog: pytest.LogCaptureFixture) -> None:
    """With feed.max_vehicles = 2 a third vehicle's fixes are rejected as
    too_many_vehicles (counted, logged once), while the two held are still answered."""
    cfg = write_config(tmp_path, prefix, broker=mosquitto.url,
                       extra="[feed]\nmax_vehicles = 2\n")
    feeds = {v: drive(v, 6, start_x=100.0 + 600 * i)
             for i, v in enumerate(["cap-a", "cap-b", "cap-c"])}
    daemon = make_daemon(cfg)
    caplog.set_level(logging.WARNING, logger="livematch.daemon")
    async with Collector("127.0.0.1", mosquitto.port, f"{prefix}/out/#") as col, \
            running(daemon):
        async with publisher(mosquitto.port) as pub:
            for i in range(6):
                for v in ("cap-a", "cap-b", "cap-c"):  # a and b come first: they are held
                    await pub.publish(f"{prefix}/fleet/{v}/position", feeds[v][i][1], qos=1)
        await col.wait_for("/out/match/cap-b", 6)
        await col.wait_for("/out/rejects", 6)
        _, text = await http_get(daemon.http.port, "/metrics")  # type: ignore[union-attr]
    for v in ("cap-a", "cap-b"):
        assert [r["time"] for r in col.records(f"/out/match/{v}")] == [t for t, _ in feeds[v]]
    assert col.records("/out/match/cap-c") == []
    rejects = col.records("/out/rejects")
    assert [r["reason"] for r in rejects] == ["too_many_vehicles"] * 6
    assert "'cap-c' is new and 2 vehicles are held already" in rejects[0]["detail"]
    values = metric_values(text)
    assert values[("livematch_messages_rejected_total",
                   (("reason", "too_many_vehicles"),))] == 6
    assert daemon.pipeline.vehicles() == ["cap-a", "cap-b"]
    cap_lines = [r for r in caplog.records if "vehicle cap reached" in r.getMessage()]
    assert len(cap_lines) == 1  # once per 10 s, not once per fix


async def test_daemon_standalone_topic_with_shard_reads_every_shard(
        mosquitto: Mosquitto, prefix: str, tmp_path: Path) -> None:
    """A standalone daemon on ``fleet/{shard}/+/position`` subscribes to every shard
    (``{shard}`` read as ``+``), matches fixes on their vehicle's shard topic and rejects
    one on another shard's topic as ``wrong_shard``."""
    cfg = write_config(tmp_path, prefix, broker=mosquitto.url, topic="fleet/{shard}/+/position",
                       extra="[group]\nshards = 16\n")
    feeds = {v: drive(v, 4, start_x=100.0 + 600 * i) for i, v in enumerate(["sa", "sb"])}
    daemon = make_daemon(cfg)
    async with Collector("127.0.0.1", mosquitto.port, f"{prefix}/out/#") as col, \
            running(daemon):
        async with publisher(mosquitto.port) as pub:
            for v, feed in feeds.items():
                for _, payload in feed:
                    await pub.publish(f"{prefix}/fleet/{shard_of(v, 16)}/{v}/position",
                                      payload, qos=1)
            wrong = (shard_of("sa", 16) + 1) % 16
            await pub.publish(f"{prefix}/fleet/{wrong}/sa/position",
                              drive("sa", 1, first=9)[0][1], qos=1)
        await col.wait_for("/out/match/sb", 4)
        await col.wait_for("/out/rejects", 1)
    for v, feed in feeds.items():
        assert [r["time"] for r in col.records(f"/out/match/{v}")] == [t for t, _ in feed]
    rejects = col.records("/out/rejects")
    assert [(r["reason"], r["topic"]) for r in rejects] == [
        ("wrong_shard", f"{prefix}/fleet/{wrong}/sa/position")]


def test_daemon_run_on_takes_waiting_messages_within_its_bounds(prefix: str,
                                                                  tmp_path: Path) -> None:
    """A turn matches further waiting messages: not past 8, 2 ms, or a full publish queue."""
    cfg = write_config(tmp_path, prefix, broker="mqtt://127.0.0.1:1",
                       extra="[publish]\nqueue_max = 2\n")
    daemon = make_daemon(cfg)
    intake = IntakeQueue(10, key_of=lambda topic, payload: topic)
    soon = time.monotonic() + 60.0
    assert not daemon._run_on(0, soon, intake)  # nothing waits
    intake.put_nowait(aiomqtt.Message("a", b"x", 1, False, 1, None))
    assert daemon._run_on(0, 0.0, intake)  # the first message's run starts its clock
    assert daemon._run_on(6, soon, intake)
    assert not daemon._run_on(7, soon, intake)  # 8 matched in this turn
    assert not daemon._run_on(1, time.monotonic() - 0.001, intake)  # its 2 ms are over
    for _ in range(2):
        daemon._outbox.append(_Pending("t", b"{}", "assignment", False, None))
    assert not daemon._run_on(0, soon, intake)  # publish queue full


async def test_daemon_disconnect_error_is_retrieved_when_nobody_waits(
        own_mosquitto: Mosquitto) -> None:
    """A connection lost with nobody reading aiomqtt's disconnection error: no asyncio warning.

    Reference: asyncio reports an exception never retrieved from a collected future
    through the event loop's exception handler (Python documentation, "Developing with
    asyncio", detect never-retrieved exceptions).
    """
    import gc

    from livematch.service.daemon import _observe_disconnect

    loop = asyncio.get_running_loop()
    reported: list[dict[str, Any]] = []
    loop.set_exception_handler(lambda _loop, context: reported.append(context))
    try:
        for observed in (False, True):
            client = aiomqtt.Client("127.0.0.1", own_mosquitto.port,
                                    identifier=f"t-{observed}")
            await client.__aenter__()
            if observed:
                _observe_disconnect(client)
            own_mosquitto.stop()  # the broker goes away while nobody waits on the future
            await wait_until(client._disconnected.done, "the client to see its broker gone")
            await client.__aexit__(None, None, None)  # returns early: already disconnected
            del client
            gc.collect()
            await asyncio.sleep(0)
            messages = [c.get("message", "") for c in reported]
            assert any("never retrieved" in m for m in messages) is not observed
            reported.clear()
            own_mosquitto.start()
    finally:
        loop.set_exception_handler(None)


async def test_daemon_two_lone_workers_on_one_broker_each_answer_their_feed(
        mosquitto: Mosquitto, prefix: str, tmp_path: Path) -> None:
    """Two lone daemons (memory store, no group) on one broker, with their own client ids
    and feed topics (w1 on ``fleetb/+/position``) and the same output topics, as
    bench/load.py's ``livematch-1p``: every vehicle of each is answered, fix for fix, with
    the records its Pipeline alone gives; neither receives or answers the other's.

    Session 27 saw this set-up leave probe vehicles unanswered; the cause was the bench
    running the two as a worker group (docs/measured.md, "Session 28 (lone28)")."""
    cfgs = []
    for w, topic in enumerate(("fleet/+/position", "fleetb/+/position")):
        folder = tmp_path / f"w{w}"
        folder.mkdir()
        cfg = write_config(folder, prefix, broker=mosquitto.url, topic=topic)
        text = cfg.read_text().replace(f'client_id = "livematch-{prefix}"',
                                       f'client_id = "livematch-{prefix}-w{w}"')
        cfg.write_text(text)
        cfgs.append(cfg)
    vehicles = [f"p{k}" for k in range(8)]
    feed_of = {v: "fleetb" if k % 2 else "fleet" for k, v in enumerate(vehicles)}
    feeds = {v: drive(v, 6, start_x=100.0 + 550 * k) for k, v in enumerate(vehicles)}
    messages = [(f"{prefix}/{feed_of[v]}/{v}/position", feeds[v][i][1])
                for i in range(6) for v in vehicles]
    expected = {w: direct([m for m in messages if m[0].split("/")[1] == part], cfgs[w])
                for w, part in enumerate(("fleet", "fleetb"))}
    w0, w1 = make_daemon(cfgs[0]), make_daemon(cfgs[1])
    async with Collector("127.0.0.1", mosquitto.port, f"{prefix}/out/#") as col, \
            running(w0), running(w1):
        async with publisher(mosquitto.port) as pub:
            for topic, payload in messages:
                await pub.publish(topic, payload, qos=1)
        await col.wait_for("/out/", len(expected[0]) + len(expected[1]))
        await asyncio.sleep(0.3)  # nothing more may come
        pages = [await http_get(d.http.port, "/metrics")  # type: ignore[union-attr]
                 for d in (w0, w1)]
    assert len(col.messages) == len(expected[0]) + len(expected[1])
    for w, part in enumerate(("fleet", "fleetb")):
        for v in (v for v in vehicles if feed_of[v] == part):
            want = [o.record for o in expected[w] if o.kind == "assignment" and o.vehicle == v]
            assert len(want) == 6
            assert col.records(f"/out/match/{v}") == want
        values = metric_values(pages[w][1])
        assert values[("livematch_messages_received_total", ())] == 24
        assert values[("livematch_fixes_processed_total", ())] == 24


class HeldSubscriptions(MQTTAuthorizer):
    """A broker hook that holds back one client's SUBSCRIBE (so its SUBACK) until released."""

    def __init__(self, client_id: str) -> None:
        self.client_id = client_id
        self.asked = asyncio.Event()
        self.release = asyncio.Event()

    async def authorize_publish(self, topic: str, client_id: str, username: str | None,
                                stream: Any) -> None:
        return None

    async def authorize_subscribe(self, pattern: Any, client_id: str, username: str | None,
                                  stream: Any) -> None:
        if client_id == self.client_id:
            self.asked.set()
            await self.release.wait()
        return None


async def test_daemon_not_ready_until_its_subscription_is_acknowledged(
        prefix: str, tmp_path: Path) -> None:
    """Connected, with the broker holding back its SUBACK: not ready (/readyz names the
    broker); ready once the SUBACK is in, and a fix published then is matched.

    A fleet that publishes as soon as the daemon is ready must not lose fixes to a
    subscription the broker has not taken yet (MQTT 5.0, 3.8.4: the SUBACK follows the
    subscription's processing). The broker is moat-lib-mqtt's (the demo's), whose
    authorizer hook can delay a SUBSCRIBE.
    """
    hold = HeldSubscriptions(f"livematch-{prefix}")
    broker = AsyncMQTTBroker(bind_address=("127.0.0.1", 0), authorizers=[hold])
    async with anyio.create_task_group() as tg:
        port = await tg.start(broker.serve)
        daemon = make_daemon(write_config(tmp_path, prefix, broker=f"mqtt://127.0.0.1:{port}"))
        task = asyncio.create_task(daemon.run())
        try:
            await wait_until(hold.asked.is_set, "the daemon's SUBSCRIBE")
            assert daemon.broker_connected  # connected, subscription not acknowledged
            assert daemon.readiness() == ["broker"]
            assert await http_get(daemon.http.port, "/readyz") == (  # type: ignore[union-attr]
                503, "not ready: broker\n")
            hold.release.set()
            await wait_until(lambda: daemon.readiness() == [], "ready after the SUBACK")
            async with aiomqtt.Client("127.0.0.1", port, identifier=f"pub-{prefix}",
                                      protocol=aiomqtt.ProtocolVersion.V5) as pub:
                await pub.publish(f"{prefix}/fleet/bus-s/position", drive("bus-s", 1)[0][1],
                                  qos=1)
            await wait_until(lambda: daemon.pipeline.counters["fixes"] == 1, "the fix matched")
        finally:
            hold.release.set()
            daemon.request_stop()
            await asyncio.wait_for(task, timeout=30)
            tg.cancel_scope.cancel()
