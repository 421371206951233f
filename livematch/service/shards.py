"""Shards, leases and fenced checkpoints: how several ``livematch run`` workers share a fleet.

Vehicles map to ``n`` shards by a stable hash of their id (:func:`shard_of`), the same
in every process and every release. The workers of one group hold shards by leases in
Redis; a worker matches only the vehicles of the shards it holds.

Redis keys (all of one shard share the hash tag ``{s:NN}``, so they live on one Redis
Cluster slot and one Lua script may touch them together)::

    {prefix}{s:NN}:lease          string "worker-token:fence", expires after lease_s
    {prefix}{s:NN}:fence          integer, INCR on every acquisition (never expires)
    {prefix}{s:NN}:vehicle:ID     the vehicle's checkpoint blob, expires after idle_ttl_s
    {prefix}{s:NN}:vehicles       set of the shard's vehicle ids (index for restoring)
    {prefix}{s:NN}:latest         hash: vehicle -> its latest assignment record (JSON)
    {prefix}group:NAME:members    sorted set: worker -> expiry time (ms, Redis clock)
    {prefix}group:NAME:shards     the group's shard count (all workers must agree)
    {prefix}group:NAME:topic      the group's feed topic, mqtt.topic (all workers must agree)
    {prefix}group:NAME:receives   hash: worker -> the shard topics it receives ("3,11")
    {prefix}group:NAME:load       hash: version -> n, weights -> per-shard vehicles ("7,9,..")

Safety rests on two rules:

- a lease is taken with ``SET NX`` semantics and extended only by the holder of its
  random token (compare-and-extend in Lua); the worker stops using a shard at a local
  deadline that is never later than the lease's expiry in Redis;
- every acquisition increments the shard's fencing number, and every checkpoint write
  goes through a Lua script that refuses it unless the writer's fencing number is still
  the current one. A worker that stalled (GC pause, SIGSTOP, a slow disk) past its
  lease and woke up after another took the shard therefore cannot overwrite the newer
  state: its write is refused and it drops the shard.

Example:
    >>> shard_of("bus-17", 64), shard_of("bus-17", 64) == shard_of("bus-17", 64)
    (11, True)
    >>> shard_of("anything", 1)   # degenerate: one shard holds everything
    0
    >>> shard_tag(7, 64), shard_tag(7, 1000)
    ('s:07', 's:007')
"""

from __future__ import annotations

import hashlib
import logging
import math
import secrets
import threading
import time
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import redis
import redis.asyncio as aioredis
from redis.exceptions import NoScriptError, RedisError, ResponseError

from livematch.config import redact_url
from livematch.service.store import StoreError

log = logging.getLogger("livematch.shards")


def shard_of(vehicle: str, n_shards: int) -> int:
    """The shard (0..n_shards-1) of a vehicle id: BLAKE2b-64 of its UTF-8 bytes mod n.

    Stable across processes and Python versions (unlike ``hash()``), so every worker
    and every restart agrees.
    """
    digest = hashlib.blake2b(vehicle.encode("utf-8"), digest_size=8).digest()
    return int.from_bytes(digest, "big") % n_shards


def shard_tag(shard: int, n_shards: int) -> str:
    """The hash tag body of a shard, zero-padded to the width of the largest shard."""
    return f"s:{shard:0{len(str(max(0, n_shards - 1)))}d}"


def preference(worker: str, n_shards: int) -> list[int]:
    """The shards in the order this worker prefers them (rendezvous hashing).

    Different workers prefer different shards, so few of them race for the same free
    shard, and a worker's preferred set changes little when others join or leave.

    Example:
        >>> sorted(preference("w1", 4)) == [0, 1, 2, 3]
        True
        >>> preference("w1", 1)
        [0]
    """
    return sorted(range(n_shards), key=lambda shard: _score(worker, shard))


def rank_workers(shard: int, workers: Iterable[str]) -> list[str]:
    """The workers in the order they claim a shard (rendezvous hashing, as :func:`preference`).

    With a ``{shard}`` topic :func:`assign_shards` gives each shard, in turn, to the
    first of these with room below its share.

    Example:
        >>> rank_workers(3, ["w1", "w2"]) in (["w1", "w2"], ["w2", "w1"])
        True
        >>> rank_workers(3, [])
        []
    """
    return sorted(workers, key=lambda worker: _score(worker, shard))


def _score(worker: str, shard: int) -> bytes:
    return hashlib.blake2b(f"{worker}\0{shard}".encode(), digest_size=8).digest()


@dataclass(frozen=True, slots=True)
class Assignment:
    """Who holds each shard and who stands by for it, for one set of live workers.

    Made by :func:`assign_shards`. ``holder[s]`` matches shard ``s``; ``standby[s]``
    (None with a single worker) receives its topic and keeps its fixes, and is the
    worker that holds ``s`` once ``holder[s]`` is gone.

    Attributes:
        workers: the live workers, sorted.
        holder: per shard, the worker holding it.
        standby: per shard, the worker that takes it if its holder fails, or None.
    """

    workers: tuple[str, ...]
    holder: tuple[str, ...]
    standby: tuple[str | None, ...]

    def held_by(self, worker: str) -> set[int]:
        """The shards ``worker`` holds."""
        return {s for s, w in enumerate(self.holder) if w == worker}

    def standing_by(self, worker: str) -> set[int]:
        """The shards ``worker`` stands by for (never one it holds)."""
        return {s for s, w in enumerate(self.standby) if w == worker}


