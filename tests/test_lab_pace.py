"""Pacing a replay by receive times, and publishing a log into a real mosquitto."""

from __future__ import annotations

import asyncio
import os
import pty
import subprocess
import sys
import time

import pytest
from services import T0, Collector, drive, subprocess_env, town

from livematch.cli import main
from livematch.errors import LivematchError
from livematch.feed.replaylog import ReplayLogWriter, read_replay_log
from livematch.lab.pace import Pacer, PublishError, publish_log
from livematch.mapdata.netfile import save_network

pytest_plugins = ("fixtures_services",)


class _Clock:
    def __init__(self) -> None:
        self.now = 1000.0

    def __call__(self) -> float:
        return self.now


def test_pacer_follows_receive_times_at_speed():
    """At speed 2, a message recorded 10 s after the first is due 5 s after the start."""
    clock = _Clock()
    pacer = Pacer(2.0, clock=clock)
    assert pacer.delay(T0) == 0.0
    clock.now += 1.0
    assert pacer.delay(T0 + 10.0) == 4.0
    clock.now += 4.0
    assert pacer.delay(T0 + 10.0) == 0.0
    clock.now += 10.0  # running late: never a negative wait
    assert pacer.delay(T0 + 12.0) == 0.0


def test_pacer_without_speed_never_waits():
    """No speed (or 0) replays as fast as possible; a negative speed is refused."""
    assert Pacer(None).delay(T0) == Pacer(None).delay(T0 + 1e6) == 0.0
    assert Pacer(0.0).delay(T0 + 5) == 0.0
    with pytest.raises(LivematchError, match="--speed must be a number >= 0, got -1"):
        Pacer(-1.0)


async def _until(seen: Collector, count: int, timeout: float = 20.0) -> None:
    """Wait until the collector holds ``count`` messages (some are not JSON)."""
    deadline = time.monotonic() + timeout
    while len(seen.messages) < count:
        assert time.monotonic() < deadline, f"{len(seen.messages)} of {count} arrived"
        await asyncio.sleep(0.05)


def _log(path, prefix: str, n: int = 12, dt: float = 0.1) -> list[tuple[str, bytes]]:
    msgs = [(f"{prefix}/fleet/bus5/position", payload) for _, payload in drive("bus5", n)]
    msgs.insert(3, (f"{prefix}/fleet/bus5/position", b"not json at all"))
    with ReplayLogWriter(path) as w:
        for i, (topic, payload) in enumerate(msgs):
            w.write(T0 + dt * i, topic, payload)
    return msgs


async def test_publish_log_sends_every_message_to_its_topic(mosquitto, prefix, tmp_path):
    """Every entry reaches the broker on its original topic with its exact bytes, in order."""
    msgs = _log(tmp_path / "feed.jsonl", prefix)
    async with Collector("127.0.0.1", mosquitto.port, f"{prefix}/#") as seen:
        sent = await publish_log(read_replay_log(tmp_path / "feed.jsonl"), mosquitto.url)
        await _until(seen, len(msgs))
    assert sent == len(msgs)
    assert [(t, p) for t, p, _ in seen.messages] == msgs


async def test_publish_log_refuses_bad_urls_and_dead_brokers(tmp_path):
    """A URL that is not mqtt://HOST[:PORT], or nobody listening, is a PublishError."""
    with pytest.raises(PublishError, match="must be mqtt://HOST"):
        await publish_log([], "http://127.0.0.1:1")
    with pytest.raises(PublishError, match="after 0 messages"):
        await publish_log([], "mqtt://127.0.0.1:1")


def test_replay_publish_paced_by_speed(mosquitto, prefix, tmp_path):
    """`replay --publish --speed 4` spreads 2 s of recorded time over >= 0.5 s of wall time."""
    msgs = _log(tmp_path / "feed.jsonl", prefix, n=20, dt=0.1)  # 21 entries over 2.0 s

    async def run() -> tuple[float, list[tuple[str, bytes]]]:
        async with Collector("127.0.0.1", mosquitto.port, f"{prefix}/#") as seen:
            started = time.monotonic()
            code = await asyncio.to_thread(main, [
                "replay", str(tmp_path / "feed.jsonl"), "--publish", mosquitto.url,
                "--speed", "4"])
            elapsed = time.monotonic() - started
            assert code == 0
            await _until(seen, len(msgs))
            return elapsed, [(t, p) for t, p, _ in seen.messages]

    elapsed, got = asyncio.run(run())
    assert got == msgs
    assert elapsed >= 2.0 / 4


def test_replay_at_speed_gives_the_same_files(tmp_path):
    """Pacing changes when messages are handled, never what comes out."""
    net = tmp_path / "town.lmnet"
    save_network(town(), net)
    log = tmp_path / "feed.jsonl"
    _log(log, "x", n=15, dt=0.02)
    assert main(["replay", str(log), "--network", str(net), "--out", str(tmp_path / "a")]) == 0
    assert main(["replay", str(log), "--network", str(net), "--out", str(tmp_path / "b"),
                 "--speed", "10"]) == 0
    for name in ("assignments.jsonl", "commits.jsonl", "rejects.jsonl", "alerts.jsonl",
                 "summary.json"):
        assert (tmp_path / "a" / name).read_bytes() == (tmp_path / "b" / name).read_bytes()
    assert (tmp_path / "a" / "rejects.jsonl").read_text().count("not_json") == 1


def _run_with_stderr_on(tmp_path, stderr_tty: bool) -> str:
    """Run a paced lab replay in a subprocess, stderr on a pseudo-terminal or a pipe."""
    net = tmp_path / "town.lmnet"
    save_network(town(), net)
    log = tmp_path / "feed.jsonl"
    _log(log, "x", n=30, dt=0.02)
    cmd = [sys.executable, "-m", "livematch.cli", "replay", str(log), "--network", str(net),
           "--out", str(tmp_path / f"out-{stderr_tty}"), "--speed", "1"]
    if not stderr_tty:
        proc = subprocess.run(cmd, env=subprocess_env(), capture_output=True, timeout=60,
                              check=True)
        return proc.stderr.decode()
    master, slave = pty.openpty()
    proc = subprocess.Popen(cmd, env={**subprocess_env(), "COLUMNS": "100"},
                            stdout=subprocess.DEVNULL, stderr=slave)
    os.close(slave)
    chunks = []
    while True:
        try:
            data = os.read(master, 4096)
        except OSError:  # EIO: the child closed the terminal
            break
        if not data:
            break
        chunks.append(data)
    os.close(master)
    assert proc.wait(timeout=60) == 0
    return b"".join(chunks).decode(errors="replace")


def test_progress_bar_only_on_a_terminal(tmp_path):
    """A progress bar goes to stderr when it is a terminal, and never into a pipe."""
    on_tty = _run_with_stderr_on(tmp_path, True)
    assert "replaying" in on_tty and "31/31" in on_tty
    piped = _run_with_stderr_on(tmp_path, False)
    assert "replaying" not in piped and "replayed 31 messages" in piped
