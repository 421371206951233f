"""``livematch demo``: the whole live pipeline on this machine, with no external service.

``livematch demo [--duration S] [--vehicles N] [--speedup X] [--out DIR] [--port P]
[--config FILE] [--no-report]`` starts, in one process (:mod:`livematch.demo.live`):

* an embedded MQTT v5 broker on a free loopback port; the first line printed is
  ``broker: mqtt://127.0.0.1:PORT``, the second how to watch it with a standard client
  (``mosquitto_sub -V mqttv5 -h 127.0.0.1 -p PORT -t 'livematch/#' -v``);
* the live daemon (:class:`~livematch.service.daemon.Daemon`, in-memory store) on the
  invented town of Larkmoor with its bus routes and geofences;
* the Larkmoor fleet (:data:`~livematch.demo.scenario.LIVE_FLEET`, 12 vehicles; the
  first N of :data:`~livematch.demo.live.DEMO_ORDER` with ``--vehicles N``) publishing
  real MQTT messages for ``--duration`` wall seconds, ``--speedup`` times faster than
  real time (default 20: a minute of wall time is 20 minutes of the scenario; bus-21
  leaves its route about 238 s into it, 12 s of wall time);
* a live board: per vehicle the road, eps level, certified window, route progress and
  last alert (a rich table on a terminal, one progress line every 2 s otherwise).

At the end it prints a summary and leaves in DIR (default ``livematch-demo``): the
replay log ``feed.jsonl.gz`` of every message published, the network, routes, fences
and truth files, the outputs as read back from the broker (``live/*.jsonl``), and
(unless ``--no-report``) the replay lab's report ``replay/report.html``, made by the
``livematch replay ... --report`` command it prints, which reopens the run any time.

Ctrl-C ends the feed early; the daemon still drains and everything above is written.
The scenario and the matcher are deterministic; only the pacing reads the wall clock.
"""

from __future__ import annotations

import argparse
import asyncio
import logging
import math
import shlex
import sys
import time
from collections.abc import Sequence
from pathlib import Path
from typing import Any, TextIO

from livematch.errors import LivematchError

__all__ = ["DEFAULT_DURATION_S", "DEFAULT_SPEEDUP", "main", "register", "replay_command"]

#: Default wall seconds of publishing (20 minutes of the scenario at the default speedup).
DEFAULT_DURATION_S = 60.0
#: Default scenario seconds per wall second.
DEFAULT_SPEEDUP = 20.0
#: Default output folder.
DEFAULT_OUT = "livematch-demo"


def register(subparsers: Any) -> None:
    """Add the ``demo`` command to the CLI."""
    parser = subparsers.add_parser(
        "demo", help="run broker, fleet, daemon and a live board here, no services needed",
        description="Run the live pipeline end to end on this machine: an embedded MQTT "
                    "broker, the Larkmoor fleet publishing positions, the daemon matching "
                    "them and a live board of its outputs.")
    add_arguments(parser)
    parser.set_defaults(func=_run)


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """The ``demo`` flags."""
    parser.add_argument("--duration", type=float, default=DEFAULT_DURATION_S, metavar="S",
                        help=f"wall seconds of publishing (default {DEFAULT_DURATION_S:g})")
    parser.add_argument("--vehicles", type=int, metavar="N",
                        help="how many vehicles publish (default all 12; bus-21 with the "
                             "scripted detour first)")
    parser.add_argument("--speedup", type=float, default=DEFAULT_SPEEDUP, metavar="X",
                        help=f"scenario seconds per wall second (default {DEFAULT_SPEEDUP:g})")
    parser.add_argument("--out", default=DEFAULT_OUT, metavar="DIR",
                        help=f"folder for the replay log, inputs and report "
                             f"(default {DEFAULT_OUT})")
    parser.add_argument("--port", type=int, default=0,
                        help="broker port on 127.0.0.1 (default: a free one)")
    parser.add_argument("--config", metavar="FILE",
                        help="daemon TOML configuration ([matcher], [publish]...); the "
                             "broker, store and inputs are the demo's own")
    parser.add_argument("--no-report", dest="report", action="store_false",
                        help="skip the replay report at the end")


def replay_command(files: Any, vehicles: Sequence[str], config: str | None) -> list[str]:
    """The ``livematch replay`` arguments that reopen a demo run with its report.

    Example:
        >>> from livematch.demo.live import DemoFiles
        >>> " ".join(replay_command(DemoFiles(Path("d")), ["bus-21"], None))
        ... # doctest: +NORMALIZE_WHITESPACE
        'replay d/feed.jsonl.gz --network d/larkmoor.geojson --routes
        d/larkmoor-routes.geojson --fences d/larkmoor-fences.geojson --truth
        d/truth.jsonl.gz --report --vehicles bus-21 --out d/replay'
    """
    argv = ["replay", str(files.log), "--network", str(files.network),
            "--routes", str(files.routes), "--fences", str(files.fences)]
    if config:
        argv += ["--config", config]
    argv += ["--truth", str(files.truth), "--report", "--vehicles",
             ",".join(vehicles[:3]), "--out", str(files.replay)]
    return argv


