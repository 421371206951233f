"""The trip route model of livematch.sim.drive: routed trips with dwells (opt-in)."""

from __future__ import annotations

import itertools
import math
from collections import Counter

import networkx as nx
import numpy as np
import pytest

from livematch.core.network import RoadNetwork
from livematch.errors import BadNetworkError
from livematch.sim.drive import (
    DriveSettings,
    drivable_segments,
    fastest_path,
    simulate_drive,
    travel_times,
    trip_route,
)
from tests.catalogue import oneway_pair
from tests.test_sim import (
    T0,
    _OnewayWays,
    assert_connected,
    drive_digest,
    extract_network,
    osm_extract,
)

TRIPS = DriveSettings(duration_s=900.0, lead_s=60.0, trips=True)


def reference_graph(net: RoadNetwork, allowed: np.ndarray) -> nx.DiGraph:
    """The allowed directed segments as a networkx graph weighted by travel time
    (the fastest of parallel segments between the same two vertices)."""
    cost = travel_times(net)
    graph = nx.DiGraph()
    for s in np.flatnonzero(allowed).tolist():
        a, b = int(net.seg_from[s]), int(net.seg_to[s])
        if not graph.has_edge(a, b) or graph[a][b]["weight"] > cost[s]:
            graph.add_edge(a, b, weight=float(cost[s]))
    return graph


def legs(route: list[int], starts: list[int]) -> list[list[int]]:
    cuts = [0, *starts, len(route)]
    return [route[a:b] for a, b in itertools.pairwise(cuts)]


def test_simulate_drive_trips_same_seed_same_drive():
    """The same seed gives an identical trips drive; another seed gives another one."""
    net = extract_network()
    allowed = drivable_segments(net)
    a = simulate_drive(net, np.random.default_rng([7, 1]), "v", T0, TRIPS, allowed)
    b = simulate_drive(net, np.random.default_rng([7, 1]), "v", T0, TRIPS, allowed)
    c = simulate_drive(net, np.random.default_rng([7, 2]), "v", T0, TRIPS, allowed)
    assert drive_digest(a) == drive_digest(b) and a.trip_ends == b.trip_ends
    assert drive_digest(a) != drive_digest(c)
    assert len(a.trip_ends) >= 2 and a.observed == (60, 960)


def test_simulate_drive_defaults_bit_identical_to_main_before_trips():
    """The walk models draw exactly the drives they drew before the trip model existed."""
    net = extract_network()
    allowed = drivable_segments(net)
    got = [drive_digest(simulate_drive(net, np.random.default_rng([2009, 1, 3]), "v", T0,
                                       DriveSettings(duration_s=300.0, **kw), allowed))
           for kw in ({}, {"lead_s": 60.0})]
    # Digests computed with this same function on main at commit df3bbc9, before the
    # trip model was added (default settings, and the `lead` model's lead_s=60).
    assert got == ["dba4bf666f372ca8fc8b7795238726e5f0803ed93a306d1aaea72fb0b2d30a04",
                   "69b6ccb5719b4a42c1ece99cb1413f8cc945d8d5509026ef79782c6d7e87fe3a"]
    d = simulate_drive(net, np.random.default_rng([2009, 1, 3]), "v", T0,
                       DriveSettings(duration_s=300.0), allowed)
    assert d.trip_ends == ()


def test_fastest_path_matches_networkx_dijkstra_on_osm_extract():
    """On the test.osm extract the least-time path costs what networkx's Dijkstra finds
    (outside check: networkx.dijkstra_path_length) and is a connected allowed path."""
    net = extract_network()
    allowed = drivable_segments(net)
    cost = travel_times(net)
    graph = reference_graph(net, allowed)
    vertices = sorted(graph.nodes)
    rng = np.random.default_rng(5)
    for _ in range(40):
        a, b = (int(v) for v in rng.choice(vertices, 2, replace=False))
        path = fastest_path(net, a, b, cost, allowed)
        assert int(net.seg_from[path[0]]) == a and int(net.seg_to[path[-1]]) == b
        assert_connected(net, tuple(path))
        assert all(allowed[s] for s in path)
        assert sum(float(cost[s]) for s in path) == pytest.approx(
            nx.dijkstra_path_length(graph, a, b), rel=1e-12)


def test_trip_route_legs_are_least_time_paths_to_far_destinations():
    """Every trip of a route is a least-time path (networkx Dijkstra) to a destination
    0.5-4 km away in a straight line, and a trip never turns round inside itself."""
    net = extract_network()
    allowed = drivable_segments(net)
    cost = travel_times(net)
    graph = reference_graph(net, allowed)
    route, starts = trip_route(net, np.random.default_rng(3), 20_000.0, allowed)
    assert_connected(net, tuple(route))
    trips = legs(route, starts)
    assert len(trips) >= 8 and all(trips)
    for leg in trips:
        a, b = int(net.seg_from[leg[0]]), int(net.seg_to[leg[-1]])
        (ax, ay), (bx, by) = net.node_xy[a], net.node_xy[b]
        assert 500.0 <= math.hypot(bx - ax, by - ay) <= 4000.0
        assert sum(float(cost[s]) for s in leg) == pytest.approx(
            nx.dijkstra_path_length(graph, a, b), rel=1e-12)
        assert all(net.seg_twin[p] != q for p, q in itertools.pairwise(leg))
    # and the route does turn round at some stops: the vehicle leaves the way it came
    assert any(net.seg_twin[route[k - 1]] == route[k] for k in starts)


