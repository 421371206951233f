"""Recording a feed: the rotating tap, and ``livematch record`` against a real mosquitto."""

from __future__ import annotations

import asyncio
import gzip
import json
import signal
import subprocess
import sys
import time

import pytest
from services import (
    T0,
    WAIT_S,
    Collector,
    drive,
    publisher,
    subprocess_env,
    town,
    wait_until,
    write_config,
)

from livematch.cli import main
from livematch.commands.record import _mqtt_config, record_feed
from livematch.config import load_config
from livematch.core.settings import MatchSettings
from livematch.errors import BadConfigError
from livematch.feed.replaylog import read_replay_log
from livematch.lab.record import (
    BadRecordingError,
    RecordingPipeline,
    RecordingTap,
    RecordSettings,
    recording_files,
    segment_path,
)
from livematch.mapdata.netfile import save_network
from livematch.pipeline import Pipeline
from livematch.service.daemon import Daemon

pytest_plugins = ("fixtures_services",)

# Payloads the pipeline rejects, each for its own reason, plus awkward but valid bytes:
# a recording must keep every one of them exactly as received.
ODD_PAYLOADS = [
    b"lat=60.16;lon=24.93",                          # not_json
    b"\xff\xfe\x00garbage",                          # not UTF-8 at all
    b'{"time": 1780000000,\n "lat": 91, "lon": 1}',  # an object over two lines, lat out of range
    b'{"time": 1780000000, "lat": 1e999, "lon": 1}',  # a number no double holds
    b"[1, 2, 3]",                                    # not_object
    b"",                                             # empty
]


def _messages(prefix: str) -> list[tuple[str, bytes]]:
    """A drive of five fixes with the odd payloads in between, on per-test topics."""
    topic = f"{prefix}/fleet/bus7/position"
    good = [(topic, payload) for _, payload in drive("bus7", 5)]
    out = []
    for i, item in enumerate(good):
        out.append(item)
        if i < len(ODD_PAYLOADS):
            out.append((topic, ODD_PAYLOADS[i]))
    out.append((topic, ODD_PAYLOADS[-1]))
    return out


# ------------------------------------------------------------------- the tap itself


def test_tap_round_trip_keeps_every_byte(tmp_path):
    """What the tap writes reads back as the very (at, topic, payload) it was given."""
    msgs = _messages("t")
    path = tmp_path / "feed.jsonl"
    with RecordingTap(path) as tap:
        for i, (topic, payload) in enumerate(msgs):
            tap.record(T0 + 0.25 * i, topic, payload)
    got = [(e.at, e.topic, e.payload) for e in read_replay_log(path)]
    assert got == [(T0 + 0.25 * i, t, p) for i, (t, p) in enumerate(msgs)]
    assert tap.files == [path] and tap.messages == len(msgs) and tap.errors == 0


def test_tap_gzip_when_name_ends_in_gz(tmp_path):
    """A .gz name gives a gzip file (RFC 1952 magic 1f 8b) holding the same lines."""
    plain, packed = tmp_path / "a.jsonl", tmp_path / "a.jsonl.gz"
    for path in (plain, packed):
        with RecordingTap(path) as tap:
            for i, (topic, payload) in enumerate(_messages("t")):
                tap.record(T0 + i, topic, payload)
    raw = packed.read_bytes()
    assert raw[:2] == b"\x1f\x8b"  # gzip member header (RFC 1952 section 2.3.1)
    assert gzip.decompress(raw) == plain.read_bytes()


def test_tap_rotates_by_receive_time(tmp_path):
    """rotate_s cuts a new segment once a file covers that many seconds of `at`."""
    path = tmp_path / "feed.jsonl.gz"
    with RecordingTap(path, rotate_s=10.0) as tap:
        for i in range(25):
            tap.record(T0 + i, "fleet/a/position", b'{"i": %d}' % i)
    assert [p.name for p in tap.files] == ["feed.jsonl.gz", "feed.00001.jsonl.gz",
                                           "feed.00002.jsonl.gz"]
    counts = [len(list(read_replay_log(p))) for p in tap.files]
    assert counts == [10, 10, 5]
    assert recording_files(path) == tap.files


