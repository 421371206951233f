"""``group.standby_connection``: the standby shards on a second MQTT connection of their own.

A worker receives the shards it stands by for on that connection (QoS 0, read when it is
awake anyway) and those it holds on the main one. When a shard changes connection (its
holder died, or it was handed over), both receive its fixes for a moment, in no order
with respect to each other; ``merge_moved`` puts the kept fixes back in publish order
per topic, so a takeover replays them as one connection would have delivered them.
"""

from __future__ import annotations

import asyncio
import random
import re
import signal
import time
from collections import deque
from dataclasses import replace
from pathlib import Path
from typing import Any

import aiomqtt
import pytest
import redis.asyncio as aioredis
from services import Collector, Mosquitto, RedisServer, drive, publisher, write_config
from test_service_shards import group_daemon, wait_until
from test_service_shards_failover import watch_checkpoints
from test_service_shards_topic import (
    settle_shares,
    start_worker,
    topic_group,
)

import livematch.service.daemon as daemon_module
from livematch.config import BadConfigError, load_config
from livematch.service.daemon import Kept, merge_moved
from livematch.service.shards import assign_shards, shard_of

pytest_plugins = ("fixtures_services",)


def _two_streams(rng: random.Random, to_main: bool) -> tuple[deque[Kept], int, set[int],
                                                             dict[str, list[bytes]]]:
    """One move simulated by the MQTT 5.0 ordering rule, and what merging must give.

    90 messages on three topics at random (distinct payloads, as fixes with distinct
    times are). The old connection's subscription covers the messages published before
    ``u``, the new one's those from ``s`` on, ``s <= u`` (the new one is subscribed
    before the old one is left). Each connection delivers every topic's messages in
    publish order (MQTT 5.0 section 4.6, Ordered Topic), the two interleaved at random;
    the standby connection (QoS 0) drops some. Returns the buffer as the daemon keeps
    it (entries before the move first), the move's start, the standby's sequence
    numbers and, per topic, the published messages that one connection alone would have
    delivered: moving to the main connection, the standby's before ``s`` and every one
    from ``s``; moving to the standby connection, every one before ``u`` and the
    standby's from ``u``.
    """
    published = []
    for k in range(90):
        t = rng.choice("abc")
        published.append((t, f"{t}:{k}".encode()))
    n = len(published)
    before = rng.randrange(5, 30)  # published before the move began
    s = rng.randrange(before, n - 10)
    u = rng.randrange(s, n - 5)
    dropped = {i for i in range(n) if rng.random() < 0.15}  # QoS 0 losses
    main_idx = range(s, n) if to_main else range(0, u)
    side_idx = range(0, u) if to_main else range(s, n)
    side_got = [i for i in side_idx if i not in dropped]
    kept: list[tuple[bool, int]] = []
    old = side_got if to_main else list(main_idx)
    new = list(main_idx) if to_main else side_got
    old_before = [i for i in old if i < before]
    kept += [(to_main, i) for i in old_before]
    rest_old = [(to_main, i) for i in old if i >= before]
    rest_new = [(not to_main, i) for i in new]
    while rest_old or rest_new:  # each connection in its own order, interleaved at random
        pick = rest_old if rest_new == [] or (rest_old and rng.random() < 0.5) else rest_new
        kept.append(pick.pop(0))
    buf: deque[Kept] = deque()
    via: set[int] = set()
    for seq, (is_side, i) in enumerate(kept, 1):
        t, p = published[i]
        buf.append((seq, float(seq), t, p))
        if is_side:
            via.add(seq)
    start = len(old_before)
    want: dict[str, list[bytes]] = {}
    if to_main:
        expect = [i for i in side_got if i < s] + list(range(s, n))
    else:
        expect = list(range(0, u)) + [i for i in side_got if i >= u]
    for i in expect:
        t, p = published[i]
        want.setdefault(t, []).append(p)
    return buf, start, via, want


