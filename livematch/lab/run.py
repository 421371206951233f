"""``livematch replay`` lab mode: compare settings, score against truth, report, pace, publish.

``livematch replay LOG --out DIR`` with one ``--config`` (or none) and no lab flag is the
plain replay (:mod:`livematch.commands.replay`). These flags turn the lab on:

* ``--config A.toml --config B.toml ...``: every setting replays the same log into
  ``DIR/<name>/`` (name = the file's stem; the same files as a plain replay), then
  ``DIR/compare.md`` and ``DIR/compare.json`` hold the side-by-side table (also printed),
  and ``DIR/diff.jsonl`` every vehicle and time where the first setting and another one
  got a different road or alert (:mod:`livematch.lab.diff`);
* ``--truth FILE``: adds accuracy and alert-detection measures
  (:mod:`livematch.lab.truth`) to the table (written even for a single setting);
* ``--report``: ``DIR/report.html``, one self-contained page with the table and, per
  vehicle (``--vehicles a,b`` or the first few), a map and a timeline
  (:mod:`livematch.lab.report`);
* ``--speed X``: pace the replay by the log's receive times, X times real time;
* ``--publish mqtt://HOST[:PORT]``: instead of matching, publish every message to its
  original topic (QoS 1; paced by ``--speed``, as fast as possible without) to drive a
  running daemon; no ``--out`` needed.

On a terminal, a progress bar (rich) on stderr follows the replay.
"""

from __future__ import annotations

import argparse
import asyncio
import json
import os
import sys
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

from livematch.config import PASSWORD_ENV, USERNAME_ENV
from livematch.core.network import RoadNetwork
from livematch.errors import LivematchError
from livematch.feed.replaylog import read_replay_log
from livematch.lab.compare import (
    RunResult,
    Setting,
    complete_rows,
    measures,
    run_setting,
    setting_names,
)
from livematch.lab.diff import RunOutputs, diff_runs, load_outputs, summarize_diff
from livematch.lab.pace import Pacer, publish_log
from livematch.lab.report import (
    DEFAULT_VEHICLES,
    MARGIN_M,
    VehicleView,
    clock,
    incident_lines,
    markdown_table,
    raw_fixes,
    write_report,
)
from livematch.lab.truth import load_truth, score_run, segment_lookup
from livematch.pipeline import Pipeline

__all__ = ["run_lab"]


def run_lab(args: argparse.Namespace) -> int:
    """Run the lab as the arguments say (see the module docstring); returns the exit code.

    Raises:
        LivematchError: a missing file, a bad config, a broker that cannot be reached...
    """
    if not Path(args.log).is_file():
        raise LivematchError(f"LOG {args.log}: no such file")
    if args.speed is not None and args.speed < 0:
        raise LivematchError(f"--speed must be >= 0, got {args.speed}")
    if args.publish:
        return _publish(args)
    if not args.out:
        raise LivematchError("replay needs --out DIR (or --publish URL)")
    for flag, value in (("--truth", args.truth), ("--fences", args.fences)):
        if value is not None and not Path(value).is_file():
            raise LivematchError(f"{flag} {value}: no such file")
    configs: list[str | None] = list(args.config or []) or [None]
    for config in configs:
        if config is not None and not Path(config).is_file():
            raise LivematchError(f"--config {config}: no such file")
    settings = setting_names(configs)
    out = Path(args.out)
    single = len(settings) == 1
    builder = _Builder(args)
    pipelines = [builder.pipeline(s) for s in settings]
    network = builder.network
    assert network is not None
    pacer = Pacer(args.speed) if args.speed else None
    results: list[RunResult] = []
    with _progress(args.log, len(settings)) as advance:
        for setting, pipeline in zip(settings, pipelines, strict=True):
            folder = out if single else out / setting.name
            results.append(run_setting(setting, args.log, pipeline, folder, pacer=pacer,
                                       progress=advance))
    outputs = [load_outputs(r.out_dir) for r in results]
    rows = [measures(r, o) for r, o in zip(results, outputs, strict=True)]
    lookup = segment_lookup(network)
    if args.truth:
        truth = load_truth(args.truth)
        for row, o in zip(rows, outputs, strict=True):
            row.update(score_run(truth, network, lookup, o.assignments, o.commits, o.alerts))
    complete_rows(rows)
    diffs: dict[str, dict[str, Any]] = {}
    if not single:
        records: list[dict[str, Any]] = []
        for other, o in zip(settings[1:], outputs[1:], strict=True):
            pair = diff_runs(outputs[0], o, settings[0].name, other.name)
            records.extend(pair)
            diffs[f"{settings[0].name} vs {other.name}"] = summarize_diff(pair)
        _write_jsonl(out / "diff.jsonl", records)
    if not single or args.truth:
        _write_compare(out, args, rows, diffs)
        print(markdown_table(rows))
    if args.report:
        names = [s.name for s in settings]
        views = _views(args, network, pipelines[0], outputs[0])
        path = write_report(
            out / "report.html", title=f"livematch replay lab: {Path(args.log).name}",
            rows=rows, network=network, lookup=lookup,
            runs=list(zip(names, outputs, strict=True)), views=views, diff_summary=diffs,
            notes=[f"Log {args.log}; network {builder.network_path}; settings "
                   + ", ".join(f"{s.name} ({s.config or 'defaults'})" for s in settings)
                   + (f"; truth {args.truth}" if args.truth else "") + "."])
        print(f"livematch: report written to {path}", file=sys.stderr)
    total = sum(r.summary["messages"] for r in results)
    print(f"livematch: replayed {total} messages under {len(settings)} setting(s); "
          f"wrote {out}", file=sys.stderr)
    return 0


