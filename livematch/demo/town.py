"""Larkmoor: an invented town whose road network the demo scenario and samples drive on.

Everything here is made up: the town, its streets, stops and depot. The town is placed,
as plain coordinates, at lon 10.0, lat 50.0 and drawn in metres with
:meth:`Projection.local <livematch.core.geometry.Projection.local>` about that point, so
x points east and y north, in metres from the town centre.

The layout (all distances in metres):

* a grid of 11 x 11 streets over 2 x 2 km (x and y from -1000 to 1000), blocks 190–210 m
  apart, shape points about every 25 m (:data:`GRID_X`, :data:`GRID_Y`);
* two one-way pairs: Flax Street (northbound) / Osier Street (southbound) and Kiln Street
  (eastbound) / Tanner Row (westbound);
* two curving arterials (``primary``): Weir Road, a gentle wave between Bridge Street and
  Chapel Row from the west to the east side of the ring, and Millrace Way, an S-curve from
  the south-west to the north-east corner of the ring;
* Tollgate Circle, a one-way roundabout (anticlockwise, radius 28 m) where Larch Street
  meets Quarry Street;
* Larkmoor Ring, a ring road around the town (a rounded square, sides at +-1250 m, corner
  radius 250 m) joined to the grid by six spoke streets and the two arterials;
* a depot on Depot Road south of the grid, with a service loop (Depot Yard);
* four dead-end closes (cul-de-sacs), two-way.

Roads that cross share a vertex there (the crossing is inserted into both polylines, or
an existing vertex within 3 m is reused), so every crossing is a junction; there are no
bridges. Every road is drivable both ways unless it is one-way, so the whole network is
one strongly connected part (the closes are two-way dead ends).

:func:`build_town` is pure and deterministic (no I/O, no randomness): the same call gives
the same network, vertex numbering and places every time.

Example:
    >>> town = build_town()
    >>> town.name, town.place("Larkmoor Depot").kind
    ('Larkmoor', 'depot')
    >>> town.network.n_segments > 5000
    True
"""

from __future__ import annotations

import itertools
import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import shapely

from livematch.core.build import Road, network_from_roads
from livematch.core.geometry import Projection
from livematch.core.network import RoadNetwork

__all__ = [
    "CENTRE_BOX",
    "DEPOT_BOX",
    "GRID_X",
    "GRID_Y",
    "LAT0",
    "LON0",
    "ROUNDABOUT_CENTRE",
    "ROUNDABOUT_RADIUS",
    "Place",
    "Town",
    "build_town",
    "roads_geojson",
]

#: Where the invented town sits (WGS84 degrees; just coordinates, no real place meant).
LON0, LAT0 = 10.0, 50.0
#: Grid street positions, metres (x of the north-south streets, y of the east-west ones).
GRID_X = (-1000.0, -800.0, -590.0, -400.0, -200.0, 0.0, 210.0, 400.0, 600.0, 790.0, 1000.0)
GRID_Y = (-1000.0, -790.0, -600.0, -410.0, -200.0, 0.0, 190.0, 400.0, 610.0, 800.0, 1000.0)
NS_NAMES = ("Alder Street", "Bramble Street", "Cooper's Row", "Flax Street", "Osier Street",
            "Market Street", "Hazel Street", "Larch Street", "Rowan Street", "Sorrel Street",
            "Teasel Street")
EW_NAMES = ("South Parade", "Linnet Street", "Quarry Street", "Kiln Street", "Tanner Row",
            "Bridge Street", "Chapel Row", "Thistle Street", "Yarrow Street",
            "Reedbank Street", "North Parade")
RING_HALF = 1250.0  # half side of Larkmoor Ring, m
RING_CORNER = 250.0  # corner radius of the ring, m (corner centres at +-1000, +-1000)
ROUNDABOUT_CENTRE = (400.0, -600.0)  # Larch Street x Quarry Street
ROUNDABOUT_RADIUS = 28.0
#: The "tall buildings" of the centre (xmin, ymin, xmax, ymax), where GPS degrades.
CENTRE_BOX = (-300.0, -250.0, 300.0, 250.0)
#: The depot's grounds (xmin, ymin, xmax, ymax), around Depot Yard.
DEPOT_BOX = (-15.0, -1185.0, 90.0, -1075.0)
STEP_M = 25.0  # spacing of shape points
SNAP_M = 3.0  # a crossing this close to an existing vertex joins at that vertex

