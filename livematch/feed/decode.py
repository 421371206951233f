"""Decoding and validation of position messages: bytes + topic in, a :class:`Fix` out.

A position message is a JSON object (DESIGN §7)::

    {"vehicle": "bus17", "time": "2026-12-01T08:00:05Z", "lat": 60.17, "lon": 24.94,
     "accuracy": 8, "speed": 11.2, "heading": 274, "route": "550"}

- ``vehicle``: string; may instead come from the topic. With the default topic filter
  ``fleet/+/position`` the vehicle is the ``+`` level. When both are present they must
  agree (else ``vehicle_mismatch``).
- ``time``: ISO 8601 with a zone (``Z`` or ``±hh:mm``), or epoch seconds as a number.
  A timestamp without a zone is refused: guessing the sender's zone would shift every
  fix of that vehicle by hours without anyone noticing.
- ``lat``, ``lon``: WGS84 degrees, finite, in range.
- optional ``accuracy`` (metres, >= 0), ``speed`` (m/s, >= 0), ``heading`` (degrees,
  0..360), ``route`` (route id string). Unknown extra fields are ignored, so senders can
  add fields without breaking us.

Why msgspec: it decodes JSON in C straight into a typed struct, strictly (a string is
never taken for a number, ``true`` is never taken for 1), with no intermediate dict to
walk in Python and nothing like ``eval``; and it follows the JSON standard, which has no
NaN or Infinity, so it refuses those tokens that Python's own ``json`` module would
accept and emit.

Every refusal is a :class:`~livematch.errors.BadMessageError` whose ``reason`` is one of
the stable codes in :data:`REASONS` and whose ``detail`` names the offending value.
"""

from __future__ import annotations

import contextlib
import functools
import math
import re
from dataclasses import dataclass
from datetime import UTC, datetime

import msgspec

from livematch.core.fix import Fix
from livematch.core.geometry import Projection
from livematch.errors import BadMessageError
from livematch.wire import Message as _Message

__all__ = [
    "REASONS",
    "SHARD_LEVEL",
    "FeedLimits",
    "PositionReader",
    "decode_position",
    "known_vehicle",
    "looks_like_position",
    "parse_time",
    "shard_from_topic",
    "validate_vehicle",
    "vehicle_from_topic",
]

#: The stable reject reason codes (published in rejects and metrics; never renamed).
REASONS = (
    "not_json",         # not UTF-8 JSON at all (syntax error, truncated, trailing bytes)
    "not_object",       # valid JSON but not an object (array, number, null...)
    "missing_field",    # time / lat / lon missing, or no vehicle in payload nor topic
    "bad_type",         # a field of the wrong JSON type (string latitude, boolean time...)
    "not_finite",       # NaN, Infinity, or a number too large for a double (1e999)
    "out_of_range",     # latitude 91, negative speed, heading 400, time outside the years
    "bad_time",         # a time string that is not ISO 8601, or has no zone
    "bad_vehicle",      # empty, too long, or with '/', '+', '#', control characters
    "too_large",        # payload longer than FeedLimits.max_payload_bytes
    "vehicle_mismatch", # payload vehicle differs from the topic's vehicle level
    "future_time",      # fix time more than FeedLimits.max_future_s ahead of its receive time
    "rate_limited",     # more fixes of one vehicle per second than feed.max_rate_hz allows
    "too_many_vehicles",  # a new vehicle while the daemon holds feed.max_vehicles already
    "wrong_shard",      # the topic's shard level is not the shard of the message's vehicle
)

#: The topic level that stands for the vehicle's shard in ``mqtt.topic`` (worker groups).
SHARD_LEVEL = "{shard}"


