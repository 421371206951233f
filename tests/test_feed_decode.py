"""Position message decoding and validation (livematch.feed.decode)."""

from __future__ import annotations

import calendar
import itertools
import json
import math
from datetime import UTC, datetime, timedelta, timezone

import pytest
from pyproj import Geod

from livematch.core.geometry import Projection
from livematch.errors import BadMessageError, LivematchError
from livematch.feed.decode import (
    REASONS,
    VALID_IDS_HELD,
    FeedLimits,
    PositionReader,
    _vehicle_by_levels,
    decode_position,
    known_vehicle,
    parse_time,
    validate_vehicle,
    vehicle_from_topic,
)

PROJ = Projection.local(24.94, 60.17)
TOPIC = "fleet/bus17/position"
T0 = 1_764_576_000  # 2025-12-01T08:00:00Z


def good(**fields: object) -> dict[str, object]:
    msg: dict[str, object] = {"time": T0, "lat": 60.17, "lon": 24.94}
    msg.update(fields)
    return {k: v for k, v in msg.items() if v is not ...}


DEFAULT_LIMITS = FeedLimits()


def reason_of(payload: bytes, topic: str = TOPIC, limits: FeedLimits = DEFAULT_LIMITS) -> str:
    with pytest.raises(BadMessageError) as info:
        decode_position(topic, payload, PROJ, limits)
    assert info.value.reason in REASONS
    assert isinstance(info.value, LivematchError)
    return info.value.reason


def enc(msg: object) -> bytes:
    return json.dumps(msg).encode()


def test_decode_position_minimal_message():
    """A message with time, lat, lon on a vehicle topic gives a fix named by the topic."""
    fix = decode_position(TOPIC, enc(good()), PROJ)
    assert (fix.vehicle, fix.t, fix.lat, fix.lon) == ("bus17", float(T0), 60.17, 24.94)
    assert (fix.accuracy, fix.speed, fix.heading, fix.route) == (None, None, None, None)


def test_decode_position_all_optional_fields():
    """accuracy, speed, heading and route are carried onto the fix; extra fields ignored."""
    msg = good(vehicle="bus17", accuracy=0, speed=11.5, heading=360, route="550",
               battery=0.93, extra={"nested": [1, 2]})
    fix = decode_position(TOPIC, enc(msg), PROJ)
    assert (fix.accuracy, fix.speed, fix.heading, fix.route) == (0.0, 11.5, 360.0, "550")


def test_decode_position_projects_like_geodesic_distance():
    """x, y are metres: on the local AEQD the distance from the centre is geodesic."""
    # Outside reference: pyproj.Geod (GeographicLib) geodesic on WGS84; an azimuthal
    # equidistant projection keeps distances from its centre exact.
    fix = decode_position(TOPIC, enc(good(lat=60.18, lon=24.96)), PROJ)
    _, _, dist = Geod(ellps="WGS84").inv(24.94, 60.17, 24.96, 60.18)
    assert math.hypot(fix.x, fix.y) == pytest.approx(dist, abs=1e-3)
    assert fix.x > 0 and fix.y > 0


def test_decode_position_vehicle_from_payload_without_topic_level():
    """With a topic outside the filter, the payload's vehicle is used."""
    fix = decode_position("other/feed", enc(good(vehicle="van 3")), PROJ)
    assert fix.vehicle == "van 3"


def test_decode_position_same_vehicle_in_topic_and_payload():
    """Topic and payload naming the same vehicle is fine."""
    assert decode_position(TOPIC, enc(good(vehicle="bus17")), PROJ).vehicle == "bus17"


@pytest.mark.parametrize("payload", [b"", b"{", b'{"time": 1', b"lat=60", b"\xff\xfe{}",
                                     b'{"time": 1, "lat": 60, "lon": 24}x',
                                     b'{"time": 1, "lat": 60, "lon": 24,}'])
def test_decode_position_not_json(payload):
    """Bytes that are not JSON (or not UTF-8) are not_json."""
    assert reason_of(payload) == "not_json"


@pytest.mark.parametrize("payload", [b"[1, 2]", b"42", b"null", b'"text"', b"true"])
def test_decode_position_not_object(payload):
    """Valid JSON that is not an object is not_object."""
    assert reason_of(payload) == "not_object"


