"""The live demo's moving parts: an embedded MQTT broker, the fleet publisher, the board.

``livematch demo`` (:mod:`livematch.commands.demo`) runs the whole live path in one
process, with no external service:

* :class:`EmbeddedBroker`: an MQTT v5 broker (moat-lib-mqtt's pure-Python broker) on a
  free loopback port, in this process's event loop. Any MQTT v5 client can watch it,
  e.g. ``mosquitto_sub -V mqttv5 -h 127.0.0.1 -p PORT -t 'livematch/#' -v`` (the broker
  speaks MQTT v5 only, hence ``-V mqttv5``);
* :func:`publish_feed`: the Larkmoor scenario (:mod:`livematch.demo.scenario`) published
  as real MQTT messages (QoS 1), paced by each message's receive time ``at`` against
  the wall clock, ``speedup`` times faster than real time, and written to a replay log;
* the daemon itself (:class:`livematch.service.daemon.Daemon`, in-memory store), built
  by :func:`build_demo_daemon` with the scenario's routes and fences;
* :class:`Board`: what the daemon published, read back from the broker on
  ``livematch/#``: per vehicle the current road, eps level, certified window, route
  progress and last alert, as a rich table (:meth:`Board.table`) or one progress line
  (:meth:`Board.progress_line`).

:class:`LiveDemo` ties them together. All of this is shell code (clock, sockets,
files); the scenario and the matcher stay pure.

Times: ``at`` and fix times are the scenario's epoch seconds (the sample starts on
2026-06-02 07:00 UTC); wall time is only used for pacing and the board.
"""

from __future__ import annotations

import asyncio
import contextlib
import gzip
import json
import logging
import math
import signal
import time
from collections import Counter, deque
from collections.abc import AsyncIterator, Awaitable, Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import aiomqtt
import anyio
from moat.lib.mqtt.async_broker import AsyncMQTTBroker
from rich.table import Table

from livematch.config import DaemonConfig, MqttConfig
from livematch.demo.scenario import Message, Scenario
from livematch.errors import LivematchError
from livematch.feed.replaylog import ReplayLogWriter
from livematch.pipeline import prepare_kernels
from livematch.service.logs import fields

__all__ = [
    "DEMO_ORDER",
    "Board",
    "DemoFiles",
    "DemoResult",
    "EmbeddedBroker",
    "LiveDemo",
    "VehicleRow",
    "build_demo_daemon",
    "encode_payload",
    "publish_feed",
    "select_vehicles",
    "truth_until",
    "write_demo_files",
    "write_truth",
]

log = logging.getLogger("livematch.demo")

#: The order in which ``--vehicles N`` keeps vehicles of :data:`~livematch.demo.scenario.
#: LIVE_FLEET`: the vehicles with scripted incidents first (bus-21 detour, van-3 zone
#: exit, bus-31 silence), then one bus per remaining line, then the rest.
DEMO_ORDER = ("bus-21", "van-3", "bus-31", "bus-11", "bus-41", "van-1", "bus-22",
              "bus-12", "bus-32", "bus-42", "van-2", "van-4")
#: Topic filter the board listens on (every output topic of the default config).
WATCH_FILTER = "livematch/#"
#: How many alerts the board keeps for its "recent alerts" list.
RECENT_ALERTS = 6
#: Most messages the fleet publishes at once (then waits for their acknowledgements). A
#: publisher that fell behind its pace finds many messages due; published all at once,
#: the last acknowledgement waits behind all of them, which on a busy machine outlasted
#: the client's time limit. Messages due together are one per vehicle: far fewer.
PUBLISH_BATCH = 100
#: Longest wait for the daemon to get ready (s): a first start on a busy machine can
#: take many seconds; the kernels are compiled before this wait begins.
READY_S = 120.0
#: A wait for the daemon or the board to catch up gives up after this many seconds in
#: which nothing moved (s); while messages are taken or outputs arrive it goes on.
STALL_S = 60.0


class DemoError(LivematchError):
    """The demo could not start or a part of it failed (broker, daemon, files)."""


