"""The per-message pipeline shared by ``livematch replay`` and the daemon.

One call per received message: decode and validate (:mod:`livematch.feed.decode`),
drop redeliveries by (vehicle, time), hand the fix to that vehicle's
:class:`~livematch.core.tracker.Tracker` (created on its first fix) and turn the events
into published records (:func:`~livematch.core.events.to_record`, built by a
:class:`~livematch.core.events.RecordBuilder` that reads each segment's ids once)::

    pipeline = Pipeline(network, MatchSettings())
    for out in pipeline.handle("fleet/bus17/position", payload, at=received):
        publish(out.kind, out.vehicle, out.record)
    ...
    final = pipeline.flush()          # end of a log: commit everything pending

Both the replay command and the daemon go through :meth:`Pipeline.handle`, so the same
messages give the same records, byte for byte, whichever of them ran. The pipeline reads
no clock: ``at`` (the receive time) only goes into reject records and the stale watch.

Alerts (:mod:`livematch.core.monitors`): every fix the tracker accepts also goes to the
vehicle's monitors (route, geofences, off-network), whose alerts come out as
``Output(kind="alert")`` right after that fix's assignment. A vehicle's route is, in this
order of precedence: the latest retained *control* message on ``livematch/control/{vehicle}/
route`` (payload ``{"route": "550"}``, ``"550"``, or empty / ``{"route": null}`` to
clear it), the ``route`` field of the fix, the static ``vehicle_routes`` mapping. A route
id that is not loaded gives one ``reject`` record with reason ``unknown_route`` each time
a vehicle asks for it (the fix is still matched); with no routes loaded at all, route ids
are ignored. Staleness needs a clock the core does not have: the shell calls
:meth:`Pipeline.tick` with the current receive time (``livematch replay`` calls it with
each message's ``at``), and a vehicle from which nothing arrived for ``stale_s`` seconds
of receive time gets a ``stale`` alert (``fresh`` when it reports again).

Bad input never raises: a message that cannot be decoded becomes an
``Output(kind="reject")`` and a counter. Every outcome is counted in
:attr:`Pipeline.counters` (a :class:`collections.Counter`):

================================  ==========================================================
``messages``                      every message handled
``reject:<reason>``               refused by the decoder (reason codes of ``feed.decode``,
                                  ``future_time`` and ``rate_limited`` included)
``duplicate``                     same (vehicle, time) as a fix already taken: dropped
``late``                          fixes taken although more than ``max_age_s`` behind ``at``
``fixes``                         fixes handed to a tracker
``filtered:<reason>``             refused by the tracker's filters (out_of_order...) or
                                  matched by no eps level (``no_road_nearby``,
                                  ``road_beyond_eps``); one reason per fix
``assignments`` ``commits``       published events, by kind
``alerts`` ``alert:<kind>``
``control``                       control messages taken (route assignments)
``eps_m:<eps>``                   assignments certified at that eps level (e.g. ``eps_m:15.0``)
``vehicle:new`` ``vehicle:...``   trackers created, ``imported``, ``evicted``, ``dropped``,
                                  ``parked``, ``unparked``
================================  ==========================================================

Parking (``park_after_s`` > 0, the ``[store] park_after_s`` setting): a vehicle from which
no message arrived for more than ``park_after_s`` seconds of receive time is kept as its
checkpoint bytes (:meth:`Pipeline.export_vehicle`'s, deflated as a whole against a preset
dictionary: about 2.9 KB at 15-30 s between fixes, 0.85 of the checkpoint) instead of its
live tracker and monitors (16-22 KB at those intervals), and restored when its next
message arrives or anything else needs it (a stale check that is due, eviction, the
end-of-log flush). The shell says when: :meth:`Pipeline.park_idle` with its receive
clock (``livematch replay`` after every message with that message's ``at``; the daemon a
few vehicles after every message and in each round of its checkpoint loop, on its wall
clock). A restored tracker goes on exactly as one never stopped, so parking changes no
output; it trades the CPU of a save and a restore per parked interval for the memory of
a live vehicle.
"""

from __future__ import annotations

import bisect
import functools
import itertools
import json
import math
import typing
import zlib
from array import array
from collections import Counter, OrderedDict
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, fields
from typing import Any

import msgspec

from livematch.core import routing
from livematch.core.candidates import warm_up
from livematch.core.events import (
    Alert,
    Assignment,
    Commit,
    Event,
    Filtered,
    HeldAssignment,
    RecordBuilder,
)
from livematch.core.fix import Fix
from livematch.core.monitors import (
    AlertSettings,
    Fence,
    FenceSet,
    Route,
    RouteChain,
    _fence_kernel,
    _route_kernel,
)
from livematch.core.monitors.vehicle import VehicleAlerts
from livematch.core.network import RoadNetwork
from livematch.core.settings import MatchSettings
from livematch.core.tracker import Tracker
from livematch.errors import (
    BadConfigError,
    BadMessageError,
    BadStateError,
    UnknownVehicleError,
)
from livematch.feed.decode import (
    FeedLimits,
    PositionReader,
    _filter_shape,
    known_vehicle,
    validate_vehicle,
    vehicle_from_topic,
)
from livematch.wire import Blob as _Blob

__all__ = [
    "CONTROL_TOPIC",
    "DEDUPE_WINDOW",
    "REJECT_PAYLOAD_CHARS",
    "STATE_MAGIC",
    "STATE_VERSION",
    "Output",
    "Pipeline",
    "UnknownVehicleError",
    "alert_settings_from_mapping",
    "matcher_settings_from_mapping",
]

