"""Projections between WGS84 and local metres, and small planar helpers.

Everything inside livematch is metres in one projected CRS chosen per network; never
degrees. :class:`Projection` wraps a pair of pyproj transformers.

The default projection is a local azimuthal equidistant (AEQD) about the network's
centre: distances from the centre are exact and the scale error stays below 0.1 % within
about 100 km of it, which covers any city network, with no zone boundaries to worry about.
A UTM zone or any EPSG code can be asked for instead.
"""

from __future__ import annotations

import math
import typing
from collections.abc import Callable

import numpy as np
import numpy.typing as npt
from pyproj import CRS, Transformer
from pyproj.enums import TransformDirection

from livematch.errors import BadNetworkError

FloatArray = npt.NDArray[np.float64]


class Projection:
    """A projected CRS in metres with transforms to and from WGS84 lon/lat.

    Args:
        crs: anything :class:`pyproj.CRS` accepts (a PROJ string, ``"EPSG:32635"``...).
            It must be projected with metre units.

    Example:
        >>> p = Projection.local(24.94, 60.17)
        >>> x, y = p.to_xy(24.94, 60.17)
        >>> round(float(x), 6), round(float(y), 6)
        (0.0, 0.0)
    """

    __slots__ = ("_forward", "_inverse", "_point_forward", "_point_inverse", "crs")

    def __init__(self, crs: str) -> None:
        try:
            parsed = CRS.from_user_input(crs)
        except Exception as exc:  # pyproj raises CRSError, a plain Exception subclass
            raise BadNetworkError(f"unknown CRS {crs!r}: {exc}") from exc
        if not parsed.is_projected:
            raise BadNetworkError(f"CRS {crs!r} is not projected; livematch works in metres")
        unit = parsed.axis_info[0].unit_name if parsed.axis_info else ""
        if unit not in ("metre", "meter"):
            raise BadNetworkError(f"CRS {crs!r} has unit {unit!r}; livematch works in metres")
        self.crs = crs
        self._forward = Transformer.from_crs("EPSG:4326", parsed, always_xy=True)
        self._inverse = Transformer.from_crs(parsed, "EPSG:4326", always_xy=True)
        self._point_forward = _one_point(self._forward)
        self._point_inverse = _one_point(self._inverse)

    @classmethod
    def local(cls, lon0: float, lat0: float) -> Projection:
        """Azimuthal equidistant projection centred on (lon0, lat0), WGS84 ellipsoid."""
        return cls(
            f"+proj=aeqd +lat_0={lat0:.7f} +lon_0={lon0:.7f} +x_0=0 +y_0=0 "
            "+ellps=WGS84 +units=m +no_defs"
        )

    @classmethod
    def utm(cls, lon0: float, lat0: float) -> Projection:
        """The WGS84 UTM zone containing (lon0, lat0) (EPSG 326xx north, 327xx south)."""
        zone = min(60, max(1, math.floor((lon0 + 180.0) / 6.0) + 1))
        return cls(f"EPSG:{(32600 if lat0 >= 0 else 32700) + zone}")

    @classmethod
    def for_extent(
        cls, lon: FloatArray, lat: FloatArray, kind: str = "local", epsg: int | None = None
    ) -> Projection:
        """Choose a projection for points spread over an area.

        Args:
            lon, lat: WGS84 degrees of the points (at least one).
            kind: ``"local"`` (AEQD about the bounding-box centre) or ``"utm"``.
            epsg: if given, that EPSG code wins over ``kind``.
        """
        if epsg is not None:
            return cls(f"EPSG:{epsg}")
        if len(lon) == 0:
            raise BadNetworkError("cannot choose a projection for an empty set of points")
        lon0 = (float(np.min(lon)) + float(np.max(lon))) / 2.0
        lat0 = (float(np.min(lat)) + float(np.max(lat))) / 2.0
        if kind == "utm":
            return cls.utm(lon0, lat0)
        if kind != "local":
            raise BadNetworkError(f"unknown projection kind {kind!r}; use 'local' or 'utm'")
        return cls.local(lon0, lat0)

    def to_xy(self, lon: npt.ArrayLike, lat: npt.ArrayLike) -> tuple[FloatArray, FloatArray]:
        """WGS84 degrees to projected metres (arrays or scalars in, float arrays out)."""
        x, y = self._forward.transform(np.asarray(lon, float), np.asarray(lat, float))
        return np.asarray(x, float), np.asarray(y, float)

    def to_lonlat(self, x: npt.ArrayLike, y: npt.ArrayLike) -> tuple[FloatArray, FloatArray]:
        """Projected metres to WGS84 degrees."""
        lon, lat = self._inverse.transform(np.asarray(x, float), np.asarray(y, float))
        return np.asarray(lon, float), np.asarray(lat, float)

    def point_to_xy(self, lon: float, lat: float) -> tuple[float, float]:
        """One point, WGS84 degrees to projected metres, as plain floats.

        The same PROJ operation as :meth:`to_xy` (the same numbers), without the array
        round trip that costs several times the projection itself for one point: the
        per-message path of the service. Where pyproj has it, its one-point routine is
        called directly (see :func:`_one_point`).

        Example:
            >>> p = Projection.local(24.94, 60.17)
            >>> p.point_to_xy(24.95, 60.17) == tuple(float(v) for v in p.to_xy(24.95, 60.17))
            True
        """
        x, y = self._point_forward(float(lon), float(lat), None, None, _FORWARD, False, False)
        return x, y

    def point_to_lonlat(self, x: float, y: float) -> tuple[float, float]:
        """One point, projected metres to WGS84 degrees, as plain floats (see above)."""
        lon, lat = self._point_inverse(float(x), float(y), None, None, _FORWARD, False, False)
        return lon, lat

    def north_bearing(self, x: npt.ArrayLike, y: npt.ArrayLike) -> FloatArray:
        """The grid bearing of true north at projected points, radians clockwise from +y.

        A bearing measured from true north (a receiver's course over ground, GTFS-realtime's
        ``bearing``) is, in this CRS's grid, that bearing plus this angle: the meridian
        convergence, which grows with the distance from the projection's central meridian
        (about 1.8 degrees at Helsinki in UTM zone 35, from memory) and is near 0 about
        the centre of a local AEQD. Found by projecting a point 1e-5 degrees of latitude
        (about 1.1 m) north of each point (south of it within that of a pole, and turned
        round), so it is the direction the meridian takes through the point.

        Example (the centre of a local projection; Helsinki, 2.06 degrees west of UTM zone
        35's central meridian):
            >>> float(Projection.local(24.94, 60.17).north_bearing(0.0, 0.0))
            0.0
            >>> p = Projection.utm(24.94, 60.17)
            >>> x, y = p.to_xy(24.94, 60.17)
            >>> round(math.degrees(float(p.north_bearing(x, y))), 2)
            1.79
        """
        lon, lat = self.to_lonlat(x, y)
        step = np.where(lat > 89.0, -1e-5, 1e-5)
        x0, y0 = self.to_xy(lon, lat)
        x1, y1 = self.to_xy(lon, lat + step)
        sign = np.sign(step)
        out: FloatArray = np.arctan2(sign * (x1 - x0), sign * (y1 - y0))
        return out

    def __repr__(self) -> str:
        return f"Projection({self.crs!r})"