_CORNER = RING_HALF - RING_CORNER + RING_CORNER / math.sqrt(2.0)  # 45-degree ring point


@dataclass(frozen=True, slots=True)
class Place:
    """A named place of the town, at a network vertex.

    Attributes:
        name: invented name.
        kind: ``"stop"`` (bus stop), ``"depot"`` or ``"landmark"``.
        x, y: position, metres (the vertex's coordinates).
        vertex: index of the network vertex at the place.
        road: name of the road the place is on.
    """

    name: str
    kind: str
    x: float
    y: float
    vertex: int
    road: str


@dataclass(frozen=True)
class Town:
    """The generated town: network, the roads it was built from, and named places.

    Attributes:
        name: the town's (invented) name.
        network: the directed segment network (projection: local AEQD at LON0, LAT0).
        roads: the noded roads, in the order the network was built from them.
        places: bus stops, the depot and landmarks.
        centre: the tall-buildings area, as a shapely Polygon in metres.
        depot_area: the depot's grounds, a shapely Polygon in metres.
    """

    name: str
    network: RoadNetwork
    roads: tuple[Road, ...]
    places: tuple[Place, ...]
    centre: shapely.Polygon
    depot_area: shapely.Polygon

    def place(self, name: str) -> Place:
        """The place called ``name`` (KeyError naming it when there is none)."""
        for p in self.places:
            if p.name == name:
                return p
        raise KeyError(f"Larkmoor has no place called {name!r}")

    def stops(self) -> tuple[Place, ...]:
        """The bus stops."""
        return tuple(p for p in self.places if p.kind == "stop")


def _r(v: float) -> float:
    """Round a coordinate to the millimetre (so shared points compare equal exactly)."""
    return round(float(v), 3) + 0.0  # + 0.0 turns -0.0 into 0.0


def densify(points: Sequence[tuple[float, float]], step: float = STEP_M
            ) -> list[tuple[float, float]]:
    """``points`` with extra points so that no piece is longer than ``step`` metres.

    The given points are kept exactly (rounded to the millimetre); the pieces between two
    of them are equal.

    >>> densify([(0, 0), (60, 0)])
    [(0.0, 0.0), (20.0, 0.0), (40.0, 0.0), (60.0, 0.0)]
    >>> densify([(5, 5)])
    [(5.0, 5.0)]
    """
    out = [(_r(points[0][0]), _r(points[0][1]))]
    for (ax, ay), (bx, by) in itertools.pairwise(points):
        n = max(1, math.ceil(math.hypot(bx - ax, by - ay) / step - 1e-9))
        for k in range(1, n + 1):
            out.append((_r(ax + (bx - ax) * k / n), _r(ay + (by - ay) * k / n)))
    return out


@dataclass
class _Draft:
    """A road under construction (coordinates still change while crossings are noded)."""

    coords: list[tuple[float, float]]
    way: int
    name: str
    highway: str
    oneway: bool = False


def _ring_coords() -> list[tuple[float, float]]:
    """Larkmoor Ring, clockwise from the north end of its north-east corner, closed.

    Each corner is sampled every 7.5 degrees (45 degrees included exactly, where Millrace
    Way ends); the straight sides come from joining the corners.
    """
    c, r = RING_HALF - RING_CORNER, RING_CORNER
    pts: list[tuple[float, float]] = []
    for cx, cy, a0 in ((c, c, 90.0), (c, -c, 0.0), (-c, -c, -90.0), (-c, c, 180.0)):
        for k in range(13):
            a = math.radians(a0 - 7.5 * k)
            pts.append((cx + r * math.cos(a), cy + r * math.sin(a)))
    return densify([*pts, pts[0]])