#: How many of a vehicle's most recent fix times are remembered for dedupe. Larger than
#: the longest reorder window (32), so a redelivered fix the tracker could still take is
#: always recognised; an even older one is refused by the tracker as out of order.
DEDUPE_WINDOW = 64
#: A reject record keeps at most this many characters of the payload.
REJECT_PAYLOAD_CHARS = 512
#: Checkpoint blobs start with this and a version byte.
STATE_MAGIC = b"LMPV"
#: Version 2 adds the alert monitors' state (zlib-compressed JSON); version 3 writes the
#: same state as msgpack (a tenth of the CPU: no float-to-text, no compression; doubles
#: kept bit for bit, infinities included). Versions 1 and 2 are still read (version 1
#: vehicles start with fresh monitors).
STATE_VERSION = 3
_READABLE_VERSIONS = (1, 2, 3)
#: Default topic filter of the route control messages; its ``+`` level is the vehicle.
CONTROL_TOPIC = "livematch/control/+/route"
_DEFAULT_LIMITS = FeedLimits()
#: zlib level of a parked vehicle's bytes (:meth:`Pipeline._park`). Level 4 against the
#: preset dictionary: 0.78 of the checkpoint's size for about 40 µs more per park than
#: the checkpoint's own level-1 tracker state (``bench/parkbytes.py``, docs/measured.md
#: "Session 27 (park27)"); level 6 is 0.74 for about three times that.
PARK_LEVEL: typing.Final = 4
#: A parked vehicle's uncompressed bytes at least this long become the pipeline's preset
#: dictionary (its last :data:`_ZDICT_MAX` bytes), if it has none yet: a state with
#: trees and routes in it, whose names, layout and numbers recur in every other one.
_PARK_DICT_MIN: typing.Final = 8192
#: deflate refers back at most 32 KB: a longer dictionary's start is never read
_ZDICT_MAX: typing.Final = 32768
#: Whether this module runs compiled (mypyc): see ``livematch.core.fix._COMPILED``.
_COMPILED: typing.Final = not __file__.endswith((".py", ".pyc"))


@dataclass(frozen=True, slots=True, init=False)
class Output:
    """One thing to publish.

    Attributes:
        kind: ``"assignment"``, ``"commit"``, ``"alert"`` or ``"reject"``.
        vehicle: the vehicle id; None only for a reject whose vehicle could not be read.
        record: the JSON contract record; for rejects ``at``, ``topic``, ``reason``,
            ``detail``, ``payload`` (the payload as text, at most 512 characters).

    One or two are made per message, so ``__init__`` is written by hand as
    :class:`~livematch.core.fix.Fix`'s is (compiled: direct stores; as Python: through
    the slots); equality, ``repr`` and immutability are the dataclass's.
    """

    kind: str
    vehicle: str | None
    record: dict[str, Any]

    def __init__(self, kind: str, vehicle: str | None, record: dict[str, Any]) -> None:
        if _COMPILED:  # native object: direct stores (its frozen __setattr__ is not called)
            self.kind = kind  # type: ignore[misc]
            self.vehicle = vehicle  # type: ignore[misc]
            self.record = record  # type: ignore[misc]
            return
        # pure Python: through the slots' own setters, as the generated __init__ does
        _set_kind(self, kind)
        _set_vehicle(self, vehicle)
        _set_record(self, record)

    def __reduce__(self) -> tuple[type[Output], tuple[object, ...]]:
        """Pickle as a call of the constructor.

        See :meth:`livematch.core.events.Assignment.__reduce__`: compiled, the frozen class
        refuses to be restored field by field.
        """
        return type(self), (self.kind, self.vehicle, self.record)


_set_kind = vars(Output)["kind"].__set__
_set_vehicle = vars(Output)["vehicle"].__set__
_set_record = vars(Output)["record"].__set__


def _plain_number(value: Any) -> float:
    """The msgpack stand-in for a value msgspec cannot write in a monitor's state.

    A float subclass (``numpy.float64``, which msgspec refuses) is written as the float
    it equals, as version 2's JSON wrote it; anything else JSON could not hold either
    is refused.
    """
    if isinstance(value, float):
        return float(value)
    raise TypeError(f"checkpoint cannot hold a value of type {type(value).__name__}")


_BLOB_ENCODER = msgspec.msgpack.Encoder()
_BLOB_DECODER = msgspec.msgpack.Decoder(_Blob)
_ALERTS_ENCODER = msgspec.msgpack.Encoder(enc_hook=_plain_number)
_ALERTS_DECODER = msgspec.msgpack.Decoder()


class _VehicleState:
    """A vehicle's tracker, dedupe memory (sorted recent fix times) and alert monitors.

    The dedupe memory holds each time as ``base + recent[i]``: float32 offsets from
    ``base`` (4 bytes a time) while every time is exactly that sum, as it is for the
    whole-second or binary-fraction times of most feeds; otherwise doubles with ``base``
    0.0 (:meth:`keep`). Every time held is exactly ``base + recent[i]`` (double
    addition), and the sum rises with the offset, so the offsets are sorted as the
    times are and the answers are those of a window of doubles.

    ``pending`` holds the fixes handed to the tracker that it has not answered yet (None
    while there are none: an empty dict costs 64 bytes for every vehicle between fixes).
    The rate limit's bucket is three slots (``tokens`` -1.0 before the first fix: it is
    never below 0.0 after, see :meth:`allow`) rather than a tuple rebuilt at every fix;
    an unboxed double, not a float object (24 bytes a vehicle, one made at every fix).
    """

    __slots__ = ("alerts", "base", "last_at", "last_t", "pending", "recent", "tokens",
                 "tracker")

    def __init__(self, tracker: Tracker, recent: list[float] | None = None) -> None:
        self.tracker = tracker
        # unboxed: float32 offsets from base (4 bytes a time; doubles were 8 and about
        # 280 bytes more a driven vehicle, bench/memory.py step 6), or doubles (keep)
        self.base = 0.0
        self.recent: array[float] = array("f")
        if recent:
            self.keep(recent)
        self.alerts = VehicleAlerts()
        self.pending: dict[float, Fix] | None = None
        # Rate limit: tokens, receive time and newest fix time after the last fix checked.
        self.tokens = -1.0
        self.last_at = 0.0
        self.last_t = 0.0

    def allow(self, at: float, t: float, rate_hz: float) -> bool:
        """Token bucket of ``rate_hz`` fixes per second, burst ``max(1, rate_hz)``.

        Tokens refill by the larger of the receive time and the fix time elapsed since
        the last fix: a burst of queued fixes delivered at once after an outage (receive
        times equal, fix times a second apart) passes, a sender flooding with fix times
        close together does not. The fix time cannot run ahead of the receive time by
        more than ``max_future_s``, and the burst caps what a jump can buy.
        """
        if rate_hz <= 0:
            return True
        cap = rate_hz if rate_hz > 1.0 else 1.0
        tokens = self.tokens
        if tokens < 0.0:  # the first fix (the bucket stays within [0, cap] after it)
            tokens = cap
            self.last_at = at
            self.last_t = t
        else:
            # min(cap, tokens + max(at - last_at, t - last_t, 0.0) * rate_hz), written out
            # (the same floats; no calls)
            last_at = self.last_at
            last_t = self.last_t
            gain = at - last_at
            if t - last_t > gain:
                gain = t - last_t
            if gain < 0.0:
                gain = 0.0
            tokens = tokens + gain * rate_hz
            if not tokens < cap:  # as min(cap, tokens) decides (NaN included)
                tokens = cap
            if not last_at > at:  # as max(at, last_at) decides
                self.last_at = at
            if not last_t > t:
                self.last_t = t
        if tokens >= 1.0:
            self.tokens = tokens - 1.0
            return True
        self.tokens = tokens
        return False

    def keep(self, times: list[float]) -> None:
        """Hold ``times`` (sorted, at most ``DEDUPE_WINDOW``) as the dedupe memory.

        As float32 offsets from the oldest when each one plus it gives the time back
        exactly, else as doubles (``base`` 0.0, where ``0.0 + t == t`` for every time).
        """
        base = times[0] if times else 0.0
        offsets = array("f", [x - base for x in times])
        if all(base + o == x for o, x in zip(offsets, times, strict=True)):
            self.base = base
            self.recent = offsets
        else:
            self.base = 0.0
            self.recent = array("d", times)

    def times(self) -> list[float]:
        """The fix times held, oldest first."""
        base = self.base
        return [base + o for o in self.recent]

    def add_newest(self, t: float) -> None:
        """Hold ``t``, newer than every time held (the usual case: one append)."""
        recent = self.recent
        if not recent:
            self.keep([t])
            return
        base = self.base
        recent.append(t - base)
        if base + recent[-1] != t:  # not exact as a float32 offset from base
            self.keep(([base + o for o in recent[:-1]] + [t])[-DEDUPE_WINDOW:])
        elif len(recent) > DEDUPE_WINDOW:
            del recent[0]

    def seen(self, t: float) -> bool:
        recent = self.recent
        base = self.base
        if not recent or t > base + recent[-1]:
            return False  # newer than every time held: the usual case, no search
        times = self.times()
        i = bisect.bisect_left(times, t)
        return i < len(times) and times[i] == t

    def remember(self, t: float) -> None:
        recent = self.recent
        if not recent or t > self.base + recent[-1]:
            self.add_newest(t)
            return
        times = self.times()  # an older time (rare): the window built again
        bisect.insort(times, t)
        self.keep(times[-DEDUPE_WINDOW:])

    @property
    def newest(self) -> float | None:
        return self.base + self.recent[-1] if self.recent else None


