"""``livematch run``: the live daemon (MQTT in, matched roads and alerts out).

Settings come from ``--config FILE`` (TOML), then ``LIVEMATCH__SECTION__KEY``
environment variables, then the flags below for the common ones (see
:mod:`livematch.config`). SIGTERM or SIGINT stops it gracefully; the exit code is 0
after a clean shutdown and 2 for a bad configuration or network.
"""

from __future__ import annotations

import argparse
import asyncio
import logging
import signal
from typing import TYPE_CHECKING, Any

from livematch.config import DaemonConfig, load_config, redact_url
from livematch.errors import BadConfigError
from livematch.service.logs import fields, setup_logging

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
    daemon = build_daemon(config, tap)
    try:
        asyncio.run(_serve(daemon))
    finally:
        if tap is not None:
            tap.close()
    return 0


def build_daemon(config: DaemonConfig, tap: RecordingTap | None = None) -> Any:
    """Open the network and build the pipeline and daemon described by ``config``.

    With a recording ``tap`` every message handed to the pipeline, rejects included, is
    also written to a replay log (``--record`` / ``[record]``); the caller closes it.
    """
    from livematch.lab.record import RecordingPipeline
    from livematch.mapdata.fences import read_fences
    from livematch.mapdata.netfile import open_network
    from livematch.mapdata.routes import load_routes
    from livematch.pipeline import Pipeline
    from livematch.service.daemon import Daemon

    if not config.inputs.network:
        raise BadConfigError(f"{config.source}: no road network: give --network PATH or "
                             "inputs.network in the configuration")
    network = open_network(config.inputs.network)
    routes = load_routes(config.inputs.routes, network) if config.inputs.routes else None
    fences = (read_fences(config.inputs.fences, network.projection)
              if config.inputs.fences else None)
    log.info("network loaded", extra=fields(
        path=config.inputs.network, segments=network.n_segments,
        routes=len(routes or {}), fences=len(fences or [])))
    pipeline: Any = Pipeline(network, config.matcher, limits=config.feed, routes=routes,
                             fences=fences, alerts=config.alerts,
                             control_topic=config.mqtt.control_topic)
    if tap is not None:
        pipeline = RecordingPipeline(pipeline, tap)
    return Daemon(config, pipeline)


async def _serve(daemon: Any) -> None:
    loop = asyncio.get_running_loop()
    for sig in (signal.SIGTERM, signal.SIGINT):
        loop.add_signal_handler(sig, daemon.request_stop)
    cfg = daemon.config
    log.info("starting", extra=fields(config=cfg.source, broker=redact_url(cfg.mqtt.url),
                                      store=redact_url(cfg.store.url), topic=cfg.mqtt.topic,
                                      group=cfg.group.name))
    await daemon.run()
