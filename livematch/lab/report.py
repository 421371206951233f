"""The comparison table in Markdown and JSON, and a self-contained HTML report.

:func:`markdown_table` renders the rows of :mod:`livematch.lab.compare` side by side
(one column per setting), every cell the JSON value itself (:func:`format_cell`), so the
table and ``compare.json`` cannot disagree.

:func:`write_report` writes one HTML file that opens offline (no scripts, no tile
server, no external files): the table, the differences between settings, and for each
selected vehicle

* a map (projected metres, north up) of the roads nearby, the raw fixes as received, each
  setting's committed path and live matched points, the vehicle's assigned route, the
  geofences nearby and the alerts where they fired;
* a timeline per setting: the eps level that certified each live assignment, and the
  alerts as vertical marks.

Figures are drawn with matplotlib's Agg renderer on :class:`matplotlib.figure.Figure`
objects (no pyplot, no global state) and embedded as base64 PNG ``data:`` URIs.
"""

from __future__ import annotations

import base64
import html
import io
import os
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np
from matplotlib.collections import LineCollection
from matplotlib.figure import Figure

from livematch.core.fix import Fix
from livematch.core.network import RoadNetwork
from livematch.errors import BadMessageError, LivematchError
from livematch.feed.decode import FeedLimits, decode_position
from livematch.feed.replaylog import read_replay_log
from livematch.lab.cli import DEFAULT_VEHICLES
from livematch.lab.compare import format_cell, table_rows, value_at
from livematch.lab.diff import RunOutputs

__all__ = ["DEFAULT_VEHICLES", "VehicleView", "clock", "incident_lines", "markdown_table",
           "png_data_uri", "raw_fixes", "write_report"]

#: Colours of the settings, in order (matplotlib's default cycle).
COLOURS = ("#1f77b4", "#ff7f0e", "#2ca02c", "#d62728", "#9467bd", "#8c564b", "#e377c2",
           "#7f7f7f", "#bcbd22", "#17becf")
#: Map margin around a vehicle's fixes, metres.
MARGIN_M = 150.0


def markdown_table(rows: Sequence[Mapping[str, Any]]) -> str:
    """The side-by-side table: one line per measure, one column per setting.

    Example (degenerate: one setting with one number):
        >>> print(markdown_table([{"setting": "a", "fixes": 3}]))
        | measure | a |
        |---|---:|
        | fixes | 3 |
        | committed share | – |
        | commit lag p50 (s) | – |
        | commit lag p95 (s) | – |
        | µs per fix | – |
    """
    head = "| measure | " + " | ".join(str(r["setting"]) for r in rows) + " |"
    lines = [head, "|---|" + "---:|" * len(rows)]
    for label, key in table_rows(rows):
        cells = " | ".join(format_cell(value_at(r, key)) for r in rows)
        lines.append(f"| {label.strip()} | {cells} |")
    return "\n".join(lines)


def clock(t: float) -> str:
    """An epoch time as UTC date and time to the second, for people to read.

    >>> clock(1780383824.0), clock(0.4)
    ('2026-06-02 07:03:44Z', '1970-01-01 00:00:00Z')
    """
    return datetime.fromtimestamp(t, UTC).strftime("%Y-%m-%d %H:%M:%SZ")


def incident_lines(rows: Sequence[Mapping[str, Any]]) -> list[str]:
    """Markdown table of every scored incident: its alert's delay per setting ("–": missed).

    Example (degenerate: no truth incidents gives no table):
        >>> incident_lines([{"setting": "a"}])
        []
    """
    results = [r.get("incident_results") or [] for r in rows]
    if not any(results):
        return []
    head = "| incident | vehicle | start | alert | " + " | ".join(
        f"{r['setting']} delay (s)" for r in rows) + " |"
    out = [head, "|---|---|---:|---|" + "---:|" * len(rows)]
    for i, inc in enumerate(results[0]):
        delays = [format_cell(res[i]["delay_s"]) if i < len(res) else "–" for res in results]
        out.append(f"| {inc['type']} | {inc['vehicle']} | {clock(inc['start'])} | "
                   f"{inc['alert']} | "
                   + " | ".join(delays) + " |")
    return out