class _Parked:
    """A parked vehicle: its checkpoint bytes and what the pipeline reads without them.

    ``blob`` is :meth:`Pipeline.export_vehicle`'s msgpack array at parking time with the
    tracker state left uncompressed, deflated as a whole (raw deflate, zlib level
    :data:`PARK_LEVEL`) against the pipeline's preset dictionary when ``zdict`` (see
    :meth:`Pipeline._park`); ``newest`` its newest fix time (idle eviction); ``watch_at``
    the stale watch's receive time while the vehicle is not stale (None: no watch yet,
    or stale already), so that :meth:`Pipeline.tick` restores it only when the watch
    would fire; ``tokens``, ``last_at`` and ``last_t`` the rate limit's bucket, which a
    checkpoint does not carry (a vehicle restored on another worker starts with a full
    bucket; a parked one must go on with its own).
    """

    __slots__ = ("blob", "last_at", "last_t", "newest", "tokens", "watch_at", "zdict")

    def __init__(self, blob: bytes, zdict: bool, state: _VehicleState) -> None:
        self.blob = blob
        self.zdict = zdict
        self.newest = state.newest
        watch = state.alerts.watch
        self.watch_at = watch.at if watch is not None and not watch.stale else None
        self.tokens = state.tokens
        self.last_at = state.last_at
        self.last_t = state.last_t



@functools.cache
def prepare_kernels() -> None:
    """Compile (or load) the matcher's kernels, once per process (see ``warm_up``).

    Every Pipeline calls it; a program that hosts other work on its event loop (the
    demo's embedded broker) calls it before starting that work.
    """
    warm_up()
    routing.warm_up()  # the bounded search of bridged steps (fixes 10 s or more apart)
    _route_kernel.warm_up()  # the route monitor's window step (both directions, one call)
    _fence_kernel.warm_up()  # the fence probe


