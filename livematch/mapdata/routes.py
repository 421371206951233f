"""Load vehicle routes: GeoJSON lines, a GTFS static feed, or lists of road (way) ids.

Every loader returns ``{route id: Route}`` with the polylines projected into the road
network's CRS (:class:`~livematch.core.monitors.route.Route`); the core never reads files.

**GeoJSON** (RFC 7946, WGS84 ``[lon, lat]``): a ``FeatureCollection`` (or one
``Feature``). Each feature is one route; its id is the feature's ``id``, else
``properties.id`` (a number is turned into its decimal string). The geometry is a
``LineString`` in driving order (a ``MultiLineString``'s parts are joined in order), or
``null`` with ``properties.ways``: a list of road (way) ids of the network, in driving
order (see :func:`route_from_ways`). ``properties.name`` is kept. Example::

    {"type": "FeatureCollection", "features": [
      {"type": "Feature", "id": "550", "properties": {"name": "Itäkeskus-Westendinasema"},
       "geometry": {"type": "LineString", "coordinates": [[24.94, 60.17], [24.95, 60.17]]}},
      {"type": "Feature", "id": "depot-loop", "properties": {"ways": [1001, 1002, 1003]},
       "geometry": null}]}

**GTFS static** (a ``.zip`` or a folder; the open GTFS Schedule reference,
https://gtfs.org/documentation/schedule/reference/): ``shapes.txt`` gives the polylines
(``shape_id``, ``shape_pt_lat``, ``shape_pt_lon``, ``shape_pt_sequence``, points ordered
by sequence). Every shape is a route under its ``shape_id``. ``trips.txt`` (``route_id``,
``trip_id``, ``shape_id``, optional ``direction_id``) adds aliases: ``route_id`` when all
the route's trips use one shape, ``route_id:direction_id`` when all trips of that
direction use one shape, and each ``trip_id``. ``routes.txt`` (optional) gives the name
(``route_short_name``, else ``route_long_name``). An alias that would clash with a
shape id is not made.
"""

from __future__ import annotations

import csv
import io
import json
import math
import zipfile
from collections import defaultdict
from collections.abc import Iterable, Sequence
from pathlib import Path
from typing import Any

import numpy as np

from livematch.core.monitors.route import Route
from livematch.core.network import RoadNetwork
from livematch.errors import LivematchError

__all__ = ["BadRouteError", "load_routes", "read_gtfs_routes", "read_route_geojson",
           "route_from_ways"]


class BadRouteError(LivematchError):
    """A route file or route definition cannot be used; the message names file and route."""


def load_routes(path: str | Path, network: RoadNetwork) -> dict[str, Route]:
    """Routes from a GeoJSON file, or a GTFS feed (``.zip`` or folder), by its kind.

    Raises:
        BadRouteError: unreadable file, bad geometry, unknown way, missing GTFS column...
    """
    p = Path(path)
    if p.is_dir() or p.suffix.lower() == ".zip":
        return read_gtfs_routes(p, network)
    return read_route_geojson(p, network)


# ------------------------------------------------------------------------ GeoJSON
def read_route_geojson(path: str | Path, network: RoadNetwork) -> dict[str, Route]:
    """Routes from a GeoJSON file (see the module docstring)."""
    p = Path(path)
    try:
        doc = json.loads(p.read_text(encoding="utf-8"))
    except OSError as exc:
        raise BadRouteError(f"{p}: cannot read routes: {exc.strerror}") from exc
    except (UnicodeDecodeError, ValueError) as exc:
        raise BadRouteError(f"{p}: not valid JSON: {exc}") from exc
    return parse_route_geojson(doc, network, str(p))


def parse_route_geojson(doc: Any, network: RoadNetwork, where: str) -> dict[str, Route]:
    """Routes from a parsed GeoJSON document; ``where`` names it in errors.

    >>> from livematch.core.build import Road, network_from_roads
    >>> net = network_from_roads([Road([(0.0, 0.0), (100.0, 0.0)], way=7)])
    >>> r = parse_route_geojson({"type": "Feature", "id": 5, "properties": {"ways": [7]},
    ...                          "geometry": None}, net, "doc")
    >>> list(r), r["5"].xy.tolist()
    (['5'], [[0.0, 0.0], [100.0, 0.0]])
    >>> parse_route_geojson({"type": "FeatureCollection", "features": []}, net, "doc")
    {}
    """
    if isinstance(doc, dict) and doc.get("type") == "Feature":
        features: Any = [doc]
    elif isinstance(doc, dict) and doc.get("type") == "FeatureCollection":
        features = doc.get("features")
    else:
        raise BadRouteError(f"{where}: expected a GeoJSON FeatureCollection or Feature")
    if not isinstance(features, list):
        raise BadRouteError(f"{where}: 'features' must be a list")
    routes: dict[str, Route] = {}
    for i, feature in enumerate(features):
        at = f"{where}: feature {i}"
        if not isinstance(feature, dict):
            raise BadRouteError(f"{at}: not an object")
        props = feature.get("properties") or {}
        if not isinstance(props, dict):
            raise BadRouteError(f"{at}: properties must be an object")
        route_id = _route_id(feature.get("id", props.get("id")), at)
        at = f"{where}: route {route_id!r}"
        if route_id in routes:
            raise BadRouteError(f"{at}: id used twice")
        name = props.get("name")
        name = str(name) if name is not None else None
        geometry = feature.get("geometry")
        if geometry is None:
            ways = props.get("ways")
            if not isinstance(ways, list) or not ways:
                raise BadRouteError(f"{at}: needs a LineString geometry or a non-empty "
                                    f"'ways' list")
            routes[route_id] = route_from_ways(network, ways, route_id, name, where)
            continue
        lonlat = _line(geometry, at)
        x, y = network.projection.to_xy([p[0] for p in lonlat], [p[1] for p in lonlat])
        routes[route_id] = _route(route_id, np.column_stack([x, y]), name, at)
    return routes


