"""Shards, leases and fencing against a real redis-server; two in-process workers."""

from __future__ import annotations

import asyncio
import contextlib
import functools
import hashlib
import math
import random
import re
import time
from collections.abc import AsyncIterator, Iterator
from pathlib import Path

import aiomqtt
import pytest
import redis
import redis.asyncio as aioredis
from scipy.stats import chisquare
from services import (
    Collector,
    Mosquitto,
    RedisServer,
    drive,
    publisher,
    town,
    wait_until,
    write_config,
)

from livematch.config import load_config
from livematch.errors import BadConfigError
from livematch.pipeline import Pipeline
from livematch.service.daemon import Daemon
from livematch.service.mqtt import ACK_ONLY_KEY, IntakeQueue
from livematch.service.shards import (
    LeaseManager,
    Renewal,
    RenewalThread,
    ShardWrite,
    assign_shards,
    preference,
    rank_workers,
    resp_command,
    shard_of,
    target_share,
)
from livematch.service.store import StoreError

pytest_plugins = ("fixtures_services",)


# -- the hash --------------------------------------------------------------------------


def test_shard_of_matches_blake2b_reference() -> None:
    """The shard is BLAKE2b-64 (RFC 7693, via hashlib) of the id, big-endian, mod n."""
    # Reference computed independently with hashlib's blake2b, as RFC 7693 defines it.
    for vehicle in ("bus-17", "", "ümlaut-van", "x" * 64):
        digest = hashlib.blake2b(vehicle.encode(), digest_size=8).hexdigest()
        assert shard_of(vehicle, 64) == int(digest, 16) % 64
    assert shard_of("bus-17", 64) == 11  # pinned: the mapping must never change


def test_shard_of_spreads_ids_evenly() -> None:
    """10,000 ids over 64 shards pass a chi-square test of uniformity (scipy)."""
    counts = [0] * 64
    for i in range(10_000):
        counts[shard_of(f"vehicle-{i}", 64)] += 1
    # common practice: reject uniformity only below p = 0.001
    assert chisquare(counts).pvalue > 0.001


def test_target_share_covers_every_shard() -> None:
    """ceil(n / workers) per worker: the shares always add up to at least n."""
    for n in (1, 7, 64, 1000):
        for workers in range(1, 12):
            assert target_share(n, workers) * workers >= n
            assert (target_share(n, workers) - 1) * workers < n  # and no larger
    assert sorted(preference("w", 8)) == list(range(8))
    assert preference("a", 64) != preference("b", 64)


def worker_sets() -> Iterator[tuple[int, list[str]]]:
    """(shard count, live workers) cases: fixed ones and 200 random ones (seeded)."""
    yield from [(8, ["w1", "w2", "w3"]), (64, ["w0", "w1"]), (64, ["w1", "w2", "w3"]),
                (1, ["a", "b"]), (3, ["a", "b", "c", "d", "e"]), (64, ["solo"])]
    rng = random.Random(20261202)
    for _ in range(200):
        n = rng.choice([1, 2, 5, 8, 17, 64, 100, 256])
        names = {f"{rng.choice(['w', 'node-', 'host.'])}{rng.randrange(1000)}"
                 for _ in range(rng.randint(1, 12))}
        yield n, sorted(names)


def blake2b_rank(shard: int, workers: list[str]) -> list[str]:
    """Rendezvous ranking recomputed here from hashlib (RFC 7693 BLAKE2b, 8-byte digest
    of ``worker NUL shard``), not through livematch's ranking."""
    return sorted(workers, key=lambda w: hashlib.blake2b(
        f"{w}\0{shard}".encode(), digest_size=8).digest())


def test_assign_shards_even_shares_and_a_standby_for_every_failure() -> None:
    """Bounded-load rendezvous hashing (consistent hashing with bounded loads, Mirrokni,
    Thorup and Zadimoghaddam, SODA 2018; from memory), checked against its definition
    for 206 worker sets: every shard has exactly one holder among the live workers;
    shares differ by at most one (floor or ceil of shards / workers); each shard went
    to the first worker in its BLAKE2b ranking that still had room when its turn came;
    every shard's standby is another live worker, and is exactly the holder the same
    assignment gives it when its holder has failed; the input order does not matter."""
    for n, workers in worker_sets():
        a = assign_shards(n, workers)
        assert a == assign_shards(n, list(reversed(workers)))
        assert a.workers == tuple(sorted(workers))
        assert len(a.holder) == n and set(a.holder) <= set(workers)
        shares = [len(a.held_by(w)) for w in workers]
        assert sum(shares) == n
        assert max(shares) - min(shares) <= 1, (n, workers, shares)
        floor, extra = divmod(n, len(workers))
        count = dict.fromkeys(workers, 0)
        for shard, holder in enumerate(a.holder):
            over = sum(1 for c in count.values() if c > floor)
            for better in blake2b_rank(shard, workers):
                if better == holder:
                    break  # nobody ranked above it had room
                assert count[better] > floor or (count[better] == floor and over == extra), \
                    (n, workers, shard, better, holder)
            count[holder] += 1
        assert len(a.standby) == n
        if len(workers) == 1:
            assert a.standby == (None,) * n
            continue
        for shard, (holder, standby) in enumerate(zip(a.holder, a.standby, strict=True)):
            assert standby in workers and standby != holder
            after = assign_shards(n, [w for w in workers if w != holder])
            assert after.holder[shard] == standby
        for w in workers:
            assert a.held_by(w).isdisjoint(a.standing_by(w))


