"""The per-message pipeline shared by ``livematch replay`` and the daemon.

One call per received message: decode and validate (:mod:`livematch.feed.decode`),
drop redeliveries by (vehicle, time), hand the fix to that vehicle's
:class:`~livematch.core.tracker.Tracker` (created on its first fix) and turn the events
into published records (:func:`~livematch.core.events.to_record`)::

    pipeline = Pipeline(network, MatchSettings())
    for out in pipeline.handle("fleet/bus17/position", payload, at=received):
        publish(out.kind, out.vehicle, out.record)
    ...
    final = pipeline.flush()          # end of a log: commit everything pending

Both the replay command and the daemon go through :meth:`Pipeline.handle`, so the same
messages give the same records, byte for byte, whichever of them ran. The pipeline reads
no clock: ``at`` (the receive time) only goes into reject records.

Bad input never raises: a message that cannot be decoded becomes an
``Output(kind="reject")`` and a counter. Every outcome is counted in
:attr:`Pipeline.counters` (a :class:`collections.Counter`):

================================  ==========================================================
``messages``                      every message handled
``reject:<reason>``               refused by the decoder (reason codes of ``feed.decode``)
``duplicate``                     same (vehicle, time) as a fix already taken: dropped
``fixes``                         fixes handed to a tracker
``filtered:<reason>``             refused by the tracker's filters (out_of_order...)
``assignments`` ``commits``       published events, by kind
``alerts``
``eps_m:<eps>``                   assignments certified at that eps level (e.g. ``eps_m:15.0``)
``vehicle:new`` ``vehicle:...``   trackers created, ``imported``, ``evicted``, ``dropped``
================================  ==========================================================
"""

from __future__ import annotations

import bisect
import math
import typing
from collections import Counter
from collections.abc import Mapping
from dataclasses import dataclass, fields
from typing import Any

import msgspec

from livematch.core.events import Alert, Assignment, Commit, Event, Filtered, to_record
from livematch.core.network import RoadNetwork
from livematch.core.settings import MatchSettings
from livematch.core.tracker import Tracker
from livematch.errors import BadConfigError, BadMessageError, BadStateError, LivematchError
from livematch.feed.decode import FeedLimits, decode_position, known_vehicle

