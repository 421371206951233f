"""The shard in the topic (``fleet/{shard}/+/position``): workers receive only their part."""

from __future__ import annotations

import asyncio
import signal
import subprocess
import sys
import time
from pathlib import Path

import aiomqtt
import pytest
import redis.asyncio as aioredis
from services import (
    Collector,
    Mosquitto,
    RedisServer,
    drive,
    end_group_run,
    free_port,
    publisher,
    subprocess_env,
    town,
    write_config,
)
from test_faults_suite import metric_sum
from test_service_shards import group_daemon, wait_until
from test_service_shards_failover import watch_checkpoints

from livematch.mapdata.netfile import save_network
from livematch.service.shards import assign_shards, shard_of

pytest_plugins = ("fixtures_services",)

SHARDS = 8
WORKERS = ("w1", "w2", "w3")


def start_worker(config: Path, worker: str, port: int, log: Path) -> subprocess.Popen[bytes]:
    with log.open("ab") as out:
        return subprocess.Popen(
            [sys.executable, "-m", "livematch.cli", "run", "--config", str(config),
             "--group", "g", "--shards", str(SHARDS), "--worker", worker,
             "--metrics", f"127.0.0.1:{port}"],
            stdout=out, stderr=out, env=subprocess_env())


def ranked(workers: tuple[str, ...]) -> dict[str, tuple[set[int], set[int]]]:
    """Each worker's (shards held, shards stood by for) by the bounded-load assignment."""
    assignment = assign_shards(SHARDS, workers)
    return {w: (assignment.held_by(w), assignment.standing_by(w)) for w in workers}

def topic_group(tmp_path: Path, prefix: str, mosquitto: Mosquitto, redis_server: RedisServer,
                workers: tuple[str, ...], group_extra: str = ""
                ) -> tuple[Path, dict[str, int], dict[str, Path]]:
    """A worker group's files on ``{prefix}/fleet/{shard}/+/position``: its config (the
    town network, Redis store, ``lease_s = 2``), a free health port and a log per worker."""
    net = tmp_path / "town.lmnet"
    save_network(town(), net)
    cfg = write_config(tmp_path, prefix, broker=mosquitto.url, store=redis_server.url,
                       network=str(net), extra="[group]\nlease_s = 2.0\n" + group_extra,
                       topic="fleet/{shard}/+/position")
    return cfg, {w: free_port() for w in workers}, {w: tmp_path / f"{w}.log" for w in workers}


async def settle_shares(ports: dict[str, int], procs: dict[str, subprocess.Popen[bytes]],
                        logs: dict[str, Path], want: dict[str, int]) -> None:
    """Wait until each worker's ``livematch_shards_held`` is its share in ``want``."""
    workers = tuple(want)

    async def held() -> list[float]:
        return [await metric_sum(ports[w], "livematch_shards_held") for w in workers]

    deadline = time.monotonic() + 60
    while await held() != [float(want[w]) for w in workers]:
        assert time.monotonic() < deadline, f"held {await held()}, want {want}"
        for w in workers:
            assert procs[w].poll() is None, logs[w].read_text()
        await asyncio.sleep(0.2)
    await asyncio.sleep(1.5)  # the round's last step: unsubscribe what is not wanted


async def publish_fixes(port: int, topic: dict[str, str],
                        feeds: dict[str, list[tuple[float, bytes]]], lo: int, hi: int) -> None:
    """Publish fixes ``lo..hi-1`` of every vehicle's feed on its topic, QoS 1."""
    async with publisher(port) as pub:
        for i in range(lo, hi):
            for v, feed in feeds.items():
                await pub.publish(topic[v], feed[i][1], qos=1)
            await asyncio.sleep(0.05)


async def wait_answered(col: Collector, feeds: dict[str, list[tuple[float, bytes]]],
                        hi: int) -> None:
    """Wait until every vehicle's first ``hi`` fixes have an assignment on the output."""
    want = {v: {t for t, _ in feed[:hi]} for v, feed in feeds.items()}
    deadline = time.monotonic() + 60
    while {v: {r["time"] for r in col.records(f"/out/match/{v}")} for v in feeds} != want:
        assert time.monotonic() < deadline, "fixes not answered"
        await asyncio.sleep(0.1)



