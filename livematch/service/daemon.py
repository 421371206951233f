"""The live daemon: MQTT fixes in, matched roads and alerts out, state kept safe.

One :class:`Daemon` runs these named tasks under one :class:`asyncio.TaskGroup`:

- ``mqtt-connection``: connect (backing off on failure), subscribe, and per connection
  ``mqtt-receive`` (decode, match, queue outputs, then acknowledge, one message at a
  time in arrival order, so one vehicle's fixes are processed in order) and
  ``mqtt-publish`` (send the queued outputs with QoS 1, oldest first; an output leaves
  the queue only once the broker acknowledged it, so a broker outage delays outputs
  but loses none);
- ``checkpoint``: write vehicles' state every K fixes or T seconds, the latest
  assignments, evict idle vehicles, and give the pipeline the clock for ``stale`` alerts
  of silent vehicles (only once connected for ``stale_s``: see :meth:`Daemon._may_tick`);
- ``store-watch``: ping the store for ``/readyz``;
- ``leases`` and ``shards`` (only in a worker group, ``[group] name``): ``leases``
  announces this worker and renews its leases every ``lease_s / 3`` (never waiting
  behind a takeover); ``shards`` then takes free shards up to its share (restore their
  vehicles from Redis, replay the fixes kept for them, yielding every
  ``_REPLAY_CHUNK`` messages) and hands excess shards over (fenced checkpoint, then
  release). Fixes of shards held elsewhere are acknowledged unmatched; every possible
  fix is kept for ``group.buffer_s`` seconds and replayed when its shard is taken, so a
  takeover after a crash (or after this worker lost Redis) loses none of them. With a
  ``{shard}`` level in ``mqtt.topic`` a worker subscribes only to the shards it holds
  and stands by for; see :mod:`livematch.service.shards` and ``docs/scale.md``.

Outputs wait in two bounded queues, published oldest first: assignments, commits and
alerts, then rejects (``publish.reject_queue_max``; beyond it rejects are counted, not
published), so a flood of bad input never delays an answer.

Bad input never stops the daemon: the pipeline turns it into a reject record that goes
to the dead-letter topic; even an unexpected error while handling one message becomes
a reject (``internal_error``) and is logged with its traceback. Background loops log,
count and recover.

Shutdown (:meth:`Daemon.request_stop`, wired to SIGTERM / SIGINT by ``livematch run``):
stop taking messages (those not yet taken stay unacknowledged and the broker sends them
again next session), publish what is queued (bounded by ``publish.shutdown_grace_s``),
disconnect, checkpoint every vehicle, close the store.
"""

from __future__ import annotations

import asyncio
import contextlib
import functools
import gc
import json
import logging
import math
import os
import re
import socket
import time
import zlib
from collections import Counter, deque
from collections.abc import Callable, Coroutine, Mapping
from dataclasses import replace
from typing import Any, Protocol

import aiomqtt
import msgspec

from livematch.config import DaemonConfig, MqttConfig, parse_hostport, redact_url
from livematch.core.events import plain_json
from livematch.feed.decode import (
    SHARD_LEVEL,
    known_vehicle,
    looks_like_position,
    shard_from_topic,
    vehicle_from_topic,
)
from livematch.pipeline import REJECT_PAYLOAD_CHARS, Output, UnknownVehicleError
from livematch.service.allocator import Trimmer
from livematch.service.http import HealthServer
from livematch.service.logs import fields
from livematch.service.metrics import Metrics
from livematch.service.mqtt import (
    ACK_ONLY_KEY,
    JUNK_KEY,
    IntakeQueue,
    ack,
    ack_mid,
    backoff_delays,
    buffered_reads,
    cap_inflight,
    drain,
    lean_receive,
    make_client,
    on_acknowledged,
    publish_now,
    read_now,
    until_answered,
    write_soon,
)
from livematch.service.shards import (
    Assignment,
    LeaseManager,
    Renewal,
    RenewalThread,
    ShardWrite,
    assign_shards,
    preference,
    shard_of,
    target_share,
)
from livematch.service.store import (
    StateStore,
    StoreError,
    open_store,
    redis_client,
    redis_sync_client,
)

log = logging.getLogger("livematch.daemon")

# How often the checkpoint loop wakes (seconds): bounds how stale {prefix}latest is.
_TICK_S = 0.5
# How often the store is pinged for /readyz (seconds).
_STORE_PING_S = 1.0
# Most publishes awaiting their acknowledgement at once (fewer when the broker's Receive
# Maximum is lower: mqtt.cap_inflight). Under a flood of bad input the rejects go out at
# about this many per PUBACK delay; paho's own bound of 20 let them pile up past
# publish.reject_queue_max in the fault suite.
_PUBLISH_WINDOW = 100
# Most packets read from the broker's socket after each matched message (mqtt.drain):
# far more than one message's worth, so a backlog still moves into the intake queue, and
# few enough (~10 ms of decoding) that a lease renewal's reply is read without delay.
_DRAIN_PACKETS = 100
# ... and for at most this long (seconds), so that a turn of the event loop stays short
# on a busy machine, where the process gets a fraction of a core (mqtt.drain).
_DRAIN_BUDGET_S = 0.005
# Most messages only kept for another worker's shard taken in one turn of the loop.
_KEPT_RUN = 16
# Most messages matched in one turn of the loop when several have arrived at once, and
# the longest such a run may last (seconds): their acknowledgements and outputs then
# leave in one write (mqtt.coalesce) instead of one per message.
_MATCHED_RUN = 8
_MATCHED_RUN_S = 0.002
# Shortest interval between two "publish queue full" warnings (seconds).
_FULL_LOG_EVERY_S = 10.0
# How far ahead of the wall clock a fix time may push the eviction clock (seconds).
_CLOCK_AHEAD_S = 300.0
# Vehicles parked ([store] park_after_s) after each message handled, and in each round
# of the checkpoint loop (when few messages come). Parking one costs a checkpoint (about
# 1 ms at 15-30 s between fixes on a loaded machine: bench/memory.py step 8): two a
# message keep up with the vehicles a message can make live, and spread that cost
# instead of parking thousands in one turn of the event loop.
_PARK_PER_MESSAGE = 2
_PARK_PER_ROUND = 200
# Garbage collections at least this long are logged (seconds).
_GC_LOG_S = 0.25
# Longest wait for the outputs of a checkpoint's fixes to be acknowledged (seconds).
_ACK_WAIT_S = 1.0
# A takeover replays this many kept messages, then lets the event loop run (leases,
# PUBACKs, keepalive) before the next ones.
_REPLAY_CHUNK = 200
# Most topics whose intake key part is remembered (then forgotten all at once): a
# bound on memory under a flood of made-up topics (~0.2 KB each).
_TOPIC_KEYS_MAX = 100_000
# First byte of a PUBLISH at QoS 0 and at QoS 1, no DUP or RETAIN flag (MQTT 5.0
# section 3.3.1): what _take_raw takes (a QoS 1 one also with DUP).
_PUBLISH_QOS0 = 0x30
_PUBLISH_QOS1 = 0x32
# The standby connection (group.standby_connection) is read when the receive loop runs
# anyway and at least this long after its last read (seconds), else by a timer this
# long after it (a worker with nothing of its own to match).
_STANDBY_EVERY_S = 0.05
_STANDBY_LATE_S = 0.25
# Most reads of up to 64 KiB from the standby connection per turn (its fixes are kept,
# not matched; _DRAIN_BUDGET_S bounds the turn too).
_STANDBY_READS = 256

#: An entry of a shard's buffer of kept fixes: (sequence number, receive time, topic,
#: payload).
Kept = tuple[int, float, str, bytes]


def merge_moved(kept: deque[Kept], start: int, via_standby: set[int],
                to_main: bool) -> deque[Kept]:
    """A shard's kept fixes after its subscription moved between the two connections.

    With ``group.standby_connection`` a worker receives the shards it stands by for on
    a connection of their own (QoS 0) and those it holds on the main one (``mqtt.qos``).
    A shard moves by subscribing on the new connection, then, after the SUBACK,
    unsubscribing on the old one: every fix published meanwhile reaches both, and
    the two copies arrive in no particular order with respect to each other. The
    entries after sequence number ``start`` (the move's start) are those of either
    connection, ``via_standby`` the sequence numbers of the standby connection's.

    Each connection delivers one topic's messages in the order they were published
    (MQTT 5.0 section 4.6, Ordered Topic: per topic and QoS, per subscription), and a
    vehicle's fixes come from one sender on one topic. So per topic each connection's
    entries are a run of the published sequence; the two runs overlap where both were
    subscribed. The main connection's run is complete from its first entry (QoS 1, a
    persistent session; a fix shed under overload is kept on arrival), the standby
    connection's may miss messages (QoS 0: the broker may drop them for a slow
    subscriber). So per topic: moving to the main connection, the standby's run up to
    its first entry that the main run also has, then the whole main run; moving to the
    standby connection, the whole main run, then the standby's run after its last entry
    that the main run also has. An entry is the same message when topic and payload
    are the same bytes (a sender that publishes the very same bytes twice on one topic
    within a move's round trip sends a duplicate fix: the pipeline drops it by
    (vehicle, time) anyway). Entries before ``start`` stay as they are; the merged
    entries take the sequence numbers of the entries they replace, smallest first (so
    the buffer stays in increasing order; the order across topics is one connection's,
    then the other's).

    Example (topic "a" moving to the main connection, whose run starts at "3"; the
    standby connection's run missed "3")::

        >>> kept = deque([(1, 0.0, "a", b"1"), (2, 0.1, "a", b"2"), (3, 0.2, "a", b"4"),
        ...               (4, 0.2, "a", b"3"), (5, 0.3, "a", b"4")])
        >>> [(e[0], e[3]) for e in merge_moved(kept, 1, {2, 3}, to_main=True)]
        [(1, b'1'), (2, b'2'), (3, b'3'), (4, b'4')]
    """
    head = [e for e in kept if e[0] <= start]
    tail = [e for e in kept if e[0] > start]
    if not tail:
        return kept
    side = [e for e in tail if e[0] in via_standby]
    main = [e for e in tail if e[0] not in via_standby]
    if not side or not main:
        return kept  # one connection's run only: nothing overlaps
    shared: dict[str, set[bytes]] = {}
    for e in main:
        shared.setdefault(e[2], set()).add(e[3])
    if to_main:
        cut: set[str] = set()
        before: list[Kept] = []
        for e in side:
            if e[2] in cut:
                continue
            if e[3] in shared.get(e[2], ()):
                cut.add(e[2])
                continue
            before.append(e)
        merged = before + main
    else:
        last: dict[str, int] = {}
        for k, e in enumerate(side):
            if e[3] in shared.get(e[2], ()):
                last[e[2]] = k
        merged = main + [e for k, e in enumerate(side) if k > last.get(e[2], -1)]
    seqs = sorted(e[0] for e in tail)
    return deque(head + [(seq, e[1], e[2], e[3])
                         for seq, e in zip(seqs[:len(merged)], merged, strict=True)])


class OutputLike(Protocol):
    """What the daemon reads from one pipeline output (see :mod:`livematch.pipeline`)."""

    @property
    def kind(self) -> str:
        """``assignment``, ``commit``, ``alert`` or ``reject``."""

    @property
    def vehicle(self) -> str | None:
        """The vehicle, None only for rejects without a readable id."""

    @property
    def record(self) -> Mapping[str, Any]:
        """The published JSON record."""


class PipelineLike(Protocol):
    """The part of :class:`livematch.pipeline.Pipeline` the daemon uses."""

    counters: Counter[str]

    def handle(self, topic: str, payload: bytes, at: float) -> list[Any]:
        """Decode, validate, match one message; never raises on bad input."""

    def export_vehicle(self, vehicle: str) -> bytes:
        """The vehicle's checkpoint blob."""

    def import_vehicle(self, vehicle: str, blob: bytes) -> None:
        """Restore a vehicle from its checkpoint blob."""

    def vehicles(self) -> list[str]:
        """Vehicles with state in memory."""

    def tick(self, now: float) -> list[Any]:
        """Stale alerts at receive time ``now`` (epoch seconds)."""

    def evict_idle(self, now_fix_time: float, ttl_s: float, *,
                   into: list[Any] | None = None) -> list[str]:
        """Flush and forget vehicles idle for ``ttl_s`` s of fix time (outputs ``into``)."""

    def drop(self, vehicle: str) -> None:
        """Forget a vehicle without flushing (another worker holds its shard now)."""

    def park_idle(self, now: float, limit: int | None = None) -> int:
        """Keep vehicles silent for ``park_after_s`` (receive time) as their bytes."""

    def parked(self) -> int:
        """How many of the vehicles held are parked."""


_ENCODER = msgspec.json.Encoder()


def encode_record(record: Mapping[str, Any]) -> bytes:
    """The published bytes of a record: compact UTF-8 JSON, no NaN.

    The same bytes as ``json.dumps(record, separators=(",", ":"), ensure_ascii=False,
    allow_nan=False)`` (what ``livematch replay`` writes), made by msgspec's encoder,
    about 9x faster (1.5 against 13.5 µs for a typical assignment). The two differ only
    in how a float is written in exponent form (Python: ``1e-05``, ``1e+16``; msgspec:
    ``0.00001``, ``1e16``) and in NaN and infinity (Python refuses them here, msgspec
    writes null), so a record holding a float Python would write in exponent form
    (non-zero and below 1e-4, or at least 1e16, in absolute value) or a non-finite one
    goes through ``json.dumps`` as before (:func:`livematch.core.events.plain_json`
    tells, compiled: it runs on every output).

    Example:
        >>> encode_record({"vehicle": "bus 17", "eps_m": 15.0, "road": None})
        b'{"vehicle":"bus 17","eps_m":15.0,"road":null}'
        >>> encode_record({"vehicle": "v", "offset_m": 0.00001})  # exponent form kept
        b'{"vehicle":"v","offset_m":1e-05}'
    """
    if plain_json(record):
        return _ENCODER.encode(record)
    return json.dumps(record, separators=(",", ":"), ensure_ascii=False,
                      allow_nan=False).encode("utf-8")


