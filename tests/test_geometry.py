"""Projection: the one-point path equals the array path; AEQD keeps distances from its centre."""

from __future__ import annotations

import numpy as np
from pyproj import Geod

from livematch.core.geometry import Projection


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
