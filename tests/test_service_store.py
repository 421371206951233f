"""State stores: the in-memory one and Redis (a real redis-server on a free port)."""

from __future__ import annotations

import asyncio

import pytest
import redis
from services import RedisServer, free_port

from livematch.service.store import MemoryStore, RedisStore, StateStore, StoreError, open_store

pytest_plugins = ("fixtures_services",)


async def test_memorystore_round_trip() -> None:
    """Saved blobs and latest records come back; deleting forgets both."""
    store = MemoryStore()
    await store.connect()
    await store.save({"a": b"1", "b": b"2"}, ttl_s=10)
    await store.set_latest({"a": b'{"x":1}'})
    assert await store.load_all() == {"a": b"1", "b": b"2"}
    await store.delete(["a", "nobody"])
    assert await store.load_all() == {"b": b"2"}
    assert await store.get_latest() == {}
    assert await store.ping() is True


async def test_redisstore_round_trip_under_prefix(redis_server: RedisServer, prefix: str) -> None:
    """Checkpoints and latest records live under the prefix, with the documented keys."""
    store = RedisStore(redis_server.url, key_prefix=f"{prefix}:")
    other = RedisStore(redis_server.url, key_prefix=f"{prefix}-other:")
    await store.connect()
    await other.connect()
    try:
        blobs = {"bus 1": b"\x00\x01state", "van-2": b"x" * 10_000}
        await store.save(blobs, ttl_s=60)
        await other.save({"bus 1": b"not mine"}, ttl_s=60)
        await store.set_latest({"bus 1": b'{"way":1}', "van-2": b'{"way":2}'})
        assert await store.load_all() == blobs
        assert await store.get_latest() == {"bus 1": b'{"way":1}', "van-2": b'{"way":2}'}
        raw = redis.Redis.from_url(redis_server.url)
        assert raw.get(f"{prefix}:vehicle:bus 1") == b"\x00\x01state"
        assert 0 < raw.pttl(f"{prefix}:vehicle:bus 1") <= 60_000
        assert raw.hgetall(f"{prefix}:latest") == {b"bus 1": b'{"way":1}',
                                                     b"van-2": b'{"way":2}'}
        await store.delete(["bus 1"])
        assert await store.load_all() == {"van-2": b"x" * 10_000}
        assert await store.get_latest() == {"van-2": b'{"way":2}'}
        assert await other.load_all() == {"bus 1": b"not mine"}
    finally:
        await store.close()
        await other.close()


async def test_redisstore_checkpoint_expires_after_ttl(redis_server: RedisServer,
                                                       prefix: str) -> None:
    """A checkpoint not rewritten within its TTL is gone (idle vehicles are evicted)."""
    store = RedisStore(redis_server.url, key_prefix=f"{prefix}:")
    await store.connect()
    try:
        await store.save({"idle": b"1"}, ttl_s=0.2)
        await store.save({"busy": b"2"}, ttl_s=60)
        await asyncio.sleep(0.4)
        assert await store.load_all() == {"busy": b"2"}
    finally:
        await store.close()


async def test_redisstore_unreachable_raises_store_error() -> None:
    """No server: connect and save raise StoreError naming the URL; ping is False."""
    url = f"redis://:hunter2@127.0.0.1:{free_port()}/0"
    store = RedisStore(url, key_prefix="x:", timeout_s=0.5)
    with pytest.raises(StoreError, match=r"redis://:\*\*\*@127\.0\.0\.1:\d+/0: connect failed"):
        await store.connect()
    with pytest.raises(StoreError, match="saving 1 checkpoint"):
        await store.save({"a": b"1"}, ttl_s=1)
    assert await store.ping() is False
    await store.close()


def test_open_store_by_url() -> None:
    """memory:// gives a MemoryStore, redis:// a RedisStore; both are StateStores."""
    assert isinstance(open_store("memory://", key_prefix="p:"), MemoryStore)
    store = open_store("redis://127.0.0.1:1/0", key_prefix="p:")
    assert isinstance(store, RedisStore) and store.key_prefix == "p:"
    assert isinstance(store, StateStore) and isinstance(MemoryStore(), StateStore)