def test_trips_respect_oneway_tags_of_osm_source():
    """Trips drive oneway=yes ways in node order and oneway=-1 ways against it, as the
    OSM file itself says (read with osmium, outside our importer)."""
    handler = _OnewayWays()
    handler.apply_file(osm_extract("test.osm.pbf"))
    net = extract_network()
    allowed = drivable_segments(net)
    checked = 0
    for i in range(4):
        d = simulate_drive(net, np.random.default_rng([13, i]), f"v{i}", T0, TRIPS, allowed)
        for s in d.path:
            way, a, b = net.source_ids(s)
            for nodes, step in ((handler.forward.get(way), 1), (handler.backward.get(way), -1)):
                if nodes is None:
                    continue
                assert (a, b) in set(itertools.pairwise(nodes[::step]))
                checked += 1
    assert checked > 0


def test_trip_route_stays_legal_on_oneway_pair():
    """On two parallel one-way roads trips only drive east on way 1 and west on way 2,
    even when a destination lies behind the vehicle (it goes round, never back)."""
    net = oneway_pair()
    route, starts = trip_route(net, np.random.default_rng(4), 20_000.0)
    assert_connected(net, tuple(route))
    assert len(starts) >= 5
    ways = Counter()
    for s in route:
        ax, _, bx, _ = net.segment_coords(s)
        way = int(net.seg_way[s])
        ways[way] += 1
        if way == 1:
            assert bx > ax
        elif way == 2:
            assert bx < ax
    assert ways[1] > 0 and ways[2] > 0


def test_simulate_drive_trips_dwell_at_every_destination():
    """With a fixed 30 s dwell and no junction stops, the vehicle stands still 29-31 whole
    seconds at the start vertex of every trip it begins, and only there (apart from the
    drive's start)."""
    net = extract_network()
    settings = DriveSettings(duration_s=900.0, trips=True, dwell_s=(30.0, 30.0), stop_p=0.0)
    d = simulate_drive(net, np.random.default_rng(8), "v", T0, settings)
    lens = net.seg_len[np.asarray(d.path)]
    start = np.concatenate([[0.0], np.cumsum(lens)])
    pos = np.array([p.path_pos_m for p in d.truth])
    inside = [k for k in d.trip_ends if start[k] < pos[-1]]
    assert len(inside) >= 2
    for k in inside:
        at_stop = int(np.sum(np.abs(pos - start[k]) < 1e-9))
        assert 29 <= at_stop <= 31, (k, at_stop)
    # Standing seconds elsewhere: only the first second at the start (standstill).
    moving = np.diff(pos) > 0.0
    still_total = int(np.sum(~moving))
    dwell_total = sum(int(np.sum(np.abs(pos - start[k]) < 1e-9)) - 1 for k in inside)
    assert still_total - dwell_total <= 2


def test_drive_settings_refuse_bad_trip_options():
    """Trips with the walk's revisit factor, an inverted distance range or a bad dwell
    are refused with the values named."""
    with pytest.raises(ValueError, match=r"revisit_factor=0\.1"):
        DriveSettings(trips=True, revisit_factor=0.1)
    with pytest.raises(ValueError, match=r"got 900\.0, 500\.0"):
        DriveSettings(trip_min_m=900.0, trip_max_m=500.0)
    with pytest.raises(ValueError, match=r"got \(5\.0, 1\.0\)"):
        DriveSettings(dwell_s=(5.0, 1.0))


def test_trip_route_without_mid_road_turn_rounds():
    """With turn_round_mid_road=False a trip leaves a stop in the middle of a road (a
    vertex with two neighbours, counted with networkx) by the way it came only when no
    other way leads on; the default model does turn round there."""
    net = extract_network()
    allowed = drivable_segments(net)
    cost = travel_times(net)
    undirected = nx.Graph(zip(net.seg_from.tolist(), net.seg_to.tolist(), strict=True))

    def mid_road_turns(route: list[int], starts: list[int]) -> list[int]:
        return [k for k in starts if net.seg_twin[route[k - 1]] == route[k]
                and undirected.degree(int(net.seg_from[route[k]])) == 2]

    route, starts = trip_route(net, np.random.default_rng(6), 30_000.0, allowed,
                               turn_round_mid_road=False)
    assert_connected(net, tuple(route))
    assert len(starts) >= 10
    for k in mid_road_turns(route, starts):
        nxt = starts[starts.index(k) + 1] if k != starts[-1] else len(route)
        with pytest.raises(BadNetworkError):
            fastest_path(net, int(net.seg_from[route[k]]), int(net.seg_to[route[nxt - 1]]),
                         cost, allowed, route[k])
    default = trip_route(net, np.random.default_rng(6), 30_000.0, allowed)
    assert mid_road_turns(*default)
