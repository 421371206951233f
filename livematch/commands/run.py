"""``livematch run``: the live daemon (MQTT in, matched roads and alerts out).

Settings come from ``--config FILE`` (TOML), then ``LIVEMATCH__SECTION__KEY``
environment variables, then the flags below for the common ones (see
:mod:`livematch.config`). SIGTERM or SIGINT stops it gracefully; the exit code is 0
after a clean shutdown and 2 for a bad configuration or network.

Start-up, in this order, so that an orchestrator's probes are answered throughout:

1. the health port (``metrics.listen``) opens: ``/healthz`` answers 200 from here on,
   ``/readyz`` 503 ``not ready: compiling``;
2. in a thread of its own, the matcher's kernels are compiled or loaded from numba's
   disk cache (a cold cache took 36 s of CPU, 74 s wall on 2 busy cores; ``livematch
   warm`` fills the cache beforehand), then the road network, routes and fences are
   read (``/readyz``: ``not ready: network``);
3. the daemon connects to the store and the broker; ``/readyz`` says what is missing
   (``broker``, ``store``, ``restore``) until it answers 200.

A stop requested during 1-2 ends the process at once (exit code 0): nothing is held yet.
"""

from __future__ import annotations

import argparse
import asyncio
import contextlib
import logging
import signal
import threading
import time
from collections.abc import Callable
from typing import TYPE_CHECKING, Any

from livematch.config import DaemonConfig, load_config, parse_hostport, redact_url
from livematch.errors import BadConfigError
from livematch.native import build_info
from livematch.service.http import HealthServer
from livematch.service.logs import fields, setup_logging
from livematch.service.metrics import Metrics

log = logging.getLogger("livematch.run")

if TYPE_CHECKING:
    from livematch.lab.record import RecordingTap


def register(subparsers: Any) -> None:
    """Add the ``run`` command to the CLI."""
    parser = subparsers.add_parser(
        "run", help="run the live daemon against an MQTT broker",
        description="Subscribe to vehicle positions, match them to roads, publish "
                    "assignments, commits, alerts and rejects.")
    parser.add_argument("--config", metavar="FILE", help="configuration file (TOML)")
    parser.add_argument("--network", metavar="PATH",
                        help="road map: OpenStreetMap, GeoJSON or compiled .lmnet")
    parser.add_argument("--broker", metavar="URL",
                        help="mqtt://HOST[:PORT] or mqtts://HOST[:PORT]; credentials from "
                             "LIVEMATCH_MQTT_USERNAME / LIVEMATCH_MQTT_PASSWORD")
    parser.add_argument("--store", metavar="URL",
                        help="state store: memory:// (default) or redis://HOST:PORT/DB")
    parser.add_argument("--metrics", metavar="HOST:PORT",
                        help="listen address of /metrics, /healthz, /readyz "
                             "(default 127.0.0.1:9750)")
    parser.add_argument("--routes", metavar="PATH",
                        help="routes: GeoJSON lines or a GTFS feed (.zip or folder)")
    parser.add_argument("--fences", metavar="PATH", help="geofences: GeoJSON polygons")
    parser.add_argument("--record", metavar="PATH",
                        help="also write every received message to this replay log "
                             "(.gz: compressed; rotation: [record] rotate_mb / rotate_s)")
    parser.add_argument("--group", metavar="NAME",
                        help="join this worker group (needs a Redis store): share the "
                             "fleet with the group's other workers by shard leases")
    parser.add_argument("--shards", metavar="N", type=int,
                        help="number of shards of the group (default 64; the same in "
                             "every worker)")
    parser.add_argument("--worker", metavar="NAME",
                        help="this worker's name in the group (default HOSTNAME-PID)")
    parser.set_defaults(func=_run)


def _run(args: argparse.Namespace) -> int:
    overrides = {key: getattr(args, key) for key in
                 ("network", "broker", "store", "metrics", "routes", "fences", "record",
                  "group", "shards", "worker")}
    config = load_config(args.config, overrides=overrides)
    setup_logging(config.log.level)
    tap = config.record.tap()
    try:
        asyncio.run(_serve(config, tap))
    finally:
        if tap is not None:
            tap.close()
    return 0


def build_daemon(config: DaemonConfig, tap: RecordingTap | None = None) -> Any:
    """Open the network and build the pipeline and daemon described by ``config``.

    With a recording ``tap`` every message handed to the pipeline, rejects included, is
    also written to a replay log (``--record`` / ``[record]``); the caller closes it.
    """
    from livematch.service.daemon import Daemon

    return Daemon(config, build_pipeline(config, tap))