@pytest.mark.parametrize("link", [True, False], ids=["standby-connection", "one-connection"])
async def test_topic_with_shard_partitions_feed_and_survives_sigkill(
        mosquitto: Mosquitto, redis_server: RedisServer, prefix: str, tmp_path: Path,
        link: bool) -> None:
    """Three workers on ``{prefix}/fleet/{shard}/+/position``: each holds its share of
    the bounded-load assignment (3 / 3 / 2 of 8) and receives only those shards and the
    ones it stands by for (exact message counts); a fix on another shard's topic is a
    ``wrong_shard`` reject; after a SIGKILL the standbys take the dead worker's shards
    (and a shard whose holder lives moves once its new holder receives it): every fix
    is answered, no
    checkpoint goes back, every vehicle's certificate window grows 1, 2, 3, ... Both
    ways of receiving the standby shards: on a second connection (the default) and on
    the worker's one connection. The standby connection is read when the worker is
    awake anyway (at the latest every quarter second), so its counts are awaited."""
    cfg, ports, logs = topic_group(tmp_path, prefix, mosquitto, redis_server, WORKERS,
                                   f"standby_connection = {'true' if link else 'false'}\n")
    # sv-14 is on shard 6, which moves from w1 to w3 (both alive) when w2 is killed
    vehicles = [f"sv-{i}" for i in (0, 1, 2, 3, 4, 14, 6, 7, 13)]
    n_fixes = 30
    feeds = {v: drive(v, n_fixes, start_x=100.0 + 400 * i) for i, v in enumerate(vehicles)}
    topic = {v: f"{prefix}/fleet/{shard_of(v, SHARDS)}/{v}/position" for v in vehicles}
    client = aioredis.Redis.from_url(redis_server.url)
    backwards: list[str] = []
    seen: dict[str, float] = {}

    async def settle(workers: tuple[str, ...]) -> None:
        await settle_shares(ports, procs, logs, {w: len(ranked(workers)[w][0]) for w in workers})

    procs = {w: start_worker(cfg, w, ports[w], logs[w]) for w in WORKERS}
    watcher = asyncio.create_task(watch_checkpoints(client, prefix, seen, backwards))
    try:
        async with Collector("127.0.0.1", mosquitto.port, f"{prefix}/out/#") as col:
            await settle(WORKERS)
            before = {w: await metric_sum(ports[w], "livematch_messages_received_total")
                      for w in WORKERS}
            await publish_fixes(mosquitto.port, topic, feeds, 0, 15)
            await wait_answered(col, feeds, 15)
            roles = ranked(WORKERS)
            for w in WORKERS:  # only the shards it holds or stands by for reach a worker
                mine, standby = roles[w]
                expect = sum(15 for v in vehicles if shard_of(v, SHARDS) in mine | standby)
                deadline = time.monotonic() + 10
                got = await metric_sum(ports[w], "livematch_messages_received_total")
                while got - before[w] != expect and time.monotonic() < deadline:
                    await asyncio.sleep(0.1)
                    got = await metric_sum(ports[w], "livematch_messages_received_total")
                assert got - before[w] == expect, (w, got - before[w], expect)
            wrong = (shard_of("sv-0", SHARDS) + 1) % SHARDS
            async with publisher(mosquitto.port) as pub:
                await pub.publish(f"{prefix}/fleet/{wrong}/sv-0/position",
                                  drive("sv-0", 1, first=200)[0][1], qos=1)
            await col.wait_for("/out/rejects", 1)
            victim = assign_shards(SHARDS, WORKERS).holder[shard_of("sv-0", SHARDS)]
            procs[victim].send_signal(signal.SIGKILL)
            await asyncio.to_thread(procs[victim].wait, 10)
            survivors = tuple(w for w in WORKERS if w != victim)
            moved = (assign_shards(SHARDS, WORKERS).holder[6],
                     assign_shards(SHARDS, survivors).holder[6])
            assert moved == ("w1", "w3")  # a hand-over between live workers (sv-14)
            await publish_fixes(mosquitto.port, topic, feeds, 15, n_fixes)
            await wait_answered(col, feeds, n_fixes)
            await settle(survivors)
            deadline = time.monotonic() + 20
            while seen != {v: max(t for t, _ in feeds[v]) for v in vehicles}:
                assert time.monotonic() < deadline, f"checkpoints lag: {seen}"
                await asyncio.sleep(0.1)
            for w in survivors:
                procs[w].send_signal(signal.SIGTERM)
                assert await asyncio.to_thread(procs[w].wait, 30) == 0, logs[w].read_text()
    finally:
        await end_group_run(watcher, procs, client)
    rejects = col.records("/out/rejects")
    assert [r["reason"] for r in rejects] == ["wrong_shard"]
    assert rejects[0]["detail"] == (f"topic shard level '{wrong}' is not shard "
                                    f"{shard_of('sv-0', SHARDS)} of vehicle 'sv-0' "
                                    f"(group.shards = {SHARDS})")
    assert backwards == []
    for v in vehicles:
        windows = col.windows(f"/out/match/{v}")
        assert windows == [{k} for k in range(1, n_fixes + 1)], v


