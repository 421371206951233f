"""An invented fleet day in Larkmoor: bus lines, delivery vans and scripted incidents.

:func:`build_scenario` is pure and seeded (one :class:`numpy.random.Generator` made from
``seed``; no wall clock, no I/O): the same arguments give the same scenario, to the bit.
The default (:data:`SAMPLE_FLEET`, 600 s) is the shipped sample; the live demo asks for
more vehicles and time, e.g. ``build_scenario(buses=LIVE_FLEET, duration_s=1200)``
(12 vehicles, about 10 400 messages, built in about a second).

What happens (units: metres, seconds; positions in the town's projected CRS):

* **Bus lines** L1–L4 run loops through Larkmoor (:data:`LINES`): each loop is the
  shortest-path chain through the line's turning points on the town graph (one-way
  streets and the roundabout respected). Buses of a line start spread along the loop,
  cruise at their road class's speed (:data:`livematch.sim.drive.ROAD_CLASS_SPEED`, scaled
  per bus), slow down for turns and dwell 15–30 s at each of the line's stops.
* **Delivery vans** leave Larkmoor Depot one after the other, visit three customers in
  their zone (dwelling 60–120 s at each) and return. A van's zone is a strip of the town
  plus the band south of the grid where the depot is; its legs are routed inside its
  zone. Every customer has a 50 m square geofence.
* **Incidents** (scripted, listed with their times):

  - ``detour``: Tanner Row is closed between Rowan Street and Larch Street
    (:data:`CLOSED_STREET`), so every L2 bus leaves its route there and drives round the
    block on Bridge Street, about 200 m from the route, and comes back;
  - ``zone_exit``: van-3 first delivers to a customer in the next zone east, about 200 m
    outside its own zone;
  - ``silent``: bus-31 sends nothing for 150 s (it keeps driving);
  - ``outlier``: six single fixes jump 80–250 m in a random direction;
  - ``degraded``: between the tall buildings of the centre
    (:data:`livematch.demo.town.CENTRE_BOX`) the GPS error grows (an extra Gauss–Markov
    error, 18 m per axis, time constant 15 s, blended in over about 5 s) and the reported
    accuracy is 30–80 m; elsewhere it is 4 m per axis (time constant 45 s) and about 6 m.

Outputs:

* :meth:`Scenario.messages`: every published position message as ``(at, topic,
  payload)`` in receive order (``at``, then vehicle): the topic is
  ``fleet/<vehicle>/position``, the payload ``{"vehicle", "time" (epoch s), "lat",
  "lon" (WGS84, 1e-7 degree), "accuracy" (m), "route"}`` (``route`` only for buses).
  ``at`` is ``time`` plus a receive delay of 0.2–0.9 s. A publisher paces these by
  ``at``.
* :meth:`Scenario.truth_records`: the truth file (``livematch-demo-truth``, version 1),
  JSON Lines records distinguished by ``kind``, modelled on the simulator's
  ``livematch-sim-truth`` (:mod:`livematch.sim.logs`):

  - ``header`` (first): ``format``, ``version``, ``crs`` (of every ``x``/``y``),
    ``network`` (``"Larkmoor"``), ``seed``, ``start_time``, ``duration_s``,
    ``degraded_area`` (polygon, metres), ``closed_street`` and ``vehicles`` (``vehicle``,
    ``kind`` ``"bus"``/``"van"``, ``route``, ``zone``, ``interval_s``);
  - ``path``, one per vehicle before its fixes: ``vehicle``, ``segments`` (the directed
    segments truly driven, each ``{"way", "from_node", "to_node"}``), ``length_m``;
  - ``fix``, one per *scheduled* report (every ``interval_s``), published or not:
    ``vehicle``, ``time``; the true ``x``, ``y``, ``lat``, ``lon``; the true segment
    ``way``, ``from_node``, ``to_node``, ``offset_m``, ``path_index``, ``path_pos_m``;
    ``silent`` (true: no message was sent for this report); ``outlier``; ``degraded``
    (true position between the tall buildings); ``accuracy`` (as reported); ``obs_lat``,
    ``obs_lon`` (as published, null when silent); for buses ``route_dist_m`` (true
    distance from the route line) and ``off_route`` (``route_dist_m`` > 20 m); for vans
    ``in_zone`` (true position inside the van's zone) and ``fences`` (ids of the
    customer/depot fences holding the true position);
  - ``incident``, after all fixes: ``type`` (``detour``, ``zone_exit``, ``silent``,
    ``outlier``, ``degraded``), ``vehicle``, ``start``, ``end`` (times of the first and
    last affected report) and facts: ``max_dist_m`` and ``route`` (detour),
    ``max_dist_m`` and ``zone`` (zone_exit), ``gap_s`` (silent: from the last report
    before to the first after), ``jump_m`` (outlier), ``area`` (degraded).

  The key into the replay log is (``vehicle``, ``time``), as for the simulator's truth.

Example (a short, small run):
    >>> s = build_scenario(duration_s=20.0, buses={"L1": 1}, vans=1)
    >>> [v.id for v in s.vehicles]
    ['bus-11', 'van-1']
    >>> msgs = s.messages()
    >>> first = next(m for m in msgs if m.payload["vehicle"] == "bus-11")
    >>> first.topic, sorted(first.payload)
    ('fleet/bus-11/position', ['accuracy', 'lat', 'lon', 'route', 'time', 'vehicle'])
"""

