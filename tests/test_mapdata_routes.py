"""Loading routes (GeoJSON, GTFS, way lists) and geofences (GeoJSON polygons)."""

from __future__ import annotations

import json
import zipfile

import numpy as np
import pytest
import shapely
from catalogue import grid
from pyproj import Geod

from livematch.core.build import Road, network_from_roads
from livematch.core.geometry import Projection
from livematch.mapdata.fences import BadFenceError, parse_fences, read_fences
from livematch.mapdata.routes import (
    BadRouteError,
    load_routes,
    parse_route_geojson,
    route_from_ways,
)

PROJ = Projection.local(24.94, 60.17)
NET = network_from_roads([Road([(0.0, 0.0), (10.0, 0.0)], way=1)], PROJ)
GEOD = Geod(ellps="WGS84")

# A GTFS feed of our own making. Column names and file roles follow the GTFS Schedule
# reference (gtfs.org/documentation/schedule/reference: shapes.txt, trips.txt, routes.txt).
SHAPES = """\ufeffshape_id,shape_pt_lat,shape_pt_lon,shape_pt_sequence,shape_dist_traveled
east,60.1700,24.9400,1,0
east,60.1700,24.9600,3,
east,60.1700,24.9500,2,
west,60.1710,24.9600,10,
west,60.1710,24.9400,20,
"""
TRIPS = """route_id,service_id,trip_id,shape_id,direction_id
550,wk,t1,east,0
550,wk,t2,east,0
550,wk,t3,west,1
551,wk,t4,east,
"""
ROUTES = """route_id,agency_id,route_short_name,route_long_name,route_type
550,hsl,550,Jokeri,3
551,hsl,,Harbour shuttle,3
"""


def _expected(lonlat: list[tuple[float, float]]) -> np.ndarray:
    x, y = PROJ.to_xy([p[0] for p in lonlat], [p[1] for p in lonlat])
    return np.column_stack([x, y])


def _write_gtfs(folder) -> None:
    folder.mkdir()
    (folder / "shapes.txt").write_text(SHAPES, encoding="utf-8")
    (folder / "trips.txt").write_text(TRIPS, encoding="utf-8")
    (folder / "routes.txt").write_text(ROUTES, encoding="utf-8")


@pytest.mark.parametrize("as_zip", [False, True])
def test_gtfs_shapes_become_route_polylines(tmp_path, as_zip):
    """shapes.txt points ordered by shape_pt_sequence, one route per shape_id, with the
    route / direction / trip aliases that are unambiguous."""
    folder = tmp_path / "feed"
    _write_gtfs(folder)
    path = folder
    if as_zip:
        path = tmp_path / "feed.zip"
        with zipfile.ZipFile(path, "w") as z:
            for name in ("shapes.txt", "trips.txt", "routes.txt"):
                z.write(folder / name, name)
    routes = load_routes(path, NET)
    east = _expected([(24.94, 60.17), (24.95, 60.17), (24.96, 60.17)])
    west = _expected([(24.96, 60.171), (24.94, 60.171)])
    assert sorted(routes) == ["550:0", "550:1", "551", "east", "t1", "t2", "t3", "t4", "west"]
    np.testing.assert_allclose(routes["east"].xy, east, atol=1e-6)
    np.testing.assert_allclose(routes["west"].xy, west, atol=1e-6)
    assert routes["550:0"].id == "east" and routes["550:1"].id == "west"
    assert routes["551"].id == "east" and routes["t3"].id == "west"
    assert routes["550:0"].name == "550" and routes["551"].name == "Harbour shuttle"
    # Route 550 runs two shapes: its bare id would be ambiguous, so it is not an alias.
    assert "550" not in routes
    # Length against the WGS84 ellipsoid (pyproj Geod): within 0.1 % (local projection).
    length = float(np.sum(np.hypot(*np.diff(routes["east"].xy, axis=0).T)))
    geodesic = GEOD.line_length([24.94, 24.95, 24.96], [60.17, 60.17, 60.17])
    assert length == pytest.approx(geodesic, rel=1e-3)


def test_gtfs_needs_shapes_and_columns(tmp_path):
    """A feed without shapes.txt, or with a column missing or a bad number, is refused."""
    empty = tmp_path / "empty"
    empty.mkdir()
    with pytest.raises(BadRouteError, match=r"needs shapes\.txt"):
        load_routes(empty, NET)
    bad = tmp_path / "bad"
    bad.mkdir()
    (bad / "shapes.txt").write_text("shape_id,shape_pt_lat,shape_pt_sequence\na,60,1\n")
    with pytest.raises(BadRouteError, match=r"missing column.*shape_pt_lon"):
        load_routes(bad, NET)
    (bad / "shapes.txt").write_text(
        "shape_id,shape_pt_lat,shape_pt_lon,shape_pt_sequence\na,north,24,1\n")
    with pytest.raises(BadRouteError, match="line 2: shape_pt_lat must be a number"):
        load_routes(bad, NET)