def _markdown_to_html_table(lines: Sequence[str]) -> str:
    if not lines:
        return ""
    cells = [[c.strip() for c in line.strip("|").split("|")] for line in lines]
    head, body = cells[0], cells[2:]
    out = ["<table><thead><tr>", *(f"<th>{html.escape(c)}</th>" for c in head),
           "</tr></thead><tbody>"]
    for row in body:
        out += ["<tr>", *(f"<td>{html.escape(c)}</td>" for c in row), "</tr>"]
    out.append("</tbody></table>")
    return "".join(out)


def html_table(rows: Sequence[Mapping[str, Any]]) -> str:
    """The same table as HTML (sub-rows indented)."""
    out = ["<table><thead><tr><th>measure</th>"]
    out += [f"<th>{html.escape(str(r['setting']))}</th>" for r in rows]
    out.append("</tr></thead><tbody>")
    for label, key in table_rows(rows):
        cls = ' class="sub"' if label.startswith(" ") else ""
        out.append(f"<tr{cls}><td>{html.escape(label.strip())}</td>")
        out += [f"<td>{html.escape(format_cell(value_at(r, key)))}</td>" for r in rows]
        out.append("</tr>")
    out.append("</tbody></table>")
    return "".join(out)


def png_data_uri(fig: Figure, *, dpi: int = 90) -> str:
    """The figure as a ``data:image/png;base64,...`` URI."""
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=dpi, metadata={"Software": None})
    return "data:image/png;base64," + base64.b64encode(buf.getvalue()).decode("ascii")


def raw_fixes(log: str | os.PathLike[str], network: RoadNetwork, limits: FeedLimits,
              vehicles: Sequence[str]) -> dict[str, list[Fix]]:
    """The decodable fixes of ``vehicles`` in the log, as received (rejects skipped)."""
    wanted = set(vehicles)
    out: dict[str, list[Fix]] = {v: [] for v in vehicles}
    for entry in read_replay_log(log):
        try:
            fix = decode_position(entry.topic, entry.payload, network.projection, limits)
        except BadMessageError:
            continue
        if fix.vehicle in wanted:
            out[fix.vehicle].append(fix)
    return out


@dataclass(frozen=True)
class VehicleView:
    """What the report draws of one vehicle, besides the runs' outputs.

    Attributes:
        vehicle: its id.
        fixes: its raw fixes as received.
        route: its assigned route's polyline (metres) and id, if any.
        fences: (id, polygon in metres) of the fences near it.
    """

    vehicle: str
    fixes: Sequence[Fix]
    route: tuple[str, np.ndarray] | None = None
    fences: Sequence[tuple[str, Any]] = ()


def _xy(network: RoadNetwork, lon: float, lat: float) -> tuple[float, float]:
    x, y = network.projection.to_xy(lon, lat)
    return float(x), float(y)


def _segments(network: RoadNetwork, lookup: Mapping[tuple[int, int, int], int],
              roads: Sequence[Mapping[str, Any]]) -> list[list[tuple[float, float]]]:
    out = []
    for r in roads:
        s = lookup.get((r["way"], r["from_node"], r["to_node"]))
        if s is not None:
            ax, ay, bx, by = network.segment_coords(s)
            out.append([(float(ax), float(ay)), (float(bx), float(by))])
    return out


