"""Import a road network drawn as GeoJSON (RFC 7946) LineStrings.

The file is a ``FeatureCollection`` whose every feature has a ``LineString`` or
``MultiLineString`` geometry in WGS84 ``[lon, lat]`` (a third, altitude, value is
ignored). Every feature is a road; these members are read:

* ``id`` of the feature, else ``properties.id``, else the feature's position in the
  collection (0-based): the road id stored on each segment (``way``). An integer is used
  as it is; a string is mapped to a stable int64 (the first 8 bytes of its BLAKE2b digest,
  signed) and kept as ``roads[i]["source_id"]``.
* ``properties.oneway``: ``true``/``"yes"``/``"true"``/``"1"``/``1`` -> drawing order only;
  ``"-1"``/``-1``/``"reverse"`` -> against it only; ``false``/``"no"``/``"false"``/
  ``"0"``/``0``/``null``/absent -> both ways. Anything else is an error.
* ``properties.name``, ``properties.ref`` (strings or null) and ``properties.highway``
  (default ``"road"``).

GeoJSON has no node ids, so synthetic ones are made: positions identical to 1e-9 degree
(about 0.1 mm) are one node, and nodes are numbered 1, 2, 3... in order of first
appearance in the file. Roads therefore connect exactly where they share a coordinate.
A repeated consecutive position is skipped; each part of a MultiLineString is its own
chain of the same road.

Example of a two-feature file::

    {"type": "FeatureCollection", "features": [
      {"type": "Feature", "id": 1, "properties": {"name": "Main St", "oneway": "yes"},
       "geometry": {"type": "LineString", "coordinates": [[24.94, 60.17], [24.95, 60.17]]}},
      {"type": "Feature", "id": "spur", "properties": {},
       "geometry": {"type": "LineString", "coordinates": [[24.95, 60.17], [24.95, 60.18]]}}]}
"""

from __future__ import annotations

import hashlib
import json
import math
from pathlib import Path
from typing import Any

import numpy as np

from livematch.core.network import RoadNetwork
from livematch.errors import BadNetworkError
from livematch.mapdata.build import BACKWARD, BOTH, FORWARD, Chain, assemble
from livematch.mapdata.options import ImportOptions, ImportStats

__all__ = ["read_geojson", "road_id_from_string"]

_SNAP = 1e9  # positions are compared after rounding to 1e-9 degree
# The numbers 1 and 0 find the True and False keys (equal values hash alike).
_ONEWAY: dict[Any, int] = {
    True: FORWARD, "yes": FORWARD, "true": FORWARD, "1": FORWARD,
    "-1": BACKWARD, -1: BACKWARD, "reverse": BACKWARD,
    False: BOTH, "no": BOTH, "false": BOTH, "0": BOTH, None: BOTH,
}


def road_id_from_string(text: str) -> int:
    """A stable int64 road id for a string id (BLAKE2b, 8 bytes, big-endian, signed).

    The same string gives the same id on every machine and run (unlike ``hash``).

    >>> road_id_from_string("spur") == road_id_from_string("spur")
    True
    >>> road_id_from_string("") != road_id_from_string("a")
    True
    """
    digest = hashlib.blake2b(text.encode("utf-8"), digest_size=8).digest()
    return int.from_bytes(digest, "big", signed=True)


def read_geojson(
    path: str | Path, options: ImportOptions | None = None
) -> tuple[RoadNetwork, ImportStats]:
    """Read a GeoJSON FeatureCollection of road lines as a network.

    Args:
        path: the GeoJSON file (UTF-8).
        options: only the projection choice applies (every feature is a road).

    Raises:
        BadNetworkError: missing file, not JSON, not a FeatureCollection, a feature
            without line geometry, bad coordinates or ``oneway``, or no roads at all.
            The message names the file and the feature.
    """
    options = options or ImportOptions()
    path = Path(path)
    if not path.is_file():
        raise BadNetworkError(f"{path}: no such file")
    try:
        doc = json.loads(path.read_bytes())
    except (json.JSONDecodeError, UnicodeDecodeError) as exc:
        raise BadNetworkError(f"{path}: not JSON ({exc})") from exc
    return parse_geojson(doc, str(path), options)