def test_assign_shards_evens_out_what_rendezvous_hashing_skews() -> None:
    """The cases of docs/scale.md: rendezvous hashing alone gives w0 39 of 64 shards
    against w1 (the bench's pair) and 5 / 3 / 0 for 8 on 3; bounded: 32 / 32, 3 / 3 / 2."""
    first = [rank_workers(s, ["w0", "w1"])[0] for s in range(64)]
    assert first.count("w0") == 39
    a = assign_shards(64, ["w0", "w1"])
    assert [len(a.held_by(w)) for w in ("w0", "w1")] == [32, 32]
    assert a.standing_by("w0") == a.held_by("w1")  # two workers: each stands by for the other
    trio = ["w1", "w2", "w3"]
    assert sorted([rank_workers(s, trio)[0] for s in range(8)].count(w) for w in trio) \
        == [0, 3, 5]
    assert sorted(len(assign_shards(8, trio).held_by(w)) for w in trio) == [2, 3, 3]


# -- leases ----------------------------------------------------------------------------


@pytest.fixture
def redis_url(redis_server: RedisServer) -> str:
    return redis_server.url


@contextlib.asynccontextmanager
async def managers(url: str, prefix: str, *names: str, lease_s: float = 1.0,
                   n_shards: int = 4) -> AsyncIterator[list[LeaseManager]]:
    client = aioredis.Redis.from_url(url)
    try:
        yield [LeaseManager(client, url=url, prefix=f"{prefix}:", group="g", worker=n,
                            n_shards=n_shards, lease_s=lease_s) for n in names]
    finally:
        await client.aclose()


async def publish_feed(port: int, topic: str, feed: list[tuple[float, bytes]]) -> None:
    """Publish one vehicle's fixes (QoS 1) on ``topic`` through a fresh client."""
    async with publisher(port) as pub:
        for _, payload in feed:
            await pub.publish(topic, payload, qos=1)


async def test_lease_exclusive_and_renewed(redis_url: str, prefix: str) -> None:
    """A held shard cannot be acquired by another; renewing extends its expiry."""
    # A 3 s lease renewed every 0.5 s: a loaded machine (sleeps overrunning by up to
    # 2.5 s) cannot let it lapse between renewals, as a 1 s lease could.
    async with managers(redis_url, prefix, "a", "b", lease_s=3.0) as (a, b):
        assert await a.acquire(2) == 1
        assert await b.acquire(2) is None
        start = time.monotonic()
        while time.monotonic() - start < 3.5:  # past the 3 s lease, kept by renewals
            await asyncio.sleep(0.5)
            renewed = time.monotonic()
            assert await a.renew() == []
        assert await b.acquire(2) is None
        ttl = await a.client.pttl(a.key(2, "lease"))
        since_ms = (time.monotonic() - renewed) * 1000
        assert 3000 - since_ms - 50 <= ttl <= 3000  # set to the full lease at the renewal
        owners = await b.owners()
        assert owners[2] == f"{a.token}:1"
        assert owners[0] is None


async def test_next_deadline_follows_acquire_renew_and_forget(redis_url: str,
                                                              prefix: str) -> None:
    """The earliest lease deadline (kept between changes) moves with every acquisition,
    renewal and forgotten shard, as the minimum over the shards held would."""
    async with managers(redis_url, prefix, "a", lease_s=5.0) as (a,):
        assert a.next_deadline() == math.inf
        before = time.monotonic()
        assert await a.acquire(0) == 1
        first = a.next_deadline()
        assert before + 5.0 <= first <= time.monotonic() + 5.0
        await asyncio.sleep(0.05)
        assert await a.acquire(1) == 1
        assert a.next_deadline() == first  # shard 0's deadline is still the earliest
        assert await a.renew() == []  # both extended: the earliest is later now
        assert first < a.next_deadline() == min(a._deadline.values())
        a.forget(0)
        assert a.next_deadline() == a._deadline[1]
        assert a.expired(now=a._deadline[1]) == [1]
        assert a.next_deadline() == math.inf