def vehicle_map(network: RoadNetwork, lookup: Mapping[tuple[int, int, int], int],
                view: VehicleView, runs: Sequence[tuple[str, RunOutputs]]) -> Figure:
    """The map of one vehicle (see the module docstring)."""
    fig = Figure(figsize=(7.5, 7.0))
    ax = fig.add_subplot()
    xs = np.array([f.x for f in view.fixes])
    ys = np.array([f.y for f in view.fixes])
    if len(xs):
        x0, x1 = float(xs.min()) - MARGIN_M, float(xs.max()) + MARGIN_M
        y0, y1 = float(ys.min()) - MARGIN_M, float(ys.max()) + MARGIN_M
        a = network.node_xy[network.seg_from]
        b = network.node_xy[network.seg_to]
        near = ((np.maximum(a[:, 0], b[:, 0]) >= x0) & (np.minimum(a[:, 0], b[:, 0]) <= x1)
                & (np.maximum(a[:, 1], b[:, 1]) >= y0) & (np.minimum(a[:, 1], b[:, 1]) <= y1))
        ax.add_collection(LineCollection(list(np.stack([a[near], b[near]], axis=1)),
                                         colors="#d0d0d0", linewidths=1.0, zorder=1))
        ax.set_xlim(x0, x1)
        ax.set_ylim(y0, y1)
    for fence_id, geometry in view.fences:
        for poly in getattr(geometry, "geoms", [geometry]):
            fx, fy = poly.exterior.xy
            ax.fill(fx, fy, color="#9467bd", alpha=0.12, zorder=2)
            ax.plot(fx, fy, color="#9467bd", linewidth=0.8, zorder=2)
            cx, cy = poly.representative_point().coords[0]
            ax.annotate(fence_id, (cx, cy), fontsize=6, color="#6a4c93", ha="center")
    if view.route is not None:
        route_id, rxy = view.route
        ax.plot(rxy[:, 0], rxy[:, 1], color="black", linestyle="--", linewidth=1.2,
                zorder=3, label=f"route {route_id}")
    ax.scatter(xs, ys, s=6, color="#555555", zorder=4, label="raw fixes")
    for i, (name, run) in enumerate(runs):
        colour = COLOURS[i % len(COLOURS)]
        roads = [p for c in run.commits if c["vehicle"] == view.vehicle for p in c["path"]]
        segs = _segments(network, lookup, roads)
        if segs:
            ax.add_collection(LineCollection(segs, colors=colour, linewidths=2.5, alpha=0.7,
                                             zorder=5))
        live = [_xy(network, a["lon"], a["lat"]) for a in run.assignments
                if a["vehicle"] == view.vehicle]
        if live:
            lx, ly = zip(*live, strict=True)
            ax.scatter(lx, ly, s=4, color=colour, zorder=6, label=f"{name}: matched")
        for alert in run.alerts:
            if alert["vehicle"] != view.vehicle or "lat" not in alert:
                continue
            px, py = _xy(network, alert["lon"], alert["lat"])
            ax.scatter([px], [py], marker="X", s=70, color=colour, edgecolors="black",
                       linewidths=0.5, zorder=7)
            ax.annotate(f"{alert['kind']}", (px, py), xytext=(4, 4 + 8 * i),
                        textcoords="offset points", fontsize=7, color=colour)
    ax.set_aspect("equal", adjustable="box")
    ax.set_xlabel("x (m, east)")
    ax.set_ylabel("y (m, north)")
    ax.set_title(f"{view.vehicle}: raw fixes, matched path, route, fences, alerts")
    ax.legend(loc="upper left", fontsize=7, markerscale=2)
    fig.tight_layout()
    return fig


def vehicle_timeline(view: VehicleView, runs: Sequence[tuple[str, RunOutputs]]) -> Figure:
    """The eps level of each live assignment and the alerts, one row per setting."""
    n = max(1, len(runs))
    fig = Figure(figsize=(9.0, 1.2 + 1.4 * n))
    axes = fig.subplots(n, 1, sharex=True, squeeze=False)[:, 0]
    t0 = min((f.t for f in view.fixes), default=0.0)
    for i, (ax, (name, run)) in enumerate(zip(axes, runs, strict=False)):
        colour = COLOURS[i % len(COLOURS)]
        rows = sorted((a["time"], a["eps_m"]) for a in run.assignments
                      if a["vehicle"] == view.vehicle)
        if rows:
            t, eps = zip(*rows, strict=True)
            ax.step([(v - t0) / 60.0 for v in t], eps, where="post", color=colour,
                    linewidth=1.2)
        for alert in run.alerts:
            if alert["vehicle"] != view.vehicle:
                continue
            m = (float(alert["time"]) - t0) / 60.0
            ax.axvline(m, color="#d62728", linewidth=0.8, alpha=0.8)
            ax.annotate(alert["kind"], (m, 1.0), xycoords=("data", "axes fraction"),
                        rotation=90, va="top", ha="right", fontsize=6, color="#d62728")
        ax.set_ylabel(f"{name}\neps (m)", fontsize=8)
        ax.grid(alpha=0.3)
    axes[-1].set_xlabel("minutes since the vehicle's first fix")
    fig.suptitle(f"{view.vehicle}: eps level of each live assignment, alerts", fontsize=10)
    fig.tight_layout()
    return fig