@pytest.mark.parametrize("field", ["time", "lat", "lon"])
def test_decode_position_missing_field(field):
    """time, lat and lon are required; the detail names the field."""
    with pytest.raises(BadMessageError) as info:
        decode_position(TOPIC, enc(good(**{field: ...})), PROJ)
    assert info.value.reason == "missing_field"
    assert f"`{field}`" in info.value.detail


def test_decode_position_missing_vehicle_everywhere():
    """No vehicle in the payload and a topic outside the filter is missing_field."""
    with pytest.raises(BadMessageError) as info:
        decode_position("fleet/bus17/status", enc(good()), PROJ)
    assert info.value.reason == "missing_field"
    assert "fleet/bus17/status" in info.value.detail


@pytest.mark.parametrize("payload", [
    b'{"time": 1764576000, "lat": NaN, "lon": 24.9}',
    b'{"time": 1764576000, "lat": 60.1, "lon": Infinity}',
    b'{"time": 1764576000, "lat": 60.1, "lon": -Infinity}',
    b'{"time": 1764576000, "lat": 1e999, "lon": 24.9}',
    b'{"time": 1764576000, "lat": 60.1, "lon": -1e999}',
    b'{"time": 1e999, "lat": 60.1, "lon": 24.9}',
    b'{"time": 1764576000, "lat": 60.1, "lon": 24.9, "speed": NaN}',
])
def test_decode_position_not_finite(payload):
    """NaN / Infinity tokens (as Python's json emits) and overflowing numbers: not_finite."""
    assert reason_of(payload) == "not_finite"
    # The same bytes always get the same verdict.
    assert reason_of(payload) == "not_finite"


def test_decode_position_python_json_nan_output():
    """What json.dumps writes for float('nan') is refused as not_finite, not accepted."""
    payload = json.dumps(good(lat=float("nan"))).encode()
    assert b"NaN" in payload
    assert reason_of(payload) == "not_finite"


@pytest.mark.parametrize(("fields", "name"), [
    ({"lat": 91}, "lat"), ({"lat": -90.0001}, "lat"), ({"lon": 180.5}, "lon"),
    ({"lon": -181}, "lon"), ({"accuracy": -1}, "accuracy"), ({"speed": -0.1}, "speed"),
    ({"heading": 360.01}, "heading"), ({"heading": -1}, "heading"),
])
def test_decode_position_out_of_range(fields, name):
    """Coordinates and optional fields outside their ranges are out_of_range."""
    with pytest.raises(BadMessageError) as info:
        decode_position(TOPIC, enc(good(**fields)), PROJ)
    assert info.value.reason == "out_of_range"
    value = float(next(iter(fields.values())))
    assert info.value.detail.startswith(f"{name} {value!r} is outside")


def test_decode_position_range_edges_accepted():
    """The range ends themselves (poles, antimeridian, heading 0 and 360) are valid."""
    for lat, lon, heading in [(90, 180, 0), (-90, -180, 360)]:
        fix = decode_position(TOPIC, enc(good(lat=lat, lon=lon, heading=heading)), PROJ)
        assert (fix.lat, fix.lon, fix.heading) == (lat, lon, heading)


@pytest.mark.parametrize(("fields", "name"), [
    ({"lat": "60.17"}, "lat"), ({"lon": None}, "lon"), ({"time": True}, "time"),
    ({"time": [2025]}, "time"), ({"vehicle": 17}, "vehicle"), ({"accuracy": "5"}, "accuracy"),
    ({"route": 550}, "route"), ({"speed": False}, "speed"), ({"heading": {}}, "heading"),
])
def test_decode_position_bad_type(fields, name):
    """A field of the wrong JSON type is bad_type, naming the field."""
    with pytest.raises(BadMessageError) as info:
        decode_position(TOPIC, enc(good(**fields)), PROJ)
    assert info.value.reason == "bad_type"
    assert info.value.detail.startswith(f"field `{name}`: expected")


@pytest.mark.parametrize("value", ["yesterday", "2025-13-01T00:00:00Z", "2025-12-01T25:00Z",
                                   "1990-12-31T23:59:60Z", "", "1764576000"])
def test_decode_position_unparseable_time(value):
    """A time string that is not ISO 8601 is bad_time, naming the value."""
    with pytest.raises(BadMessageError) as info:
        decode_position(TOPIC, enc(good(time=value)), PROJ)
    assert info.value.reason == "bad_time"
    assert repr(value) in info.value.detail


