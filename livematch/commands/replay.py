"""``livematch replay``: run a recorded feed through the pipeline and write every output.

``livematch replay LOG --network NET --out DIR [--config FILE] [--routes FILE]
[--fences FILE]`` reads a replay log (:mod:`livematch.feed.replaylog`), handles each
message exactly as the daemon would (:class:`~livematch.pipeline.Pipeline`), flushes at
the end of the log, and writes into DIR:

* ``assignments.jsonl``: one line per accepted fix: ``vehicle``, ``time`` (epoch s, the
  fix's own time), ``lat``, ``lon`` (matched point, WGS84), ``way``, ``from_node``,
  ``to_node``, ``offset_m``, ``road`` (name or null), ``eps_m``, ``window_fixes``,
  ``window_s``, ``committed`` (false);
* ``commits.jsonl``: ``vehicle``, ``fixes`` (list of ``{time, lat, lon, way, from_node,
  to_node, offset_m}``), ``path`` (connected sequence of ``{way, from_node, to_node}``);
* ``rejects.jsonl``: ``at``, ``topic``, ``reason``, ``detail``, ``payload``;
* ``alerts.jsonl``: alert records: ``vehicle``, ``time``, ``kind`` and the facts of that
  kind (docs/alerts.md). After every message the pipeline's stale watch is ticked with
  that message's ``at`` (:meth:`~livematch.pipeline.Pipeline.tick`), as the daemon does
  with its clock;
* ``summary.json``: counts (see :func:`summarize`).

With ``[store] park_after_s`` > 0 in ``--config``, a vehicle silent for longer than that
(the log's receive times) is parked as its checkpoint bytes after every message
(:meth:`~livematch.pipeline.Pipeline.park_idle`), as the daemon parks it; the output files
are the same byte for byte as without parking, and the summary gains ``parking``.

Records keep the field order of the contract and are written compactly, one per line.
The files depend only on the inputs, so two runs give byte-identical files; the run
time therefore goes to stderr, never into ``summary.json``.

``--config`` takes the daemon's TOML file; its ``[matcher]`` section (and the topic
filter, control topic and limits of ``[mqtt]``/``[feed]``, the ``[alerts]`` section and
the ``inputs.routes`` / ``inputs.fences`` files, and ``store.park_after_s``) apply.
``--routes`` (GeoJSON lines or a GTFS feed, :mod:`livematch.mapdata.routes`) and
``--fences`` (GeoJSON polygons, :mod:`livematch.mapdata.fences`) override the files of
the config. Environment overrides
(``LIVEMATCH__...``) are deliberately ignored here, so a replay depends only on files.

Lab mode (several ``--config``, ``--truth``, ``--report``, ``--speed``, ``--publish``):
compare settings side by side, score against a truth file, write an HTML report, pace
by the log's receive times or publish the log into a broker (:mod:`livematch.lab.run`).
"""

from __future__ import annotations

import argparse
import importlib
import json
import sys
import time
import tomllib
from collections import Counter
from collections.abc import Mapping
from pathlib import Path
from typing import IO, Any

from livematch.core.monitors import AlertSettings
from livematch.core.settings import MatchSettings
from livematch.errors import BadConfigError, LivematchError
from livematch.feed.decode import FeedLimits
from livematch.feed.replaylog import read_replay_log
from livematch.lab.cli import add_lab_arguments, lab_wanted
from livematch.pipeline import CONTROL_TOPIC, Output, Pipeline, matcher_settings_from_mapping

__all__ = ["OUTPUT_FILES", "load_alert_config", "load_control_topic", "load_park_after",
           "load_replay_config", "register", "replay", "summarize"]

#: The files ``replay`` writes, by output kind (plus ``summary.json``).
OUTPUT_FILES = {
    "assignment": "assignments.jsonl",
    "commit": "commits.jsonl",
    "reject": "rejects.jsonl",
    "alert": "alerts.jsonl",
}


def register(subparsers: Any) -> None:
    """Add the ``replay`` command to the CLI."""
    parser = subparsers.add_parser(
        "replay", help="run a recorded feed through the matcher and write its outputs",
        description="Replay a recorded feed (JSON Lines, optionally .gz) through the same "
                    "pipeline as the daemon and write assignments, commits, rejects, "
                    "alerts and a summary into DIR.")
    parser.add_argument("log", metavar="LOG", help="replay log (.jsonl or .jsonl.gz)")
    parser.add_argument("--network", metavar="NET",
                        help="road map (.osm.pbf, .osm, .geojson) or compiled .lmnet "
                             "(default: inputs.network of --config)")
    parser.add_argument("--out", metavar="DIR",
                        help="folder to write the outputs into (created if missing)")
    parser.add_argument("--config", metavar="FILE", action="append",
                        help="daemon TOML configuration; its [matcher] and [alerts] apply; "
                             "repeat it to compare settings (outputs in DIR/<file stem>/)")
    parser.add_argument("--routes", metavar="FILE",
                        help="routes: GeoJSON lines or a GTFS feed (.zip or folder)")
    parser.add_argument("--fences", metavar="FILE", help="geofences: GeoJSON polygons")
    add_lab_arguments(parser)
    parser.set_defaults(func=_run)