from __future__ import annotations

import itertools
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any, NamedTuple

import networkx as nx
import numpy as np
import numpy.typing as npt
import shapely

from livematch.core.network import RoadNetwork
from livematch.demo.town import Town, build_town
from livematch.sim.drive import DEFAULT_SPEED, ROAD_CLASS_SPEED, gauss_markov

__all__ = [
    "CLOSED_STREET",
    "LINES",
    "LIVE_FLEET",
    "SAMPLE_FLEET",
    "START_TIME",
    "TRUTH_FORMAT",
    "TRUTH_VERSION",
    "BusLine",
    "Fence",
    "Message",
    "Scenario",
    "Track",
    "Vehicle",
    "build_scenario",
]

TRUTH_FORMAT = "livematch-demo-truth"
TRUTH_VERSION = 1
#: 2026-06-02T07:00:00Z, the sample's first second (an invented Tuesday morning).
START_TIME = 1_780_383_600.0
TOPIC = "fleet/{vehicle}/position"
OFF_ROUTE_M = 20.0  # a bus farther than this from its route line is off route (truth)

#: Bus lines: id -> (name, turning points in metres, in driving order; the loop closes).
LINES: dict[str, tuple[str, tuple[tuple[float, float], ...]]] = {
    "L1": ("Weir Road - Thistle Street", ((-1000.0, 95.0), (1000.0, 95.0), (1000.0, 400.0),
                                          (-1000.0, 400.0))),
    "L2": ("Quarry Street - Tanner Row", ((-1000.0, -600.0), (1000.0, -600.0),
                                          (1000.0, -200.0), (-1000.0, -200.0))),
    "L3": ("Flax Street - Osier Street", ((-400.0, -1000.0), (-400.0, 800.0),
                                          (-200.0, 800.0), (-200.0, -1000.0))),
    "L4": ("Millrace Way - Ring", ((-1176.777, -1176.777), (0.0, 0.0),
                                   (1176.777, 1176.777), (1250.0, 0.0),
                                   (0.0, -1250.0))),
}
#: Vehicles of the shipped sample: buses per line (plus 4 vans: 10 vehicles).
SAMPLE_FLEET: dict[str, int] = {"L1": 2, "L2": 2, "L3": 1, "L4": 1}
#: A fleet for the live demo: two buses per line (plus 4 vans: 12 vehicles).
LIVE_FLEET: dict[str, int] = {"L1": 2, "L2": 2, "L3": 2, "L4": 2}
#: The closed street of the detour: name and the x range of the closed block on y = -200.
CLOSED_STREET = ("Tanner Row", -200.0, 400.0, 600.0)
#: Delivery zones (strips of the town, x ranges) plus the depot band y < -990.
ZONES: tuple[tuple[str, str, float, float], ...] = (
    ("zone-W", "Delivery zone West", -1350.0, -495.0),
    ("zone-CW", "Delivery zone Centre West", -495.0, 105.0),
    ("zone-CE", "Delivery zone Centre East", 105.0, 695.0),
    ("zone-E", "Delivery zone East", 695.0, 1350.0),
)
DEPOT_BAND = (-1350.0, -1350.0, 1350.0, -990.0)
ZONE_EXIT_CUSTOMER = (900.0, 400.0)  # van-3's customer outside its zone (zone-CE)
ZONE_EXIT_GATE = (600.0, 400.0)  # where van-3 leaves and re-enters its zone
SILENT = ("bus-31", 240.0, 390.0)  # vehicle, first and last+1 silent second offsets

FloatArray = npt.NDArray[np.float64]


class Message(NamedTuple):
    """One position message as received: time (epoch s), topic, payload object."""

    at: float
    topic: str
    payload: dict[str, Any]


@dataclass(frozen=True)
class BusLine:
    """A bus line: a closed loop route through its stops.

    Attributes:
        id: route id as sent in messages (``"L1"``...).
        name: invented description.
        path: directed segments of one loop, in order.
        xy: (n, 2) route polyline in metres (first point == last point).
        stops: names of the town's stops on the loop, in driving order.
    """

    id: str
    name: str
    path: tuple[int, ...]
    xy: FloatArray
    stops: tuple[str, ...]

    @property
    def line(self) -> shapely.LineString:
        """The route as a shapely LineString in metres."""
        return shapely.LineString(self.xy)


@dataclass(frozen=True)
class Fence:
    """A geofence: ``kind`` is ``"customer"``, ``"depot"`` or ``"zone"`` (metres polygon).

    ``vehicles`` are the vans it concerns: the van whose zone or customer it is, every
    van for the depot. In GeoJSON they become ``properties.vehicles``, which
    :mod:`livematch.mapdata.fences` reads as the vehicles the fence watches.
    """

    id: str
    name: str
    kind: str
    polygon: shapely.Polygon
    vehicles: tuple[str, ...]