__all__ = [
    "DEDUPE_WINDOW",
    "REJECT_PAYLOAD_CHARS",
    "STATE_MAGIC",
    "STATE_VERSION",
    "Output",
    "Pipeline",
    "UnknownVehicleError",
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
STATE_VERSION = 1
_DEFAULT_LIMITS = FeedLimits()


@dataclass(frozen=True)
class Output:
    """One thing to publish.

    Attributes:
        kind: ``"assignment"``, ``"commit"``, ``"alert"`` or ``"reject"``.
        vehicle: the vehicle id; None only for a reject whose vehicle could not be read.
        record: the JSON contract record; for rejects ``at``, ``topic``, ``reason``,
            ``detail``, ``payload`` (the payload as text, at most 512 characters).
    """

    kind: str
    vehicle: str | None
    record: dict[str, Any]


class UnknownVehicleError(LivematchError, KeyError):
    """The pipeline holds no state for the vehicle asked about."""

    def __str__(self) -> str:
        return str(self.args[0]) if self.args else ""


class _Blob(msgspec.Struct, array_like=True, frozen=True):
    """Checkpoint layout after the magic and version byte (msgpack array)."""

    vehicle: str
    recent: list[float]
    tracker: bytes


_BLOB_ENCODER = msgspec.msgpack.Encoder()
_BLOB_DECODER = msgspec.msgpack.Decoder(_Blob)


class _VehicleState:
    """A vehicle's tracker plus the pipeline's dedupe memory (sorted recent fix times)."""

    __slots__ = ("recent", "tracker")

    def __init__(self, tracker: Tracker, recent: list[float] | None = None) -> None:
        self.tracker = tracker
        self.recent: list[float] = recent or []

    def seen(self, t: float) -> bool:
        i = bisect.bisect_left(self.recent, t)
        return i < len(self.recent) and self.recent[i] == t

    def remember(self, t: float) -> None:
        bisect.insort(self.recent, t)
        if len(self.recent) > DEDUPE_WINDOW:
            del self.recent[0]

    @property
    def newest(self) -> float | None:
        return self.recent[-1] if self.recent else None


class Pipeline:
    """Decode, dedupe, track and publish: the whole per-message path of one worker.

    Args:
        network: the road network every tracker matches against.
        settings: the ``[matcher]`` settings (validated here).
        limits: what incoming messages may contain, and the topic filter whose ``+``
            level names the vehicle.

    Raises:
        BadConfigError: when ``settings`` has an invalid value.

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
                 limits: FeedLimits = _DEFAULT_LIMITS) -> None:
        problems = settings.problems()
        if problems:
            raise BadConfigError("; ".join(f"matcher.{key} {what}" for key, what in problems))
        self.network = network
        self.settings = settings
        self.limits = limits
        self.counters: Counter[str] = Counter()
        self._vehicles: dict[str, _VehicleState] = {}

    # ------------------------------------------------------------------ messages
    def handle(self, topic: str, payload: bytes, at: float) -> list[Output]:
        """Process one received message; return what to publish (possibly nothing).

        Args:
            topic: the topic it arrived on.
            payload: its raw bytes.
            at: receive time, epoch seconds (only copied into reject records).

        A fix whose time equals one already taken for that vehicle (a QoS 1 redelivery)
        is dropped without output, so handling a message twice changes nothing but the
        ``duplicate`` counter.
        """
        self.counters["messages"] += 1
        try:
            fix = decode_position(topic, payload, self.network.projection, self.limits)
        except BadMessageError as exc:
            self.counters[f"reject:{exc.reason}"] += 1
            record = {
                "at": at,
                "topic": topic,
                "reason": exc.reason,
                "detail": exc.detail,
                "payload": payload.decode("utf-8", "replace")[:REJECT_PAYLOAD_CHARS],
            }
            return [Output("reject", known_vehicle(topic, payload, self.limits), record)]
        state = self._vehicles.get(fix.vehicle)
        if state is None:
            state = _VehicleState(Tracker(self.network, fix.vehicle, self.settings))
            self._vehicles[fix.vehicle] = state
            self.counters["vehicle:new"] += 1
        if state.seen(fix.t):
            self.counters["duplicate"] += 1
            return []
        state.remember(fix.t)
        self.counters["fixes"] += 1
        return self._outputs(state.tracker.update(fix))

    def flush(self) -> list[Output]:
        """Commit everything pending for every vehicle (end of a log), in vehicle order.

        The trackers stay; fixes handled afterwards continue where they left off.
        """
        out: list[Output] = []
        for vehicle in sorted(self._vehicles):
            out.extend(self._outputs(self._vehicles[vehicle].tracker.flush()))
        return out

    def _outputs(self, events: list[Event]) -> list[Output]:
        out: list[Output] = []
        for event in events:
            if isinstance(event, Filtered):
                self.counters[f"filtered:{event.reason}"] += 1
                continue
            if isinstance(event, Assignment):
                self.counters["assignments"] += 1
                self.counters[f"eps_m:{float(event.eps_m)!r}"] += 1
            elif isinstance(event, Commit):
                self.counters["commits"] += 1
            elif isinstance(event, Alert):
                self.counters["alerts"] += 1
            out.append(Output(event.kind, event.vehicle, to_record(event, self.network)))
        return out

    # ------------------------------------------------------------------ vehicles
    def vehicles(self) -> list[str]:
        """The vehicles held, sorted."""
        return sorted(self._vehicles)

    def _state(self, vehicle: str) -> _VehicleState:
        try:
            return self._vehicles[vehicle]
        except KeyError:
            raise UnknownVehicleError(f"no state held for vehicle {vehicle!r}") from None

    def export_vehicle(self, vehicle: str) -> bytes:
        """Checkpoint one vehicle: its tracker and the dedupe memory, as a compact blob.

        Layout: ``b"LMPV"``, a version byte (1), then a msgpack array
        ``[vehicle, recent fix times, tracker bytes]`` (no pickle: restoring runs no
        code from the blob).

        Raises:
            UnknownVehicleError: when the vehicle is not held.
        """
        state = self._state(vehicle)
        blob = _Blob(vehicle, list(state.recent), state.tracker.to_bytes())
        return STATE_MAGIC + bytes([STATE_VERSION]) + _BLOB_ENCODER.encode(blob)

    def import_vehicle(self, vehicle: str, blob: bytes) -> None:
        """Restore a vehicle from :meth:`export_vehicle` output, replacing any state held.

        Raises:
            BadStateError: the blob is not a checkpoint, has another version, is
                truncated, belongs to another vehicle, or was written for another network
                or eps ladder.
        """
        head = len(STATE_MAGIC)
        if blob[:head] != STATE_MAGIC:
            raise BadStateError(
                f"checkpoint for vehicle {vehicle!r} does not start with {STATE_MAGIC!r}")
        if blob[head:head + 1] != bytes([STATE_VERSION]):
            found = blob[head] if len(blob) > head else None
            raise BadStateError(f"checkpoint for vehicle {vehicle!r} has version {found}, "
                                f"this livematch reads version {STATE_VERSION}")
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
        self._vehicles[vehicle] = _VehicleState(tracker, recent)
        self.counters["vehicle:imported"] += 1

    def evict(self, vehicle: str) -> list[Output]:
        """Flush one vehicle (commit everything pending) and forget it.

        Raises:
            UnknownVehicleError: when the vehicle is not held.
        """
        state = self._state(vehicle)
        out = self._outputs(state.tracker.flush())
        del self._vehicles[vehicle]
        self.counters["vehicle:evicted"] += 1
        return out

    def drop(self, vehicle: str) -> None:
        """Forget a vehicle without flushing (another worker takes over from its checkpoint).

        Dropping a vehicle not held does nothing.
        """
        if self._vehicles.pop(vehicle, None) is not None:
            self.counters["vehicle:dropped"] += 1

    def idle_vehicles(self, now_fix_time: float, ttl_s: float) -> list[str]:
        """Vehicles whose newest fix is more than ``ttl_s`` seconds before ``now_fix_time``.

        Time is fix time (the newest fix time seen anywhere), never the wall clock, so
        eviction in a replay happens exactly where it happened live.
        """
        return [v for v, s in sorted(self._vehicles.items())
                if s.newest is not None and now_fix_time - s.newest > ttl_s]

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
    hints = typing.get_type_hints(MatchSettings)
    names = [f.name for f in fields(MatchSettings)]
    problems: list[str] = []
    values: dict[str, Any] = {}
    for key, value in section.items():
        if key not in names:
            problems.append(f"{where}: unknown key matcher.{key} "
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
        else:  # a field type this mapper does not know yet: let problems() judge it
            ok, expected = True, ""
        if not ok:
            problems.append(f"{where}: matcher.{key} must be {expected}, got {value!r}")
            continue
        values[key] = tuple(value) if isinstance(value, list) else value
    if problems:
        raise BadConfigError("\n".join(problems))
    settings = MatchSettings(**values)
    problems = [f"{where}: matcher.{key} {what}" for key, what in settings.problems()]
    if problems:
        raise BadConfigError("\n".join(problems))
    return settings