async def test_lease_expires_and_fence_refuses_stale_writer(redis_url: str,
                                                            prefix: str) -> None:
    """A lease not renewed expires; the next holder gets fence 2 and the stalled
    holder's checkpoint write is refused, leaving the newer state in place."""
    async with managers(redis_url, prefix, "a", "b", lease_s=1.0) as (a, b):
        assert await a.acquire(1) == 1
        assert await a.save(1, fence=1, blobs={"v": b"old"}, latest={"v": b"{}"},
                            deleted=[], ttl_s=60)
        await asyncio.sleep(1.1)  # a stalls past its lease
        assert a.expired() == [1]
        assert await b.acquire(1) == 2
        assert await b.load(1) == {"v": b"old"}
        assert await b.save(1, fence=2, blobs={"v": b"new"}, latest={}, deleted=[], ttl_s=60)
        # a wakes up and tries to write what it had: refused
        assert not await a.save(1, fence=1, blobs={"v": b"stale"}, latest={"v": b"x"},
                                deleted=["v"], ttl_s=60)
        assert await b.load(1) == {"v": b"new"}
        assert await b.client.hget(b.key(1, "latest"), "v") == b"{}"
        # a's renewal does not revive its lease either
        a.held[1] = 1
        assert await a.renew() == [1]
        assert await b.renew() == []


async def test_save_many_is_fenced_per_shard_and_loads_a_flushed_script(
        redis_url: str, prefix: str) -> None:
    """Several shards' writes in one pipeline: each checked against its own fence (one
    refused leaves the others written), and a script Redis no longer has cached
    (SCRIPT FLUSH, documented to empty the script cache) is loaded and written."""
    async with managers(redis_url, prefix, "a", "b", lease_s=5.0) as (a, b):
        assert await a.acquire(0) == 1
        assert await b.acquire(1) == 1
        assert await a.acquire(2) == 1
        writes = [ShardWrite(0, 1, {"v": b"0"}, {"v": b"{}"}, []),
                  ShardWrite(1, 1, {"w": b"stale"}, {}, []),  # refused below
                  ShardWrite(2, 1, {"x": b"2"}, {}, [])]
        await a.client.incr(a.key(1, "fence"))  # shard 1 taken again since: fence 1 is stale
        assert await a.save_many(writes, ttl_s=60) == [True, False, True]
        assert await b.load(0) == {"v": b"0"}
        assert await b.load(1) == {}
        assert await b.load(2) == {"x": b"2"}
        assert await b.client.hget(b.key(0, "latest"), "v") == b"{}"
        await a.client.script_flush()
        assert await a.save_many([ShardWrite(2, 1, {}, {}, ["x"])], ttl_s=60) == [True]
        assert await b.load(2) == {}
        assert await a.save_many([], ttl_s=60) == []


@pytest.mark.parametrize("args", [
    ("EVALSHA", "ab" * 20, 3, "p:{s:01}:fence", "p:{s:01}:vehicle:bus 17", 7, -1, 0),
    ("SET", "ключ 🚌", b"\x00\r\n\xff" * 3, 2**70, 1.5, 1e-07),
    ("HSET", "k", "v", b"x" * 20_000),  # above redis-py's buffer cut-off
    ("PING",),
])
def test_resp_command_packs_what_redis_py_packs(args: tuple[object, ...]) -> None:
    """The checkpoint request's packer against redis-py's own (its asyncio Connection's
    ``pack_commands``, the bytes a pipeline sends); a bool refused as redis-py refuses it."""
    connection = aioredis.Connection()
    out: list[bytes] = []
    resp_command(out, args, connection.encoder)  # type: ignore[arg-type]
    assert b"".join(out) == b"".join(connection.pack_commands([args]))
    with pytest.raises(redis.exceptions.DataError):
        connection.pack_commands([("SET", "k", True)])
    with pytest.raises(redis.exceptions.DataError):
        resp_command([], ("SET", "k", True), connection.encoder)  # type: ignore[arg-type]


async def test_save_many_error_reply_keeps_the_connection_in_step(
        redis_url: str, prefix: str) -> None:
    """An error reply in the middle of a round (a shard's key of the wrong type: WRONGTYPE)
    fails the round as a StoreError naming that shard, the writes around it made, and the
    replies after it are read: the next commands on the client get their own answers."""
    async with managers(redis_url, prefix, "a", lease_s=5.0) as (a,):
        for shard in range(3):
            assert await a.acquire(shard) == 1
        await a.client.set(a.key(1, "vehicles"), "not a set")  # SADD on it: WRONGTYPE
        writes = [ShardWrite(s, 1, {f"v{s}": b"%d" % s}, {}, []) for s in range(3)]
        with pytest.raises(StoreError, match="saving shard 1"):
            await a.save_many(writes, ttl_s=60)
        assert await a.load(0) == {"v0": b"0"}
        assert await a.load(2) == {"v2": b"2"}
        assert await a.client.get(a.key(1, "vehicles")) == b"not a set"
        assert await a.client.ping() is True
        await a.client.delete(a.key(1, "vehicles"))
        assert await a.save_many(writes, ttl_s=60) == [True, True, True]


