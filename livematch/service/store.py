"""Where per-vehicle checkpoints and the fleet's latest assignments live.

A :class:`StateStore` keeps two things under one key prefix:

- one checkpoint blob per vehicle (``Pipeline.export_vehicle``), written every K fixes
  or T seconds and on shutdown, read back at start so a restarted daemon continues
  every vehicle's certificate window instead of starting over;
- the latest assignment record of every vehicle in one hash, so a dispatch screen
  reads the whole fleet in one call (Redis: ``HGETALL {prefix}latest``).

Redis key layout (``prefix`` defaults to ``livematch:``)::

    {prefix}vehicle:{vehicle}   string: the checkpoint blob, expires after idle_ttl_s
    {prefix}latest              hash: vehicle -> JSON assignment record

:class:`MemoryStore` is the default (state dies with the process); :class:`RedisStore`
is the real one. Both are asyncio-native and raise :class:`StoreError` when the backend
cannot be reached, so the daemon can count, log and retry.

Example:
    >>> import asyncio
    >>> async def demo() -> dict[str, bytes]:
    ...     store = MemoryStore()
    ...     await store.save({"bus-17": b"state"}, ttl_s=60)
    ...     await store.delete(["nobody"])  # degenerate: deleting an unknown vehicle
    ...     return await store.load_all()
    >>> asyncio.run(demo())
    {'bus-17': b'state'}
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping
from typing import Any, Protocol, runtime_checkable

import redis
import redis.asyncio as aioredis
from redis.exceptions import RedisError

from livematch.config import redact_url
from livematch.errors import LivematchError


class StoreError(LivematchError):
    """The state store cannot be reached or refused an operation."""


@runtime_checkable
class StateStore(Protocol):
    """Per-vehicle checkpoints and the latest assignment of every vehicle."""

    async def connect(self) -> None:
        """Open the connection (and check it answers)."""

    async def close(self) -> None:
        """Release the connection."""

    async def ping(self) -> bool:
        """True when the backend answers now."""

    async def save(self, blobs: Mapping[str, bytes], *, ttl_s: float) -> None:
        """Write checkpoints; each expires after ``ttl_s`` seconds without a rewrite."""

    async def load_all(self) -> dict[str, bytes]:
        """Every checkpoint under the prefix, by vehicle."""

    async def delete(self, vehicles: Iterable[str]) -> None:
        """Forget vehicles: their checkpoints and their latest assignments."""

    async def set_latest(self, records: Mapping[str, bytes]) -> None:
        """Record the latest assignment (JSON bytes) of some vehicles."""

    async def get_latest(self) -> dict[str, bytes]:
        """The latest assignment of every vehicle."""


class MemoryStore:
    """The in-process store: nothing survives the process; never fails.

    TTLs are not enforced here (the daemon evicts idle vehicles by fix time anyway).
    """

    def __init__(self) -> None:
        self._blobs: dict[str, bytes] = {}
        self._latest: dict[str, bytes] = {}

    async def connect(self) -> None:
        """Nothing to open."""

    async def close(self) -> None:
        """Nothing to release."""

    async def ping(self) -> bool:
        """Always reachable."""
        return True

    async def save(self, blobs: Mapping[str, bytes], *, ttl_s: float) -> None:
        """Keep the blobs (``ttl_s`` is ignored)."""
        self._blobs.update(blobs)

    async def load_all(self) -> dict[str, bytes]:
        """A copy of every blob."""
        return dict(self._blobs)

    async def delete(self, vehicles: Iterable[str]) -> None:
        """Drop the vehicles' blobs and latest records."""
        for vehicle in vehicles:
            self._blobs.pop(vehicle, None)
            self._latest.pop(vehicle, None)

    async def set_latest(self, records: Mapping[str, bytes]) -> None:
        """Keep the latest records."""
        self._latest.update(records)

    async def get_latest(self) -> dict[str, bytes]:
        """A copy of the latest records."""
        return dict(self._latest)