@dataclass(frozen=True, slots=True, kw_only=True)
class FeedLimits:
    """How incoming messages are read and what they may contain.

    Attributes:
        max_payload_bytes: longer payloads are refused unread (``too_large``); 4 KiB is
            ten times a generous position message.
        max_vehicle_len: longest vehicle id, in characters.
        min_year, max_year: fix times outside these years (inclusive, UTC) are refused as
            ``out_of_range``; catches milliseconds sent as seconds and unset clocks (1970).
        topic_filter: the MQTT topic filter the feed is subscribed with; its single
            ``+`` level carries the vehicle id. A filter without ``+`` means the vehicle
            must be in the payload.
        max_future_s: a fix whose time is more than this many seconds AHEAD of its
            receive time is refused (``future_time``). A device with a broken clock
            (wrong year, a bad GPS week rollover, local time sent as UTC) would otherwise
            set the vehicle's newest time far in the future, and the tracker would then
            refuse every later real fix as out of order. 300 s allows for the receiver's
            own clock being a few minutes off (common practice for NTP-less hosts);
            0 turns the check off.
        max_age_s: a fix whose time is more than this many seconds BEHIND its receive
            time is still matched (it may be a device catching up after a tunnel or a
            broker queue after an outage) but counted as ``late``; 0 turns the count off.
        max_rate_hz: at most this many fixes per second of receive time per vehicle
            (a token bucket with a burst of the same size); extra fixes are refused as
            ``rate_limited``. GPS receivers report at 1-10 Hz (common practice); a faster
            sender is broken or hostile. 0 turns the limit off.
        max_vehicles: at most this many vehicles with matcher state in one process; a
            fix of a further vehicle is refused (``too_many_vehicles``) while the
            vehicles already held go on being matched. A bound on memory and on the
            work one process takes on: 20,000 vehicles at one fix per 30 s are ~670
            fixes/s, about half of what one process matches (rule of thumb from
            ``bench/results/load.md``; more vehicles belong to more workers). Vehicles
            leave by idle eviction (``store.idle_ttl_s``) or a shard hand-over. 0
            turns the cap off.

    Example:
        >>> FeedLimits().max_payload_bytes
        4096
        >>> FeedLimits(topic_filter="fleet/#").topic_filter
        'fleet/#'
    """

    max_payload_bytes: int = 4096
    max_vehicle_len: int = 64
    min_year: int = 2000
    max_year: int = 2100
    topic_filter: str = "fleet/+/position"
    max_future_s: float = 300.0
    max_age_s: float = 3600.0
    max_rate_hz: float = 10.0
    max_vehicles: int = 20_000

    def __post_init__(self) -> None:
        if self.max_payload_bytes < 1:
            raise ValueError(f"max_payload_bytes must be >= 1, got {self.max_payload_bytes}")
        if self.max_vehicle_len < 1:
            raise ValueError(f"max_vehicle_len must be >= 1, got {self.max_vehicle_len}")
        if not 1 <= self.min_year <= self.max_year <= 9998:
            raise ValueError(f"need 1 <= min_year <= max_year <= 9998, "
                             f"got {self.min_year}..{self.max_year}")
        for name in ("max_future_s", "max_age_s", "max_rate_hz"):
            value = getattr(self, name)
            if not (math.isfinite(value) and value >= 0):
                raise ValueError(f"{name} must be a finite number >= 0, got {value!r}")
        if self.max_vehicles < 0:
            raise ValueError(f"max_vehicles must be >= 0, got {self.max_vehicles}")
        if self.topic_filter.count("+") > 1:
            raise ValueError(f"topic_filter may have at most one '+' level (the vehicle), "
                             f"got {self.topic_filter!r}")

    @property
    def min_time(self) -> float:
        """Earliest accepted fix time, epoch seconds (start of ``min_year``, UTC)."""
        return _year_start(self.min_year)

    @property
    def max_time(self) -> float:
        """First refused fix time, epoch seconds (start of the year after ``max_year``)."""
        return _year_start(self.max_year + 1)


@functools.lru_cache(maxsize=64)
def _year_start(year: int) -> float:
    return datetime(year, 1, 1, tzinfo=UTC).timestamp()


_DECODER = msgspec.json.Decoder(_Message)
_OBJECT_DECODER = msgspec.json.Decoder(dict[str, object])
# '/', '+', '#' and the C0 and C1 control characters (DEL included).
_BAD_ID_CHAR = re.compile("[/+#\x00-\x1f\x7f-\x9f]")
_AT_PATH = re.compile(r" - at `\$\.?([^`]*)`$")
_BYTE_POS = re.compile(r"\(byte (\d+)\)")