class _Pending:
    """One output waiting for the broker.

    A plain slotted class: a frozen dataclass's ``__init__`` sets each field through
    ``object.__setattr__``, and one is built per output.
    """

    __slots__ = ("fix_time", "kind", "payload", "retain", "topic")

    def __init__(self, topic: str, payload: bytes, kind: str, retain: bool,
                 fix_time: float | None) -> None:
        self.topic = topic
        self.payload = payload
        self.kind = kind
        self.retain = retain
        self.fix_time = fix_time


class Daemon:
    """The live daemon around one pipeline.

    Args:
        config: the validated configuration.
        pipeline: decoder + per-vehicle trackers (the same object ``livematch replay``
            drives, so both produce the same records for the same messages).
        store: the state store; default from ``config.store.url``.
        metrics: the metrics; default a fresh registry of its own.
        http: a health server already listening (``livematch run`` starts one before
            it builds the pipeline, so ``/healthz`` answers while the kernels compile);
            the daemon answers on it from :meth:`run` on and closes it at the end.
            None: the daemon opens ``metrics.listen`` itself (if set).

    Example (what ``livematch run`` does)::

        config = load_config("config/live.toml")
        pipeline = Pipeline(open_network(config.inputs.network), config.matcher,
                            limits=config.feed, alerts=config.alerts,
                            park_after_s=config.store.park_after_s)
        daemon = Daemon(config, pipeline)
        asyncio.run(daemon.run())        # until daemon.request_stop() (SIGTERM)

    A daemon whose broker never answers runs, not ready, until stopped; stopping it then
    publishes nothing and counts what was queued in ``livematch_publish_dropped_total``.
    """

    def __init__(self, config: DaemonConfig, pipeline: PipelineLike, *,
                 store: StateStore | None = None, metrics: Metrics | None = None,
                 http: HealthServer | None = None) -> None:
        self.config = config
        self.pipeline = pipeline
        sc = config.store
        self.store = store or open_store(sc.url, key_prefix=sc.key_prefix,
                                         password=config.store_password,
                                         username=sc.username or None,
                                         ca_file=sc.ca_file or None)
        self.metrics = metrics or Metrics()
        self.http: HealthServer | None = http
        self.broker_connected = False
        # True once the current connection's SUBACKs are in: until then a fix published
        # by a fleet that saw the daemon ready could reach the broker before the
        # subscription and be dropped (a new session has nothing to queue it in)
        self.subscribed = False
        self.store_ok = False
        self.restored = False
        self._stopping = asyncio.Event()
        self._sleepers: set[asyncio.Future[None]] = set()  # see _sleep_unless_stopping
        self._renewal_logged_at = -math.inf  # last "lease renewal failed" line
        self._renewal_failures = 0  # failed renewal rounds not yet in a log line
        self._renewer: RenewalThread | None = None  # group mode: renews the leases
        # gives the C allocator's freed blocks back to the system now and then (the
        # checkpoint loop; glibc only): see livematch.service.allocator
        self._trimmer = Trimmer()
        self._intake_closed = False
        self._drain_deadline = 0.0
        self._outbox: deque[_Pending] = deque()  # assignments, commits, alerts
        self._reject_box: deque[_Pending] = deque()  # rejects: sent after the others
        self._outbox_changed = asyncio.Event()  # set on every append, pop and stop
        # Wakes the publish loop: outputs it has yet to send, or stopping (not PUBACKs:
        # those are retired where they are read, see _publish_loop).
        self._send_due = asyncio.Event()
        # The current connection's publisher: sends queued outputs now, as far as the
        # window allows (None between connections); see _publish_loop.
        self._send_now: Callable[[], None] | None = None
        self._pending_deletes: set[str] = set()
        self._full_logged_at = -math.inf
        self._listening_since: float | None = None  # wall time of the current connection
        self._fixes_since: Counter[str] = Counter()
        self._last_checkpoint: dict[str, float] = {}
        self._checkpoint_due = asyncio.Event()
        self._latest: dict[str, bytes] = {}
        self._latest_dirty: set[str] = set()
        self._last_published: dict[str, tuple[Any, float]] = {}
        self._seen_counters: Counter[str] = Counter()
        # Counted here per message and output, carried into the metrics when they are
        # rendered (_sync_counters): a prometheus_client increment takes a lock.
        self._received = 0
        self._published_n: Counter[str] = Counter()  # by kind
        self._eps_n: Counter[Any] = Counter()  # assignments by eps_m value
        self._synced: Counter[Any] = Counter()  # what _sync_counters has carried over
        self._newest_fix_t: float | None = None
        # Worker group (None: a standalone daemon, as without [group]).
        group = config.group
        self.worker = group.worker or _default_worker()
        self.leases: LeaseManager | None = None
        self._mqtt: MqttConfig = config.mqtt
        if group.name:
            self._mqtt = replace(config.mqtt, client_id=f"{config.mqtt.client_id}-{self.worker}")
        self._active: set[int] = set()  # shards whose vehicles this worker matches
        self._taking: set[int] = set()  # shards whose kept fixes are being replayed
        # (sequence number, receive time, topic, payload) of every possible fix, by shard
        self._buffers: dict[int, deque[Kept]] = {}
        self._kept_seq = 0
        # shard -> the last sequence number its last replay covered (see _process)
        self._replayed_upto: dict[int, int] = {}
        self._members: list[str] | None = None  # the group's live workers, last heartbeat
        self._rebalance_due = asyncio.Event()
        self._cap_logged_at = -math.inf
        self._gc_started = 0.0
        # A {shard} level in mqtt.topic: the feed is partitioned by shard at the source.
        self._sharded_topic = SHARD_LEVEL in config.mqtt.topic.split("/")
        self._client: aiomqtt.Client | None = None  # the current connection, if any
        # shard -> QoS of its topic's subscription on this connection, and wanted
        self._subs: dict[int, int] = {}
        self._want_subs: dict[int, int] = {}
        self._announced: set[int] | None = None  # shard topics recorded as received
        self._assignment: Assignment | None = None  # the last one computed (cached)
        # group.balance_load: the group's load snapshot (read by every worker of a group
        # with a {shard} topic, written by the first of the sorted member list)
        self._load_version = 0  # the newest version seen (heartbeat), 0: none
        self._weights: list[int] | None = None  # the weights of _weights_version
        self._weights_version = 0
        self._assigned_version = 0  # the snapshot version _assignment was computed with
        self._balance_check_at = 0.0  # monotonic: the next check of the load (first worker)
        self._balance_hold_until = 0.0  # monotonic: no new snapshot before this
        self._balance_total: int | None = None  # vehicles counted at the last check
        self._subs_lock = asyncio.Lock()
        # group.standby_connection: the standby shards on a second connection of their
        # own (_standby_loop), read when the worker is awake anyway (_read_standby)
        self._standby_link = group.standby_link(config.mqtt.topic)
        self._standby_client: aiomqtt.Client | None = None  # that connection, when up
        self._standby_intake: IntakeQueue | None = None  # its queue (stays empty)
        self._standby_subs: set[int] = set()  # shard topics subscribed on it (QoS 0)
        self._standby_read_at = 0.0  # monotonic time its next read is due
        self._standby_timer: asyncio.TimerHandle | None = None  # its read when none came
        # shard -> (kept sequence number at the move's start, moving to the main
        # connection) while it is subscribed on both (merge_moved)
        self._moving: dict[int, tuple[int, bool]] = {}
        self._via_standby: dict[int, set[int]] = {}  # kept from the standby one meanwhile
        self._enqueued = 0  # outputs ever queued
        self._acked = 0  # outputs ever acknowledged by the broker (queue order)
        self._shard_cache: dict[str, int] = {}
        self._topic_keys: dict[str, str] = {}  # topic -> what it says (_topic_key)
        # topic -> the shard its fixes are kept under, -1 for a wrong_shard topic
        # (_kept_shard; only topics naming a valid vehicle id)
        self._topic_shards: dict[str, int] = {}
        # the same topics' UTF-8 bytes -> (shard, topic), for those kept under a shard
        # (_take_raw)
        self._raw_topics: dict[bytes, tuple[int, str]] = {}
        # One shard write at a time: a hand-over's checkpoint must not be overtaken by
        # an older export of the periodic checkpoint (same fencing number, older state).
        self._write_lock = asyncio.Lock()
        self._intake: IntakeQueue | None = None  # the current connection's intake queue
        self._intake_peak = 0  # largest intake of the connections before the current one
        # Gauges read at scrape time rather than set on every message and output.
        self.metrics.queue_depth.set_function(
            lambda: float(len(self._outbox) + len(self._reject_box)))
        self.metrics.intake_depth.set_function(
            lambda: float(self._intake.waiting if self._intake is not None else 0))
        self.metrics.intake_peak.set_function(lambda: float(max(
            self._intake_peak, self._intake.peak if self._intake is not None else 0)))
        # Labelled children looked up once (a labels() call costs about four times the
        # increment it prepares).
        self._published_counters: dict[str, Any] = {}
        self._eps_counters: dict[str, Any] = {}
        self._filtered_counters: dict[str, Any] = {}

    # -- control -------------------------------------------------------------------

    def request_stop(self) -> None:
        """Begin a graceful shutdown (safe to call from a signal handler, repeatedly)."""
        if not self._stopping.is_set():
            log.info("stopping", extra=fields(queued=len(self._outbox)))
        self._stopping.set()
        for waiter in list(self._sleepers):
            _wake(waiter)

    def readiness(self) -> list[str]:
        """What is not ready (empty when ready): ``broker``, ``store``, ``restore``.

        ``broker`` stays missing until the connection is subscribed (every SUBACK in),
        not only connected: ready means a fix published now is received.
        """
        missing = []
        if not (self.broker_connected and self.subscribed):
            missing.append("broker")
        if not self.store_ok:
            missing.append("store")
        if not self.restored:
            missing.append("restore")
        return missing

    def published_counts(self) -> Counter[str]:
        """Outputs the broker acknowledged so far, by kind; a copy.

        Kinds: ``assignment``, ``commit``, ``alert``, ``reject``.

        A subscriber that has received this many of each kind has received everything
        published so far (the demo's drain waits for its board to get there).
        """
        return Counter(self._published_n)

    def outputs_waiting(self) -> int:
        """Outputs queued or in flight, not yet acknowledged by the broker."""
        return len(self._outbox) + len(self._reject_box)

    async def run(self) -> None:
        """Run until :meth:`request_stop`; returns after a clean shutdown."""
        gc.callbacks.append(self._on_gc)
        # A full collection walks every tracked object and stops the event loop: with
        # 80,000 messages waiting it took 0.3-0.85 s every 3-4 s in the fault suite's
        # flood, long enough with a 2 s lease to lose shards. The objects present now
        # (the map, modules, settings) are never garbage: freeze them out of every scan
        # (common practice for latency-bound Python services); undone on return, as
        # tests run daemons in-process.
        gc.collect()
        gc.freeze()
        try:
            await self._run()
        finally:
            gc.unfreeze()
            gc.callbacks.remove(self._on_gc)

    def _on_gc(self, phase: str, info: dict[str, int]) -> None:
        """Time every garbage collection: it stops the event loop (leases, PUBACKs)."""
        if phase == "start":
            self._gc_started = time.perf_counter()
            return
        took = time.perf_counter() - self._gc_started
        self.metrics.gc_pause.labels(generation=str(info.get("generation", -1))).observe(took)
        if took >= _GC_LOG_S:
            log.warning("garbage collection paused the event loop",
                        extra=fields(seconds=round(took, 3), generation=info.get("generation"),
                                     collected=info.get("collected")))

    async def _run(self) -> None:
        listen = self.config.metrics.listen
        if self.http is not None:  # started before the pipeline was built: take it over
            self.http.serve(render_metrics=self._render_metrics, readiness=self.readiness)
        elif listen:
            host, port = parse_hostport(listen)
            self.http = HealthServer(host, port, render_metrics=self._render_metrics,
                                     readiness=self.readiness)
            await self.http.start()
            log.info("http listening", extra=fields(address=f"{host}:{self.http.port}"))
        try:
            if not await self._open_store():
                return
            try:
                async with asyncio.TaskGroup() as tg:
                    tg.create_task(self._connection_loop(), name="mqtt-connection")
                    tg.create_task(self._checkpoint_loop(), name="checkpoint")
                    tg.create_task(self._store_watch_loop(), name="store-watch")
                    if self.leases is not None:
                        tg.create_task(self._lease_loop(), name="leases")
                        tg.create_task(self._shard_loop(), name="shards")
                    if self._standby_link:
                        tg.create_task(self._standby_loop(), name="mqtt-standby")
            finally:
                await self._final_checkpoint()
                with contextlib.suppress(Exception):
                    await self.store.close()
        finally:
            if self.http is not None:
                await self.http.close()
            c = self.pipeline.counters
            log.info("stopped", extra=fields(
                messages=c["messages"], fixes=c["fixes"], duplicates=c["duplicate"],
                rejects=sum(n for k, n in c.items() if k.startswith("reject:")),
                vehicles=len(self.pipeline.vehicles())))

    # -- store ---------------------------------------------------------------------

    async def _open_store(self) -> bool:
        """Connect (retrying with backoff) and restore every vehicle; False if stopped."""
        backoff = backoff_delays(self.config.mqtt.reconnect_min_s,
                                 self.config.mqtt.reconnect_max_s)
        while not self._stopping.is_set():
            try:
                await self.store.connect()
                if self.config.group.name:
                    await self._join_group()
                    blobs = {}  # vehicles are restored shard by shard as leases are taken
                else:
                    blobs = await self.store.load_all()
                break
            except StoreError as exc:
                self.metrics.store_errors.inc()
                log.warning("store unavailable", extra=fields(error=exc))
                await self._sleep_unless_stopping(backoff.next())
        else:
            return False
        self.store_ok = True
        restored = self._import_all(blobs)
        self.metrics.vehicles.set(len(self.pipeline.vehicles()))
        if self.leases is not None:
            return True  # ready once the first lease round is done
        self.restored = True
        log.info("state restored", extra=fields(store=redact_url(self.config.store.url),
                                                 vehicles=restored))
        return True

    async def _store_watch_loop(self) -> None:
        while not self._stopping.is_set():
            ok = await self.store.ping()
            if ok != self.store_ok:
                log.log(logging.INFO if ok else logging.WARNING,
                        "store reachable" if ok else "store unreachable",
                        extra=fields(store=redact_url(self.config.store.url)))
                if not ok:
                    self.metrics.store_errors.inc()
            self.store_ok = ok
            await self._sleep_unless_stopping(_STORE_PING_S)

    async def _checkpoint_loop(self) -> None:
        """Every ``_TICK_S`` (sooner when a vehicle's checkpoint is due): tick, write, evict.

        While the store fails, a round is tried once per ``_TICK_S`` (a due checkpoint
        does not wake it sooner: that retried every few milliseconds while Redis was
        down), and the failure is logged at its start, then at most once per
        ``_FULL_LOG_EVERY_S`` with the number of failed rounds since the last line.
        """
        failed = 0  # rounds failed since the last success
        unlogged = 0  # of which not yet reported in a log line
        logged_at = -math.inf
        while not self._stopping.is_set():
            if failed:
                await self._sleep_unless_stopping(_TICK_S)
            else:
                with contextlib.suppress(TimeoutError):
                    await asyncio.wait_for(self._checkpoint_due.wait(), timeout=_TICK_S)
            self._checkpoint_due.clear()
            try:
                now = time.time()
                if self._may_tick(now):  # a silent vehicle goes stale on the clock
                    for out in self.pipeline.tick(now):
                        self._route(out)
                self.pipeline.park_idle(now, _PARK_PER_ROUND)
                await self._flush_state(everything=False)
                await self._evict_idle()
                await self._trim_memory()
                if failed:
                    log.info("checkpoints written again", extra=fields(failed_rounds=failed))
                failed = unlogged = 0
                logged_at = -math.inf  # a new outage is reported at once
            except StoreError as exc:
                self.metrics.store_errors.inc()
                failed += 1
                unlogged += 1
                if time.monotonic() - logged_at >= _FULL_LOG_EVERY_S:
                    logged_at = time.monotonic()
                    log.warning("checkpoint failed; will retry",
                                extra=fields(error=exc, failed_rounds=unlogged))
                    unlogged = 0
            except Exception:  # a bug must not end checkpointing: log, count, go on
                self.metrics.store_errors.inc()
                log.exception("checkpoint loop error; will retry")

    async def _trim_memory(self) -> None:
        """Every ``TRIM_EVERY_S``: ``malloc_trim(0)`` in a worker thread, timed.

        A trim walks the allocator's free blocks (milliseconds at 10,000 vehicles, more
        with more), and ctypes releases the GIL for the call, so the event loop goes on
        serving fixes meanwhile; a trim over ``_GC_LOG_S`` is still logged.
        """
        now = time.monotonic()
        if not self._trimmer.due(now):
            return  # checked here: no round trip through a thread for nothing
        started = time.perf_counter()
        if await asyncio.to_thread(self._trimmer.maybe, now):
            took = time.perf_counter() - started
            if took >= _GC_LOG_S:
                log.warning("malloc_trim was slow", extra=fields(seconds=round(took, 3)))

    async def _flush_state(self, *, everything: bool) -> None:
        """Write due checkpoints (all with ``everything``) and changed latest records."""
        if self.leases is not None:
            await self._flush_shards(everything=everything)
            return
        now = time.monotonic()
        due = self.pipeline.vehicles() if everything else self._due_vehicles(now)
        if due:
            snapshot, blobs = self._export(due)
            await self.store.save(blobs, ttl_s=self.config.store.idle_ttl_s)
            for v, n in snapshot.items():
                self._fixes_since[v] -= n
                if self._fixes_since[v] <= 0:
                    del self._fixes_since[v]
                self._last_checkpoint[v] = now
            self.metrics.checkpoints.inc(len(blobs))
        if self._latest_dirty:
            dirty, self._latest_dirty = self._latest_dirty, set()
            try:
                await self.store.set_latest({v: self._latest[v] for v in dirty
                                             if v in self._latest})
            except StoreError:
                self._latest_dirty |= dirty
                raise

    def _import_all(self, blobs: dict[str, bytes]) -> int:
        """Restore every checkpoint in ``blobs``; returns how many were restored.

        One bad checkpoint is logged and counted and does not keep the others out.
        """
        restored = 0
        for vehicle, blob in sorted(blobs.items()):
            try:
                self.pipeline.import_vehicle(vehicle, blob)
                restored += 1
            except Exception as exc:  # one bad checkpoint must not keep the others out
                self.metrics.store_errors.inc()
                log.warning("checkpoint not restored", extra=fields(vehicle=vehicle, error=exc))
        return restored

    def _checkpointed_at(self, vehicle: str, now: float) -> float:
        """When ``vehicle`` was last checkpointed (monotonic s).

        A vehicle never checkpointed is given a time in the past spread over one
        ``checkpoint_every_s`` by a hash of its id, so its first checkpoint is due within
        that period but a fleet that starts together is not exported in one burst (which
        stalled the event loop for 100-500 ms: ``bench/load.py --profile``).
        """
        t = self._last_checkpoint.get(vehicle)
        if t is None:
            spread = (zlib.crc32(vehicle.encode()) & 0xFFFF) / 65536.0
            t = self._last_checkpoint[vehicle] = (
                now - spread * self.config.store.checkpoint_every_s)
        return t

    async def _evict_idle(self) -> None:
        if self._newest_fix_t is None:
            return
        final: list[Any] = []
        gone = self.pipeline.evict_idle(self._newest_fix_t, self.config.store.idle_ttl_s,
                                        into=final)
        for out in final:  # the evicted vehicles' last commits
            self._route(out)
        if gone:
            for v in gone:
                self._fixes_since.pop(v, None)
                self._last_checkpoint.pop(v, None)
                self._latest.pop(v, None)
                self._latest_dirty.discard(v)
                self._last_published.pop(v, None)
            self._pending_deletes.update(gone)
            log.info("evicted idle vehicles", extra=fields(count=len(gone)))
        if self._pending_deletes and self.leases is None:  # retried until the store takes it
            await self.store.delete(sorted(self._pending_deletes))
            self._pending_deletes.clear()
        self.metrics.vehicles.set(len(self.pipeline.vehicles()))

    async def _final_checkpoint(self) -> None:
        if self.leases is not None:
            await self._leave_group()
            return
        if not self.restored:
            return  # never restored: writing now would overwrite state we did not load
        try:
            await self._flush_state(everything=True)
            log.info("final checkpoint written",
                     extra=fields(vehicles=len(self.pipeline.vehicles())))
        except StoreError as exc:
            self.metrics.store_errors.inc()
            log.error("final checkpoint failed", extra=fields(error=exc))

    # -- worker group --------------------------------------------------------------

    async def _join_group(self) -> None:
        """Create the lease manager (own Redis connection); check the shard count and topic."""
        group = self.config.group
        if self.leases is None:
            sc = self.config.store
            client = redis_client(sc.url, timeout_s=2.0, password=self.config.store_password,
                                  username=sc.username or None, ca_file=sc.ca_file or None)
            self.leases = LeaseManager(client, url=self.config.store.url,
                                       prefix=self.config.store.key_prefix, group=group.name,
                                       worker=self.worker, n_shards=group.shards,
                                       lease_s=group.lease_s, balance=self._sharded_topic,
                                       topic=self.config.mqtt.topic)
        await self.leases.join()
        log.info("joined worker group", extra=fields(group=group.name, worker=self.worker,
                                                     shards=group.shards,
                                                     lease_s=group.lease_s))

    def _shard(self, key: str) -> int:
        """The shard of a vehicle id (or of a topic, for messages naming no vehicle)."""
        shard = self._shard_cache.get(key)
        if shard is None:
            if len(self._shard_cache) >= 1_000_000:  # bound the cache against id floods
                self._shard_cache.clear()
            shard = self._shard_cache[key] = shard_of(key, self.config.group.shards)
        return shard

    def _message_shard(self, topic: str, vehicle: str | None) -> int | None:
        """The shard a message belongs to; None for control messages.

        ``vehicle`` is the message's :func:`~livematch.feed.decode.known_vehicle`.
        Every worker applies control messages; only the holder of the vehicle's shard
        publishes what follows from them.
        """
        control = self.config.mqtt.control_topic
        if control and vehicle_from_topic(topic, control) is not None:
            return None
        if vehicle is not None:
            return self._shard(vehicle)
        return self._topic_shard(topic) if self._sharded_topic else self._shard(topic)

    def _keep(self, shard: int, at: float, topic: str, payload: bytes) -> int:
        """Keep a possible fix for ``buffer_s`` (at most ``buffer_max`` per shard).

        Kept whoever holds the shard, and not consumed by a takeover: if this worker
        loses the shard and takes it again before a newer checkpoint was written, the
        replay must again start from that checkpoint's fixes. Returns its sequence
        number (increasing in the order of keeping), 0 when ``buffer_max`` is 0.
        """
        group = self.config.group
        buf = self._buffers.get(shard)
        if buf is None:
            buf = self._buffers[shard] = deque()
        horizon = at - group.buffer_s
        while buf and buf[0][1] < horizon:
            buf.popleft()
        if group.buffer_max == 0:
            self.metrics.buffer_dropped.inc()
            return 0
        if len(buf) >= group.buffer_max:
            buf.popleft()
            self.metrics.buffer_dropped.inc()
        self._kept_seq += 1  # also the count of kept messages (_sync_counters)
        buf.append((self._kept_seq, at, topic, payload))
        return self._kept_seq

    def _prune_buffers(self, now: float) -> None:
        horizon = now - self.config.group.buffer_s
        depth = 0
        for buf in self._buffers.values():
            while buf and buf[0][1] < horizon:
                buf.popleft()
            depth += len(buf)
        self.metrics.buffer_depth.set(depth)

    def _check_deadlines(self) -> None:
        """Stop matching shards whose lease may have run out (checked per message)."""
        assert self.leases is not None
        if time.monotonic() >= self.leases.next_deadline():
            for shard in self.leases.expired():
                self._lose(shard, "expired")

    async def _lease_loop(self) -> None:
        """Renew this worker's leases and announce it every ``lease_s / 3`` seconds.

        The renewals run in a thread of their own with a blocking Redis client
        (:class:`~livematch.service.shards.RenewalThread`): a renewal made in the event
        loop waits one turn of the loop per request and per reply, and under a flood on
        a busy machine a turn lasted 0.1-0.4 s, so renewals came up to 5.7 s apart and
        2 s leases expired (fault suite, load average 8-10). The outcome is applied in
        the event loop (one turn after it arrives). This task checks the deadlines and
        prunes the kept-message buffers once per period.
        """
        leases = self.leases
        assert leases is not None
        period = self.config.group.lease_s / 3
        if self._sharded_topic:
            await self._subscribe_before_joining()
        sc = self.config.store
        loop = asyncio.get_running_loop()
        renewer = RenewalThread(
            leases, redis_sync_client(sc.url, timeout_s=min(2.0, period),
                                      password=self.config.store_password,
                                      username=sc.username or None,
                                      ca_file=sc.ca_file or None),
            period, lambda renewal: loop.call_soon_threadsafe(self._renewed, renewal),
            stall_s=2.0 * self.config.group.lease_s)
        self._renewer = renewer
        renewer.start()
        try:
            while not self._stopping.is_set():
                self._check_deadlines()
                self._prune_buffers(time.time())
                self.metrics.shards_held.set(len(self._active))
                await self._sleep_unless_stopping(period)
        finally:
            await asyncio.to_thread(renewer.stop)  # no renewal or announcement after this

    def _renewed(self, renewal: Renewal) -> None:
        """Apply a renewal round's outcome (in the event loop, from the renewal thread)."""
        leases = self.leases
        assert leases is not None
        if self._renewer is not None:
            self._renewer.applied()  # the loop is alive: the thread may go on renewing
        try:
            if renewal.error is not None:  # retried every 0.1 s: logged at most every 10 s
                self.metrics.lease_failures.inc()
                self._renewal_failures += 1
                now = time.monotonic()
                if now - self._renewal_logged_at >= _FULL_LOG_EVERY_S:
                    self._renewal_logged_at = now
                    log.warning("lease renewal failed; will retry", extra=fields(
                        error=renewal.error, failed_rounds=self._renewal_failures))
                    self._renewal_failures = 0
                return
            self._renewal_logged_at = -math.inf  # the next outage is reported at once
            self._renewal_failures = 0
            for shard in leases.apply(renewal):  # first: the deadlines depend on it
                self._lose(shard, "taken")
            self._members = renewal.members
            self._load_version = renewal.load_version
            self._rebalance_due.set()
        except Exception:  # a bug must not end the leases: log, count, go on
            self.metrics.lease_failures.inc()
            log.exception("lease renewal error; will retry")
        self._check_deadlines()
        self.metrics.shards_held.set(len(self._active))

    async def _shard_loop(self) -> None:
        """After each renewal: take free shards up to this worker's share, hand excess over."""
        assert self.leases is not None
        period = self.config.group.lease_s / 3
        while not self._stopping.is_set():
            with contextlib.suppress(TimeoutError):
                await asyncio.wait_for(self._rebalance_due.wait(), timeout=period)
            self._rebalance_due.clear()
            members = self._members
            if members is None or self._stopping.is_set():
                continue
            try:
                await self._shard_round(members)
                if not self.restored:
                    self.restored = True
                    log.info("state restored", extra=fields(
                        store=redact_url(self.config.store.url),
                        vehicles=len(self.pipeline.vehicles()),
                        shards=len(self._active)))
            except StoreError as exc:
                self.metrics.lease_failures.inc()
                log.warning("lease round failed; will retry", extra=fields(error=exc))
            except Exception:  # a bug must not end the leases: log, count, go on
                self.metrics.lease_failures.inc()
                log.exception("lease round error; will retry")
            self.metrics.shards_held.set(len(self._active))
            self.metrics.vehicles.set(len(self.pipeline.vehicles()))

    async def _shard_round(self, members: list[str]) -> None:
        """One rebalancing round: take free shards or hand excess ones over."""
        leases = self.leases
        assert leases is not None
        self._check_deadlines()
        if self._sharded_topic:
            await self._claim_round(members)
            return
        target = target_share(leases.n_shards, len(members))
        rank = {s: i for i, s in enumerate(preference(self.worker, leases.n_shards))}
        held = sorted(leases.held, key=rank.__getitem__)
        await self._hand_over_all(held[target:])
        if len(leases.held) >= target:
            return
        owners = await leases.owners()
        for shard in sorted(rank, key=rank.__getitem__):
            if len(leases.held) >= target or self._stopping.is_set():
                break
            if owners.get(shard) is None and shard not in leases.held:
                fence = await leases.acquire(shard)
                if fence is not None:
                    await self._take(shard, fence)

    async def _hand_over_all(self, excess: list[int]) -> None:
        """Stop matching the shards ``excess``, let their answers out, hand each over.

        A shard not handed over (Redis failed) is dropped: its lease runs out, and
        whoever takes it restores the checkpoint and replays the kept fixes.
        """
        if not excess:
            return
        assert self.leases is not None
        self._active.difference_update(excess)  # stop matching them: fixes only kept
        await self._outputs_acked(self._enqueued, _ACK_WAIT_S)  # their answers out
        try:
            for shard in excess:
                await self._hand_over(shard)
        except StoreError:
            for shard in excess:
                if shard in self.leases.held:
                    self._lose(shard, "handover_failed")
            raise

    async def _assign(self, members: list[str]) -> Assignment:
        """The group's assignment for these members and this worker (cached per set).

        Computed in a thread: for thousands of shards and hundreds of workers it takes
        seconds (:func:`~livematch.service.shards.assign_shards`), and the event loop
        keeps receiving meanwhile.
        """
        leases = self.leases
        assert leases is not None
        live = tuple(sorted({*members, self.worker}))
        version = self._load_version
        if version != self._weights_version:
            version, weights = await leases.read_load()
            self._load_version = max(self._load_version, version)
            self._weights, self._weights_version = weights, version
        cached = self._assignment
        if (cached is None or cached.workers != live
                or self._assigned_version != self._weights_version):
            cached = self._assignment = await asyncio.to_thread(
                assign_shards, leases.n_shards, live, self._weights)
            self._assigned_version = self._weights_version
        return cached

    async def _check_balance(self, members: list[str]) -> None:
        """On the group's first worker: write a new load snapshot when the load is uneven.

        ``group.balance_load`` (fraction f). Every ``lease_s`` the first worker of the
        sorted member list counts each shard's vehicles (:meth:`LeaseManager.shard_sizes`,
        the checkpoint indexes). It writes those counts as the group's new load
        snapshot (compare-and-set on its version) when, under the assignment in force,
        the busiest worker carries more than f times the even share above it, the
        weighted assignment would lower that, the count is steady (the total changed by
        at most f / 2 since the last check: the indexes fill during the first checkpoint
        interval of a fleet) and no snapshot was written in the last ``6 * lease_s``
        (hysteresis: a move costs a hand-over, and the counts drift by a vehicle or two
        all the time) unless the fleet's size changed by more than f since the snapshot
        in force (one written while a fleet was starting, from its first few vehicles,
        says little about the whole). Every worker reads the version with its heartbeat and computes
        the weighted assignment from the same snapshot (:meth:`_assign`). With f = 0
        a snapshot left by an earlier setting is cleared (an empty one), so the group
        returns to the assignment by count.
        """
        leases = self.leases
        assert leases is not None
        group = self.config.group
        now = time.monotonic()
        if self.worker != min({*members, self.worker}) or now < self._balance_check_at:
            return
        self._balance_check_at = now + group.lease_s
        await self._assign(members)  # the snapshot in force, read
        if group.balance_load <= 0:
            if self._weights is not None and await leases.write_load(
                    self._weights_version, None) is not None:
                log.info("load snapshot cleared (group.balance_load = 0)")
            return
        sizes = await leases.shard_sizes()
        total, last = sum(sizes), self._balance_total
        self._balance_total = total
        if total == 0 or last is None or abs(total - last) > group.balance_load / 2 * total:
            return
        held_total = sum(self._weights or ())
        if (now < self._balance_hold_until
                and abs(total - held_total) <= group.balance_load * held_total):
            return  # held: the fleet is about the size the snapshot in force counted
        current = await self._assign(members)
        even = total / len(current.workers)
        before = max(sum(sizes[s] for s in current.held_by(w)) for w in current.workers)
        if before - even <= group.balance_load * even:
            return
        proposal = await asyncio.to_thread(assign_shards, leases.n_shards, current.workers,
                                           sizes)
        after = max(sum(sizes[s] for s in proposal.held_by(w)) for w in proposal.workers)
        if after >= before:
            return
        version = await leases.write_load(self._weights_version, sizes)
        if version is None:
            return  # another worker wrote one meanwhile: the heartbeat brings it
        self._balance_hold_until = now + 6 * group.lease_s
        self._load_version = version
        self.metrics.load_snapshots.inc()
        moved = sum(a != b for a, b in zip(current.holder, proposal.holder, strict=True))
        log.info("load snapshot written", extra=fields(
            version=version, vehicles=total, busiest_before=before, busiest_after=after,
            even=round(even, 1), shards_moved=moved))

    def _wanted(self, mine: set[int], standby: set[int]) -> dict[int, int]:
        """The subscription QoS of each shard topic wanted.

        ``mqtt.qos`` for the shards held or to be held, ``group.standby_qos`` (at most
        ``mqtt.qos``) for those only stood by for; none of those with ``group.standby``
        false (a takeover then restores the checkpoint only, see ``docs/scale.md``).
        """
        assert self.leases is not None
        qos = self._mqtt.qos
        want: dict[int, int] = {}
        if self.config.group.standby:
            want = dict.fromkeys(standby, min(qos, self.config.group.standby_qos))
        want.update(dict.fromkeys(mine | set(self.leases.held), qos))
        return want

    def _apart(self, mine: set[int], standby: set[int]) -> set[int]:
        """The shard topics received on the standby connection (``standby_connection``).

        Those only stood by for; the shards held or to be held are always on the main
        connection. Empty without the setting.
        """
        if not self._standby_link:
            return set()
        assert self.leases is not None
        return set(standby) - mine - set(self.leases.held)

    async def _claim_round(self, members: list[str]) -> None:
        """A rebalancing round when the topic carries the shard (``{shard}``).

        The shares follow :func:`~livematch.service.shards.assign_shards` (bounded-load
        rendezvous hashing: floor or ceil of shards / workers each), computed by every
        worker from the same member list. A worker receives the topics of the shards it
        holds and of those it stands by for (it would hold them if their holder
        failed), and records in Redis which ones it receives. So when a worker dies,
        each of its shards goes to the worker that has kept its fixes since the last
        checkpoint. A shard that moves between live workers (a join, or a share that
        changed) is handed over (fenced checkpoint) only once the new holder's record
        names it: it then receives every fix after that checkpoint. A joining worker
        subscribes and records before it announces itself. With ``group.standby``
        false a worker receives only the shards it holds or is to hold: a dead holder's
        shard is subscribed to once the assignment names this worker, and restored from
        its checkpoint alone (the fixes published before that SUBACK and after the
        checkpoint are lost); the hand-over between live workers is unchanged.
        """
        leases = self.leases
        assert leases is not None
        await self._check_balance(members)
        assignment = await self._assign(members)
        mine = assignment.held_by(self.worker)
        standby = assignment.standing_by(self.worker)
        await self._sync_subscriptions(self._wanted(mine, standby), self._apart(mine, standby))
        away = sorted(s for s in leases.held if s not in mine)
        if away:
            receiving = await leases.receiving({assignment.holder[s] for s in away})
            await self._hand_over_all(
                [s for s in away if s in receiving.get(assignment.holder[s], ())])
        for shard in sorted(mine - set(leases.held)):
            if self._stopping.is_set():
                break
            if shard not in self._subs or shard in self._moving:
                continue  # its fixes would not reach this worker yet (or not in order)
            fence = await leases.acquire(shard)
            if fence is not None:
                await self._take(shard, fence)
        await self._sync_subscriptions(self._wanted(mine, standby), self._apart(mine, standby))

    async def _subscribe_before_joining(self) -> None:
        """With a ``{shard}`` topic, subscribe (and record it) before announcing this worker.

        The others hand over the shards it is to hold as soon as they see it and its
        record, and it must have received every fix since their checkpoint.
        """
        leases = self.leases
        assert leases is not None
        while not self._stopping.is_set():
            try:
                members = await leases.heartbeat(leave=True)  # read, not yet announced
                self._load_version = (await leases.read_load())[0]
                assignment = await self._assign(members)
                mine = assignment.held_by(self.worker)
                standby = assignment.standing_by(self.worker)
                if await self._sync_subscriptions(self._wanted(mine, standby),
                                                  self._apart(mine, standby)):
                    return
            except StoreError as exc:
                self.metrics.lease_failures.inc()
                log.warning("reading the group failed; will retry", extra=fields(error=exc))
            await self._sleep_unless_stopping(0.2)

    def _shard_filter(self, shard: int) -> str:
        """The subscription filter of one shard's topic."""
        levels = self._mqtt.topic.split("/")
        return "/".join(str(shard) if level == SHARD_LEVEL else level for level in levels)

    def _feed_filters(self, shards: Mapping[int, int]) -> list[tuple[str, int]]:
        """What a new connection subscribes to for the feed: (filter, QoS) pairs.

        ``shards`` maps the shard topics wanted to their QoS, in a group with a
        ``{shard}`` topic.
        """
        topic = self._mqtt.topic
        if not self._sharded_topic:
            return [(topic, self._mqtt.qos)]
        if self.leases is None:  # standalone: every shard
            return [(topic.replace(SHARD_LEVEL, "+"), self._mqtt.qos)]
        return [(self._shard_filter(s), shards[s]) for s in sorted(shards)]

    async def _sync_subscriptions(self, want: Mapping[int, int],
                                  apart: set[int] | None = None) -> bool:
        """Receive exactly the shard topics in ``want`` (shard -> QoS), and record them.

        The record in Redis (:meth:`LeaseManager.announce_receiving`) names a shard only
        while it is subscribed: it is shrunk before an unsubscription and grown after a
        SUBACK. A subscription whose QoS changes is replaced by a new SUBSCRIBE (MQTT 5.0
        section 3.8.4, MQTT-3.8.4-3 and -4: the broker replaces it, and no message is
        lost by the replacement). False when not connected (the next connection subscribes to
        them) or when the broker refused; raises :class:`StoreError` when the record
        cannot be written.

        ``apart`` (``group.standby_connection``): the shards of ``want`` received on the
        standby connection (QoS 0) while it is up; on the main connection at their QoS
        in ``want`` while it is not. A shard that changes connection is subscribed on
        the new one first and unsubscribed from the old one after the SUBACK, so no
        fix is missed; the fixes both received meanwhile are merged once the old one's
        UNSUBACK is in (:func:`merge_moved`; the standby connection is read as it
        comes meanwhile, so every fix it sent before the UNSUBACK is kept by then).
        """
        async with self._subs_lock:
            side = self._standby_client if apart else None
            main = {s: q for s, q in want.items() if side is None or s not in (apart or ())}
            side_want = set(want) - set(main)
            self._want_subs = main
            client = self._client
            if client is None or not self.broker_connected:
                return False
            try:
                received = set(self._subs) | self._standby_subs
                staying = {s for s in received if s in want}
                if self._announced is not None and not self._announced <= staying:
                    await self._announce(staying)
                for shard in sorted(main):  # the new places first
                    if self._subs.get(shard) != main[shard]:
                        if shard in self._standby_subs:
                            self._moving.setdefault(shard, (self._kept_seq, True))
                        await until_answered(client, client.subscribe(
                            self._shard_filter(shard), qos=main[shard], timeout=math.inf))
                        self._subs[shard] = main[shard]
                for shard in sorted(side_want - self._standby_subs):
                    assert side is not None
                    if shard in self._subs:
                        self._moving.setdefault(shard, (self._kept_seq, False))
                    with self._loud(side):
                        await until_answered(side, side.subscribe(
                            self._shard_filter(shard), qos=0, timeout=math.inf))
                    if self._standby_client is not side:
                        raise aiomqtt.MqttError("standby connection lost")
                    self._standby_subs.add(shard)
                for shard in sorted(set(self._subs) - set(main)):  # then leave the old
                    await until_answered(client, client.unsubscribe(
                        self._shard_filter(shard), timeout=math.inf))
                    del self._subs[shard]
                gone = self._standby_subs - side_want
                if gone and self._standby_client is not None:
                    side = self._standby_client
                    for shard in sorted(gone):
                        with self._loud(side):
                            await until_answered(side, side.unsubscribe(
                                self._shard_filter(shard), timeout=math.inf))
                        self._standby_subs.discard(shard)
            except aiomqtt.MqttError as exc:
                log.warning("shard subscriptions not updated; will retry",
                            extra=fields(error=exc))
                return False
            finally:
                self._settle_moves()
            if self._announced != set(self._subs) | self._standby_subs:
                await self._announce(set(self._subs) | self._standby_subs)
        return True

    def _settle_moves(self) -> None:
        """Merge the kept fixes of every shard now received on one connection only.

        Called where no subscription request is under way (:meth:`_sync_subscriptions`
        holds the lock, or a connection is gone). See :func:`merge_moved`.
        """
        for shard, (start, to_main) in list(self._moving.items()):
            if shard in self._subs and shard in self._standby_subs:
                continue  # still on both: the old one is left next round
            del self._moving[shard]
            via = self._via_standby.pop(shard, set())
            kept = self._buffers.get(shard)
            if kept:
                self._buffers[shard] = merge_moved(kept, start, via, to_main)

    @contextlib.contextmanager
    def _loud(self, client: aiomqtt.Client) -> Any:
        """Read the standby connection as soon as it has bytes, while a request waits.

        Otherwise it is read only when the worker is awake anyway
        (:meth:`_read_standby`); the answer to a request, and every fix the broker
        sent before it, are taken as they come.
        """
        paho: Any = client._client
        sock = paho.socket()
        if sock is None:
            yield
            return
        fd = sock.fileno()
        loop = asyncio.get_running_loop()
        closed = getattr(client, "_disconnected", None)

        def read() -> None:  # as aiomqtt's own reader
            try:
                paho.loop_read()
            except Exception as exc:  # the connection broke
                if isinstance(closed, asyncio.Future) and not closed.done():
                    closed.set_exception(exc)

        loop.add_reader(fd, read)
        try:
            yield
        finally:
            if paho.socket() is sock:  # else closed, its reader removed (the number reused)
                loop.remove_reader(fd)

    async def _announce(self, shards: set[int]) -> None:
        """Record in Redis that this worker receives the topics of ``shards``."""
        assert self.leases is not None
        self._announced = None  # unknown until written
        await self.leases.announce_receiving(shards)
        self._announced = set(shards)

    def _topic_shard(self, topic: str) -> int:
        """The shard named by a topic's ``{shard}`` level (else the topic's hash)."""
        level = shard_from_topic(topic, self._mqtt.topic)
        n = self.config.group.shards
        if level is not None and level.isdigit() and int(level) < n:
            return int(level)
        return self._shard(topic)

    def _is_wrong_shard(self, topic: str, vehicle: str | None) -> bool:
        """Whether a ``{shard}`` topic's level is not the shard of ``vehicle``."""
        if not self._sharded_topic or vehicle is None:
            return False
        level = shard_from_topic(topic, self._mqtt.topic)
        return level is not None and level != str(self._shard(vehicle))

    def _wrong_shard(self, topic: str, payload: bytes, at: float,
                     vehicle: str | None) -> Output | None:
        """A ``wrong_shard`` reject when the topic's shard is not the vehicle's, else None.

        ``vehicle`` is the message's :func:`~livematch.feed.decode.known_vehicle`. A
        sender that computes another shard (another ``group.shards``, another hash)
        would otherwise have its fixes matched by a worker that does not hold the
        vehicle, or by none.
        """
        if not self._is_wrong_shard(topic, vehicle):
            return None
        assert vehicle is not None
        level = shard_from_topic(topic, self._mqtt.topic) or ""
        expected = self._shard(vehicle)
        return Output("reject", vehicle, {
            "at": at, "topic": topic, "reason": "wrong_shard",
            "detail": f"topic shard level {level[:20]!r} is not shard {expected} of vehicle "
                      f"{vehicle!r} (group.shards = {self.config.group.shards})",
            "payload": payload.decode("utf-8", "replace")[:REJECT_PAYLOAD_CHARS],
        })

    async def _take(self, shard: int, fence: int) -> None:
        """Restore a newly acquired shard's vehicles, replay the fixes kept, match it."""
        leases = self.leases
        assert leases is not None
        try:
            blobs = await leases.load(shard)
        except StoreError:
            with contextlib.suppress(StoreError):
                await leases.release(shard)
            raise
        if leases.held.get(shard) != fence:  # lost while loading
            return
        restored = self._import_all(blobs)
        replayed = await self._replay(shard, fence)
        if replayed is None:  # lost while replaying: _lose dropped its vehicles
            return
        self.metrics.takeovers.inc()
        self.metrics.replayed.inc(replayed)
        self.metrics.shards_held.set(len(self._active))
        log.info("shard taken", extra=fields(shard=shard, fence=fence, vehicles=restored,
                                             replayed=replayed))

    async def _replay(self, shard: int, fence: int) -> int | None:
        """Replay the fixes kept for a shard just restored, then start matching it.

        The shard is not matched meanwhile: its fixes arriving during the replay are only
        kept, and the replay goes on until it has caught up with them; the last step
        (nothing left to replay -> matching) has no ``await`` in between, so no fix is
        skipped or taken out of order. Every ``_REPLAY_CHUNK`` messages the event loop
        runs (lease renewals, PUBACKs, MQTT keepalive). Fixes the restored checkpoint
        already covers are dropped as duplicates (vehicle, time). Answers and rejects
        of the rest are published (again, if their first holder got that far): at
        least once, like every output.

        Returns the number of messages replayed, or None when the lease was lost
        meanwhile (the shard's vehicles are then dropped).
        """
        assert self.leases is not None
        self._taking.add(shard)
        horizon = time.time() - self.config.group.buffer_s
        done_seq = 0
        replayed = 0
        try:
            while True:
                todo = [entry for entry in self._buffers.get(shard, ()) if entry[0] > done_seq]
                if not todo:
                    # caught up: matching from the next message; a message kept before
                    # now and still waiting in the intake queue was replayed (_process)
                    self._replayed_upto[shard] = self._kept_seq
                    self._active.add(shard)
                    return replayed
                for k, (seq, at, topic, payload) in enumerate(todo, 1):
                    done_seq = seq
                    if at >= horizon:
                        self._handle(topic, payload, at)
                        replayed += 1
                    if k % _REPLAY_CHUNK == 0:
                        await asyncio.sleep(0)
                        if self.leases.held.get(shard) != fence:
                            return None  # _lose ran meanwhile and dropped its vehicles
        finally:
            self._taking.discard(shard)

    def _shard_vehicles(self, shard: int) -> list[str]:
        return [v for v in self.pipeline.vehicles() if self._shard(v) == shard]

    def _forget_vehicle(self, vehicle: str) -> None:
        self.pipeline.drop(vehicle)
        self._fixes_since.pop(vehicle, None)
        self._last_checkpoint.pop(vehicle, None)
        self._latest.pop(vehicle, None)
        self._latest_dirty.discard(vehicle)
        self._last_published.pop(vehicle, None)
        self._pending_deletes.discard(vehicle)

    def _lose(self, shard: int, why: str) -> None:
        """A shard is no longer ours: drop its vehicles without writing anything."""
        assert self.leases is not None
        self.leases.forget(shard)
        was_active = shard in self._active or shard in self._taking
        self._active.discard(shard)
        vehicles = self._shard_vehicles(shard)
        if not (was_active or vehicles):
            return
        for vehicle in vehicles:
            self._forget_vehicle(vehicle)
        for vehicle in [v for v in self._pending_deletes if self._shard(v) == shard]:
            self._pending_deletes.discard(vehicle)
        self.metrics.shards_lost.labels(why=why).inc()
        self.metrics.shards_held.set(len(self._active))
        log.warning("shard lost", extra=fields(shard=shard, why=why, vehicles=len(vehicles)))

    async def _outputs_acked(self, upto: int, timeout: float) -> bool:
        """Wait (at most ``timeout`` s) until the first ``upto`` outputs were acknowledged."""
        deadline = time.monotonic() + timeout
        while self._acked < upto:
            left = deadline - time.monotonic()
            if left <= 0 or (self._intake_closed and not self.broker_connected):
                return False
            self._outbox_changed.clear()
            with contextlib.suppress(TimeoutError):
                await asyncio.wait_for(self._outbox_changed.wait(), timeout=min(left, 0.1))
        return True

    async def _hand_over(self, shard: int) -> None:
        """Give a shard to the group: checkpoint it (fenced), release it, forget it.

        The caller stopped matching the shard and waited for its queued outputs.
        """
        leases = self.leases
        assert leases is not None
        self._active.discard(shard)  # its fixes are only kept from now on
        vehicles = self._shard_vehicles(shard)
        try:
            async with self._write_lock:
                fence = leases.held.get(shard)
                if fence is not None:
                    await self._write_shard(shard, fence, self._export(vehicles))
            if shard in leases.held:
                await leases.release(shard)
        except StoreError:
            # Fixes arrived unmatched since the shard was stopped: matching it again
            # would skip them. Drop it; its lease runs out and the taker replays them.
            self._lose(shard, "handover_failed")
            raise
        for vehicle in vehicles:
            self._forget_vehicle(vehicle)
        self.metrics.shards_held.set(len(self._active))
        log.info("shard handed over", extra=fields(shard=shard, vehicles=len(vehicles)))

    def _due_vehicles(self, now: float) -> list[str]:
        """The vehicles whose periodic checkpoint is due (monotonic ``now``), sorted.

        Only vehicles with fixes since their last checkpoint can be due, so only those
        are looked at (not every vehicle held: this runs every ``_TICK_S``).
        """
        cfg = self.config.store
        return sorted(v for v, n in self._fixes_since.items()
                      if n > 0 and (n >= cfg.checkpoint_every_fixes
                                    or now - self._checkpointed_at(v, now)
                                    >= cfg.checkpoint_every_s))

    def _export(self, vehicles: list[str]) -> tuple[dict[str, int], dict[str, bytes]]:
        """(fixes counted since the last checkpoint, checkpoint blob) of each vehicle.

        A vehicle the pipeline no longer holds is left out (and its count forgotten).
        """
        counts: dict[str, int] = {}
        blobs: dict[str, bytes] = {}
        for v in vehicles:
            try:
                blobs[v] = self.pipeline.export_vehicle(v)
            except UnknownVehicleError:
                self._fixes_since.pop(v, None)
                continue
            counts[v] = self._fixes_since.get(v, 0)
        return counts, blobs

    async def _write_shard(self, shard: int, fence: int,
                           export: tuple[dict[str, int], dict[str, bytes]],
                           candidates: tuple[list[str], list[str]] | None = None) -> bool:
        """Write a shard's exported checkpoints, dirty latest records and deletions.

        ``candidates``: the shard's vehicles with a dirty latest record and with a
        pending deletion, grouped by the caller in one pass for every shard (those still
        dirty or pending are written); None looks through all of them for this shard
        (a pass per shard costs shards x vehicles: 35 shard lookups per fix in a group
        holding 64 shards, ``bench/load.py --cprofile``). Returns False when the write
        was fenced out (the shard is then lost).
        """
        assert self.leases is not None
        now = time.monotonic()
        write = self._shard_write(shard, fence, export[1], candidates)
        if write is None:
            return True
        ok = await self.leases.save(shard, fence=fence, blobs=write.blobs,
                                    latest=write.latest, deleted=write.deleted,
                                    ttl_s=self.config.store.idle_ttl_s)
        return self._written(write, export[0], ok, now)

    def _shard_write(self, shard: int, fence: int, blobs: dict[str, bytes],
                     candidates: tuple[list[str], list[str]] | None) -> ShardWrite | None:
        """What :meth:`_write_shard` writes for a shard; None when there is nothing."""
        if candidates is None:
            dirty = sorted(v for v in self._latest_dirty if self._shard(v) == shard)
            deleted = sorted(v for v in self._pending_deletes if self._shard(v) == shard)
        else:
            dirty = sorted(v for v in candidates[0] if v in self._latest_dirty)
            deleted = sorted(v for v in candidates[1] if v in self._pending_deletes)
        latest = {v: self._latest[v] for v in dirty if v in self._latest}
        if not (blobs or latest or deleted):
            return None
        return ShardWrite(shard, fence, blobs, latest, deleted,
                          cleaned=tuple(dirty))

    def _written(self, write: ShardWrite, snapshot: dict[str, int], ok: bool,
                 now: float) -> bool:
        """Account for a shard's write (:meth:`_shard_write`) once Redis answered ``ok``.

        Returns ``ok``; a write fenced out loses the shard.
        """
        if not ok:
            self.metrics.fenced.inc()
            self._lose(write.shard, "fenced")
            return False
        for v, n in snapshot.items():
            if v in self._fixes_since:
                self._fixes_since[v] -= n
                if self._fixes_since[v] <= 0:
                    del self._fixes_since[v]
            self._last_checkpoint[v] = now
        self._latest_dirty.difference_update(write.cleaned)
        self._pending_deletes.difference_update(write.deleted)
        self.metrics.checkpoints.inc(len(write.blobs))
        return True

    async def _flush_shards(self, *, everything: bool) -> None:
        """:meth:`_flush_state` for a worker group: per shard, fenced.

        The due vehicles are exported first; the checkpoints are written only once the
        broker acknowledged every output queued before the export (so a checkpoint
        never covers a fix whose answer could still be lost with this process), else
        this round writes nothing. One write at a time (``_write_lock``), so a
        hand-over's checkpoint is never overtaken by an older export. The shards'
        writes go to Redis in one round trip (:meth:`LeaseManager.save_many`; one
        request per shard cost a worker holding 32 shards most of a round's CPU).
        """
        leases = self.leases
        assert leases is not None
        now = time.monotonic()
        due_by: dict[int, list[str]] = {}
        for v in self.pipeline.vehicles() if everything else self._due_vehicles(now):
            due_by.setdefault(self._shard(v), []).append(v)
        touched: dict[int, tuple[list[str], list[str]]] = {}  # dirty latest, deletions
        for v in self._latest_dirty:
            s = self._shard(v)
            due_by.setdefault(s, [])
            touched.setdefault(s, ([], []))[0].append(v)
        for v in self._pending_deletes:
            s = self._shard(v)
            due_by.setdefault(s, [])
            touched.setdefault(s, ([], []))[1].append(v)
        async with self._write_lock:
            plan = {s: (leases.held[s], self._export(due)) for s, due in sorted(due_by.items())
                    if s in self._active and s in leases.held}
            exported = any(blobs for _, (_, blobs) in plan.values())
            if (exported and not everything
                    and not await self._outputs_acked(self._enqueued, _ACK_WAIT_S)):
                return  # outputs not yet out: a later round writes a newer checkpoint
            writes: list[tuple[ShardWrite, dict[str, int]]] = []
            for shard, (fence, (snapshot, blobs)) in plan.items():
                if leases.held.get(shard) != fence:
                    continue
                write = self._shard_write(shard, fence, blobs, touched.get(shard, ([], [])))
                if write is not None:
                    writes.append((write, snapshot))
            if not writes:
                return
            sent = time.monotonic()
            oks = await leases.save_many([w for w, _ in writes],
                                         ttl_s=self.config.store.idle_ttl_s)
            for (write, snapshot), ok in zip(writes, oks, strict=True):
                self._written(write, snapshot, ok, sent)

    async def _leave_group(self) -> None:
        """On shutdown: checkpoint every shard held (fenced), release it, leave."""
        leases = self.leases
        if leases is None:
            return
        try:
            if self.restored:
                await self._flush_shards(everything=True)
            for shard in sorted(leases.held):
                await leases.release(shard)
            if self._sharded_topic:
                await leases.stop_receiving()
            await leases.heartbeat(leave=True)
            log.info("final checkpoint written; left the group",
                     extra=fields(vehicles=len(self.pipeline.vehicles())))
        except StoreError as exc:
            self.metrics.store_errors.inc()
            log.error("final checkpoint failed", extra=fields(error=exc))
        finally:
            with contextlib.suppress(Exception):
                await leases.client.aclose()

    # -- MQTT ----------------------------------------------------------------------

    async def _connection_loop(self) -> None:
        cfg = self.config.mqtt
        backoff = backoff_delays(cfg.reconnect_min_s, cfg.reconnect_max_s)
        while not self._stopping.is_set():
            try:
                await self._session(backoff)
            except (aiomqtt.MqttError, OSError) as exc:
                self._session_failed(exc)
            except Exception as exc:  # a bug in a loop: log, count, reconnect
                log.error("mqtt session failed", exc_info=exc)
                self._session_failed(exc)
            finally:
                self.broker_connected = False
                self.subscribed = False
            if not self._stopping.is_set():
                await self._sleep_unless_stopping(backoff.next())
        left = len(self._outbox) + len(self._reject_box)
        if left:
            self.metrics.dropped.inc(left)
            log.error("outputs not published at shutdown (broker unavailable)",
                      extra=fields(count=left))
            self._outbox.clear()
            self._reject_box.clear()

    def _session_failed(self, exc: BaseException) -> None:
        broker = redact_url(self.config.mqtt.url)
        if self.broker_connected:  # it was up: a lost connection
            self.metrics.reconnects.inc()
            log.warning("broker connection lost; reconnecting",
                        extra=fields(broker=broker, error=exc, queued=len(self._outbox)))
        else:
            log.warning("broker connection failed; retrying",
                        extra=fields(broker=broker, error=exc, queued=len(self._outbox)))

    async def _session(self, backoff: Any) -> None:
        """One connection: subscribe, then receive and publish until stopped or broken."""
        cfg = self._mqtt
        if self._intake is not None:
            self._intake_peak = max(self._intake_peak, self._intake.peak)
        self._intake = IntakeQueue(cfg.intake_max, key_of=self._intake_key,
                                   on_shed=self._count_shed)
        client = make_client(cfg, username=self.config.username, password=self.config.password,
                             intake=self._intake)
        write_soon(client)
        cap_inflight(client, _PUBLISH_WINDOW)
        # every message received, whichever way paho decoded it, goes through _arrive
        self._intake.arrive = functools.partial(self._arrive, client, self._intake)
        lean_receive(client, deliver=self._intake.put_nowait)
        # in a group, another worker's fixes are kept straight from the read buffer
        # (_take_raw); a standalone daemon keeps nothing, so its packets are not offered
        buffered_reads(client, take=functools.partial(self._take_raw, client, self._intake)
                       if self.config.group.name else None)
        cancelled = False
        try:
            async with client:
                _observe_disconnect(client)
                try:
                    self.broker_connected = True
                    self._listening_since = time.time()
                    backoff.reset()
                    self._client = client
                    await self._serve_connection(client, self._subscribe(client))
                except asyncio.CancelledError:
                    cancelled = True
                    raise
                finally:
                    self._client = None
        except aiomqtt.MqttError:
            if cancelled:  # aiomqtt's __aexit__ replaced our cancellation (disconnect timed out)
                raise asyncio.CancelledError from None
            raise

    async def _subscribe(self, client: aiomqtt.Client) -> None:
        """Subscribe a new connection to the feed and the control topic.

        Runs beside ``mqtt-receive``: after a reconnection the broker sends the
        session's backlog before the SUBACK, and matching it need not wait.
        """
        cfg = self._mqtt
        async with self._subs_lock:
            self._subs = {}
            self._settle_moves()  # a move to the standby connection: the old place is gone
            wanted = dict(self._want_subs)
            for shard in wanted:
                if shard in self._standby_subs:  # a move that the lost connection began
                    self._moving.setdefault(shard, (self._kept_seq, True))
            for feed_filter, qos in self._feed_filters(wanted):
                await until_answered(client, client.subscribe(
                    feed_filter, qos=qos, timeout=math.inf))
            if self._sharded_topic and self.leases is not None:
                self._subs = wanted
        if cfg.control_topic:
            await until_answered(client, client.subscribe(
                cfg.control_topic, qos=cfg.qos, timeout=math.inf))
        self.subscribed = True
        log.info("connected and subscribed",
                 extra=fields(broker=redact_url(cfg.url), topic=cfg.topic,
                              control_topic=cfg.control_topic,
                              client_id=cfg.client_id, queued=len(self._outbox)))

    async def _serve_connection(self, client: aiomqtt.Client,
                                subscribe: Coroutine[Any, Any, None]) -> None:
        """Run ``mqtt-subscribe``, ``-receive`` and ``-publish``; the first error ends all.

        Plain tasks rather than a nested TaskGroup: on Python 3.11 a TaskGroup whose child
        fails leaves its parent task marked as being cancelled, which would confuse the
        reconnect loop that runs in that parent.
        """
        tasks = [asyncio.create_task(subscribe, name="mqtt-subscribe"),
                 asyncio.create_task(self._receive_loop(client), name="mqtt-receive"),
                 asyncio.create_task(self._publish_loop(client), name="mqtt-publish")]
        try:
            await asyncio.wait(tasks, return_when=asyncio.FIRST_EXCEPTION)
        finally:
            for task in tasks:
                task.cancel()
            results = await asyncio.gather(*tasks, return_exceptions=True)
        for result in results:
            if isinstance(result, Exception):
                raise result

    async def _receive_loop(self, client: aiomqtt.Client) -> None:
        intake = self._intake
        assert intake is not None  # set by _session before the connection's tasks start
        # Wait on the intake queue itself, woken by a message, the stop signal or the
        # connection's end: aiomqtt's message iterator costs two tasks and a wait per
        # message (their cyclic garbage made the collector stop the loop for 0.3-0.85 s
        # every few seconds under a flood, measured in the fault suite; and they cost
        # more CPU than relaying the message, bench/load.py --cpu-per-fix).
        stop = asyncio.create_task(self._stopping.wait(), name="stop-wait")
        stop.add_done_callback(intake.interrupt)
        closed = getattr(client, "_disconnected", None)
        if isinstance(closed, asyncio.Future):
            closed.add_done_callback(intake.interrupt)
        kept_run = 0  # messages only kept (another worker's shard) since the last turn
        matched_run = 0  # messages matched in this turn of the loop
        run_until = 0.0  # monotonic time after which this turn takes no further message
        try:
            while True:
                side = self._standby_client
                if side is not None and time.monotonic() >= self._standby_read_at:
                    self._read_standby(side)  # awake anyway: no wake-up of its own
                await intake.wait()
                if self._stopping.is_set():
                    break  # what was not taken is redelivered next session
                if _disconnected(client) or intake.empty():
                    # what is still queued is redelivered anyway
                    cause = closed.exception() if isinstance(closed, asyncio.Future) and \
                        closed.done() and not closed.cancelled() else None
                    raise aiomqtt.MqttError("Disconnected during message iteration") from cause
                message = intake.get_nowait()
                key = intake.last_key
                if key == ACK_ONLY_KEY:
                    # kept on arrival for another worker's shard (_arrive): its PUBACK
                    # only waited for the messages ahead of it; take the next one too
                    ack(client, message)
                    if not intake.empty():
                        continue
                elif self._intake is not None and self._intake.was_shed(message):
                    ack(client, message)  # shed on purpose (and counted): acknowledge
                else:
                    kept, shard = intake.last_kept
                    if (self._process(client, message, key, kept, shard)
                            and kept_run < _KEPT_RUN
                            and not intake.empty()):
                        # Another worker's fix, only kept (no output): take the next
                        # message waiting in this turn of the loop, so that the PUBACKs of
                        # a run of them leave in one send after one loop turn. In a group
                        # of 2 every worker receives the whole feed (its standby shards'
                        # fixes are half of it). Nothing is drained meanwhile: the turn
                        # stays as short as one matched message's.
                        kept_run += 1
                        continue
                    # Take what has arrived meanwhile, so that a backlog is shed here
                    # (newest fix of every vehicle kept), not queued at the broker.
                    drain(client, _DRAIN_PACKETS, _DRAIN_BUDGET_S)
                    if self._run_on(matched_run, run_until, intake):
                        # Messages that arrived together (a sender's batch, a burst after
                        # a pause): match the next one in this turn too, so that the
                        # acknowledgements and outputs of the run leave in one write
                        # after it (one system call and one wake-up of the broker, not
                        # one per message). Bounded in count and time, so the turn
                        # stays short and the first message's outputs are not held
                        # back for long.
                        if matched_run == 0:
                            run_until = time.monotonic() + _MATCHED_RUN_S
                        matched_run += 1
                        continue
                kept_run = 0
                matched_run = 0
                await self._wait_for_room()
                if not intake.empty():
                    # leases, PUBACKs and keepalive run between messages (with nothing
                    # waiting, intake.wait() lets them run: no extra turn of the loop)
                    await asyncio.sleep(0)
        finally:
            stop.cancel()
            if isinstance(closed, asyncio.Future):
                closed.remove_done_callback(intake.interrupt)
        self._intake_closed = True
        self._drain_deadline = time.monotonic() + self.config.publish.shutdown_grace_s
        self._outbox_changed.set()
        self._send_due.set()

    def _run_on(self, matched_run: int, run_until: float, intake: IntakeQueue) -> bool:
        """Whether the receive loop matches another waiting message in the same turn.

        Only while messages wait, fewer than ``_MATCHED_RUN`` were matched in this turn
        and the first of them started less than ``_MATCHED_RUN_S`` ago, and the publish
        queue has room (``_wait_for_room`` runs between turns).
        """
        return (not intake.empty() and matched_run + 1 < _MATCHED_RUN
                and (matched_run == 0 or time.monotonic() < run_until)
                and len(self._outbox) < self.config.publish.queue_max)

    def _arrive(self, client: aiomqtt.Client, intake: IntakeQueue,
                message: aiomqtt.Message) -> None:
        """Take a message as it is read from the socket (the intake queue's ``arrive``).

        Outside a group every message goes to the intake queue. In a group a possible
        fix (not junk, not a control message, not on a wrong ``{shard}`` topic) is kept
        here, in the order the messages arrive, whoever holds its shard. One of a
        shard this worker does not match (another worker's, or one being replayed) is
        then done with: acknowledged at once when nothing waits in the intake queue
        (nothing ahead of it is unacknowledged: a message taken from the queue is
        acknowledged before the loop reads the socket again), else given a place in
        the queue that is only acknowledged (PUBACKs in arrival order, MQTT 5.0
        section 4.6). So such a fix costs no turn of the receive loop, no decoding of
        its payload beyond the type check, and no object beyond the kept entry. A fix
        of a shard this worker matches goes to the queue with its place in the buffer
        (:meth:`_process`).
        """
        topic = message.topic.value
        payload = message.payload
        if not isinstance(payload, bytes):
            payload = bytes(payload) if isinstance(payload, bytearray) \
                else str(payload).encode()
            message.payload = payload
        key = self._intake_key(topic, payload)
        if (self.leases is None or key == JUNK_KEY or key.startswith("c:")
                or self._stopping.is_set()):  # stopping: what is not taken is redelivered
            intake.put_keyed(message, key)
            return
        shard = self._kept_shard(topic, payload, key)
        if shard < 0:  # a wrong_shard reject: not kept (_process publishes it)
            intake.put_keyed(message, key)
            return
        kept = self._keep(shard, time.time(), topic, payload)
        if kept and shard not in self._active:
            self._received += 1
            if intake.empty() or not message.qos:  # a QoS 0 one needs no PUBACK
                ack(client, message)
            else:
                intake.put_ack(message)
            return
        intake.put_keyed(message, key, kept, shard)

    def _kept_shard(self, topic: str, payload: bytes, key: str) -> int:
        """The shard a possible fix is kept under, or -1 for a ``wrong_shard`` message.

        As :meth:`_process` decides it (:func:`known_vehicle`, :meth:`_message_shard`),
        remembered per topic when the topic names a valid vehicle id: then neither
        depends on the payload.
        """
        shard = self._topic_shards.get(topic)
        if shard is not None:
            return shard
        vehicle = known_vehicle(topic, payload, self.config.feed)
        if self._is_wrong_shard(topic, vehicle):
            shard = -1
        else:
            found = self._message_shard(topic, vehicle)
            assert found is not None  # control messages are keyed "c:"
            shard = found
        if key.startswith("v:") and vehicle == key[2:]:  # the topic's vehicle, valid
            if len(self._topic_shards) >= _TOPIC_KEYS_MAX:  # bound against topic floods
                self._topic_shards.clear()
                self._raw_topics.clear()
            self._topic_shards[topic] = shard
            if shard >= 0:
                self._raw_topics[topic.encode()] = (shard, topic)
        return shard

    def _take_raw(self, client: aiomqtt.Client, intake: IntakeQueue, command: int,
                  body: bytes) -> bool:
        """Keep another worker's fix straight from the read buffer (``buffered_reads``).

        ``command`` and ``body`` are a whole PUBLISH packet as read from the socket: its
        first byte, then the variable header and payload (MQTT 5.0 section 3.3). Taken
        here, and True, only when :meth:`_arrive` would come to the same end: a QoS 0
        PUBLISH (a standby shard's, ``group.standby_qos``), or a QoS 1 one with nothing
        waiting in the intake queue (its PUBACK is then next in arrival order), without
        retain flag or properties, on a topic whose shard :meth:`_kept_shard` has
        remembered (a valid vehicle id, not a ``wrong_shard`` topic), of a shard this
        worker does not match (another worker's, or one being replayed), with a payload
        that passes the type check, while not stopping and with ``buffer_max`` above 0.
        It is then kept and acknowledged as there, without paho's decoding, an
        ``aiomqtt.Message``, the topic's decoding or the intake key: a worker of a pair
        with standbys reads half its feed this way. Anything else returns False and
        takes paho's way to :meth:`_arrive`, unchanged. On the standby connection
        (``intake`` its queue) a QoS 0 PUBLISH is kept whether this worker matches its
        shard or not (as :meth:`_arrive_standby`), and one whose topic is not known yet
        is taken by :meth:`_take_first_standby`.
        """
        if command != _PUBLISH_QOS0 and (command & 0xF7 != _PUBLISH_QOS1
                                         or not intake.empty()):
            return False  # QoS 2, retained, or a PUBACK that must wait its turn
        size = len(body)
        if size < 3:
            return False
        end = 2 + ((body[0] << 8) | body[1])  # after the topic name
        known = self._raw_topics.get(body[2:end])
        standby = intake is self._standby_intake
        if known is None:
            if standby and command == _PUBLISH_QOS0:
                return self._take_first_standby(body, end)
            return False
        shard, topic = known
        if ((shard in self._active and not standby) or self._stopping.is_set()
                or self.config.group.buffer_max == 0):
            return False  # (the standby connection's fixes are kept, never matched)
        mid = -1
        if command != _PUBLISH_QOS0:
            if size < end + 2:
                return False
            mid = (body[end] << 8) | body[end + 1]
            end += 2
        if size <= end or body[end] != 0:
            return False  # properties: paho's way
        payload = body[end + 1:]
        if not looks_like_position(payload, self.config.feed):
            return False  # junk: not kept (_arrive)
        kept = self._keep(shard, time.time(), topic, payload)
        self._received += 1
        if mid >= 0:
            ack_mid(client, mid)
        if self._moving and shard in self._moving and standby:
            self._via_standby.setdefault(shard, set()).add(kept)
        return True

    def _take_first_standby(self, body: bytes, end: int) -> bool:
        """Take a QoS 0 PUBLISH of the standby connection whose topic is not known yet.

        ``body`` and ``end`` as in :meth:`_take_raw` (``end``: just after the topic
        name). The first fix of each topic, and a topic that names no valid vehicle:
        what :meth:`_arrive_standby` does with the message paho would make of it, from
        the raw bytes (paho's decoding and an ``aiomqtt.Message`` cost about five times
        the raw path, for every topic's first fix on every standby connection). Left to
        paho (False), as :func:`~livematch.service.mqtt.lean_receive` leaves it, when
        the packet has no topic name (an alias), properties or a topic name that is not
        UTF-8.
        """
        if end == 2 or len(body) <= end or body[end] != 0:
            return False
        try:
            topic = body[2:end].decode("utf-8")
        except UnicodeDecodeError:
            return False
        self._keep_standby(topic, body[end + 1:])
        return True

    def _arrive_standby(self, message: aiomqtt.Message) -> None:
        """Take a message of the standby connection that :meth:`_take_raw` left to paho.

        Anything unusual (properties, a topic alias, a retained or QoS 1 message):
        kept by :meth:`_keep_standby`.
        """
        payload = message.payload
        if not isinstance(payload, bytes):
            payload = bytes(payload) if isinstance(payload, bytearray) \
                else str(payload).encode()
        self._keep_standby(message.topic.value, payload)

    def _keep_standby(self, topic: str, payload: bytes) -> None:
        """Keep a message of the standby connection (shards stood by for only).

        A possible fix is kept as :meth:`_arrive` keeps it (its topic's shard is learnt
        here); nothing from this connection is matched (only shards stood by for are
        subscribed on it) or acknowledged (QoS 0), and junk and ``wrong_shard`` messages
        are left to the holder of their shard, which receives them too and publishes
        their rejects.
        """
        self._received += 1
        key = self._intake_key(topic, payload)
        if key == JUNK_KEY or key.startswith("c:") or self._stopping.is_set():
            return
        shard = self._kept_shard(topic, payload, key)
        if shard < 0:
            return
        kept = self._keep(shard, time.time(), topic, payload)
        if self._moving and shard in self._moving:
            self._via_standby.setdefault(shard, set()).add(kept)

    async def _standby_loop(self) -> None:
        """Keep the standby connection up (``group.standby_connection``), reconnecting.

        While it is down the standby shards are received on the main connection, as
        without the setting (:meth:`_sync_subscriptions`); every change of it starts a
        rebalancing round, which moves them.
        """
        cfg = self._mqtt
        backoff = backoff_delays(cfg.reconnect_min_s, cfg.reconnect_max_s)
        while not self._stopping.is_set():
            try:
                await self._standby_session(backoff)
            except (aiomqtt.MqttError, OSError) as exc:
                log.warning("standby connection lost; reconnecting",
                            extra=fields(broker=redact_url(cfg.url), error=exc))
            except Exception as exc:  # a bug: log, reconnect
                log.error("standby connection failed", exc_info=exc)
            if not self._stopping.is_set():
                await self._sleep_unless_stopping(backoff.next())

    async def _standby_session(self, backoff: Any) -> None:
        """One standby connection: read it quietly until it breaks or the daemon stops.

        Its own client id (``mqtt.client_id`` + ``-standby``) and no session kept after
        it (QoS 0 fixes are not queued for an absent subscriber anyway). aiomqtt's
        reader of its socket is removed once connected: the socket is read by the
        receive loop's turns (:meth:`_read_standby`), by a timer when those are far
        apart, and as it comes while a request waits (:meth:`_loud`). The timer is set
        again at every read, so it fires only when no read came for ``_STANDBY_LATE_S``
        (a task that slept until then and looked woke the worker 4-5 times a second
        while the receive loop read the connection anyway).
        """
        cfg = replace(self._mqtt, client_id=f"{self._mqtt.client_id}-standby",
                      session_expiry_s=0)
        intake = IntakeQueue(1, key_of=self._intake_key)  # nothing is ever queued
        intake.arrive = self._arrive_standby
        client = make_client(cfg, username=self.config.username,
                             password=self.config.password, intake=intake)
        lean_receive(client, deliver=intake.put_nowait)
        buffered_reads(client, take=functools.partial(self._take_raw, client, intake))
        async with client:
            closed = getattr(client, "_disconnected", None)
            paho: Any = client._client
            sock = paho.socket()
            if sock is not None:
                asyncio.get_running_loop().remove_reader(sock.fileno())
            backoff.reset()
            self._standby_intake = intake
            self._standby_client = client
            self._standby_read_at = time.monotonic() + _STANDBY_EVERY_S
            self._rebalance_due.set()  # move the standby shards onto it
            log.info("standby connection up", extra=fields(client_id=cfg.client_id))
            loop = asyncio.get_running_loop()
            waiter: asyncio.Future[None] = loop.create_future()
            self._sleepers.add(waiter)  # woken by request_stop
            if isinstance(closed, asyncio.Future):
                closed.add_done_callback(lambda _f: _wake(waiter))
            try:
                self._read_standby(client)  # sets the timer
                if not self._stopping.is_set():
                    await waiter
                if (not self._stopping.is_set() and isinstance(closed, asyncio.Future)
                        and closed.done()):
                    raise aiomqtt.MqttError("standby connection closed")
            finally:
                self._sleepers.discard(waiter)
                if self._standby_timer is not None:
                    self._standby_timer.cancel()
                    self._standby_timer = None
                self._standby_client = None
                self._standby_intake = None
                self._standby_subs.clear()
                self._settle_moves()
                self._rebalance_due.set()  # its shards back on the main connection

    def _read_standby(self, client: aiomqtt.Client) -> None:
        """Read what the standby connection has (kept fixes, answers, PINGRESP).

        Then set the timer that reads it ``_STANDBY_LATE_S`` from now unless a read
        comes first (a worker with nothing of its own to match).
        """
        self._standby_read_at = time.monotonic() + _STANDBY_EVERY_S
        read_now(client, _STANDBY_READS, _DRAIN_BUDGET_S)
        if self._standby_timer is not None:
            self._standby_timer.cancel()
        self._standby_timer = asyncio.get_running_loop().call_later(
            _STANDBY_LATE_S, self._standby_late, client)

    def _standby_late(self, client: aiomqtt.Client) -> None:
        """The timer of :meth:`_read_standby`: no read came for ``_STANDBY_LATE_S``."""
        self._standby_timer = None
        if self._standby_client is client and not self._stopping.is_set():
            self._read_standby(client)

    def _intake_key(self, topic: str, payload: bytes) -> str:
        """The vehicle a received message is about, for shedding (cheap; topic first).

        ``c:TOPIC`` for a control message, :data:`JUNK_KEY` for one that cannot be a
        fix, else ``v:VEHICLE`` (from the topic, else the payload) or ``t:TOPIC``. What
        the topic says is remembered per topic (:meth:`_topic_key`): a vehicle sends on
        the same topic every time, and matching it against the filters costs more than
        the rest of this (a few microseconds a message).
        """
        key = self._topic_key(topic)
        if key.startswith("c:"):
            return key
        if not looks_like_position(payload, self.config.feed):
            return JUNK_KEY  # shed before any fix
        if key:
            return key
        vehicle = known_vehicle(topic, payload, self.config.feed)
        return "v:" + vehicle if vehicle is not None else "t:" + topic

    def _topic_key(self, topic: str) -> str:
        """``c:TOPIC`` (control topic), ``v:VEHICLE`` (the feed topic's vehicle) or ""."""
        key = self._topic_keys.get(topic)
        if key is None:
            control = self._mqtt.control_topic
            if control and vehicle_from_topic(topic, control) is not None:
                key = "c:" + topic
            else:
                vehicle = vehicle_from_topic(topic, self._mqtt.topic)
                key = "v:" + vehicle if vehicle is not None else ""
            if len(self._topic_keys) >= _TOPIC_KEYS_MAX:  # bound it against topic floods
                self._topic_keys.clear()
            self._topic_keys[topic] = key
        return key

    def _count_shed(self, message: aiomqtt.Message) -> None:
        self.metrics.shed.inc()

    async def _wait_for_room(self) -> None:
        """Pause intake while the publish queue is full (the broker is slow or away)."""
        limit = self.config.publish.queue_max
        if len(self._outbox) < limit:
            return
        now = time.monotonic()
        if now - self._full_logged_at >= _FULL_LOG_EVERY_S:  # at most one line per period
            self._full_logged_at = now
            log.warning("publish queue full; intake paused until it has room",
                        extra=fields(limit=limit))
        while len(self._outbox) >= limit:
            self._outbox_changed.clear()
            await self._outbox_changed.wait()

    def _process(self, client: aiomqtt.Client, message: aiomqtt.Message,
                 key: str | None = None, kept: int = 0, shard: int = -1) -> bool:
        """Match one message, queue its outputs, then acknowledge it.

        Synchronous on purpose: nothing can interrupt it between matching and the
        acknowledgement, so a message is either fully handled (state, outputs, PUBACK)
        or not at all (and redelivered). Returns True when the message was only
        acknowledged (another worker's shard), False when it was handled here.
        ``key`` is the message's intake key (:meth:`_intake_key`, computed when it
        arrived), which tells without decoding the payload again whether it can be a
        fix; None: decode it. ``kept`` is the message's sequence number in the buffer of
        ``shard``, where :meth:`_arrive` kept it (0: not kept on arrival).
        """
        self._received += 1
        payload = message.payload
        if not isinstance(payload, bytes | bytearray):
            payload = str(payload).encode()
        payload = bytes(payload)
        topic = message.topic.value
        at = time.time()
        if kept and self.leases is not None:
            # A possible fix of `shard`, kept when it arrived. Matched if this worker
            # matches the shard, unless a replay of the shard (it was lost and taken
            # again while the message waited here) has matched it already.
            self._check_deadlines()
            if shard not in self._active or kept <= self._replayed_upto.get(shard, 0):
                ack(client, message)
                return True
            self._handle(topic, payload, at)
            ack(client, message)
            return False
        # read once for the shard checks below (it may decode the payload)
        vehicle = (known_vehicle(topic, payload, self.config.feed)
                   if self._sharded_topic or self.leases is not None else None)
        wrong = self._wrong_shard(topic, payload, at, vehicle)
        if wrong is not None:  # published by the holder of the topic's shard
            if self.leases is None or self._answers(self._topic_shard(topic)):
                self._route(wrong)
            ack(client, message)
            return False
        if self.leases is not None:
            self._check_deadlines()
            of = self._message_shard(topic, vehicle)
            if of is not None:
                shard = of
                # A possible fix is kept whoever holds the shard: replayed if this worker
                # takes it (again) after its holder (or this worker, cut off from Redis)
                # lost it. A message that cannot be a fix changes no state; it is only
                # rejected, by the worker holding its shard now.
                possible = (key != JUNK_KEY if key is not None and not key.startswith("c:")
                            else looks_like_position(payload, self.config.feed))
                if possible and key is None:  # else _arrive kept it (or buffer_max = 0)
                    self._keep(shard, at, topic, bytes(payload))
                if not (shard in self._active or (shard in self._taking and not possible)):
                    ack(client, message)  # another worker's message (or being replayed)
                    return True
        self._handle(topic, bytes(payload), at)
        ack(client, message)
        return False

    def _handle(self, topic: str, payload: bytes, at: float) -> None:
        """Match one message and queue its outputs (no acknowledgement)."""
        started = time.perf_counter()
        try:
            outputs = self.pipeline.handle(topic, bytes(payload), at)
            if self._may_tick(at):  # as replay does after every message
                outputs += self.pipeline.tick(at)
        except Exception as exc:  # a bug must not stop the feed: reject, log, go on
            log.exception("pipeline error", extra=fields(topic=topic))
            outputs = [_internal_reject(topic, bytes(payload), exc)]
        try:
            self.pipeline.park_idle(at, _PARK_PER_MESSAGE)  # nothing while parking is off
        except Exception:  # the message's outputs stand; the vehicle stays live
            log.exception("parking error")
        self.metrics.processing.observe(time.perf_counter() - started)
        for out in outputs:
            if self.leases is None or self._answers(self._shard(out.vehicle or topic)):
                self._route(out)

    def _answers(self, shard: int) -> bool:
        """Whether this worker publishes the outputs of a shard (held, or being replayed)."""
        return shard in self._active or shard in self._taking

    def _may_tick(self, now: float) -> bool:
        """Whether ``stale`` may be judged at ``now``: only after listening for stale_s.

        A vehicle is stale when the daemon heard nothing from it for ``stale_s`` while
        it was listening. Right after a (re)connection its queued fixes may still be on
        their way, and while disconnected it is the daemon that hears nothing.
        """
        if not self.broker_connected or self._listening_since is None:
            return False
        settings = getattr(self.pipeline, "alert_settings", None)
        stale_s = getattr(settings, "stale_s", self.config.alerts.stale_s)
        return now - self._listening_since >= float(stale_s)

    def _sync_labelled(self, tag: str, counts: Mapping[Any, int], cache: dict[Any, Any],
                       make: Callable[[Any], Any]) -> None:
        """Carry one family of per-label counts into its labelled metric (see below).

        ``counts``: the running count per label value; ``cache``: the labelled children
        made so far (``make(value)`` makes one); what was carried is kept in
        ``self._synced`` under ``(tag, value)``.
        """
        synced = self._synced
        for key, value in list(counts.items()):
            delta = value - synced[tag, key]
            if delta > 0:
                counter = cache.get(key)
                if counter is None:
                    counter = cache[key] = make(key)
                counter.inc(delta)
                synced[tag, key] = value

    def _sync_counters(self) -> None:
        """Carry the counts kept per message into the metrics.

        The pipeline's counters (fixes, filtered:<reason>) and the daemon's own
        (messages received, fixes kept in a group, outputs published by kind,
        assignments by eps level).
        Called when the metrics are rendered, not per message: it walks every counter of
        the pipeline (a few microseconds a message), a prometheus_client increment takes
        a lock, and nothing else reads these metrics.
        """
        synced = self._synced
        delta = self._received - synced["received"]
        if delta > 0:
            self.metrics.received.inc(delta)
            synced["received"] = self._received
        delta = self._kept_seq - synced["kept"]
        if delta > 0:
            self.metrics.buffered.inc(delta)
            synced["kept"] = self._kept_seq
        self._sync_labelled("published", self._published_n, self._published_counters,
                            lambda kind: self.metrics.published.labels(kind=kind))
        self._sync_labelled("eps", self._eps_n, self._eps_counters,
                            lambda eps: self.metrics.eps_level.labels(eps_m=f"{eps}"))
        for key, value in self.pipeline.counters.items():
            delta = value - self._seen_counters[key]
            if delta <= 0:
                continue
            self._seen_counters[key] = value
            if key == "fixes":
                self.metrics.fixes.inc(delta)
            elif key == "late":  # matched, but far behind its receive time
                self.metrics.late.inc(delta)
            elif key == "duplicate":  # a redelivered fix, dropped by (vehicle, time)
                self._filtered("duplicate").inc(delta)
            elif key.startswith("filtered:"):
                self._filtered(key.split(":", 1)[1]).inc(delta)
            elif key == "vehicle:parked":  # [store] park_after_s
                self.metrics.parks.inc(delta)
            elif key == "vehicle:unparked":
                self.metrics.unparks.inc(delta)

    def _filtered(self, reason: str) -> Any:
        """The ``livematch_fixes_filtered`` child of ``reason`` (looked up once)."""
        child = self._filtered_counters.get(reason)
        if child is None:
            child = self._filtered_counters[reason] = self.metrics.filtered.labels(
                reason=reason)
        return child

    def _route(self, out: OutputLike) -> None:
        """Count an output, update the latest state, and queue it unless throttled."""
        cfg = self.config.mqtt
        record = out.record
        vehicle = out.vehicle
        if out.kind == "reject" or vehicle is None:
            reason = str(record.get("reason", "unknown"))
            self.metrics.rejected.labels(reason=reason).inc()
            if reason == "too_many_vehicles":
                self._log_cap(vehicle)
            if len(self._reject_box) >= self.config.publish.reject_queue_max:
                self.metrics.rejects_suppressed.labels(why="queue_full").inc()
            else:
                self._reject_box.append(_Pending(cfg.reject_topic, encode_record(record),
                                                 "reject", False, None))
                self._outbox_changed.set()
                self._send_soon()
            return
        payload = encode_record(record)
        fix_time = record.get("time")
        if out.kind == "assignment":
            self._eps_n[record.get("eps_m")] += 1
            self._latest[vehicle] = payload
            self._latest_dirty.add(vehicle)
            self._fixes_since[vehicle] += 1
            if self._fixes_since[vehicle] >= self.config.store.checkpoint_every_fixes:
                self._checkpoint_due.set()
            if isinstance(fix_time, int | float):
                # Idle eviction runs on fix time. A device whose clock runs ahead must not
                # make every other vehicle look idle: cap at the wall clock + 5 min.
                clock = min(float(fix_time), time.time() + _CLOCK_AHEAD_S)
                self._newest_fix_t = max(self._newest_fix_t or clock, clock)
            if self.config.publish.throttle_s > 0 and self._throttled(vehicle, record):
                self.metrics.throttled.inc()
                return
            topic = cfg.match_topic
        elif out.kind == "commit":
            topic = cfg.commit_topic
        elif out.kind == "alert":
            topic = cfg.alert_topic
        else:
            log.warning("unknown output kind dropped", extra=fields(kind=out.kind))
            return
        retain = self.config.publish.retain_latest and out.kind == "assignment"
        stamp = float(fix_time) if isinstance(fix_time, int | float) else None
        self._enqueue(_Pending(topic.replace("{vehicle}", vehicle), payload, out.kind,
                                     retain, stamp))

    def _log_cap(self, vehicle: str | None) -> None:
        """Say (at most once per ``_FULL_LOG_EVERY_S``) that new vehicles are refused."""
        now = time.monotonic()
        if now - self._cap_logged_at >= _FULL_LOG_EVERY_S:
            self._cap_logged_at = now
            log.warning("vehicle cap reached; fixes of new vehicles are rejected "
                        "(too_many_vehicles)",
                        extra=fields(max_vehicles=self.config.feed.max_vehicles,
                                     vehicle=vehicle))

    def _throttled(self, vehicle: str, record: Mapping[str, Any]) -> bool:
        """True when this assignment is held back: same road and within throttle_s."""
        throttle = self.config.publish.throttle_s
        road, t = record.get("way"), float(record.get("time", 0.0))
        last = self._last_published.get(vehicle)
        if throttle > 0 and last is not None and last[0] == road and t - last[1] < throttle:
            return True
        self._last_published[vehicle] = (road, t)
        return False

    def _enqueue(self, item: _Pending) -> None:
        """Queue an output (the queue may pass queue_max by one message's outputs)."""
        self._outbox.append(item)
        self._enqueued += 1
        self._outbox_changed.set()
        self._send_soon()

    def _send_soon(self) -> None:
        """Hand queued outputs to the broker connection now if the window has room.

        Called as each output is queued, before the message it answers is acknowledged,
        so both leave in one write at the end of the turn (``mqtt.write_soon``), without
        a turn of the publish loop per message. Between connections, or when paho
        refuses a message, the publish loop is woken instead (and meets the refusal
        itself, which ends the connection as before).
        """
        send_now = self._send_now
        if send_now is None:
            self._send_due.set()
            return
        try:
            send_now()
        except Exception:  # the publish loop sends again and fails in its own task
            self._send_due.set()

    async def _publish_loop(self, client: aiomqtt.Client) -> None:
        """Publish queued outputs oldest first; one leaves the queue once acknowledged.

        Assignments, commits and alerts go before rejects: a flood of bad input delays
        only its own dead letters. Up to ``_PUBLISH_WINDOW`` publishes are in flight at
        once (each queue's in order; paho also respects the broker's Receive Maximum),
        so throughput is not bound by one round trip per output. Each is handed to paho
        directly (:func:`~livematch.service.mqtt.publish_now`, no task per message): as
        it is queued when the window has room (:meth:`_send_soon`), else by this loop
        once a PUBACK made room. Every PUBACK retires the acknowledged head of the
        window where it is read (:func:`~livematch.service.mqtt.on_acknowledged`, in the
        event loop's thread), so the loop itself wakes only for outputs it has yet to
        send and for stopping. An acknowledgement is awaited without a time limit: under
        a flood the broker's PUBACK queues behind the messages it is sending us, and a
        dead connection is found by the MQTT keepalive (the receive loop then ends the
        session). After a broken connection everything not yet acknowledged is still
        queued and is sent again.
        """
        qos = self.config.mqtt.qos
        inflight: deque[tuple[Any, bool]] = deque()  # (paho message info, is reject)
        sent = [0, 0]  # in flight from self._outbox, from self._reject_box (their heads)
        outbox, rejects = self._outbox, self._reject_box
        changed, due = self._outbox_changed, self._send_due
        published = self._published_n
        lag = self.metrics.lag
        active = [True]  # retire() does nothing once this connection's loop has ended

        def send() -> None:
            while len(inflight) < _PUBLISH_WINDOW:
                if len(outbox) > sent[0]:
                    is_reject, item = False, outbox[sent[0]]
                elif len(rejects) > sent[1]:
                    is_reject, item = True, rejects[sent[1]]
                else:
                    return
                info = publish_now(client, item.topic, item.payload, qos=qos,
                                   retain=item.retain)
                sent[is_reject] += 1  # only once paho took it (it may refuse: raises)
                inflight.append((info, is_reject))

        def retire(mid: int) -> None:
            """Retire the acknowledged head of the window (``mid``: just acknowledged)."""
            if not active[0]:
                return
            retired = False
            while inflight and (inflight[0][0].mid == mid or inflight[0][0].is_published()):
                _info, is_reject = inflight.popleft()
                sent[is_reject] -= 1
                retired = True
                if is_reject:
                    item = rejects.popleft()
                else:
                    item = outbox.popleft()
                    self._acked += 1
                published[item.kind] += 1
                if item.kind == "assignment" and item.fix_time is not None:
                    lag.observe(max(0.0, time.time() - item.fix_time))
            if retired:
                changed.set()  # room in the publish queue (_wait_for_room, _outputs_acked)
                if self._intake_closed or len(outbox) > sent[0] or len(rejects) > sent[1]:
                    due.set()  # outputs wait for room in the window, or stopping

        on_acknowledged(client, retire)
        self._send_now = send
        try:
            while True:
                send()
                if not inflight and self._intake_closed:
                    return  # stopping and drained
                if self._intake_closed and time.monotonic() > self._drain_deadline:
                    return  # grace over: what is left is counted as dropped
                due.clear()
                if self._intake_closed:
                    with contextlib.suppress(TimeoutError):
                        await asyncio.wait_for(due.wait(), max(
                            0.001, self._drain_deadline - time.monotonic()))
                else:
                    await due.wait()  # outputs the window had no room for, or stopping
        finally:
            active[0] = False
            if self._send_now is send:
                self._send_now = None

    # -- helpers -------------------------------------------------------------------

    async def _sleep_unless_stopping(self, seconds: float) -> None:
        """Sleep ``seconds`` (none when not positive), or until a stop is requested.

        One future, resolved by a timer or by :meth:`request_stop`: woken in two turns
        of the event loop, where ``asyncio.wait_for`` on the stop event takes four (a
        task for the event's wait, cancelled on the timeout and then awaited), and under
        a flood each turn can last 0.1-0.4 s (the lease loop sleeps here).
        """
        if seconds <= 0 or self._stopping.is_set():
            return
        loop = asyncio.get_running_loop()
        waiter: asyncio.Future[None] = loop.create_future()
        timer = loop.call_later(seconds, _wake, waiter)
        self._sleepers.add(waiter)
        try:
            await waiter
        finally:
            timer.cancel()
            self._sleepers.discard(waiter)

    def _render_metrics(self) -> bytes:
        self._sync_counters()
        self.metrics.vehicles.set(len(self.pipeline.vehicles()))
        self.metrics.parked.set(self.pipeline.parked())
        self.metrics.memory.set(_resident_bytes())
        return self.metrics.render()