@dataclass(frozen=True)
class Vehicle:
    """A vehicle of the scenario: id, kind (bus/van), route or zone, report interval."""

    id: str
    kind: str
    route: str | None
    zone: str | None
    interval_s: int


@dataclass(frozen=True)
class Track:
    """A vehicle's truth and observations, one row per scheduled report.

    Arrays have one entry per report (times ``start_time + k * interval_s``); ``seg``
    etc. describe the true position, ``obs_*`` what was (or would have been) sent.
    """

    vehicle: Vehicle
    path: tuple[int, ...]
    t: FloatArray
    x: FloatArray
    y: FloatArray
    seg: npt.NDArray[np.int64]
    offset: FloatArray
    path_index: npt.NDArray[np.int64]
    path_pos: FloatArray
    obs_x: FloatArray
    obs_y: FloatArray
    accuracy: FloatArray
    delay: FloatArray
    outlier: npt.NDArray[np.bool_]
    silent: npt.NDArray[np.bool_]
    degraded: npt.NDArray[np.bool_]
    route_dist: FloatArray | None
    in_zone: npt.NDArray[np.bool_] | None
    fences: tuple[tuple[str, ...], ...] | None


@dataclass(frozen=True)
class Scenario:
    """The generated scenario (see the module docstring)."""

    town: Town
    seed: int
    start_time: float
    duration_s: float
    lines: tuple[BusLine, ...]
    fences: tuple[Fence, ...]
    vehicles: tuple[Vehicle, ...]
    tracks: tuple[Track, ...]
    incidents: tuple[dict[str, Any], ...]

    def messages(self) -> list[Message]:
        """Every published message, in receive order (``at``, then vehicle)."""
        proj = self.town.network.projection
        out: list[Message] = []
        for tr in self.tracks:
            lon, lat = proj.to_lonlat(tr.obs_x, tr.obs_y)
            for k in np.flatnonzero(~tr.silent).tolist():
                payload: dict[str, Any] = {
                    "vehicle": tr.vehicle.id, "time": float(tr.t[k]),
                    "lat": round(float(lat[k]), 7), "lon": round(float(lon[k]), 7),
                    "accuracy": float(tr.accuracy[k]),
                }
                if tr.vehicle.route is not None:
                    payload["route"] = tr.vehicle.route
                out.append(Message(round(float(tr.t[k] + tr.delay[k]), 3),
                                   TOPIC.format(vehicle=tr.vehicle.id), payload))
        out.sort(key=lambda m: (m.at, m.payload["vehicle"]))
        return out

    def truth_records(self) -> list[dict[str, Any]]:
        """The truth file's records: header, per vehicle path and fixes, then incidents."""
        net = self.town.network
        proj = net.projection
        out: list[dict[str, Any]] = [{
            "kind": "header", "format": TRUTH_FORMAT, "version": TRUTH_VERSION,
            "crs": proj.crs, "network": self.town.name, "seed": self.seed,
            "start_time": self.start_time, "duration_s": self.duration_s,
            "degraded_area": _rounded_coords(self.town.centre),
            "closed_street": {"name": CLOSED_STREET[0], "y": CLOSED_STREET[1],
                              "x_from": CLOSED_STREET[2], "x_to": CLOSED_STREET[3]},
            "vehicles": [{"vehicle": v.id, "kind": v.kind, "route": v.route, "zone": v.zone,
                          "interval_s": v.interval_s} for v in self.vehicles],
        }]
        for tr in self.tracks:
            used = tr.path[: int(tr.path_index.max()) + 1]
            out.append({"kind": "path", "vehicle": tr.vehicle.id,
                        "segments": [_ids(net, s) for s in used],
                        "length_m": round(float(net.seg_len[list(used)].sum()), 3)})
            lon, lat = proj.to_lonlat(tr.x, tr.y)
            olon, olat = proj.to_lonlat(tr.obs_x, tr.obs_y)
            for k in range(len(tr.t)):
                silent = bool(tr.silent[k])
                rec: dict[str, Any] = {
                    "kind": "fix", "vehicle": tr.vehicle.id, "time": float(tr.t[k]),
                    "x": round(float(tr.x[k]), 3), "y": round(float(tr.y[k]), 3),
                    "lat": round(float(lat[k]), 7), "lon": round(float(lon[k]), 7),
                    **_ids(net, int(tr.seg[k])), "offset_m": round(float(tr.offset[k]), 3),
                    "path_index": int(tr.path_index[k]),
                    "path_pos_m": round(float(tr.path_pos[k]), 3),
                    "silent": silent, "outlier": bool(tr.outlier[k]),
                    "degraded": bool(tr.degraded[k]), "accuracy": float(tr.accuracy[k]),
                    "obs_lat": None if silent else round(float(olat[k]), 7),
                    "obs_lon": None if silent else round(float(olon[k]), 7),
                }
                if tr.route_dist is not None:
                    rec["route_dist_m"] = round(float(tr.route_dist[k]), 1)
                    rec["off_route"] = bool(tr.route_dist[k] > OFF_ROUTE_M)
                if tr.in_zone is not None and tr.fences is not None:
                    rec["in_zone"] = bool(tr.in_zone[k])
                    rec["fences"] = list(tr.fences[k])
                out.append(rec)
        out.extend({"kind": "incident", **inc} for inc in self.incidents)
        return out

    def routes_geojson(self) -> dict[str, Any]:
        """Bus routes as GeoJSON LineStrings (``id`` = route id) with their stops."""
        proj = self.town.network.projection
        features = []
        for line in self.lines:
            stops = []
            for name in line.stops:
                p = self.town.place(name)
                lon, lat = proj.to_lonlat(p.x, p.y)
                stops.append({"name": name, "lon": round(float(lon), 7),
                              "lat": round(float(lat), 7)})
            features.append({
                "type": "Feature", "id": line.id,
                "properties": {"name": line.name, "length_m": round(line.line.length, 1),
                               "stops": stops},
                "geometry": {"type": "LineString", "coordinates": _lonlat_list(
                    self.town, line.xy)},
            })
        return {"type": "FeatureCollection", "features": features}

    def fences_geojson(self) -> dict[str, Any]:
        """Geofences (customers, depot, van zones) as GeoJSON Polygons with ids."""
        features = []
        for fence in self.fences:
            ring = np.asarray(fence.polygon.exterior.coords)
            features.append({
                "type": "Feature", "id": fence.id,
                "properties": {"name": fence.name, "kind": fence.kind,
                               "vehicles": list(fence.vehicles)},
                "geometry": {"type": "Polygon",
                             "coordinates": [_lonlat_list(self.town, ring)]},
            })
        return {"type": "FeatureCollection", "features": features}

    def summary(self) -> dict[str, Any]:
        """Counts: vehicles by kind, messages, reports, and incidents by type."""
        kinds: dict[str, int] = {}
        for inc in self.incidents:
            kinds[inc["type"]] = kinds.get(inc["type"], 0) + 1
        return {
            "vehicles": len(self.vehicles),
            "buses": sum(v.kind == "bus" for v in self.vehicles),
            "vans": sum(v.kind == "van" for v in self.vehicles),
            "reports": int(sum(len(tr.t) for tr in self.tracks)),
            "messages": int(sum(int((~tr.silent).sum()) for tr in self.tracks)),
            "incidents": dict(sorted(kinds.items())),
        }