async def test_save_many_survives_a_dropped_connection(redis_url: str, prefix: str) -> None:
    """The pooled connection killed by the server between two rounds (CLIENT KILL): the
    next round reconnects under the client's retry policy and writes, as a redis-py
    pipeline does."""
    async with managers(redis_url, prefix, "a", lease_s=5.0) as (a,):
        assert await a.acquire(0) == 1
        assert await a.save_many([ShardWrite(0, 1, {"v": b"1"}, {}, [])], ttl_s=60) == [True]
        other = aioredis.Redis.from_url(redis_url)
        try:
            assert await other.client_kill_filter(_type="normal", skipme=True) >= 1
        finally:
            await other.aclose()
        assert await a.save_many([ShardWrite(0, 1, {"v": b"2"}, {}, [])], ttl_s=60) == [True]
        assert await a.load(0) == {"v": b"2"}


async def test_save_many_cancelled_leaves_the_pool_usable(
        redis_url: str, prefix: str, monkeypatch: pytest.MonkeyPatch) -> None:
    """A round cancelled once its request is sent, its replies outstanding (a shutdown),
    drops that connection: the next command does not read the cancelled round's replies."""
    sent = asyncio.Event()
    connections: list[aioredis.Connection] = []
    send = aioredis.Connection.send_packed_command

    async def send_then_tell(self: aioredis.Connection, *args: object, **kw: object) -> None:
        await send(self, *args, **kw)  # type: ignore[arg-type]
        connections.append(self)
        sent.set()
        await asyncio.sleep(0.5)  # sent, not yet read: the cancellation lands here

    async with managers(redis_url, prefix, "a", lease_s=5.0) as (a,):
        assert await a.acquire(0) == 1
        writes = [ShardWrite(0, 1, {f"v{k}": b"x" * 1000}, {}, []) for k in range(200)]
        monkeypatch.setattr(aioredis.Connection, "send_packed_command", send_then_tell)
        task = asyncio.create_task(a.save_many(writes, ttl_s=60))
        await sent.wait()
        task.cancel()
        with contextlib.suppress(asyncio.CancelledError):
            await task
        monkeypatch.undo()
        assert task.cancelled()
        assert not connections[0].is_connected  # dropped, not handed back mid-reply
        assert await a.client.get(a.key(0, "fence")) == b"1"
        assert await a.client.ping() is True


async def test_renewal_thread_renews_while_event_loop_blocked(redis_url: str,
                                                               prefix: str) -> None:
    """Renewals from their own thread keep a 1 s lease through a 1.5 s blocked event loop;
    a lease gone from Redis comes back as lost."""
    async with managers(redis_url, prefix, "a", "b", lease_s=1.0) as (a, b):
        assert await a.acquire(1) == 1
        loop = asyncio.get_running_loop()
        got: list[Renewal] = []
        thread = RenewalThread(a, redis.Redis.from_url(redis_url), 1.0 / 3,
                               lambda r: loop.call_soon_threadsafe(got.append, r))
        thread.start()
        try:
            time.sleep(1.5)  # one long turn of the event loop: nothing async runs
            await asyncio.sleep(0)  # the outcomes delivered meanwhile arrive
            assert len(got) >= 3
            assert [a.apply(r) for r in got] == [[]] * len(got)
            assert [r.members for r in got] == [["a"]] * len(got)  # b never announced
            assert a.expired() == []
            assert await b.acquire(1) is None  # still a's in Redis
            await a.client.delete(a.key(1, "lease"))
            got.clear()
            await wait_until(lambda: got, "a renewal delivered")
            assert a.apply(got[0]) == [1]
            assert a.held == {}
        finally:
            await asyncio.to_thread(thread.stop)


async def test_renewal_thread_lets_leases_lapse_when_event_loop_stuck(redis_url: str,
                                                                      prefix: str) -> None:
    """An event loop that applies no renewal for stall_s stops the renewals, so the 1 s
    lease of a worker stuck for 3 s lapses in Redis and another worker can take the
    shard (as if the process had died); renewals resume once the loop confirms again."""
    async with managers(redis_url, prefix, "a", "b", lease_s=1.0) as (a, b):
        assert await a.acquire(1) == 1
        loop = asyncio.get_running_loop()
        got: list[Renewal] = []
        thread = RenewalThread(a, redis.Redis.from_url(redis_url), 1.0 / 3,
                               lambda r: loop.call_soon_threadsafe(got.append, r),
                               stall_s=1.0)
        thread.start()
        try:
            time.sleep(3.0)  # stuck: nothing the thread delivers is applied
            assert thread.stalled
            assert await b.acquire(1) == 2  # a's lease lapsed: b holds shard 1 now
            await asyncio.sleep(0)
            rounds = len(got)
            assert rounds <= 5  # about stall_s / period rounds, then none (1 s / 0.33 s)
            thread.applied()  # the loop runs again and confirms
            await wait_until(lambda: len(got) > rounds, "a renewal after the confirmation")
            assert not thread.stalled
            assert a.apply(got[-1]) == [1]  # a learns that it lost the shard
        finally:
            await asyncio.to_thread(thread.stop)