def select_vehicles(scenario: Scenario, count: int | None) -> list[str]:
    """The ids of the first ``count`` vehicles of the scenario in :data:`DEMO_ORDER`.

    Vehicles not in :data:`DEMO_ORDER` come after it, in the scenario's order. ``None``
    keeps them all.

    Raises:
        DemoError: when ``count`` is not between 1 and the number of vehicles.

    Example:
        >>> from types import SimpleNamespace as NS
        >>> s = NS(vehicles=[NS(id="van-3"), NS(id="bus-11"), NS(id="bus-21")])
        >>> select_vehicles(s, 2), select_vehicles(s, None)
        (['bus-21', 'van-3'], ['bus-21', 'van-3', 'bus-11'])
    """
    ids = [v.id for v in scenario.vehicles]
    ordered = [v for v in DEMO_ORDER if v in ids] + [v for v in ids if v not in DEMO_ORDER]
    if count is None:
        return ordered
    if not 1 <= count <= len(ordered):
        raise DemoError(f"--vehicles must be between 1 and {len(ordered)}, got {count}")
    return ordered[:count]


def encode_payload(payload: Mapping[str, Any]) -> bytes:
    """The published bytes of a position payload: compact UTF-8 JSON.

    Example:
        >>> encode_payload({"vehicle": "bus-21", "time": 1.0, "lat": 50.0, "lon": 10.0})
        b'{"vehicle":"bus-21","time":1.0,"lat":50.0,"lon":10.0}'
    """
    return json.dumps(payload, separators=(",", ":"), ensure_ascii=False,
                      allow_nan=False).encode("utf-8")


# --- files -------------------------------------------------------------------------------

@dataclass(frozen=True)
class DemoFiles:
    """Where the demo writes (all inside ``out``).

    Attributes:
        out: the output folder.
        log: the replay log of every message published (``feed.jsonl.gz``).
        network: the town's roads (GeoJSON, the ``--network`` of a replay).
        routes: bus routes (GeoJSON lines, ``--routes``).
        fences: geofences (GeoJSON polygons, ``--fences``).
        truth: the truth of the selected vehicles (``--truth``, JSON Lines gzip).
        live: the daemon's outputs as read back from the broker (``live/*.jsonl``).
        replay: where the replay lab writes its outputs and ``report.html``.
    """

    out: Path

    @property
    def log(self) -> Path:
        """The replay log of every message published."""
        return self.out / "feed.jsonl.gz"

    @property
    def network(self) -> Path:
        """The town's roads (GeoJSON)."""
        return self.out / "larkmoor.geojson"

    @property
    def routes(self) -> Path:
        """The bus routes (GeoJSON lines)."""
        return self.out / "larkmoor-routes.geojson"

    @property
    def fences(self) -> Path:
        """The geofences (GeoJSON polygons)."""
        return self.out / "larkmoor-fences.geojson"

    @property
    def truth(self) -> Path:
        """The truth of the selected vehicles (JSON Lines, gzip)."""
        return self.out / "truth.jsonl.gz"

    @property
    def live(self) -> Path:
        """The folder of the outputs read back from the broker."""
        return self.out / "live"

    @property
    def replay(self) -> Path:
        """The folder of the replay lab's outputs and report."""
        return self.out / "replay"


def write_demo_files(files: DemoFiles, scenario: Scenario) -> None:
    """Write the network, routes and fences into ``files.out`` (created if missing).

    Raises:
        DemoError: when a file cannot be written (naming it).
    """
    from livematch.demo.town import roads_geojson

    try:
        files.out.mkdir(parents=True, exist_ok=True)
        for path, doc in ((files.network, roads_geojson(scenario.town)),
                          (files.routes, scenario.routes_geojson()),
                          (files.fences, scenario.fences_geojson())):
            path.write_text(json.dumps(doc, separators=(",", ":"), ensure_ascii=False) + "\n",
                            encoding="utf-8")
    except OSError as exc:
        raise DemoError(f"cannot write the demo files into {str(files.out)!r}: {exc}") from exc