def _ids(network: RoadNetwork, segment: int) -> dict[str, int]:
    way, from_node, to_node = network.source_ids(segment)
    return {"way": way, "from_node": from_node, "to_node": to_node}


def _rounded_coords(polygon: shapely.Polygon) -> list[list[float]]:
    return [[round(float(x), 3), round(float(y), 3)] for x, y in polygon.exterior.coords]


def _lonlat_list(town: Town, xy: FloatArray) -> list[list[float]]:
    lon, lat = town.network.projection.to_lonlat(xy[:, 0], xy[:, 1])
    return [[round(float(a), 7), round(float(b), 7)] for a, b in zip(lon, lat, strict=True)]


# --- routing on the town graph ---------------------------------------------------------

def _graph(network: RoadNetwork, allowed: npt.NDArray[np.bool_] | None = None) -> nx.DiGraph:
    """The network as a networkx DiGraph: vertices, edges with ``seg`` and ``weight``."""
    graph = nx.DiGraph()
    graph.add_nodes_from(range(network.n_vertices))
    for s in range(network.n_segments):
        if allowed is None or allowed[s]:
            graph.add_edge(int(network.seg_from[s]), int(network.seg_to[s]), seg=s,
                           weight=float(network.seg_len[s]))
    return graph


def _vertex_at(network: RoadNetwork, x: float, y: float) -> int:
    d = np.hypot(network.node_xy[:, 0] - x, network.node_xy[:, 1] - y)
    return int(np.argmin(d))


def _leg(graph: nx.DiGraph, a: int, b: int) -> list[int]:
    """Segments of the shortest path from vertex a to vertex b (empty when a == b)."""
    nodes = nx.shortest_path(graph, a, b, weight="weight")
    return [int(graph.edges[u, v]["seg"]) for u, v in itertools.pairwise(nodes)]


def _polyline(network: RoadNetwork, path: Sequence[int]) -> FloatArray:
    idx = [int(network.seg_from[path[0]])] + [int(network.seg_to[s]) for s in path]
    return np.asarray(network.node_xy[idx], dtype=float)


def _lines(town: Town, graph: nx.DiGraph) -> tuple[BusLine, ...]:
    net = town.network
    stop_at = {p.vertex: p.name for p in town.stops()}
    out = []
    for line_id, (name, turns) in LINES.items():
        verts = [_vertex_at(net, x, y) for x, y in turns]
        path: list[int] = []
        for a, b in zip(verts, [*verts[1:], verts[0]], strict=True):
            path.extend(_leg(graph, a, b))
        stops = tuple(stop_at[int(net.seg_to[s])] for s in path if int(net.seg_to[s]) in stop_at)
        out.append(BusLine(line_id, name, tuple(path), _polyline(net, path), stops))
    return tuple(out)


# --- motion ------------------------------------------------------------------------------

_DT = 0.2  # integration step, s
_ACCEL, _DECEL = 1.2, 1.8  # gentle bus/van acceleration and braking, m/s^2 (common practice)