def vehicle_from_topic(topic: str, topic_filter: str = "fleet/+/position") -> str | None:
    """Return the topic level that the filter's ``+`` stands for, or None.

    None when the filter has no ``+``, or the topic does not match the filter (then the
    vehicle must come from the payload). The level is returned as is, unvalidated. A
    ``{shard}`` level (:data:`SHARD_LEVEL`) matches any one level and is not the vehicle.

    >>> vehicle_from_topic("fleet/bus17/position")
    'bus17'
    >>> vehicle_from_topic("fleet/bus17/status") is None
    True
    >>> vehicle_from_topic("depot/7/fleet/van3/gps", "depot/+/#")
    '7'
    >>> vehicle_from_topic("fleet//position")  # an empty level matches '+'
    ''
    >>> vehicle_from_topic("fleet/17/bus17/position", "fleet/{shard}/+/position")
    'bus17'
    """
    shape = _filter_shape(topic_filter)
    if shape is None:  # no '+' level: the topic never names the vehicle
        return None
    if shape:  # 'prefix/+/suffix' with no other wildcard: two string compares
        prefix, suffix = shape
        if (len(topic) < len(prefix) + len(suffix) or not topic.startswith(prefix)
                or not topic.endswith(suffix)):
            return None
        level = topic[len(prefix):len(topic) - len(suffix)]
        return None if "/" in level else level
    return _vehicle_by_levels(topic, topic_filter)


@functools.lru_cache(maxsize=64)
def _filter_shape(topic_filter: str) -> tuple[str, str] | tuple[()] | None:
    """How :func:`vehicle_from_topic` reads topics of this filter (a few filters a process).

    None: the filter has no ``+`` (no topic names a vehicle). ``(prefix, suffix)``: the
    filter is ``prefix + "+" + suffix`` with no other wildcard, so the vehicle is what
    lies between them when it holds no ``/``. ``()``: anything else (``#``, a
    ``{shard}`` level), read level by level.

    >>> _filter_shape("fleet/+/position"), _filter_shape("fleet/#"), _filter_shape("a/+/#")
    (('fleet/', '/position'), None, ())
    """
    want = topic_filter.split("/")
    if "+" not in want:
        return None
    if "#" in want or SHARD_LEVEL in want or want.count("+") > 1:
        return ()
    i = want.index("+")
    prefix = "/".join(want[:i]) + "/" if i else ""
    suffix = "/" + "/".join(want[i + 1:]) if i + 1 < len(want) else ""
    return prefix, suffix


def _vehicle_by_levels(topic: str, topic_filter: str) -> str | None:
    """:func:`vehicle_from_topic` level by level: the reference, and the general case."""
    want = topic_filter.split("/")
    have = topic.split("/")
    vehicle: str | None = None
    for i, level in enumerate(want):
        if level == "#":
            return vehicle if len(have) >= i else None
        if i >= len(have):
            return None
        if level == "+":
            vehicle = have[i]
        elif level != have[i] and level != SHARD_LEVEL:
            return None
    return vehicle if len(have) == len(want) else None


def shard_from_topic(topic: str, topic_filter: str) -> str | None:
    """The topic level at the filter's ``{shard}`` level, unvalidated; None without one.

    None too when the topic does not match the filter.

    >>> shard_from_topic("fleet/17/bus17/position", "fleet/{shard}/+/position")
    '17'
    >>> shard_from_topic("fleet/bus17/position", "fleet/+/position") is None
    True
    """
    want = topic_filter.split("/")
    if SHARD_LEVEL not in want:
        return None
    have = topic.split("/")
    found: str | None = None
    for i, level in enumerate(want):
        if level == "#":
            return found if len(have) >= i else None
        if i >= len(have):
            return None
        if level == SHARD_LEVEL:
            found = have[i]
        elif level not in ("+", have[i]):
            return None
    return found if len(have) == len(want) else None


def validate_vehicle(vehicle: str, limits: FeedLimits, where: str) -> str:
    """Return ``vehicle`` if it is a usable id, else raise ``bad_vehicle``.

    A usable id is not empty, at most ``limits.max_vehicle_len`` characters, has no
    ``/ + #`` (it becomes an MQTT topic level of our outputs) and no control characters,
    and does not start or end with whitespace. ``where`` ("topic" or "payload") goes
    into the message.

    >>> validate_vehicle("bus 17", FeedLimits(), "payload")
    'bus 17'
    >>> validate_vehicle("", FeedLimits(), "topic")
    Traceback (most recent call last):
    ...
    livematch.errors.BadMessageError: bad_vehicle: topic vehicle id is empty
    """
    if not vehicle:
        raise BadMessageError("bad_vehicle", f"{where} vehicle id is empty")
    if len(vehicle) > limits.max_vehicle_len:
        raise BadMessageError(
            "bad_vehicle",
            f"{where} vehicle id {vehicle[:limits.max_vehicle_len]!r}... has {len(vehicle)} "
            f"characters, more than {limits.max_vehicle_len}")
    if _BAD_ID_CHAR.search(vehicle):
        bad = sorted(set(_BAD_ID_CHAR.findall(vehicle)))
        raise BadMessageError(
            "bad_vehicle",
            f"{where} vehicle id {vehicle!r} contains {', '.join(repr(c) for c in bad)}; "
            "'/', '+', '#' and control characters are not allowed")
    if vehicle != vehicle.strip():
        raise BadMessageError(
            "bad_vehicle", f"{where} vehicle id {vehicle!r} starts or ends with whitespace")
    return vehicle