def _bounded_holders(ranked: Sequence[Sequence[str]], live: Sequence[str],
                     without: str | None = None) -> list[str]:
    """Bounded-load rendezvous: each shard, in shard order, to its best worker with room.

    ``ranked[s]`` is :func:`rank_workers` of shard ``s`` over ``live``; ``without`` is
    left out (as if it had failed). With n shards and W workers every worker ends with
    floor(n / W) or ceil(n / W) shards: a worker has room below floor(n / W), or at it
    while fewer than ``n mod W`` workers have gone above it. (A cap of ceil(n / W) alone
    can leave the last worker short by more than one: 22 / 22 / 20 for 64 on 3.)
    """
    workers = [w for w in live if w != without]
    if not workers:
        return []
    floor, extra = divmod(len(ranked), len(workers))
    count = dict.fromkeys(workers, 0)
    out: list[str] = []
    for ranking in ranked:
        for worker in ranking:
            if worker == without:
                continue
            c = count[worker]
            if c < floor or (c == floor and extra > 0):
                if c == floor:
                    extra -= 1
                count[worker] = c + 1
                out.append(worker)
                break
    return out


def _balanced(holder: Sequence[str], weights: Sequence[int],
              workers: Sequence[str]) -> list[str]:
    """``holder`` with shards moved from the busiest worker to the lightest while that helps.

    ``weights[s]`` is shard ``s``'s load (its vehicles). Each step takes the busiest
    and the lightest worker (by summed weight, ties by name) and moves one shard of
    the busiest whose weight ``w`` satisfies ``0 < w < gap`` (``gap`` = busiest minus
    lightest), the one whose ``w`` is nearest ``gap / 2`` (ties: the lowest shard), to
    the lightest. Every such move lowers the sum of squared loads (by
    ``2 w (gap - w)``), so the steps end; at the end the busiest holds no shard
    lighter than ``gap`` but above 0, so busiest - lightest <= the largest shard
    weight, and the busiest carries at most that much above the even share.
    Starting from the count-balanced assignment, the moves are few: none when the
    counts already balance the load (equal weights, or no vehicle at all).

    Example (two workers, 3 shards each; shard 0 is heavy):
        >>> _balanced(["a", "a", "a", "b", "b", "b"], [9, 1, 1, 1, 1, 1], ["a", "b"])
        ['a', 'b', 'b', 'b', 'b', 'b']
        >>> _balanced(["a", "b"], [0, 0], ["a", "b"])
        ['a', 'b']
    """
    out = list(holder)
    load = dict.fromkeys(workers, 0)
    held: dict[str, set[int]] = {w: set() for w in workers}
    for shard, worker in enumerate(out):
        load[worker] += weights[shard]
        held[worker].add(shard)
    for _ in range(len(out) * max(1, len(workers))):  # a bound; the loop ends sooner
        busiest = max(workers, key=lambda w: (load[w], w))
        lightest = min(workers, key=lambda w: (load[w], w))
        gap = load[busiest] - load[lightest]
        movable = [s for s in held[busiest] if 0 < weights[s] < gap]
        if not movable:
            break
        shard = min(movable, key=lambda s: (abs(gap - 2 * weights[s]), s))
        held[busiest].discard(shard)
        held[lightest].add(shard)
        load[busiest] -= weights[shard]
        load[lightest] += weights[shard]
        out[shard] = lightest
    return out


def assign_shards(n_shards: int, workers: Iterable[str],
                  weights: Sequence[int] | None = None) -> Assignment:
    """Even shares by bounded-load rendezvous hashing, and a standby for every failure.

    Deterministic given the set of live workers (every worker computes the same from
    the group's member list). Shards are taken in order, each by the highest-ranked
    worker (:func:`rank_workers`) that still has room below its share, so every worker
    holds floor(n / W) or ceil(n / W) shards. A shard's standby is the worker that
    would hold it if its holder failed: the same assignment computed without the
    holder. So every single failure moves each of the failed worker's shards to the
    worker that has been receiving its fixes. A failure (or a join) can also move a
    few shards between live workers, because their shares change; those are handed
    over (fenced checkpoint) by their live holder once the new holder receives their
    topic (``docs/scale.md``).

    ``weights`` (``group.balance_load``): per shard, its load (the vehicles in its
    checkpoint index, one snapshot every worker reads from Redis). The count-balanced
    assignment is then evened out by load (:func:`_balanced`): every worker carries at
    most the largest shard weight above the even share (total / W). The standby is
    still the holder after the holder's failure, with the same weights; without
    weights (None) the assignment is exactly the unweighted one.

    Example (8 shards on 3 workers: rendezvous alone gives 5 / 3 / 0):
        >>> a = assign_shards(8, ["w3", "w1", "w2"])
        >>> a.workers, sorted(len(a.held_by(w)) for w in a.workers)
        (('w1', 'w2', 'w3'), [2, 3, 3])
        >>> all(h != s for h, s in zip(a.holder, a.standby))
        True
        >>> assign_shards(4, ["w1"]).standby
        (None, None, None, None)
        >>> assign_shards(4, []).holder
        ()
        >>> assign_shards(8, ["w1", "w2", "w3"], [1] * 8) == a   # even weights: no move
        True
    """
    live = sorted(set(workers))
    if not live:
        return Assignment((), (), ())
    if weights is not None and (len(weights) != n_shards or min(weights, default=0) < 0):
        raise ValueError(f"weights must be {n_shards} counts >= 0, got {len(weights)} "
                         f"(smallest {min(weights, default=0)})")
    ranked = [rank_workers(shard, live) for shard in range(n_shards)]

    def holders(without: str | None = None) -> list[str]:
        out = _bounded_holders(ranked, live, without)
        if weights is None:
            return out
        return _balanced(out, weights, [w for w in live if w != without])

    holder = holders()
    if len(live) == 1:
        return Assignment(tuple(live), tuple(holder), (None,) * n_shards)
    after = {w: holders(without=w) for w in set(holder)}
    standby = [after[h][shard] for shard, h in enumerate(holder)]
    return Assignment(tuple(live), tuple(holder), tuple(standby))