def _roads() -> list[_Draft]:
    """All roads of Larkmoor before noding, in a fixed order."""
    roads: list[_Draft] = []
    ys_full = (-RING_HALF, *GRID_Y, RING_HALF)
    spokes_ns = {2, 5, 8}  # Cooper's Row, Market Street (north only), Rowan Street
    spokes_ew = {2, 8}  # Quarry Street, Yarrow Street
    cx, cy = ROUNDABOUT_CENTRE
    rr = ROUNDABOUT_RADIUS
    for i, x in enumerate(GRID_X):
        name = NS_NAMES[i]
        if i in spokes_ns:
            ys = [y for y in ys_full if not (i == 5 and y == -RING_HALF)]
        else:
            ys = list(GRID_Y)
        oneway = name in ("Flax Street", "Osier Street")
        highway = "tertiary" if oneway or i in spokes_ns else "residential"
        if name == "Osier Street":
            ys = ys[::-1]  # southbound: drawn north to south
        if x == cx:  # Larch Street is cut by Tollgate Circle
            south = [y for y in ys if y < cy] + [cy - rr]
            north = [cy + rr] + [y for y in ys if y > cy]
            roads.append(_Draft(densify([(x, y) for y in south]), 100 + i, name, highway))
            roads.append(_Draft(densify([(x, y) for y in north]), 150 + i, name, highway))
            continue
        roads.append(_Draft(densify([(x, y) for y in ys]), 100 + i, name, highway, oneway))
    xs_full = (-RING_HALF, *GRID_X, RING_HALF)
    for j, y in enumerate(GRID_Y):
        name = EW_NAMES[j]
        xs = list(xs_full) if j in spokes_ew else list(GRID_X)
        oneway = name in ("Kiln Street", "Tanner Row")
        highway = "tertiary" if oneway or j in spokes_ew else "residential"
        if name == "Tanner Row":
            xs = xs[::-1]  # westbound: drawn east to west
        if y == cy:  # Quarry Street is cut by Tollgate Circle
            west = [v for v in xs if v < cx] + [cx - rr]
            east = [cx + rr] + [v for v in xs if v > cx]
            roads.append(_Draft(densify([(v, y) for v in west]), 200 + j, name, highway))
            roads.append(_Draft(densify([(v, y) for v in east]), 250 + j, name, highway))
            continue
        roads.append(_Draft(densify([(v, y) for v in xs]), 200 + j, name, highway, oneway))
    # Weir Road: straight outside the grid, a wave of +-50 m about y = 95 inside it.
    wave = [(-RING_HALF, 95.0)]
    wave += [(x, 95.0 + 50.0 * math.sin(2.0 * math.pi * x / 1000.0))
             for x in np.arange(-1000.0, 1000.0 + 1.0, STEP_M)]
    wave += [(RING_HALF, 95.0)]
    roads.append(_Draft(densify(wave), 301, "Weir Road", "primary"))
    # Millrace Way: an S-curve between the 45-degree points of the SW and NE ring corners.
    s_vals = np.linspace(-_CORNER, _CORNER, 139)
    curve = [(s, s + 100.0 * math.sin(math.pi * s / _CORNER)) for s in s_vals]
    roads.append(_Draft(densify(curve), 302, "Millrace Way", "primary"))
    roads.append(_Draft(_ring_coords(), 401, "Larkmoor Ring", "secondary"))
    # Tollgate Circle: anticlockwise (traffic keeps right), 24 points, closed.
    circle = []
    for k in range(24):
        a = math.radians(15.0 * k)
        circle.append((_r(cx + rr * math.cos(a)), _r(cy + rr * math.sin(a))))
    circle.append(circle[0])
    roads.append(_Draft(circle, 501, "Tollgate Circle", "tertiary", oneway=True))
    roads.append(_Draft(densify([(0.0, -1000.0), (0.0, -RING_HALF)]), 601, "Depot Road",
                        "service"))
    roads.append(_Draft(densify([(0.0, -1090.0), (70.0, -1090.0), (70.0, -1170.0),
                                 (0.0, -1170.0)], step=20.0), 602, "Depot Yard", "service"))
    closes = (
        (701, "Tansy Close", [(-700.0, 610.0), (-700.0, 705.0)]),
        (702, "Pennywort Close", [(500.0, -1000.0), (500.0, -905.0)]),
        (703, "Sedge Close", [(-1000.0, -300.0), (-905.0, -300.0)]),
        (704, "Quillwort Close", [(1000.0, 300.0), (905.0, 300.0)]),
    )
    for way, name, pts in closes:
        roads.append(_Draft(densify(pts), way, name, "residential"))
    return roads