def _route_id(value: Any, at: str) -> str:
    if isinstance(value, bool) or value is None:
        raise BadRouteError(f"{at}: needs an id (the feature's 'id' or properties.id)")
    if isinstance(value, int):
        return str(value)
    if isinstance(value, str) and value:
        return value
    raise BadRouteError(f"{at}: id must be a non-empty string or an integer, got {value!r}")


def _line(geometry: Any, at: str) -> list[tuple[float, float]]:
    if not isinstance(geometry, dict):
        raise BadRouteError(f"{at}: geometry must be an object or null")
    kind = geometry.get("type")
    coords = geometry.get("coordinates")
    if kind == "LineString":
        parts = [coords]
    elif kind == "MultiLineString" and isinstance(coords, list):
        parts = coords
    else:
        raise BadRouteError(f"{at}: geometry must be a LineString or MultiLineString, "
                            f"got {kind!r}")
    out: list[tuple[float, float]] = []
    for part in parts:
        if not isinstance(part, list):
            raise BadRouteError(f"{at}: coordinates must be a list of positions")
        for pos in part:
            if not (isinstance(pos, list) and len(pos) >= 2
                    and all(isinstance(v, int | float) and not isinstance(v, bool)
                            and math.isfinite(v) for v in pos[:2])
                    and -180.0 <= pos[0] <= 180.0 and -90.0 <= pos[1] <= 90.0):
                raise BadRouteError(f"{at}: bad position {pos!r} (want [lon, lat] degrees)")
            out.append((float(pos[0]), float(pos[1])))
    return out


def _route(route_id: str, xy: np.ndarray, name: str | None, at: str) -> Route:
    keep = np.ones(len(xy), dtype=bool)
    if len(xy):
        keep[1:] = np.any(np.diff(xy, axis=0) != 0.0, axis=1)
    if int(keep.sum()) < 2:
        raise BadRouteError(f"{at}: needs at least two distinct points")
    return Route(route_id, np.ascontiguousarray(xy, dtype=np.float64), name)


# ---------------------------------------------------------------------- way lists
def route_from_ways(network: RoadNetwork, ways: Sequence[Any], route_id: str,
                    name: str | None = None, where: str = "routes") -> Route:
    """The polyline driving the given ways of ``network`` one after the other.

    Each way is taken end to end, turned so that it starts where the previous one ended
    (the first is turned to meet the second). Consecutive ways must share an end point.

    Raises:
        BadRouteError: an id not in the network, a way that is not one simple line, or
            two consecutive ways that do not meet.
    """
    at = f"{where}: route {route_id!r}"
    chains: list[list[int]] = []
    for way in ways:
        if isinstance(way, bool) or not isinstance(way, int):
            raise BadRouteError(f"{at}: way ids must be integers, got {way!r}")
        chains.append(_way_chain(network, way, at))
    if len(chains) >= 2 and chains[0][0] in (chains[1][0], chains[1][-1]):
        chains[0].reverse()
    vertices = list(chains[0])
    for way, chain in zip(ways[1:], chains[1:], strict=True):
        if chain[-1] == vertices[-1] and chain[0] != vertices[-1]:
            chain = chain[::-1]
        if chain[0] != vertices[-1]:
            raise BadRouteError(f"{at}: way {way} does not start where the previous way "
                                f"ends")
        vertices.extend(chain[1:])
    return _route(route_id, network.node_xy[vertices].copy(), name, at)


def _way_chain(network: RoadNetwork, way: int, at: str) -> list[int]:
    """The vertices of one way, end to end (in drawing order where it is known)."""
    segs = np.flatnonzero(network.seg_way == way)
    if len(segs) == 0:
        raise BadRouteError(f"{at}: way {way} is not in the network")
    adj: dict[int, list[int]] = defaultdict(list)
    edges = {(min(a, b), max(a, b)) for a, b in zip(
        network.seg_from[segs].tolist(), network.seg_to[segs].tolist(), strict=True)}
    for a, b in sorted(edges):
        adj[a].append(b)
        adj[b].append(a)
    if any(len(n) > 2 for n in adj.values()):
        raise BadRouteError(f"{at}: way {way} branches; it is not one line")
    ends = [v for v, n in adj.items() if len(n) == 1]
    first = int(network.seg_from[segs[0]])  # the first segment follows the drawing
    start = (first if first in ends else ends[0]) if ends else first
    chain = [start]
    prev = -1
    while True:
        nxt = [v for v in adj[chain[-1]] if v != prev]
        if not nxt or (not ends and nxt[0] == start):
            if not ends:
                chain.append(start)
            break
        prev = chain[-1]
        chain.append(nxt[0])
    if len(chain) - (0 if ends else 1) != len(adj):
        raise BadRouteError(f"{at}: way {way} is in several pieces; it is not one line")
    return chain