def test_tap_rotates_by_size(tmp_path):
    """rotate_bytes bounds the log lines per file; no line is split or lost."""
    path = tmp_path / "feed.jsonl"
    payload = b'{"pad": "' + b"x" * 100 + b'"}'
    with RecordingTap(path, rotate_bytes=1000) as tap:
        for i in range(30):
            tap.record(T0 + i, "fleet/a/position", payload)
    sizes = [p.stat().st_size for p in tap.files]
    assert len(tap.files) > 1 and max(sizes) <= 1000
    entries = [e for p in recording_files(path) for e in read_replay_log(p)]
    assert [e.at for e in entries] == [T0 + i for i in range(30)]


def test_tap_never_overwrites_an_earlier_recording(tmp_path):
    """A restarted tap continues with the next free segment instead of truncating."""
    path = tmp_path / "feed.jsonl"
    with RecordingTap(path) as tap:
        tap.record(T0, "fleet/a/position", b'{"run": 1}')
    with RecordingTap(path) as tap:
        tap.record(T0 + 5, "fleet/a/position", b'{"run": 2}')
    assert tap.files == [segment_path(path, 1)]
    runs = [json.loads(e.payload)["run"] for p in recording_files(path)
            for e in read_replay_log(p)]
    assert runs == [1, 2]


def test_tap_counts_write_failures_and_recovers(tmp_path):
    """A failed write is counted, not raised; the next message opens a fresh segment."""
    path = tmp_path / "feed.jsonl"
    tap = RecordingTap(path)
    tap.record(T0, "fleet/a/position", b'{"n": 1}')
    assert tap._writer is not None
    tap._writer._stream.close()
    # the disk fills up under the tap: /dev/full answers every write with ENOSPC
    tap._writer._stream = open("/dev/full", "wb", buffering=0)  # noqa: SIM115
    tap.record(T0 + 1, "fleet/a/position", b'{"n": 2}')
    tap.record(T0 + 2, "fleet/a/position", b'{"n": 3}')
    tap.close()
    assert tap.errors == 1 and tap.messages == 2
    assert [json.loads(e.payload)["n"] for e in read_replay_log(segment_path(path, 1))] == [3]


def test_tap_refuses_bad_settings(tmp_path):
    """Negative limits and a folder as the path are refused, naming the value."""
    with pytest.raises(BadRecordingError, match="must be >= 0"):
        RecordingTap(tmp_path / "x.jsonl", rotate_s=-1.0)
    with pytest.raises(BadRecordingError, match="is a folder"):
        RecordingTap(tmp_path)
    assert RecordSettings(rotate_s=-5).problems() == [
        ("rotate_s", "must be a number >= 0 (0: no time rotation), got -5")]
    assert RecordSettings().tap() is None
    tap = RecordSettings(path=str(tmp_path / "r.jsonl"), rotate_mb=2, rotate_s=60).tap()
    assert tap is not None and (tap.rotate_bytes, tap.rotate_s) == (2_000_000, 60.0)


def test_tap_replay_rejects_what_was_rejected(tmp_path):
    """Replaying a recording gives the pipeline's verdicts on the very bytes received."""
    msgs = _messages("fleet")
    msgs = [(t.removeprefix("fleet/"), p) for t, p in msgs]
    path = tmp_path / "feed.jsonl.gz"
    with RecordingTap(path) as tap:
        for i, (topic, payload) in enumerate(msgs):
            tap.record(T0 + i, topic, payload)
    live, again = Pipeline(town(), MatchSettings()), Pipeline(town(), MatchSettings())
    first = [o.record for i, (t, p) in enumerate(msgs) for o in live.handle(t, p, T0 + i)]
    second = [o.record for e in read_replay_log(path)
              for o in again.handle(e.topic, e.payload, e.at)]
    assert first == second
    assert live.counters == again.counters
    assert sum(n for k, n in again.counters.items() if k.startswith("reject:")) == 6