def _points_of(geom: shapely.Geometry) -> list[tuple[float, float]]:
    """The points of an intersection result (Point, MultiPoint or a collection)."""
    if geom.is_empty:
        return []
    if isinstance(geom, shapely.Point):
        return [(geom.x, geom.y)]
    if isinstance(geom, shapely.MultiPoint | shapely.GeometryCollection):
        out: list[tuple[float, float]] = []
        for part in geom.geoms:
            out.extend(_points_of(part))
        return out
    raise ValueError(f"Larkmoor roads overlap along a line: {geom.wkt[:80]}")


def _join(coords: list[tuple[float, float]], p: tuple[float, float],
          used: dict[tuple[float, float], int]) -> None:
    """Make ``p`` a vertex of the polyline ``coords``.

    Nothing to do when it is one already. A vertex within :data:`SNAP_M` that no other
    road uses is moved onto ``p`` (no sliver segment); otherwise ``p`` is inserted into
    the nearest piece. ``used`` counts the roads using each position and is kept current.
    """
    if p in coords:
        return
    arr = np.asarray(coords)
    near = np.hypot(arr[:, 0] - p[0], arr[:, 1] - p[1])
    for k in np.argsort(near, kind="stable")[:2].tolist():
        v = coords[k]
        if near[k] <= SNAP_M and used.get(v, 0) <= 1:
            coords[k] = p
            used[v] -= 1
            used[p] = used.get(p, 0) + 1
            return
    a, b = arr[:-1], arr[1:]
    d = b - a
    ln2 = np.maximum((d * d).sum(axis=1), 1e-12)
    t = np.clip(((p[0] - a[:, 0]) * d[:, 0] + (p[1] - a[:, 1]) * d[:, 1]) / ln2, 0.0, 1.0)
    dist = np.hypot(a[:, 0] + t * d[:, 0] - p[0], a[:, 1] + t * d[:, 1] - p[1])
    coords.insert(int(np.argmin(dist)) + 1, p)
    used[p] = used.get(p, 0) + 1


def _node(roads: list[_Draft]) -> None:
    """Make every crossing of two roads a shared vertex of both (in place).

    The junction is an existing vertex of either road within :data:`SNAP_M` of the
    crossing when there is one (the nearest), else the crossing itself.
    """
    used: dict[tuple[float, float], int] = {}
    for road in roads:
        for v in set(road.coords):
            used[v] = used.get(v, 0) + 1
    for i in range(len(roads)):
        for j in range(i + 1, len(roads)):
            a, b = roads[i].coords, roads[j].coords
            la, lb = shapely.LineString(a), shapely.LineString(b)
            if not shapely.intersects(la, lb):
                continue
            for px, py in _points_of(shapely.intersection(la, lb)):
                best: tuple[float, float] | None = None
                best_d = SNAP_M
                for v in (*a, *b):
                    dv = math.hypot(v[0] - px, v[1] - py)
                    if dv <= best_d:
                        best, best_d = v, dv
                q = best if best is not None else (_r(px), _r(py))
                _join(a, q, used)
                _join(b, q, used)


