"""The invented demo town Larkmoor: connectivity, one-way rules, junctions, GeoJSON form."""

from __future__ import annotations

import itertools

import networkx as nx
import numpy as np
import pytest
import shapely

from livematch.demo.town import (
    GRID_X,
    GRID_Y,
    ROUNDABOUT_CENTRE,
    ROUNDABOUT_RADIUS,
    build_town,
    roads_geojson,
)
from livematch.mapdata.geojson import parse_geojson


@pytest.fixture(scope="module")
def town():
    return build_town()


def _ways(town, name):
    return {r.way for r in town.roads if r.name == name}


def _segments_of(town, name):
    net = town.network
    ways = _ways(town, name)
    return [s for s in range(net.n_segments) if int(net.seg_way[s]) in ways]


def test_town_strongly_connected(town):
    """Every vertex lies in one strongly connected part (the closes are two-way)."""
    net = town.network
    # Reference: networkx's strongly_connected_components on the directed segment graph.
    graph = nx.DiGraph()
    graph.add_nodes_from(range(net.n_vertices))
    graph.add_edges_from(zip(net.seg_from.tolist(), net.seg_to.tolist(), strict=True))
    largest = max(nx.strongly_connected_components(graph), key=len)
    assert len(largest) / net.n_vertices == 1.0


def test_town_dead_ends_are_the_four_closes(town):
    """The only dead ends (a vertex whose one way out is back where it came from) end closes."""
    net = town.network
    ends = []
    for v in range(net.n_vertices):
        outs, ins = net.out_segments(v), net.in_segments(v)
        if len(outs) == 1 and len(ins) == 1 and net.seg_to[outs[0]] == net.seg_from[ins[0]]:
            ends.append(net.road_name(int(outs[0])))
    assert sorted(ends) == ["Pennywort Close", "Quillwort Close", "Sedge Close", "Tansy Close"]


def test_town_roundabout_one_way_anticlockwise(town):
    """Tollgate Circle is a closed one-way ring driven anticlockwise, radius 28 m."""
    net = town.network
    segs = _segments_of(town, "Tollgate Circle")
    assert len(segs) == 24
    assert all(int(net.seg_twin[s]) == -1 for s in segs)
    (ring,) = [r for r in town.roads if r.name == "Tollgate Circle"]
    assert ring.oneway and ring.coords[0] == ring.coords[-1]
    # Reference: shapely's LinearRing.is_ccw gives the orientation of the drawing order.
    assert shapely.LinearRing(ring.coords).is_ccw
    d = np.hypot(net.node_xy[net.seg_from[segs], 0] - ROUNDABOUT_CENTRE[0],
                 net.node_xy[net.seg_from[segs], 1] - ROUNDABOUT_CENTRE[1])
    np.testing.assert_allclose(d, ROUNDABOUT_RADIUS, atol=1e-3)


@pytest.mark.parametrize(("name", "axis", "sign"), [
    ("Flax Street", 1, 1.0), ("Osier Street", 1, -1.0),
    ("Kiln Street", 0, 1.0), ("Tanner Row", 0, -1.0),
])
def test_town_one_way_pairs_point_one_way(town, name, axis, sign):
    """Each street of the two one-way pairs has segments in its direction only."""
    net = town.network
    segs = _segments_of(town, name)
    step = net.node_xy[net.seg_to[segs]] - net.node_xy[net.seg_from[segs]]
    assert len(segs) > 70
    assert np.all(sign * step[:, axis] > 0.0)
    assert np.all(net.seg_twin[segs] == -1)


def test_town_two_way_streets_have_twins(town):
    """A two-way street (Market Street) has every segment in both directions."""
    net = town.network
    segs = _segments_of(town, "Market Street")
    assert len(segs) % 2 == 0 and np.all(net.seg_twin[segs] >= 0)


def test_town_crossings_are_junctions(town):
    """Wherever two roads cross or touch, both have a vertex there (no bridges)."""
    lines = [shapely.LineString(r.coords) for r in town.roads]
    crossings = 0
    for (i, a), (j, b) in itertools.combinations(enumerate(lines), 2):
        # Reference: shapely (GEOS) intersection of the two polylines.
        cut = shapely.intersection(a, b)
        if cut.is_empty:
            continue
        shared = set(town.roads[i].coords) & set(town.roads[j].coords)
        points = [cut] if cut.geom_type == "Point" else list(cut.geoms)
        for p in points:
            assert p.geom_type == "Point", (town.roads[i].name, town.roads[j].name)
            assert any(abs(p.x - x) < 1e-6 and abs(p.y - y) < 1e-6 for x, y in shared), (
                town.roads[i].name, town.roads[j].name, p.wkt)
            crossings += 1
    assert crossings > 150


def test_town_blocks_and_shape_points(town):
    """Blocks are 150–250 m; shape points at most about 25 m apart (3 m snapping)."""
    for grid in (GRID_X, GRID_Y):
        gaps = np.diff(grid)
        assert gaps.min() >= 150.0 and gaps.max() <= 250.0
    assert float(town.network.seg_len.max()) <= 25.0 + 3.0
    assert float(town.network.seg_len.min()) > 3.0


def test_town_places_on_their_roads(town):
    """Each named place sits on a vertex of the road it names; the depot is in its area."""
    net = town.network
    for place in town.places:
        assert tuple(net.node_xy[place.vertex]) == (place.x, place.y)
        roads = {net.road_name(int(s)) for s in net.out_segments(place.vertex)}
        assert place.road in roads, place
    depot = town.place("Larkmoor Depot")
    assert town.depot_area.contains(shapely.Point(depot.x, depot.y))
    assert len(town.stops()) == 22
    with pytest.raises(KeyError, match="Nowhere"):
        town.place("Nowhere")


def test_town_geojson_imports_with_the_same_ids(town):
    """The GeoJSON form imports (livematch.mapdata.geojson) with identical source ids."""
    net = town.network
    loaded, stats = parse_geojson(roads_geojson(town), "larkmoor.geojson")
    assert stats.ways_kept == len(town.roads)
    assert loaded.n_segments == net.n_segments
    assert ({loaded.source_ids(s) for s in range(loaded.n_segments)}
            == {net.source_ids(s) for s in range(net.n_segments)})
    # Same node ids at the same place: compare WGS84 positions of both projections.
    order = np.argsort(loaded.node_id)
    lon_a, lat_a = loaded.projection.to_lonlat(loaded.node_xy[order, 0],
                                               loaded.node_xy[order, 1])
    lon_b, lat_b = net.projection.to_lonlat(net.node_xy[:, 0], net.node_xy[:, 1])
    assert np.array_equal(loaded.node_id[order], net.node_id)
    np.testing.assert_allclose(lon_a, lon_b, atol=1e-7)
    np.testing.assert_allclose(lat_a, lat_b, atol=1e-7)
    assert {r["name"] for r in loaded.roads} == {r.name for r in town.roads}


def test_town_is_deterministic(town):
    """Building the town twice gives identical arrays and places."""
    again = build_town()
    assert np.array_equal(again.network.node_xy, town.network.node_xy)
    assert np.array_equal(again.network.seg_from, town.network.seg_from)
    assert np.array_equal(again.network.seg_way, town.network.seg_way)
    assert again.places == town.places