class Pipeline:
    """Decode, dedupe, track and publish: the whole per-message path of one worker.

    Args:
        network: the road network every tracker matches against.
        settings: the ``[matcher]`` settings (validated here).
        limits: what incoming messages may contain, and the topic filter whose ``+``
            level names the vehicle.
        routes: route id -> :class:`~livematch.core.monitors.Route` (projected into the
            network's CRS; :mod:`livematch.mapdata.routes` loads them). None: no route
            monitoring, route ids in fixes are ignored.
        fences: the geofences (:mod:`livematch.mapdata.fences` loads them), or None.
        alerts: the ``[alerts]`` settings (validated here); None: the defaults.
        vehicle_routes: static vehicle id -> route id, the last resort for a route.
        vehicle_groups: vehicle id -> group names, for fences that watch groups.
        control_topic: topic filter of route control messages (its ``+`` level is the
            vehicle); "" turns control messages off.
        park_after_s: keep a vehicle from which nothing arrived for more than this many
            seconds of receive time as its checkpoint bytes (:meth:`park_idle`); 0 (the
            default) keeps every vehicle live.

    Raises:
        BadConfigError: when ``settings`` or ``alerts`` has an invalid value, two
            fences share an id, or ``park_after_s`` is negative or not finite.

    Example (a degenerate run: one message that is not JSON)::

        >>> from livematch.core.build import Road, network_from_roads
        >>> net = network_from_roads([Road([(0.0, 0.0), (100.0, 0.0)], way=1)])
        >>> p = Pipeline(net, MatchSettings())
        >>> [(o.kind, o.vehicle, o.record["reason"]) for o in
        ...  p.handle("fleet/bus17/position", b"hello", at=5.0)]
        [('reject', 'bus17', 'not_json')]
        >>> p.counters["reject:not_json"], p.vehicles(), p.flush()
        (1, [], [])
    """

    def __init__(self, network: RoadNetwork, settings: MatchSettings, *,
                 limits: FeedLimits = _DEFAULT_LIMITS,
                 routes: Mapping[str, Route] | None = None,
                 fences: Sequence[Fence] | None = None,
                 alerts: AlertSettings | None = None,
                 vehicle_routes: Mapping[str, str] | None = None,
                 vehicle_groups: Mapping[str, Iterable[str]] | None = None,
                 control_topic: str = CONTROL_TOPIC,
                 park_after_s: float = 0.0) -> None:
        if not (math.isfinite(park_after_s) and park_after_s >= 0):
            raise BadConfigError(f"store.park_after_s must be a number of seconds >= 0, "
                                 f"got {park_after_s}")
        problems = settings.problems()
        if problems:
            raise BadConfigError("; ".join(f"matcher.{key} {what}" for key, what in problems))
        self.alert_settings = alerts if alerts is not None else AlertSettings()
        problems = self.alert_settings.problems()
        if problems:
            raise BadConfigError("; ".join(f"alerts.{key} {what}" for key, what in problems))
        self.network = network
        self.settings = settings
        self.limits = limits
        self.counters: Counter[str] = Counter()
        self._records = RecordBuilder(network)
        self._eps_keys: dict[float, str] = {}  # eps level -> its counter name
        self._vehicles: dict[str, _VehicleState] = {}
        self.routes: dict[str, Route] | None = dict(routes) if routes is not None else None
        self._chains: dict[int, RouteChain] = {}
        try:
            self.fences = FenceSet(fences, self.alert_settings) if fences else None
        except ValueError as exc:
            raise BadConfigError(f"fences: {exc}") from exc
        self.vehicle_routes = dict(vehicle_routes or {})
        self.vehicle_groups = {v: tuple(g) for v, g in (vehicle_groups or {}).items()}
        self.control_topic = control_topic
        # what handle works out once per limits / control filter (rebuilt if either is
        # replaced): the decoder, and the control filter's shape (_filter_shape)
        self._reader = PositionReader(network.projection, limits)
        self._control_for = control_topic
        self._control_shape = _filter_shape(control_topic) if control_topic else None
        self._control: dict[str, str] = {}  # vehicle -> route id from control messages
        self._stale_due = math.inf  # no vehicle can turn stale before this receive time
        # No vehicle's newest fix is older than this (fix time): until now_fix_time - ttl
        # passes it, no vehicle is idle and idle_vehicles need not look at each one.
        self._idle_floor = -math.inf
        self.park_after_s = float(park_after_s)
        self._parked: dict[str, _Parked] = {}
        # the preset dictionary of parked vehicles' bytes (b"": none chosen yet; _park)
        self._park_zdict = b""
        # Live vehicles by the receive time of their last message, oldest first (kept
        # only while parking is on): park_idle takes them from the front.
        self._arrived: OrderedDict[str, float] = OrderedDict()
        prepare_kernels()  # compile the matcher's kernels before the first message

    # ------------------------------------------------------------------ messages
    def handle(self, topic: str, payload: bytes, at: float) -> list[Output]:
        """Process one received message; return what to publish (possibly nothing).

        Args:
            topic: the topic it arrived on.
            payload: its raw bytes.
            at: receive time, epoch seconds (copied into reject records; the stale watch's
                clock).

        A fix whose time equals one already taken for that vehicle (a QoS 1 redelivery)
        is dropped without output, so handling a message twice changes nothing but the
        ``duplicate`` counter. A message on the control topic assigns a route
        (:meth:`assign_route`).
        """
        counters = self.counters
        counters["messages"] += 1
        if self.control_topic is not self._control_for:
            self._control_for = self.control_topic
            self._control_shape = (_filter_shape(self.control_topic) if self.control_topic
                                   else None)
        shape = self._control_shape
        if shape is not None and (
                not shape or (topic.startswith(shape[0]) and topic.endswith(shape[1])))\
                and vehicle_from_topic(topic, self.control_topic) is not None:
            return self._control_message(topic, payload, at)
        reader = self._reader
        if reader.limits is not self.limits or reader.projection is not self.network.projection:
            reader = self._reader = PositionReader(self.network.projection, self.limits)
        try:
            fix = reader.read(topic, payload, at)
        except BadMessageError as exc:
            return [self._reject(topic, payload, at, exc.reason, exc.detail,
                                 known_vehicle(topic, payload, self.limits))]
        vehicle = fix.vehicle
        state = self._vehicles.get(vehicle)
        limits = self.limits
        if state is None and vehicle in self._parked:
            state = self._unpark(vehicle)
        if state is None:
            cap = limits.max_vehicles
            if cap and len(self._vehicles) + len(self._parked) >= cap:
                return [self._reject(topic, payload, at, "too_many_vehicles",
                                     f"vehicle {vehicle!r} is new and {cap} vehicles are "
                                     f"held already (feed.max_vehicles)", vehicle)]
            state = _VehicleState(Tracker(self.network, vehicle, self.settings))
            self._vehicles[vehicle] = state
            counters["vehicle:new"] += 1
        if self.park_after_s > 0:
            arrived = self._arrived
            arrived[vehicle] = at
            arrived.move_to_end(vehicle)
        t = fix.t
        recent = state.recent
        newest = not recent or t > state.base + recent[-1]  # the usual case: no search
        if not newest and state.seen(t):
            counters["duplicate"] += 1
            return []
        rate_hz = limits.max_rate_hz
        if rate_hz > 0 and not state.allow(at, t, rate_hz):
            return [self._reject(topic, payload, at, "rate_limited",
                                 f"vehicle {vehicle!r} sent more than "
                                 f"{rate_hz:g} fixes per second", vehicle)]
        if limits.max_age_s > 0 and at - t > limits.max_age_s:
            counters["late"] += 1
        if newest:
            state.add_newest(t)  # in order: stays sorted
        else:
            state.remember(t)
        if t < self._idle_floor:  # a first fix from long ago (late data)
            self._idle_floor = t
        counters["fixes"] += 1
        watch = state.alerts.watch
        if watch is None:
            state.alerts.seen(fix, at)  # the first fix: starts the watch, no alert
            out: list[Output] = []
        else:
            seen = watch.seen(fix, at)
            out = self._outputs(seen) if seen else []
        due = at + self.alert_settings.stale_s
        if due < self._stale_due:
            self._stale_due = due
        pending = state.pending
        if pending is None:
            state.pending = {t: fix}
        else:
            pending[t] = fix
            if len(pending) > DEDUPE_WINDOW:  # never reached: the tracker answers
                del pending[min(pending)]  # every fix within its reorder window
        events = state.tracker.update(fix)
        if out:
            out.extend(self._outputs(events, state, topic, payload, at))
            return out
        return self._outputs(events, state, topic, payload, at)

    def _reject(self, topic: str, payload: bytes, at: float, reason: str, detail: str,
                vehicle: str | None) -> Output:
        self.counters[f"reject:{reason}"] += 1
        record = {
            "at": at,
            "topic": topic,
            "reason": reason,
            "detail": detail,
            "payload": payload.decode("utf-8", "replace")[:REJECT_PAYLOAD_CHARS],
        }
        return Output("reject", vehicle, record)

    def _control_message(self, topic: str, payload: bytes, at: float) -> list[Output]:
        """A route assignment on the control topic.

        Payload: ``{"route": id | null}``, a JSON string, a bare id, or empty (a deleted
        retained message: no assignment).
        """
        vehicle = vehicle_from_topic(topic, self.control_topic)
        assert vehicle is not None
        try:
            validate_vehicle(vehicle, self.limits, f"topic {topic!r}")
        except BadMessageError as exc:
            return [self._reject(topic, payload, at, exc.reason, exc.detail, None)]
        text = payload.decode("utf-8", "replace").strip()
        route: Any = None
        if text:
            try:
                doc = json.loads(text)
            except ValueError:
                doc = text  # a bare route id
            route = doc.get("route") if isinstance(doc, dict) else doc
            if isinstance(route, int) and not isinstance(route, bool):
                route = str(route)  # a bare numeric id: 550 means "550"
            if route is not None and not (isinstance(route, str) and route):
                return [self._reject(topic, payload, at, "bad_type",
                                     f"control message route must be a non-empty string or "
                                     f"null, got {route!r}", vehicle)]
        self.counters["control"] += 1
        return self.assign_route(vehicle, route, at=at)

    def assign_route(self, vehicle: str, route_id: str | None, *,
                     at: float = 0.0) -> list[Output]:
        """Assign ``route_id`` to ``vehicle`` (None clears it), as a control message does.

        It takes precedence over the route field of fixes and the static mapping. The
        route monitor switches at the vehicle's next fix; an unknown id gives a reject
        (``unknown_route``) then. ``at`` only goes into such a reject record.
        """
        if route_id is None:
            self._control.pop(vehicle, None)
        else:
            self._control[vehicle] = route_id
        return []

    def _route_for(self, state: _VehicleState, fix: Fix, topic: str, payload: bytes,
                   at: float) -> Output | None:
        """Point the vehicle's route monitor at its current route; a reject if unknown."""
        routes = self.routes
        if routes is None:
            return None
        wanted = (self._control.get(fix.vehicle) or fix.route
                  or self.vehicle_routes.get(fix.vehicle))
        route = routes.get(wanted) if wanted is not None else None
        alerts = state.alerts
        if wanted == alerts.requested and (alerts.route is None) == (route is None):
            return None  # the route it follows already (set_route would change nothing)
        chain = self._chain(route) if route is not None else None
        changed = alerts.set_route(wanted, chain, self.alert_settings)
        if changed and wanted is not None and route is None:
            return self._reject(topic, payload, at, "unknown_route",
                                f"route {wanted!r} of vehicle {fix.vehicle!r} is not loaded",
                                fix.vehicle)
        return None

    def _chain(self, route: Route) -> RouteChain:
        chain = self._chains.get(id(route))
        if chain is None:
            chain = self._chains[id(route)] = RouteChain(route, self.network.projection)
        return chain

    def _chain_of(self, route_id: str) -> RouteChain | None:
        route = self.routes.get(route_id) if self.routes is not None else None
        return self._chain(route) if route is not None else None

    def route_status(self, vehicle: str) -> dict[str, Any]:
        """The vehicle's route, its state (``unknown``/``on``/``off``) and progress (m).

        Raises:
            UnknownVehicleError: when the vehicle is not held.
        """
        monitor = self._state(vehicle).alerts.route
        if monitor is None:
            return {"route": None, "state": None, "progress_m": None}
        progress = monitor.progress_m
        return {"route": monitor.route_id, "state": monitor.state,
                "progress_m": round(progress, 1) if progress is not None else None}

    def tick(self, now: float) -> list[Output]:
        """Stale alerts at receive time ``now`` (epoch s), for vehicles in order.

        The core has no clock: the daemon calls this periodically with its clock and
        ``livematch replay`` after every message with that message's ``at``. A vehicle
        from which no fix arrived for more than ``stale_s`` seconds of receive time gets
        one ``stale`` alert; its next fix gives ``fresh``. Cheap when nothing is due.
        """
        if now <= self._stale_due:
            return []
        out: list[Output] = []
        due = math.inf
        settings = self.alert_settings
        parked = self._parked
        for vehicle in sorted([*self._vehicles, *parked] if parked else self._vehicles):
            state = self._vehicles.get(vehicle)
            if state is None:
                # parked: restored only when its watch fires (StaleWatch.check's test);
                # otherwise its due time is StaleWatch.due's
                watch_at = parked[vehicle].watch_at
                if watch_at is None:
                    continue
                if not now - watch_at > settings.stale_s:
                    due = min(due, watch_at + settings.stale_s)
                    continue
                state = self._unpark(vehicle)
                self._touch(vehicle, now)
            watch = state.alerts.watch
            if watch is None:
                continue
            out.extend(self._alert_outputs(watch.check(vehicle, now, settings)))
            due = min(due, watch.due(settings))
        self._stale_due = due
        return out

    def flush(self) -> list[Output]:
        """Commit everything pending for every vehicle (end of a log), in vehicle order.

        The trackers stay; fixes handled afterwards continue where they left off.
        """
        out: list[Output] = []
        for vehicle in self.vehicles():
            state = self._vehicles.get(vehicle) or self._unpark(vehicle)
            out.extend(self._outputs(state.tracker.flush(), state, "", b"", 0.0))
        return out

    def _outputs(self, events: Sequence[Event], state: _VehicleState | None = None,
                 topic: str = "", payload: bytes = b"", at: float = 0.0) -> list[Output]:
        out: list[Output] = []
        if not events:
            return out
        counters = self.counters
        record = self._records.record
        for event in events:
            # the event classes are final: a type test, cheaper than isinstance
            if type(event) is Assignment:
                counters["assignments"] += 1
                eps = event.eps_m
                key = self._eps_keys.get(eps)
                if key is None:
                    key = self._eps_keys[eps] = f"eps_m:{float(eps)!r}"
                counters[key] += 1
                out.append(Output("assignment", event.vehicle, record(event)))
                if state is not None:
                    pending = state.pending
                    if pending is not None:
                        fix = pending.pop(event.t, None)
                        if fix is not None:
                            self._monitor(out, state, fix, (event.x, event.y), True,
                                          topic, payload, at)
                continue
            if type(event) is HeldAssignment:  # a refused fix's repeated answer
                counters["assignments_held"] += 1
                out.append(Output("assignment", event.vehicle, record(event)))
                continue
            if type(event) is Commit:
                counters["commits"] += 1
                out.append(Output("commit", event.vehicle, record(event)))
                continue
            if type(event) is Filtered:
                counters[f"filtered:{event.reason}"] += 1
                if state is not None and state.pending is not None:
                    fix = state.pending.pop(event.t, None)
                    if fix is not None:
                        # the matcher took the fix but no level matched it: off the
                        # network (no road within the off-network radius), or on it
                        # with a road beyond the ladder (MatchSettings.off_network_m)
                        reason = event.reason
                        if reason == "no_road_nearby" or reason == "road_beyond_eps":
                            self._monitor(out, state, fix, None,
                                          reason == "road_beyond_eps", topic, payload, at)
                continue
            if type(event) is Alert:
                counters["alerts"] += 1
                counters[f"alert:{event.alert_kind}"] += 1
            out.append(Output(event.kind, event.vehicle, record(event)))
        if state is not None and not state.pending:
            state.pending = None  # every fix answered: no dict held between fixes
        return out

    def _monitor(self, out: list[Output], state: _VehicleState, fix: Fix,
                 matched: tuple[float, float] | None, has_road: bool, topic: str,
                 payload: bytes, at: float) -> None:
        """The vehicle's monitors on one answered fix; appends any reject and alerts."""
        if self.routes is not None:
            reject = self._route_for(state, fix, topic, payload, at)
            if reject is not None:
                out.append(reject)
        fences = self.fences
        alerts = state.alerts.update(
            fix, matched, has_road, fences,
            self.vehicle_groups.get(fix.vehicle, ()) if fences is not None else (),
            self.alert_settings)
        if alerts:
            out.extend(self._outputs(alerts))

    def _alert_outputs(self, alerts: list[Alert]) -> list[Output]:
        return self._outputs(list(alerts)) if alerts else []

    # ------------------------------------------------------------------ vehicles
    def vehicles(self) -> list[str]:
        """The vehicles held (live or parked), sorted."""
        if self._parked:
            return sorted([*self._vehicles, *self._parked])
        return sorted(self._vehicles)

    def parked(self) -> int:
        """How many of the vehicles held are parked (kept as their checkpoint bytes)."""
        return len(self._parked)

    def _state(self, vehicle: str) -> _VehicleState:
        """The vehicle's live state (a parked vehicle is restored)."""
        state = self._vehicles.get(vehicle)
        if state is not None:
            return state
        if vehicle in self._parked:
            return self._unpark(vehicle)
        raise UnknownVehicleError(f"no state held for vehicle {vehicle!r}")

    # ------------------------------------------------------------------ parking
    def park_idle(self, now: float, limit: int | None = None) -> int:
        """Park every live vehicle silent for more than ``park_after_s`` at ``now``.

        Args:
            now: the shell's receive clock (epoch s): the daemon's wall clock, the replay
                log's ``at``. The same clock as the ``at`` given to :meth:`handle`.
            limit: park at most this many (None: all that are due). Parking one costs a
                checkpoint (about 1 ms at 15-30 s between fixes on a loaded machine,
                ``bench/memory.py`` step 8): the daemon parks a few after each message
                rather than thousands in one turn of its event loop.

        Returns the number of vehicles parked; 0 at once while parking is off. Vehicles
        are looked at in the order their last messages arrived and the look stops at the
        first one not silent long enough, so a call costs nothing while no vehicle is
        due (a message handled with an ``at`` older than an earlier one's can delay its
        vehicle's parking, never an output). A vehicle restored or imported without a
        message is due at once.
        """
        after = self.park_after_s
        arrived = self._arrived
        if after <= 0:
            if arrived:
                arrived.clear()
            return 0
        parked = 0
        while arrived and (limit is None or parked < limit):
            vehicle, at = next(iter(arrived.items()))
            if not now - at > after:
                break
            del arrived[vehicle]
            if vehicle in self._vehicles:
                self._park(vehicle)
                parked += 1
        return parked

    def _touch(self, vehicle: str, at: float) -> None:
        """Mark a live vehicle as active at receive time ``at`` (while parking is on)."""
        if self.park_after_s > 0:
            arrived = self._arrived
            arrived[vehicle] = at
            arrived.move_to_end(vehicle)

    def _park(self, vehicle: str) -> None:
        """Keep a live vehicle as its checkpoint bytes (see :class:`_Parked`).

        The checkpoint's msgpack array is made with the tracker state uncompressed
        (``Tracker.to_bytes()``) and deflated once as a whole, against a preset
        dictionary: the first such array of at least :data:`_PARK_DICT_MIN` bytes
        parked by this pipeline, kept for its life. Every checkpoint repeats the
        header's names, the arrays' layout and the epoch's leading digits, which the
        dictionary holds; a tracker state deflated on its own (the checkpoint's) cannot
        refer to them, nor to the alert state beside it.
        """
        state = self._vehicles[vehicle]
        raw = self._frame(vehicle, state, False)
        zdict = self._park_zdict
        if not zdict and len(raw) >= _PARK_DICT_MIN:
            zdict = self._park_zdict = raw[-_ZDICT_MAX:]
        if zdict:
            packer = zlib.compressobj(PARK_LEVEL, zlib.DEFLATED, -15, 8,
                                      zlib.Z_DEFAULT_STRATEGY, zdict)
        else:
            packer = zlib.compressobj(PARK_LEVEL, zlib.DEFLATED, -15)
        packed = packer.compress(raw) + packer.flush()
        self._parked[vehicle] = _Parked(packed, bool(zdict), state)
        del self._vehicles[vehicle]
        self.counters["vehicle:parked"] += 1

    def _unpark(self, vehicle: str) -> _VehicleState:
        """Restore a parked vehicle as it was when parked; return its live state.

        The route from control messages stays the pipeline's (one that came while the
        vehicle was parked is not overwritten by the one in the bytes); the rate limit's
        bucket comes from the parked record. Not counted as an import.
        """
        held = self._parked.pop(vehicle)
        state = self._restore(vehicle, self._unpacked(held))[0]
        state.tokens = held.tokens
        state.last_at = held.last_at
        state.last_t = held.last_t
        self._vehicles[vehicle] = state
        self._touch(vehicle, -math.inf)  # parked again when due (handle moves it on)
        self.counters["vehicle:unparked"] += 1
        return state

    def export_vehicle(self, vehicle: str) -> bytes:
        """Checkpoint one vehicle: its tracker and the dedupe memory, as a compact blob.

        Layout: ``b"LMPV"``, a version byte (3), then a msgpack array
        ``[vehicle, recent fix times, tracker bytes, alert state]`` (no pickle: restoring
        runs no code from the blob). The alert state is msgpack of a map ``monitors``
        (the monitors' ``to_state``), ``pending`` (the fixes awaiting the tracker's
        answer) and ``control`` (the control-message route); version 2 held the same
        map as zlib-compressed JSON, and :meth:`import_vehicle` still reads it.

        A parked vehicle's bytes are those it was parked as (with the route from control
        messages as it is now), without restoring it.

        Raises:
            UnknownVehicleError: when the vehicle is not held.
        """
        held = self._parked.get(vehicle)
        if held is not None:
            return self._parked_blob(vehicle, held)
        state = self._vehicles.get(vehicle)
        if state is None:
            raise UnknownVehicleError(f"no state held for vehicle {vehicle!r}")
        return self._export(vehicle, state)

    def _unpacked(self, held: _Parked) -> bytes:
        """A parked vehicle's checkpoint, its tracker state uncompressed (see :meth:`_park`)."""
        if held.zdict:
            unpacker = zlib.decompressobj(-15, self._park_zdict)
        else:
            unpacker = zlib.decompressobj(-15)
        return (STATE_MAGIC + bytes([STATE_VERSION]) + unpacker.decompress(held.blob)
                + unpacker.flush())

    def _parked_blob(self, vehicle: str, held: _Parked) -> bytes:
        """A parked vehicle's checkpoint, with its control-message route as it is now.

        The bytes :meth:`_export` wrote when it was parked (the same tracker state
        compressed the same way), the route from control messages replaced.
        """
        data = _BLOB_DECODER.decode(memoryview(self._unpacked(held))[len(STATE_MAGIC) + 1:])
        extra = _ALERTS_DECODER.decode(data.alerts)
        control = self._control.get(vehicle)
        alerts = data.alerts
        if extra["control"] != control:
            extra["control"] = control
            alerts = _ALERTS_ENCODER.encode(extra)
        fresh = _Blob(data.vehicle, data.recent, Tracker.compressed_state(data.tracker),
                      alerts)
        return STATE_MAGIC + bytes([STATE_VERSION]) + _BLOB_ENCODER.encode(fresh)

    def _export(self, vehicle: str, state: _VehicleState) -> bytes:
        """The checkpoint bytes of a live vehicle (see :meth:`export_vehicle`)."""
        return STATE_MAGIC + bytes([STATE_VERSION]) + self._frame(vehicle, state, True)

    def _frame(self, vehicle: str, state: _VehicleState, compress: bool) -> bytes:
        """The msgpack array of a live vehicle's checkpoint (after the magic and version).

        ``compress``: the tracker state zlib-compressed, as a checkpoint holds it.
        """
        extra = {
            "monitors": state.alerts.to_state(),
            "pending": [[f.vehicle, f.t, f.lon, f.lat, f.x, f.y, f.accuracy, f.speed,
                         f.heading, f.route] for f in (state.pending or {}).values()],
            "control": self._control.get(vehicle),
        }
        alerts = _ALERTS_ENCODER.encode(extra)
        # compressed (zlib level 1): about the size of the older LMT3 states at 0.6 x
        # their cost; uncompressed would be 3-5 x longer in the store (bench/checkpoint.py)
        blob = _Blob(vehicle, state.times(), state.tracker.to_bytes(compress=compress),
                     alerts)
        return _BLOB_ENCODER.encode(blob)

    def import_vehicle(self, vehicle: str, blob: bytes) -> None:
        """Restore a vehicle from :meth:`export_vehicle` output, replacing any state held.

        Raises:
            BadStateError: the blob is not a checkpoint, has another version, is
                truncated, belongs to another vehicle, or was written for another network
                or eps ladder.
        """
        restored, control = self._restore(vehicle, blob)
        if control is not None:
            self._control[vehicle] = control
        watch = restored.alerts.watch
        if watch is not None:
            self._stale_due = min(self._stale_due, watch.due(self.alert_settings))
        self._parked.pop(vehicle, None)
        self._vehicles[vehicle] = restored
        # parked at the next park_idle (a restored vehicle has no receive time here)
        self._touch(vehicle, -math.inf)
        newest = restored.newest
        if newest is not None:
            self._idle_floor = min(self._idle_floor, newest)
        self.counters["vehicle:imported"] += 1

    def _restore(self, vehicle: str, blob: bytes) -> tuple[_VehicleState, str | None]:
        """A vehicle's state and control-message route from its checkpoint bytes.

        Raises:
            BadStateError: as :meth:`import_vehicle`.
        """
        head = len(STATE_MAGIC)
        if blob[:head] != STATE_MAGIC:
            raise BadStateError(
                f"checkpoint for vehicle {vehicle!r} does not start with {STATE_MAGIC!r}")
        if not (len(blob) > head and blob[head] in _READABLE_VERSIONS):
            found = blob[head] if len(blob) > head else None
            raise BadStateError(f"checkpoint for vehicle {vehicle!r} has version {found}, "
                                f"this livematch reads versions "
                                f"{', '.join(map(str, _READABLE_VERSIONS))}")
        try:
            data = _BLOB_DECODER.decode(blob[head + 1:])
        except msgspec.DecodeError as exc:
            raise BadStateError(f"checkpoint for vehicle {vehicle!r} is corrupt: {exc}") from exc
        if data.vehicle != vehicle:
            raise BadStateError(
                f"checkpoint for vehicle {vehicle!r} holds vehicle {data.vehicle!r}")
        try:
            tracker = Tracker.from_bytes(self.network, self.settings, data.tracker)
        except BadStateError as exc:
            raise BadStateError(f"checkpoint for vehicle {vehicle!r}: {exc}") from exc
        if tracker.vehicle != vehicle:
            raise BadStateError(
                f"checkpoint for vehicle {vehicle!r} holds a tracker of {tracker.vehicle!r}")
        recent = sorted(data.recent)[-DEDUPE_WINDOW:]
        restored = _VehicleState(tracker, recent)
        control = None
        if data.alerts:
            try:
                if blob[head] == 2:
                    extra = json.loads(zlib.decompress(data.alerts))
                else:
                    extra = _ALERTS_DECODER.decode(data.alerts)
                restored.alerts = VehicleAlerts.from_state(
                    extra["monitors"], self._chain_of, self.alert_settings)
                restored.pending = {row[1]: Fix(*row) for row in extra["pending"]} or None
                control = extra["control"]
            except (zlib.error, msgspec.DecodeError, ValueError, KeyError, TypeError) as exc:
                raise BadStateError(f"checkpoint for vehicle {vehicle!r} has corrupt alert "
                                    f"state: {exc}") from exc
        return restored, control

    def evict(self, vehicle: str) -> list[Output]:
        """Flush one vehicle (commit everything pending) and forget it.

        Raises:
            UnknownVehicleError: when the vehicle is not held.
        """
        state = self._state(vehicle)
        out = self._outputs(state.tracker.flush())
        del self._vehicles[vehicle]
        self._arrived.pop(vehicle, None)
        self.counters["vehicle:evicted"] += 1
        return out

    def drop(self, vehicle: str) -> None:
        """Forget a vehicle without flushing (another worker takes over from its checkpoint).

        Dropping a vehicle not held does nothing.
        """
        self._arrived.pop(vehicle, None)
        if (self._vehicles.pop(vehicle, None) is not None
                or self._parked.pop(vehicle, None) is not None):
            self.counters["vehicle:dropped"] += 1

    def idle_vehicles(self, now_fix_time: float, ttl_s: float) -> list[str]:
        """Vehicles whose newest fix is more than ``ttl_s`` seconds before ``now_fix_time``.

        Time is fix time (the newest fix time seen anywhere), never the wall clock, so
        eviction in a replay happens exactly where it happened live. The daemon asks
        twice a second; while ``now_fix_time - ttl_s`` has not passed the oldest newest
        fix seen at the last look, the answer is empty without looking at each vehicle
        (at 20,000 vehicles a look costs milliseconds of the event loop).
        """
        if now_fix_time - ttl_s <= self._idle_floor:
            return []
        idle: list[str] = []
        floor = math.inf
        for vehicle, newest in itertools.chain(
                ((v, s.newest) for v, s in self._vehicles.items()),
                ((v, p.newest) for v, p in self._parked.items())):
            if newest is None:
                continue
            floor = min(floor, newest)
            if now_fix_time - newest > ttl_s:
                idle.append(vehicle)
        # newest fixes only grow; a vehicle restored from a checkpoint, or a new one whose
        # first fix is older, lowers the floor (import_vehicle, handle)
        self._idle_floor = floor
        return sorted(idle)

    def evict_idle(self, now_fix_time: float, ttl_s: float, *,
                   into: list[Output] | None = None) -> list[str]:
        """Evict (flush and forget) every idle vehicle; return their ids, sorted.

        Args:
            now_fix_time: the current time in fix time (epoch seconds).
            ttl_s: idle time after which a vehicle is evicted, seconds.
            into: when given, the outputs of the final flushes are appended to it (the
                daemon publishes them; without it they are discarded).
        """
        idle = self.idle_vehicles(now_fix_time, ttl_s)
        for vehicle in idle:
            out = self.evict(vehicle)
            if into is not None:
                into.extend(out)
        return idle