# ------------------------------------------------------------------- against mosquitto


async def test_record_feed_writes_every_message_in_order(mosquitto, prefix, tmp_path):
    """Every message published with QoS 1, broken ones included, lands in the log as sent."""
    msgs = _messages(prefix)
    config = _mqtt_config(mosquitto.url, f"{prefix}/fleet/+/position", None)
    path = tmp_path / "feed.jsonl.gz"
    tap = RecordingTap(path)
    subscribed = asyncio.Event()
    task = asyncio.create_task(record_feed(config, tap, count=len(msgs),
                                           subscribed=subscribed))
    await asyncio.wait_for(subscribed.wait(), timeout=WAIT_S)
    async with publisher(mosquitto.port) as pub:
        await pub.publish(f"{prefix}/other/topic", b"not recorded", qos=1)
        for topic, payload in msgs:
            await pub.publish(topic, payload, qos=1)
    recorded = await asyncio.wait_for(task, timeout=WAIT_S)
    tap.close()
    assert recorded == len(msgs)
    entries = list(read_replay_log(path))
    assert [(e.topic, e.payload) for e in entries] == msgs
    assert all(abs(e.at - time.time()) < 60 for e in entries)
    assert [e.at for e in entries] == sorted(e.at for e in entries)


async def test_record_feed_takes_several_topic_filters(mosquitto, prefix, tmp_path):
    """Route control messages recorded beside the fixes reach a replay in their order."""
    config = _mqtt_config(mosquitto.url, f"{prefix}/fleet/+/position", None)
    tap = RecordingTap(tmp_path / "feed.jsonl")
    subscribed = asyncio.Event()
    msgs = [(f"{prefix}/livematch/control/bus7/route", b'{"route": "L2"}'),
            *_messages(prefix)[:3]]
    task = asyncio.create_task(record_feed(
        config, tap, count=len(msgs), subscribed=subscribed,
        more_topics=[f"{prefix}/livematch/control/+/route"]))
    await asyncio.wait_for(subscribed.wait(), timeout=WAIT_S)
    async with publisher(mosquitto.port) as pub:
        for topic, payload in msgs:
            await pub.publish(topic, payload, qos=1)
    assert await asyncio.wait_for(task, timeout=WAIT_S) == len(msgs)
    tap.close()
    assert [(e.topic, e.payload) for e in read_replay_log(tap.files[0])] == msgs


async def test_record_feed_stops_when_asked(mosquitto, prefix, tmp_path):
    """The stop event ends the recording promptly even while no message arrives."""
    config = _mqtt_config(mosquitto.url, f"{prefix}/fleet/+/position", None)
    tap = RecordingTap(tmp_path / "feed.jsonl")
    stop, subscribed = asyncio.Event(), asyncio.Event()
    task = asyncio.create_task(record_feed(config, tap, stop=stop, subscribed=subscribed))
    await asyncio.wait_for(subscribed.wait(), timeout=WAIT_S)
    stop.set()
    assert await asyncio.wait_for(task, timeout=WAIT_S) == 0  # without a message
    assert tap.files == []


def test_record_command_stops_on_sigterm_with_a_whole_gzip(mosquitto, prefix, tmp_path):
    """`livematch record` ends on SIGTERM with exit 0 and a complete, readable .gz file."""
    path = tmp_path / "feed.jsonl.gz"
    proc = subprocess.Popen(
        [sys.executable, "-m", "livematch.cli", "record", "--broker", mosquitto.url,
         "--out", str(path), "--topic", f"{prefix}/fleet/+/position"],
        env=subprocess_env(), stderr=subprocess.PIPE, text=True)
    sent: list[bytes] = []

    async def feed() -> None:
        async with publisher(mosquitto.port) as pub:
            # until the recorder (a new process: imports, connection) has written 40
            deadline = time.monotonic() + WAIT_S
            while time.monotonic() < deadline:
                payload = b'{"n": %d}' % len(sent)
                await pub.publish(f"{prefix}/fleet/v1/position", payload, qos=1)
                sent.append(payload)
                await asyncio.sleep(0.05)
                if path.exists() and len(sent) >= 40:
                    return

    asyncio.run(feed())
    proc.send_signal(signal.SIGTERM)
    _, err = proc.communicate(timeout=WAIT_S)
    assert proc.returncode == 0, err
    got = [e.payload for e in read_replay_log(path)]  # raises on a truncated gzip
    assert got and got == sent[sent.index(got[0]):sent.index(got[0]) + len(got)]
    assert f"recorded {len(got)} messages" in err