def truth_until(scenario: Scenario, vehicles: Sequence[str], until_t: float
                ) -> list[dict[str, Any]]:
    """The truth records of ``vehicles`` up to fix time ``until_t`` (epoch s).

    The header lists only those vehicles and its ``duration_s`` ends at ``until_t``;
    ``fix`` records after it and incidents starting after it are left out, so that a
    run stopped early is scored only on what was published.

    Example (fixes at 0, 1, 2, 3 s; degenerate: no vehicle kept):
        >>> from livematch.demo.scenario import build_scenario
        >>> s = build_scenario(duration_s=3.0, buses={"L2": 1}, vans=0)
        >>> [r["kind"] for r in truth_until(s, ["bus-21"], s.start_time + 1.0)]
        ['header', 'path', 'fix', 'fix']
        >>> [r["kind"] for r in truth_until(s, [], s.start_time)]
        ['header']
    """
    keep = set(vehicles)
    out: list[dict[str, Any]] = []
    for rec in scenario.truth_records():
        if rec["kind"] == "header":
            rec = {**rec, "vehicles": [v for v in rec["vehicles"] if v["vehicle"] in keep],
                   "duration_s": round(max(0.0, until_t - scenario.start_time), 3)}
        else:
            late = ((rec["kind"] == "fix" and rec["time"] > until_t)
                    or (rec["kind"] == "incident" and rec["start"] > until_t))
            if rec.get("vehicle") not in keep or late:
                continue
        out.append(rec)
    return out


def write_truth(path: Path, records: Iterable[Mapping[str, Any]]) -> None:
    """Write truth records as gzip JSON Lines.

    Raises:
        DemoError: when the file cannot be written.
    """
    try:
        with gzip.open(path, "wb") as gz:
            for rec in records:
                gz.write(encode_payload(rec) + b"\n")
    except OSError as exc:
        raise DemoError(f"cannot write the truth file {str(path)!r}: {exc}") from exc


# --- broker ------------------------------------------------------------------------------

class EmbeddedBroker:
    """An MQTT v5 broker on a loopback port, served by this process's event loop.

    It is moat-lib-mqtt's small pure-Python broker: QoS 0/1/2, retained messages,
    wildcards; no persistence, MQTT v5 clients only. Enough for one daemon, one
    publisher and a few watchers on one machine; not for production.

    Args:
        host: the address to listen on (loopback by default).
        port: the port; 0 picks a free one (read :attr:`port` after :meth:`start`).

    Example (inside a running event loop)::

        broker = EmbeddedBroker()
        port = await broker.start()     # e.g. 40321
        ...
        await broker.stop()
    """

    def __init__(self, host: str = "127.0.0.1", port: int = 0) -> None:
        self.host = host
        self.port = port
        self._task: asyncio.Task[None] | None = None

    @property
    def url(self) -> str:
        """``mqtt://HOST:PORT`` of the running broker."""
        return f"mqtt://{self.host}:{self.port}"

    async def start(self) -> int:
        """Listen and serve in a background task; returns the port.

        Raises:
            DemoError: when the port cannot be bound.
        """
        loop = asyncio.get_running_loop()
        ready: asyncio.Future[int] = loop.create_future()
        self._task = asyncio.create_task(self._serve(ready), name="mqtt-broker")
        waiting: set[asyncio.Future[Any]] = {ready, self._task}
        await asyncio.wait(waiting, return_when=asyncio.FIRST_COMPLETED)
        if not ready.done():  # the broker task ended without listening
            ready.set_exception(DemoError("the broker task ended before listening"))
        try:
            self.port = ready.result()
        except OSError as exc:
            raise DemoError(f"cannot listen on {self.host}:{self.port}: {exc}") from exc
        return self.port

    async def _serve(self, ready: asyncio.Future[int]) -> None:
        broker = AsyncMQTTBroker(bind_address=(self.host, self.port))
        try:
            async with anyio.create_task_group() as tg:
                port = await tg.start(broker.serve)
                ready.set_result(int(port))
        except Exception as exc:  # anyio may wrap the bind error in an ExceptionGroup
            if ready.done():
                raise
            found = _first_os_error(exc)
            ready.set_exception(found if found is not None else exc)

    async def stop(self) -> None:
        """Close the listener and every client connection."""
        if self._task is not None:
            self._task.cancel()
            with contextlib.suppress(asyncio.CancelledError):
                await self._task
            self._task = None


# --- publisher ---------------------------------------------------------------------------