# --------------------------------------------------------------------------- GTFS
def read_gtfs_routes(path: str | Path, network: RoadNetwork) -> dict[str, Route]:
    """Routes from a GTFS static feed, a ``.zip`` or a folder (see the module docstring).

    Raises:
        BadRouteError: no ``shapes.txt``, a missing column, a bad number.
    """
    p = Path(path)
    tables = _gtfs_tables(p, ("shapes.txt", "trips.txt", "routes.txt"))
    if tables["shapes.txt"] is None:
        raise BadRouteError(f"{p}: a GTFS feed for routes needs shapes.txt")
    points: dict[str, list[tuple[float, float, float]]] = defaultdict(list)
    for n, row in enumerate(_rows(tables["shapes.txt"], f"{p}/shapes.txt", (
            "shape_id", "shape_pt_lat", "shape_pt_lon", "shape_pt_sequence")), start=2):
        at = f"{p}/shapes.txt line {n}"
        points[row["shape_id"]].append((
            _number(row["shape_pt_sequence"], at, "shape_pt_sequence"),
            _number(row["shape_pt_lon"], at, "shape_pt_lon"),
            _number(row["shape_pt_lat"], at, "shape_pt_lat")))
    names: dict[str, str] = {}
    if tables["routes.txt"] is not None:
        for row in _rows(tables["routes.txt"], f"{p}/routes.txt", ("route_id",)):
            name = row.get("route_short_name") or row.get("route_long_name")
            if name:
                names[row["route_id"]] = name
    shapes: dict[str, Route] = {}
    for shape_id in sorted(points):
        pts = sorted(points[shape_id])
        x, y = network.projection.to_xy([q[1] for q in pts], [q[2] for q in pts])
        shapes[shape_id] = _route(shape_id, np.column_stack([x, y]), None,
                                  f"{p}: shape {shape_id!r}")
    routes = dict(shapes)
    if tables["trips.txt"] is None:
        return routes
    by_route: dict[str, set[str]] = defaultdict(set)
    by_direction: dict[str, set[str]] = defaultdict(set)
    trips: dict[str, str] = {}
    for row in _rows(tables["trips.txt"], f"{p}/trips.txt", ("route_id", "trip_id")):
        shape = row.get("shape_id") or ""
        if shape not in shapes:
            continue
        by_route[row["route_id"]].add(shape)
        if row.get("direction_id", "") != "":
            by_direction[f"{row['route_id']}:{row['direction_id']}"].add(shape)
        trips[row["trip_id"]] = shape
    for alias_map in (by_route, by_direction):
        for alias, used in sorted(alias_map.items()):
            if len(used) == 1 and alias not in shapes:
                target = shapes[next(iter(used))]
                route_id = alias.split(":")[0] if alias_map is by_direction else alias
                routes[alias] = Route(target.id, target.xy, names.get(route_id))
    for trip, shape_id in sorted(trips.items()):
        if trip not in shapes:
            routes.setdefault(trip, shapes[shape_id])
    return routes


def _gtfs_tables(path: Path, names: Iterable[str]) -> dict[str, str | None]:
    out: dict[str, str | None] = {}
    try:
        if path.is_dir():
            for name in names:
                f = path / name
                out[name] = f.read_text(encoding="utf-8-sig") if f.is_file() else None
        else:
            with zipfile.ZipFile(path) as z:
                listed = set(z.namelist())
                for name in names:
                    out[name] = (z.read(name).decode("utf-8-sig") if name in listed
                                 else None)
    except (OSError, zipfile.BadZipFile) as exc:
        raise BadRouteError(f"{path}: cannot read the GTFS feed: {exc}") from exc
    except UnicodeDecodeError as exc:
        raise BadRouteError(f"{path}: GTFS files must be UTF-8: {exc}") from exc
    return out


def _rows(text: str, where: str, required: Sequence[str]) -> list[dict[str, str]]:
    reader = csv.DictReader(io.StringIO(text))
    columns = [c.strip() for c in reader.fieldnames or []]
    missing = [c for c in required if c not in columns]
    if missing:
        raise BadRouteError(f"{where}: missing column(s) {', '.join(missing)}")
    return [{k.strip(): (v or "").strip() for k, v in row.items() if k is not None}
            for row in reader]


def _number(text: str, at: str, column: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise BadRouteError(f"{at}: {column} must be a number, got {text!r}") from None
    if not math.isfinite(value):
        raise BadRouteError(f"{at}: {column} must be finite, got {text!r}")
    return value