class RedisStore:
    """Checkpoints in Redis (``redis.asyncio``), under ``key_prefix``.

    Args:
        url: ``redis://HOST:PORT/DB`` (``rediss://`` for TLS); a password in the URL is
            used but never appears in messages.
        key_prefix: prepended to every key; use a hash tag such as ``{fleet1}:`` to
            keep one fleet's keys on one Redis Cluster slot.
        timeout_s: socket timeout of every command, seconds.
        password, username, ca_file: see :func:`redis_client`.
    """

    def __init__(self, url: str, *, key_prefix: str = "livematch:",
                 timeout_s: float = 2.0, password: str | None = None,
                 username: str | None = None, ca_file: str | None = None) -> None:
        self.url = url
        self.key_prefix = key_prefix
        self._vehicle_prefix = f"{key_prefix}vehicle:"
        self._latest_key = f"{key_prefix}latest"
        self._redis: aioredis.Redis = redis_client(
            url, timeout_s=timeout_s, password=password, username=username, ca_file=ca_file)

    def _fail(self, action: str, exc: Exception) -> StoreError:
        return StoreError(f"redis {redact_url(self.url)}: {action} failed: {exc}")

    async def connect(self) -> None:
        """Check that Redis answers; raises StoreError when it does not."""
        try:
            await self._redis.ping()
        except (RedisError, OSError) as exc:
            raise self._fail("connect", exc) from exc

    async def close(self) -> None:
        """Close the connection pool."""
        await self._redis.aclose()

    async def ping(self) -> bool:
        """True when Redis answers PING now."""
        try:
            return bool(await self._redis.ping())
        except (RedisError, OSError):
            return False

    async def save(self, blobs: Mapping[str, bytes], *, ttl_s: float) -> None:
        """SET each blob with an expiry of ``ttl_s`` (rounded up to whole ms), in one trip."""
        if not blobs:
            return
        ttl_ms = max(1, math.ceil(ttl_s * 1000))
        try:
            async with self._redis.pipeline(transaction=False) as pipe:
                for vehicle, blob in blobs.items():
                    pipe.set(self._vehicle_prefix + vehicle, blob, px=ttl_ms)
                await pipe.execute()
        except (RedisError, OSError) as exc:
            raise self._fail(f"saving {len(blobs)} checkpoint(s)", exc) from exc

    async def load_all(self) -> dict[str, bytes]:
        """SCAN the vehicle keys under the prefix and MGET them in batches."""
        out: dict[str, bytes] = {}
        try:
            keys = [key async for key in self._redis.scan_iter(
                match=self._vehicle_prefix + "*", count=500)]
            for start in range(0, len(keys), 500):
                batch = keys[start:start + 500]
                for key, blob in zip(batch, await self._redis.mget(batch), strict=True):
                    if isinstance(blob, bytes):  # None: expired between SCAN and MGET
                        out[_text(key)[len(self._vehicle_prefix):]] = blob
        except (RedisError, OSError) as exc:
            raise self._fail("loading checkpoints", exc) from exc
        return out

    async def delete(self, vehicles: Iterable[str]) -> None:
        """DEL the checkpoints and HDEL the latest records of ``vehicles``."""
        names = list(vehicles)
        if not names:
            return
        try:
            async with self._redis.pipeline(transaction=False) as pipe:
                pipe.delete(*[self._vehicle_prefix + v for v in names])
                pipe.hdel(self._latest_key, *names)
                await pipe.execute()
        except (RedisError, OSError) as exc:
            raise self._fail(f"deleting {len(names)} vehicle(s)", exc) from exc

    async def set_latest(self, records: Mapping[str, bytes]) -> None:
        """HSET the records into ``{prefix}latest``."""
        if not records:
            return
        try:
            await self._redis.hset(self._latest_key, mapping=dict(records))  # type: ignore[arg-type]
        except (RedisError, OSError) as exc:
            raise self._fail("writing latest assignments", exc) from exc

    async def get_latest(self) -> dict[str, bytes]:
        """HGETALL ``{prefix}latest``."""
        try:
            raw = await self._redis.hgetall(self._latest_key)
        except (RedisError, OSError) as exc:
            raise self._fail("reading latest assignments", exc) from exc
        return {_text(k): v.encode() if isinstance(v, str) else v for k, v in raw.items()}


def _text(value: bytes | str) -> str:
    return value.decode() if isinstance(value, bytes) else value


def redis_client(url: str, *, timeout_s: float = 2.0, password: str | None = None,
                 username: str | None = None, ca_file: str | None = None) -> aioredis.Redis:
    """A ``redis.asyncio`` client for ``url`` with AUTH and TLS settings.

    Args:
        url: ``redis://HOST:PORT/DB`` or ``rediss://`` (TLS).
        timeout_s: connect and command timeout, seconds.
        password: AUTH password; None keeps the URL's (if any). It is handed to the
            client only, never formatted into a message.
        username: ACL user name; None or "" keeps the URL's (or Redis's ``default``).
        ca_file: CA bundle that signs the server's certificate, for ``rediss://``; None:
            the system's trust store.

    Example (no connection is made until the first command):
        >>> client = redis_client("redis://127.0.0.1:1/0", password="s3cret")
        >>> "s3cret" in repr(client)
        False
    """
    return aioredis.Redis.from_url(url, **_redis_options(url, timeout_s, password, username,
                                                         ca_file))


def redis_sync_client(url: str, *, timeout_s: float = 2.0, password: str | None = None,
                      username: str | None = None, ca_file: str | None = None
                      ) -> redis.Redis:
    """A blocking ``redis`` client with the settings of :func:`redis_client`.

    For a thread that must not wait for the event loop (the lease renewals).

    Example (no connection is made until the first command):
        >>> client = redis_sync_client("redis://127.0.0.1:1/0", password="s3cret")
        >>> "s3cret" in repr(client)
        False
    """
    return redis.Redis.from_url(url, **_redis_options(url, timeout_s, password, username,
                                                      ca_file))


def _redis_options(url: str, timeout_s: float, password: str | None, username: str | None,
                   ca_file: str | None) -> dict[str, Any]:
    kwargs: dict[str, Any] = {"socket_timeout": timeout_s,
                              "socket_connect_timeout": timeout_s}
    if password is not None:
        kwargs["password"] = password
    if username:
        kwargs["username"] = username
    if url.startswith("rediss://") and ca_file:
        kwargs["ssl_ca_certs"] = ca_file
    return kwargs


def open_store(url: str, *, key_prefix: str, password: str | None = None,
               username: str | None = None, ca_file: str | None = None) -> StateStore:
    """The store for a ``[store] url``: ``memory://`` or ``redis://…`` (``rediss://``).

    Example:
        >>> type(open_store("memory://", key_prefix="x:")).__name__
        'MemoryStore'
    """
    if url == "memory://":
        return MemoryStore()
    return RedisStore(url, key_prefix=key_prefix, password=password, username=username,
                      ca_file=ca_file)