async def publish_feed(
    client: aiomqtt.Client,
    messages: Sequence[Message],
    *,
    speedup: float,
    until_at: float,
    clock: Callable[[], float] = time.monotonic,
    sleep: Callable[[float], Awaitable[Any]] = asyncio.sleep,
    on_publish: Callable[[Message, bytes], None] | None = None,
    stop: asyncio.Event | None = None,
) -> int:
    """Publish ``messages`` (QoS 1) paced by their ``at``; returns how many went out.

    The first message goes out at once; message ``m`` is due ``(m.at - first.at) /
    speedup`` wall seconds later. Messages due together are published concurrently and
    each is acknowledged by the broker before the next batch (at most
    :data:`PUBLISH_BATCH` at once: one that fell behind catches up in several batches,
    back to back). Messages with ``at`` after
    ``until_at`` are not sent. ``on_publish(message, payload)`` runs for every message
    the broker acknowledged (the demo writes the replay log there).

    Args:
        client: a connected client.
        messages: in receive order (``Scenario.messages()``).
        speedup: scenario seconds per wall second (> 0).
        until_at: the last receive time to publish (epoch s, scenario time).
        clock: the wall clock (monotonic seconds).
        sleep: how to wait.
        on_publish: called once per acknowledged message.
        stop: when set, publishing ends before the next batch (a batch in flight
            completes, so every message sent is also passed to ``on_publish``).
    """
    if not messages:
        return 0
    if not (math.isfinite(speedup) and speedup > 0):
        raise DemoError(f"speedup must be a positive number, got {speedup}")
    first_at = messages[0].at
    start = clock()
    sent = 0
    i = 0
    while i < len(messages) and messages[i].at <= until_at:
        due = start + (messages[i].at - first_at) / speedup
        wait = due - clock()
        if wait > 0:
            if stop is None:
                await sleep(wait)
            else:
                with contextlib.suppress(TimeoutError):
                    await asyncio.wait_for(stop.wait(), timeout=wait)
        if stop is not None and stop.is_set():
            break
        now_at = first_at + (clock() - start) * speedup
        batch = [messages[i]]
        i += 1
        while (i < len(messages) and messages[i].at <= until_at
               and messages[i].at <= now_at and len(batch) < PUBLISH_BATCH):
            batch.append(messages[i])
            i += 1
        payloads = [encode_payload(m.payload) for m in batch]  # at most PUBLISH_BATCH
        await asyncio.gather(*(client.publish(m.topic, p, qos=1)
                               for m, p in zip(batch, payloads, strict=True)))
        sent += len(batch)
        if on_publish is not None:
            for m, p in zip(batch, payloads, strict=True):
                on_publish(m, p)
    return sent


# --- board -------------------------------------------------------------------------------

@dataclass
class VehicleRow:
    """What the board shows for one vehicle (``None``: not known yet)."""

    vehicle: str
    road: str | None = None
    way: int | None = None
    eps_m: float | None = None
    window_fixes: int | None = None
    window_s: float | None = None
    time: float | None = None
    progress_m: float | None = None
    route: str | None = None
    last_alert: str | None = None