@pytest.mark.parametrize("value", ["2025-12-01T08:00:00", "2025-12-01 08:00:00.5",
                                   "2025-12-01"])
def test_decode_position_naive_time(value):
    """A timestamp without a zone is refused (bad_time), never guessed."""
    with pytest.raises(BadMessageError) as info:
        decode_position(TOPIC, enc(good(time=value)), PROJ)
    assert info.value.reason == "bad_time"
    assert "no zone" in info.value.detail


@pytest.mark.parametrize("value", [0, 946_684_799.9, 4_133_980_800, 1_764_576_000_000])
def test_decode_position_time_outside_years(value):
    """Times before 2000 or after 2100 (e.g. milliseconds) are out_of_range."""
    with pytest.raises(BadMessageError) as info:
        decode_position(TOPIC, enc(good(time=value)), PROJ)
    assert info.value.reason == "out_of_range"
    if value > 1e11:
        assert "milliseconds" in info.value.detail


def test_decode_position_time_year_edges():
    """2000-01-01T00:00Z and the last microsecond of 2100 are inside the default years."""
    assert decode_position(TOPIC, enc(good(time="2000-01-01T00:00:00Z")), PROJ).t == 946684800.0
    last = decode_position(TOPIC, enc(good(time="2100-12-31T23:59:59.999999Z")), PROJ).t
    assert last == 4133980799.999999


def test_parse_time_rfc3339_examples():
    """The RFC 3339 §5.8 examples give the epoch seconds computed by hand and by calendar."""
    # Outside reference: RFC 3339 section 5.8 examples. By hand: 1985-04-12 is 5580 days
    # after 1970-01-01 (15 years incl. 4 leap days, + 101 days), 5580*86400 + 84050 s.
    assert parse_time("1985-04-12T23:20:50.52Z") == 482196050.52
    assert 5580 * 86400 + 23 * 3600 + 20 * 60 + 50 == 482196050
    # 16:39:57-08:00 is 00:39:57Z on 1996-12-20: 9850 days after the epoch.
    assert parse_time("1996-12-19T16:39:57-08:00") == 851042397.0
    assert 9850 * 86400 + 39 * 60 + 57 == 851042397
    # "1937-01-01T12:00:27.87+00:20" (Netherlands time) is 11:40:27.87Z.
    expected = calendar.timegm((1937, 1, 1, 11, 40, 27, 0, 0, 0)) + 0.87
    assert parse_time("1937-01-01T12:00:27.87+00:20") == pytest.approx(expected, abs=1e-6)


@pytest.mark.parametrize("value", [
    "2025-12-01T08:00:05Z", "2025-12-01t08:00:05z", "2025-12-01T08:00:05+00:00",
    "2025-12-01T10:00:05+02:00", "2025-12-01T02:30:05-05:30", "20251201T080005Z",
    "2025-12-01 08:00:05Z", "2025-12-01T08:00:05.000Z",
])
def test_parse_time_forms_agree_with_datetime(value):
    """Every accepted ISO 8601 form equals Python's datetime arithmetic for 08:00:05Z."""
    expected = (datetime(2025, 12, 1, 8, 0, 5, tzinfo=UTC)
                - datetime(1970, 1, 1, tzinfo=UTC)) / timedelta(seconds=1)
    assert parse_time(value) == expected == 1764576005.0


def test_parse_time_fraction_and_numbers():
    """Fractions keep microseconds; numbers are epoch seconds as given."""
    tz = timezone(timedelta(hours=3))
    dt = datetime(2025, 6, 1, 12, 0, 0, 250_000, tzinfo=tz)
    assert parse_time(dt.isoformat()) == dt.timestamp()
    assert parse_time(1764576005.25) == 1764576005.25
    assert parse_time(1764576005) == 1764576005.0


@pytest.mark.parametrize("vehicle", ["a/b", "a+b", "a#b", "a\x00b", "a\nb", "a\tb", "a\x7fb",
                                     "a\x85b", " bus", "bus ", "", "x" * 65])
def test_decode_position_bad_vehicle_in_payload(vehicle):
    """Vehicle ids with / + #, control characters, edge whitespace, empty or long: refused."""
    with pytest.raises(BadMessageError) as info:
        decode_position("other", enc(good(vehicle=vehicle)), PROJ)
    assert info.value.reason == "bad_vehicle"
    assert "payload vehicle id" in info.value.detail