def parse_geojson(
    doc: Any, where: str, options: ImportOptions | None = None
) -> tuple[RoadNetwork, ImportStats]:
    """Build a network from an already decoded GeoJSON document (``where`` names it)."""
    options = options or ImportOptions()
    if not isinstance(doc, dict) or doc.get("type") != "FeatureCollection":
        kind = doc.get("type") if isinstance(doc, dict) else type(doc).__name__
        raise BadNetworkError(f"{where}: expected a GeoJSON FeatureCollection, got {kind!r}")
    features = doc.get("features")
    if not isinstance(features, list):
        raise BadNetworkError(f"{where}: FeatureCollection has no 'features' list")
    stats = ImportStats(source_format="geojson")
    node_of: dict[tuple[int, int], int] = {}
    lonlat: list[tuple[float, float]] = []
    chains: list[Chain] = []
    roads: list[dict[str, Any]] = []
    for i, feature in enumerate(features):
        stats.ways_seen += 1
        at = f"{where}: feature {i}"
        if not isinstance(feature, dict) or feature.get("type") != "Feature":
            raise BadNetworkError(f"{at}: not a GeoJSON Feature")
        props = feature.get("properties") or {}
        if not isinstance(props, dict):
            raise BadNetworkError(f"{at}: properties must be an object or null")
        road: dict[str, Any] = {
            "name": _optional_text(props.get("name"), at, "name"),
            "ref": _optional_text(props.get("ref"), at, "ref"),
            "highway": _optional_text(props.get("highway"), at, "highway") or "road",
        }
        way = _road_id(feature, props, i, at, road)
        direction = _direction(props.get("oneway"), at)
        parts = []
        for part in _line_parts(feature.get("geometry"), at):
            nodes: list[int] = []
            for lon, lat in part:
                key = (round(lon * _SNAP), round(lat * _SNAP))
                node = node_of.get(key)
                if node is None:
                    node = node_of[key] = len(node_of) + 1
                    lonlat.append((lon, lat))
                if not nodes or nodes[-1] != node:
                    nodes.append(node)
            if len(nodes) >= 2:
                parts.append(nodes)
        if not parts:
            stats.degenerate += 1
            continue
        index = len(roads)
        roads.append(road)
        chains.extend(
            Chain(way=way, road=index, nodes=np.asarray(p, dtype=np.int64), direction=direction)
            for p in parts
        )
        stats.ways_kept += 1
    if not chains:
        raise BadNetworkError(f"{where}: no roads (no feature with two distinct positions)")
    coords = np.asarray(lonlat, dtype=np.float64)
    ids = np.arange(1, len(coords) + 1, dtype=np.int64)
    network = assemble(chains, ids, coords[:, 0], coords[:, 1], roads, options,
                       f"GeoJSON {Path(where).name}", stats)
    return network, stats


def _optional_text(value: Any, at: str, key: str) -> str | None:
    if value is None or isinstance(value, str):
        return value
    if isinstance(value, int | float) and not isinstance(value, bool):
        return str(value)  # e.g. "ref": 7
    raise BadNetworkError(f"{at}: properties.{key} must be a string, got {value!r}")


def _road_id(
    feature: dict[str, Any], props: dict[str, Any], index: int, at: str, road: dict[str, Any]
) -> int:
    raw = feature.get("id", props.get("id"))
    if raw is None:
        return index
    if isinstance(raw, bool):
        raise BadNetworkError(f"{at}: id must be an integer or a string, got {raw!r}")
    if isinstance(raw, int):
        if not -(2**63) <= raw < 2**63:
            raise BadNetworkError(f"{at}: id {raw} does not fit in 64 bits")
        return raw
    if isinstance(raw, float) and raw.is_integer() and abs(raw) < 2**63:
        return int(raw)
    if isinstance(raw, str):
        road["source_id"] = raw
        return road_id_from_string(raw)
    raise BadNetworkError(f"{at}: id must be an integer or a string, got {raw!r}")


def _direction(value: Any, at: str) -> int:
    key = value.strip().lower() if isinstance(value, str) else value
    try:
        return _ONEWAY[key]
    except (KeyError, TypeError):
        raise BadNetworkError(
            f"{at}: properties.oneway {value!r} is not one of true/false/yes/no/1/0/-1/reverse"
        ) from None


def _line_parts(geometry: Any, at: str) -> list[list[tuple[float, float]]]:
    """The positions of each line of a LineString/MultiLineString geometry, validated."""
    if not isinstance(geometry, dict):
        raise BadNetworkError(f"{at}: geometry must be a LineString or MultiLineString, got "
                              f"{geometry!r}")
    kind = geometry.get("type")
    coords = geometry.get("coordinates")
    if kind == "LineString":
        lines = [coords]
    elif kind == "MultiLineString":
        if not isinstance(coords, list):
            raise BadNetworkError(f"{at}: MultiLineString coordinates must be a list")
        lines = coords
    else:
        raise BadNetworkError(
            f"{at}: geometry type {kind!r} is not LineString or MultiLineString"
        )
    return [_positions(line, at) for line in lines]


def _positions(line: Any, at: str) -> list[tuple[float, float]]:
    if not isinstance(line, list) or len(line) < 2:
        raise BadNetworkError(f"{at}: a line needs a list of at least two positions")
    out: list[tuple[float, float]] = []
    for position in line:
        if (not isinstance(position, list) or not 2 <= len(position) <= 3
                or not all(isinstance(v, int | float) and not isinstance(v, bool)
                           for v in position)):
            raise BadNetworkError(f"{at}: bad position {position!r}, expected [lon, lat]")
        lon, lat = float(position[0]), float(position[1])
        if not (math.isfinite(lon) and math.isfinite(lat)
                and -180.0 <= lon <= 180.0 and -90.0 <= lat <= 90.0):
            raise BadNetworkError(f"{at}: position {position!r} is outside WGS84 lon/lat range")
        out.append((lon, lat))
    return out
