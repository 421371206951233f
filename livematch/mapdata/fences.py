"""Load geofences from GeoJSON Polygon / MultiPolygon features.

The file is a ``FeatureCollection`` (or one ``Feature``) in WGS84 ``[lon, lat]``. Each
feature is one fence; these members are read:

* id: the feature's ``id``, else ``properties.id`` (a number becomes its decimal string);
* ``properties.name`` (optional);
* ``properties.dwell_s`` (optional): this fence's dwell time in seconds;
* ``properties.vehicles`` / ``properties.groups`` (optional lists of strings): the fence
  only watches those vehicles, or the vehicles of those groups; without either it
  watches every vehicle.

The polygons are projected into the road network's CRS and repaired if invalid
(``shapely.make_valid``, keeping the polygonal part). Example::

    {"type": "FeatureCollection", "features": [
      {"type": "Feature", "id": "depot", "properties": {"name": "North depot",
       "dwell_s": 900, "groups": ["night"]},
       "geometry": {"type": "Polygon", "coordinates": [[[24.93, 60.16], [24.94, 60.16],
                                                       [24.94, 60.17], [24.93, 60.16]]]}}]}
"""

from __future__ import annotations

import json
import math
from pathlib import Path
from typing import Any

import numpy as np
import shapely
from shapely.geometry import shape
from shapely.geometry.base import BaseGeometry

from livematch.core.geometry import Projection
from livematch.core.monitors.fences import Fence
from livematch.errors import LivematchError

__all__ = ["BadFenceError", "parse_fences", "read_fences"]


class BadFenceError(LivematchError):
    """A geofence file cannot be used; the message names the file and the fence."""


def read_fences(path: str | Path, projection: Projection) -> list[Fence]:
    """Fences from a GeoJSON file, projected with ``projection``.

    Raises:
        BadFenceError: unreadable file, bad geometry or property, repeated id.
    """
    p = Path(path)
    try:
        doc = json.loads(p.read_text(encoding="utf-8"))
    except OSError as exc:
        raise BadFenceError(f"{p}: cannot read fences: {exc.strerror}") from exc
    except (UnicodeDecodeError, ValueError) as exc:
        raise BadFenceError(f"{p}: not valid JSON: {exc}") from exc
    return parse_fences(doc, projection, str(p))


def parse_fences(doc: Any, projection: Projection, where: str) -> list[Fence]:
    """Fences from a parsed GeoJSON document; ``where`` names it in errors.

    >>> doc = {"type": "Feature", "id": 3, "properties": {"vehicles": ["bus1"]},
    ...        "geometry": {"type": "Polygon", "coordinates": [[[0, 0], [0.001, 0],
    ...                     [0.001, 0.001], [0, 0]]]}}
    >>> f = parse_fences(doc, Projection.local(0, 0), "doc")[0]
    >>> f.id, f.vehicles, round(f.geometry.area)
    ('3', frozenset({'bus1'}), 6155)
    >>> parse_fences({"type": "FeatureCollection", "features": []}, Projection.local(0, 0), "d")
    []
    """
    if isinstance(doc, dict) and doc.get("type") == "Feature":
        features: Any = [doc]
    elif isinstance(doc, dict) and doc.get("type") == "FeatureCollection":
        features = doc.get("features")
    else:
        raise BadFenceError(f"{where}: expected a GeoJSON FeatureCollection or Feature")
    if not isinstance(features, list):
        raise BadFenceError(f"{where}: 'features' must be a list")
    fences: list[Fence] = []
    seen: set[str] = set()
    for i, feature in enumerate(features):
        at = f"{where}: feature {i}"
        if not isinstance(feature, dict):
            raise BadFenceError(f"{at}: not an object")
        props = feature.get("properties") or {}
        if not isinstance(props, dict):
            raise BadFenceError(f"{at}: properties must be an object")
        fence_id = feature.get("id", props.get("id"))
        if isinstance(fence_id, int) and not isinstance(fence_id, bool):
            fence_id = str(fence_id)
        if not (isinstance(fence_id, str) and fence_id):
            raise BadFenceError(f"{at}: needs an id (the feature's 'id' or properties.id)")
        at = f"{where}: fence {fence_id!r}"
        if fence_id in seen:
            raise BadFenceError(f"{at}: id used twice")
        seen.add(fence_id)
        geometry = _polygon(feature.get("geometry"), projection, at)
        dwell = props.get("dwell_s")
        if dwell is not None and not (isinstance(dwell, int | float)
                                      and not isinstance(dwell, bool)
                                      and math.isfinite(dwell) and dwell > 0):
            raise BadFenceError(f"{at}: dwell_s must be a positive number, got {dwell!r}")
        name = props.get("name")
        fences.append(Fence(
            fence_id, geometry, str(name) if name is not None else None,
            float(dwell) if dwell is not None else None,
            _names(props.get("vehicles"), at, "vehicles"),
            _names(props.get("groups"), at, "groups")))
    return fences


def _names(value: Any, at: str, key: str) -> frozenset[str] | None:
    if value is None:
        return None
    if not (isinstance(value, list) and all(isinstance(v, str) for v in value)):
        raise BadFenceError(f"{at}: {key} must be a list of strings, got {value!r}")
    return frozenset(value)


def _polygon(geometry: Any, projection: Projection, at: str) -> BaseGeometry:
    if not (isinstance(geometry, dict)
            and geometry.get("type") in ("Polygon", "MultiPolygon")):
        kind = geometry.get("type") if isinstance(geometry, dict) else geometry
        raise BadFenceError(f"{at}: geometry must be a Polygon or MultiPolygon, got {kind!r}")
    try:
        geom = shape(geometry)
    except (ValueError, TypeError, AttributeError, IndexError,
            shapely.errors.ShapelyError) as exc:
        raise BadFenceError(f"{at}: bad coordinates: {exc}") from exc
    if geom.is_empty:
        raise BadFenceError(f"{at}: the polygon is empty")
    coords = shapely.get_coordinates(geom)
    if not np.all(np.isfinite(coords)) or np.any(np.abs(coords[:, 0]) > 180.0) or np.any(
            np.abs(coords[:, 1]) > 90.0):
        raise BadFenceError(f"{at}: coordinates must be [lon, lat] degrees")

    def project(xy: np.ndarray) -> np.ndarray:
        x, y = projection.to_xy(xy[:, 0], xy[:, 1])
        return np.column_stack([x, y])

    projected = shapely.transform(geom, project)
    if not projected.is_valid:
        repaired = shapely.make_valid(projected)
        parts = [g for g in getattr(repaired, "geoms", [repaired])
                 if g.geom_type in ("Polygon", "MultiPolygon")]
        projected = shapely.union_all(parts) if parts else repaired
        if projected.is_empty or projected.geom_type not in ("Polygon", "MultiPolygon"):
            raise BadFenceError(f"{at}: the polygon is invalid and cannot be repaired")
    return projected
