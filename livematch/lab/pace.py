"""Pacing a replay by the log's receive times, and publishing a log into a broker.

A replay runs as fast as it can by default. ``--speed X`` paces it by the recorded
receive times (``at``): a message recorded ``d`` seconds after the first one is handled
``d / X`` seconds of wall time after the replay started (``X = 1``: as it happened;
``X = 10``: ten times faster). Pacing changes when things happen, never what: the
outputs are the same bytes at every speed, because the pipeline's only clock is the
fixes' own time.

``--publish mqtt://HOST[:PORT]`` sends every message of the log, unchanged, to its
original topic with QoS 1 (paced the same way), to drive a running daemon in staging.
"""

from __future__ import annotations

import asyncio
import math
import time
import uuid
from collections.abc import Callable, Iterable
from urllib.parse import urlsplit

import aiomqtt

from livematch.errors import LivematchError
from livematch.feed.replaylog import LogEntry

__all__ = ["Pacer", "PublishError", "publish_log"]


class PublishError(LivematchError):
    """A log cannot be published: bad broker URL, or the broker refused or went away."""


class Pacer:
    """Tells how long to wait before handling a message recorded at ``at``.

    Args:
        speed: replay speed (1: as recorded; 0 or None: no waiting at all).
        clock: a monotonic clock in seconds (injectable for tests).

    The first message sets the origin; a message recorded before an earlier one (a log
    not sorted by ``at``) is handled at once.

    Example (10x speed, a fake clock standing still at 100 s):
        >>> p = Pacer(10.0, clock=lambda: 100.0)
        >>> p.delay(5000.0), p.delay(5020.0), p.delay(4000.0)
        (0.0, 2.0, 0.0)
        >>> Pacer(None).delay(1e9)           # degenerate: no pacing
        0.0
    """

    def __init__(self, speed: float | None, *,
                 clock: Callable[[], float] = time.monotonic) -> None:
        if speed is not None and (not math.isfinite(speed) or speed < 0):
            raise LivematchError(f"--speed must be a number >= 0, got {speed!r}")
        self.speed = speed or 0.0
        self._clock = clock
        self._origin: tuple[float, float] | None = None  # (first at, wall time then)

    def delay(self, at: float) -> float:
        """Seconds to wait now so that the message recorded at ``at`` is on time."""
        if not self.speed:
            return 0.0
        now = self._clock()
        if self._origin is None:
            self._origin = (at, now)
            return 0.0
        first_at, started = self._origin
        return max(0.0, started + (at - first_at) / self.speed - now)

    def wait(self, at: float) -> None:
        """Sleep until the message recorded at ``at`` is due (no-op without pacing)."""
        seconds = self.delay(at)
        if seconds > 0:
            time.sleep(seconds)


def _broker(url: str) -> tuple[str, int]:
    parts = urlsplit(url)
    if parts.scheme != "mqtt" or not parts.hostname:
        raise PublishError(f"--publish must be mqtt://HOST[:PORT], got {url!r}")
    if parts.username is not None or parts.password is not None:
        raise PublishError("--publish URL must not carry credentials (use "
                           "LIVEMATCH_MQTT_USERNAME / LIVEMATCH_MQTT_PASSWORD)")
    try:
        return parts.hostname, parts.port or 1883
    except ValueError as exc:
        raise PublishError(f"--publish {url!r}: bad port") from exc


async def publish_log(entries: Iterable[LogEntry], url: str, *, speed: float | None = None,
                      qos: int = 1, username: str | None = None,
                      password: str | None = None,
                      progress: Callable[[int], None] | None = None) -> int:
    """Publish every entry to its original topic, in log order; return how many.

    Each publish waits for the broker's acknowledgement (QoS 1), so when this returns
    the broker holds every message.

    Args:
        entries: the log (e.g. :func:`~livematch.feed.replaylog.read_replay_log`).
        url: ``mqtt://HOST[:PORT]``.
        speed: pacing (see :class:`Pacer`); None or 0 sends as fast as the broker takes.
        qos: MQTT QoS of the publishes.
        username, password: broker credentials, if it needs them.
        progress: called with 1 after each message (a progress bar's ``advance``).

    Raises:
        PublishError: bad URL, or the broker cannot be reached or drops the connection
            (chained from the MQTT error).
    """
    host, port = _broker(url)
    pacer = Pacer(speed)
    sent = 0
    try:
        async with aiomqtt.Client(host, port, username=username, password=password,
                                  identifier=f"livematch-replay-{uuid.uuid4().hex[:8]}",
                                  protocol=aiomqtt.ProtocolVersion.V5) as client:
            for entry in entries:
                seconds = pacer.delay(entry.at)
                if seconds > 0:
                    await asyncio.sleep(seconds)
                await client.publish(entry.topic, entry.payload, qos=qos)
                sent += 1
                if progress is not None:
                    progress(1)
    except aiomqtt.MqttError as exc:
        raise PublishError(f"publishing to {host}:{port} failed after {sent} messages: "
                           f"{exc}") from exc
    return sent
