"""Replay logs: reading and writing recorded feed messages (livematch.feed.replaylog)."""

from __future__ import annotations

import gzip
import json
from pathlib import Path

import pytest

from livematch.core.geometry import Projection
from livematch.errors import BadMessageError, LivematchError
from livematch.feed.decode import decode_position
from livematch.feed.replaylog import (
    BadReplayLogError,
    LogEntry,
    ReplayLogWriter,
    payload_for_log,
    read_replay_log,
)

DATA = Path(__file__).parent / "data" / "feeds"

# Payloads as they might arrive on the wire, including broken ones.
WIRE = [
    (1764576000.5, "fleet/bus17/position",
     b'{"time": "2025-12-01T08:00:00Z", "lat": 60.17, "lon": 24.94}'),
    (1764576001.0, "fleet/bus17/position", b"lat=60.17;lon=24.94"),
    (1764576002.0, "fleet/van3/position", b'{"time": 1764576001, "lat": NaN, "lon": 24.9}'),
    (1764576003.0, "fleet/van3/position", b'{"time": 1764576001, "lat": 1e999, "lon": 1}'),
    (1764576004.0, "other", b'{"vehicle": "v\xc3\xa4n", "time": 1764576001,\n "lat": 1, "lon": 2}'),
    (1764576005.0, "fleet/van3/position", b"\xff\xfe not utf-8"),
    (1764576006.0, "fleet/van3/position", b""),
    (1764576007.0, "fleet/van3/position", b"[1, 2]"),
]


def verdict(topic: str, payload: bytes) -> str:
    try:
        decode_position(topic, payload, Projection.local(24.94, 60.17))
    except BadMessageError as exc:
        return exc.reason
    return "ok"


@pytest.mark.parametrize("name", ["feed.jsonl", "feed.jsonl.gz"])
def test_replay_log_round_trip(tmp_path, name):
    """Written messages read back with the same time, topic and decoder verdict."""
    path = tmp_path / name
    with ReplayLogWriter(path) as log:
        for at, topic, payload in WIRE:
            log.write(at, topic, payload)
    entries = list(read_replay_log(path))
    assert [(e.at, e.topic) for e in entries] == [(at, topic) for at, topic, _ in WIRE]
    verdicts = [verdict(e.topic, e.payload) for e in entries]
    assert verdicts == \
        [verdict(topic, payload) for _, topic, payload in WIRE] == \
        ["ok", "not_json", "not_finite", "not_finite", "ok", "not_json", "not_json", "not_object"]
    # Every payload comes back byte for byte, whatever it was.
    assert [e.payload for e in entries] == [payload for _, _, payload in WIRE]


def test_replay_log_gzip_is_really_gzip_and_repeatable(tmp_path):
    """A .gz log is a gzip stream, and writing it twice gives identical bytes."""
    blobs = []
    for i in range(2):
        (tmp_path / str(i)).mkdir()
        path = tmp_path / str(i) / "feed.jsonl.gz"
        with ReplayLogWriter(path) as log:
            for at, topic, payload in WIRE:
                log.write(at, topic, payload)
        blobs.append(path.read_bytes())
    assert blobs[0][:2] == b"\x1f\x8b"
    assert blobs[0] == blobs[1]
    first = gzip.decompress(blobs[0]).splitlines()[0]
    assert json.loads(first) == {"at": 1764576000.5, "topic": "fleet/bus17/position",
                                 "payload": {"time": "2025-12-01T08:00:00Z", "lat": 60.17,
                                             "lon": 24.94}}


def test_replay_log_line_layout(tmp_path):
    """One compact JSON object per line: at, topic, payload (string when not an object)."""
    path = tmp_path / "feed.jsonl"
    with ReplayLogWriter(path) as log:
        log.write(12, "t/v/position", b'{"a": 1}')
        log.write(13.25, "t/v/position", b"oops")
        log.write(14, "t/v/position", b"\xffok")
    assert path.read_text() == (
        '{"at":12.0,"topic":"t/v/position","payload":{"a": 1}}\n'
        '{"at":13.25,"topic":"t/v/position","payload":"oops"}\n'
        '{"at":14.0,"topic":"t/v/position","payload":"\\udcffok"}\n'
    )