def parse_time(value: str | float) -> float:
    """Convert a message ``time`` to epoch seconds (UTC), without range checks.

    Strings are ISO 8601 as Python's :meth:`datetime.fromisoformat` reads them (extended
    and basic formats, ``T`` or a space, lower-case ``t``/``z`` as RFC 3339 allows), and
    must carry a zone. Fractions beyond microseconds are truncated; a leap second
    (``:60``) is refused. Numbers are taken as epoch seconds.

    >>> parse_time("1985-04-12T23:20:50.52Z")   # RFC 3339 §5.8 example
    482196050.52
    >>> parse_time(1700000000)
    1700000000.0
    >>> parse_time("2026-12-01T08:00:00")
    Traceback (most recent call last):
    ...
    livematch.errors.BadMessageError: bad_time: time '2026-12-01T08:00:00' has no zone \
(add Z or an offset such as +02:00)
    """
    if not isinstance(value, str):
        t = float(value)
        if not math.isfinite(t):
            raise BadMessageError("not_finite", f"time {value!r} is not a finite number")
        return t
    try:
        parsed = datetime.fromisoformat(value.upper())
    except ValueError as exc:
        raise BadMessageError(
            "bad_time", f"time {value!r} is not an ISO 8601 timestamp ({exc})") from exc
    if parsed.tzinfo is None or parsed.utcoffset() is None:
        raise BadMessageError(
            "bad_time", f"time {value!r} has no zone (add Z or an offset such as +02:00)")
    # timestamp() of an aware datetime divides an exact microsecond count by 10**6, so the
    # result is the double nearest to the written time (e.g. ...50.52 -> 482196050.52).
    return parsed.timestamp()


def _check_range(name: str, value: float | None, lo: float, hi: float, unit: str) -> None:
    if value is None:
        return
    if not math.isfinite(value):
        raise BadMessageError("not_finite", f"{name} {value!r} is not a finite number")
    if not lo <= value <= hi:
        raise BadMessageError(
            "out_of_range", f"{name} {value!r} is outside {lo:g}..{hi:g} {unit}")


def _decode_error(exc: msgspec.DecodeError, payload: bytes) -> BadMessageError:
    """Classify a msgspec error into one reason code with a readable detail."""
    text = str(exc)
    if isinstance(exc, msgspec.ValidationError):
        at = _AT_PATH.search(text)
        field = at.group(1) if at else ""
        if text.startswith("Object missing required field"):
            return BadMessageError("missing_field", text.replace("Object missing", "missing"))
        if not field and text.startswith("Expected `object`"):
            return BadMessageError("not_object", f"payload is not a JSON object: {text}")
        if text.startswith("Number out of range"):
            return BadMessageError(
                "not_finite", f"{field} is too large for a double (reads as infinity)")
        what = text[:at.start()] if at else text
        return BadMessageError("bad_type", f"field `{field}`: {what[:1].lower()}{what[1:]}")
    pos = _BYTE_POS.search(text)
    if pos:
        rest = payload[int(pos.group(1)):int(pos.group(1)) + 8]
        for token in (b"NaN", b"Infinity"):
            if rest.startswith(token):
                return BadMessageError(
                    "not_finite", f"{token.decode()} at byte {pos.group(1)} is not a JSON "
                    "number (JSON has no NaN or Infinity)")
    return BadMessageError("not_json", f"payload is not valid JSON: {text}")