def load_replay_config(path: str | None) -> tuple[MatchSettings, FeedLimits, str]:
    """Matcher settings, feed limits and ``inputs.network`` from a config file.

    Uses the daemon's loader (:func:`livematch.config.load_config`, environment
    ignored) when it is available; otherwise reads only the ``[matcher]`` table.
    No file gives the defaults.

    Raises:
        BadConfigError: naming the file and the key.
    """
    if path is None:
        return MatchSettings(), FeedLimits(), ""
    try:
        config = importlib.import_module("livematch.config")
    except ModuleNotFoundError as exc:
        if exc.name != "livematch.config":
            raise
        return _matcher_only(Path(path)), FeedLimits(), ""
    cfg = config.load_config(path, env={})
    return cfg.matcher, cfg.feed, cfg.inputs.network


def load_alert_config(path: str | None) -> tuple[AlertSettings, str, str]:
    """Alert settings and the ``inputs.routes`` / ``inputs.fences`` files of a config.

    Reads what the daemon's loader provides (an ``alerts`` section once it maps one);
    defaults otherwise, and for no file.
    """
    if path is None:
        return AlertSettings(), "", ""
    try:
        config = importlib.import_module("livematch.config")
    except ModuleNotFoundError as exc:
        if exc.name != "livematch.config":
            raise
        return AlertSettings(), "", ""
    cfg = config.load_config(path, env={})
    alerts = getattr(cfg, "alerts", None)
    inputs = cfg.inputs
    return (alerts if isinstance(alerts, AlertSettings) else AlertSettings(),
            getattr(inputs, "routes", "") or "", getattr(inputs, "fences", "") or "")


def load_control_topic(path: str | None) -> str:
    """The route control topic filter (``mqtt.control_topic``) of a config.

    The daemon subscribes to it; the pipeline's default without a file or key.
    """
    if path is None:
        return CONTROL_TOPIC
    try:
        config = importlib.import_module("livematch.config")
    except ModuleNotFoundError as exc:
        if exc.name != "livematch.config":
            raise
        return CONTROL_TOPIC
    mqtt = getattr(config.load_config(path, env={}), "mqtt", None)
    topic = getattr(mqtt, "control_topic", CONTROL_TOPIC)
    return topic if isinstance(topic, str) else CONTROL_TOPIC


def load_park_after(path: str | None) -> float:
    """``store.park_after_s`` of a config (0, parking off, without a file or key)."""
    if path is None:
        return 0.0
    try:
        config = importlib.import_module("livematch.config")
    except ModuleNotFoundError as exc:
        if exc.name != "livematch.config":
            raise
        return 0.0
    store = getattr(config.load_config(path, env={}), "store", None)
    value = getattr(store, "park_after_s", 0.0)
    return float(value) if isinstance(value, int | float) else 0.0


def _matcher_only(path: Path) -> MatchSettings:
    try:
        doc = tomllib.loads(path.read_text(encoding="utf-8"))
    except OSError as exc:
        raise BadConfigError(f"{path}: cannot read configuration: {exc.strerror}") from exc
    except (UnicodeDecodeError, tomllib.TOMLDecodeError) as exc:
        raise BadConfigError(f"{path}: not valid TOML: {exc}") from exc
    section = doc.get("matcher", {})
    if not isinstance(section, dict):
        raise BadConfigError(f"{path}: matcher must be a [matcher] table")
    return matcher_settings_from_mapping(section, str(path))


def replay(log: str | Path, pipeline: Pipeline, out_dir: str | Path) -> dict[str, Any]:
    """Run every message of ``log`` through ``pipeline``, flush, and write the outputs.

    Returns the summary that was written to ``summary.json``.

    Raises:
        LivematchError: the log cannot be read (file and line named) or DIR cannot be
            written.
    """
    out = Path(out_dir)
    try:
        out.mkdir(parents=True, exist_ok=True)
        streams = {kind: open(out / name, "w", encoding="utf-8", newline="\n")  # noqa: SIM115
                   for kind, name in OUTPUT_FILES.items()}
    except OSError as exc:
        raise LivematchError(f"cannot write outputs into {str(out)!r}: {exc}") from exc
    try:
        for entry in read_replay_log(log):
            _write(streams, pipeline.handle(entry.topic, entry.payload, entry.at))
            _write(streams, pipeline.tick(entry.at))
            pipeline.park_idle(entry.at)  # nothing while parking is off
        _write(streams, pipeline.flush())
    finally:
        for stream in streams.values():
            stream.close()
    summary = summarize(pipeline.counters, pipeline.settings, len(pipeline.vehicles()))
    (out / "summary.json").write_text(
        json.dumps(summary, indent=2, ensure_ascii=False, allow_nan=False) + "\n",
        encoding="utf-8")
    return summary