async def test_renewal_thread_retries_failures_soon(redis_url: str, prefix: str) -> None:
    """While Redis cannot be reached, a round is retried every 0.1 s, not every period."""
    async with managers(redis_url, prefix, "a") as (a,):
        got: list[Renewal] = []
        # port 1 on loopback: nothing listens there, so every connection is refused
        thread = RenewalThread(a, redis.Redis.from_url("redis://127.0.0.1:1/0",
                                                       socket_connect_timeout=0.5),
                               2.0, got.append)
        started = time.monotonic()
        thread.start()
        try:
            # one per period (2 s) would take 4 s for three rounds; one per 0.1 s about
            # 0.2 s (plus each refused connection's time): waited for, not slept on
            await wait_until(lambda: len(got) >= 3, "three failed renewal rounds",
                             timeout=10.0, poll_s=0.01)
            took = time.monotonic() - started
        finally:
            await asyncio.to_thread(thread.stop)
        assert took < 2.0, took  # sooner than the period allows a second round
        assert all(r.error is not None and r.members is None for r in got)


async def test_lease_release_and_deletes(redis_url: str, prefix: str) -> None:
    """A released shard is free at once; fenced deletes remove blob, index and latest."""
    async with managers(redis_url, prefix, "a", "b") as (a, b):
        fence = await a.acquire(3)
        assert fence == 1
        assert await a.save(3, fence=1, blobs={"v": b"1", "w": b"2"},
                            latest={"v": b"{}", "w": b"{}"}, deleted=[], ttl_s=60)
        assert await a.save(3, fence=1, blobs={}, latest={}, deleted=["w"], ttl_s=60)
        await a.release(3)
        assert 3 not in a.held
        assert await b.acquire(3) == 2
        assert await b.load(3) == {"v": b"1"}
        assert await b.client.hkeys(b.key(3, "latest")) == [b"v"]
        assert (await b.client.smembers(b.key(3, "vehicles"))) == {b"v"}


async def test_keys_hash_tagged_by_shard(redis_url: str, prefix: str) -> None:
    """Every key of a shard carries the {s:NN} hash tag (one Redis Cluster slot)."""
    async with managers(redis_url, prefix, "a", n_shards=64) as (a,):
        assert a.vehicle_key(7, "bus 1") == f"{prefix}:{{s:07}}:vehicle:bus 1"
        assert a.key(63, "lease") == f"{prefix}:{{s:63}}:lease"


async def test_membership_expires_and_shard_count_is_checked(redis_url: str,
                                                              prefix: str) -> None:
    """Members are listed while they heartbeat; a worker with another shard count is refused."""
    async with managers(redis_url, prefix, "a", "b", lease_s=1.0) as (a, b):
        await a.join()
        assert await a.heartbeat() == ["a"]
        assert await b.heartbeat() == ["a", "b"]
        assert await b.heartbeat(leave=True) == ["a"]
        other = LeaseManager(a.client, url=redis_url, prefix=f"{prefix}:", group="g",
                             worker="c", n_shards=8, lease_s=1.0)
        with pytest.raises(StoreError, match="runs with 4 shards"):
            await other.join()


async def test_worker_fed_another_topic_is_refused(redis_url: str, prefix: str) -> None:
    """The first worker records the group's feed topic; a worker configured with another
    topic is refused (a fix fed only to a worker not holding its shard would never be
    answered); the same topic joins; a manager given no topic is not checked."""
    client = aioredis.Redis.from_url(redis_url)

    def manager(worker: str, topic: str | None) -> LeaseManager:
        return LeaseManager(client, url=redis_url, prefix=f"{prefix}:", group="g",
                            worker=worker, n_shards=4, lease_s=1.0, topic=topic)

    try:
        await manager("a", "fleet/+/position").join()
        await manager("b", "fleet/+/position").join()
        await manager("c", None).join()
        with pytest.raises(StoreError) as caught:
            await manager("d", "fleetb/+/position").join()
        text = str(caught.value)
        assert "'fleet/+/position'" in text and "'fleetb/+/position'" in text
        assert f"{prefix}:group:g:topic" in text  # names the key to clear
        assert await client.get(f"{prefix}:group:g:topic") == b"fleet/+/position"
    finally:
        await client.aclose()


# -- configuration ---------------------------------------------------------------------