_FORWARD = TransformDirection.FORWARD
#: (x, y, z, time, direction, radians, errcheck) -> the transformed (x, y)
_PointFunction = Callable[[float, float, None, None, TransformDirection, bool, bool],
                          tuple[float, float]]


def _one_point(transformer: Transformer) -> _PointFunction:
    """The routine ``transformer.transform`` runs for one point, called without it.

    For two plain floats ``Transformer.transform`` calls the compiled
    ``_transformer._transform_point`` with its arguments by keyword, inside a ``try``
    (it falls back to the array path on a ``TypeError``): about a third of the cost of
    a one-point transform in the service (0.8 of 2.8 µs, measured with timeit). Called
    directly with the same arguments (``z`` and time None, forward, degrees, no error
    check: ``transform``'s defaults) it gives the same numbers (``tests/test_geometry.py``
    compares the two). A pyproj without that routine gets ``transform`` itself.
    """
    inner = getattr(getattr(transformer, "_transformer", None), "_transform_point", None)
    if callable(inner):
        return typing.cast(_PointFunction, inner)
    public = transformer.transform

    def point(x: float, y: float, z: None, t: None, direction: TransformDirection,
              radians: bool, errcheck: bool) -> tuple[float, float]:
        return typing.cast(tuple[float, float], public(
            x, y, direction=direction, radians=radians, errcheck=errcheck))

    return point