async def test_shard_moves_only_once_its_new_holder_receives_it(
        tmp_path: Path, mosquitto: Mosquitto, redis_server: RedisServer, prefix: str,
        monkeypatch: pytest.MonkeyPatch) -> None:
    """A worker holding every shard sees a second member whose share is 4 of the 8: it
    keeps matching those shards until the newcomer's record in Redis says it receives
    their topics, then hands them over (released) and stands by for them: the broker
    delivers their fixes at QoS 0 (the minimum of the publish QoS 1 and the
    subscription's QoS 0, MQTT 5.0 section 3.8.4) and those of its own shards at QoS 1.
    Its own record names every shard it receives."""
    config = write_config(tmp_path, prefix, broker=mosquitto.url, store=redis_server.url,
                          metrics="", topic="fleet/{shard}/+/position",
                          extra='[group]\nname = "g"\nshards = 8\nlease_s = 1.0\n'
                                'standby_connection = false\n')  # the one-connection path
    a = group_daemon(config, "a")
    arrived: list[tuple[str, int]] = []
    arrive = a._arrive

    def spy(client: aiomqtt.Client, intake: object, message: aiomqtt.Message) -> None:
        arrived.append((message.topic.value, message.qos))
        arrive(client, intake, message)  # type: ignore[arg-type]

    monkeypatch.setattr(a, "_arrive", spy)
    split = assign_shards(8, ["a", "b"])
    theirs, ours = split.held_by("b"), split.held_by("a")
    assert len(theirs) == len(ours) == 4
    client = aioredis.Redis.from_url(redis_server.url)
    task = asyncio.create_task(a.run())
    try:
        await wait_until(lambda: len(a._active) == 8, what="a holds all shards")
        # "b" joins (a member entry that does not expire) but receives nothing yet
        await client.zadd(f"{prefix}:group:g:members", {"b": 2 ** 50})
        await asyncio.sleep(2.0)  # six rebalancing rounds (lease_s / 3)
        assert len(a._active) == 8, "handed over before the new holder received the shard"
        await client.hset(f"{prefix}:group:g:receives", "b",
                          ",".join(str(s) for s in sorted(theirs)))
        assert a.leases is not None
        leases = a.leases
        await wait_until(lambda: set(leases.held) == ours, what="b's shards handed over")
        assert a._active == ours
        for shard in theirs:
            assert await client.get(f"{prefix}:{{s:{shard}}}:lease") is None  # released
        await wait_until(lambda: a._subs == {s: 0 if s in theirs else 1 for s in range(8)},
                         what="standby subscriptions at QoS 0")
        assert await leases.receiving(["a"]) == {"a": set(range(8))}
        vehicle = {s: next(f"q{i}" for i in range(1000) if shard_of(f"q{i}", 8) == s)
                   for s in (min(theirs), min(ours))}
        arrived.clear()
        async with publisher(mosquitto.port) as pub:
            for shard, v in vehicle.items():
                await pub.publish(f"{prefix}/fleet/{shard}/{v}/position",
                                  drive(v, 1)[0][1], qos=1)
        await wait_until(lambda: len(arrived) == 2, what="both fixes received")
        assert sorted(arrived) == sorted(
            [(f"{prefix}/fleet/{min(theirs)}/{vehicle[min(theirs)]}/position", 0),
             (f"{prefix}/fleet/{min(ours)}/{vehicle[min(ours)]}/position", 1)])
    finally:
        a.request_stop()
        await asyncio.wait_for(task, 20)
        await client.aclose()