async def test_receiving_record_round_trip(redis_url: str, prefix: str) -> None:
    """The record of shard topics received: written, read per worker (empty when a
    worker has none), replaced, removed on leaving."""
    async with managers(redis_url, prefix, "a", "b", n_shards=64) as (a, b):
        assert await a.receiving(["a", "b"]) == {"a": set(), "b": set()}
        await a.announce_receiving({11, 3, 40})
        await b.announce_receiving(set())
        assert await b.receiving(["a", "b"]) == {"a": {3, 11, 40}, "b": set()}
        await a.announce_receiving({3})
        assert await b.receiving(["a"]) == {"a": {3}}
        await a.stop_receiving()
        assert await b.receiving(["a"]) == {"a": set()}
        assert await b.receiving([]) == {}
        raw = await a.client.hgetall(f"{prefix}:group:g:receives")
        assert raw == {b"b": b""}


def test_config_group_needs_redis_and_plain_prefix(tmp_path: Path) -> None:
    """[group] name with memory:// or a prefix holding { } is refused, naming the key."""
    with pytest.raises(BadConfigError, match=re.escape("group.name 'g' needs a Redis store")):
        load_config(None, env={"LIVEMATCH__GROUP__NAME": "g"})
    with pytest.raises(BadConfigError, match=re.escape("needs a store.key_prefix without")):
        load_config(None, env={"LIVEMATCH__GROUP__NAME": "g",
                               "LIVEMATCH__STORE__URL": "redis://127.0.0.1:1/0",
                               "LIVEMATCH__STORE__KEY_PREFIX": "{fleet}:"})
    with pytest.raises(BadConfigError, match=re.escape("group.shards must be 1..16384, got 0")):
        load_config(None, env={"LIVEMATCH__GROUP__SHARDS": "0"})
    with pytest.raises(BadConfigError, match=re.escape("group.standby_qos must be 0 or 1, got 2")):
        load_config(None, env={"LIVEMATCH__GROUP__STANDBY_QOS": "2"})
    assert load_config(None, env={}).group.standby_qos == 0
    cfg = load_config(None, env={"LIVEMATCH__STORE__URL": "redis://127.0.0.1:1/0"},
                      overrides={"group": "north", "shards": 16, "worker": "w1"})
    assert (cfg.group.name, cfg.group.shards, cfg.group.worker) == ("north", 16, "w1")
    assert load_config(None, env={}).group.name == ""  # default: standalone, as before


# -- two workers in one process ----------------------------------------------------------


def group_daemon(config_path: Path, worker: str) -> Daemon:
    config = load_config(config_path, env={"LIVEMATCH__GROUP__WORKER": worker})
    return Daemon(config, Pipeline(town(), config.matcher, limits=config.feed,
                                   alerts=config.alerts,
                                   control_topic=config.mqtt.control_topic))


@pytest.fixture
def group_config(tmp_path: Path, mosquitto: Mosquitto, redis_server: RedisServer,
                 prefix: str) -> Iterator[Path]:
    yield write_config(tmp_path, prefix, broker=mosquitto.url, store=redis_server.url,
                       metrics="", extra="[group]\nname = \"g\"\nshards = 8\nlease_s = 1.0\n")


async def test_two_workers_split_shards_and_every_fix_is_answered(
        group_config: Path, mosquitto: Mosquitto, prefix: str) -> None:
    """A second worker takes half the shards; each fix is answered, by its shard's
    holder; when the second leaves gracefully, the first takes everything back and
    continues every vehicle's window from the checkpoints."""
    a, b = group_daemon(group_config, "a"), group_daemon(group_config, "b")
    vehicles = [f"v{i}" for i in range(12)]
    feeds = {v: drive(v, 30, start_x=100.0 + 300 * (i % 10)) for i, v in enumerate(vehicles)}

    async def publish(lo: int, hi: int) -> None:
        async with publisher(mosquitto.port) as pub:
            for i in range(lo, hi):
                for v in vehicles:
                    await pub.publish(f"{prefix}/fleet/{v}/position", feeds[v][i][1], qos=1)

    def answered() -> dict[str, list[float]]:
        out: dict[str, list[float]] = {v: [] for v in vehicles}
        for r in col.records("/out/match/"):
            out[r["vehicle"]].append(r["time"])
        return out

    async with Collector("127.0.0.1", mosquitto.port, f"{prefix}/out/#") as col:
        task_a = asyncio.create_task(a.run())
        await wait_until(lambda: len(a._active) == 8, what="a holds all shards")
        await publish(0, 10)
        await wait_until(lambda: all(len(t) >= 10 for t in answered().values()),
                         what="first fixes answered")
        task_b = asyncio.create_task(b.run())
        await wait_until(lambda: len(a._active) == 4 and len(b._active) == 4,
                         what="shares rebalanced")
        assert a._active.isdisjoint(b._active)
        await publish(10, 20)
        await wait_until(lambda: all(len(set(t)) >= 20 for t in answered().values()),
                         what="second fixes answered")
        for v in vehicles:  # each vehicle lives in exactly one worker
            held_by = [d for d in (a, b) if v in d.pipeline.vehicles()]
            assert len(held_by) == 1
            assert shard_of(v, 8) in held_by[0]._active
        b.request_stop()
        await asyncio.wait_for(task_b, 20)
        await wait_until(lambda: len(a._active) == 8, what="a takes everything back")
        await publish(20, 30)
        await wait_until(lambda: all(len(set(t)) >= 30 for t in answered().values()),
                         what="last fixes answered")
        a.request_stop()
        await asyncio.wait_for(task_a, 20)
    by_vehicle: dict[str, dict[float, int]] = {v: {} for v in vehicles}
    for r in col.records("/out/match/"):
        by_vehicle[r["vehicle"]][r["time"]] = r["window_fixes"]
    for v in vehicles:
        times = sorted(by_vehicle[v])
        assert times == [t for t, _ in feeds[v]]  # every fix answered
        # the certificate window went on across both hand-overs: fix i with i+1 fixes
        assert [by_vehicle[v][t] for t in times] == list(range(1, 31))
    assert a.metrics.takeovers._value.get() >= 12  # 8 at start, 4 back from b