@dataclass
class Board:
    """The daemon's published outputs, as a subscriber sees them.

    :meth:`observe` takes each message from the broker; the topics are those of
    ``mqtt`` (:class:`~livematch.config.MqttConfig`). Counts are by kind
    (``assignment``, ``commit``, ``alert``, ``reject``).

    Example (degenerate: nothing seen yet, then one assignment):
        >>> b = Board(MqttConfig(), ["bus-21"])
        >>> b.progress_line(0.0, None)
        'wall 0.0 s | published 0 | assignment 0, commit 0, alert 0, reject 0'
        >>> b.observe("livematch/match/bus-21", b'{"vehicle":"bus-21","road":"Tanner Row",'
        ...           b'"way":7,"eps_m":15.0,"window_fixes":4,"window_s":3.0,"time":5.0}')
        'assignment'
        >>> b.rows["bus-21"].road, b.counts["assignment"]
        ('Tanner Row', 1)
    """

    mqtt: MqttConfig
    vehicles: Sequence[str]
    published: int = 0
    counts: Counter[str] = field(default_factory=Counter)
    rows: dict[str, VehicleRow] = field(default_factory=dict)
    alerts: deque[dict[str, Any]] = field(default_factory=lambda: deque(maxlen=RECENT_ALERTS))
    all_alerts: list[dict[str, Any]] = field(default_factory=list)

    def __post_init__(self) -> None:
        self.rows = {v: VehicleRow(v) for v in self.vehicles}
        self._prefixes = [(self.mqtt.match_topic.split("{vehicle}")[0], "assignment"),
                          (self.mqtt.commit_topic.split("{vehicle}")[0], "commit"),
                          (self.mqtt.alert_topic.split("{vehicle}")[0], "alert")]

    def kind_of(self, topic: str) -> str | None:
        """The output kind a topic carries, None for a topic of no output."""
        if topic == self.mqtt.reject_topic:
            return "reject"
        for prefix, kind in self._prefixes:
            if topic.startswith(prefix):
                return kind
        return None

    def observe(self, topic: str, payload: bytes) -> str | None:
        """Take one published output; returns its kind (None: not an output)."""
        kind = self.kind_of(topic)
        if kind is None:
            return None
        try:
            record = json.loads(payload)
        except ValueError:
            record = None
        if not isinstance(record, dict):
            self.counts["unreadable"] += 1
            return None
        self.counts[kind] += 1
        vehicle = record.get("vehicle")
        row = self.rows.get(vehicle) if isinstance(vehicle, str) else None
        if row is None and isinstance(vehicle, str) and kind != "reject":
            row = self.rows[vehicle] = VehicleRow(vehicle)
        if kind == "assignment" and row is not None:
            row.road = record.get("road")
            row.way = record.get("way")
            row.eps_m = record.get("eps_m")
            row.window_fixes = record.get("window_fixes")
            row.window_s = record.get("window_s")
            row.time = record.get("time")
        elif kind == "alert":
            self.alerts.append(record)
            self.all_alerts.append(record)
            if row is not None:
                row.last_alert = f"{record.get('kind')} {_clock(record.get('time'))}"
        return kind

    def set_route(self, vehicle: str, route: str | None, progress_m: float | None) -> None:
        """Route id and progress along it (m) as the daemon's route monitor has them."""
        row = self.rows.get(vehicle)
        if row is not None:
            row.route, row.progress_m = route, progress_m

    def progress_line(self, wall_s: float, scenario_t: float | None) -> str:
        """One line for logs and non-terminal output."""
        parts = [f"wall {wall_s:.1f} s"]
        if scenario_t is not None:
            parts.append(f"scenario {_clock(scenario_t)}")
        parts.append(f"published {self.published}")
        parts.append(", ".join(f"{k} {self.counts[k]}"
                               for k in ("assignment", "commit", "alert", "reject")))
        if self.alerts:
            last = self.alerts[-1]
            parts.append(f"last alert {last.get('vehicle')} {last.get('kind')}")
        return " | ".join(parts)

    def table(self, wall_s: float, scenario_t: float | None) -> Table:
        """The live board: one row per vehicle, recent alerts in the caption."""
        title = f"livematch demo · {self.progress_line(wall_s, scenario_t)}"
        table = Table(title=title, title_justify="left", expand=False)
        for name, justify in (("vehicle", "left"), ("road", "left"), ("eps m", "right"),
                              ("window", "right"), ("route", "left"),
                              ("progress m", "right"), ("last alert", "left")):
            table.add_column(name, justify=justify)  # type: ignore[arg-type]
        for v in sorted(self.rows):
            r = self.rows[v]
            window = (f"{r.window_fixes} fixes / {r.window_s:.0f} s"
                      if r.window_fixes is not None and r.window_s is not None else "–")
            eps = f"{r.eps_m:g}" if r.eps_m is not None else "–"
            style = "bold red" if r.last_alert and r.last_alert.startswith("off_") else None
            table.add_row(v, r.road or ("–" if r.way is None else f"way {r.way}"), eps,
                          window, r.route or "–",
                          f"{r.progress_m:.0f}" if r.progress_m is not None else "–",
                          r.last_alert or "", style=style)
        if self.alerts:
            table.caption = "recent alerts: " + "; ".join(
                f"{_clock(a.get('time'))} {a.get('vehicle')} {a.get('kind')}"
                for a in reversed(self.alerts))
            table.caption_justify = "left"
        return table


def _clock(t: Any) -> str:
    """``HH:MM:SS`` (UTC) of an epoch time, ``?`` when it is not a number.

    >>> _clock(1_780_383_600.0 + 224), _clock(None)
    ('07:03:44', '?')
    """
    if not isinstance(t, int | float) or isinstance(t, bool) or not math.isfinite(t):
        return "?"
    return datetime.fromtimestamp(float(t), UTC).strftime("%H:%M:%S")


# --- the daemon ----------------------------------------------------------------------------