class _Builder:
    """Builds each setting's pipeline exactly as ``livematch replay --config`` does."""

    def __init__(self, args: argparse.Namespace) -> None:
        self.args = args
        self.network: RoadNetwork | None = None
        self.network_path = ""

    def pipeline(self, setting: Setting) -> Pipeline:
        from livematch.commands.replay import load_alert_config, load_replay_config
        from livematch.mapdata.fences import read_fences
        from livematch.mapdata.netfile import open_network
        from livematch.mapdata.routes import load_routes

        args = self.args
        settings, limits, configured_network = load_replay_config(setting.config)
        alerts, routes_path, fences_path = load_alert_config(setting.config)
        network_path = args.network or configured_network
        if not network_path:
            raise LivematchError("replay needs --network NET (or inputs.network in --config)")
        if not Path(network_path).is_file():
            raise LivematchError(f"--network {network_path}: no such file")
        if self.network is None:
            self.network, self.network_path = open_network(network_path), network_path
        elif Path(network_path).resolve() != Path(self.network_path).resolve():
            raise LivematchError(f"settings compared on one log must share the network: "
                                 f"{setting.config} names {network_path}, an earlier one "
                                 f"{self.network_path}; give --network NET")
        network = self.network
        routes_path = args.routes or routes_path
        fences_path = args.fences or fences_path
        routes = load_routes(routes_path, network) if routes_path else None
        fences = read_fences(fences_path, network.projection) if fences_path else None
        return Pipeline(network, settings, limits=limits, routes=routes, fences=fences,
                        alerts=alerts)


def _views(args: argparse.Namespace, network: RoadNetwork, pipeline: Pipeline,
           first: RunOutputs) -> list[VehicleView]:
    if args.vehicles:
        vehicles = [v.strip() for v in args.vehicles.split(",") if v.strip()]
    else:
        vehicles = sorted({a["vehicle"] for a in first.assignments})[:DEFAULT_VEHICLES]
    fixes = raw_fixes(args.log, network, pipeline.limits, vehicles)
    views = []
    for vehicle in vehicles:
        own = fixes.get(vehicle, [])
        route_id = next((f.route for f in reversed(own) if f.route), None) or \
            pipeline.vehicle_routes.get(vehicle)
        routes = pipeline.routes or {}
        route = (route_id, routes[route_id].xy) if route_id in routes else None
        fences: list[tuple[str, Any]] = []
        if pipeline.fences is not None and own:
            import shapely

            box = shapely.box(min(f.x for f in own) - MARGIN_M, min(f.y for f in own) - MARGIN_M,
                              max(f.x for f in own) + MARGIN_M, max(f.y for f in own) + MARGIN_M)
            fences = [(f.id, f.geometry) for f in pipeline.fences.fences
                      if f.applies_to(vehicle, pipeline.vehicle_groups.get(vehicle, ()))
                      and f.geometry.intersects(box)]
        views.append(VehicleView(vehicle, own, route, fences))
    return views