async def test_worker_fenced_out_writes_nothing_and_recovers(
        group_config: Path, mosquitto: Mosquitto, redis_server: RedisServer,
        prefix: str) -> None:
    """When the shard's fencing number moves on (another worker acquired it while this
    one stalled), the worker's next checkpoint is refused: the stored checkpoint stays as
    it was, the shard's vehicles are dropped; once the lease has run out the worker takes
    the shard again and continues from the checkpoint plus the fixes it kept."""
    a = group_daemon(group_config, "a")
    vehicle = "fenced-1"
    shard = shard_of(vehicle, 8)
    feed = drive(vehicle, 10)
    client = aioredis.Redis.from_url(redis_server.url)
    key = f"{prefix}:{{s:{shard}}}:vehicle:{vehicle}"

    async def publish(lo: int, hi: int) -> None:
        await publish_feed(mosquitto.port, f"{prefix}/fleet/{vehicle}/position", feed[lo:hi])

    async with Collector("127.0.0.1", mosquitto.port, f"{prefix}/out/#") as col:
        task = asyncio.create_task(a.run())
        try:
            await wait_until(lambda: len(a._active) == 8, what="a holds all shards")
            await publish(0, 5)
            await wait_until(lambda: len(col.records("/out/match/")) == 5, what="answers")
            await wait_until(lambda: not a._fixes_since, what="checkpoint written")
            stored = await client.get(key)
            assert stored is not None
            await client.incr(f"{prefix}:{{s:{shard}}}:fence")  # someone else's turn now
            await publish(5, 10)
            await wait_until(lambda: a.metrics.fenced._value.get() == 1, what="write fenced")
            assert await client.get(key) == stored  # the stale state was not written
            assert a.metrics.shards_lost.labels(why="fenced")._value.get() == 1
            await wait_until(lambda: shard in a._active, what="shard taken again")
            await wait_until(lambda: {r["time"] for r in col.records("/out/match/")}
                             == {t for t, _ in feed}, what="every fix answered")
        finally:
            a.request_stop()
            await asyncio.wait_for(task, 20)
            await client.aclose()
    windows = col.windows("/out/match/")
    assert windows == [{k} for k in range(1, 11)]


async def test_group_worker_stop_writes_final_checkpoint_releases_and_leaves(
        tmp_path: Path, mosquitto: Mosquitto, redis_server: RedisServer,
        prefix: str) -> None:
    """A group worker stopped while Redis is up writes every vehicle's checkpoint (none
    was due before), releases its leases and leaves; a worker started afterwards, which
    never received the first fixes, continues the vehicle's window from that checkpoint."""
    config = write_config(tmp_path, prefix, broker=mosquitto.url, store=redis_server.url,
                          metrics="", extra="[group]\nname = \"g\"\nshards = 8\nlease_s = 1.0\n")
    text = config.read_text()  # no periodic checkpoint within the test: only the final one
    config.write_text(text.replace("checkpoint_every_fixes = 5", "checkpoint_every_fixes = 1000")
                      .replace("checkpoint_every_s = 1.0", "checkpoint_every_s = 3600.0"))
    vehicle = "final-1"
    shard = shard_of(vehicle, 8)
    feed = drive(vehicle, 8)
    client = aioredis.Redis.from_url(redis_server.url)
    key = f"{prefix}:{{s:{shard}}}:vehicle:{vehicle}"

    async def publish(lo: int, hi: int) -> None:
        await publish_feed(mosquitto.port, f"{prefix}/fleet/{vehicle}/position", feed[lo:hi])

    try:
        async with Collector("127.0.0.1", mosquitto.port, f"{prefix}/out/#") as col:
            a = group_daemon(config, "a")
            task_a = asyncio.create_task(a.run())
            try:
                await wait_until(lambda: len(a._active) == 8, what="a holds all shards")
                await publish(0, 7)
                await wait_until(lambda: len(col.records("/out/match/")) == 7, what="answers")
                assert await client.get(key) is None  # no checkpoint was due yet
                assert await client.get(f"{prefix}:{{s:{shard}}}:lease") is not None
                assert await client.zscore(f"{prefix}:group:g:members", "a") is not None
            finally:
                a.request_stop()
                await asyncio.wait_for(task_a, 20)
            assert await client.get(key) is not None  # written on the way out
            for s in range(8):  # every lease released at once, not left to expire
                assert await client.get(f"{prefix}:{{s:{s}}}:lease") is None
            assert await client.zscore(f"{prefix}:group:g:members", "a") is None
            b = group_daemon(config, "b")
            task_b = asyncio.create_task(b.run())
            try:
                await wait_until(lambda: len(b._active) == 8, what="b holds all shards")
                assert vehicle in b.pipeline.vehicles()  # restored, not heard from
                await publish(7, 8)
                await wait_until(lambda: len(col.records("/out/match/")) == 8,
                                 what="last fix answered")
            finally:
                b.request_stop()
                await asyncio.wait_for(task_b, 20)
    finally:
        await client.aclose()
    windows = {r["time"]: r["window_fixes"] for r in col.records("/out/match/")}
    # fix i (from 1) has a window of i fixes: the 8th continued the first 7 from Redis
    assert [windows[t] for t, _ in feed] == list(range(1, 9))