def decode_position(
    topic: str, payload: bytes, projection: Projection, limits: FeedLimits = FeedLimits(),
    at: float | None = None,
) -> Fix:
    """Decode and validate one position message into a projected :class:`Fix`.

    Args:
        topic: the MQTT topic it arrived on (the vehicle may be a level of it).
        payload: the raw message bytes (UTF-8 JSON).
        projection: the network's projection; ``x``/``y`` of the fix are in its metres.
        limits: size, id, time and topic rules.
        at: the receive time (epoch seconds); when given, a fix more than
            ``limits.max_future_s`` ahead of it is refused as ``future_time``.

    Raises:
        BadMessageError: with one of :data:`REASONS`; checks run in a fixed order (size,
            JSON, types, vehicle, time, coordinates, optional fields), so the same bytes
            always give the same reason.

    Example:
        >>> p = Projection.local(24.94, 60.17)
        >>> fix = decode_position("fleet/bus17/position",
        ...     b'{"time": 1700000000, "lat": 60.17, "lon": 24.94}', p)
        >>> fix.vehicle, fix.t, round(float(fix.x), 6)
        ('bus17', 1700000000.0, 0.0)
        >>> decode_position("fleet/bus17/position", b"[]", p)
        Traceback (most recent call last):
        ...
        livematch.errors.BadMessageError: not_object: payload is not a JSON object: \
Expected `object`, got `array`
    """
    return PositionReader(projection, limits).read(topic, payload, at)


#: How many validated vehicle ids a :class:`PositionReader` remembers before it starts
#: over (a dict of short strings: about 100 bytes an id).
VALID_IDS_HELD = 4096


class PositionReader:
    """:func:`decode_position` for one projection and one set of limits (one per worker).

    The same checks in the same order with the same errors; what depends only on the
    limits (the topic filter's shape, the first and last accepted fix times) is worked
    out once here instead of on every message, and a vehicle id that passed
    :func:`validate_vehicle` is remembered (up to :data:`VALID_IDS_HELD` ids, then the
    memory starts over), so the ids of a fleet are checked once, not once per fix. The
    remembered ids change no answer: an id is remembered only after it passed, and
    passing depends on nothing but the id and the limits.

    Example (the second message is refused exactly as ``decode_position`` refuses it):
        >>> reader = PositionReader(Projection.local(24.94, 60.17), FeedLimits())
        >>> reader.read("fleet/bus17/position", b'{"time": 1700000000, "lat": 60.17, '
        ...             b'"lon": 24.94}').vehicle
        'bus17'
        >>> reader.read("fleet/bus17/position", b'{"time": 1700000000, "lat": 91, "lon": 0}')
        Traceback (most recent call last):
        ...
        livematch.errors.BadMessageError: out_of_range: lat 91.0 is outside -90..90 degrees
    """

    __slots__ = ("_future_s", "_max_bytes", "_max_time", "_min_time", "_shape",
                 "_to_xy", "_valid", "limits", "projection")

    def __init__(self, projection: Projection, limits: FeedLimits = FeedLimits()) -> None:
        self.projection = projection
        self.limits = limits
        self._to_xy = projection.point_to_xy
        self._max_bytes = limits.max_payload_bytes
        self._shape = _filter_shape(limits.topic_filter)
        self._min_time = limits.min_time
        self._max_time = limits.max_time
        self._future_s = limits.max_future_s
        self._valid: dict[str, None] = {}

    def _check_vehicle(self, vehicle: str, where: str) -> None:
        """:func:`validate_vehicle`, once per id (``where`` is only read on a refusal)."""
        if vehicle in self._valid:
            return
        validate_vehicle(vehicle, self.limits, where)
        if len(self._valid) >= VALID_IDS_HELD:
            self._valid = {}
        self._valid[vehicle] = None

    def read(self, topic: str, payload: bytes, at: float | None = None) -> Fix:
        """Decode and validate one position message (see :func:`decode_position`).

        Raises:
            BadMessageError: as :func:`decode_position` does, for the same bytes.
        """
        limits = self.limits
        if len(payload) > self._max_bytes:
            raise BadMessageError(
                "too_large",
                f"payload has {len(payload)} bytes, more than {limits.max_payload_bytes}")
        try:
            msg = _DECODER.decode(payload)
        except msgspec.DecodeError as exc:
            raise _decode_error(exc, payload) from exc

        shape = self._shape
        from_topic: str | None = None
        if shape:  # 'prefix/+/suffix': vehicle_from_topic's first case, inline
            prefix, suffix = shape
            if (len(topic) >= len(prefix) + len(suffix) and topic.startswith(prefix)
                    and topic.endswith(suffix)):
                level = topic[len(prefix):len(topic) - len(suffix)]
                if "/" not in level:
                    from_topic = level
        elif shape is not None:
            from_topic = _vehicle_by_levels(topic, limits.topic_filter)
        valid = self._valid
        if from_topic is not None and from_topic not in valid:
            self._check_vehicle(from_topic, f"topic {topic!r}")
        vehicle = msg.vehicle
        if vehicle is not None and vehicle != from_topic:
            if vehicle not in valid:
                self._check_vehicle(vehicle, "payload")
            if from_topic is not None:
                raise BadMessageError(
                    "vehicle_mismatch",
                    f"payload vehicle {vehicle!r} differs from topic vehicle {from_topic!r}")
        if vehicle is None:
            vehicle = from_topic
            if vehicle is None:
                raise BadMessageError(
                    "missing_field",
                    f"missing field `vehicle`, and topic {topic!r} does not match "
                    f"{limits.topic_filter!r}")

        # a number is the time itself (msgspec gives a float); -inf < t < inf is False
        # for NaN and the infinities, which parse_time refuses with its own message
        t = msg.time
        if not (type(t) is float and -math.inf < t < math.inf):
            t = parse_time(t)
        if not self._min_time <= t < self._max_time:
            hint = " (milliseconds sent as seconds?)" if t >= 1e11 else ""
            raise BadMessageError(
                "out_of_range",
                f"time {msg.time!r} is outside the years {limits.min_year}..{limits.max_year}"
                f"{hint}")
        if at is not None and self._future_s > 0 and t - at > self._future_s:
            raise BadMessageError(
                "future_time",
                f"time {msg.time!r} is {t - at:.0f} s ahead of its receive time {at!r}, more "
                f"than {limits.max_future_s:g} s (is the device's clock wrong?)")
        lat, lon = msg.lat, msg.lon
        accuracy, speed, heading = msg.accuracy, msg.speed, msg.heading
        # One chain of compares passes every valid message (NaN fails any compare, infinity
        # the open upper bounds); whatever fails it is checked field by field, in order,
        # for the reason and the message.
        if not (-90.0 <= lat <= 90.0 and -180.0 <= lon <= 180.0
                and (accuracy is None or 0.0 <= accuracy < math.inf)
                and (speed is None or 0.0 <= speed < math.inf)
                and (heading is None or 0.0 <= heading <= 360.0)):
            _check_range("lat", lat, -90.0, 90.0, "degrees")
            _check_range("lon", lon, -180.0, 180.0, "degrees")
            _check_range("accuracy", accuracy, 0.0, math.inf, "metres")
            _check_range("speed", speed, 0.0, math.inf, "m/s")
            _check_range("heading", heading, 0.0, 360.0, "degrees")

        x, y = self._to_xy(lon, lat)
        return Fix(vehicle, t, lon, lat, x, y, accuracy, speed, heading, msg.route)