def _move(network: RoadNetwork, path: Sequence[int], stops: Sequence[tuple[float, float]],
          start_pos: float, wait_s: float, seconds: int, factor: float) -> FloatArray:
    """Distance along ``path`` at each whole second 0..seconds (a simple speed controller).

    Cruise at the road class speed times ``factor``; take turns at ``cos^2(turn / 2)`` of
    it (at least 0.2; the idea of :mod:`livematch.sim.drive`); stop ``dwell`` s at each
    ``(position, dwell)`` of ``stops``; first wait ``wait_s``. Stays at the path's end.
    """
    seg = np.asarray(path, dtype=np.int64)
    lens = network.seg_len[seg]
    start = np.concatenate([[0.0], np.cumsum(lens)[:-1]])
    total = float(start[-1] + lens[-1])
    cruise = np.array([ROAD_CLASS_SPEED.get(
        str(network.roads[int(network.seg_road[s])].get("highway")), DEFAULT_SPEED) * factor
        for s in seg])
    d = network.node_xy[network.seg_to[seg]] - network.node_xy[network.seg_from[seg]]
    unit = d / np.maximum(lens, 1e-9)[:, None]
    # constraints: (position, target speed, dwell); turns where the corner slows us down
    cons: list[tuple[float, float, float]] = []
    for k in range(1, len(seg)):
        cos_turn = float(np.clip(unit[k] @ unit[k - 1], -1.0, 1.0))
        corner = max(0.2, (1.0 + cos_turn) / 2.0)
        if corner < 0.97:
            cons.append((float(start[k]), min(cruise[k - 1], cruise[k]) * corner, 0.0))
    cons.extend((pos, 0.0, dwell) for pos, dwell in stops)
    cons.sort()
    s, v, dwell = start_pos, 0.0, wait_s
    nxt = int(np.searchsorted([c[0] for c in cons], s, side="right"))
    out = [s]
    per = round(1.0 / _DT)
    step = 0
    while len(out) <= seconds:
        step += 1
        if dwell > 0.0:
            dwell -= _DT
        else:
            k = min(max(int(np.searchsorted(start, s, side="right")) - 1, 0), len(seg) - 1)
            allowed = float(cruise[k])
            j = nxt
            while j < len(cons) and cons[j][0] - s < 250.0:
                gap = max(0.0, cons[j][0] - s)
                limit = math.sqrt(cons[j][1] ** 2 + 2.0 * _DECEL * gap)
                if cons[j][2] > 0.0:
                    allowed = min(allowed, max(1.0, limit))
                    break
                allowed = min(allowed, limit)
                j += 1
            v = min(allowed, v + _ACCEL * _DT)
            ds = v * _DT
            while nxt < len(cons) and cons[nxt][0] <= s + ds:
                if cons[nxt][2] > 0.0:
                    ds, v, dwell = cons[nxt][0] - s, 0.0, cons[nxt][2]
                    nxt += 1
                    break
                nxt += 1
            s = min(total, s + ds)
        if step % per == 0:
            out.append(s)
    return np.asarray(out)


def _locate(network: RoadNetwork, path: Sequence[int], pos: FloatArray
            ) -> tuple[npt.NDArray[np.int64], FloatArray, FloatArray, FloatArray]:
    """(path index, offset along the segment, x, y) of distances ``pos`` along ``path``."""
    seg = np.asarray(path, dtype=np.int64)
    lens = network.seg_len[seg]
    start = np.concatenate([[0.0], np.cumsum(lens)[:-1]])
    k = np.clip(np.searchsorted(start, pos, side="right") - 1, 0, len(seg) - 1)
    offset = np.clip(pos - start[k], 0.0, lens[k])
    a = network.node_xy[network.seg_from[seg[k]]]
    b = network.node_xy[network.seg_to[seg[k]]]
    f = np.where(lens[k] > 0.0, offset / np.maximum(lens[k], 1e-12), 0.0)
    xy = a + f[:, None] * (b - a)
    return k.astype(np.int64), offset, xy[:, 0], xy[:, 1]


def _stops_on(network: RoadNetwork, path: Sequence[int], vertices: Mapping[int, float]
              ) -> list[tuple[float, float]]:
    """(position, dwell) for every arrival of ``path`` at one of ``vertices``."""
    out = []
    pos = 0.0
    for s in path:
        pos += float(network.seg_len[s])
        dwell = vertices.get(int(network.seg_to[s]))
        if dwell is not None:
            out.append((pos, dwell))
    return out


# --- the scenario ------------------------------------------------------------------------

def _closed_segments(town: Town) -> set[int]:
    net = town.network
    name, y, x0, x1 = CLOSED_STREET
    a, b = net.node_xy[net.seg_from], net.node_xy[net.seg_to]
    mask = ((a[:, 1] == y) & (b[:, 1] == y) & (np.minimum(a[:, 0], b[:, 0]) >= x0)
            & (np.maximum(a[:, 0], b[:, 0]) <= x1))
    segs = {int(s) for s in np.flatnonzero(mask) if net.road_name(int(s)) == name}
    return segs