def matcher_settings_from_mapping(section: Mapping[str, Any], where: str) -> MatchSettings:
    """Build :class:`MatchSettings` from a parsed ``[matcher]`` TOML table.

    Args:
        section: the table (key -> value as TOML parsed it).
        where: the file (or other origin) named in errors.

    Raises:
        BadConfigError: naming ``where`` and the key, for an unknown key, a value of the
            wrong type, or an invalid value; every problem found, one per line.

    Example:
        >>> matcher_settings_from_mapping({"eps_levels": [10, 20]}, "a.toml").eps_levels
        (10.0, 20.0)
        >>> matcher_settings_from_mapping({}, "a.toml") == MatchSettings()
        True
        >>> matcher_settings_from_mapping({"eps_levels": [30, 15]}, "a.toml")
        Traceback (most recent call last):
        ...
        livematch.errors.BadConfigError: a.toml: matcher.eps_levels must be strictly \
increasing, got [30.0, 15.0]
    """
    return _settings_from_mapping(MatchSettings, "matcher", section, where)


def alert_settings_from_mapping(section: Mapping[str, Any], where: str) -> AlertSettings:
    """Build :class:`AlertSettings` from a parsed ``[alerts]`` TOML table.

    Args:
        section: the table (key -> value as TOML parsed it).
        where: the file (or other origin) named in errors.

    Raises:
        BadConfigError: naming ``where`` and the key, for an unknown key, a value of the
            wrong type, or an invalid value; every problem found, one per line.

    Example:
        >>> alert_settings_from_mapping({"eps_route_m": 45, "stale_s": 60}, "a.toml").eps_route_m
        45
        >>> alert_settings_from_mapping({}, "a.toml") == AlertSettings()
        True
        >>> alert_settings_from_mapping({"fence_fixes": 1.5}, "a.toml")
        Traceback (most recent call last):
        ...
        livematch.errors.BadConfigError: a.toml: alerts.fence_fixes must be an integer, got 1.5
    """
    return _settings_from_mapping(AlertSettings, "alerts", section, where)


