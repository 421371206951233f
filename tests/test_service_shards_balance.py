"""Load-aware shard assignment (``group.balance_load``): the pure weighted assignment, and
two in-process workers with a skewed fleet on real mosquitto and redis-server."""

from __future__ import annotations

import asyncio
import itertools
import random
import re
from collections import Counter
from pathlib import Path

import pytest
import redis.asyncio as aioredis
from services import Collector, Mosquitto, RedisServer, drive, publisher, write_config
from test_service_shards import group_daemon, wait_until

from livematch.config import load_config
from livematch.errors import BadConfigError
from livematch.service.daemon import Daemon
from livematch.service.shards import LeaseManager, assign_shards, shard_of

pytest_plugins = ("fixtures_services",)


def fleet_weights(seed: int, n_shards: int, vehicles: int) -> list[int]:
    """Per shard, how many of ``vehicles`` random ids fall on it (a real fleet's skew)."""
    rng = random.Random(seed)
    out = [0] * n_shards
    for _ in range(vehicles):
        out[shard_of(f"v{rng.getrandbits(48):x}", n_shards)] += 1
    return out


def loads(assignment: object, weights: list[int]) -> dict[str, int]:
    a = assignment
    return {w: sum(weights[s] for s in a.held_by(w)) for w in a.workers}  # type: ignore[attr-defined]


def cases() -> list[tuple[int, list[str], list[int]]]:
    """Shard counts, worker sets and fleets: 8..256 shards, 2..7 workers, 20..5,000 ids."""
    out = []
    for k, (n, w, v) in enumerate(itertools.product((8, 64, 256), (2, 3, 7), (20, 500, 5000))):
        out.append((n, [f"w{i}" for i in range(w)], fleet_weights(k, n, v)))
    return out


def test_weighted_assignment_within_the_largest_shard_of_even() -> None:
    """Every worker carries at most the largest shard weight above the even share, and
    busiest - lightest is at most that weight; every shard has one holder."""
    for n, workers, weights in cases():
        a = assign_shards(n, workers, weights)
        assert len(a.holder) == n and set(a.holder) <= set(workers)
        got = loads(a, weights)
        even = sum(weights) / len(workers)
        assert max(got.values()) <= even + max(weights), (n, workers, got)
        assert max(got.values()) - min(got.values()) <= max(weights)
        # and never worse than the assignment by count
        assert max(got.values()) <= max(loads(assign_shards(n, workers), weights).values())


def test_weighted_assignment_even_split_of_the_bench_fleet() -> None:
    """The bench's 500 ids v0..v499 on 64 shards, w0 / w1: 260 / 240 by count, 250 / 250
    by load, one shard moved."""
    weights = [0] * 64
    for i in range(500):
        weights[shard_of(f"v{i}", 64)] += 1
    by_count, by_load = assign_shards(64, ["w0", "w1"]), assign_shards(64, ["w0", "w1"], weights)
    assert sorted(loads(by_count, weights).values()) == [240, 260]
    assert sorted(loads(by_load, weights).values()) == [250, 250]
    assert sum(a != b for a, b in zip(by_count.holder, by_load.holder, strict=True)) == 1


def test_weighted_assignment_without_skew_is_the_assignment_by_count() -> None:
    """Equal weights (any), or none at all (a fleet not yet counted), move no shard."""
    for n, workers, _ in cases():
        plain = assign_shards(n, workers)
        for weights in ([1] * n, [7] * n, [0] * n):
            assert assign_shards(n, workers, weights) == plain


def test_weighted_standby_is_the_holder_after_the_holders_failure() -> None:
    """A shard's standby is its holder in the same weighted assignment without its
    holder, never the holder itself (so a failure moves it to a worker that kept its
    fixes)."""
    for n, workers, weights in cases():
        a = assign_shards(n, workers, weights)
        without = {w: assign_shards(n, [x for x in workers if x != w], weights)
                   for w in workers}
        for shard in range(n):
            assert a.standby[shard] != a.holder[shard]
            assert a.standby[shard] == without[a.holder[shard]].holder[shard]