async def test_fix_of_another_shard_is_kept_and_acknowledged_on_arrival(
        group_config: Path, redis_url: str, prefix: str) -> None:
    """A fix of a shard the worker does not match is kept as it arrives and never
    queued for matching; its acknowledgement (QoS 1) waits behind messages queued
    before it, and a QoS 0 one (a standby subscription) takes no place in the queue;
    a fix kept while the shard was matched is matched from the queue, unless a replay
    of the shard (lost and taken again meanwhile) already covered it."""
    daemon = group_daemon(group_config, "a")
    vehicle = "arrive-1"
    shard = shard_of(vehicle, 8)
    topic = f"{prefix}/fleet/{vehicle}/position"
    feed = drive(vehicle, 4)
    # QoS 0 (but one QoS 1 fix that only takes a place in the queue): nothing is
    # acknowledged, so the client below is never used
    client = aiomqtt.Client("127.0.0.1", 1)
    intake = IntakeQueue(100, key_of=daemon._intake_key)

    def fix(k: int, qos: int = 0) -> aiomqtt.Message:
        return aiomqtt.Message(topic, feed[k][1], qos, False, k + 1, None)

    async with managers(redis_url, prefix, "a", n_shards=8) as (leases,):
        daemon.leases = leases
        daemon._arrive(client, intake, fix(0))  # another worker's: kept, done with
        assert intake.empty()
        assert [e[3] for e in daemon._buffers[shard]] == [feed[0][1]]
        intake.put_nowait(aiomqtt.Message(topic, b"not json", 0, False, 90, None))
        daemon._arrive(client, intake, fix(1, qos=1))  # behind a queued message: ack only
        assert (intake.qsize(), intake.waiting) == (2, 1)
        daemon._arrive(client, intake, fix(1))  # QoS 0: no PUBACK, so no place either
        assert (intake.qsize(), intake.waiting) == (2, 1)
        intake.get_nowait()
        intake.get_nowait()
        assert intake.last_key == ACK_ONLY_KEY
        assert len(daemon._buffers[shard]) == 3
        assert daemon.pipeline.counters["messages"] == 0  # nothing matched so far

        daemon._active.add(shard)  # this worker matches the shard from now on
        daemon._arrive(client, intake, fix(2))
        intake.get_nowait()
        kept, of = intake.last_kept
        assert (kept, of) == (daemon._buffers[shard][-1][0], shard)
        # lost and taken back while it waited: the replay covered it, so not again
        daemon._replayed_upto[shard] = daemon._kept_seq
        assert daemon._process(client, fix(2), intake.last_key, kept, of)
        assert daemon.pipeline.counters["messages"] == 0
        daemon._arrive(client, intake, fix(3))  # kept after the replay: matched
        intake.get_nowait()
        assert not daemon._process(client, fix(3), intake.last_key, *intake.last_kept)
        assert daemon.pipeline.counters["messages"] == 1
        assert [e[3] for e in daemon._buffers[shard]] == [feed[k][1] for k in (0, 1, 1, 2, 3)]
        # a message aiomqtt itself puts (paho's decoding) takes the same way
        intake.arrive = functools.partial(daemon._arrive, client, intake)
        daemon._active.discard(shard)
        intake.put_nowait(fix(3))  # a redelivery, say: kept again, not queued
        assert intake.empty() and len(daemon._buffers[shard]) == 6