def _int_or_zero(value: object) -> int:
    """A Redis reply as an int (bytes or str of digits), 0 when missing or not a number."""
    text = value.decode() if isinstance(value, bytes) else str(value or "")
    return int(text) if text.isdigit() else 0


def _parse_weights(value: object, n_shards: int) -> list[int] | None:
    """``"7,9,0"`` as ``[7, 9, 0]``; None unless exactly ``n_shards`` counts >= 0.

    Example:
        >>> _parse_weights(b"7,9,0", 3), _parse_weights("7,9", 3), _parse_weights(None, 3)
        ([7, 9, 0], None, None)
    """
    text = value.decode() if isinstance(value, bytes) else str(value or "")
    parts = text.split(",") if text else []
    if len(parts) != n_shards or not all(p.isdigit() for p in parts):
        return None
    return [int(p) for p in parts]


def target_share(n_shards: int, n_workers: int) -> int:
    """How many shards one worker aims at: ceil(shards / live workers).

    Example:
        >>> target_share(64, 3), target_share(64, 1), target_share(4, 0)
        (22, 64, 4)
    """
    return math.ceil(n_shards / max(1, n_workers))


# KEYS: lease, fence. ARGV: token, ttl_ms. Returns the new fencing number, or nil when
# the lease is held (by anyone).
_ACQUIRE = """
if redis.call('EXISTS', KEYS[1]) == 1 then return false end
local f = redis.call('INCR', KEYS[2])
redis.call('SET', KEYS[1], ARGV[1] .. ':' .. f, 'PX', ARGV[2])
return f
"""

# KEYS: lease. ARGV: value, ttl_ms. Compare-and-extend: 1 when extended, 0 when lost.
_RENEW = """
if redis.call('GET', KEYS[1]) == ARGV[1] then
  redis.call('PEXPIRE', KEYS[1], ARGV[2])
  return 1
end
return 0
"""

# KEYS: lease. ARGV: value. Compare-and-delete.
_RELEASE = """
if redis.call('GET', KEYS[1]) == ARGV[1] then return redis.call('DEL', KEYS[1]) end
return 0
"""

# KEYS: fence, index, latest, then the vehicle keys written, then those deleted.
# ARGV: fence, ttl_ms, n_blobs, n_latest, n_deleted, then (vehicle, blob) pairs,
# (vehicle, record) pairs and deleted vehicles. 1 when written, 0 when fenced out.
_SAVE = """
if redis.call('GET', KEYS[1]) ~= ARGV[1] then return 0 end
local nb, nl, nd = tonumber(ARGV[3]), tonumber(ARGV[4]), tonumber(ARGV[5])
local a = 6
for i = 1, nb do
  redis.call('SET', KEYS[3 + i], ARGV[a + 1], 'PX', ARGV[2])
  redis.call('SADD', KEYS[2], ARGV[a])
  a = a + 2
end
for i = 1, nl do
  redis.call('HSET', KEYS[3], ARGV[a], ARGV[a + 1])
  a = a + 2
end
for i = 1, nd do
  redis.call('DEL', KEYS[3 + nb + i])
  redis.call('SREM', KEYS[2], ARGV[a])
  redis.call('HDEL', KEYS[3], ARGV[a])
  a = a + 1
end
return 1
"""

# KEYS: members. ARGV: worker, ttl_ms ("0": leave). Expired members are removed; the
# live ones are returned, sorted. Uses the Redis clock so workers' clocks do not matter.
_MEMBERS = """
local t = redis.call('TIME')
local now = tonumber(t[1]) * 1000 + math.floor(tonumber(t[2]) / 1000)
redis.call('ZREMRANGEBYSCORE', KEYS[1], '-inf', now)
if ARGV[2] == '0' then
  redis.call('ZREM', KEYS[1], ARGV[1])
else
  redis.call('ZADD', KEYS[1], now + tonumber(ARGV[2]), ARGV[1])
end
return redis.call('ZRANGE', KEYS[1], 0, -1)
"""


# KEYS: load. ARGV: the version the writer read, the new version, the weights.
# Compare-and-set: 1 when written, 0 when another writer got there first.
_WRITE_LOAD = """
local v = redis.call('HGET', KEYS[1], 'version') or '0'
if v ~= ARGV[1] then return 0 end
redis.call('HSET', KEYS[1], 'version', ARGV[2], 'weights', ARGV[3])
return 1
"""


#: Seconds between renewal attempts while they fail (at most the renewal period).
_RETRY_S = 0.1


