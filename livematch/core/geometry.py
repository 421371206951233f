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
from collections.abc import Callable

import numpy as np
import numpy.typing as npt
from pyproj import CRS, Transformer

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

    __slots__ = ("_forward", "_inverse", "_quick_lonlat", "crs")

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
        # the published records' path back to WGS84 (built on first use): 200 m cells
        self._quick_lonlat: PointGrid | None = None

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
        per-message path of the service.

        Example:
            >>> p = Projection.local(24.94, 60.17)
            >>> p.point_to_xy(24.95, 60.17) == tuple(float(v) for v in p.to_xy(24.95, 60.17))
            True
        """
        x, y = self._forward.transform(float(lon), float(lat))
        return x, y

    def point_to_lonlat(self, x: float, y: float) -> tuple[float, float]:
        """One point, projected metres to WGS84 degrees, as plain floats (see above)."""
        lon, lat = self._inverse.transform(float(x), float(y))
        return lon, lat

    def quick_to_lonlat(self, x: float, y: float) -> tuple[float, float]:
        """One point, projected metres to WGS84 degrees, from a :class:`PointGrid`.

        Within about 2e-13 degree (a few nanometres) of :meth:`point_to_lonlat`, which
        is checked for every cell of the grid when it is filled (where the check fails,
        near a singular point of the projection, the answer is :meth:`point_to_lonlat`'s),
        at about half its cost: the published records convert one or two points per
        message back to WGS84. Records round to 1e-7 degree, so a published digit can
        differ from pyproj's only where pyproj's value lies within 2e-13 degree of a
        rounding boundary (``bench/outputs.py`` prints the same digest either way).

        Why not the way in too: the matcher breaks exact ties (the two directions of a
        two-way road) on the last bits of a fix's coordinates, so a fix projected with a
        nanometre's difference can be matched to the other direction; the decoder keeps
        :meth:`point_to_xy`.

        Example:
            >>> p = Projection.local(24.94, 60.17)
            >>> lon, lat = p.quick_to_lonlat(500.0, -250.0)
            >>> elon, elat = p.point_to_lonlat(500.0, -250.0)
            >>> abs(lon - elon) < 1e-12 and abs(lat - elat) < 1e-12
            True
        """
        grid = self._quick_lonlat
        if grid is None:
            grid = self._quick_lonlat = PointGrid(self.point_to_lonlat, 200.0, 1e-12)
        return grid(x, y)

    def __repr__(self) -> str:
        return f"Projection({self.crs!r})"


#: Coefficients of u**0, u**1, u**2 of the quadratic through values at u = 0, 0.5, 1.
_QUADRATIC = np.array([[1.0, 0.0, 0.0], [-3.0, 4.0, -1.0], [2.0, -4.0, 2.0]])
_NODES = (0.0, 0.5, 1.0)
#: Where a filled cell is checked against the exact map (away from every node).
_CHECKS = ((0.25, 0.75), (0.8, 0.3))


class PointGrid:
    """A smooth map of the plane evaluated point by point from cached quadratic pieces.

    The plane is cut into square cells of side ``step`` (in the map's input units).
    The first point that falls in a cell fills it: the exact map at the cell's 3 x 3
    nodes (corners, edge midpoints, centre) gives the biquadratic that passes through
    them, and the exact map at two more points of the cell must agree with it within
    ``tolerance`` (in output units) or the cell is marked exact-only (near a singular
    point of a projection, or where it returns infinity). A point in a filled cell then
    costs a dict look-up and 16 multiplications per output coordinate instead of the
    exact map. The answer depends only on the point, never on which points came
    before (the cells lie on a fixed grid), so a replay gives the same bytes as the
    live run; at most ``max_cells`` cells are kept (all are dropped when full).

    Why it is accurate: a projection is smooth at the scale of a city block, and the
    error of a quadratic piece shrinks with the cube of the cell's side. For the
    azimuthal equidistant projection of :meth:`Projection.local`, 200 m cells stay
    within 2e-8 m of pyproj over 30 km about the centre (``tests/test_geometry.py``).

    Args:
        exact: the map, one point at a time (e.g. :meth:`Projection.point_to_lonlat`).
        step: side of a cell, in the input's units (metres or degrees).
        tolerance: largest difference from ``exact`` accepted at a cell's check
            points, in the output's units.
        max_cells: cells kept before the cache is emptied.

    Example (the identity doubled: a quadratic piece is exact for it; and a cell
    where the map is not finite falls back to the map itself):
        >>> grid = PointGrid(lambda a, b: (2.0 * a, 2.0 * b), 8.0, 1e-9)
        >>> grid(3.0, -4.0)
        (6.0, -8.0)
        >>> odd = PointGrid(lambda a, b: (1.0 / a if a else math.inf, b), 1.0, 1e-9)
        >>> odd(0.5, 1.0)
        (2.0, 1.0)
    """

    __slots__ = ("_cells", "_exact", "_inv_step", "max_cells", "step", "tolerance")

    def __init__(self, exact: Callable[[float, float], tuple[float, float]], step: float,
                 tolerance: float, max_cells: int = 4096) -> None:
        if not (step > 0 and math.isfinite(step)):
            raise ValueError(f"PointGrid step must be a finite number > 0, got {step!r}")
        self._exact = exact
        self.step = step
        self._inv_step = 1.0 / step
        self.tolerance = tolerance
        self.max_cells = max_cells
        # (i, j) -> (f0, g0, 8 coefficients of f, 8 of g), or None: exact-only cell
        self._cells: dict[tuple[int, int], tuple[float, ...] | None] = {}

    def __call__(self, a: float, b: float) -> tuple[float, float]:
        """The map at (a, b)."""
        fa = a * self._inv_step
        fb = b * self._inv_step
        try:
            i = math.floor(fa)
            j = math.floor(fb)
        except (OverflowError, ValueError):  # infinity or NaN: no cell
            return self._exact(a, b)
        cell = self._cells.get((i, j), _EMPTY)
        if cell is _EMPTY:
            cell = self._fill(i, j)
        if cell is None:
            return self._exact(a, b)
        u = fa - i
        v = fb - j
        (f0, f10, f20, f01, f11, f21, f02, f12, f22,
         g0, g10, g20, g01, g11, g21, g02, g12, g22) = cell
        f = f0 + (u * (f10 + u * f20)
                  + v * ((f01 + u * (f11 + u * f21)) + v * (f02 + u * (f12 + u * f22))))
        g = g0 + (u * (g10 + u * g20)
                  + v * ((g01 + u * (g11 + u * g21)) + v * (g02 + u * (g12 + u * g22))))
        return f, g

    def _fill(self, i: int, j: int) -> tuple[float, ...] | None:
        """Compute (and keep) the pieces of cell (i, j); None when it fails its check."""
        if len(self._cells) >= self.max_cells:
            self._cells.clear()
        step = self.step
        exact = self._exact
        values = np.array([[exact((i + du) * step, (j + dv) * step) for dv in _NODES]
                           for du in _NODES])  # [u node, v node, output]
        cell: tuple[float, ...] | None = None
        if np.all(np.isfinite(values)):
            parts: list[float] = []
            for k in range(2):
                base = float(values[0, 0, k])
                # monomial coefficients c[p, q] of u**p v**q, relative to the corner value
                c = _QUADRATIC @ (values[:, :, k] - base) @ _QUADRATIC.T
                parts += [base, float(c[1, 0]), float(c[2, 0]), float(c[0, 1]),
                          float(c[1, 1]), float(c[2, 1]), float(c[0, 2]), float(c[1, 2]),
                          float(c[2, 2])]
            cell = tuple(parts)
            self._cells[(i, j)] = cell
            for du, dv in _CHECKS:
                a, b = (i + du) * step, (j + dv) * step
                want = exact(a, b)
                got = self(a, b)
                if not (abs(got[0] - want[0]) <= self.tolerance
                        and abs(got[1] - want[1]) <= self.tolerance):
                    cell = None
                    break
        self._cells[(i, j)] = cell
        return cell


_EMPTY: tuple[float, ...] = ()


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