def _zone_polygons() -> dict[str, shapely.Polygon]:
    band = shapely.box(*DEPOT_BAND)
    return {zid: shapely.union(shapely.box(x0, -1350.0, x1, 1350.0), band).normalize()
            for zid, _, x0, x1 in ZONES}


def _inside_segments(network: RoadNetwork, polygon: shapely.Polygon) -> npt.NDArray[np.bool_]:
    a, b = network.node_xy[network.seg_from], network.node_xy[network.seg_to]
    return (shapely.contains_xy(polygon, a[:, 0], a[:, 1])
            & shapely.contains_xy(polygon, b[:, 0], b[:, 1]))


def build_scenario(
    town: Town | None = None,
    *,
    seed: int = 2026,
    start_time: float = START_TIME,
    duration_s: float = 600.0,
    buses: Mapping[str, int] = SAMPLE_FLEET,
    vans: int = 4,
    bus_interval_s: int = 1,
    van_interval_s: int = 5,
) -> Scenario:
    """Generate the scenario (pure; the same arguments give the same result).

    Args:
        town: the town (default :func:`~livematch.demo.town.build_town`).
        seed: seeds the one random generator (speeds, dwells, customers, errors).
        start_time: epoch seconds of the first report.
        duration_s: seconds of driving; reports at 0, interval, ... up to it.
        buses: buses per line id of :data:`LINES` (ids ``bus-<line digit><n>``).
        vans: number of vans (at most 4, one per zone; ids ``van-1``...).
        bus_interval_s, van_interval_s: report interval of buses and vans, whole seconds.
    """
    if not 0 <= vans <= len(ZONES):
        raise ValueError(f"vans must be between 0 and {len(ZONES)}, got {vans}")
    unknown = sorted(set(buses) - set(LINES))
    if unknown:
        raise ValueError(f"unknown bus lines {unknown}; known: {sorted(LINES)}")
    town = town or build_town()
    net = town.network
    rng = np.random.default_rng(seed)
    seconds = int(duration_s)
    graph = _graph(net)
    lines = _lines(town, graph)
    closed = _closed_segments(town)
    open_graph = _graph(net, np.array([s not in closed for s in range(net.n_segments)]))
    stop_vertex = {p.name: p.vertex for p in town.stops()}
    centre = town.centre

    fences: list[Fence] = [Fence("depot", "Larkmoor Depot", "depot", town.depot_area,
                                  tuple(f"van-{z + 1}" for z in range(vans)))]
    zones = _zone_polygons()
    tracks: list[Track] = []
    incidents: list[dict[str, Any]] = []
    plans: list[tuple[Vehicle, list[int], list[tuple[float, float]], float, float, float]] = []

    for line in lines:
        count = buses.get(line.id, 0)
        loop = list(line.path)
        loop_len = float(net.seg_len[loop].sum())
        for n in range(count):
            vehicle = Vehicle(f"bus-{line.id[1:]}{n + 1}", "bus", line.id, None,
                              bus_interval_s)
            phase = (rng.uniform(0.0, 1.0) + n / count) % 1.0 * loop_len
            if line.id == "L2" and n == 0:
                phase = _phase_before_closure(net, loop, closed, 1300.0)
            path, pos = _rotate(net, loop, phase, repeat=1 + int(seconds * 16.0 / loop_len))
            while path[0] in closed:  # a bus starting inside the closed block leaves it
                path, pos = path[1:], 0.0
            path = _detour(net, path, closed, open_graph)
            dwell = {stop_vertex[s]: float(rng.uniform(15.0, 30.0)) for s in line.stops}
            plans.append((vehicle, path, _stops_on(net, path, dwell), pos, 0.0,
                          float(rng.uniform(0.8, 0.95))))

    depot = town.place("Larkmoor Depot").vertex
    for z in range(vans):
        zid, zname, x0, x1 = ZONES[z]
        vehicle = Vehicle(f"van-{z + 1}", "van", None, zid, van_interval_s)
        zone = zones[zid]
        fences.append(Fence(zid, zname, "zone", zone, (vehicle.id,)))
        inside = _inside_segments(net, zone)
        zgraph = _graph(net, inside)
        core = max(nx.strongly_connected_components(zgraph), key=len)
        cand = [v for v in sorted(core)
                if x0 + 40.0 < net.node_xy[v, 0] < x1 - 40.0 and -900.0 < net.node_xy[v, 1] < 950.0
                and _on_street(net, v)]
        customers: list[int] = []
        while len(customers) < 3:
            v = int(cand[int(rng.integers(len(cand)))])
            if all(math.dist(net.node_xy[v], net.node_xy[c]) > 300.0 for c in customers):
                customers.append(v)
        order = _nearest_order(net, depot, customers)
        # legs: (from, to, graph, dwell at the end or None to drive on)
        legs: list[tuple[int, int, nx.DiGraph, float | None]] = []
        prev = depot
        if z == 2:  # van-3 first delivers outside its zone, from its nearest corner
            gate = _vertex_at(net, ZONE_EXIT_GATE[0], ZONE_EXIT_GATE[1])
            outside = _vertex_at(net, *ZONE_EXIT_CUSTOMER)
            legs += [(depot, gate, zgraph, None),
                     (gate, outside, graph, float(rng.uniform(60.0, 120.0))),
                     (outside, gate, graph, None)]
            prev = gate
            order = [outside, *order]
        for v in order[-3:]:
            legs.append((prev, v, zgraph, float(rng.uniform(60.0, 120.0))))
            prev = v
        legs.append((prev, depot, zgraph, 1e9))  # back home, parked
        vpath: list[int] = []
        dwell_at: list[tuple[float, float]] = []
        pos = 0.0
        for a, b, g, stay in legs:
            leg = _leg(g, a, b)
            vpath.extend(leg)
            pos += float(net.seg_len[leg].sum())
            if stay is not None:
                dwell_at.append((pos, stay))
        for j, v in enumerate(order):
            number = int(rng.integers(1, 60)) * 2
            road = net.road_name(int(net.in_segments(v)[0]))
            fences.append(Fence(f"cust-{z + 1}{j + 1}", f"{road} {number}", "customer",
                                shapely.box(*(net.node_xy[v] - 25.0), *(net.node_xy[v] + 25.0)),
                                (vehicle.id,)))
        plans.append((vehicle, vpath, dwell_at, 0.0, 10.0 + 45.0 * ((z + 2) % 4),
                      float(rng.uniform(0.85, 1.0))))

    customer_fences = [f for f in fences if f.kind in ("customer", "depot")]
    line_of = {line.id: line for line in lines}
    for vehicle, path, stops, pos0, wait, factor in plans:
        s = _move(net, path, stops, pos0, wait, seconds, factor)
        k, offset, x, y = _locate(net, path, s)
        n = len(s)
        normal = gauss_markov(rng, n, 4.0, 45.0, 1.0, 2)
        urban = gauss_markov(rng, n, 18.0, 15.0, 1.0, 2)
        inside = shapely.contains_xy(centre, x, y)
        weight = np.zeros(n)
        for i in range(1, n):  # blend the urban error in and out over ~5 s
            weight[i] = weight[i - 1] + (float(inside[i]) - weight[i - 1]) * 0.2
        error = normal + weight[:, None] * urban
        acc_normal = np.round(1.51 * 4.0 * rng.uniform(0.8, 1.2, n), 1)
        acc_urban = np.round(rng.uniform(30.0, 80.0, n), 1)
        accuracy = np.where(inside, acc_urban, acc_normal)
        delay = np.round(rng.uniform(0.2, 0.9, n), 3)
        every = np.arange(0, n, vehicle.interval_s)
        t = start_time + every.astype(float)
        silent = np.zeros(len(every), dtype=bool)
        if vehicle.id == SILENT[0]:
            silent = (every >= SILENT[1]) & (every < SILENT[2])
        xs, ys = x[every], y[every]
        obs_x = xs + error[every, 0]
        obs_y = ys + error[every, 1]
        route_dist = in_zone = None
        fence_ids = None
        if vehicle.route is not None:
            route_dist = shapely.distance(line_of[vehicle.route].line,
                                          shapely.points(xs, ys))
        if vehicle.zone is not None:
            in_zone = shapely.contains_xy(zones[vehicle.zone], xs, ys)
            fence_ids = tuple(tuple(f.id for f in customer_fences
                                    if shapely.contains_xy(f.polygon, float(px), float(py)))
                              for px, py in zip(xs, ys, strict=True))
        tracks.append(Track(
            vehicle=vehicle, path=tuple(path), t=t, x=xs, y=ys,
            seg=np.asarray(path, dtype=np.int64)[k[every]], offset=offset[every],
            path_index=k[every], path_pos=s[every], obs_x=obs_x, obs_y=obs_y,
            accuracy=accuracy[every], delay=delay[every],
            outlier=np.zeros(len(every), dtype=bool), silent=silent,
            degraded=inside[every], route_dist=route_dist, in_zone=in_zone,
            fences=fence_ids))
    tracks = _add_outliers(tracks, rng, 6)
    incidents = _incidents(tracks, zones)
    return Scenario(town, seed, start_time, duration_s, lines, tuple(fences),
                    tuple(tr.vehicle for tr in tracks), tuple(tracks), tuple(incidents))