_Settings = typing.TypeVar("_Settings", MatchSettings, AlertSettings)


def _settings_from_mapping(
    cls: type[_Settings], name: str, section: Mapping[str, Any], where: str
) -> _Settings:
    """Check a TOML table key by key against a settings dataclass, then build it.

    Types are checked first (int, finite float, list of numbers, string), then the
    dataclass's own ``problems()``; every problem is reported, each naming ``where`` and
    ``name.key``.
    """
    hints = typing.get_type_hints(cls)
    names = [f.name for f in fields(cls)]
    problems: list[str] = []
    values: dict[str, Any] = {}
    for key, value in section.items():
        if key not in names:
            problems.append(f"{where}: unknown key {name}.{key} "
                            f"(expected one of {', '.join(names)})")
            continue
        hint = hints[key]
        number = isinstance(value, int | float) and not isinstance(value, bool)
        if hint is int:
            ok, expected = number and isinstance(value, int), "an integer"
        elif hint is float:
            ok, expected = number and math.isfinite(value), "a finite number"
        elif typing.get_origin(hint) is tuple:
            ok = isinstance(value, list | tuple) and all(
                isinstance(v, int | float) and not isinstance(v, bool) for v in value)
            expected = "a list of numbers"
        elif hint is str:
            ok, expected = isinstance(value, str), "a string"
        else:  # a field type this mapper does not know yet: let problems() judge it
            ok, expected = True, ""
        if not ok:
            problems.append(f"{where}: {name}.{key} must be {expected}, got {value!r}")
            continue
        values[key] = tuple(value) if isinstance(value, list) else value
    if problems:
        raise BadConfigError("\n".join(problems))
    settings = cls(**values)
    problems = [f"{where}: {name}.{key} {what}" for key, what in settings.problems()]
    if problems:
        raise BadConfigError("\n".join(problems))
    return settings
