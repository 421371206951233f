"""Projection: the one-point path equals the array path; AEQD keeps distances from its centre."""

from __future__ import annotations

from typing import Any

import numpy as np
from pyproj import Geod, Transformer
from pyproj.enums import TransformDirection

from livematch.core.geometry import Projection, _one_point


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


def test_projection_point_methods_equal_pyproj_transform() -> None:
    """The one-point routine called directly gives Transformer.transform's floats exactly.

    Reference: pyproj's public Transformer.transform on transformers built here (local
    AEQD about Helsinki and the UTM zone EPSG:32635), both directions.
    """
    rng = np.random.default_rng(12)
    lon = 24.94 + rng.uniform(-0.3, 0.3, 300)
    lat = 60.17 + rng.uniform(-0.15, 0.15, 300)
    for p in (Projection.local(24.94, 60.17), Projection.utm(24.94, 60.17)):
        forward = Transformer.from_crs("EPSG:4326", p.crs, always_xy=True)
        inverse = Transformer.from_crs(p.crs, "EPSG:4326", always_xy=True)
        for a, b in zip(lon.tolist(), lat.tolist(), strict=True):
            x, y = p.point_to_xy(a, b)
            assert (x, y) == forward.transform(a, b)
            assert p.point_to_lonlat(x, y) == inverse.transform(x, y)


def test_one_point_falls_back_to_transform_without_the_routine() -> None:
    """A transformer without pyproj's one-point routine is called through transform()."""

    class PublicOnly:
        """Only the public method of a real pyproj Transformer."""

        def __init__(self) -> None:
            self.real = Transformer.from_crs("EPSG:4326", "EPSG:32635", always_xy=True)

        def transform(self, *args: Any, **kwargs: Any) -> Any:
            return self.real.transform(*args, **kwargs)

    point = _one_point(PublicOnly())  # type: ignore[arg-type]
    want = Transformer.from_crs("EPSG:4326", "EPSG:32635", always_xy=True).transform(25.0, 60.0)
    assert point(25.0, 60.0, None, None, TransformDirection.FORWARD, False, False) == want