def test_record_command_stops_after_duration(mosquitto, prefix, tmp_path):
    """--duration ends the recording on its own (exit 0) when the time is up."""
    started = time.monotonic()
    proc = subprocess.run(
        [sys.executable, "-m", "livematch.cli", "record", "--broker", mosquitto.url,
         "--out", str(tmp_path / "x.jsonl"), "--topic", f"{prefix}/#", "--duration", "1"],
        env=subprocess_env(), capture_output=True, text=True, timeout=WAIT_S, check=False)
    assert proc.returncode == 0, proc.stderr
    assert time.monotonic() - started >= 1.0
    assert "recorded 0 messages" in proc.stderr


def test_record_command_refuses_bad_flags(tmp_path, capsys):
    """A bad broker URL or topic filter is refused before connecting (exit 2)."""
    assert main(["record", "--broker", "http://x", "--out", str(tmp_path / "a.jsonl")]) == 2
    assert "--broker must be mqtt://HOST[:PORT]" in capsys.readouterr().err
    with pytest.raises(BadConfigError, match="--topic must be an MQTT topic filter"):
        _mqtt_config("mqtt://127.0.0.1:1", "fleet/#/x", None)
    assert main(["record", "--broker", "mqtt://127.0.0.1:1", "--out", str(tmp_path / "a"),
                 "--topic", "fleet/+/position", "--topic", "a/b+/c"]) == 2
    assert "got 'a/b+/c'" in capsys.readouterr().err


async def test_daemon_with_recording_pipeline_replays_to_what_it_published(
        mosquitto, prefix, tmp_path):
    """A daemon whose pipeline records (no daemon change) gives a log that replays to
    exactly the records it published: assignments, and rejects with their `at`."""
    net = tmp_path / "town.lmnet"
    save_network(town(), net)
    cfg = write_config(tmp_path, prefix, broker=mosquitto.url, network=str(net))
    config = load_config(cfg, env={})
    path = tmp_path / "rec" / "live.jsonl.gz"
    tap = RecordingTap(path)
    daemon = Daemon(config, RecordingPipeline(
        Pipeline(town(), config.matcher, limits=config.feed), tap))
    messages = [(f"{prefix}/fleet/car-1/position", p) for _, p in drive("car-1", 12)]
    messages.insert(4, (f"{prefix}/fleet/car-1/position", b"lat=1;lon=2"))
    async with Collector("127.0.0.1", mosquitto.port, f"{prefix}/out/#") as col:
        task = asyncio.create_task(daemon.run())
        await wait_until(lambda: not daemon.readiness(), "the daemon ready")
        async with publisher(mosquitto.port) as pub:
            for topic, payload in messages:
                await pub.publish(topic, payload, qos=1)
        await col.wait_for("/out/match/", 12)
        await col.wait_for("/out/rejects", 1)
        daemon.request_stop()
        await asyncio.wait_for(task, timeout=30)
    tap.close()
    assert [(e.topic, e.payload) for e in read_replay_log(path)] == messages
    assert main(["replay", str(path), "--network", str(net), "--config", str(cfg),
                 "--out", str(tmp_path / "out")]) == 0
    published = {part: [p for t, p, _ in col.messages if f"/out/{part}" in t]
                 for part in ("match/", "rejects")}
    out = tmp_path / "out"
    assert published["match/"] == (out / "assignments.jsonl").read_bytes().splitlines()
    assert published["rejects"] == (out / "rejects.jsonl").read_bytes().splitlines()