def _check(args: argparse.Namespace) -> None:
    if not (math.isfinite(args.duration) and args.duration > 0):
        raise LivematchError(f"--duration must be a positive number of seconds, "
                             f"got {args.duration}")
    if not (math.isfinite(args.speedup) and args.speedup > 0):
        raise LivematchError(f"--speedup must be a positive number, got {args.speedup}")
    if not 0 <= args.port <= 65535:
        raise LivematchError(f"--port must be 0..65535, got {args.port}")
    if args.config is not None and not Path(args.config).is_file():
        raise LivematchError(f"--config {args.config}: no such file")


def _say(text: str, stream: TextIO | None = None) -> None:
    out = stream or sys.stdout
    out.write(text + "\n")
    out.flush()


def _run(args: argparse.Namespace) -> int:
    _check(args)
    from livematch.config import load_config
    from livematch.demo.live import DemoFiles, LiveDemo, select_vehicles, write_demo_files
    from livematch.demo.scenario import LIVE_FLEET, build_scenario
    from livematch.demo.town import build_town

    files = DemoFiles(Path(args.out))
    files.out.mkdir(parents=True, exist_ok=True)
    _log_to(files.out / "demo.log")
    # The demo's own broker, store and no HTTP listener; the rest from --config.
    config = load_config(args.config, env={"LIVEMATCH__MQTT__CLIENT_ID": "livematch-demo"},
                         overrides={"broker": "mqtt://127.0.0.1:1883", "store": "memory://",
                                    "metrics": ""})
    scenario_s = args.duration * args.speedup
    scenario = build_scenario(build_town(), buses=LIVE_FLEET,
                              duration_s=float(math.ceil(scenario_s)))
    vehicles = select_vehicles(scenario, args.vehicles)
    write_demo_files(files, scenario)

    tty = sys.stdout.isatty()
    live_display: Any = None
    last_line = [0.0]

    def on_broker(url: str) -> None:
        port = url.rsplit(":", 1)[1]
        _say(f"broker: {url}")
        _say(f"watch: mosquitto_sub -V mqttv5 -h 127.0.0.1 -p {port} -t 'livematch/#' -v")
        _say(f"feed: {len(vehicles)} vehicles on fleet/<vehicle>/position, "
             f"{args.duration:g} s at {args.speedup:g}x ({scenario_s:.0f} s of the scenario)")
        _say("note: the town and fleet are invented. With real vehicles, positions are "
             "personal data and alerts support dispatchers, they do not replace them "
             "(README, Cautions).")

    def on_tick(board: Any, wall_s: float, scenario_t: float | None) -> None:
        nonlocal live_display
        if tty:
            from rich.live import Live

            if live_display is None:
                live_display = Live(board.table(wall_s, scenario_t), refresh_per_second=4,
                                    redirect_stderr=False)
                live_display.start()
            else:
                live_display.update(board.table(wall_s, scenario_t))
        elif time.monotonic() - last_line[0] >= 2.0:
            last_line[0] = time.monotonic()
            _say(board.progress_line(wall_s, scenario_t))

    demo = LiveDemo(scenario, vehicles, config, files, duration_s=args.duration,
                    speedup=args.speedup, port=args.port, on_broker=on_broker,
                    on_tick=on_tick)
    try:
        result = asyncio.run(demo.run())
    finally:
        if live_display is not None:
            live_display.stop()
    _summary(result, files)
    argv = replay_command(files, vehicles, args.config)
    if args.report:
        from livematch.cli import main as cli_main

        _say("report: replaying the log with the replay lab ...")
        code = cli_main(argv)
        if code != 0:
            _say(f"report: the replay lab failed (exit {code}); see above")
            return code
        _say(f"report: {files.replay / 'report.html'}")
    _say("reopen: livematch " + shlex.join(argv))
    return 0


def _summary(result: Any, files: Any) -> None:
    counters = result.daemon_counters
    _say("")
    _say(f"summary: {result.published} messages published in {result.wall_s:.1f} s wall "
         f"({len(result.vehicles)} vehicles); daemon took {counters['messages']} messages, "
         f"{counters['fixes']} fixes")
    _say("published by the daemon (read back from the broker): " + ", ".join(
        f"{result.outputs[k]} {k}s" for k in ("assignment", "commit", "alert", "reject")))
    for alert in result.alerts:
        from livematch.demo.live import _clock

        facts = {k: v for k, v in alert.items()
                 if k not in ("vehicle", "time", "kind") and not k.endswith(("lat", "lon"))}
        _say(f"  alert {_clock(alert.get('time'))} {alert.get('vehicle')} "
             f"{alert.get('kind')} {facts}")
    _say(f"replay log: {files.log}")
    _say(f"live outputs: {files.live}/ (log: {files.out / 'demo.log'})")


def _log_to(path: Path) -> None:
    """Send every log line (daemon, broker) to ``path``; the terminal shows the board."""
    from livematch.service.logs import KeyValueFormatter

    handler = logging.FileHandler(path, mode="w", encoding="utf-8")
    handler.setFormatter(KeyValueFormatter())
    root = logging.getLogger()
    root.handlers[:] = [handler]
    root.setLevel(logging.INFO)


def main(argv: Sequence[str] | None = None) -> int:
    """``python -m livematch.commands.demo``: the same command without the full CLI."""
    parser = argparse.ArgumentParser(prog="livematch demo",
                                     description=(__doc__ or "").split("\n")[0])
    add_arguments(parser)
    args = parser.parse_args(argv)
    try:
        return _run(args)
    except LivematchError as exc:
        print(f"livematch: error: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        return 130


if __name__ == "__main__":
    sys.exit(main())