def test_read_replay_log_handwritten_file():
    """A hand-written log with spaces, a blank line and every payload kind reads in order."""
    entries = list(read_replay_log(DATA / "mixed.jsonl"))
    assert entries == [
        LogEntry(1764576000.5, "fleet/bus17/position",
                 b'{"time": "2025-12-01T08:00:00Z", "lat": 60.17, "lon": 24.94}'),
        LogEntry(1764576001.0, "fleet/bus17/position", b"lat=60.17;lon=24.94"),
        LogEntry(1764576002.0, "fleet/van3/position",
                 b'{"time":1764576001,"lat":1e999,"lon":24.94}'),
        LogEntry(1764576003.0, "fleet/van3/position", b"[1, 2]"),
    ]


def test_read_replay_log_string_payload_escapes(tmp_path):
    """JSON escapes in a string payload are decoded before the bytes reach the decoder."""
    line = r'{"at": 1, "topic": "t", "payload": "{\"lat\": 1}\n\u00e4"}'
    path = tmp_path / "x.jsonl"
    path.write_text(line + "\n", encoding="utf-8")
    (entry,) = read_replay_log(path)
    assert entry.payload == '{"lat": 1}\nä'.encode()


def test_read_replay_log_broken_line_names_file_and_line():
    """A malformed log line is a LivematchError naming the file and its line number."""
    entries = read_replay_log(DATA / "broken.jsonl")
    assert next(entries).at == 1764576000.5
    assert next(entries).at == 1764576001.0
    with pytest.raises(BadReplayLogError) as info:
        next(entries)
    assert isinstance(info.value, LivematchError)
    assert str(info.value).startswith(f"{DATA / 'broken.jsonl'}:3: not a replay log line")


@pytest.mark.parametrize("line", [
    '{"topic": "t", "payload": {}}', '{"at": 1, "payload": {}}', '{"at": 1, "topic": "t"}',
    '[1, "t", {}]', '{"at": 1, "topic": 5, "payload": {}}', "not json",
    '{"at": 1e999, "topic": "t", "payload": {}}',
    '{"at": 1, "topic": "t", "payload": "\\ud800"}',
    '{"at": 1, "topic": "t", "payload": {"a": "\\udcff"}}',
    '{"at": true, "topic": "t", "payload": "\\udcff"}',
])
def test_read_replay_log_malformed_lines(tmp_path, line):
    """Missing or mistyped at/topic/payload, or a non-JSON line, is an error at line 2."""
    path = tmp_path / "log.jsonl"
    path.write_text('{"at": 0, "topic": "t", "payload": {}}\n' + line + "\n")
    with pytest.raises(BadReplayLogError, match=r"log\.jsonl:2: "):
        list(read_replay_log(path))


def test_read_replay_log_missing_file(tmp_path):
    """A missing log is an error naming the path."""
    with pytest.raises(BadReplayLogError, match=r"nope\.jsonl"):
        list(read_replay_log(tmp_path / "nope.jsonl"))


def test_read_replay_log_corrupt_gzip(tmp_path):
    """A .gz name with non-gzip content, or a truncated stream, is an error naming the file."""
    bad = tmp_path / "bad.jsonl.gz"
    bad.write_bytes(b"plain text, not gzip\n")
    with pytest.raises(BadReplayLogError, match=r"bad\.jsonl\.gz"):
        list(read_replay_log(bad))
    cut = tmp_path / "cut.jsonl.gz"
    whole = gzip.compress(b'{"at": 0, "topic": "t", "payload": {}}\n' * 200)
    cut.write_bytes(whole[: len(whole) // 2])
    with pytest.raises(BadReplayLogError, match=r"cut\.jsonl\.gz"):
        list(read_replay_log(cut))


def test_payload_for_log_forms():
    """One-line objects are embedded verbatim; everything else becomes a JSON string."""
    assert payload_for_log(b'{"a" : [1.50, 2]}') == b'{"a" : [1.50, 2]}'
    assert payload_for_log(b' {"a": 1}') == b'" {\\"a\\": 1}"'
    assert payload_for_log(b'{"a":\r\n1}') == b'"{\\"a\\":\\r\\n1}"'
    assert payload_for_log(b'{"a": NaN}') == b'"{\\"a\\": NaN}"'
    assert payload_for_log(b'{"a": 1') == b'"{\\"a\\": 1"'
    assert payload_for_log(b"7") == b'"7"'
    assert payload_for_log(b"\xff") == b'"\\udcff"'
    assert payload_for_log("ä".encode()) == '"ä"'.encode()