def build_pipeline(config: DaemonConfig, tap: RecordingTap | None = None, *,
                   stage: Callable[[str], None] | None = None) -> Any:
    """Compile (or load) the kernels, open the network, build the daemon's pipeline.

    ``stage`` is told each step as it begins (``compiling``, then ``network``), for
    ``/readyz``; it runs in the caller's thread. Raises :class:`BadConfigError` when
    ``config`` names no network, and what :func:`open_network` raises for a bad one.
    """
    from livematch.lab.record import RecordingPipeline
    from livematch.mapdata.fences import read_fences
    from livematch.mapdata.netfile import open_network
    from livematch.mapdata.routes import load_routes
    from livematch.pipeline import Pipeline, prepare_kernels

    if not config.inputs.network:
        raise BadConfigError(f"{config.source}: no road network: give --network PATH or "
                             "inputs.network in the configuration")
    if stage is not None:
        stage("compiling")
    started, cpu = time.monotonic(), time.thread_time()
    prepare_kernels()  # what Pipeline would do first; timed and logged on its own here
    how = build_info()
    log.info("kernels ready", extra=fields(seconds=round(time.monotonic() - started, 1),
                                           cpu_s=round(time.thread_time() - cpu, 1),
                                           kernels=how["kernels_why"]))
    if how["modules"] == "compiled" and how["kernels_why"] in ("stale", "not loadable"):
        log.warning("the kernels compiled ahead of time are %s: numba's JIT runs them "
                    "(slower start, a larger base); rebuild with `python -m "
                    "livematch._aot_build`", how["kernels_why"])
    if how["stale"]:
        log.warning("compiled modules older than their source run the old code: %s; "
                    "reinstall (`pip install -e .`)", how["stale"])
    if stage is not None:
        stage("network")
    network = open_network(config.inputs.network)
    routes = load_routes(config.inputs.routes, network) if config.inputs.routes else None
    fences = (read_fences(config.inputs.fences, network.projection)
              if config.inputs.fences else None)
    log.info("network loaded", extra=fields(
        path=config.inputs.network, segments=network.n_segments,
        routes=len(routes or {}), fences=len(fences or [])))
    pipeline: Any = Pipeline(network, config.matcher, limits=config.feed, routes=routes,
                             fences=fences, alerts=config.alerts,
                             control_topic=config.mqtt.control_topic,
                             park_after_s=config.store.park_after_s)
    if tap is not None:
        pipeline = RecordingPipeline(pipeline, tap)
    return pipeline


class _Start:
    """What ``/readyz`` and ``/metrics`` say before the daemon exists (see the module).

    ``stage`` is the start step under way (set from the build thread: one attribute
    written there, read in the event loop); each step's wall time goes to
    ``livematch_start_seconds{stage}`` as it ends.
    """

    def __init__(self, metrics: Metrics) -> None:
        self.metrics = metrics
        self.stage = "compiling"
        self._since = time.monotonic()

    def enter(self, stage: str) -> None:
        now = time.monotonic()
        if stage != self.stage:
            self.metrics.start_seconds.labels(stage=self.stage).set(round(now - self._since, 3))
            self.stage, self._since = stage, now

    def readiness(self) -> list[str]:
        return [self.stage]


async def _serve(config: DaemonConfig, tap: RecordingTap | None) -> None:
    """Open the health port, build the pipeline in a thread, then run the daemon."""
    from livematch.service.daemon import Daemon

    loop = asyncio.get_running_loop()
    stop = loop.create_future()

    def request_stop() -> None:
        if not stop.done():
            stop.set_result(None)

    for sig in (signal.SIGTERM, signal.SIGINT):
        loop.add_signal_handler(sig, request_stop)
    metrics = Metrics()
    start = _Start(metrics)
    http = None
    if config.metrics.listen:
        host, port = parse_hostport(config.metrics.listen)
        http = HealthServer(host, port, render_metrics=metrics.render,
                            readiness=start.readiness)
        await http.start()
        log.info("http listening", extra=fields(address=f"{host}:{http.port}"))
    try:
        built = await _in_thread(lambda: build_pipeline(config, tap, stage=start.enter), stop)
    except BaseException:
        if http is not None:
            await http.close()
        raise
    if built is None:  # stopped while starting: nothing to save or release
        log.info("stopped while starting", extra=fields(stage=start.stage))
        if http is not None:
            await http.close()
        return
    start.enter("connecting")
    metrics.build.info(build_info())
    daemon = Daemon(config, built, metrics=metrics, http=http)
    for sig in (signal.SIGTERM, signal.SIGINT):
        loop.add_signal_handler(sig, daemon.request_stop)
    if stop.done():
        daemon.request_stop()
    log.info("starting", extra=fields(config=config.source, broker=redact_url(config.mqtt.url),
                                      store=redact_url(config.store.url),
                                      topic=config.mqtt.topic, group=config.group.name))
    await daemon.run()


async def _in_thread(work: Callable[[], Any], stop: asyncio.Future[None]) -> Any:
    """``work()`` in a daemon thread; its result, or None when ``stop`` comes first.

    A daemon thread rather than ``asyncio.to_thread``: compiling cannot be interrupted,
    and a stop during it must not wait for it (the executor's threads are joined at
    exit; a daemon thread is not). numba writes each cache file under a temporary name
    and renames it, so a compile abandoned this way leaves no broken cache entry.
    Exceptions of ``work`` are raised here.
    """
    loop = asyncio.get_running_loop()
    done: asyncio.Future[Any] = loop.create_future()

    def settle(result: Any, error: BaseException | None) -> None:
        if done.done():
            return
        if error is not None:
            done.set_exception(error)
        else:
            done.set_result(result)

    def run() -> None:
        try:
            result, error = work(), None
        except BaseException as exc:  # handed to the event loop, raised there
            result, error = None, exc
        with contextlib.suppress(RuntimeError):  # the loop has closed: nobody waits
            loop.call_soon_threadsafe(settle, result, error)

    threading.Thread(target=run, name="livematch-start", daemon=True).start()
    await asyncio.wait({done, stop}, return_when=asyncio.FIRST_COMPLETED)
    if not done.done():
        return None
    return done.result()