def _resident_bytes() -> float:
    """Resident set size of this process in bytes (Linux ``/proc``; NaN elsewhere)."""
    try:
        with open("/proc/self/statm", encoding="ascii") as f:
            return float(int(f.read().split()[1]) * os.sysconf("SC_PAGE_SIZE"))
    except (OSError, ValueError, IndexError):
        return math.nan


def _default_worker() -> str:
    """``HOSTNAME-PID``, reduced to the characters a worker name may hold."""
    name = re.sub(r"[^A-Za-z0-9._\-]", "-", f"{socket.gethostname()}-{os.getpid()}")
    return name[-64:]


def _disconnected(client: aiomqtt.Client) -> bool:
    """Whether aiomqtt saw the connection end (messages may still be queued then)."""
    done = getattr(client, "_disconnected", None)
    return isinstance(done, asyncio.Future) and done.done()


def _observe_disconnect(client: aiomqtt.Client) -> None:
    """Retrieve the error of aiomqtt's disconnection future whenever it is set.

    aiomqtt sets an exception on it when the connection breaks, and its ``__aexit__``
    returns without looking at it when it is already done. When the connection broke
    while the daemon was stopping (the broker stopped with it; the receive loop, which
    otherwise reads it, had ended), nobody did, and asyncio printed "Future exception
    was never retrieved" when the future was collected. The error itself is reported
    as before: the receive loop raises it as the cause of the session's end.
    """
    closed = getattr(client, "_disconnected", None)
    if isinstance(closed, asyncio.Future):
        closed.add_done_callback(_retrieve_error)


def _retrieve_error(future: asyncio.Future[Any]) -> None:
    if not future.cancelled():
        future.exception()


def _wake(waiter: asyncio.Future[None]) -> None:
    """Resolve a sleeper's future unless it is already done (woken or cancelled)."""
    if not waiter.done():
        waiter.set_result(None)


def _internal_reject(topic: str, payload: bytes, exc: Exception) -> Output:
    """A reject record (same fields as the pipeline's) for a message whose handling failed."""
    return Output("reject", None, {
        "at": time.time(), "topic": topic, "reason": "internal_error",
        "detail": f"{type(exc).__name__}: {exc}"[:200],
        "payload": payload.decode("utf-8", "replace")[:REJECT_PAYLOAD_CHARS],
    })