def build_demo_daemon(config: DaemonConfig, files: DemoFiles) -> Any:
    """The daemon exactly as ``livematch run`` builds it, over the demo's own inputs.

    ``inputs.network``, ``inputs.routes`` and ``inputs.fences`` point at the files the
    demo wrote, which ``livematch replay`` reads the same way, so a replay of the log
    matches against the same data. The rest (matcher, alerts, publish...) is ``config``.
    """
    from dataclasses import replace

    from livematch.commands.run import build_daemon

    inputs = replace(config.inputs, network=str(files.network), routes=str(files.routes),
                     fences=str(files.fences))
    return build_daemon(replace(config, inputs=inputs))


# --- the whole demo ----------------------------------------------------------------------------

@dataclass
class DemoResult:
    """What a demo run did (counts of messages; seconds of wall time)."""

    broker_url: str
    vehicles: list[str]
    published: int
    outputs: Counter[str]
    alerts: list[dict[str, Any]]
    daemon_counters: Counter[str]
    wall_s: float
    first_at: float | None
    last_at: float | None


class LiveDemo:
    """Broker, daemon, publisher and board in one event loop.

    Args:
        scenario: the scenario to publish.
        vehicles: the vehicles whose messages are published.
        config: the daemon's configuration (its ``mqtt.url`` is replaced by the
            embedded broker's).
        files: where to write.
        duration_s: wall seconds of publishing.
        speedup: scenario seconds per wall second.
        port: the broker's port (0: a free one).
        on_broker: called with the broker URL as soon as it listens.
        on_tick: called about 4 times a second with the board (the CLI draws it).
    """

    def __init__(self, scenario: Scenario, vehicles: Sequence[str], config: DaemonConfig,
                 files: DemoFiles, *, duration_s: float, speedup: float, port: int = 0,
                 on_broker: Callable[[str], None] | None = None,
                 on_tick: Callable[[Board, float, float | None], None] | None = None) -> None:
        self.scenario = scenario
        self.vehicles = list(vehicles)
        self.config = config
        self.files = files
        self.duration_s = duration_s
        self.speedup = speedup
        self.broker = EmbeddedBroker(port=port)
        self.on_broker = on_broker
        self.on_tick = on_tick
        self.board = Board(config.mqtt, self.vehicles)
        keep = set(self.vehicles)
        self.messages = [m for m in scenario.messages() if m.payload["vehicle"] in keep]
        self._started = 0.0
        self._first_at = self.messages[0].at if self.messages else None
        self._stop = asyncio.Event()

    def request_stop(self) -> None:
        """End the feed early (Ctrl-C); the daemon drains and the files are still written."""
        self._stop.set()

    def scenario_time(self) -> float | None:
        """The scenario's clock now (epoch s), None before publishing starts."""
        if self._first_at is None or not self._started:
            return None
        elapsed = min(time.monotonic() - self._started, self.duration_s)
        return self._first_at + elapsed * self.speedup

    async def run(self) -> DemoResult:
        """Run the demo to its end; returns what happened.

        Raises:
            DemoError: when the broker cannot listen or the daemon stops on its own.
        """
        wall0 = time.monotonic()
        # Compile the matcher's kernels before the broker listens: the broker shares this
        # event loop, and a compilation on a cold cache blocks it for seconds.
        prepare_kernels()
        url = f"mqtt://127.0.0.1:{await self.broker.start()}"
        loop = asyncio.get_running_loop()
        with contextlib.suppress(NotImplementedError, RuntimeError):  # not main thread
            loop.add_signal_handler(signal.SIGINT, self.request_stop)
        try:
            # Build the daemon (read the map, routes, fences: seconds of CPU that block
            # this event loop, and the broker with it) before the broker is announced: a
            # watcher that connects on the announcement is then answered at once, where
            # on a busy machine its CONNECT waited behind the build past its client's
            # time limit ("Operation timed out").
            config = _with_broker(self.config, url)
            daemon = build_demo_daemon(config, self.files)
            if self.on_broker is not None:
                self.on_broker(url)
            return await self._run_with(daemon, url, wall0)
        finally:
            with contextlib.suppress(NotImplementedError, RuntimeError):
                loop.remove_signal_handler(signal.SIGINT)
            await self.broker.stop()

    async def _run_with(self, daemon: Any, url: str, wall0: float) -> DemoResult:
        self.files.live.mkdir(parents=True, exist_ok=True)
        live_streams = {kind: open(self.files.live / f"{kind}s.jsonl", "wb")  # noqa: SIM115
                        for kind in ("assignment", "commit", "alert", "reject")}
        daemon_task = asyncio.create_task(daemon.run(), name="daemon")
        published = 0
        try:
            await self._wait_ready(daemon, daemon_task)
            port = self.broker.port
            async with _client(port, "livematch-demo-board") as watcher, \
                    _client(port, "livematch-demo-fleet") as fleet:
                await watcher.subscribe(WATCH_FILTER, qos=1)
                watch_task = asyncio.create_task(
                    self._watch(watcher, live_streams), name="demo-watch")
                tick_task = asyncio.create_task(self._tick(daemon), name="demo-board")
                try:
                    published = await self._publish(fleet, daemon_task)
                    await self._drain(daemon, daemon_task, published)
                finally:
                    daemon.request_stop()
                    with contextlib.suppress(Exception):
                        await asyncio.wait_for(asyncio.shield(daemon_task), timeout=30)
                    if not _failed(daemon_task):
                        # what it published while stopping (its last outputs) reaches the
                        # board
                        await self._until(lambda: self._board_has(daemon), self._board_seen)
                    for task in (watch_task, tick_task):
                        task.cancel()
                    await asyncio.gather(watch_task, tick_task, return_exceptions=True)
            self._refresh_routes(daemon)
            if self.on_tick is not None:
                self.on_tick(self.board, time.monotonic() - self._started,
                             self.scenario_time())
        finally:
            if not daemon_task.done():
                daemon.request_stop()
                with contextlib.suppress(Exception):
                    await asyncio.wait_for(daemon_task, timeout=30)
            for stream in live_streams.values():
                stream.close()
        if _failed(daemon_task):
            raise DemoError(f"the daemon failed: {daemon_task.exception()}") \
                from daemon_task.exception()
        last_at = self.messages[published - 1].at if published else None
        last_t = max((float(m.payload["time"]) for m in self.messages[:published]),
                     default=self.scenario.start_time)
        write_truth(self.files.truth, truth_until(self.scenario, self.vehicles, last_t))
        return DemoResult(url, self.vehicles, published, Counter(self.board.counts),
                          list(self.board.all_alerts), Counter(daemon.pipeline.counters),
                          time.monotonic() - wall0, self._first_at, last_at)

    async def _wait_ready(self, daemon: Any, task: asyncio.Task[None]) -> None:
        """Until the daemon is connected, subscribed and restored (at most ``READY_S``).

        Ready includes the broker's SUBACK (:meth:`Daemon.readiness`), so the fleet's
        first messages cannot reach the broker before the daemon's subscription.
        """
        deadline = time.monotonic() + READY_S
        while daemon.readiness():
            if task.done():
                raise DemoError(f"the daemon stopped while starting: {_outcome(task)}")
            if time.monotonic() > deadline:
                raise DemoError(f"the daemon did not get ready in {READY_S:g} s: missing "
                                f"{', '.join(daemon.readiness())}")
            await asyncio.sleep(0.02)

    async def _publish(self, fleet: aiomqtt.Client, daemon_task: asyncio.Task[None]) -> int:
        if self._first_at is None:
            return 0
        until = self._first_at + self.duration_s * self.speedup
        try:
            writer = ReplayLogWriter(self.files.log)
        except LivematchError as exc:
            raise DemoError(str(exc)) from exc

        def record(message: Message, payload: bytes) -> None:
            writer.write(message.at, message.topic, payload)
            self.board.published += 1

        self._started = time.monotonic()
        publishing = asyncio.create_task(
            publish_feed(fleet, self.messages, speedup=self.speedup, until_at=until,
                         on_publish=record, stop=self._stop), name="demo-fleet")
        try:
            await asyncio.wait({publishing, daemon_task}, return_when=asyncio.FIRST_COMPLETED)
            if not publishing.done():
                publishing.cancel()
                raise DemoError(f"the daemon stopped while the fleet was publishing: "
                                f"{_outcome(daemon_task)}")
            return publishing.result()
        finally:
            writer.close()

    async def _drain(self, daemon: Any, daemon_task: asyncio.Task[None], published: int
                     ) -> None:
        """Until the daemon took every published message and the board has every output.

        Waited for as events (the daemon's message count, its queue of outputs, what the
        broker acknowledged against what the board received), not for a fixed time: on
        a busy machine the daemon may trail the fleet by many seconds, and stopping it
        early would drop the fixes it had not taken yet (bus-21's detour among them).
        Only a wait with no progress at all for ``STALL_S`` gives up.
        """
        def done() -> bool:
            return daemon_task.done() or (
                daemon.pipeline.counters["messages"] >= published and self._board_has(daemon))

        def progress() -> tuple[int, int]:
            return daemon.pipeline.counters["messages"], self._board_seen()

        await self._until(done, progress)

    def _board_seen(self) -> int:
        """How many outputs the board has received (every kind)."""
        return sum(self.board.counts.values())

    def _board_has(self, daemon: Any) -> bool:
        """Whether the board has every output: none waiting, each one acknowledged seen.

        Counted by kind: the board received at least as many of each kind as the broker
        acknowledged to the daemon.
        """
        if daemon.outputs_waiting():
            return False
        counts = self.board.counts
        return all(counts[kind] >= n for kind, n in daemon.published_counts().items())

    async def _until(self, done: Callable[[], bool], progress: Callable[[], object]) -> None:
        """Until ``done()``, or ``STALL_S`` without a change in ``progress()`` (logged)."""
        last = progress()
        moved = time.monotonic()
        while not done():
            now = progress()
            if now != last:
                last, moved = now, time.monotonic()
            elif time.monotonic() - moved > STALL_S:
                log.warning("gave up waiting: no progress",
                            extra=fields(seconds=STALL_S, progress=last))
                return
            await asyncio.sleep(0.05)

    async def _watch(self, watcher: aiomqtt.Client, streams: Mapping[str, Any]) -> None:
        async for message in watcher.messages:
            payload = message.payload
            if not isinstance(payload, bytes | bytearray):
                payload = str(payload).encode()
            kind = self.board.observe(message.topic.value, bytes(payload))
            if kind is not None:
                streams[kind].write(bytes(payload) + b"\n")

    async def _tick(self, daemon: Any) -> None:
        while True:
            self._refresh_routes(daemon)
            if self.on_tick is not None:
                elapsed = time.monotonic() - self._started if self._started else 0.0
                self.on_tick(self.board, elapsed, self.scenario_time())
            await asyncio.sleep(0.25)

    def _refresh_routes(self, daemon: Any) -> None:
        from livematch.pipeline import UnknownVehicleError

        held = set(daemon.pipeline.vehicles())
        for v in self.vehicles:
            if v not in held:
                continue
            try:
                status = daemon.pipeline.route_status(v)
            except UnknownVehicleError:
                continue
            self.board.set_route(v, status.get("route"), status.get("progress_m"))