def test_decode_position_vehicle_length_limit():
    """64 characters are allowed, 65 are not; the limit is configurable."""
    assert decode_position("x", enc(good(vehicle="v" * 64)), PROJ).vehicle == "v" * 64
    assert reason_of(enc(good(vehicle="v" * 9)), "x", FeedLimits(max_vehicle_len=8)) \
        == "bad_vehicle"


@pytest.mark.parametrize("topic", ["fleet//position", "fleet/ bus/position",
                                   "fleet/a\x01b/position"])
def test_decode_position_bad_vehicle_in_topic(topic):
    """A vehicle topic level that is not a valid id is bad_vehicle, naming the topic."""
    with pytest.raises(BadMessageError) as info:
        decode_position(topic, enc(good()), PROJ)
    assert info.value.reason == "bad_vehicle"
    assert repr(topic) in info.value.detail


def test_decode_position_too_large():
    """A payload longer than max_payload_bytes is too_large; exactly the limit is read."""
    body = enc(good(vehicle="bus17"))
    pad = 4096 - len(body) - len(', "pad": ""')
    exact = body[:-1] + b', "pad": "' + b"p" * pad + b'"}'
    assert len(exact) == 4096
    assert decode_position(TOPIC, exact, PROJ).vehicle == "bus17"
    with pytest.raises(BadMessageError) as info:
        decode_position(TOPIC, exact[:-1] + b' }', PROJ)
    assert info.value.reason == "too_large"
    assert info.value.detail == "payload has 4097 bytes, more than 4096"


def test_decode_position_vehicle_mismatch():
    """Payload and topic naming different vehicles is vehicle_mismatch with both names."""
    with pytest.raises(BadMessageError) as info:
        decode_position(TOPIC, enc(good(vehicle="bus18")), PROJ)
    assert info.value.reason == "vehicle_mismatch"
    assert info.value.detail == "payload vehicle 'bus18' differs from topic vehicle 'bus17'"


def test_decode_position_check_order_is_fixed():
    """Several faults at once always give the earliest check's reason."""
    both = enc({"vehicle": "a/b", "time": "soon", "lat": 91, "lon": 24.9})
    assert reason_of(both, "other") == "bad_vehicle"
    assert reason_of(enc({"time": "soon", "lat": 91, "lon": 24.9})) == "bad_time"


def test_vehicle_from_topic_filters():
    """The '+' level is the vehicle; '#' matches the rest; no '+' gives None."""
    assert vehicle_from_topic("fleet/bus17/position") == "bus17"
    assert vehicle_from_topic("fleet/bus17/position/extra") is None
    assert vehicle_from_topic("fleet/bus17") is None
    assert vehicle_from_topic("a/v1/b/c", "a/+/#") == "v1"
    assert vehicle_from_topic("a/v1", "a/+/#") == "v1"  # '#' also matches the parent level
    assert vehicle_from_topic("a/v1/b", "a/#") is None
    assert vehicle_from_topic("x/v1", "+/v1") == "x"


def test_vehicle_from_topic_fast_reading_equals_level_by_level():
    """The two-compare reading of 'prefix/+/suffix' filters gives what the level-by-level
    reading gives, for every filter and topic built from a small set of levels.

    Reference: the level-by-level walk (``_vehicle_by_levels``), which follows the MQTT
    topic filter rules (OASIS MQTT 5.0, section 4.7: '+' one level, '#' the rest and the
    parent level); empty levels, missing and extra levels, '#' and '{shard}' included.
    """
    levels = ["fleet", "position", "bus17", "", "+", "#", "{shard}"]
    filters = {"/".join(c) for n in range(1, 4) for c in itertools.product(levels, repeat=n)
               if "#" not in c[:-1]}
    topics = {f for f in filters if not {"+", "#", "{shard}"} & set(f.split("/"))}
    topics |= {"fleet/bus17/position", "fleet//position", "fleet/position", "/", "//",
               "fleet/bus17/position/x", "fleet/a/b/position", "livematch/control/v1/route"}
    for topic_filter in sorted(filters):
        for topic in sorted(topics):
            assert (vehicle_from_topic(topic, topic_filter)
                    == _vehicle_by_levels(topic, topic_filter)), (topic, topic_filter)