def test_weighted_assignment_moves_few_shards() -> None:
    """Against the assignment by count few shards move: at most 2 per worker, or 1 in
    32 where shards are many and light (256 shards of about 2 vehicles: 5 moves); it
    starts from that assignment and moves only while the busiest gains. Deterministic:
    the same whatever the order of the member list."""
    for n, workers, weights in cases():
        plain, weighted = assign_shards(n, workers), assign_shards(n, workers, weights)
        moved = sum(a != b for a, b in zip(plain.holder, weighted.holder, strict=True))
        assert moved <= max(2 * len(workers), n // 32), (n, workers, moved)
        assert assign_shards(n, list(reversed(workers)), weights) == weighted


def test_weighted_assignment_refuses_weights_of_another_shard_count() -> None:
    """Weights must be one count >= 0 per shard."""
    with pytest.raises(ValueError, match="weights must be 4 counts"):
        assign_shards(4, ["a", "b"], [1, 2, 3])
    with pytest.raises(ValueError, match="weights must be 4 counts"):
        assign_shards(4, ["a", "b"], [1, 2, 3, -1])


def test_config_balance_load_validated(tmp_path: Path) -> None:
    """group.balance_load is a fraction 0..1; above 0 it needs a {shard} topic; the
    message names the key and the file."""
    bad = tmp_path / "bad.toml"
    bad.write_text("[group]\nbalance_load = 1.5\n")
    with pytest.raises(BadConfigError, match=re.escape(
            f"{bad}: group.balance_load must be a fraction 0..1 (0: off), got 1.5")):
        load_config(bad, env={})
    plain = tmp_path / "plain.toml"
    plain.write_text('[mqtt]\ntopic = "fleet/+/position"\n[group]\nbalance_load = 0.05\n')
    with pytest.raises(BadConfigError, match=re.escape(
            f"{plain}: group.balance_load = 0.05 needs a {{shard}} level in mqtt.topic")):
        load_config(plain, env={})
    off = tmp_path / "off.toml"
    off.write_text('[mqtt]\ntopic = "fleet/+/position"\n[group]\nbalance_load = 0\n')
    assert load_config(off, env={}).group.balance_load == 0
    assert load_config(None, env={}).group.balance_load == 0.02


async def test_load_snapshot_compare_and_set(redis_server: RedisServer, prefix: str) -> None:
    """A snapshot is written only over the version its writer read; an empty one clears
    the weights; weights of another shard count are not used."""
    client = aioredis.Redis.from_url(redis_server.url)
    try:
        leases = LeaseManager(client, url=redis_server.url, prefix=f"{prefix}:", group="g",
                              worker="a", n_shards=4, lease_s=1.0, balance=True)
        assert await leases.read_load() == (0, None)
        assert await leases.write_load(0, [3, 1, 0, 2]) == 1
        assert await leases.write_load(0, [9, 9, 9, 9]) is None  # version moved on
        assert await leases.read_load() == (1, [3, 1, 0, 2])
        assert await leases.write_load(1, None) == 2
        assert await leases.read_load() == (2, None)
        await client.hset(f"{prefix}:group:g:load", "weights", "1,2")
        assert await leases.read_load() == (2, None)
        assert await leases.shard_sizes() == [0, 0, 0, 0]
        await client.sadd(f"{prefix}:{{s:2}}:vehicles", "x", "y")
        assert await leases.shard_sizes() == [0, 0, 2, 0]
    finally:
        await client.aclose()


def skewed_fleet(n_shards: int, heavy: set[int], light: set[int]) -> list[str]:
    """Vehicle ids: 3 on each shard of ``heavy``, 1 on each of ``light``."""
    out: list[str] = []
    want = {s: 3 for s in heavy} | {s: 1 for s in light}
    for i in range(100_000):
        v = f"q{i}"
        s = shard_of(v, n_shards)
        if want.get(s, 0) > 0:
            want[s] -= 1
            out.append(v)
        if not any(want.values()):
            return out
    raise AssertionError("ids not found")


def processed(d: Daemon) -> float:
    d._sync_counters()
    return float(d.metrics.fixes._value.get())


async def test_two_workers_rebalance_a_skewed_fleet_and_answer_every_fix_once(
        tmp_path: Path, mosquitto: Mosquitto, redis_server: RedisServer, prefix: str) -> None:
    """Two workers, 8 shards by count 4 / 4, but the fleet is skewed: 3 vehicles on each
    of a's shards, 1 on each of b's (12 / 4). Fed throughout, the first worker writes a
    load snapshot, a hands one of its shards over to b (fenced hand-over, b's record of
    the topic first), and from then on each worker matches within the largest shard
    (3 vehicles) of the even share, 9 / 7 vehicles' fixes. Every fix published before,
    during and after the move has exactly one assignment on the output, and every
    vehicle's certificate window grows 1, 2, 3, ... across it."""
    config = write_config(tmp_path, prefix, broker=mosquitto.url, store=redis_server.url,
                          metrics="", topic="fleet/{shard}/+/position",
                          extra='[group]\nname = "g"\nshards = 8\nlease_s = 1.0\n'
                                'balance_load = 0.02\n')
    split = assign_shards(8, ["a", "b"])
    vehicles = skewed_fleet(8, split.held_by("a"), split.held_by("b"))
    assert len(vehicles) == 16
    weights = [0] * 8
    for v in vehicles:
        weights[shard_of(v, 8)] += 1
    assert loads(split, weights) == {"a": 12, "b": 4}
    rounds = 80
    feeds = {v: drive(v, rounds, start_x=100.0 + 250 * k) for k, v in enumerate(vehicles)}
    topic = {v: f"{prefix}/fleet/{shard_of(v, 8)}/{v}/position" for v in vehicles}
    a, b = group_daemon(config, "a"), group_daemon(config, "b")
    client = aioredis.Redis.from_url(redis_server.url)

    async def publish(lo: int, hi: int, pause: float) -> None:
        async with publisher(mosquitto.port) as pub:
            for i in range(lo, hi):
                for v in vehicles:
                    await pub.publish(topic[v], feeds[v][i][1], qos=1)
                await asyncio.sleep(pause)

    def answered() -> int:
        return len({(r["vehicle"], r["time"]) for r in col.records("/out/match/")})

    async with Collector("127.0.0.1", mosquitto.port, f"{prefix}/out/#") as col:
        tasks = [asyncio.create_task(a.run()), asyncio.create_task(b.run())]
        try:
            await wait_until(lambda: len(a._active) == 4 and len(b._active) == 4,
                             what="4 / 4 by count")
            before = (processed(a), processed(b))
            await publish(0, 10, 0.05)
            await wait_until(lambda: answered() == 16 * 10, what="first fixes answered")
            by_count = (processed(a) - before[0], processed(b) - before[1])
            assert by_count == (120, 40)  # 12 / 4 vehicles' fixes
            # fed on while the first worker counts the shards and the move happens
            await publish(10, 50, 0.2)
            await wait_until(lambda: len(b._active) == 5 and len(a._active) == 3,
                             timeout=30, what="one shard moved to b")
            # (two counts of a half-written index could make a first, partial snapshot;
            # the whole fleet's would then follow at once: the size changed)
            written = a.metrics.load_snapshots._value.get()
            assert written >= 1
            assert b.metrics.load_snapshots._value.get() == 0  # only the first worker
            version, snapshot = await LeaseManager(
                client, url=redis_server.url, prefix=f"{prefix}:", group="g", worker="x",
                n_shards=8, lease_s=1.0).read_load()
            assert (version, snapshot) == (written, weights)
            await wait_until(lambda: answered() == 16 * 50, what="fixes around the move")
            middle = (processed(a), processed(b))
            await publish(50, rounds, 0.05)
            await wait_until(lambda: answered() == 16 * rounds, what="every fix answered")
            after = (processed(a) - middle[0], processed(b) - middle[1])
            # 9 / 7 vehicles: within 3 (the largest shard) of the even 8
            assert after == (9 * (rounds - 50), 7 * (rounds - 50))
            assert a.metrics.load_snapshots._value.get() == written  # no churn
        finally:
            a.request_stop()
            b.request_stop()
            await asyncio.wait_for(asyncio.gather(*tasks), 30)
            await client.aclose()
    times = Counter((r["vehicle"], r["time"]) for r in col.records("/out/match/"))
    assert set(times) == {(v, t) for v in vehicles for t, _ in feeds[v]}  # none lost
    assert set(times.values()) == {1}  # none answered twice
    for v in vehicles:  # each window continued across the hand-over
        assert col.windows(f"/out/match/{v}") == [{k} for k in range(1, rounds + 1)]