def _place_specs() -> list[tuple[str, str, str, float, float]]:
    """(name, kind, road, x, y) of Larkmoor's named places, positions approximate."""
    weir = [(x, 95.0 + 50.0 * math.sin(2.0 * math.pi * x / 1000.0))
            for x in (-750.0, -250.0, 250.0, 750.0)]
    mill = [(s, s + 100.0 * math.sin(math.pi * s / _CORNER)) for s in (-600.0, 600.0)]
    return [
        ("Larkmoor Depot", "depot", "Depot Yard", 70.0, -1130.0),
        ("Weir Road West", "stop", "Weir Road", *weir[0]),
        ("Market Cross", "stop", "Weir Road", *weir[1]),
        ("Weir Bridge", "stop", "Weir Road", *weir[2]),
        ("Weir Road East", "stop", "Weir Road", *weir[3]),
        ("Thistle Green", "stop", "Thistle Street", -700.0, 400.0),
        ("Chapel Fields", "stop", "Thistle Street", -100.0, 400.0),
        ("Thistle Street East", "stop", "Thistle Street", 500.0, 400.0),
        ("Quarry Hill", "stop", "Quarry Street", -700.0, -600.0),
        ("Quarry Street Centre", "stop", "Quarry Street", -100.0, -600.0),
        ("Tollgate", "stop", "Quarry Street", 700.0, -600.0),
        ("Tanner Row East", "stop", "Tanner Row", 700.0, -200.0),
        ("Tannery", "stop", "Tanner Row", 100.0, -200.0),
        ("Tanner Row West", "stop", "Tanner Row", -700.0, -200.0),
        ("Flax Mill", "stop", "Flax Street", -400.0, -700.0),
        ("Flax Street North", "stop", "Flax Street", -400.0, 300.0),
        ("Osier Bank", "stop", "Osier Street", -200.0, 500.0),
        ("Osier Street South", "stop", "Osier Street", -200.0, -500.0),
        ("Millrace South", "stop", "Millrace Way", *mill[0]),
        ("Millrace North", "stop", "Millrace Way", *mill[1]),
        ("Ring East", "stop", "Larkmoor Ring", RING_HALF, 0.0),
        ("Ring South", "stop", "Larkmoor Ring", 600.0 - 100.0, -RING_HALF),
        ("Ring South West", "stop", "Larkmoor Ring", -300.0, -RING_HALF),
        ("Tollgate Circle", "landmark", "Tollgate Circle", *ROUNDABOUT_CENTRE),
    ]


def build_town() -> Town:
    """Generate Larkmoor (pure, deterministic; see the module docstring for the layout).

    Places are put at the network vertex of their road nearest to the position given in
    the specification (the roundabout landmark at the vertex nearest its centre).
    """
    drafts = _roads()
    _node(drafts)
    roads = tuple(Road(coords=tuple(d.coords), way=d.way, oneway=d.oneway, name=d.name,
                       highway=d.highway) for d in drafts)
    network = network_from_roads(roads, Projection.local(LON0, LAT0))
    network.source = "Larkmoor (invented demo town)"
    places = []
    index = {xy: v for v, xy in enumerate(map(tuple, network.node_xy.tolist()))}
    for name, kind, road_name, x, y in _place_specs():
        coords = np.asarray([p for r in roads if r.name == road_name for p in r.coords])
        k = int(np.argmin(np.hypot(coords[:, 0] - x, coords[:, 1] - y)))
        px, py = float(coords[k, 0]), float(coords[k, 1])
        places.append(Place(name, kind, px, py, index[(px, py)], road_name))
    return Town(
        name="Larkmoor",
        network=network,
        roads=roads,
        places=tuple(places),
        centre=shapely.box(*CENTRE_BOX),
        depot_area=shapely.box(*DEPOT_BOX),
    )


def roads_geojson(town: Town) -> dict[str, Any]:
    """The town's roads as a GeoJSON FeatureCollection in WGS84 (for ``--network``).

    One LineString Feature per road with ``id`` (the road's ``way``) and properties
    ``name``, ``ref`` (null), ``highway`` and ``oneway`` (a boolean), the members read by
    :mod:`livematch.mapdata.geojson`. Coordinates are rounded to 1e-7 degree (about
    1 cm); importing the file gives the same vertices, numbered in the same order, so the
    node ids of the imported network equal those of ``town.network``.
    """
    projection = town.network.projection
    features = []
    for road in town.roads:
        xy = np.asarray(road.coords, dtype=float)
        lon, lat = projection.to_lonlat(xy[:, 0], xy[:, 1])
        features.append({
            "type": "Feature",
            "id": road.way,
            "properties": {"name": road.name, "ref": None, "highway": road.highway,
                           "oneway": road.oneway},
            "geometry": {"type": "LineString",
                         "coordinates": [[round(float(a), 7), round(float(b), 7)]
                                         for a, b in zip(lon, lat, strict=True)]},
        })
    return {"type": "FeatureCollection", "features": features}