def _on_street(network: RoadNetwork, vertex: int) -> bool:
    """True for a vertex of a residential or tertiary street (a delivery address)."""
    segs = network.out_segments(vertex)
    return len(segs) > 0 and all(
        network.roads[int(network.seg_road[s])]["highway"] in ("residential", "tertiary")
        for s in segs)


def _nearest_order(network: RoadNetwork, start: int, targets: list[int]) -> list[int]:
    """Visit order by nearest neighbour (straight-line distance) from ``start``."""
    left, order, here = list(targets), [], start
    while left:
        nxt = min(left, key=lambda v: math.dist(network.node_xy[here], network.node_xy[v]))
        order.append(nxt)
        left.remove(nxt)
        here = nxt
    return order


def _phase_before_closure(network: RoadNetwork, loop: list[int], closed: set[int],
                          ahead_m: float) -> float:
    """Loop position ``ahead_m`` before the first closed segment (so it is met early)."""
    pos = 0.0
    for s in loop:
        if s in closed:
            break
        pos += float(network.seg_len[s])
    total = float(network.seg_len[loop].sum())
    return (pos - ahead_m) % total


def _rotate(network: RoadNetwork, loop: list[int], phase: float, repeat: int
            ) -> tuple[list[int], float]:
    """The loop repeated, starting with the segment at ``phase``; and the offset into it."""
    starts = np.concatenate([[0.0], np.cumsum(network.seg_len[loop])[:-1]])
    k = int(np.searchsorted(starts, phase, side="right")) - 1
    return loop[k:] + loop * repeat, phase - float(starts[k])