def _write(streams: Mapping[str, IO[str]], outputs: list[Output]) -> None:
    for item in outputs:
        line = json.dumps(item.record, separators=(",", ":"), ensure_ascii=False,
                          allow_nan=False)
        streams[item.kind].write(line + "\n")


def summarize(counters: Counter[str], settings: MatchSettings, vehicles: int
              ) -> dict[str, Any]:
    """The ``summary.json`` object: what happened to the messages, in counts.

    Keys: ``messages``; ``rejects`` (total and ``by_reason``); ``duplicates`` (redelivered
    (vehicle, time) pairs dropped); ``fixes`` (handed to the matcher), ``fixes_accepted``
    (not filtered), ``filtered`` (total and ``by_reason``); ``assignments``,
    ``commits``, ``alerts``; ``vehicles``; ``eps_levels``: per ladder level, the
    assignments certified at it and their share of all assignments (6 decimals); only
    when vehicles were parked (``store.park_after_s``), ``parking``: ``parked`` and
    ``unparked`` (restored), in counts.

    Example (degenerate: nothing handled):
        >>> s = summarize(Counter(), MatchSettings(eps_levels=(20.0,)), 0)
        >>> s["messages"], s["eps_levels"]
        (0, [{'eps_m': 20.0, 'assignments': 0, 'share': 0.0}])
    """
    def by_prefix(prefix: str) -> dict[str, int]:
        return {k[len(prefix):]: counters[k] for k in sorted(counters) if k.startswith(prefix)}

    rejects = by_prefix("reject:")
    filtered = by_prefix("filtered:")
    assignments = counters["assignments"]
    levels = list(settings.eps_levels)
    levels += sorted(e for e in (float(k) for k in by_prefix("eps_m:")) if e not in levels)
    summary = {
        "messages": counters["messages"],
        "rejects": {"total": sum(rejects.values()), "by_reason": rejects},
        "duplicates": counters["duplicate"],
        "fixes": counters["fixes"],
        "fixes_accepted": counters["fixes"] - sum(filtered.values()),
        "filtered": {"total": sum(filtered.values()), "by_reason": filtered},
        "assignments": assignments,
        "assignments_held": counters["assignments_held"],
        "commits": counters["commits"],
        "alerts": counters["alerts"],
        "vehicles": vehicles,
        "eps_levels": [
            {"eps_m": eps, "assignments": counters[f"eps_m:{eps!r}"],
             "share": round(counters[f"eps_m:{eps!r}"] / assignments, 6) if assignments
             else 0.0}
            for eps in levels
        ],
    }
    if counters["vehicle:parked"]:
        summary["parking"] = {"parked": counters["vehicle:parked"],
                              "unparked": counters["vehicle:unparked"]}
    return summary


def _need_file(path: str | None, flag: str) -> None:
    if path is not None and not Path(path).is_file():
        raise LivematchError(f"{flag} {path}: no such file")


def _run(args: argparse.Namespace) -> int:
    if lab_wanted(args):  # several settings, truth, report, pacing, publishing
        from livematch.lab.run import run_lab  # heavy imports (matplotlib) only when used

        return run_lab(args)
    args.config = args.config[0] if args.config else None
    if not args.out:
        raise LivematchError("replay needs --out DIR")
    _need_file(args.log, "LOG")
    _need_file(args.config, "--config")
    if args.routes is not None and not Path(args.routes).exists():
        raise LivematchError(f"--routes {args.routes}: no such file or folder")
    _need_file(args.fences, "--fences")
    settings, limits, configured_network = load_replay_config(args.config)
    alert_settings, routes_path, fences_path = load_alert_config(args.config)
    routes_path = args.routes or routes_path
    fences_path = args.fences or fences_path
    network_path = args.network or configured_network
    if not network_path:
        raise LivematchError("replay needs --network NET (or inputs.network in --config)")
    _need_file(network_path, "--network")

    from livematch.mapdata.fences import read_fences
    from livematch.mapdata.netfile import open_network  # heavy import, only when run
    from livematch.mapdata.routes import load_routes

    started = time.perf_counter()
    network = open_network(network_path)
    routes = load_routes(routes_path, network) if routes_path else None
    fences = read_fences(fences_path, network.projection) if fences_path else None
    loaded = time.perf_counter()
    pipeline = Pipeline(network, settings, limits=limits, routes=routes, fences=fences,
                        alerts=alert_settings, control_topic=load_control_topic(args.config),
                        park_after_s=load_park_after(args.config))
    summary = replay(args.log, pipeline, args.out)
    done = time.perf_counter()
    rate = summary["messages"] / (done - loaded) if done > loaded else 0.0
    print(f"livematch: replayed {summary['messages']} messages ({summary['fixes']} fixes, "
          f"{summary['rejects']['total']} rejects, {summary['vehicles']} vehicles) in "
          f"{done - loaded:.2f} s ({rate:.0f} msg/s; network loaded in "
          f"{loaded - started:.2f} s); wrote {args.out}", file=sys.stderr)
    return 0