@dataclass(frozen=True, slots=True)
class Renewal:
    """One renewal round's outcome (:meth:`LeaseManager.renewal_round`).

    Attributes:
        sent: shard -> fencing number, the leases the round tried to extend.
        started: monotonic time before the request was sent (the new deadlines count
            from it, so they never fall after the leases' expiry in Redis).
        results: per shard of ``sent``, in order: 1 when extended, 0 when lost.
        members: the group's live workers, sorted; None when the round failed.
        error: why the round failed, else None.
        load_version: the version of the group's load snapshot (``group.balance_load``;
            0 when there is none or it was not read).
    """

    sent: dict[int, int]
    started: float
    results: list[object]
    members: list[str] | None
    error: StoreError | None
    load_version: int = 0


class RenewalThread:
    """Runs :meth:`LeaseManager.renewal_round` every ``period_s`` in a thread of its own.

    Each outcome goes to ``deliver`` (called in this thread: hand it to the event loop
    with ``loop.call_soon_threadsafe``). A round is due ``period_s`` after the previous
    one was sent; after a failure the next is tried ``_RETRY_S`` later (a lease held is
    lost a period after the last renewal that could not be repeated: waiting a whole
    period after a failed one lost every shard of a worker after Redis had been back for
    0.3 s, fault suite). The thread only
    waits on Redis, so it needs the GIL for microseconds per round.

    A thread that renews on its own would also keep the leases of a worker whose event
    loop is stuck for good (a bug, a deadlock): its shards would never fail over. So the
    event loop confirms the outcomes it applies (:meth:`applied`), and when one has
    waited longer than ``stall_s`` the thread renews nothing more until the loop
    confirms again: the leases lapse and a standby takes the shards over, as it would if
    the process had died. ``stall_s`` must be longer than the longest turn a healthy
    loop takes (under the fault flood on a busy machine turns lasted up to 0.4 s).

    Example::

        thread = RenewalThread(leases, redis.Redis.from_url(url), 2.0 / 3,
                               lambda r: loop.call_soon_threadsafe(apply, r))
        thread.start()
        ...
        thread.stop()    # waits for a round in progress (at most the client's timeout)
    """

    def __init__(self, leases: LeaseManager, client: redis.Redis, period_s: float,
                 deliver: Callable[[Renewal], object], *,
                 stall_s: float = math.inf) -> None:
        self.leases = leases
        self.client = client
        self.period_s = period_s
        self.deliver = deliver
        self.stall_s = stall_s
        self.stalled = False  # True while renewals are held back for a stuck event loop
        self._waiting_since: float | None = None  # an outcome delivered, not yet applied
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, name="lease-renewal", daemon=True)

    def start(self) -> None:
        """Start renewing (the first round at once)."""
        self._thread.start()

    def stop(self) -> None:
        """Stop renewing: no round starts after this returns; the client is closed."""
        self._stop.set()
        if self._thread.is_alive():
            self._thread.join()
        self.client.close()

    def applied(self) -> None:
        """Confirm (from the event loop) that the outcomes delivered so far were applied."""
        self._waiting_since = None

    def _run(self) -> None:
        due = time.monotonic()
        while not self._stop.wait(max(0.0, due - time.monotonic())):
            waiting = self._waiting_since
            if waiting is not None and time.monotonic() - waiting > self.stall_s:
                if not self.stalled:
                    log.error("event loop has applied no lease renewal for %.1f s: no "
                              "renewal until it does, so the leases can lapse",
                              time.monotonic() - waiting)
                self.stalled = True
                due = time.monotonic() + min(self.period_s, _RETRY_S)
                continue
            self.stalled = False
            renewal = self.leases.renewal_round(self.client)
            if renewal.error is None:
                due = renewal.started + self.period_s
            else:  # soon again: a lease lives only until a period after the last success
                due = time.monotonic() + min(self.period_s, _RETRY_S)
            if self._stop.is_set():
                return  # stopping: the event loop may be gone
            if self._waiting_since is None:  # set before the loop can confirm it
                self._waiting_since = time.monotonic()
            try:
                self.deliver(renewal)
            except RuntimeError:  # the event loop closed without stopping this thread
                return


def resp_command(out: list[bytes], args: Sequence[bytes | str | int], encoder: Any) -> None:
    """Append one command to ``out`` in the Redis protocol: an array of bulk strings.

    The bytes redis-py's own packer sends for the same arguments (``tests`` compare the
    two): ``*N``, then ``$LEN`` and the bytes of each argument, each line ending in CRLF
    (the same in RESP2 and RESP3 for a request). bytes go as they are, an int as its
    decimal digits, a str encoded as the client's ``encoder`` encodes it (UTF-8 by
    default); anything else through ``encoder.encode``, as redis-py packs it (a float
    as its ``repr``, a bool refused with redis-py's ``DataError``). Written out because
    redis-py's per-argument encoding and buffer growth cost about 10 µs a command of
    twenty arguments in a checkpoint round (``bench/load.py --checkpoint-cost``).
    """
    out.append(b"*%d\r\n" % len(args))
    encoding, errors = encoder.encoding, encoder.encoding_errors
    for arg in args:
        data: bytes
        if type(arg) is bytes:
            data = arg
        elif type(arg) is str:
            data = arg.encode(encoding, errors)
        elif type(arg) is int:
            data = b"%d" % arg
        else:
            data = encoder.encode(arg)
        out.append(b"$%d\r\n" % len(data))
        out.append(data)
        out.append(b"\r\n")


