"""``group.standby = false``: a worker receives only the shards it holds."""

from __future__ import annotations

import asyncio
import re
import signal
import time
from pathlib import Path

import pytest
import redis.asyncio as aioredis
from services import (
    Collector,
    Mosquitto,
    RedisServer,
    drive,
    end_group_run,
)
from test_faults_suite import metric_sum
from test_service_shards_failover import checkpoint_times
from test_service_shards_topic import (
    SHARDS,
    publish_fixes,
    settle_shares,
    start_worker,
    topic_group,
    wait_answered,
)

from livematch.config import load_config
from livematch.errors import BadConfigError
from livematch.service.shards import assign_shards, shard_of

pytest_plugins = ("fixtures_services",)

WORKERS = ("w1", "w2")


def test_standby_setting_is_validated(tmp_path: Path) -> None:
    """``group.standby`` is true by default; a non-boolean, or false without a
    ``{shard}`` level in the topic (where it would do nothing), is refused with the
    key and the file named."""
    assert load_config(None, env={}).group.standby is True
    bad = tmp_path / "bad.toml"
    bad.write_text('[group]\nstandby = "no"\n')
    with pytest.raises(BadConfigError,
                       match=re.escape(f"{bad}: group.standby must be true or false")):
        load_config(bad, env={})
    plain = tmp_path / "plain.toml"
    plain.write_text('[mqtt]\ntopic = "fleet/+/position"\n[group]\nstandby = false\n')
    with pytest.raises(BadConfigError, match=re.escape(
            f"{plain}: group.standby = false needs a {{shard}} level in mqtt.topic")):
        load_config(plain, env={})
    good = tmp_path / "good.toml"
    good.write_text('[mqtt]\ntopic = "fleet/{shard}/+/position"\n[group]\nstandby = false\n')
    assert load_config(good, env={}).group.standby is False


async def test_without_standby_a_worker_receives_only_its_shards_and_takes_over(
        mosquitto: Mosquitto, redis_server: RedisServer, prefix: str, tmp_path: Path) -> None:
    """Two workers on ``{prefix}/fleet/{shard}/+/position`` with ``group.standby =
    false``: each receives exactly the fixes of the shards it holds (4 of 8 by the
    bounded-load assignment), not the other half. Once every checkpoint covers the
    fixes sent, one worker is SIGKILLed: the other takes its shards from the
    checkpoints alone and answers every later fix; since no fix was published in the
    gap, every vehicle's certificate window grows 1, 2, 3, ... without a break."""
    cfg, ports, logs = topic_group(tmp_path, prefix, mosquitto, redis_server, WORKERS,
                                   "standby = false\n")
    vehicles = [f"sv-{i}" for i in range(10)]
    assignment = assign_shards(SHARDS, WORKERS)
    held = {w: assignment.held_by(w) for w in WORKERS}
    assert all(len(held[w]) == 4 for w in WORKERS)
    assert {w for v in vehicles for w in WORKERS if shard_of(v, SHARDS) in held[w]} \
        == set(WORKERS)  # both workers have vehicles, so "only its half" can fail
    n_fixes = 24
    feeds = {v: drive(v, n_fixes, start_x=100.0 + 400 * i) for i, v in enumerate(vehicles)}
    topic = {v: f"{prefix}/fleet/{shard_of(v, SHARDS)}/{v}/position" for v in vehicles}
    client = aioredis.Redis.from_url(redis_server.url)

    async def settle(workers: tuple[str, ...]) -> None:
        assignment = assign_shards(SHARDS, workers)
        await settle_shares(ports, procs, logs, {w: len(assignment.held_by(w)) for w in workers})

    async def received(w: str) -> float:
        return await metric_sum(ports[w], "livematch_messages_received_total")

    async def no_watcher() -> None:
        """end_group_run's watcher: the checkpoints are read in line here."""

    half = n_fixes // 2
    procs = {w: start_worker(cfg, w, ports[w], logs[w]) for w in WORKERS}
    watcher = asyncio.create_task(no_watcher())
    try:
        async with Collector("127.0.0.1", mosquitto.port, f"{prefix}/out/#") as col:
            await settle(WORKERS)
            before = {w: await received(w) for w in WORKERS}
            await publish_fixes(mosquitto.port, topic, feeds, 0, half)
            await wait_answered(col, feeds, half)
            for w in WORKERS:  # only the shards it holds reach a worker
                expect = sum(half for v in vehicles if shard_of(v, SHARDS) in held[w])
                assert await received(w) - before[w] == expect, (w, expect)
            last = {v: max(t for t, _ in feeds[v][:half]) for v in vehicles}
            deadline = time.monotonic() + 20
            while await checkpoint_times(client, prefix) != last:
                assert time.monotonic() < deadline, "checkpoints lag"
                await asyncio.sleep(0.1)
            victim, survivor = WORKERS
            procs[victim].send_signal(signal.SIGKILL)
            await asyncio.to_thread(procs[victim].wait, 10)
            await settle((survivor,))  # it holds all 8 shards (and receives them)
            before_after = await received(survivor)
            await publish_fixes(mosquitto.port, topic, feeds, half, n_fixes)
            await wait_answered(col, feeds, n_fixes)
            assert await received(survivor) - before_after == len(vehicles) * half
            procs[survivor].send_signal(signal.SIGTERM)
            assert await asyncio.to_thread(procs[survivor].wait, 30) == 0, \
                logs[survivor].read_text()
    finally:
        await end_group_run(watcher, procs, client)
    for v in vehicles:
        windows = col.windows(f"/out/match/{v}")
        assert windows == [{k} for k in range(1, n_fixes + 1)], v
