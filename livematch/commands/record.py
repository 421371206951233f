"""``livematch record``: save a broker's feed as a replay log, without matching anything.

``livematch record --broker mqtt://HOST[:PORT] --out PATH [--topic FILTER ...]
[--duration S] [--count N] [--rotate-mb M] [--rotate-s S]`` subscribes to each FILTER
(default ``fleet/+/position``; add ``livematch/control/+/route`` to keep route
assignments too) with QoS 1 and writes every message it receives, whatever
it contains, to PATH in the replay-log format (gzip when PATH ends in ``.gz``; see
:mod:`livematch.lab.record` for rotation and segment names). Each message is
acknowledged only after it was written. It stops on SIGINT or SIGTERM, after
``--duration`` seconds, or after ``--count`` messages, closes the file and prints what
it wrote. A lost broker connection is retried with backoff.

Credentials come from ``LIVEMATCH_MQTT_USERNAME`` / ``LIVEMATCH_MQTT_PASSWORD``, as for
``livematch run``; never from the URL.
"""

from __future__ import annotations

import argparse
import asyncio
import contextlib
import os
import signal
import sys
import time
import uuid
from collections.abc import Sequence
from typing import Any

import aiomqtt

from livematch.config import PASSWORD_ENV, USERNAME_ENV, MqttConfig, redact_url
from livematch.errors import BadConfigError
from livematch.lab.record import RecordingTap
from livematch.service.mqtt import ack, backoff_delays, make_client

__all__ = ["record_feed", "register"]


def register(subparsers: Any) -> None:
    """Add the ``record`` command to the CLI."""
    parser = subparsers.add_parser(
        "record", help="save a broker's feed as a replay log (no matching)",
        description="Subscribe to a topic filter and write every message received, "
                    "including ones the matcher would reject, as a replay log "
                    "(JSON Lines; gzip when the name ends in .gz).")
    parser.add_argument("--broker", required=True, metavar="URL", help="mqtt://HOST[:PORT]")
    parser.add_argument("--out", required=True, metavar="PATH",
                        help="replay log to write (.jsonl or .jsonl.gz); never overwritten")
    parser.add_argument("--topic", action="append", metavar="FILTER",
                        help="topic filter to record (default: fleet/+/position); repeat "
                             "it for more, e.g. also livematch/control/+/route")
    parser.add_argument("--duration", type=float, metavar="S",
                        help="stop after S seconds of wall time")
    parser.add_argument("--count", type=int, metavar="N", help="stop after N messages")
    parser.add_argument("--rotate-mb", type=float, default=0.0, metavar="M",
                        help="start a new file after M megabytes of log lines (0: never)")
    parser.add_argument("--rotate-s", type=float, default=0.0, metavar="S",
                        help="start a new file every S seconds of receive time (0: never)")
    parser.add_argument("--client-id", metavar="ID",
                        help="MQTT client id; with it the session persists (1 h) so a "
                             "restart gets what arrived meanwhile (default: a random id, "
                             "no persistent session)")
    parser.set_defaults(func=_run)


def _check_filter(topic: str) -> str | None:
    """What is wrong with an MQTT topic filter (MQTT 5.0 section 4.7.1), or None."""
    levels = topic.split("/")
    if not topic or any(("+" in lv or "#" in lv) and len(lv) > 1 for lv in levels) or (
            "#" in levels[:-1]):
        return f"--topic must be an MQTT topic filter, got {topic!r}"
    return None


def _mqtt_config(broker: str, topic: str, client_id: str | None) -> MqttConfig:
    config = MqttConfig(url=broker, topic=topic,
                        client_id=client_id or f"livematch-record-{uuid.uuid4().hex[:8]}",
                        session_expiry_s=3600 if client_id else 0,
                        reconnect_min_s=0.2, reconnect_max_s=5.0)
    problems = [f"--broker {what}" for key, what in config.problems() if key == "url"]
    bad = _check_filter(topic)
    if bad:
        problems.append(bad)
    if problems:
        raise BadConfigError("; ".join(problems))
    return config