@pytest.mark.parametrize("to_main", [True, False])
def test_merge_moved_gives_each_topic_in_publish_order(to_main: bool) -> None:
    """200 simulated moves each way (MQTT 5.0 section 4.6 ordering, random
    interleaving of the two connections, random QoS 0 losses): per topic the merged
    buffer is exactly what one connection would have delivered, in publish order, each
    message once; the sequence numbers stay increasing and entries before the move's
    start are untouched."""
    rng = random.Random(18)
    for _ in range(200):
        buf, start, via, want = _two_streams(rng, to_main)
        merged = merge_moved(deque(buf), start, via, to_main)
        got: dict[str, list[bytes]] = {}
        for _seq, _at, t, p in merged:
            got.setdefault(t, []).append(p)
        assert got == want
        seqs = [e[0] for e in merged]
        assert seqs == sorted(set(seqs))
        assert [e for e in merged if e[0] <= start] == [e for e in buf if e[0] <= start]


def test_standby_connection_setting_needs_shard_topic_and_qos0(tmp_path: Path) -> None:
    """An explicit ``group.standby_connection = true`` is refused where it could not
    apply (no ``{shard}`` level, no standbys, standbys at QoS 1); the default (true) is
    accepted everywhere and applies only where it can (``GroupConfig.standby_link``)."""
    def config(extra: str, topic: str = "fleet/{shard}/+/position") -> Path:
        return write_config(tmp_path, "p", broker="mqtt://127.0.0.1:1", topic=topic,
                            extra="[group]\n" + extra)
    sharded, flat = "fleet/{shard}/+/position", "fleet/+/position"
    assert load_config(config(""), env={}).group.standby_connection is True
    assert load_config(config("standby_connection = false\n"), env={}
                       ).group.standby_connection is False
    # the default where it cannot apply: accepted, and inert
    for extra, topic in (("", flat), ("standby = false\n", sharded),
                         ("standby_qos = 1\n", sharded)):
        group = replace(load_config(config(extra, topic), env={}).group, name="g")
        assert group.standby_connection is True
        assert group.standby_link(topic) is False
    assert replace(load_config(config(""), env={}).group, name="g").standby_link(sharded)
    assert not replace(load_config(config("standby_connection = false\n"), env={}).group,
                       name="g").standby_link(sharded)
    for extra, topic in (("standby_connection = true\n", "fleet/+/position"),
                         ("standby_connection = true\nstandby = false\n",
                          "fleet/{shard}/+/position"),
                         ("standby_connection = true\nstandby_qos = 1\n",
                          "fleet/{shard}/+/position")):
        with pytest.raises(BadConfigError,
                           match=re.escape("group.standby_connection = true needs")):
            load_config(config(extra, topic), env={})