def _diff_html(summary: Mapping[str, Mapping[str, Mapping[str, Any]]]) -> str:
    if not summary:
        return ""
    out = ["<h2>Differences</h2>"]
    for pair, per_vehicle in summary.items():
        out.append(f"<h3>{html.escape(pair)}</h3>")
        if not per_vehicle:
            out.append("<p>No difference.</p>")
            continue
        out.append("<table><thead><tr><th>vehicle</th><th>live road</th><th>final road</th>"
                   "<th>alerts</th><th>first</th><th>last</th></tr></thead><tbody>")
        for vehicle, s in per_vehicle.items():
            out.append(f"<tr><td>{html.escape(vehicle)}</td><td>{s['live']}</td>"
                       f"<td>{s['final']}</td><td>{s['alert']}</td><td>{clock(s['first'])}"
                       f"</td><td>{clock(s['last'])}</td></tr>")
        out.append("</tbody></table>")
    return "".join(out)


_CSS = """
body{font-family:system-ui,sans-serif;margin:2em;max-width:1100px;color:#222}
table{border-collapse:collapse;margin:1em 0;font-size:13px}
th,td{border:1px solid #ccc;padding:3px 8px;text-align:right}
th:first-child,td:first-child{text-align:left}
tr.sub td:first-child{padding-left:2em;color:#555}
img{max-width:100%;border:1px solid #ddd;margin:0.5em 0}
code{background:#f4f4f4;padding:0 3px}
"""


def write_report(path: str | os.PathLike[str], *, title: str,
                 rows: Sequence[Mapping[str, Any]], network: RoadNetwork,
                 lookup: Mapping[tuple[int, int, int], int],
                 runs: Sequence[tuple[str, RunOutputs]], views: Sequence[VehicleView],
                 diff_summary: Mapping[str, Mapping[str, Mapping[str, Any]]] | None = None,
                 notes: Sequence[str] = ()) -> Path:
    """Write the HTML report (see the module docstring); returns its path.

    Raises:
        LivematchError: the file cannot be written.
    """
    parts = [
        "<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>",
        f"<title>{html.escape(title)}</title><style>{_CSS}</style></head><body>",
        f"<h1>{html.escape(title)}</h1>",
    ]
    parts += [f"<p>{html.escape(note)}</p>" for note in notes]
    parts += ["<h2>Settings side by side</h2>", html_table(rows)]
    incidents = incident_lines(rows)
    if incidents:
        parts += ["<h2>Incidents of the truth</h2>", _markdown_to_html_table(incidents)]
    parts.append(_diff_html(diff_summary or {}))
    for view in views:
        parts.append(f"<h2>Vehicle {html.escape(view.vehicle)}</h2>")
        if not view.fixes:
            parts.append("<p>No decodable fix of this vehicle in the log.</p>")
            continue
        for fig, alt in ((vehicle_map(network, lookup, view, runs), "map"),
                         (vehicle_timeline(view, runs), "timeline")):
            parts.append(f"<img alt='{alt} of {html.escape(view.vehicle)}' "
                         f"src='{png_data_uri(fig)}'>")
    parts.append("</body></html>\n")
    out = Path(path)
    try:
        out.write_text("\n".join(parts), encoding="utf-8")
    except OSError as exc:
        raise LivematchError(f"cannot write report {str(out)!r}: {exc}") from exc
    return out