async def record_feed(config: MqttConfig, tap: RecordingTap, *, duration_s: float | None = None,
                      count: int | None = None, stop: asyncio.Event | None = None,
                      username: str | None = None, password: str | None = None,
                      subscribed: asyncio.Event | None = None,
                      more_topics: Sequence[str] = ()) -> int:
    """Record ``config.topic`` from ``config.url`` into ``tap`` until told to stop.

    Args:
        config: broker URL, topic filter, client id, QoS and session settings.
        more_topics: further topic filters recorded into the same log.
        tap: where the messages go (closed by the caller).
        duration_s: stop after this many seconds of wall time.
        count: stop after this many messages.
        stop: set it to stop (e.g. from a signal handler).
        username, password: broker credentials.
        subscribed: set once the (first) subscription is in place.

    Returns:
        The number of messages recorded.
    """
    stop = stop or asyncio.Event()
    deadline = None if duration_s is None else time.monotonic() + duration_s
    backoff = backoff_delays(config.reconnect_min_s, config.reconnect_max_s)
    recorded = 0

    def done() -> bool:
        return stop.is_set() or (count is not None and recorded >= count) or (
            deadline is not None and time.monotonic() >= deadline)

    async def sleep_unless_stopped(seconds: float) -> None:
        if deadline is not None:
            seconds = min(seconds, max(0.0, deadline - time.monotonic()))
        with contextlib.suppress(TimeoutError):
            await asyncio.wait_for(stop.wait(), timeout=seconds)

    while not done():
        try:
            async with make_client(config, username=username, password=password) as client:
                for topic in (config.topic, *more_topics):
                    await client.subscribe(topic, qos=config.qos)
                backoff.reset()
                if subscribed is not None:
                    subscribed.set()
                messages = client.messages.__aiter__()
                getter: asyncio.Future[aiomqtt.Message] | None = None
                stopper: asyncio.Future[Any] = asyncio.ensure_future(stop.wait())
                try:
                    while not done():
                        if getter is None:  # one pending receive, kept across timeouts
                            getter = asyncio.ensure_future(messages.__anext__())
                        wait = 1.0 if deadline is None else max(
                            0.0, deadline - time.monotonic())
                        waiting: set[asyncio.Future[Any]] = {getter, stopper}
                        await asyncio.wait(waiting, timeout=wait,
                                           return_when=asyncio.FIRST_COMPLETED)
                        if not getter.done():
                            continue
                        message, getter = getter.result(), None
                        payload = message.payload
                        if not isinstance(payload, bytes | bytearray):
                            payload = str(payload).encode()
                        tap.record(time.time(), message.topic.value, bytes(payload))
                        ack(client, message)
                        recorded += 1
                finally:
                    stopper.cancel()
                    if getter is not None and not getter.done():
                        # not taken, not acknowledged: the broker sends it again
                        getter.cancel()
                    if getter is not None:
                        getter.add_done_callback(_consume_outcome)
        except aiomqtt.MqttError as exc:
            print(f"livematch: broker {redact_url(config.url)}: {exc}; retrying",
                  file=sys.stderr)
            await sleep_unless_stopped(backoff.next())
    return recorded


def _consume_outcome(future: asyncio.Future[Any]) -> None:
    """Mark a future's exception as retrieved (expected, of no interest)."""
    if not future.cancelled():
        future.exception()


async def _main(args: argparse.Namespace, config: MqttConfig, tap: RecordingTap) -> int:
    stop = asyncio.Event()
    loop = asyncio.get_running_loop()
    for sig in (signal.SIGTERM, signal.SIGINT):
        loop.add_signal_handler(sig, stop.set)
    return await record_feed(config, tap, duration_s=args.duration, count=args.count,
                             stop=stop, username=os.environ.get(USERNAME_ENV),
                             password=os.environ.get(PASSWORD_ENV),
                             more_topics=args.topic[1:])


def _run(args: argparse.Namespace) -> int:
    args.topic = args.topic or ["fleet/+/position"]
    config = _mqtt_config(args.broker, args.topic[0], args.client_id)
    bad = [problem for problem in map(_check_filter, args.topic[1:]) if problem]
    if bad:
        raise BadConfigError("; ".join(bad))
    for flag, value in (("--duration", args.duration), ("--count", args.count),
                        ("--rotate-mb", args.rotate_mb), ("--rotate-s", args.rotate_s)):
        if value is not None and value < 0:
            raise BadConfigError(f"{flag} must be >= 0, got {value}")
    tap = RecordingTap(args.out, rotate_bytes=int(args.rotate_mb * 1_000_000),
                       rotate_s=args.rotate_s)
    print(f"livematch: recording {', '.join(args.topic)} from {redact_url(config.url)} "
          f"into {args.out}", file=sys.stderr)
    try:
        recorded = asyncio.run(_main(args, config, tap))
    finally:
        tap.close()
    files = ", ".join(str(p) for p in tap.files) or "nothing"
    print(f"livematch: recorded {recorded} messages ({tap.errors} write failures) "
          f"into {files}", file=sys.stderr)
    return 0 if not tap.errors else 1