def _first_os_error(exc: BaseException) -> OSError | None:
    """The first OSError in ``exc`` or, for an exception group, in its members."""
    if isinstance(exc, OSError):
        return exc
    if isinstance(exc, BaseExceptionGroup):
        for member in exc.exceptions:
            found = _first_os_error(member)
            if found is not None:
                return found
    return None


def _failed(task: asyncio.Task[None]) -> bool:
    """Whether ``task`` ended with an exception (not: still running, cancelled, returned)."""
    return task.done() and not task.cancelled() and task.exception() is not None


def _with_broker(config: DaemonConfig, url: str) -> DaemonConfig:
    from dataclasses import replace

    return replace(config, mqtt=replace(config.mqtt, url=url))


@contextlib.asynccontextmanager
async def _client(port: int, identifier: str) -> AsyncIterator[aiomqtt.Client]:
    # Generous operation timeout: broker, fleet and daemon share one event loop, and on a
    # busy machine an acknowledgement can wait behind the daemon's work for seconds.
    client = aiomqtt.Client("127.0.0.1", port, identifier=identifier,
                            protocol=aiomqtt.ProtocolVersion.V5, timeout=30.0)
    # The fleet publishes every message due at once concurrently (one per vehicle):
    # that many pending publishes is expected, not worth aiomqtt's warning.
    client.pending_calls_threshold = 1000
    try:
        async with client:
            yield client
    except aiomqtt.MqttError as exc:
        raise DemoError(f"demo client {identifier} lost the embedded broker on port "
                        f"{port}: {exc}") from exc


def _outcome(task: asyncio.Task[Any]) -> str:
    if not task.done():
        return "still running"
    if task.cancelled():
        return "cancelled"
    exc = task.exception()
    return f"{type(exc).__name__}: {exc}" if exc is not None else "returned"