async def test_standby_fixes_kept_from_the_read_buffer_and_replayed_on_takeover(
        tmp_path: Path, mosquitto: Mosquitto, redis_server: RedisServer, prefix: str,
        monkeypatch: pytest.MonkeyPatch) -> None:
    """A worker standing by for a shard (QoS 0 subscription) keeps that shard's fixes
    straight from the read buffer (``Daemon._take_raw``) once their topic is known: the
    first fix of a topic takes paho's way to ``_arrive``, the rest do not, and the kept
    entries are the messages as published (topic, payload, order), each kept once. When
    the shard's holder leaves the group without a checkpoint, the worker takes the shard
    and replays them: every fix answered, the certificate window growing 1, 2, 3, ..."""
    config = write_config(tmp_path, prefix, broker=mosquitto.url, store=redis_server.url,
                          metrics="", topic="fleet/{shard}/+/position",
                          extra='[group]\nname = "g"\nshards = 8\nlease_s = 1.0\n'
                                'standby_connection = false\n')  # the one-connection path
    a = group_daemon(config, "a")
    arrived: list[str] = []
    taken: list[bytes] = []
    arrive, take_raw = a._arrive, a._take_raw

    def spy_arrive(client: aiomqtt.Client, intake: object, message: aiomqtt.Message) -> None:
        arrived.append(message.topic.value)
        arrive(client, intake, message)  # type: ignore[arg-type]

    def spy_take(client: aiomqtt.Client, intake: object, command: int, body: bytes) -> bool:
        took = take_raw(client, intake, command, body)  # type: ignore[arg-type]
        if took:
            taken.append(body)
        return took

    monkeypatch.setattr(a, "_arrive", spy_arrive)
    monkeypatch.setattr(a, "_take_raw", spy_take)
    theirs = assign_shards(8, ["a", "b"]).held_by("b")
    shard = min(theirs)
    vehicle = next(f"k{i}" for i in range(1000) if shard_of(f"k{i}", 8) == shard)
    topic = f"{prefix}/fleet/{shard}/{vehicle}/position"
    feed = drive(vehicle, 8)
    client = aioredis.Redis.from_url(redis_server.url)
    task = asyncio.create_task(a.run())
    try:
        async with Collector("127.0.0.1", mosquitto.port, f"{prefix}/out/#") as col:
            await wait_until(lambda: len(a._active) == 8, what="a holds all shards")
            await client.zadd(f"{prefix}:group:g:members", {"b": 2 ** 50})
            await client.hset(f"{prefix}:group:g:receives", "b",
                              ",".join(str(s) for s in sorted(theirs)))
            await wait_until(lambda: a._subs.get(shard) == 0, what="standing by at QoS 0")
            assert shard not in a._active
            arrived.clear()
            async with publisher(mosquitto.port) as pub:
                for _, payload in feed:
                    await pub.publish(topic, payload, qos=1)
            await wait_until(lambda: len(a._buffers.get(shard, ())) == len(feed),
                             what="every fix kept")
            assert [(e[2], e[3]) for e in a._buffers[shard]] == [(topic, p) for _, p in feed]
            assert arrived == [topic]  # the first one: its topic's shard is learnt there
            assert len(taken) == len(feed) - 1
            assert col.records(f"/out/match/{vehicle}") == []  # kept, not matched
            # "b" leaves without a checkpoint: "a" takes its shards and replays
            await client.zrem(f"{prefix}:group:g:members", "b")
            await client.hdel(f"{prefix}:group:g:receives", "b")
            await wait_until(lambda: len(a._active) == 8, what="a takes b's shards")
            await col.wait_for(f"/out/match/{vehicle}", len(feed))
    finally:
        a.request_stop()
        await asyncio.wait_for(task, 20)
        await client.aclose()
    windows = {r["time"]: r["window_fixes"] for r in col.records(f"/out/match/{vehicle}")}
    assert [windows[t] for t, _ in feed] == list(range(1, len(feed) + 1))