def looks_like_position(payload: bytes, limits: FeedLimits = FeedLimits()) -> bool:
    """Whether ``payload`` passes the size and type checks of a position message.

    A cheap first look (no projection, no range checks) for deciding what to drop first
    when the daemon is overloaded: False means :func:`decode_position` would certainly
    refuse the message.

    >>> looks_like_position(b'{"time": 1700000000, "lat": 60.1, "lon": 24.9}')
    True
    >>> looks_like_position(b"{broken"), looks_like_position(b"")
    (False, False)
    """
    if len(payload) > limits.max_payload_bytes:
        return False
    try:
        _DECODER.decode(payload)
    except msgspec.DecodeError:
        return False
    return True


def known_vehicle(topic: str, payload: bytes, limits: FeedLimits = FeedLimits()) -> str | None:
    """Best-effort vehicle id of a message that may be rejected, for labelling rejects.

    The topic's vehicle level when it is a valid id, else the payload's ``vehicle`` when
    the payload is a JSON object whose ``vehicle`` is a valid id, else None.

    >>> known_vehicle("fleet/bus17/position", b"garbage")
    'bus17'
    >>> known_vehicle("other", b'{"vehicle": "van3"}')
    'van3'
    >>> known_vehicle("other", b'{"vehicle": "a/b"}') is None
    True
    """
    from_topic = vehicle_from_topic(topic, limits.topic_filter)
    if from_topic is not None and _usable(from_topic, limits):
        return from_topic  # the payload is not even read: cheap for floods of junk
    if len(payload) <= limits.max_payload_bytes:
        with contextlib.suppress(msgspec.DecodeError):
            vehicle = _OBJECT_DECODER.decode(payload).get("vehicle")
            if isinstance(vehicle, str) and _usable(vehicle, limits):
                return vehicle
    return None


def _usable(vehicle: str, limits: FeedLimits) -> bool:
    try:
        validate_vehicle(vehicle, limits, "")
    except BadMessageError:
        return False
    return True