@dataclass(frozen=True)
class ShardWrite:
    """One shard's fenced write for :meth:`LeaseManager.save_many`.

    ``fence`` is the fencing number the shard was taken with; ``blobs`` the
    checkpoints to write, ``latest`` the latest records, ``deleted`` the vehicles
    whose checkpoint, index entry and latest record are removed. ``cleaned`` is the
    caller's (the daemon: the vehicles whose latest record counts as written once this
    write succeeds); not sent.
    """

    shard: int
    fence: int
    blobs: Mapping[str, bytes]
    latest: Mapping[str, bytes]
    deleted: list[str]
    cleaned: tuple[str, ...] = ()


class LeaseManager:
    """One worker's leases, membership and fenced checkpoint writes in Redis.

    Args:
        client: a ``redis.asyncio`` client (the caller closes it).
        url: the store URL, for messages (its password is redacted).
        prefix: the key prefix (``store.key_prefix``, without ``{ }``).
        group: the worker group's name.
        worker: this worker's name (unique within the group).
        n_shards: the number of shards (the same in every worker of the group).
        lease_s: lease duration, seconds.
        balance: read the group's load snapshot version with every renewal round
            (``group.balance_load`` above 0 with a ``{shard}`` topic).

    ``held`` maps each shard held to its fencing number. Every method that talks to
    Redis raises :class:`StoreError` when Redis cannot be reached.
    """

    def __init__(self, client: aioredis.Redis, *, url: str, prefix: str, group: str,
                 worker: str, n_shards: int, lease_s: float, balance: bool = False,
                 topic: str | None = None) -> None:
        self.client = client
        self.topic = topic
        self.balance = balance
        self.url = url
        self.prefix = prefix
        self.group = group
        self.worker = worker
        self.n_shards = n_shards
        self.lease_s = lease_s
        self.token = f"{worker}-{secrets.token_hex(8)}"
        self.held: dict[int, int] = {}
        self._deadline: dict[int, float] = {}
        self._earliest: float | None = None  # min of _deadline; None: to be recomputed
        self._members_key = f"{prefix}group:{group}:members"
        self._receives_key = f"{prefix}group:{group}:receives"
        self._load_key = f"{prefix}group:{group}:load"
        self._acquire = client.register_script(_ACQUIRE)
        self._renew = client.register_script(_RENEW)
        self._release = client.register_script(_RELEASE)
        self._save = client.register_script(_SAVE)
        self._members = client.register_script(_MEMBERS)
        self._write_load = client.register_script(_WRITE_LOAD)

    # -- keys ------------------------------------------------------------------------

    def key(self, shard: int, name: str) -> str:
        """``{prefix}{s:NN}:name``: a key of one shard."""
        return f"{self.prefix}{{{shard_tag(shard, self.n_shards)}}}:{name}"

    def vehicle_key(self, shard: int, vehicle: str) -> str:
        """``{prefix}{s:NN}:vehicle:ID``: a vehicle's checkpoint."""
        return self.key(shard, f"vehicle:{vehicle}")

    @property
    def _ttl_ms(self) -> int:
        return max(1, math.ceil(self.lease_s * 1000))

    def _fail(self, action: str, exc: Exception) -> StoreError:
        return StoreError(f"redis {redact_url(self.url)}: {action} failed: {exc}")

    # -- membership ------------------------------------------------------------------

    async def join(self) -> None:
        """Check that the group's shard count and feed topic are ours (the first records them).

        Which worker matches a vehicle is decided by the race for its shard's lease, not
        by what the worker is fed, so every worker of a group must receive the same feed:
        a fix that reaches only a worker not holding its shard is acknowledged, kept for
        a takeover and never answered, silently (docs/scale.md, "Which worker answers").
        A worker configured with another ``mqtt.topic`` is therefore refused at the
        start, like one with another shard count. The topic is checked only when the
        manager was given one (``topic``). To change either for a whole group, stop its
        workers and delete the key named in the error.

        Raises:
            StoreError: Redis is unreachable, or the group runs with another shard count
                or another topic.
        """
        key = f"{self.prefix}group:{self.group}:shards"
        topic_key = f"{self.prefix}group:{self.group}:topic"
        try:
            await self.client.set(key, self.n_shards, nx=True)
            found = await self.client.get(key)
            if self.topic is not None:
                await self.client.set(topic_key, self.topic, nx=True)
                found_topic = await self.client.get(topic_key)
            else:
                found_topic = None
        except (RedisError, OSError) as exc:
            raise self._fail("joining the group", exc) from exc
        if found is not None and int(found) != self.n_shards:
            raise StoreError(f"group {self.group!r} under prefix {self.prefix!r} runs with "
                             f"{int(found)} shards, this worker has group.shards = "
                             f"{self.n_shards}")
        if found_topic is not None:
            text = found_topic.decode() if isinstance(found_topic, bytes) else str(found_topic)
            if text != self.topic:
                raise StoreError(
                    f"group {self.group!r} under prefix {self.prefix!r} is fed topic "
                    f"{text!r}, this worker has mqtt.topic = {self.topic!r}: every worker "
                    f"of a group must receive the same feed (to change it, stop the "
                    f"group's workers and delete the Redis key {topic_key!r})")

    async def heartbeat(self, *, leave: bool = False) -> list[str]:
        """Announce this worker for one lease period (or leave); the live members, sorted.

        A worker that died drops out of the list when its leases expire, so the others'
        share grows in time to take its shards.
        """
        ttl = "0" if leave else str(self._ttl_ms)
        try:
            names = await self._members(keys=[self._members_key], args=[self.worker, ttl])
        except (RedisError, OSError) as exc:
            raise self._fail("announcing the worker", exc) from exc
        return sorted(n.decode() if isinstance(n, bytes) else str(n) for n in names)

    async def announce_receiving(self, shards: Iterable[int]) -> None:
        """Record the shard topics this worker receives now (after their SUBACK).

        With the shard in the topic, a live worker hands a shard over to its new holder
        only once this record of the new holder names it: the new holder then has
        every fix published after the hand-over's checkpoint.
        """
        value = ",".join(str(s) for s in sorted(shards))
        try:
            await self.client.hset(self._receives_key, self.worker, value)
        except (RedisError, OSError) as exc:
            raise self._fail("announcing the shard topics received", exc) from exc

    async def receiving(self, workers: Iterable[str]) -> dict[str, set[int]]:
        """The shard topics each of ``workers`` last recorded receiving (empty if none)."""
        names = sorted(set(workers))
        if not names:
            return {}
        try:
            values = await self.client.hmget(self._receives_key, names)
        except (RedisError, OSError) as exc:
            raise self._fail("reading the shard topics received", exc) from exc
        out: dict[str, set[int]] = {}
        for name, value in zip(names, values, strict=True):
            text = value.decode() if isinstance(value, bytes) else (value or "")
            out[name] = {int(s) for s in text.split(",") if s}
        return out

    async def stop_receiving(self) -> None:
        """Remove this worker's record of the shard topics it receives (on leaving)."""
        try:
            await self.client.hdel(self._receives_key, self.worker)
        except (RedisError, OSError) as exc:
            raise self._fail("removing the shard topics received", exc) from exc

    # -- load snapshot (group.balance_load) --------------------------------------------

    async def shard_sizes(self) -> list[int]:
        """Per shard, the vehicles in its checkpoint index (one pipeline of ``SCARD``).

        A vehicle enters the index with its first checkpoint and leaves it when it is
        dropped after ``store.idle_ttl_s`` idle, so the count follows the fleet with a
        delay of one checkpoint interval.
        """
        values = await self._each_shard(lambda pipe, shard: pipe.scard(self.key(shard, "vehicles")),
                                        "counting the shards' vehicles")
        return [int(v) for v in values]

    async def _each_shard(self, command: Callable[[Any, int], object], what: str) -> list[Any]:
        """One command per shard in one pipeline round trip; the replies in shard order.

        ``command(pipe, shard)`` queues the shard's command; ``what`` names the step in
        the :class:`StoreError` raised when Redis cannot be reached.
        """
        try:
            async with self.client.pipeline(transaction=False) as pipe:
                for shard in range(self.n_shards):
                    command(pipe, shard)
                return list(await pipe.execute())
        except (RedisError, OSError) as exc:
            raise self._fail(what, exc) from exc

    async def read_load(self) -> tuple[int, list[int] | None]:
        """The group's load snapshot: (version, per-shard weights); (0, None) when none.

        Weights of another shard count (not one per shard) are returned as None: the
        snapshot is then not used (the group's shard count is checked at join anyway).
        """
        try:
            version, text = await self.client.hmget(self._load_key, ["version", "weights"])
        except (RedisError, OSError) as exc:
            raise self._fail("reading the load snapshot", exc) from exc
        weights = _parse_weights(text, self.n_shards)
        return _int_or_zero(version), weights

    async def write_load(self, read_version: int,
                         weights: Sequence[int] | None) -> int | None:
        """Write a new load snapshot over version ``read_version``; the new version.

        ``weights`` None writes a snapshot without weights (the assignment by count).
        None when the snapshot is no longer ``read_version`` (another worker wrote one
        since: compare-and-set, so two writers never interleave their weights).
        """
        new = read_version + 1
        try:
            done = await self._write_load(
                keys=[self._load_key],
                args=[str(read_version), str(new),
                      ",".join(str(int(w)) for w in weights or ())])
        except (RedisError, OSError) as exc:
            raise self._fail("writing the load snapshot", exc) from exc
        return new if done == 1 else None

    # -- leases ----------------------------------------------------------------------

    async def owners(self) -> dict[int, str | None]:
        """Every shard's lease value (``worker-token:fence``), None when free."""
        values = await self._each_shard(lambda pipe, shard: pipe.get(self.key(shard, "lease")),
                                        "reading the leases")
        return {s: (v.decode() if isinstance(v, bytes) else v) for s, v in enumerate(values)}

    async def acquire(self, shard: int) -> int | None:
        """Take a free shard: its new fencing number, or None when someone holds it."""
        started = time.monotonic()
        try:
            fence = await self._acquire(keys=[self.key(shard, "lease"), self.key(shard, "fence")],
                                        args=[self.token, self._ttl_ms])
        except (RedisError, OSError) as exc:
            raise self._fail(f"acquiring shard {shard}", exc) from exc
        if fence is None:
            return None
        self.held[shard] = int(fence)
        self._deadline[shard] = started + self.lease_s
        self._earliest = None
        return int(fence)

    async def renew(self) -> list[int]:
        """Extend every lease held; the shards whose lease was lost (and are forgotten)."""
        shards = sorted(self.held)
        if not shards:
            return []
        sent = {shard: self.held[shard] for shard in shards}
        started = time.monotonic()
        try:
            async with self.client.pipeline(transaction=False) as pipe:
                for shard in shards:
                    await self._renew(keys=[self.key(shard, "lease")],
                                      args=[self._value(shard), self._ttl_ms], client=pipe)
                results = await pipe.execute()
        except (RedisError, OSError) as exc:
            raise self._fail(f"renewing {len(shards)} lease(s)", exc) from exc
        return self._settle(sent, started, results)

    def renewal_round(self, client: redis.Redis) -> Renewal:
        """Renew every lease held and announce this worker, in one round trip on ``client``.

        Blocking: run by :class:`RenewalThread`, with a synchronous client of its own,
        so that renewals do not wait for the event loop. Every wait of an asyncio
        renewal (a request sent, its reply read) lasts at least one turn of the event
        loop, and a turn lasts as long as all the steps run in it: under a flood on a
        busy machine turns of 0.1-0.4 s made renewal gaps of up to 5.7 s and expired a
        2 s lease (fault suite, load average 8-10). The leases held are read, not
        changed: :meth:`apply` applies the outcome in the event loop's thread. One
        pipeline of plain EVALs (Redis compiles a script once and keeps it; scripts
        registered with ``register_script`` would add a ``SCRIPT EXISTS`` round trip).
        """
        sent = dict(list(self.held.items()))  # one C-level copy: safe beside the loop
        started = time.monotonic()
        try:
            pipe = client.pipeline(transaction=False)
            for shard, fence in sent.items():
                pipe.eval(_RENEW, 1, self.key(shard, "lease"), f"{self.token}:{fence}",
                          self._ttl_ms)
            pipe.eval(_MEMBERS, 1, self._members_key, self.worker, str(self._ttl_ms))
            if self.balance:
                pipe.hget(self._load_key, "version")
            results = pipe.execute()
        except (RedisError, OSError) as exc:
            return Renewal(sent, started, [], None, self._fail(
                f"renewing {len(sent)} lease(s) and announcing the worker", exc))
        version = 0
        if self.balance:
            version = _int_or_zero(results.pop())
        members = sorted(n.decode() if isinstance(n, bytes) else str(n)
                         for n in results[-1])
        return Renewal(sent, started, list(results[:-1]), members, None, version)

    def apply(self, renewal: Renewal) -> list[int]:
        """Apply a :meth:`renewal_round` (in the event loop's thread); the shards lost.

        Example (a round that renewed nothing and failed changes nothing)::

            leases.apply(Renewal({}, 0.0, [], None, StoreError("down")))   # []
        """
        if renewal.error is not None:
            return []
        return self._settle(renewal.sent, renewal.started, renewal.results)

    def _settle(self, sent: Mapping[int, int], started: float,
                results: Sequence[object]) -> list[int]:
        """Apply renewal replies (1: extended) to the shards ``sent`` (shard -> fence).

        A renewed shard's deadline is ``started`` (before the request) plus ``lease_s``;
        a shard not renewed is forgotten and returned.
        """
        lost = []
        for (shard, fence), ok in zip(sent.items(), results, strict=True):
            if self.held.get(shard) != fence:
                continue  # released (or lost and taken again) while the renewal was out
            if ok == 1:
                self._deadline[shard] = started + self.lease_s
                self._earliest = None
            else:
                lost.append(shard)
                self.forget(shard)
        return lost

    def expired(self, now: float | None = None) -> list[int]:
        """Shards whose lease may have run out (no renewal confirmed in time); forgotten.

        The deadline is counted from before the renewal was sent, so it never falls
        after the lease's expiry in Redis: past it, another worker may hold the shard.
        """
        now = time.monotonic() if now is None else now
        gone = sorted(s for s, d in self._deadline.items() if d <= now)
        for shard in gone:
            self.forget(shard)
        return gone

    def next_deadline(self) -> float:
        """The earliest local lease deadline (monotonic seconds), inf when none is held.

        Asked for every message a worker receives: the minimum is kept until a deadline
        changes (a renewal, an acquisition, a shard forgotten), not recomputed over every
        shard held each time.
        """
        if self._earliest is None:
            self._earliest = min(self._deadline.values(), default=math.inf)
        return self._earliest

    def forget(self, shard: int) -> None:
        """Stop considering a shard held (without telling Redis)."""
        self.held.pop(shard, None)
        if self._deadline.pop(shard, None) is not None:
            self._earliest = None

    async def release(self, shard: int) -> None:
        """Give a shard up now (compare-and-delete), so another worker can take it."""
        value = self._value(shard)
        self.forget(shard)
        try:
            await self._release(keys=[self.key(shard, "lease")], args=[value])
        except (RedisError, OSError) as exc:
            raise self._fail(f"releasing shard {shard}", exc) from exc

    def _value(self, shard: int) -> str:
        return f"{self.token}:{self.held[shard]}"

    # -- fenced state ----------------------------------------------------------------

    async def save(self, shard: int, *, fence: int, blobs: Mapping[str, bytes],
                   latest: Mapping[str, bytes], deleted: Iterable[str], ttl_s: float) -> bool:
        """Write a shard's checkpoints, latest records and deletions, fenced.

        Returns False (writing nothing) when ``fence`` is no longer the shard's current
        fencing number: another worker took the shard since.
        """
        keys, args = self._save_call(ShardWrite(shard, fence, blobs, latest, list(deleted)),
                                     ttl_s)
        try:
            return bool(await self._save(keys=keys, args=args) == 1)
        except (RedisError, OSError) as exc:
            raise self._fail(f"saving shard {shard}", exc) from exc

    def _save_call(self, write: ShardWrite, ttl_s: float) -> tuple[list[str], list[Any]]:
        """The keys and arguments of the ``_SAVE`` script for one shard's write."""
        shard, gone = write.shard, write.deleted
        keys = [self.key(shard, "fence"), self.key(shard, "vehicles"), self.key(shard, "latest")]
        keys += [self.vehicle_key(shard, v) for v in write.blobs]
        keys += [self.vehicle_key(shard, v) for v in gone]
        args: list[Any] = [write.fence, max(1, math.ceil(ttl_s * 1000)), len(write.blobs),
                           len(write.latest), len(gone)]
        for vehicle, blob in write.blobs.items():
            args += [vehicle, blob]
        for vehicle, record in write.latest.items():
            args += [vehicle, record]
        args += gone
        return keys, args

    async def save_many(self, writes: Sequence[ShardWrite], *, ttl_s: float) -> list[bool]:
        """:meth:`save` for several shards in one round trip; whether each was written.

        Each shard's write is the same fenced script as :meth:`save`, sent in order in
        one request (not a transaction: each is checked against its own shard's fence,
        as one by one). One by one, every write cost the worker a request and a reply
        through the asyncio client, about 160 µs of CPU, against about 40 µs each in a
        redis-py pipeline of 32 (a throwaway measurement at load average 10); a
        checkpoint round of a worker holding 32 shards writes most of them (the latest
        records of every vehicle answered since the last round). The request is packed
        here (:func:`resp_command`) and sent on a connection of the client's pool
        (:meth:`_exchange`), not through a redis-py pipeline, whose per-argument
        encoding and packing cost most of the round: about 0.8 against 0.5 ms of CPU a
        round of 32 shards (``bench/load.py --checkpoint-cost``; docs/measured.md
        "Session 26 (shell26)"). A write whose script Redis does not have cached
        (restarted, ``SCRIPT FLUSH``) is sent again through :meth:`save`, which loads
        it. Raises :class:`StoreError` as :meth:`save` does; the writes before the
        failing one may then have been made (each is fenced and the caller writes them
        again, as after a failed :meth:`save`).
        """
        if not writes:
            return []
        try:
            encoder = self.client.connection_pool.get_encoder()
            sha = self._save.sha
            request: list[bytes] = []
            for write in writes:
                keys, args = self._save_call(write, ttl_s)
                resp_command(request, ("EVALSHA", sha, len(keys), *keys, *args), encoder)
            results = await self._exchange(b"".join(request), len(writes))
        except (RedisError, OSError) as exc:
            raise self._fail(f"saving {len(writes)} shard(s)", exc) from exc
        out: list[bool] = []
        for write, result in zip(writes, results, strict=True):
            if isinstance(result, NoScriptError):
                out.append(await self.save(write.shard, fence=write.fence, blobs=write.blobs,
                                           latest=write.latest, deleted=write.deleted,
                                           ttl_s=ttl_s))
            elif isinstance(result, Exception):
                raise self._fail(f"saving shard {write.shard}", result)
            else:
                out.append(result == 1)
        return out

    async def _exchange(self, request: bytes, replies: int) -> list[Any]:
        """Send packed commands on a connection of the client's pool; their replies.

        What a redis-py pipeline's ``execute`` does with the request it packs: one
        connection from the pool, the whole request written at once, every reply read
        (an error reply is kept in its place as the exception, the rest still read, so
        the connection stays in step), the connection dropped if reading stops early
        (cancelled, or a broken connection), and a connection error or timeout retried
        under the client's retry policy (the connection closed, a new one made). The
        connection goes back to the pool in every case.
        """
        pool = self.client.connection_pool
        conn = await pool.get_connection()

        async def once() -> list[Any]:
            out: list[Any] = []
            try:
                await conn.send_packed_command(request)
                for _ in range(replies):
                    try:
                        out.append(await conn.read_response())
                    except ResponseError as exc:
                        out.append(exc)
            except BaseException:
                await conn.disconnect(nowait=True)  # the request or its replies half done
                raise
            return out

        async def failed(error: Exception) -> None:
            await conn.disconnect()

        try:
            return await conn.retry.call_with_retry(once, failed)
        finally:
            await pool.release(conn)

    async def load(self, shard: int) -> dict[str, bytes]:
        """Every checkpoint of a shard, by vehicle (expired ones are skipped)."""
        try:
            members = await self.client.smembers(self.key(shard, "vehicles"))
            names = sorted(m.decode() if isinstance(m, bytes) else str(m) for m in members)
            out: dict[str, bytes] = {}
            for start in range(0, len(names), 500):
                batch = names[start:start + 500]
                blobs = await self.client.mget([self.vehicle_key(shard, v) for v in batch])
                for vehicle, blob in zip(batch, blobs, strict=True):
                    if isinstance(blob, bytes):
                        out[vehicle] = blob
        except (RedisError, OSError) as exc:
            raise self._fail(f"loading shard {shard}", exc) from exc
        return out
