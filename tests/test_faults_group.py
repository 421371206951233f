"""Faults in a worker group: Redis restarted under a running worker."""

from __future__ import annotations

import asyncio
import subprocess
from collections.abc import Iterator
from pathlib import Path

import pytest
from services import (
    REDIS_SERVER,
    Collector,
    Mosquitto,
    RedisServer,
    drive,
    publisher,
    town,
    wait_listening,
    wait_until,
    write_config,
)

from livematch.config import load_config
from livematch.pipeline import Pipeline
from livematch.service.daemon import Daemon

pytest_plugins = ("fixtures_services",)

pytestmark = pytest.mark.faults


class PersistentRedis(RedisServer):
    """A redis-server that keeps its data across a restart (append-only file)."""

    def start(self) -> None:
        self.folder.mkdir(parents=True, exist_ok=True)
        self.proc = subprocess.Popen(
            [REDIS_SERVER, "--port", str(self.port), "--bind", "127.0.0.1", "--save", "",
             "--appendonly", "yes", "--appendfsync", "always", "--dir", str(self.folder),
             "--protected-mode", "no"],
            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        wait_listening(self.port, self.proc)


@pytest.fixture
def aof_redis(tmp_path: Path) -> Iterator[PersistentRedis]:
    server = PersistentRedis(tmp_path / "redis-aof")
    server.start()
    yield server
    server.stop()


async def test_group_redis_restart_answers_every_fix_and_state_continues(
        mosquitto: Mosquitto, aof_redis: PersistentRedis, prefix: str,
        tmp_path: Path) -> None:
    """Redis stops for longer than the lease: the worker reports not-ready, stops
    matching (it cannot know who holds the shards), keeps the fixes; when Redis is back
    it takes its shards again, restores and replays: every fix is answered and each
    vehicle's certificate window goes on from where it was."""
    cfg_path = write_config(tmp_path, prefix, broker=mosquitto.url, store=aof_redis.url,
                            metrics="", extra="[group]\nname = \"g\"\nshards = 4\n"
                                              "lease_s = 1.0\n")
    config = load_config(cfg_path, env={"LIVEMATCH__GROUP__WORKER": "w"})
    daemon = Daemon(config, Pipeline(town(), config.matcher, limits=config.feed,
                                     alerts=config.alerts,
                                     control_topic=config.mqtt.control_topic))
    vehicles = ["r1", "r2", "r3"]
    feeds = {v: drive(v, 20, start_x=200.0 + 500 * i) for i, v in enumerate(vehicles)}

    async def publish(lo: int, hi: int) -> None:
        async with publisher(mosquitto.port) as pub:
            for i in range(lo, hi):
                for v in vehicles:
                    await pub.publish(f"{prefix}/fleet/{v}/position", feeds[v][i][1], qos=1)

    def answered(v: str) -> set[float]:
        return {r["time"] for r in col.records(f"/out/match/{v}")}

    async with Collector("127.0.0.1", mosquitto.port, f"{prefix}/out/#") as col:
        task = asyncio.create_task(daemon.run())
        try:
            await wait_until(lambda: daemon.readiness() == [] and len(daemon._active) == 4,
                             what="worker ready with all shards")
            await publish(0, 10)
            await wait_until(lambda: all(len(answered(v)) == 10 for v in vehicles),
                             what="first fixes answered")
            await wait_until(lambda: daemon.metrics.checkpoints._value.get() >= 3
                             and not daemon._fixes_since, what="checkpoints written")
            aof_redis.stop()
            await wait_until(lambda: not daemon._active, what="shards given up")
            # the store's ping loop and the lease deadlines run apart: either may be first
            await wait_until(lambda: "store" in daemon.readiness(), what="store not ready")
            assert daemon.pipeline.vehicles() == []  # dropped, not matched blindly
            await publish(10, 20)
            await asyncio.sleep(0.5)
            assert all(len(answered(v)) == 10 for v in vehicles)  # nobody may answer now
            aof_redis.start()
            await wait_until(lambda: len(daemon._active) == 4, what="shards taken again")
            await wait_until(lambda: all(len(answered(v)) == 20 for v in vehicles),
                             what="outage fixes answered")
            await wait_until(lambda: daemon.readiness() == [], what="ready again")
        finally:
            daemon.request_stop()
            await asyncio.wait_for(task, 30)
    for v in vehicles:
        windows = col.windows(f"/out/match/{v}")
        assert windows == [{k} for k in range(1, 21)]
    lost = daemon.metrics.shards_lost.labels(why="expired")._value.get()
    assert lost == 4
    assert daemon.metrics.takeovers._value.get() == 8
    assert daemon.metrics.replayed._value.get() >= 30  # the outage's fixes at least


async def test_group_broker_restart_keeps_shards_and_state(
        own_mosquitto: Mosquitto, redis_server: RedisServer, prefix: str,
        tmp_path: Path) -> None:
    """The broker restarts under a worker: it keeps its shards (leases live in Redis),
    reports not-ready meanwhile, and afterwards every fix is answered with the window
    going on; its checkpoints catch up with the last fix."""
    cfg_path = write_config(tmp_path, prefix, broker=own_mosquitto.url,
                            store=redis_server.url, metrics="",
                            extra="[group]\nname = \"g\"\nshards = 4\nlease_s = 1.0\n")
    config = load_config(cfg_path, env={"LIVEMATCH__GROUP__WORKER": "w"})
    daemon = Daemon(config, Pipeline(town(), config.matcher, limits=config.feed,
                                     alerts=config.alerts,
                                     control_topic=config.mqtt.control_topic))
    vehicles = ["b1", "b2"]
    feeds = {v: drive(v, 20, start_x=200.0 + 500 * i) for i, v in enumerate(vehicles)}

    async def publish(lo: int, hi: int) -> None:
        async with publisher(own_mosquitto.port) as pub:
            for i in range(lo, hi):
                for v in vehicles:
                    await pub.publish(f"{prefix}/fleet/{v}/position", feeds[v][i][1], qos=1)

    def answered(v: str) -> set[float]:
        return {r["time"] for r in col.records(f"/out/match/{v}")}

    async with Collector("127.0.0.1", own_mosquitto.port, f"{prefix}/out/#") as col:
        task = asyncio.create_task(daemon.run())
        try:
            await wait_until(lambda: daemon.readiness() == [] and len(daemon._active) == 4,
                             what="worker ready with all shards")
            await publish(0, 10)
            await wait_until(lambda: all(len(answered(v)) == 10 for v in vehicles),
                             what="first fixes answered")
            own_mosquitto.stop()
            await wait_until(lambda: "broker" in daemon.readiness(), what="not ready")
            await asyncio.sleep(1.5)  # longer than the lease: leases must not depend on MQTT
            assert len(daemon._active) == 4
            assert sorted(daemon.pipeline.vehicles()) == vehicles
            own_mosquitto.start()
            await wait_until(lambda: daemon.readiness() == [], what="ready again")
            await publish(10, 20)
            await wait_until(lambda: all(len(answered(v)) == 20 for v in vehicles),
                             what="all fixes answered")
            await wait_until(lambda: not daemon._fixes_since, what="checkpoints caught up")
        finally:
            daemon.request_stop()
            await asyncio.wait_for(task, 30)
    for v in vehicles:
        windows = col.windows(f"/out/match/{v}")
        assert windows == [{k} for k in range(1, 21)]
    assert daemon.metrics.shards_lost.labels(why="expired")._value.get() == 0
    assert daemon.metrics.takeovers._value.get() == 4