async def test_standby_link_keeps_fixes_and_takeover_while_fixes_arrive(
        tmp_path: Path, mosquitto: Mosquitto, redis_server: RedisServer, prefix: str,
        monkeypatch: pytest.MonkeyPatch) -> None:
    """A worker holding every shard sees a second member take half: once that member
    receives them, it hands them over and receives them on its standby connection
    (QoS 0), its own shards on the main one only. The fixes of a standby shard are kept
    exactly as published, in order, and not matched. Then, while fixes keep arriving
    every 20 ms, the member leaves without a checkpoint: the worker moves the shard back
    to its main connection (both connections receive its fixes for 0.4 s, the standby
    one read late), merges the two, takes the shard and replays: every fix published
    is answered once, the certificate window growing 1, 2, 3, ... (a fix replayed out
    of publish order would be refused as out of order and go unanswered)."""
    config = write_config(tmp_path, prefix, broker=mosquitto.url, store=redis_server.url,
                          metrics="", topic="fleet/{shard}/+/position",
                          extra='[group]\nname = "g"\nshards = 8\nlease_s = 1.0\n'
                                'standby_connection = true\n')
    a = group_daemon(config, "a")
    merges: list[tuple[int, bool, int]] = []
    real_merge = merge_moved

    def spy_merge(kept: deque[Kept], start: int, via: set[int], to_main: bool) -> deque[Kept]:
        merged = real_merge(kept, start, via, to_main)
        merges.append((len(via), to_main, len(kept) - len(merged)))
        return merged

    monkeypatch.setattr("livematch.service.daemon.merge_moved", spy_merge)
    real_until = daemon_module.until_answered

    async def slow_unsubscribe(client: aiomqtt.Client, request: Any) -> Any:
        # the standby connection is left 0.4 s after the main one's SUBACK: about 20
        # fixes of the shard reach both connections meanwhile
        if client is a._standby_client and a._moving.get(shard, (0, False))[1]:
            await asyncio.sleep(0.4)  # the shard moves to the main connection: leaving
        return await real_until(client, request)

    monkeypatch.setattr(daemon_module, "until_answered", slow_unsubscribe)
    split = assign_shards(8, ["a", "b"])
    theirs, ours = split.held_by("b"), split.held_by("a")
    shard = min(theirs)
    vehicle = next(f"k{i}" for i in range(1000) if shard_of(f"k{i}", 8) == shard)
    own = next(f"m{i}" for i in range(1000) if shard_of(f"m{i}", 8) == min(ours))
    topic = {v: f"{prefix}/fleet/{shard_of(v, 8)}/{v}/position" for v in (vehicle, own)}
    n = 120
    feeds = {v: drive(v, n, start_x=100.0 + 400 * i) for i, v in enumerate((vehicle, own))}
    client = aioredis.Redis.from_url(redis_server.url)
    task = asyncio.create_task(a.run())
    try:
        async with Collector("127.0.0.1", mosquitto.port, f"{prefix}/out/#") as col:
            await wait_until(lambda: len(a._active) == 8 and a._standby_client is not None,
                             what="a holds all shards, standby connection up")
            await client.zadd(f"{prefix}:group:g:members", {"b": 2 ** 50})
            await client.hset(f"{prefix}:group:g:receives", "b",
                              ",".join(str(s) for s in sorted(theirs)))
            await wait_until(lambda: a._standby_subs == theirs
                             and a._subs == dict.fromkeys(ours, 1),
                             what="b's shards on the standby connection")
            assert shard not in a._active and not a._moving
            async with publisher(mosquitto.port) as pub:
                for i in range(10):
                    for v in (vehicle, own):
                        await pub.publish(topic[v], feeds[v][i][1], qos=1)
            await wait_until(lambda: len(a._buffers.get(shard, ())) == 10,
                             what="the standby shard's fixes kept")
            assert [(e[2], e[3]) for e in a._buffers[shard]] == \
                [(topic[vehicle], p) for _, p in feeds[vehicle][:10]]
            assert col.records(f"/out/match/{vehicle}") == []  # kept, not matched
            await col.wait_for(f"/out/match/{own}", 10)

            async def keep_publishing() -> None:
                async with publisher(mosquitto.port) as pub:
                    for i in range(10, n):
                        for v in (vehicle, own):
                            await pub.publish(topic[v], feeds[v][i][1], qos=1)
                        await asyncio.sleep(0.02)

            feeding = asyncio.create_task(keep_publishing())
            await asyncio.sleep(0.5)
            # "b" leaves without a checkpoint while the fixes keep coming
            await client.zrem(f"{prefix}:group:g:members", "b")
            await client.hdel(f"{prefix}:group:g:receives", "b")
            await wait_until(lambda: len(a._active) == 8, what="a takes b's shards")
            assert a._standby_subs == set() and a._subs == dict.fromkeys(range(8), 1)
            await feeding
            for v in (vehicle, own):
                await col.wait_for(f"/out/match/{v}", n)
    finally:
        a.request_stop()
        await asyncio.wait_for(task, 20)
        await client.aclose()
    # the shard came back through a merge of both connections' fixes, each kept once
    assert any(via and to_main and twice for via, to_main, twice in merges), merges
    for v in (vehicle, own):
        records = col.records(f"/out/match/{v}")
        assert sorted(r["time"] for r in records) == [t for t, _ in feeds[v]], v
        windows = {r["time"]: r["window_fixes"] for r in records}
        assert [windows[t] for t, _ in feeds[v]] == list(range(1, n + 1)), v