def test_geojson_routes_lines_ids_and_errors(tmp_path):
    """LineString routes by feature id or properties.id; errors name the route."""
    doc = {"type": "FeatureCollection", "features": [
        {"type": "Feature", "id": 7, "properties": {"name": "Seven"},
         "geometry": {"type": "LineString", "coordinates": [[24.94, 60.17], [24.95, 60.17]]}},
        {"type": "Feature", "properties": {"id": "b"},
         "geometry": {"type": "MultiLineString", "coordinates": [
             [[24.94, 60.18], [24.95, 60.18]], [[24.95, 60.18], [24.95, 60.19]]]}}]}
    path = tmp_path / "routes.geojson"
    path.write_text(json.dumps(doc))
    routes = load_routes(path, NET)
    assert sorted(routes) == ["7", "b"] and routes["7"].name == "Seven"
    np.testing.assert_allclose(routes["7"].xy, _expected([(24.94, 60.17), (24.95, 60.17)]))
    assert len(routes["b"].xy) == 4
    cases = [
        ({"type": "Feature", "properties": {}, "geometry": None}, "needs an id"),
        ({"type": "Feature", "id": "x", "properties": {}, "geometry": None},
         "route 'x': needs a LineString geometry or a non-empty 'ways' list"),
        ({"type": "Feature", "id": "x", "properties": {},
          "geometry": {"type": "Point", "coordinates": [0, 0]}}, "got 'Point'"),
        ({"type": "Feature", "id": "x", "properties": {},
          "geometry": {"type": "LineString", "coordinates": [[0, 0], [0, 0]]}},
         "route 'x': needs at least two distinct points"),
        ({"type": "Feature", "id": "x", "properties": {},
          "geometry": {"type": "LineString", "coordinates": [[0, 0], [0, 95]]}},
         "bad position"),
        ([], "expected a GeoJSON FeatureCollection"),
    ]
    for bad, needle in cases:
        with pytest.raises(BadRouteError, match=needle):
            parse_route_geojson(bad, NET, "doc")


def test_route_from_ways_chains_and_orients_ways():
    """Ways are joined end to end, each turned to start where the previous one ended."""
    net = grid(3, block=200.0, step=50.0)  # row 0 = way 1 (y=0), column 2 = way 6 (x=400)
    r = route_from_ways(net, [1, 6], "r")
    expected = [(x, 0.0) for x in range(0, 401, 50)] + [(400.0, y) for y in range(50, 401, 50)]
    np.testing.assert_array_equal(r.xy, np.array(expected, dtype=float))
    back = route_from_ways(net, [6, 1], "back")
    np.testing.assert_array_equal(back.xy, np.array(expected[::-1], dtype=float))
    with pytest.raises(BadRouteError, match="route 'r': way 5 does not start where"):
        route_from_ways(net, [1, 5], "r")
    with pytest.raises(BadRouteError, match="way 99 is not in the network"):
        route_from_ways(net, [1, 99], "r")
    with pytest.raises(BadRouteError, match="way ids must be integers"):
        route_from_ways(net, ["1"], "r")


def test_read_fences_geojson(tmp_path):
    """Polygons become projected fences with name, dwell and filters; areas agree with
    the WGS84 ellipsoid (pyproj Geod.geometry_area_perimeter) within 0.5 %."""
    ring = [[24.93, 60.16], [24.94, 60.16], [24.94, 60.17], [24.93, 60.17], [24.93, 60.16]]
    doc = {"type": "FeatureCollection", "features": [
        {"type": "Feature", "id": "depot", "properties": {
            "name": "Depot", "dwell_s": 900, "groups": ["night"]},
         "geometry": {"type": "Polygon", "coordinates": [ring]}},
        {"type": "Feature", "properties": {"id": 4, "vehicles": ["bus1"]},
         "geometry": {"type": "MultiPolygon", "coordinates": [[ring]]}}]}
    path = tmp_path / "fences.geojson"
    path.write_text(json.dumps(doc))
    fences = read_fences(path, PROJ)
    assert [(f.id, f.name, f.dwell_s, f.groups, f.vehicles) for f in fences] == [
        ("depot", "Depot", 900.0, frozenset({"night"}), None),
        ("4", None, None, None, frozenset({"bus1"}))]
    area, _ = GEOD.geometry_area_perimeter(shapely.Polygon(ring))
    assert fences[0].geometry.area == pytest.approx(abs(area), rel=5e-3)
    for bad, needle in [
        ({"type": "Feature", "id": "a", "geometry": {"type": "LineString",
                                                      "coordinates": [[0, 0], [1, 1]]}},
         "must be a Polygon or MultiPolygon"),
        ({"type": "Feature", "id": "a", "properties": {"dwell_s": -1},
          "geometry": {"type": "Polygon", "coordinates": [ring]}},
         "dwell_s must be a positive number"),
        ({"type": "Feature", "id": "a", "properties": {"groups": "night"},
          "geometry": {"type": "Polygon", "coordinates": [ring]}}, "groups must be a list"),
    ]:
        with pytest.raises(BadFenceError, match=needle):
            parse_fences(bad, PROJ, "doc")