def as_polyline(points: npt.ArrayLike) -> FloatArray:
    """Return ``points`` as a C-contiguous float64 (n, 2) array, n >= 1.

    A single point is a valid (degenerate) polyline; an empty one is not.

    >>> as_polyline([[0, 0], [3, 4]]).shape
    (2, 2)
    >>> as_polyline([1.0, 2.0]).shape
    (1, 2)
    """
    arr = np.ascontiguousarray(np.asarray(points, dtype=np.float64))
    if arr.ndim == 1 and arr.shape[0] == 2:
        arr = arr.reshape(1, 2)
    if arr.ndim != 2 or arr.shape[1] != 2:
        raise ValueError(f"a polyline must be an (n, 2) array, got shape {arr.shape}")
    if arr.shape[0] == 0:
        raise ValueError("a polyline needs at least one point, got none")
    if not np.all(np.isfinite(arr)):
        raise ValueError("a polyline must have finite coordinates")
    return arr


def segment_param_interval(
    ax: float, ay: float, bx: float, by: float, px: float, py: float, eps: float
) -> tuple[float, float]:
    """The parameters x in [0, 1] with ``|a + x (b - a) - p| <= eps``, as (lo, hi).

    This is the free interval of segment a->b at point p: a disc meets a segment in one
    interval (convexity), found by solving a quadratic. Returns ``(1.0, 0.0)`` (lo > hi)
    when it is empty. A zero-length segment gives ``(0, 1)`` or empty.

    >>> segment_param_interval(0, 0, 10, 0, 5, 3, 5)
    (0.1, 0.9)
    >>> segment_param_interval(0, 0, 0, 0, 1, 0, 2)
    (0.0, 1.0)
    """
    dx, dy = bx - ax, by - ay
    fx, fy = ax - px, ay - py
    a = dx * dx + dy * dy
    c = fx * fx + fy * fy - eps * eps
    if a <= 0.0:
        return (0.0, 1.0) if c <= 0.0 else (1.0, 0.0)
    b = 2.0 * (fx * dx + fy * dy)
    disc = b * b - 4.0 * a * c
    if disc < 0.0:
        return (1.0, 0.0)
    root = math.sqrt(disc)
    lo = (-b - root) / (2.0 * a)
    hi = (-b + root) / (2.0 * a)
    lo = max(lo, 0.0)
    hi = min(hi, 1.0)
    if lo > hi:
        return (1.0, 0.0)
    return (lo, hi)


def project_on_segment(
    ax: float, ay: float, bx: float, by: float, px: float, py: float
) -> tuple[float, float]:
    """Closest point of segment a->b to p, as (parameter in [0, 1], distance in metres).

    >>> project_on_segment(0, 0, 10, 0, 4, 3)
    (0.4, 3.0)
    >>> project_on_segment(2, 2, 2, 2, 5, 6)
    (0.0, 5.0)
    """
    dx, dy = bx - ax, by - ay
    a = dx * dx + dy * dy
    if a <= 0.0:
        return 0.0, math.hypot(px - ax, py - ay)
    x = ((px - ax) * dx + (py - ay) * dy) / a
    x = min(1.0, max(0.0, x))
    return x, math.hypot(ax + x * dx - px, ay + x * dy - py)