async def test_sigkill_holder_while_fixes_arrive_standby_connection(
        mosquitto: Mosquitto, redis_server: RedisServer, prefix: str, tmp_path: Path) -> None:
    """Two ``livematch run`` workers with ``standby_connection = true``; fixes are
    published every 50 ms throughout; one worker is SIGKILLed mid-feed. The survivor
    takes its shards (from their checkpoints, then the fixes it kept on its standby
    connection, merged with those its main connection receives after the move):
    every fix published is answered, no checkpoint goes back in fix time, and every
    vehicle's certificate window grows 1, 2, 3, ... (the state continued, in order)."""
    workers = ("w1", "w2")
    cfg, ports, logs = topic_group(tmp_path, prefix, mosquitto, redis_server, workers,
                                   "standby_connection = true\n")
    vehicles = [f"car-{i}" for i in range(10)]
    n_fixes = 60
    feeds = {v: drive(v, n_fixes, start_x=100.0 + 400 * i) for i, v in enumerate(vehicles)}
    topic = {v: f"{prefix}/fleet/{shard_of(v, 8)}/{v}/position" for v in vehicles}
    victim = "w1"
    assert any(assign_shards(8, workers).holder[shard_of(v, 8)] == victim for v in vehicles)
    client = aioredis.Redis.from_url(redis_server.url)
    backwards: list[str] = []
    seen: dict[str, float] = {}

    procs = {w: start_worker(cfg, w, ports[w], logs[w]) for w in workers}
    watcher = asyncio.create_task(watch_checkpoints(client, prefix, seen, backwards))
    try:
        async with Collector("127.0.0.1", mosquitto.port, f"{prefix}/out/#") as col:
            await settle_shares(ports, procs, logs, {"w1": 4, "w2": 4})
            async with publisher(mosquitto.port) as pub:
                for i in range(n_fixes):
                    if i == 25:
                        procs[victim].send_signal(signal.SIGKILL)
                    for v in vehicles:
                        await pub.publish(topic[v], feeds[v][i][1], qos=1)
                    await asyncio.sleep(0.05)
            deadline = time.monotonic() + 60
            want = {v: {t for t, _ in feeds[v]} for v in vehicles}
            while {v: {r["time"] for r in col.records(f"/out/match/{v}")}
                   for v in vehicles} != want:
                assert time.monotonic() < deadline, "fixes not answered"
                assert procs["w2"].poll() is None, logs["w2"].read_text()
                await asyncio.sleep(0.1)
            procs["w2"].send_signal(signal.SIGTERM)
            assert await asyncio.to_thread(procs["w2"].wait, 30) == 0, logs["w2"].read_text()
    finally:
        watcher.cancel()
        for proc in procs.values():
            if proc.poll() is None:
                proc.kill()
                proc.wait()
        await client.aclose()
    survivor = logs["w2"].read_text()
    assert "standby connection up" in survivor and "shard taken" in survivor, survivor
    assert backwards == []
    for v in vehicles:
        windows = col.windows(f"/out/match/{v}")
        assert windows == [{k} for k in range(1, n_fixes + 1)], v