def test_validate_vehicle_where_is_named():
    """The error names where the id came from."""
    assert validate_vehicle("bus-17_ä", FeedLimits(), "payload") == "bus-17_ä"
    with pytest.raises(BadMessageError, match="topic 'x' vehicle id 'a#' contains '#'"):
        validate_vehicle("a#", FeedLimits(), "topic 'x'")


def test_known_vehicle_best_effort():
    """Rejects are labelled with the topic's vehicle, else the payload's, else None."""
    assert known_vehicle(TOPIC, b"\xff") == "bus17"
    assert known_vehicle("other", b'{"vehicle": "van3", "lat": "x"}') == "van3"
    assert known_vehicle("other", b'{"vehicle": 3}') is None
    assert known_vehicle("other", b"[]") is None
    assert known_vehicle("fleet//position", b'{"vehicle": "v"}') == "v"


def test_feed_limits_validated():
    """Nonsense limits are refused at construction."""
    with pytest.raises(ValueError, match="max_payload_bytes"):
        FeedLimits(max_payload_bytes=0)
    with pytest.raises(ValueError, match="min_year"):
        FeedLimits(min_year=2100, max_year=2000)
    with pytest.raises(ValueError, match="at most one"):
        FeedLimits(topic_filter="+/+/position")
    assert FeedLimits().min_time == 946684800.0
    assert FeedLimits().max_time == 4133980800.0


def _outcome(read, topic: str, payload: bytes, at: float | None) -> object:
    """The Fix a read gives, or the (reason, detail) of its refusal."""
    try:
        return read(topic, payload, at)
    except BadMessageError as exc:
        return (exc.reason, exc.detail)


def test_position_reader_shared_answers_as_a_fresh_decode():
    """One reader for a whole stream (vehicle ids remembered once they pass) answers every
    message as a fresh ``decode_position`` does, bad ids after good ones included."""
    # '/', '+' and '#' are MQTT's level separator and wildcards (MQTT 3.1.1 §4.7): a topic
    # level built from such an id would not be one level; DESIGN §7 refuses them.
    stream = [
        (TOPIC, good()), ("other", good(vehicle="van3")), (TOPIC, good(vehicle="bus17")),
        (TOPIC, good(vehicle="van3")), ("other", good(vehicle="a/b")),
        ("fleet/a+b/position", good()), ("fleet/a+b/position", good(vehicle="a+b")),
        ("other", good(vehicle="van3 ")), ("other", good()), (TOPIC, good(lat=91)),
        (TOPIC, good(time=T0 + 400)), (TOPIC, good(time="2025-12-01T08:00:00")),
        (TOPIC, good(time="2025-12-01T08:00:00.250+02:00", heading=360, speed=0)),
        ("fleet/" + "x" * 65 + "/position", good()), (TOPIC, b'{"time": NaN}'),
        (TOPIC, b"[]"), ("other", good(vehicle="")), (TOPIC, good(time=0)),
    ]
    for limits in (FeedLimits(), FeedLimits(topic_filter="depot/+/#", max_future_s=0.0),
                   FeedLimits(topic_filter="fleet/{shard}/+/position")):
        reader = PositionReader(PROJ, limits)
        for _ in range(2):  # the second pass meets every id remembered
            for topic, body in stream:
                payload = body if isinstance(body, bytes) else json.dumps(body).encode()
                want = _outcome(lambda tp, pl, at, lim=limits: decode_position(
                    tp, pl, PROJ, lim, at), topic, payload, T0)
                assert _outcome(reader.read, topic, payload, T0) == want, (topic, payload)


def test_position_reader_remembers_a_bounded_number_of_ids():
    """The remembered ids start over after VALID_IDS_HELD, and a bad id is refused
    whatever the reader remembers."""
    reader = PositionReader(PROJ, FeedLimits())
    for i in range(VALID_IDS_HELD + 10):
        assert reader.read("other", json.dumps(good(vehicle=f"v{i}")).encode()).vehicle == f"v{i}"
        assert len(reader._valid) <= VALID_IDS_HELD
    with pytest.raises(BadMessageError) as info:
        reader.read("other", json.dumps(good(vehicle="v#1")).encode())
    assert info.value.reason == "bad_vehicle"