def _write_jsonl(path: Path, records: list[dict[str, Any]]) -> None:
    with path.open("w", encoding="utf-8", newline="\n") as f:
        for rec in records:
            f.write(json.dumps(rec, separators=(",", ":"), ensure_ascii=False,
                               allow_nan=False) + "\n")


def _write_compare(out: Path, args: argparse.Namespace, rows: list[dict[str, Any]],
                   diffs: dict[str, dict[str, Any]]) -> None:
    doc = {"log": str(args.log), "truth": args.truth, "settings": rows, "diff": diffs}
    (out / "compare.json").write_text(
        json.dumps(doc, indent=2, ensure_ascii=False, allow_nan=False) + "\n",
        encoding="utf-8")
    lines = [f"# Replay lab: {Path(args.log).name}", "",
             "Settings: " + ", ".join(f"`{r['setting']}` ({r['config'] or 'defaults'})"
                                      for r in rows) + ".", "",
             markdown_table(rows), "",
             "Shares are of live assignments; commit lag is fix time (s) from a fix to the "
             "newest fix of its vehicle when its commit was published; µs per fix is "
             "wall time in the pipeline and the only number that differs between runs. "
             "See livematch/lab/compare.py and livematch/lab/truth.py."]
    incidents = incident_lines(rows)
    if incidents:
        lines += ["", "## Incidents of the truth", "",
                  "Delay: the first alert that reports the incident minus its start, s "
                  "(–: missed).", "", *incidents]
    if diffs:
        lines += ["", "## Differences", ""]
        for pair, per_vehicle in diffs.items():
            lines += [f"### {pair}", ""]
            if not per_vehicle:
                lines += ["No difference.", ""]
                continue
            lines += ["| vehicle | live roads | final roads | alerts | first (UTC) | last (UTC) |",
                      "|---|---:|---:|---:|---:|---:|"]
            lines += [f"| {v} | {s['live']} | {s['final']} | {s['alert']} | "
                      f"{clock(s['first'])} | {clock(s['last'])} |"
                      for v, s in per_vehicle.items()]
            lines.append("")
        lines.append("Every difference, one per line: diff.jsonl.")
    (out / "compare.md").write_text("\n".join(lines) + "\n", encoding="utf-8")


def _count_messages(log: str) -> int:
    return sum(1 for _ in read_replay_log(log))


@contextmanager
def _progress(log: str, settings: int) -> Iterator[Callable[[int], None] | None]:
    """A rich progress bar on stderr when it is a terminal; else nothing."""
    if not sys.stderr.isatty():
        yield None
        return
    from rich.console import Console
    from rich.progress import BarColumn, MofNCompleteColumn, Progress, TimeRemainingColumn

    total = _count_messages(log) * settings
    with Progress("[progress.description]{task.description}", BarColumn(),
                  MofNCompleteColumn(), TimeRemainingColumn(),
                  console=Console(file=sys.stderr), transient=True) as progress:
        task = progress.add_task("replaying", total=total)
        yield lambda n: progress.advance(task, n)


def _publish(args: argparse.Namespace) -> int:
    if len(args.config or []) > 1 or args.truth or args.report:
        raise LivematchError("--publish sends the log to a broker; it does not match, so "
                             "--config (more than one), --truth and --report do not apply")
    with _progress(args.log, 1) as advance:
        sent = asyncio.run(publish_log(
            read_replay_log(args.log), args.publish, speed=args.speed,
            username=os.environ.get(USERNAME_ENV), password=os.environ.get(PASSWORD_ENV),
            progress=advance))
    print(f"livematch: published {sent} messages from {args.log} to {args.publish}",
          file=sys.stderr)
    return 0