async def test_standby_connection_takes_first_fixes_raw_and_reads_when_idle(
        tmp_path: Path, mosquitto: Mosquitto, redis_server: RedisServer, prefix: str,
        monkeypatch: pytest.MonkeyPatch) -> None:
    """On the standby connection the first fix of every topic is kept from the raw
    bytes too (``Daemon._take_first_standby``): paho's way (``_arrive_standby``) sees
    only the unusual packets, here those carrying a user property (MQTT 5.0 section
    3.3.2.3.7), and those are kept in their place. For three vehicles of the standby
    shards, interleaved, each shard's buffer holds exactly the fixes published, in
    publish order; junk on a vehicle's topic and a fix on another shard's topic
    (``wrong_shard``) are not kept (junk takes paho's way, as before). Nothing of its
    own arrives meanwhile, so the
    connection is read only by the timer of ``_read_standby``, which fires only once no
    read came for ``_STANDBY_LATE_S``."""
    from paho.mqtt.packettypes import PacketTypes
    from paho.mqtt.properties import Properties

    config = write_config(tmp_path, prefix, broker=mosquitto.url, store=redis_server.url,
                          metrics="", topic="fleet/{shard}/+/position",
                          extra='[group]\nname = "g"\nshards = 8\nlease_s = 1.0\n'
                                'standby_connection = true\n')
    a = group_daemon(config, "a")
    paho_way: list[tuple[str, bytes]] = []
    reads: list[tuple[float, bool]] = []  # (monotonic time, by the timer)
    arrive_standby, read_standby, late = a._arrive_standby, a._read_standby, a._standby_late

    def spy_arrive(message: aiomqtt.Message) -> None:
        paho_way.append((message.topic.value, bytes(message.payload)))  # type: ignore[arg-type]
        arrive_standby(message)

    def spy_read(client: aiomqtt.Client) -> None:
        reads.append((time.monotonic(), False))
        read_standby(client)

    def spy_late(client: aiomqtt.Client) -> None:
        reads.append((time.monotonic(), True))
        late(client)

    monkeypatch.setattr(a, "_read_standby", spy_read)
    monkeypatch.setattr(a, "_standby_late", spy_late)
    split = assign_shards(8, ["a", "b"])
    theirs = sorted(split.held_by("b"))
    vehicles = [next(f"k{i}" for i in range(1000) if shard_of(f"k{i}", 8) == s)
                for s in theirs[:3]]
    topic = {v: f"{prefix}/fleet/{shard_of(v, 8)}/{v}/position" for v in vehicles}
    feeds = {v: drive(v, 12, start_x=100.0 + 300 * i) for i, v in enumerate(vehicles)}
    client = aioredis.Redis.from_url(redis_server.url)
    task = asyncio.create_task(a.run())
    try:
        await wait_until(lambda: len(a._active) == 8 and a._standby_client is not None,
                         what="a holds all shards, standby connection up")
        monkeypatch.setattr(a, "_arrive_standby", spy_arrive)
        a._standby_intake.arrive = spy_arrive  # type: ignore[union-attr]
        await client.zadd(f"{prefix}:group:g:members", {"b": 2 ** 50})
        await client.hset(f"{prefix}:group:g:receives", "b",
                          ",".join(str(s) for s in theirs))
        await wait_until(lambda: a._standby_subs == set(theirs),
                         what="b's shards on the standby connection")
        with_property = Properties(PacketTypes.PUBLISH)
        with_property.UserProperty = ("k", "v")
        flagged: set[tuple[str, bytes]] = set()
        wrong = f"{prefix}/fleet/{theirs[1]}/{vehicles[0]}/position"  # not its shard
        async with aiomqtt.Client("127.0.0.1", mosquitto.port,
                                  protocol=aiomqtt.ProtocolVersion.V5) as pub:
            for i in range(12):
                for v in vehicles:
                    payload = feeds[v][i][1]
                    if i % 5 == 3:  # now and then a packet that takes paho's way
                        flagged.add((topic[v], payload))
                        await pub.publish(topic[v], payload, qos=1, properties=with_property)
                    else:
                        await pub.publish(topic[v], payload, qos=1)
                if i == 4:
                    await pub.publish(topic[vehicles[1]], b"junk", qos=1)
                    await pub.publish(wrong, feeds[vehicles[0]][0][1], qos=1)
        want = {shard_of(v, 8): [(topic[v], p) for _, p in feeds[v]] for v in vehicles}
        await wait_until(lambda: all(len(a._buffers.get(s, ())) == len(w)
                                     for s, w in want.items()), what="every fix kept")
        await asyncio.sleep(1.0)  # idle: the timer reads it
    finally:
        a.request_stop()
        await asyncio.wait_for(task, 20)
        await client.aclose()
    for s, w in want.items():
        assert [(e[2], e[3]) for e in a._buffers[s]] == w, s
    # paho's way: the packets with a property, and the junk (its topic is known, its
    # payload fails the raw path's type check; dropped there, as before)
    assert sorted(paho_way) == sorted(flagged | {(topic[vehicles[1]], b"junk")})
    assert len(flagged) == 6
    assert not any(s in a._buffers for s in theirs[3:])
    timer_reads = [k for k, (_, by_timer) in enumerate(reads) if by_timer]
    assert len(timer_reads) >= 2  # idle, so read by the timer
    for k in timer_reads:  # each only after _STANDBY_LATE_S without a read
        assert k > 0 and reads[k][0] - reads[k - 1][0] >= daemon_module._STANDBY_LATE_S - 0.01