def _detour(network: RoadNetwork, path: list[int], closed: set[int], open_graph: nx.DiGraph
            ) -> list[int]:
    """``path`` with every closed stretch replaced by the shortest way round it."""
    out: list[int] = []
    i = 0
    while i < len(path):
        if path[i] not in closed:
            out.append(path[i])
            i += 1
            continue
        j = i
        while j < len(path) and path[j] in closed:
            j += 1
        a = int(network.seg_from[path[i]])
        b = int(network.seg_to[path[j - 1]])
        out.extend(_leg(open_graph, a, b))
        i = j
    return out


def _add_outliers(tracks: list[Track], rng: np.random.Generator, count: int) -> list[Track]:
    """Move ``count`` published, non-degraded fixes 80–250 m in a random direction."""
    slots = [(v, k) for v, tr in enumerate(tracks)
             for k in np.flatnonzero(~tr.silent & ~tr.degraded).tolist() if k >= 10]
    picks = rng.choice(len(slots), size=min(count, len(slots)), replace=False)
    out = list(tracks)
    for p in sorted(picks.tolist()):
        v, k = slots[p]
        tr = out[v]
        dist = float(rng.uniform(80.0, 250.0))
        angle = float(rng.uniform(0.0, 2.0 * math.pi))
        obs_x, obs_y, flag = tr.obs_x.copy(), tr.obs_y.copy(), tr.outlier.copy()
        obs_x[k] += dist * math.cos(angle)
        obs_y[k] += dist * math.sin(angle)
        flag[k] = True
        out[v] = _replace(tr, obs_x=obs_x, obs_y=obs_y, outlier=flag)
    return out


def _replace(track: Track, **changes: Any) -> Track:
    fields = {name: getattr(track, name) for name in Track.__dataclass_fields__}
    fields.update(changes)
    return Track(**fields)


def _runs(mask: npt.NDArray[np.bool_]) -> list[tuple[int, int]]:
    """(first, last) indices of each run of True in ``mask``.

    >>> _runs(np.array([False, True, True, False, True]))
    [(1, 2), (4, 4)]
    >>> _runs(np.array([], dtype=bool))
    []
    """
    out = []
    start = None
    for i, flag in enumerate(mask.tolist()):
        if flag and start is None:
            start = i
        elif not flag and start is not None:
            out.append((start, i - 1))
            start = None
    if start is not None:
        out.append((start, len(mask) - 1))
    return out


def _incidents(tracks: Sequence[Track], zones: Mapping[str, shapely.Polygon]
               ) -> list[dict[str, Any]]:
    """The incident list, derived from the truth (times of the first and last report)."""
    out: list[dict[str, Any]] = []
    for tr in tracks:
        vid = tr.vehicle.id
        step = float(tr.vehicle.interval_s)
        if tr.route_dist is not None:
            for a, b in _runs(tr.route_dist > OFF_ROUTE_M):
                out.append({"type": "detour", "vehicle": vid, "start": float(tr.t[a]),
                            "end": float(tr.t[b]), "route": tr.vehicle.route,
                            "max_dist_m": round(float(tr.route_dist[a:b + 1].max()), 1)})
        if tr.in_zone is not None and tr.vehicle.zone is not None:
            zone = zones[tr.vehicle.zone]
            for a, b in _runs(~tr.in_zone):
                dist = shapely.distance(zone, shapely.points(tr.x[a:b + 1], tr.y[a:b + 1]))
                out.append({"type": "zone_exit", "vehicle": vid, "start": float(tr.t[a]),
                            "end": float(tr.t[b]), "zone": tr.vehicle.zone,
                            "max_dist_m": round(float(np.max(dist)), 1)})
        for a, b in _runs(tr.silent):
            out.append({"type": "silent", "vehicle": vid, "start": float(tr.t[a]),
                        "end": float(tr.t[b]), "gap_s": float(tr.t[b] - tr.t[a] + 2 * step)})
        for k in np.flatnonzero(tr.outlier).tolist():
            jump = math.hypot(tr.obs_x[k] - tr.x[k], tr.obs_y[k] - tr.y[k])
            out.append({"type": "outlier", "vehicle": vid, "start": float(tr.t[k]),
                        "end": float(tr.t[k]), "jump_m": round(jump, 1)})
        for a, b in _runs(tr.degraded):
            out.append({"type": "degraded", "vehicle": vid, "start": float(tr.t[a]),
                        "end": float(tr.t[b]), "area": "centre"})
    out.sort(key=lambda r: (r["start"], r["vehicle"], r["type"]))
    return out
